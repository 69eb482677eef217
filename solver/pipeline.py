"""The scenario's device pipeline as one differentiable function of its "knobs".

A *knob* is a number of the scenario that a sensitivity or a fit may vary.  Names follow the
scenario schema (docs/scenario-files.md):

* every real parameter of the model, by its catalogue name (``mass``, ``tilt``, ``gap``,
  ``tilt_conduction``, ``strain_xx`` …; units from the model's parameter table).  With a uniaxial
  ``[material.strain]`` the strain components are derived, and the knob is ``strain`` instead;
* ``strain`` — the uniaxial strain magnitude (dimensionless); it enters the model's strain
  components through :func:`crosswind.models.strain.uniaxial` with the scenario's angle and
  Poisson ratio, so derivatives go through it;
* ``temperature_K``; the relaxation-time keys of the scenario's scattering kind: ``tau_fs``
  (constant), ``tau0_fs``, ``exponent``, ``reference_energy_eV``, ``energy_scale_eV`` (power law),
  ``tau_impurity_fs``, ``tau_phonon_fs``, ``reference_temperature_K`` (Matthiessen);
* the carrier key of the scenario (``gate_V``, ``density_cm2`` or ``mu_eV``), ``gate_offset_V``
  (gate scenarios) and ``current_angle_deg``;
* ``current_uA`` (a data axis only: V^2ω ∝ I² and V_xx ∝ I exactly, so it is applied as a scale).

:func:`evaluate` runs the same chain as ``crosswind run`` — gate → density (parallel plate) →
μ by :func:`~crosswind.solver.density.mu_from_density` → :func:`~crosswind.solver.response.response`
at a fixed mesh level → the Hall-bar relations of :mod:`crosswind.solver.device` — written in
``jax.numpy`` end to end, so ``jax.jvp`` / ``jax.jacfwd`` of any output with respect to any knob
works (the k-mesh placement is held fixed, as in :mod:`crosswind.solver.sensitivity`).
"""
from __future__ import annotations

import difflib
import math

import jax.numpy as jnp
import numpy as np
from scipy import constants as _c

OUTPUTS = {"V2w": ("V", "transverse 2ω voltage amplitude |V_y^2ω|"),
           "Vxx": ("V", "longitudinal voltage amplitude |V_xx|"),
           "sigma_xx": ("S", "sheet conductivity σ'_xx along the current"),
           "ratio": ("m/V", "nonlinear Hall ratio E⊥^2ω/(E∥^ω)²")}

_SCAT_KEYS = {"constant": {"tau_fs": "fs"},
              "power-law": {"tau0_fs": "fs", "exponent": "1", "reference_energy_eV": "eV", "energy_scale_eV": "eV"},
              "matthiessen": {"tau_impurity_fs": "fs", "tau_phonon_fs": "fs", "reference_temperature_K": "K"}}
_CARRIER_UNITS = {"gate_V": "V", "density_cm2": "cm^-2", "mu_eV": "eV"}


def knob_units(model, strain_kind, carrier, scattering) -> dict:
    """{knob name: unit} for a scenario with this model, strain form, carrier and scattering kind."""
    out = {}
    for name in model.params:
        if strain_kind == "uniaxial" and name in ("strain_xx", "strain_yy", "strain_xy"):
            continue
        u = model.spec[name].unit if name in model.spec.names() else ""
        out[name] = u if u not in ("", "-") else "1"
    if strain_kind == "uniaxial":
        out["strain"] = "1"
    out["temperature_K"] = "K"
    out.update(_SCAT_KEYS[scattering])
    out[carrier] = _CARRIER_UNITS[carrier]
    if carrier == "gate_V":
        out["gate_offset_V"] = "V"
    out["current_angle_deg"] = "deg"
    return out


def check_knob(name, units: dict, model, who: str, strain_kind) -> str | None:
    """None if ``name`` is a knob, else an error message naming the nearest valid knob."""
    if name in units:
        return None
    if name in model.static_options():
        return (f"{who}: '{name}' is a structural option of {model.name} (no derivative); "
                f"use one of {', '.join(units)}")
    if strain_kind == "uniaxial" and name in ("strain_xx", "strain_yy", "strain_xy"):
        return (f"{who}: '{name}' is derived from the uniaxial [material.strain]; use the knob 'strain' "
                "(the magnitude) instead")
    close = difflib.get_close_matches(name, list(units), n=1)
    hint = f" Did you mean '{close[0]}'?" if close else ""
    return f"{who}: unknown knob '{name}'.{hint}"


def scenario_knobs(scn) -> dict:
    """{knob name: unit} of a loaded scenario."""
    model = scn.build_model(scn.axis("strain").values[0] if _has_axis(scn, "strain") else None)
    kind = scn.material.strain.kind if scn.material.strain is not None else None
    return knob_units(model, kind, scn.carrier, scn.scattering)


def _has_axis(scn, name):
    return any(a.name == name for a in scn.axes)


_AXIS_OF = {"strain": "strain", "temperature_K": "temperature", "tau_fs": "tau", "tau0_fs": "tau0",
            "exponent": "tau_exponent", "reference_energy_eV": "tau_reference_energy",
            "energy_scale_eV": "tau_energy_scale", "tau_impurity_fs": "tau_impurity",
            "tau_phonon_fs": "tau_phonon", "reference_temperature_K": "tau_reference_temperature",
            "gate_V": "gate_voltage", "density_cm2": "density_target", "mu_eV": "chemical_potential",
            "current_angle_deg": "current_angle"}


