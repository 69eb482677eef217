"""Hall-bar voltages from sheet response tensors: crystal angle, open-circuit fields, lock-in readings.

Geometry (docs/theory.md §10).  A 2D Hall bar of width W carries a current I along its
axis x', at angle θ (``angle_deg``) from the crystal x axis; y' = ẑ × x'.  Tensors are rotated
from the crystal frame into the bar frame with R = [[cos θ, sin θ], [−sin θ, cos θ]]
(v'_a = R_ai v_i):

    σ'_ab = R_ai R_bj σ_ij,      χ'_abc = R_ai R_bj R_ck χ_ijk.

First order.  The current is fixed, j = (I/W, 0) in the bar frame, and the edges carry no current
(j_y = 0), so the uniform field is E = σ'⁻¹ j with the full inverse (a Hall σ'_xy gives a
transverse E_y as well).  V_xx = L E_x is the voltage between probes a distance L apart (upstream
minus downstream), V_y = W E_y (potential of the edge at y' = 0 minus that at y' = W).

Second order.  An ideal current source supplies no current at 2ω or at zero frequency, so the
second-order field E⁽²⁾ makes the total second-order current vanish in *both* directions:
σ' E⁽²⁾ + j⁽²⁾ = 0 → E⁽²⁾ = −σ'⁻¹ j⁽²⁾, with j⁽²ω⁾_a = χ'_abc E_b E_c and
j⁽⁰⁾_a = χ'^dc_abc E_b E_c* (Sodemann–Fu phasor convention, docs/theory.md §A2).  With σ'_xy ≪ σ'_xx
this reduces to the leading-order form of §10, E_y⁽²ω⁾ = −χ'_yxx E_x²/σ'_yy and
V_y⁽²ω⁾ = −χ'_yxx I²/(W σ'_xx² σ'_yy): ∝ I² and ∝ 1/W at fixed current.  The zero-frequency
(rectified) field uses the same σ' as the drive (exact at lock-in frequencies, ωτ ~ 1e-10).

Drive and lock-in (§10, check #35).  The drive is I(t) = I0 sin ωt = Re[−i I0 e^{iωt}].  Phasors
below are quoted for a *cosine* drive of the same amplitude (current phasor I0, real); for the
sine drive every 2ω phasor is multiplied by (−i)² = −1 and every ω phasor by −i.  A signal
Re[Z e^{iνt}] reads on a lock-in referenced to sin νt (of the drive) as R sin(νt + φ) with
R = |Z| (amplitude), rms = |Z|/√2 and φ = arg Z + 90°.  So for V = K I², K > 0, the 2ω part
−(K I0²/2) cos 2ωt shows φ = −90° and the ω part of a resistor shows φ = 0°.  The quadrature sign
depends on the instrument's phase convention; calibrate with a known quadratic element.

Also returned: the Hall angle tan θ_H = Re σ'_xy / Re σ'_xx, the nonlinear Hall ratio
E⊥/E∥² = Re χ'_yxx / Re σ'_yy (m/V; τ-independent for the dipole term, §5.7), the sheet current
density I0/W and the time-averaged Joule power per area ½ Re(j·E*) (W/m²).

Polarised drive and the helicity-odd rectified voltage (docs/theory.md §5.9, §10).  A uniform
in-plane field E(t) = Re[E e^{iωt}] (an optical or THz field at any ωτ, E the complex phasor in the
crystal frame, :func:`polarisation_phasor`) rectifies into the sheet current
j⁽⁰⁾_a = Re[χ^full_abc E_b E_c*] (``Response.chi_dc_full`` at the drive frequency).  The bar's
contacts draw no dc current (the current source supplies none), so the dc field
E⁽⁰⁾ = −σ'⁻¹ j'⁽⁰⁾ (σ' the dc sheet conductivity in the bar frame) appears as
V⁽⁰⁾_x = L E⁽⁰⁾_x, V⁽⁰⁾_y = W E⁽⁰⁾_y (:func:`photo_voltages`).  Reversing the handedness replaces E by
E* (same ellipse, opposite sense of rotation); the helicity-odd part ½[V(E) − V(E*)] is the
circular photogalvanic voltage, the even part the linear one.  A rectified voltage of the current
drive (``vdc_x``, ``vdc_y``) and one of the polarised field add: their cross terms oscillate at
the difference frequency.

Everything is written with ``jax.numpy`` (differentiable); shapes broadcast explicitly.
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from crosswind.solver.pytrees import pytree_dataclass
from crosswind.solver.vocabulary import DEVICE_FIELDS

UM = 1e-6
UA = 1e-6

FIELDS_UNITS = {k: f.unit_2d for k, f in DEVICE_FIELDS.items() if k not in ("sigma_bar", "chi_bar")}


@pytree_dataclass
class HallBarReading:
    """What the Hall bar shows (SI units, :data:`FIELDS_UNITS`; long names in
    :data:`crosswind.solver.vocabulary.DEVICE_FIELDS`).  ω and 2ω phasors (``field_x``, ``field_y``,
    ``v_xx``, ``v_hall``, ``v2w_x``, ``v2w_y``) are complex and quoted for a cosine drive; amplitudes,
    rms values and the lock-in phase are for the sine drive I0 sin ωt."""

    field_x: Any
    field_y: Any
    v_xx: Any
    v_hall: Any
    v2w_x: Any
    v2w_y: Any
    v2w_y_amplitude: Any
    v2w_y_rms: Any
    v2w_y_phase_deg: Any
    v2w_y_lockin_x_rms: Any
    v2w_y_lockin_y_rms: Any
    v2w_x_amplitude: Any
    v2w_x_rms: Any
    vdc_x: Any
    vdc_y: Any
    hall_angle: Any
    nonlinear_ratio: Any
    current_density: Any
    power_density: Any


@dataclass(frozen=True)
class HallBar:
    """A Hall bar: ``width_um`` W and probe spacing ``length_um`` L (μm), drive current amplitude
    ``current_uA`` I0 (μA) of I(t) = I0 sin ωt at ``frequency_Hz``; ``thickness_nm`` d for a film of
    a 3D model (bulk tensors become sheet tensors, :func:`film_sheet`; None for a 2D sheet)."""

    width_um: float
    length_um: float
    current_uA: float
    frequency_Hz: float = 17.0
    thickness_nm: float | None = None

    def __post_init__(self):
        for name in ("width_um", "length_um", "current_uA"):
            v = getattr(self, name)
            if not (isinstance(v, (int, float, np.floating)) and v > 0 and np.isfinite(v)):
                raise ValueError(f"HallBar: {name} must be a positive number, got {v!r}")
        if not (self.frequency_Hz >= 0):
            raise ValueError(f"HallBar: frequency_Hz must be >= 0, got {self.frequency_Hz!r}")
        if self.thickness_nm is not None and not (self.thickness_nm > 0 and np.isfinite(self.thickness_nm)):
            raise ValueError(f"HallBar: thickness_nm must be a positive number, got {self.thickness_nm!r}")


@jax.jit
def rotation(angle_deg):
    """R(θ) with rows x' = (cos θ, sin θ), y' = (−sin θ, cos θ); shape (..., 2, 2)."""
    t = jnp.deg2rad(jnp.asarray(angle_deg, dtype=jnp.float64))
    c, s = jnp.cos(t), jnp.sin(t)
    return jnp.stack([jnp.stack([c, s], -1), jnp.stack([-s, c], -1)], -2)


def _common(sigma, angle_deg, *others):
    """Broadcast the leading shapes of sigma (..., 2, 2), angle (...) and other tensors explicitly."""
    sigma = jnp.asarray(sigma)
    angle = jnp.asarray(angle_deg, dtype=jnp.float64)
    lead = [sigma.shape[:-2], angle.shape] + [jnp.shape(o)[:-3] for o in others]
    shape = tuple(np.broadcast_shapes(*lead))
    out = [jnp.broadcast_to(sigma, shape + sigma.shape[-2:]), jnp.broadcast_to(angle, shape)]
    out += [jnp.broadcast_to(jnp.asarray(o), shape + jnp.shape(o)[-3:]) for o in others]
    return shape, out


@jax.jit
def rotate_sigma(sigma, angle_deg):
    """σ' = R σ Rᵀ (bar frame, x' along the current at ``angle_deg`` from crystal x)."""
    _, (s, a) = _common(sigma, angle_deg)
    R = rotation(a).astype(s.dtype)
    return jnp.einsum("...ai,...bj,...ij->...ab", R, R, s)


@jax.jit
def rotate_chi(chi, angle_deg):
    """χ'_abc = R_ai R_bj R_ck χ_ijk."""
    chi = jnp.asarray(chi)
    lead = tuple(np.broadcast_shapes(chi.shape[:-3], jnp.shape(angle_deg)))
    c = jnp.broadcast_to(chi, lead + chi.shape[-3:])
    R = rotation(jnp.broadcast_to(jnp.asarray(angle_deg, dtype=jnp.float64), lead)).astype(c.dtype)
    return jnp.einsum("...ai,...bj,...ck,...ijk->...abc", R, R, R, c)


