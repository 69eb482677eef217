"""The rectified current of an elliptically or circularly polarised field (docs/theory.md §5.9).

With E(t) = Re[E e^{iωt}] and a complex phasor E, the dc current is j⁽⁰⁾_a = Re[χ^full_abc E_b E_c*]
with the rectified tensor *not* symmetrised in b, c (``Response.chi_dc_full``; ``chi_dc`` is its
symmetric part).  Its antisymmetric part is the Berry-curvature-dipole term alone: for constant τ
and q = −e, in 2D,

    ½(χ^full_abc − χ^full_acb) = e³τ ε_bc D_a / (4ħ²(1 + iωτ)),

the dipole coefficient χ_abc = −ε_adc e³τ D_bd/(2ħ²(1+iωτ)) of Sodemann & Fu, PRL 115, 216806 (2015)
before symmetrisation, and the helicity-odd current is j = C S3 with S3 = 2 Im(E_x E_y*) and

    C = (e³τ/4ħ²) · ωτ/(1 + ω²τ²) · D

(``Response.chi_circular``): the circular photogalvanic current set by the Berry-curvature dipole
(Moore & Orenstein, PRL 105, 026805, 2010; Deyo, Golub, Ivchenko & Spivak, arXiv:0904.1917, 2009),
τ-independent (e³/4ħ²ω) D S3 for ωτ ≫ 1.  The Chambers time-domain oracle of
tests/test_chambers_oracle.py checks the circular current independently of the solver's kernels.
"""
from __future__ import annotations

import functools

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from test_chambers_oracle import (
    FIELD,
    MU,
    N_TIME,
    RTOL,
    TAU,
    TEMPERATURE,
    chambers_currents,
    harmonic,
    oracle_orders,
    solver_mesh,
    toy_curvature,
    toy_energies,
    toy_model,
    toy_velocities,
)
from test_scenario import GOOD

from crosswind.models import build
from crosswind.models.units import E_CHARGE, HBAR_JS, KB_EVK
from crosswind.solver import response
from crosswind.solver.engine.device import (
    HallBar,
    photo_voltages,
    polarisation_phasor,
    rectified_current,
    stokes,
)

EPS2 = np.array([[0.0, 1.0], [-1.0, 0.0]])
DIRAC_TAU = 100.0                     # fs
DIRAC_MU, DIRAC_T = 0.15, 20.0        # eV, K


def hz(omega_tau, tau):
    """Drive frequency (Hz) for ωτ at τ (fs)."""
    return omega_tau / tau * 1e15 / (2 * np.pi)


def closed_form_circular(dipole, omega_tau, tau_fs):
    """C = (e³τ/4ħ²) ωτ/(1+ω²τ²) D (2D, q = −e, constant τ; docs/theory.md §5.9), A·m/V²."""
    tau = tau_fs * 1e-15
    return E_CHARGE ** 3 * tau / (4 * HBAR_JS ** 2) * omega_tau / (1 + omega_tau ** 2) * np.asarray(dipole)


def antisym(chi):
    return 0.5 * (chi - np.swapaxes(chi, -1, -2))


@functools.cache
def dirac():
    """A tilted massive Dirac valley: time reversal and inversion broken, D_x ≠ 0 (docs/theory.md §6)."""
    return build("massive-dirac", velocity=5e5, mass=0.1, tilt=5e4, valleys=1)


@functools.cache
def dirac_response(omega_tau, engine="mesh"):
    kw = dict(resolution=0) if engine == "mesh" else dict(engine=engine, resolution=0)
    return response(dirac(), DIRAC_MU, DIRAC_T, DIRAC_TAU, hz(omega_tau, DIRAC_TAU), **kw)


def scale(a):
    s = float(np.max(np.abs(a)))
    assert s > 0, "the compared tensor vanishes: the check would be vacuous"
    return s


