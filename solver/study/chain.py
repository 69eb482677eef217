"""The one evaluation chain: a scenario's knobs → a device reading.

    gate voltage → carrier density (parallel plate) → μ (:func:`~crosswind.solver.engine.density.mu_from_density`
      at a fixed mesh level; with automatic resolution in 2D the root of the response's own n(μ),
      :func:`~crosswind.solver.engine.density.response_at_density`)
      → relaxation time (the scenario's scattering kind) → :func:`~crosswind.solver.engine.response.response`
      → Hall-bar readings (:func:`~crosswind.solver.engine.device.hall_bar`)

Every caller goes through :func:`evaluate`: the sweep (``crosswind run``, in batches, with automatic
refinement and error estimates), the fit (``crosswind fit``, at a fixed mesh level, traced by JAX),
the sensitivity table at the peak and the demo.  A fit and a sweep of the same scenario at the same
knobs and mesh level therefore compute the same numbers (tests/test_chain.py checks it to 1e-12).

Knobs (:mod:`crosswind.solver.vocabulary`) are passed as a mapping {knob name: value}; each value is
a scalar or an array, and condition knobs broadcast against each other to the P conditions of one
call.  Model parameters and the strain magnitude are scalars (they change the bands, not the
conditions).  The current angle may carry one more trailing axis (P, A): the angle needs no k-space
work, so the tensors of each condition are rotated to every angle (docs/theory.md §10).  The whole
chain is written in ``jax.numpy``, so ``jax.jvp``/``jax.jacfwd`` of any output by any knob works
(with the k-mesh placement held fixed, as in :mod:`crosswind.solver.engine.sensitivity`).
"""
from __future__ import annotations

import math
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
from scipy import constants

from crosswind.models.strain import uniaxial
from crosswind.solver.engine.density import mu_from_density, parallel_plate_capacitance, response_at_density
from crosswind.solver.engine.device import (
    HallBar,
    HallBarReading,
    film_sheet,
    hall_bar,
    photo_voltages,
    polarisation_phasor,
    rotate_chi,
    rotate_sigma,
    with_photo,
)
from crosswind.solver.engine.inputs import is_traced
from crosswind.solver.engine.response import Response, response
from crosswind.solver.engine.scattering import ConstantTau, MatthiessenTau, PowerLawTau
from crosswind.solver.pytrees import pytree_dataclass
from crosswind.solver.study.knobs import base_model
from crosswind.solver.vocabulary import OUTPUTS, SCATTERING

_SCATTERING_CLASS = {"constant": ConstantTau, "power-law": PowerLawTau, "matthiessen": MatthiessenTau}


# ------------------------------------------------------------------------------ result ---------
@pytree_dataclass
class ChainResult:
    """One evaluation of the chain on P conditions (A current angles where given).

    ``mu`` (P,) eV; ``response`` the engine's :class:`~crosswind.solver.engine.response.Response`
    (crystal frame, with its error estimate); ``reading`` the Hall-bar readings
    (:class:`~crosswind.solver.engine.device.HallBarReading`, shape (P,) or (P, A)); ``sigma_bar`` /
    ``chi_bar`` the tensors in the bar frame; and the four outputs a fit compares with data
    (:data:`crosswind.solver.vocabulary.OUTPUTS`): ``V2w`` = |V_y^2ω| (V), ``Vxx`` = |V_xx| (V),
    ``sigma_xx`` = Re σ'_xx (S) and ``ratio`` = E⊥^2ω/(E∥^ω)² (m/V).  ``V2w`` and ``Vxx`` include the
    drive-current scale (V^2ω ∝ I², V_xx ∝ I) when the knob ``current_uA`` is given.

    With a polarised field drive (the scenario's ``[drive]``, docs/theory.md §5.9) ``reading`` is a
    :class:`~crosswind.solver.engine.device.DrivenHallBarReading` that adds the rectified photocurrent
    and open-circuit voltages with their helicity-odd part (``photo_vdc_helicity_y``, ...), and
    ``drive_response`` is the response at the drive frequency (crystal frame; else None)."""

    mu: Any
    response: Response
    reading: HallBarReading
    sigma_bar: Any
    chi_bar: Any
    V2w: Any
    Vxx: Any
    sigma_xx: Any
    ratio: Any
    drive_response: Any = None

    def output(self, name: str):
        """One of :data:`~crosswind.solver.vocabulary.OUTPUTS` by name."""
        if name not in OUTPUTS:
            raise KeyError(f"unknown output '{name}'; choose from {', '.join(OUTPUTS)}")
        return getattr(self, name)