def film_sheet(sigma, chi, chi_dc, thickness_nm):
    """Sheet tensors of a film of thickness d = ``thickness_nm`` from bulk tensors of a 3D model:
    the in-plane (x, y) components times d, σ_sheet = σ_bulk d [S/m → S], χ_sheet = χ_bulk d
    [A/V² → A·m/V²].  An approximation: no confinement subbands, no surface (Fermi-arc) states, no
    surface scattering (docs/theory.md §16.5)."""
    d = thickness_nm * 1e-9
    return (sheet_rank2(jnp.asarray(sigma), d), sheet_rank3(jnp.asarray(chi), d),
            sheet_rank3(jnp.asarray(chi_dc), d))


def sheet_rank2(x, thickness_m):
    """In-plane block of a bulk rank-2 tensor (..., 3, 3) times the thickness (numpy or JAX)."""
    return x[..., :2, :2] * thickness_m


def sheet_rank3(x, thickness_m):
    """In-plane block of a bulk rank-3 tensor (..., 3, 3, 3) times the thickness (numpy or JAX)."""
    return x[..., :2, :2, :2] * thickness_m


def hall_bar(sigma, chi, chi_dc, bar: HallBar, angle_deg=0.0) -> HallBarReading:
    """Voltages and ratios of ``bar`` for sheet tensors in the crystal frame: ``sigma`` (..., 2, 2) S,
    ``chi``/``chi_dc`` (..., 2, 2, 2) A·m/V² (Sodemann–Fu phasor convention), current at
    ``angle_deg`` (scalar or array broadcasting with the leading dims).  Returns a
    :class:`HallBarReading` (units in :data:`FIELDS_UNITS`); ω and 2ω phasors are for a cosine drive of amplitude I0
    (see the module docstring), amplitudes, rms values and lock-in phases are for the sine drive.
    Compiled once per shape (``jax.jit``; ``bar`` is static) and differentiable.  Bulk tensors of a
    3D model (..., 3, 3) S/m and (..., 3, 3, 3) A/V² are converted with :func:`film_sheet` when
    ``bar.thickness_nm`` is given."""
    if jnp.shape(sigma)[-2:] == (3, 3) and bar.thickness_nm is not None:
        sigma, chi, chi_dc = film_sheet(sigma, chi, chi_dc, bar.thickness_nm)
    if jnp.shape(sigma)[-2:] != (2, 2) or jnp.shape(chi)[-3:] != (2, 2, 2):
        raise ValueError("hall_bar: sigma must be (..., 2, 2) and chi (..., 2, 2, 2): the device layer "
                         "handles 2D sheets only (a film of a 3D model: HallBar(thickness_nm=...))")
    return _hall_bar_jit(sigma, chi, chi_dc, bar, angle_deg)