# ---------------------------------------------------------------------------------- polarisation ---
def test_polarisation_phasor_conventions():
    """ê = cos χ û − i sin χ ŵ: |ê| = 1, S3/S0 = sin 2χ, S1 = cos 2χ cos 2θ, S2 = cos 2χ sin 2θ
    (Stokes parameters, common practice; docs/theory.md §5.9), and χ > 0 turns E(t) = Re[ê e^{iωt}]
    counterclockwise seen from +ẑ (E × dE/dt > 0 at every instant)."""
    chis = np.array([-45.0, -20.0, 0.0, 10.0, 45.0])
    theta = 30.0
    e = np.asarray(polarisation_phasor(chis, theta))
    s0, s1, s2, s3 = (np.asarray(x) for x in stokes(e))
    c, t = np.deg2rad(chis), np.deg2rad(theta)
    np.testing.assert_allclose(s0, 1.0, rtol=1e-15)
    np.testing.assert_allclose(s3, np.sin(2 * c), rtol=0, atol=1e-15)
    np.testing.assert_allclose(s1, np.cos(2 * c) * np.cos(2 * t), rtol=0, atol=1e-15)
    np.testing.assert_allclose(s2, np.cos(2 * c) * np.sin(2 * t), rtol=0, atol=1e-15)
    wt = np.linspace(0.0, 2 * np.pi, 13)
    field = (e[:, None, :] * np.exp(1j * wt)[None, :, None]).real              # E(t)
    rate = (1j * e[:, None, :] * np.exp(1j * wt)[None, :, None]).real          # dE/d(ωt)
    turn = field[..., 0] * rate[..., 1] - field[..., 1] * rate[..., 0]        # (E × dE/dt)_z
    np.testing.assert_allclose(turn, np.sin(c)[:, None] * np.cos(c)[:, None] * np.ones_like(wt), atol=1e-15)
    # the major axis lies along û: at ωt = 0 the field is cos χ û
    np.testing.assert_allclose(field[:, 0], np.cos(c)[:, None] * np.array([np.cos(t), np.sin(t)]), atol=1e-15)


# ---------------------------------------------------------------------------------- the tensor -----
@pytest.mark.parametrize("wt", [0.0, 0.7, 2.5])
def test_symmetric_part_is_chi_dc(wt):
    """chi_dc (symmetrised, exact for linear drive) is the symmetric part of chi_dc_full, and the
    nonlinear Drude and intrinsic parts carry no antisymmetric part (docs/theory.md §5.9)."""
    r = dirac_response(wt)
    full, dc = np.asarray(r.chi_dc_full), np.asarray(r.chi_dc)
    sym = 0.5 * (full + np.swapaxes(full, -1, -2))
    assert np.max(np.abs(sym - dc)) <= 1e-14 * scale(dc)
    rest = full - np.asarray(r.chi_dc_parts.dipole)        # symmetrised parts of ND and intrinsic
    assert np.max(np.abs(antisym(rest) - antisym(full))) <= 1e-14 * scale(antisym(full))
    assert r.units["chi_dc_full"] == r.units["chi_circular"] == "A m V^-2"


@pytest.mark.parametrize("wt", [0.3, 0.7, 1.0, 2.5, 10.0])
def test_antisymmetric_part_equals_closed_form(wt):
    """½(χ^full_abc − χ^full_acb) = e³τ ε_bc D_a/(4ħ²(1+iωτ)) with D the Berry-curvature dipole of the
    same call: the Sodemann & Fu, PRL 115, 216806 (2015) dipole coefficient before symmetrisation;
    chi_circular = (e³τ/4ħ²) ωτ/(1+ω²τ²) D (Moore & Orenstein, PRL 105, 026805 (2010))."""
    r = dirac_response(wt)
    tau = DIRAC_TAU * 1e-15
    D = np.asarray(r.dipole)
    expected = E_CHARGE ** 3 * tau / (4 * HBAR_JS ** 2 * (1 + 1j * wt)) * np.einsum("bc,a->abc", EPS2, D)
    got = antisym(np.asarray(r.chi_dc_full))
    assert np.max(np.abs(got - expected)) <= 1e-12 * scale(expected)
    c = np.asarray(r.chi_circular)
    cf = closed_form_circular(D, wt, DIRAC_TAU)
    assert np.max(np.abs(c - cf)) <= 1e-12 * scale(cf)
    assert c.dtype == np.float64


def test_no_circular_current_for_a_static_field():
    """ω = 0: Im τ̃ = 0, so chi_circular vanishes exactly and chi_dc_full is real (docs/theory.md §5.9)."""
    r = dirac_response(0.0)
    assert np.all(np.asarray(r.chi_circular) == 0.0)
    assert np.all(np.asarray(r.chi_dc_full).imag == 0.0)
    assert scale(antisym(np.asarray(r.chi_dc_full).real)) > 0      # an antisymmetric part nothing can probe