# ------------------------------------------------------------------------------ the chain ------
def gate_capacitance(device) -> float:
    """Gate capacitance per area (F/m²) of the scenario's [device]: ``capacitance_nF_cm2`` when
    given, else the parallel plate ε0εr/d (docs/theory.md §10)."""
    if device.capacitance_nF_cm2 is not None:
        return device.capacitance_nF_cm2 * 1e-9 / 1e-4
    return parallel_plate_capacitance(device.dielectric_nm, device.permittivity)


def evaluate(scn, values: dict, *, resolution: int | None, rtol: float = 1e-3, intrinsic: bool | None = None,
             estimate_error: bool = False) -> ChainResult:
    """The chain at knob ``values`` (every knob of :func:`scenario_knobs`; see :func:`base_values`).

    ``resolution`` is the k-mesh level (``None``: automatic refinement to ``rtol``, concrete values
    only); ``estimate_error`` asks ``response`` for its error estimate (the sweep does, fits do not);
    an optional ``strain_angle_deg`` value (a scalar; the device design passes it) replaces the
    uniaxial strain axis of [material.strain];
    ``intrinsic`` defaults to the scenario's [numerics].  Traceable: every value may be a JAX tracer
    (model parameters and ``strain`` must be scalars)."""
    missing = [k for k, x in values.items() if x is None]
    if missing:
        raise ValueError(f"evaluate: no value for {missing}; these axes are swept in the scenario — "
                         "give one value (e.g. [fit] at = {...})")
    v = {k: jnp.asarray(x, dtype=jnp.float64) for k, x in values.items()}
    with jax.ensure_compile_time_eval():       # the base model is concrete even under jax.jit
        model = base_model(scn)
    over = {k: v[k].reshape(()) for k in model.params if k in v}
    st = scn.material.strain
    if st is not None and st.kind == "uniaxial":
        # the strain axis is [material.strain] angle_deg unless the design passes the knob strain_angle_deg
        axis = (jnp.deg2rad(v["strain_angle_deg"].reshape(())) if "strain_angle_deg" in v
                else math.radians(st.angle_deg))
        xx, yy, xy = uniaxial(v["strain"].reshape(()), axis, st.poisson)
        over.update(strain_xx=xx, strain_yy=yy, strain_xy=xy)
    model = model.with_params(**over)

    conditions = [x for k, x in v.items()
                  if k not in model.params and k not in ("strain", "strain_angle_deg", "current_angle_deg")]
    shape = np.broadcast_shapes(*[jnp.shape(x) for x in conditions]) if conditions else ()
    P = int(np.prod(shape)) if shape else 1
    flat = lambda x: jnp.broadcast_to(x, shape).reshape(P)
    temperature = flat(v["temperature_K"])
    tau = _SCATTERING_CLASS[scn.scattering](*[flat(v[k]) for k in SCATTERING[scn.scattering]])
    opts = dict(rtol=rtol, intrinsic=scn.numerics.intrinsic if intrinsic is None else intrinsic)
    r = None
    if scn.carrier == "mu_eV":
        mu = flat(v["mu_eV"])
    else:
        if scn.carrier == "gate_V":
            density = gate_capacitance(scn.device) * (flat(v["gate_V"]) - v["gate_offset_V"]) / constants.e
        else:
            density = flat(v["density_cm2"]) * 1e4
        if resolution is None and model.dim == 2 and not is_traced(density, temperature, model.params):
            # automatic resolution: μ is the root of the response's own n(μ) (resolved at any T),
            # and the response at that root comes with it
            mu, r = response_at_density(model, density, temperature, tau, scn.device.frequency_Hz,
                                        start_resolution=scn.numerics.density_resolution, **opts)
            mu = jnp.asarray(mu)
        else:
            mu = mu_from_density(model, density, temperature, resolution=scn.numerics.density_resolution)
    if r is None:
        r = response(model, mu=mu, temperature=temperature, tau=tau, frequency=scn.device.frequency_Hz,
                     resolution=resolution, estimate_error=estimate_error, **opts)

    angle = v["current_angle_deg"]
    angle = angle.reshape(P, -1) if angle.ndim == 2 else flat(angle)[:, None]
    per_angle = angle.shape[1:]
    spread = lambda t: jnp.broadcast_to(t.reshape((P, 1) + t.shape[1:]), (P,) + per_angle + t.shape[1:])
    sigma, chi, chi_dc = spread(r.sigma), spread(r.chi), spread(r.chi_dc)
    d = scn.device
    if d.thickness_nm is not None:
        # film of a 3D model: sheet = bulk × thickness, in-plane components (docs/theory.md §16.5)
        sigma, chi, chi_dc = film_sheet(sigma, chi, chi_dc, d.thickness_nm)
    reading = hall_bar(sigma, chi, chi_dc, HallBar(d.width_um, d.length_um, d.current_uA, d.frequency_Hz), angle)
    rd = None
    if scn.drive is not None:
        # the polarised field's rectified current at its own frequency, against the dc conductivity
        # (σ at the lock-in frequency, ωτ ~ 1e-10); docs/theory.md §5.9
        rd = response(model, mu=mu, temperature=temperature, tau=tau, frequency=scn.drive.frequency_Hz,
                      resolution=resolution, rtol=rtol, estimate_error=estimate_error,
                      intrinsic=scn.numerics.intrinsic if intrinsic is None else intrinsic)
        field = scn.drive.field_V_m * polarisation_phasor(scn.drive.ellipticity_deg, scn.drive.angle_deg)
        photo = photo_voltages(sigma, spread(rd.chi_dc_full), field,
                               HallBar(d.width_um, d.length_um, d.current_uA, d.frequency_Hz), angle)
        reading = with_photo(reading, photo)
    sigma_bar, chi_bar = rotate_sigma(sigma, angle), rotate_chi(chi, angle)
    scale = jnp.broadcast_to((v["current_uA"] / d.current_uA).reshape(-1, 1) if "current_uA" in v else 1.0, (P, 1))
    out = ChainResult(mu=mu, response=r, reading=reading, sigma_bar=sigma_bar, chi_bar=chi_bar,
                      V2w=reading.v2w_y_amplitude * scale * scale, Vxx=jnp.abs(reading.v_xx) * scale,
                      sigma_xx=sigma_bar[..., 0, 0].real, ratio=reading.nonlinear_ratio, drive_response=rd)
    if v["current_angle_deg"].ndim == 2:
        return out
    # one angle per condition: drop the angle axis of the device quantities (not of mu and the response)
    drop = lambda t: t[:, 0]
    return ChainResult(mu=mu, response=r, reading=jax.tree.map(drop, reading), sigma_bar=drop(sigma_bar),
                       chi_bar=drop(chi_bar), V2w=drop(out.V2w), Vxx=drop(out.Vxx), sigma_xx=drop(out.sigma_xx),
                       ratio=drop(out.ratio), drive_response=rd)


__all__ = ["ChainResult", "evaluate", "gate_capacitance"]