def _hall_bar(sigma, chi, chi_dc, bar: HallBar, angle_deg=0.0) -> HallBarReading:
    shape, (s, a, c, cd) = _common(jnp.asarray(sigma).astype(jnp.complex128), angle_deg,
                                   jnp.asarray(chi).astype(jnp.complex128),
                                   jnp.asarray(chi_dc).astype(jnp.complex128))
    sp = rotate_sigma(s, a)
    cp = rotate_chi(c, a)
    cdp = rotate_chi(cd, a)
    W, L, I0 = bar.width_um * UM, bar.length_um * UM, bar.current_uA * UA
    rho = jnp.linalg.inv(sp)
    j = jnp.zeros(shape + (2,), dtype=jnp.complex128).at[..., 0].set(I0 / W)
    E = jnp.einsum("...ab,...b->...a", rho, j)
    j2 = jnp.einsum("...abc,...b,...c->...a", cp, E, E)
    j0 = jnp.einsum("...abc,...b,...c->...a", cdp, E, jnp.conj(E)).real.astype(jnp.complex128)
    E2 = -jnp.einsum("...ab,...b->...a", rho, j2)
    E0 = -jnp.einsum("...ab,...b->...a", rho, j0)
    v2y = W * E2[..., 1]
    v2x = L * E2[..., 0]
    amp_y = jnp.abs(v2y)
    phase = lockin_reading(v2y, 2)[2]
    rms_y = amp_y / jnp.sqrt(2.0)
    sxx, syy, sxy = sp[..., 0, 0].real, sp[..., 1, 1].real, sp[..., 0, 1].real
    return HallBarReading(
        field_x=E[..., 0], field_y=E[..., 1],
        v_xx=L * E[..., 0], v_hall=W * E[..., 1],
        v2w_x=v2x, v2w_y=v2y,
        v2w_y_amplitude=amp_y, v2w_y_rms=rms_y, v2w_y_phase_deg=phase,
        v2w_y_lockin_x_rms=rms_y * jnp.cos(jnp.deg2rad(phase)),
        v2w_y_lockin_y_rms=rms_y * jnp.sin(jnp.deg2rad(phase)),
        v2w_x_amplitude=jnp.abs(v2x), v2w_x_rms=jnp.abs(v2x) / jnp.sqrt(2.0),
        # rectified part: the sine drive gives the same E E* as the cosine drive
        vdc_x=L * E0[..., 0].real, vdc_y=W * E0[..., 1].real,
        hall_angle=sxy / sxx,
        nonlinear_ratio=cp[..., 1, 0, 0].real / syy,
        current_density=jnp.full(shape, I0 / W),
        power_density=0.5 * jnp.einsum("...a,...a->...", j, jnp.conj(E)).real,
    )