def test_frequency_and_tau_dependence():
    """C/(τD) follows ωτ/(1+ω²τ²): maximal at ωτ = 1, and for ωτ ≫ 1 C → (e³/4ħ²ω) D, independent
    of τ (Moore & Orenstein, PRL 105, 026805 (2010); Deyo, Golub, Ivchenko & Spivak, arXiv:0904.1917
    (2009)).  τ enters only through the relaxation factor here because D (a Fermi-surface integral) does
    not depend on τ."""
    wts = np.array([0.1, 0.5, 1.0, 2.0, 5.0])
    ratio = []
    for wt in wts:
        r = dirac_response(float(wt))
        ratio.append(float(np.asarray(r.chi_circular)[0] / closed_form_circular(np.asarray(r.dipole), 1.0, DIRAC_TAU)[0]))
    # closed_form at ωτ = 1 carries ½: the ratio is 2ωτ/(1+ω²τ²), 1 at the maximum
    np.testing.assert_allclose(ratio, 2 * wts / (1 + wts ** 2), rtol=1e-12)
    assert int(np.argmax(ratio)) == 2
    # fixed ω, τ from 1e3 to 1e4 fs (ωτ from 50 to 500): C approaches e³D/(4ħ²ω)
    omega = 50.0 / 1e3 * 1e15                                               # rad/s
    taus = np.array([1e3, 1e4])
    r = response(dirac(), DIRAC_MU, DIRAC_T, taus, omega / (2 * np.pi), resolution=0)
    limit = E_CHARGE ** 3 / (4 * HBAR_JS ** 2 * omega) * np.asarray(r.dipole)[:, 0]
    c = np.asarray(r.chi_circular)[:, 0]
    wt = omega * taus * 1e-15
    np.testing.assert_allclose(c / limit, wt ** 2 / (1 + wt ** 2), rtol=1e-12)
    assert abs(c[1] / limit[1] - 1) < 1e-5 and abs(c[0] / limit[0] - 1) > 1e-4


@pytest.mark.parametrize("engine", [pytest.param("ladder", marks=pytest.mark.slow), "rays"])   # ladder ≈ 45 s
def test_every_engine_gives_the_full_tensor(engine):
    """The energy-resolved engines (ladder for lattices, shared rays for continuum models; docs/theory.md
    §14.2–14.3) give the same relations: sym(chi_dc_full) = chi_dc and the antisymmetric part
    e³τ ε_bc D_a/(4ħ²(1+iωτ)) (Sodemann & Fu 2015 before symmetrisation; docs/theory.md §5.9)."""
    wt = 0.7
    if engine == "ladder":
        r = response(toy_model(), -1.0, 300.0, TAU, hz(wt, TAU), engine="ladder", resolution=0)
        tau = TAU
    else:
        r = response(dirac(), DIRAC_MU, DIRAC_T, DIRAC_TAU, hz(wt, DIRAC_TAU), engine="rays", resolution=0)
        tau = DIRAC_TAU
    assert r.resolution.engine == engine
    full, dc = np.asarray(r.chi_dc_full), np.asarray(r.chi_dc)
    assert np.max(np.abs(0.5 * (full + np.swapaxes(full, -1, -2)) - dc)) <= 1e-14 * scale(dc)
    D = np.asarray(r.dipole)
    expected = E_CHARGE ** 3 * tau * 1e-15 / (4 * HBAR_JS ** 2 * (1 + 1j * wt)) * np.einsum("bc,a->abc", EPS2, D)
    assert np.max(np.abs(antisym(full) - expected)) <= 1e-12 * scale(expected)
    cf = closed_form_circular(D, wt, tau)
    assert np.max(np.abs(np.asarray(r.chi_circular) - cf)) <= 1e-12 * scale(cf)
    assert np.shape(r.error.chi_circular) == np.shape(r.chi_circular)


@pytest.mark.parametrize("case", ["lattice", pytest.param("kp", marks=pytest.mark.slow)])   # kp ≈ 20 s
def test_three_dimensional_circular_coefficient(case):
    """3D: C = (e³τ/4ħ²) ωτ/(1+ω²τ²) (D − 1 Tr D) for q = −e, with j_a = C_ad s_d and s = −i E × E*
    (docs/theory.md §5.9), on the tilted lattice Weyl model (node quadrature; Tr D ≠ 0 enters) and
    on a tilted k·p Weyl pair (shell engine)."""
    wt, tau = 0.7, 50.0
    if case == "lattice":
        r = response(build("weyl", tilt=0.4), 0.05, 300.0, tau, hz(wt, tau), resolution=0)
        assert abs(np.trace(np.asarray(r.dipole))) > 0.1 * scale(r.dipole)
    else:
        r = response(build("weyl-pair-kp", tilt_x=1e5), 0.05, 100.0, tau, hz(wt, tau), engine="shells", resolution=0)
        assert r.resolution.engine == "shells"
    D = np.asarray(r.dipole)
    assert D.shape == (3, 3)
    cf = E_CHARGE ** 3 * tau * 1e-15 / (4 * HBAR_JS ** 2) * wt / (1 + wt ** 2) * (D - np.eye(3) * np.trace(D))
    c = np.asarray(r.chi_circular)
    assert c.shape == (3, 3) and np.max(np.abs(c - cf)) <= 1e-12 * scale(cf)
    assert r.units["chi_circular"] == "A V^-2"
    # the current of a field E: Re[χ^full E E*] − Re[χ^dc] Re(E E*) = C (−i E × E*)
    e = np.array([1.0, 0.3 - 0.8j, 0.5j])
    s = (-1j * np.cross(e, np.conj(e))).real
    odd = np.asarray(rectified_current(r.chi_dc_full, e)) - np.einsum("abc,bc->a", np.asarray(r.chi_dc).real,
                                                                       np.outer(e, np.conj(e)).real)
    np.testing.assert_allclose(odd, c @ s, rtol=1e-12, atol=1e-12 * scale(c @ s))