def axis_of(knob: str) -> str | None:
    """Dataset axis name of a condition knob (None for model parameters and device numbers)."""
    return _AXIS_OF.get(knob)


def base_values(scn, at: dict | None = None, *, who: str = "scenario") -> dict:
    """Concrete values of every knob: single-valued axes from the scenario, others from ``at``
    ({knob: value}); model parameters from the model; ``gate_offset_V`` from [device]."""
    at = dict(at or {})
    units = scenario_knobs(scn)
    strain0 = None
    out = {}
    for a in scn.axes:
        knob = next((k for k, v in _AXIS_OF.items() if v == a.name), None)
        if knob in at:
            out[knob] = float(at.pop(knob))
        elif len(a.values) == 1:
            out[knob] = float(a.values[0])
        else:
            out[knob] = None          # must come from the caller (a sweep axis)
    if "strain" in out and out["strain"] is not None:
        strain0 = out["strain"]
    model = scn.build_model(strain0 if strain0 is not None else (scn.axis("strain").values[0]
                                                                if _has_axis(scn, "strain") else None))
    for k in units:
        if k in model.params:
            out[k] = float(at.pop(k)) if k in at else float(model.params[k])
    if "gate_offset_V" in units:
        out["gate_offset_V"] = float(at.pop("gate_offset_V", scn.device.gate_offset_V))
    if at:
        raise ValueError(f"{who}: unknown knob(s) {sorted(at)}; valid: {', '.join(units)}")
    return out


def evaluate(scn, values: dict, *, resolution: int, intrinsic: bool | None = None) -> dict:
    """Device outputs (:data:`OUTPUTS`, each of shape (P,)) for knob ``values`` (scalars or
    (P,) arrays; every knob of :func:`scenario_knobs` must be present, see :func:`base_values`).
    Traceable: any value may be a JAX tracer (model parameters and ``strain`` must be scalars)."""
    from crosswind.models.strain import uniaxial
    from .density import mu_from_density
    from .device import HallBar, hall_bar, rotate_sigma
    from .response import response
    from .run import MU_ITERATIONS
    from .scattering import ConstantTau, MatthiessenTau, PowerLawTau
    v = {k: jnp.asarray(x, dtype=jnp.float64) for k, x in values.items() if x is not None}
    missing = [k for k, x in values.items() if x is None]
    if missing:
        raise ValueError(f"evaluate: no value for {missing}; these axes are swept in the scenario — "
                         "give one value (e.g. [fit] at = {...})")
    st = scn.material.strain
    import jax
    s0 = scn.axis("strain").values[0] if _has_axis(scn, "strain") else None
    with jax.ensure_compile_time_eval():       # the base model is concrete even under jax.jit
        model = scn.build_model(s0)
    over = {k: v[k] for k in model.params if k in v}
    if st is not None and st.kind == "uniaxial":
        xx, yy, xy = uniaxial(v["strain"], math.radians(st.angle_deg), st.poisson)
        over.update(strain_xx=xx, strain_yy=yy, strain_xy=xy)
    model = model.with_params(**over)
    lead = [jnp.shape(x) for k, x in v.items() if k not in model.params and k != "strain"]
    shape = np.broadcast_shapes(*lead) if lead else ()
    P = int(np.prod(shape)) if shape else 1
    flat = lambda x: jnp.broadcast_to(x, shape).reshape(P)
    T = flat(v["temperature_K"])
    if scn.carrier == "mu_eV":
        mu = flat(v["mu_eV"])
    else:
        if scn.carrier == "gate_V":
            d = scn.device
            if d.capacitance_nF_cm2 is not None:
                cap = d.capacitance_nF_cm2 * 1e-9 / 1e-4
            else:
                cap = _c.epsilon_0 * d.permittivity / (d.dielectric_nm * 1e-9)
            dens = cap * (flat(v["gate_V"]) - v["gate_offset_V"]) / _c.e
        else:
            dens = flat(v["density_cm2"]) * 1e4
        mu = mu_from_density(model, dens, T, resolution=scn.numerics.density_resolution, iterations=MU_ITERATIONS)
    if scn.scattering == "constant":
        scat = ConstantTau(flat(v["tau_fs"]))
    elif scn.scattering == "power-law":
        scat = PowerLawTau(flat(v["tau0_fs"]), flat(v["exponent"]), flat(v["reference_energy_eV"]),
                           flat(v["energy_scale_eV"]))
    else:
        scat = MatthiessenTau(flat(v["tau_impurity_fs"]), flat(v["tau_phonon_fs"]), flat(v["reference_temperature_K"]))
    r = response(model, mu=mu, temperature=T, tau=scat, frequency=scn.device.frequency_Hz, resolution=resolution,
                 intrinsic=scn.numerics.intrinsic if intrinsic is None else intrinsic, estimate_error=False)
    d = scn.device
    bar = HallBar(d.width_um, d.length_um, d.current_uA, d.frequency_Hz)
    ang = flat(v["current_angle_deg"])
    dev = hall_bar(r.sigma, r.chi, r.chi_dc, bar, ang)
    scale = flat(v["current_uA"]) / d.current_uA if "current_uA" in v else jnp.ones(P)
    return {"V2w": dev["v2w_y_amplitude"] * scale * scale, "Vxx": jnp.abs(dev["v_xx"]) * scale,
            "sigma_xx": rotate_sigma(r.sigma, ang)[:, 0, 0].real, "ratio": dev["nonlinear_ratio"], "mu": mu}


__all__ = ["OUTPUTS", "knob_units", "scenario_knobs", "base_values", "evaluate", "check_knob", "axis_of"]