_hall_bar_jit = jax.jit(_hall_bar, static_argnames=("bar",))


def polarisation_phasor(ellipticity_deg, angle_deg=0.0):
    """Unit phasor ê (..., 2) complex, |ê_x|² + |ê_y|² = 1, of the in-plane field E(t) = Re[E0 ê e^{iωt}]
    (docs/theory.md §5.9): polarisation ellipse with its major axis û = (cos θ, sin θ) at ``angle_deg``
    θ from the crystal x axis and ellipticity angle χ = ``ellipticity_deg`` in [−45, 45] (tan|χ| =
    minor/major axis), ê = cos χ û − i sin χ ŵ with ŵ = ẑ × û.  So E(t) = E0 (cos χ cos ωt û + sin χ
    sin ωt ŵ): χ > 0 rotates counterclockwise seen from +ẑ (from x̂ towards ŷ), χ < 0 clockwise,
    χ = 0 is linear along û and χ = ±45° circular.  Stokes parameters (:func:`stokes`):
    S3/S0 = sin 2χ, the degree of circular polarisation."""
    chi = jnp.deg2rad(jnp.asarray(ellipticity_deg, dtype=jnp.float64))
    th = jnp.deg2rad(jnp.asarray(angle_deg, dtype=jnp.float64))
    chi, th = jnp.broadcast_arrays(chi, th)
    u = jnp.stack([jnp.cos(th), jnp.sin(th)], -1).astype(jnp.complex128)
    w = jnp.stack([-jnp.sin(th), jnp.cos(th)], -1).astype(jnp.complex128)
    return jnp.cos(chi)[..., None].astype(jnp.complex128) * u - 1j * jnp.sin(chi)[..., None].astype(jnp.complex128) * w


def stokes(field):
    """Stokes parameters (S0, S1, S2, S3), each (...), of an in-plane phasor ``field`` (..., 2) in the
    convention E(t) = Re[E e^{iωt}] (docs/theory.md §5.9): S0 = |E_x|² + |E_y|², S1 = |E_x|² − |E_y|²,
    S2 = 2 Re(E_x E_y*), S3 = 2 Im(E_x E_y*) = −i(E × E*)_z, positive when E(t) rotates
    counterclockwise seen from +ẑ.  Units: those of the field squared."""
    e = jnp.asarray(field).astype(jnp.complex128)
    ex, ey = e[..., 0], e[..., 1]
    p = ex * jnp.conj(ey)
    return (jnp.abs(ex) ** 2 + jnp.abs(ey) ** 2, jnp.abs(ex) ** 2 - jnp.abs(ey) ** 2, 2.0 * p.real, 2.0 * p.imag)


def rectified_current(chi_dc_full, field):
    """The dc current j⁽⁰⁾_a = Re[χ^full_abc E_b E_c*] (..., d), real, of a field phasor ``field``
    (..., d) (V/m) for the unsymmetrised rectified tensor ``chi_dc_full`` (..., d, d, d)
    (``Response.chi_dc_full``; A·m/V² for a sheet, giving A/m; docs/theory.md §5.9)."""
    c = jnp.asarray(chi_dc_full).astype(jnp.complex128)
    e = jnp.asarray(field).astype(jnp.complex128)
    return jnp.einsum("...abc,...b,...c->...a", c, e, jnp.conj(e)).real