# ---------------------------------------------------------------------------------- currents -------
@pytest.mark.parametrize("angle", [0.0, 30.0, 90.0, 137.0])
def test_linear_polarisation_has_no_helicity_current(angle):
    """A linearly polarised field (S3 = 0) sees only chi_dc: Re[χ^full ê ê*] = Re[χ^dc] ê ê, and the
    conjugate phasor gives the same current (docs/theory.md §5.9)."""
    r = dirac_response(0.7)
    e = np.asarray(polarisation_phasor(0.0, angle))
    j = np.asarray(rectified_current(r.chi_dc_full, e))
    j_lin = np.einsum("abc,b,c->a", np.asarray(r.chi_dc).real, e.real, e.real)
    np.testing.assert_allclose(j, j_lin, rtol=1e-13, atol=1e-13 * scale(j_lin))
    np.testing.assert_array_equal(np.asarray(rectified_current(r.chi_dc_full, np.conj(e))), j)


@pytest.mark.parametrize("ellipticity", [45.0, 20.0, -30.0])
def test_current_reverses_with_handedness(ellipticity):
    """E → E* (the opposite sense of rotation) reverses the helicity-odd current, ½[j(E) − j(E*)] =
    C S3 with S3 = sin 2χ S0, while the helicity-even part is Re[χ^dc] S (docs/theory.md §5.9)."""
    r = dirac_response(0.7)
    e = 3e4 * np.asarray(polarisation_phasor(ellipticity, 25.0))             # V/m
    j, jr = (np.asarray(rectified_current(r.chi_dc_full, x)) for x in (e, np.conj(e)))
    s3 = float(stokes(e)[3])
    odd = 0.5 * (j - jr)
    np.testing.assert_allclose(odd, np.asarray(r.chi_circular) * s3, rtol=1e-12, atol=1e-12 * scale(odd))
    even = np.einsum("abc,bc->a", np.asarray(r.chi_dc).real, np.outer(e, np.conj(e)).real)
    np.testing.assert_allclose(0.5 * (j + jr), even, rtol=1e-12, atol=1e-12 * scale(even))
    assert np.sign(odd[0]) == np.sign(ellipticity) * np.sign(np.asarray(r.chi_circular)[0])


def test_photo_voltage_reverses_with_helicity():
    """Open-circuit dc voltages of a Hall bar under a polarised field: E⁽⁰⁾ = −σ'⁻¹ j'⁽⁰⁾, V_x = L E_x,
    V_y = W E_y (docs/theory.md §5.9, §10); the helicity-odd part flips with the handedness and is zero
    for linear polarisation."""
    r = dirac_response(0.7)
    sigma_dc = np.asarray(dirac_response(0.0).sigma).real
    bar = HallBar(width_um=5.0, length_um=10.0, current_uA=10.0)
    e0 = 3e4                                                                  # V/m
    read = {h: photo_voltages(sigma_dc, r.chi_dc_full, e0 * polarisation_phasor(h * 45.0, 0.0), bar, 30.0)
            for h in (1, -1)}
    lin = photo_voltages(sigma_dc, r.chi_dc_full, e0 * polarisation_phasor(0.0, 10.0), bar, 30.0)
    # by hand: bar frame at 30°, j' = R C S3, E = −σ'⁻¹ j'
    t = np.deg2rad(30.0)
    R = np.array([[np.cos(t), np.sin(t)], [-np.sin(t), np.cos(t)]])
    sp = R @ sigma_dc @ R.T
    field = -np.linalg.solve(sp, R @ (np.asarray(r.chi_circular) * e0 ** 2))
    want = np.array([10e-6 * field[0], 5e-6 * field[1]])
    for h in (1, -1):
        got = np.array([float(read[h].photo_vdc_helicity_x), float(read[h].photo_vdc_helicity_y)])
        np.testing.assert_allclose(got, h * want, rtol=1e-12)
    assert float(lin.photo_vdc_helicity_x) == 0.0 and float(lin.photo_vdc_helicity_y) == 0.0
    # circular: the even part equals the linear-polarisation average of both axes (S_bc = E0²/2 δ_bc)
    even = 0.5 * (float(read[1].photo_vdc_y) + float(read[-1].photo_vdc_y))
    avg = 0.5 * sum(float(photo_voltages(sigma_dc, r.chi_dc_full, float(e0 / np.sqrt(2)) * polarisation_phasor(0.0, a),
                                         bar, 30.0).photo_vdc_y) for a in (0.0, 90.0))
    np.testing.assert_allclose(even, 2 * avg, rtol=1e-12)