@pytree_dataclass
class PhotoReading:
    """Rectified (dc) readings of the Hall bar under a polarised field (:func:`photo_voltages`), SI
    units (:data:`crosswind.solver.vocabulary.DEVICE_FIELDS`), shape (...): ``photo_current_x``/``_y``
    the sheet current j⁽⁰⁾ in the bar frame (A/m, short circuit); ``photo_vdc_x``/``_y`` the open-circuit
    voltages V_x = L E⁽⁰⁾_x and V_y = W E⁽⁰⁾_y for the given handedness; ``photo_vdc_helicity_x``/``_y``
    their helicity-odd part ½[V(E) − V(E*)] (reverses with the sense of rotation; zero for linear
    polarisation)."""

    photo_current_x: Any
    photo_current_y: Any
    photo_vdc_x: Any
    photo_vdc_y: Any
    photo_vdc_helicity_x: Any
    photo_vdc_helicity_y: Any


@pytree_dataclass
class DrivenHallBarReading(HallBarReading, PhotoReading):
    """A :class:`HallBarReading` with the :class:`PhotoReading` of a polarised field drive (a scenario's
    ``[drive]``): the fields of both, so that sweeps write the photovoltages beside the current-drive
    readings (:func:`with_photo`)."""


def with_photo(reading: HallBarReading, photo: PhotoReading) -> DrivenHallBarReading:
    """``reading`` extended by ``photo`` (same leading shape)."""
    return DrivenHallBarReading(**{f.name: getattr(reading, f.name) for f in dataclasses.fields(reading)},
                                **{f.name: getattr(photo, f.name) for f in dataclasses.fields(photo)})


def photo_voltages(sigma_dc, chi_dc_full, field, bar: HallBar, angle_deg=0.0) -> PhotoReading:
    """Open-circuit dc voltages of ``bar`` under a uniform polarised field phasor ``field`` (..., 2) V/m in
    the crystal frame (e.g. E0 · :func:`polarisation_phasor`), from the dc sheet conductivity
    ``sigma_dc`` (..., 2, 2) S and ``chi_dc_full`` (..., 2, 2, 2) A·m/V² at the field's frequency, the bar
    axis at ``angle_deg`` from crystal x (module docstring; docs/theory.md §5.9, §10).  Differentiable."""
    sigma_dc, chi_dc_full = jnp.asarray(sigma_dc), jnp.asarray(chi_dc_full)
    field = jnp.asarray(field).astype(jnp.complex128)
    lead = tuple(np.broadcast_shapes(sigma_dc.shape[:-2], chi_dc_full.shape[:-3], field.shape[:-1],
                                     jnp.shape(angle_deg)))
    R = rotation(jnp.broadcast_to(jnp.asarray(angle_deg, dtype=jnp.float64), lead))
    sp = rotate_sigma(jnp.broadcast_to(sigma_dc, lead + (2, 2)), jnp.broadcast_to(angle_deg, lead)).real
    chi = jnp.broadcast_to(chi_dc_full, lead + (2, 2, 2))
    e = jnp.broadcast_to(field, lead + (2,))
    W, L = bar.width_um * UM, bar.length_um * UM

    def volts(efield):
        j = jnp.einsum("...ai,...i->...a", R, rectified_current(chi, efield))
        e0 = -jnp.linalg.solve(sp, j[..., None])[..., 0]
        return j, L * e0[..., 0], W * e0[..., 1]

    j, vx, vy = volts(e)
    _, vx_r, vy_r = volts(jnp.conj(e))
    return PhotoReading(photo_current_x=j[..., 0], photo_current_y=j[..., 1], photo_vdc_x=vx, photo_vdc_y=vy,
                        photo_vdc_helicity_x=0.5 * (vx - vx_r), photo_vdc_helicity_y=0.5 * (vy - vy_r))


def lockin_reading(amplitude_phasor, harmonic: int = 2) -> tuple:
    """(amplitude, rms, phase in deg) that a lock-in referenced to the sine drive shows for a
    harmonic phasor quoted for the cosine drive (harmonic 1: ×(−i); harmonic 2: ×(−1))."""
    z = jnp.asarray(amplitude_phasor, dtype=jnp.complex128) * ((-1j) ** harmonic)
    ph = jnp.rad2deg(jnp.angle(z)) + 90.0
    ph = jnp.where(ph > 180.0, ph - 360.0, ph)
    return jnp.abs(z), jnp.abs(z) / jnp.sqrt(2.0), ph