# ---------------------------------------------------------------------------------- Chambers -------
POLARISATIONS = {"ccw": (45.0, 30.0), "cw": (-45.0, 30.0), "elliptic": (20.0, 70.0), "elliptic_r": (-20.0, 70.0)}
OMEGA_TAU = 0.7


@functools.cache
def chambers_circular():
    """Oracle dc currents (band, anomalous) per (V/m)² for unit phasors ê of each polarisation, and the
    solver response on the same 24×24 mesh (tests/test_chambers_oracle.py; Chambers, Proc. Phys. Soc. A
    65, 458, 1952)."""
    model = toy_model()
    p = {name: float(v) for name, v in model.params.items()}
    kt = KB_EVK * TEMPERATURE
    k, w = solver_mesh(model, 0, MU, kt)
    omega = OMEGA_TAU / TAU
    vel, omega_z = toy_velocities(k, p), toy_curvature(k, p)
    run = lambda e0: chambers_currents(k, w, lambda q: toy_energies(q, p), vel, omega_z, MU, kt, TAU, omega, e0,
                                       N_TIME)
    j_zero = run(np.zeros(2))
    out = {}
    for name, (ell, ang) in POLARISATIONS.items():
        e_hat = np.asarray(polarisation_phasor(ell, ang))
        (_, c2b), (_, c2a) = oracle_orders(run, e_hat, FIELD, j_zero)
        out[name] = (e_hat, harmonic(c2b, 0).real, harmonic(c2a, 0).real)
    solved = response(model, MU, TEMPERATURE, TAU, omega * 1e15 / (2 * np.pi), resolution=0, intrinsic=False)
    return out, solved


def test_chambers_oracle_circular_dipole_current():
    """The anomalous-velocity dc current of the exact time-domain solution for circularly and
    elliptically polarised fields equals Re[χ^full,BCD ê ê*] (the unsymmetrised dipole term), and its
    helicity-odd part equals chi_circular · S3 (Sodemann & Fu 2015 phasor convention; Moore & Orenstein
    2010; docs/theory.md §5.9)."""
    out, r = chambers_circular()
    bcd_full = np.asarray(r.chi_dc_full) - np.asarray(r.chi_dc_parts.drude) - np.asarray(r.chi_dc_parts.intrinsic)
    for name, (e_hat, _, anom) in out.items():
        want = np.asarray(rectified_current(bcd_full, e_hat))
        err = np.max(np.abs(want - anom)) / scale(anom)
        assert err < RTOL, f"{name}: dipole dc current deviates {err:.3g} from the Chambers oracle"
    for a, b in (("ccw", "cw"), ("elliptic", "elliptic_r")):
        odd = 0.5 * (out[a][2] - out[b][2])
        s3 = float(stokes(out[a][0])[3])
        err = np.max(np.abs(np.asarray(r.chi_circular) * s3 - odd)) / scale(odd)
        assert err < RTOL, f"{a}: helicity-odd current deviates {err:.3g} from the Chambers oracle"
        # and the oracle's circular current really is a sizeable part of its total
        assert scale(odd) > 0.1 * scale(out[a][2])


def test_chambers_oracle_band_current_is_helicity_even():
    """The band-velocity (nonlinear Drude) dc current of the exact solution does not change when the
    handedness is reversed (f2⁽⁰⁾ contracts E_b* E_c with a symmetric tensor; docs/theory.md §5.9)."""
    out, _ = chambers_circular()
    for a, b in (("ccw", "cw"), ("elliptic", "elliptic_r")):
        band, band_r = out[a][1], out[b][1]
        assert np.max(np.abs(band - band_r)) < RTOL * scale(band)


# ---------------------------------------------------------------------------------- gradients ------
@pytest.mark.slow          # ≈ 20 s alone, 50 s on a loaded machine: compiles the reverse pass of response
def test_gradients_through_the_circular_coefficient():
    """jax.grad of chi_circular by a model parameter and τ, through the whole response on the level-0
    lattice mesh of the Chambers toy (whose nodes do not move with the parameters at this
    temperature), agrees with central finite differences (common practice)."""
    f = OMEGA_TAU / TAU * 1e15 / (2 * np.pi)
    circ = lambda tilt, tau: response(toy_model().with_params(tilt=tilt), MU, TEMPERATURE, tau, f, resolution=0,
                                      intrinsic=False, estimate_error=False).chi_circular[1]
    x0 = (0.3, TAU)
    g = jax.grad(circ, argnums=(0, 1))(*x0)
    for i, h in ((0, 1e-4), (1, 1e-3)):
        up, dn = list(x0), list(x0)
        up[i] += h
        dn[i] -= h
        fd = (float(circ(*up)) - float(circ(*dn))) / (2 * h)
        assert abs(float(g[i]) - fd) < 1e-6 * abs(fd), (i, float(g[i]), fd)


def test_derivatives_of_the_photovoltage_by_the_polarisation():
    """jax.jvp of the open-circuit photovoltage by the ellipticity and the axis angle agrees with central
    finite differences; the helicity-odd part depends on the polarisation only through
    S3 = sin 2χ (docs/theory.md §5.9): d/dχ = 2 cot 2χ times itself, and nothing on the axis angle."""
    r = dirac_response(0.7)
    sigma_dc = np.asarray(dirac_response(0.0).sigma).real
    bar = HallBar(width_um=5.0, length_um=10.0, current_uA=10.0)
    read = lambda ell, angle: photo_voltages(sigma_dc, r.chi_dc_full, 3e4 * polarisation_phasor(ell, angle), bar, 20.0)
    volt = lambda ell, angle: read(ell, angle).photo_vdc_y
    for tangent in ((1.0, 0.0), (0.0, 1.0)):
        _, t = jax.jvp(volt, (jnp.asarray(30.0), jnp.asarray(15.0)), tuple(jnp.asarray(x) for x in tangent))
        h = 1e-2
        fd = (float(volt(30.0 + h * tangent[0], 15.0 + h * tangent[1]))
              - float(volt(30.0 - h * tangent[0], 15.0 - h * tangent[1]))) / (2 * h)
        assert abs(float(t) - fd) < 1e-6 * abs(fd), (tangent, float(t), fd)
    odd = lambda ell, angle: read(ell, angle).photo_vdc_helicity_y
    _, t_angle = jax.jvp(odd, (jnp.asarray(30.0), jnp.asarray(15.0)), (jnp.asarray(0.0), jnp.asarray(1.0)))
    _, t_ell = jax.jvp(odd, (jnp.asarray(30.0), jnp.asarray(15.0)), (jnp.asarray(1.0), jnp.asarray(0.0)))
    np.testing.assert_allclose(float(t_ell), float(odd(30.0, 15.0)) * 2 * np.pi / 180 / np.tan(np.pi / 3), rtol=1e-12)
    assert abs(float(t_angle)) < 1e-12 * abs(float(t_ell))


# ---------------------------------------------------------------------------------- scenarios ------
def _scenario():
    """The scenario of tests/test_scenario.py at one μ and one temperature, one valley, angles 0° and 60°."""
    text = GOOD
    for old, new in (("mu_eV = [0.13, 0.15]", "mu_eV = 0.15"), ("temperature_K = [5, 20]", "temperature_K = 20"),
                     ("current_angle_deg = [0, 90]", "current_angle_deg = [0, 60]"), ("valleys = 2", "valleys = 1")):
        assert old in text
        text = text.replace(old, new)
    return text


SCENARIO = _scenario()

CIRCULAR = """
[drive]
polarisation = "circular"
handedness = "counterclockwise"
frequency_Hz = 1.1e12
field_V_m = 3e4
"""


def drive_scenario(drive_text):
    from crosswind.solver.study.scenario import parse_scenario
    return parse_scenario(SCENARIO + drive_text, "s.toml")


@pytest.mark.parametrize("text, ellipticity, angle", [
    (CIRCULAR, 45.0, 0.0),
    (CIRCULAR.replace("counterclockwise", "clockwise"), -45.0, 0.0),
    ('[drive]\npolarisation = "elliptical"\nhandedness = "clockwise"\nellipticity_deg = 20\nangle_deg = 30\n'
     'frequency_Hz = 1e12\nfield_V_m = 1e4\n', -20.0, 30.0),
    ('[drive]\npolarisation = "linear"\nangle_deg = 15\nfrequency_Hz = 1e12\nfield_V_m = 1e4\n', 0.0, 15.0),
])
def test_drive_table_is_read(text, ellipticity, angle):
    """[drive] keys → a Drive with the signed ellipticity angle of docs/theory.md §5.9 (> 0
    counterclockwise seen from +z)."""
    d = drive_scenario(text).drive
    assert (d.ellipticity_deg, d.angle_deg) == (ellipticity, angle)
    assert drive_scenario("").drive is None


@pytest.mark.parametrize("text, message", [
    ('polarization = "circular"', r"\[drive\] key 'polarization': unknown key. Did you mean 'polarisation'\?"),
    ('polarisation = "circ"', r"unknown or missing polarisation 'circ'. Did you mean 'circular'\? Allowed: "
                              r"\"linear\", \"circular\", \"elliptical\""),
    ('polarisation = "circular"\nfield_V_m = 1e4\nhandedness = "clockwise"', r"key 'frequency_Hz': missing. "
                                                                             r"Allowed: the drive frequency in Hz"),
    ('polarisation = "circular"\nfrequency_Hz = 0\nfield_V_m = 1e4\nhandedness = "clockwise"',
     r"key 'frequency_Hz': must be positive, got 0"),
    ('polarisation = "circular"\nfrequency_Hz = 1e12\nhandedness = "clockwise"', r"key 'field_V_m': missing"),
    ('polarisation = "circular"\nfrequency_Hz = 1e12\nfield_V_m = 1e4',
     r"key 'handedness': missing for polarisation = \"circular\".*Allowed: \"counterclockwise\", \"clockwise\""),
    ('polarisation = "circular"\nfrequency_Hz = 1e12\nfield_V_m = 1e4\nhandedness = "left"',
     r"key 'handedness': got 'left' \(left/right mean opposite things"),
    ('polarisation = "circular"\nfrequency_Hz = 1e12\nfield_V_m = 1e4\nhandedness = "clockwise"\nangle_deg = 3',
     r"key 'angle_deg': a circularly polarised field has no axis; remove the key, or set polarisation = "
     r"\"elliptical\""),
    ('polarisation = "circular"\nfrequency_Hz = 1e12\nfield_V_m = 1e4\nhandedness = "clockwise"\n'
     'ellipticity_deg = 45', r"key 'ellipticity_deg': it is 45° for circular polarisation"),
    ('polarisation = "elliptical"\nfrequency_Hz = 1e12\nfield_V_m = 1e4\nhandedness = "clockwise"',
     r"key 'ellipticity_deg': missing for polarisation = \"elliptical\""),
    ('polarisation = "elliptical"\nfrequency_Hz = 1e12\nfield_V_m = 1e4\nhandedness = "clockwise"\n'
     'ellipticity_deg = 45', r"must lie strictly between 0 and 45 degrees, got 45 \(0 is linear, 45 circular"),
    ('polarisation = "linear"\nfrequency_Hz = 1e12\nfield_V_m = 1e4\nhandedness = "clockwise"',
     r"key 'handedness': a linearly polarised field has no handedness; remove the key"),
    ('polarisation = "linear"\nfrequency_Hz = 1e12\nfield_V_m = -1', r"key 'field_V_m': must be positive"),
])
def test_drive_table_errors_name_the_fix(text, message):
    """Unknown keys and bad values of [drive] are refused, naming the file, table, key and fix."""
    from crosswind.solver.study.scenario import ScenarioError
    with pytest.raises(ScenarioError, match=r"s\.toml: " + (message if message.startswith(r"\[drive\]")
                                                           else r"\[drive\].*" + message)):
        drive_scenario("[drive]\n" + text + "\n")


def test_a_lock_in_frequency_drive_loads_with_a_caution():
    """A [drive] at ωτ < 0.01 (e.g. the lock-in frequency typed in) loads with a ScenarioWarning naming
    the ωτ/(1 + ω²τ²) suppression (docs/theory.md §5.9); a THz drive loads silently."""
    from crosswind.solver.study.scenario import ScenarioWarning
    with pytest.warns(ScenarioWarning, match=r"\[drive\] key 'frequency_Hz': ωτ is at most 1.1e-11 at 17 Hz: "
                                             r"the helicity-odd current goes as ωτ/\(1 \+ ω²τ²\)"):
        scn = drive_scenario(CIRCULAR.replace("1.1e12", "17"))
    assert len(scn.cautions) == 1
    assert drive_scenario(CIRCULAR).cautions == ()


@functools.cache
def chain_with(drive_text):
    from crosswind.solver.study.chain import evaluate
    from crosswind.solver.study.knobs import base_values
    scn = drive_scenario(drive_text)
    values = base_values(scn, {"current_angle_deg": np.array([[0.0, 60.0]])})
    return scn, evaluate(scn, values, resolution=0)


def test_chain_reads_the_helicity_odd_voltage():
    """The chain adds the photovoltages of [drive] to the Hall-bar reading: the helicity-odd part
    reverses with the handedness, equals −W(σ'⁻¹ R C)_y E0² S3 from chi_circular at the drive frequency
    (docs/theory.md §5.9, §10), and a linearly polarised drive gives none."""
    scn, ccw = chain_with(CIRCULAR)
    _, cw = chain_with(CIRCULAR.replace("counterclockwise", "clockwise"))
    _, lin = chain_with('[drive]\npolarisation = "linear"\nfrequency_Hz = 1.1e12\nfield_V_m = 3e4\n')
    odd = np.asarray(ccw.reading.photo_vdc_helicity_y)
    assert odd.shape == (1, 2) and scale(odd) > 0
    np.testing.assert_allclose(np.asarray(cw.reading.photo_vdc_helicity_y), -odd, rtol=1e-12)
    assert np.all(np.asarray(lin.reading.photo_vdc_helicity_y) == 0.0)
    rd = ccw.drive_response
    wt = 2 * np.pi * 1.1e12 * 100e-15
    cf = closed_form_circular(rd.dipole, wt, 100.0)
    np.testing.assert_allclose(np.asarray(rd.chi_circular), cf, rtol=1e-12, atol=1e-12 * scale(cf))
    sigma = np.asarray(ccw.response.sigma)[0].real
    for i, ang in enumerate((0.0, 60.0)):
        t = np.deg2rad(ang)
        R = np.array([[np.cos(t), np.sin(t)], [-np.sin(t), np.cos(t)]])
        e0 = -np.linalg.solve(R @ sigma @ R.T, R @ (np.asarray(rd.chi_circular)[0] * 3e4 ** 2))
        got = [float(ccw.reading.photo_vdc_helicity_x[0, i]), float(odd[0, i])]
        want = np.array([10e-6 * e0[0], 5e-6 * e0[1]])
        np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-12 * scale(want))
    # the current-drive readings are those of a scenario without [drive]
    _, plain = chain_with("")
    assert not hasattr(plain.reading, "photo_vdc_y") and plain.drive_response is None
    np.testing.assert_array_equal(np.asarray(plain.reading.vdc_y), np.asarray(ccw.reading.vdc_y))


@pytest.mark.slow          # ≈ 40 s: a sweep (its own compilation) and the report
def test_sweep_and_summary_show_the_helicity_odd_signal(tmp_path):
    """A sweep with [drive] writes the photovoltages (units from the vocabulary) and summary.md reports
    the helicity-odd transverse voltage at the shown point (docs/scenario-files.md, [drive])."""
    from crosswind.solver.reporting.report import fmt_volts, helicity_lines, peak_index, write_report
    from crosswind.solver.study.scenario import parse_scenario
    from crosswind.solver.study.sweep import run_scenario
    scn = parse_scenario((SCENARIO + CIRCULAR).replace("temperature_K = 20", "temperature_K = [20, 40]"), "s.toml")
    ds = run_scenario(scn, tmp_path / "out", progress=False)
    for name in ("photo_vdc_helicity_y", "photo_vdc_y", "photo_current_x"):
        assert ds[name].dims[-1] == "current_angle_deg"
    assert ds["photo_vdc_helicity_y"].attrs["units"] == "V" and ds["photo_current_x"].attrs["units"] == "A m^-1"
    _, direct = chain_with(CIRCULAR)
    np.testing.assert_allclose(ds["photo_vdc_helicity_y"].sel(temperature_K=20.0).values.reshape(-1),
                               np.asarray(direct.reading.photo_vdc_helicity_y).reshape(-1), rtol=1e-12)
    write_report(ds, scn, tmp_path / "out")
    summary = (tmp_path / "out" / "summary.md").read_text(encoding="utf-8")
    section = summary.split("## Helicity-odd rectified signal of the polarised drive")[1].split("\n## ")[0]
    idx = peak_index(ds)
    odd = float(ds["photo_vdc_helicity_y"].isel({d: i for d, i in idx.items() if d in ds["photo_vdc_helicity_y"].dims}))
    assert f"**V_y = {fmt_volts(odd)}**" in section
    assert "circularly polarised, turning counterclockwise seen from +z" in section and "S3/S0 = 1" in section
    assert "ωτ = 0.691" in section
    assert helicity_lines(ds, drive_scenario(""), idx) == []
