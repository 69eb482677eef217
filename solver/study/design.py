"""Device design by gradients: which strain, current direction, gate voltage, temperature, bar width
and drive current make the transverse 2ω signal most measurable within the device's limits.

The objective — the signal-to-noise ratio of |V_y^2ω| on the lock-in (``"snr"``), its amplitude
(``"amplitude"``) or the dipole share |χ'_dipole/χ'_drude| of χ'_yxx (``"dipole_ratio"``) — is
evaluated through the one chain (:func:`crosswind.solver.study.chain.evaluate`, at a fixed k-mesh
``resolution``) and the noise model (:mod:`crosswind.solver.engine.noise`), and differentiated by
forward-mode automatic differentiation with respect to the free knobs.  The bar width W and the
drive current I are not inputs of the k-space chain: the Hall-bar relations of
:mod:`crosswind.solver.engine.device` are homogeneous in I/W (E = ρ'j with j = I/W; j⁽²⁾ = χ'EE;
E⁽²⁾ = −ρ'j⁽²⁾), so with the reading at the scenario's (W₀, I₀)

    V_y^2ω ∝ I²/W,  V_x^2ω ∝ L I²/W²,  V_xx ∝ L I/W,  p = ½Re(j·E*) ∝ (I/W)²,

which this module applies to traced values of W and I (tests/test_design.py checks it against the
chain at another W and I).  The strain axis enters through ``uniaxial(magnitude, angle, poisson)``
(the chain's ``strain_angle_deg`` value).

Optimisation: ``scipy.optimize.minimize(method="SLSQP")`` on the knobs mapped to [0, 1] within
their bounds, minimising −ln(objective) (so multipliers are elasticities), with inequality
constraints g = 1 − value/limit ≥ 0 for the limits of ``[design.limits]`` (never clipping), from
several starts (the given initial values, then points drawn uniformly within the bounds with a
fixed seed).  At the optimum: d objective/d knob for every free knob, the active constraints and
bounds, and the Lagrange multiplier λ of each active constraint from the KKT conditions
∇(−ln f) = Σ λ_i ∇g_i (non-negative least squares): relaxing a limit by a fraction ε raises
ln f by about λε, i.e. the objective by a factor ≈ exp(λε).

Outputs of :func:`run_design` (``crosswind design SCENARIO``): ``optimal_scenario.toml`` (ready for
``crosswind run``), ``design_summary.md`` (verdict first), ``design.json`` and ``design_map.png``
(the objective across the two knobs that move it most around the optimum, with the constraint
boundaries).  :func:`measurability` turns a sweep dataset into per-point SNR, averaging time and
artefacts (an xarray Dataset).
"""
from __future__ import annotations

import json
import math
import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
from scipy import constants
from scipy.optimize import minimize, nnls

from crosswind.solver.engine import noise
from crosswind.solver.engine.device import rotate_chi, rotate_sigma
from crosswind.solver.pytrees import as_dict, pytree_dataclass
from crosswind.solver.study.chain import evaluate
from crosswind.solver.study.files import atomic_text, atomic_write, make_folder, scenario_toml
from crosswind.solver.study.knobs import base_values, scenario_knobs
from crosswind.solver.vocabulary import DEVICE_FIELDS, KNOBS, OUTPUTS

#: knobs the design may free (besides the scenario's carrier knob)
DESIGN_KNOBS = ("strain", "strain_angle_deg", "current_angle_deg", "gate_V", "density_cm2", "mu_eV",
                "temperature_K", "width_um", "current_uA")
#: objective → (what it is, the vocabulary entry of its unit)
OBJECTIVES = {"snr": "signal-to-noise ratio of |V_y^2ω| (rms) at the lock-in time constant",
              "amplitude": "transverse 2ω voltage amplitude |V_y^2ω|",
              "dipole_ratio": "|χ'_dipole / χ'_drude| of χ'_yxx (bar frame; at most 1e6: a smaller Drude part "
                              "counts as zero)"}
_OBJECTIVE_UNIT = {"snr": DEVICE_FIELDS["snr_v2w_y"].unit_2d, "amplitude": OUTPUTS["V2w"].unit_2d,
                   "dipole_ratio": DEVICE_FIELDS["snr_v2w_y"].unit_2d}
#: [design.limits] key → knob of the vocabulary
LIMITS = {KNOBS[k].key: k for k in ("max_current_density_A_m", "max_power_density_W_m2", "max_temperature_rise_K",
                                     "max_gate_field_V_nm", "max_strain")}
#: [device] keys of the measurement and thermal settings (engine/noise.py)
SETTINGS_KEYS = ("probe_width_um", "probe_misalignment", "thermal_asymmetry", "amplifier_noise_nV_rtHz",
                 "time_constant_ms", "filter_slope_dB_oct", "averaging_limit_min", "substrate_um",
                 "substrate_conductivity_W_mK", "dielectric_conductivity_W_mK")
_TABLE = ("objective", "knobs", "at", "limits", "starts", "resolution", "map_points")
_KNOB_SPEC = ("initial", "bounds")
_DEFAULT_DIELECTRIC_NM = 285.0       # thermal path when the scenario has no gate dielectric (Si/SiO2)
_ACTIVE = 1e-5                       # a constraint g = 1 − value/limit below this is active
_AT_BOUND = 1e-6                     # a knob within this fraction of its range from a bound sits on it
ZERO_SHARE = 1e-6                    # dipole_ratio: a Drude part below this share of Σ|parts| is zero
_SEED = 2024
DIMENSIONLESS = DEVICE_FIELDS["snr_v2w_y"].unit_2d
#: colour-bar label of each objective in the map
_OBJECTIVE_LABEL = {"snr": "SNR of |V_y^2ω| at the time constant",
                    "amplitude": f"|V_y^2ω| [{OUTPUTS['V2w'].unit_2d}]",
                    "dipole_ratio": "|χ'_dipole / χ'_drude| of χ'_yxx"}


# ------------------------------------------------------------------------------ the [design] table
@dataclass(frozen=True)
class DesignSpec:
    """``[design]``: objective, free knobs ((name, initial, low, high), ...), held knob values,
    limits ((limit key, value), ...), number of starts, fixed k-mesh level, map grid size."""

    objective: str = "snr"
    knobs: tuple = ()
    at: tuple = ()
    limits: tuple = ()
    starts: int = 4
    resolution: int = 1
    map_points: int = 9

    @classmethod
    def make(cls, objective="snr", knobs=None, at=None, limits=None, **kw) -> DesignSpec:
        """From Python mappings: ``knobs={name: (initial, low, high)}``, ``at={knob: value}``,
        ``limits={"current_density_A_m": 2.0, ...}`` (the keys of ``[design.limits]``)."""
        return cls(objective=objective,
                   knobs=tuple((k, float(v[0]), float(v[1]), float(v[2])) for k, v in (knobs or {}).items()),
                   at=tuple((k, float(v)) for k, v in (at or {}).items()),
                   limits=tuple((k, float(v)) for k, v in (limits or {}).items()), **kw)


def _num(ctx, table, key, v):
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(float(v)):
        ctx.fail(table, key, f"must be a finite number, got {v!r}.")
    return float(v)


def _int(ctx, table, key, v, low, high):
    if not (isinstance(v, int) and not isinstance(v, bool) and low <= v <= high):
        ctx.fail(table, key, f"got {v!r}.", f"an integer {low}..{high}")
    return v


def free_knob_names(scn) -> tuple:
    """The knobs a design of ``scn`` may free: strain and its angle (uniaxial [material.strain]
    only), the current angle, the scenario's carrier, temperature, bar width and drive current."""
    uni = scn.material.strain is not None and scn.material.strain.kind == "uniaxial"
    return tuple(k for k in DESIGN_KNOBS if (k not in ("strain", "strain_angle_deg") or uni)
                 and (k not in ("gate_V", "density_cm2", "mu_eV") or k == scn.carrier))


def parse_design(ctx, data, scn) -> DesignSpec:
    """Check a ``[design]`` table (``ctx`` is the scenario loader's error context: ``fail``,
    ``check_keys``, ``table``) against the loaded scenario ``scn``."""
    t = ctx.table("design", data)
    ctx.check_keys("design", t, _TABLE)
    obj = t.get("objective", "snr")
    if obj not in OBJECTIVES:
        ctx.fail("design", "objective", f"unknown objective {obj!r}.", ", ".join(f'"{k}"' for k in OBJECTIVES))
    allowed = free_knob_names(scn)
    ktab = ctx.table("design.knobs", t.get("knobs", {}))
    if not ktab:
        ctx.fail("design", "knobs", "missing or empty.", "knobs = {name = {initial = ..., bounds = [lo, hi]}} "
                 "with names " + ", ".join(allowed))
    knobs = []
    for name, spec in ktab.items():
        if name not in allowed:
            why = (" (strain knobs need a uniaxial [material.strain])" if name in ("strain", "strain_angle_deg")
                   else "")
            ctx.fail("design.knobs", name, f"not a design knob of this scenario{why}.", ", ".join(allowed))
        tbl = f"design.knobs.{name}"
        sp = ctx.table(tbl, spec)
        ctx.check_keys(tbl, sp, _KNOB_SPEC)
        b = sp.get("bounds")
        if not (isinstance(b, list) and len(b) == 2):
            ctx.fail(tbl, "bounds", f"must be [low, high], got {b!r}.", "bounds = [low, high] in "
                     + KNOBS[name].unit)
        lo, hi = _num(ctx, tbl, "bounds", b[0]), _num(ctx, tbl, "bounds", b[1])
        init = _num(ctx, tbl, "initial", sp["initial"]) if "initial" in sp else 0.5 * (lo + hi)
        if not lo < hi or not lo <= init <= hi:
            ctx.fail(tbl, "bounds", f"need low < high and low <= initial <= high, got {lo:g}, {hi:g}, {init:g}.")
        for v in (lo, hi):
            problem = KNOBS[name].check(v)
            if problem:
                ctx.fail(tbl, "bounds", problem)
        knobs.append((name, init, lo, hi))
    units = scenario_knobs(scn)
    at = []
    for k, v in ctx.table("design.at", t.get("at", {})).items():
        extra = ("width_um", "current_uA") + (("strain_angle_deg",) if "strain" in units else ())
        if k not in units and k not in extra:
            ctx.fail("design.at", k, "not a knob of this scenario.", ", ".join([*units, *extra]))
        if k in ktab:
            ctx.fail("design.at", k, "is also a free knob in [design.knobs]; give it in one place.")
        at.append((k, _num(ctx, "design.at", k, v)))
    limits = []
    for k, v in ctx.table("design.limits", t.get("limits", {})).items():
        if k not in LIMITS:
            ctx.check_keys("design.limits", {k: v}, tuple(LIMITS))
        val = _num(ctx, "design.limits", k, v)
        problem = KNOBS[LIMITS[k]].check(val)
        if problem:
            ctx.fail("design.limits", k, problem)
        if k == "gate_field_V_nm" and scn.carrier != "gate_V":
            ctx.fail("design.limits", k, "a gate-field limit needs a gate_V scenario.")
        if k == "strain" and not (scn.material.strain is not None and scn.material.strain.kind == "uniaxial"):
            ctx.fail("design.limits", k, "a strain limit needs a uniaxial [material.strain].")
        limits.append((k, val))
    default = scn.numerics.resolution if scn.numerics.resolution is not None else 1
    return DesignSpec(objective=obj, knobs=tuple(knobs), at=tuple(at), limits=tuple(limits),
                      starts=_int(ctx, "design", "starts", t.get("starts", 4), 1, 64),
                      resolution=_int(ctx, "design", "resolution", t.get("resolution", default), 0, 4),
                      map_points=_int(ctx, "design", "map_points", t.get("map_points", 9), 0, 41))


# ------------------------------------------------------------------------------ settings ------
def noise_settings(device) -> noise.NoiseSettings:
    """The measurement and thermal settings of a scenario's [device] (a ``Device`` or the dict of a
    dataset's ``device`` attribute); keys it does not give keep their defaults."""
    get = device.get if isinstance(device, dict) else (lambda k, d=None: getattr(device, k, d))
    kw = {k: get(k) for k in SETTINGS_KEYS if get(k) is not None}
    if "filter_slope_dB_oct" in kw:
        kw["filter_slope_dB_oct"] = int(kw["filter_slope_dB_oct"])
    return noise.NoiseSettings(**kw)


def dielectric_m(device) -> float:
    """Gate dielectric thickness (m) for the thermal path and the gate field: ``dielectric_nm``, else
    the SiO2-equivalent ε0·εr/C of ``capacitance_nF_cm2`` (εr = ``permittivity`` or 3.9), else 285 nm."""
    get = device.get if isinstance(device, dict) else (lambda k, d=None: getattr(device, k, d))
    if get("dielectric_nm") is not None:
        return float(get("dielectric_nm")) * 1e-9
    if get("capacitance_nF_cm2") is not None:
        return constants.epsilon_0 * float(get("permittivity") or 3.9) / (float(get("capacitance_nF_cm2")) * 1e-5)
    return _DEFAULT_DIELECTRIC_NM * 1e-9


# ------------------------------------------------------------------------------ one point -----
@pytree_dataclass
class DesignPoint:
    """What the design sees at one set of knob values (SI units; scalars, traceable):
    ``objective`` (its unit in :data:`OBJECTIVES`), the 2ω amplitude and rms, the noise verdict
    (:class:`crosswind.solver.engine.noise.Measurability`), the constrained quantities (sheet
    current density A/m, power density W/m², temperature rise K, gate field V/m, strain) and the
    dipole share of χ'_yxx."""

    objective: Any
    v2w_y_amplitude: Any
    v2w_y_rms: Any
    current_density: Any
    power_density: Any
    temperature_rise: Any
    gate_field: Any
    strain: Any
    dipole_ratio: Any
    noise: noise.Measurability


def _point(scn, resolution, settings, vals: dict, objective: str) -> DesignPoint:
    """The chain at scalar knob values ``vals`` (every knob, plus ``width_um`` and ``current_uA``),
    with W and I applied by the Hall-bar scaling relations (module docstring)."""
    vals = dict(vals)
    W = jnp.asarray(vals.pop("width_um"), dtype=jnp.float64)
    current = jnp.asarray(vals.pop("current_uA"), dtype=jnp.float64)
    out = evaluate(scn, vals, resolution=resolution)
    d = scn.device
    s, w = current / d.current_uA, W / d.width_um
    rd = out.reading
    v2y = rd.v2w_y[0] * (s * s / w).astype(jnp.complex128)
    v2x = rd.v2w_x[0] * (s * s / (w * w)).astype(jnp.complex128)
    p = rd.power_density[0] * (s / w) ** 2
    T = jnp.asarray(vals["temperature_K"], dtype=jnp.float64).reshape(())
    angle = jnp.asarray(vals["current_angle_deg"], dtype=jnp.float64).reshape(())
    r = out.response
    seebeck = rotate_sigma(r.seebeck[0], angle)
    L, d_m = d.length_um * 1e-6, dielectric_m(d)
    m = noise.assess(out.sigma_bar[0], v2y, v2x, p, T, width_m=W * 1e-6, length_m=L, dielectric_m=d_m,
                     settings=settings, seebeck_bar=seebeck)
    # the parts by name (a mapping or a typed record of the engine's Response)
    part = lambda k: r.chi_parts[k] if isinstance(r.chi_parts, dict) else getattr(r.chi_parts, k)
    dip, dru, intr = (jnp.abs(rotate_chi(part(k)[0], angle)[1, 0, 0].real) for k in ("dipole", "drude", "intrinsic"))
    # a Drude part below ZERO_SHARE of the total counts as zero (the ratio saturates at 1/ZERO_SHARE)
    ratio = dip / jnp.maximum(dru, ZERO_SHARE * (dip + dru + intr) + 1e-300)
    amp = jnp.abs(v2y)
    gate = (jnp.abs(jnp.asarray(vals["gate_V"], dtype=jnp.float64).reshape(())) / d_m
            if "gate_V" in vals else jnp.asarray(0.0))
    strain = jnp.abs(jnp.asarray(vals.get("strain", 0.0), dtype=jnp.float64).reshape(()))
    obj = {"snr": m.snr_v2w_y, "amplitude": amp, "dipole_ratio": ratio}[objective]
    return DesignPoint(objective=obj, v2w_y_amplitude=amp, v2w_y_rms=amp / jnp.sqrt(2.0),
                       current_density=current / W, power_density=p, temperature_rise=m.temperature_rise,
                       gate_field=gate, strain=strain, dipole_ratio=ratio, noise=m)


#: [design.limits] key → (DesignPoint attribute, factor from the limit's unit to SI)
_LIMIT_VALUE = {"current_density_A_m": ("current_density", 1.0), "power_density_W_m2": ("power_density", 1.0),
                "temperature_rise_K": ("temperature_rise", 1.0), "gate_field_V_nm": ("gate_field", 1e9),
                "strain": ("strain", 1.0)}


def limit_value(point: DesignPoint, key: str) -> float:
    """The constrained quantity of ``point`` in the unit of the limit ``key``."""
    attr, factor = _LIMIT_VALUE[key]
    return getattr(point, attr) / factor


class _Problem:
    """The scaled problem: u ∈ [0, 1]ⁿ → (−ln objective, constraints g ≥ 0), compiled once."""

    def __init__(self, scn, spec: DesignSpec, settings):
        self.scn, self.spec, self.settings = scn, spec, settings
        self.names = [k[0] for k in spec.knobs]
        self.lo = np.array([k[2] for k in spec.knobs], dtype=float)
        self.hi = np.array([k[3] for k in spec.knobs], dtype=float)
        self.base, self.held = held_values(scn, spec)
        self._cache: dict = {}
        self._jac = jax.jit(lambda u: jax.jacfwd(self._vec_aux, has_aux=True)(u))
        self._val = jax.jit(self._vec_aux)

    def x(self, u):
        return self.lo + np.asarray(u) * (self.hi - self.lo)

    def point_at(self, u) -> DesignPoint:
        lo, hi = jnp.asarray(self.lo), jnp.asarray(self.hi)
        x = lo + u * (hi - lo)
        vals = dict(self.base)
        vals.update({n: x[i] for i, n in enumerate(self.names)})
        return _point(self.scn, self.spec.resolution, self.settings, vals, self.spec.objective)

    def _vec_aux(self, u):
        p = self.point_at(u)
        g = [1.0 - limit_value(p, k) / v for k, v in self.spec.limits]
        vec = jnp.stack([jnp.log(jnp.maximum(p.objective, 1e-300)), *g])
        return vec, (vec, p)

    def full(self, u):
        """(vector, jacobian, point) at u (cached: SLSQP asks for the same point several times)."""
        key = np.asarray(u, dtype=float).tobytes()
        if key not in self._cache:
            jac, (vec, p) = self._jac(jnp.asarray(u, dtype=jnp.float64))
            self._cache = {key: (np.asarray(vec), np.asarray(jac), jax.tree.map(np.asarray, p))}
        return self._cache[key]

    def value(self, u):
        """(vector, point) at u without derivatives."""
        vec, (_, p) = self._val(jnp.asarray(u, dtype=jnp.float64))
        return np.asarray(vec), jax.tree.map(np.asarray, p)


def held_values(scn, spec: DesignSpec):
    """({knob: value} for every input of the chain plus ``width_um`` and ``current_uA``, {knob:
    value} of the held knobs that the scenario sweeps): free knobs at their initial values, ``at``
    values, single-valued axes; a swept axis neither free nor in ``at`` is held at its first value."""
    at = dict(spec.at)
    at.update({k[0]: k[1] for k in spec.knobs})
    extra = {k: at.pop(k) for k in ("width_um", "current_uA", "strain_angle_deg") if k in at}
    vals = base_values(scn, at, who="design")
    held = {}
    for a in scn.axes:
        if vals.get(a.name) is None:
            vals[a.name] = float(a.values[0])
            held[a.name] = float(a.values[0])
    vals["width_um"] = extra.get("width_um", scn.device.width_um)
    vals["current_uA"] = extra.get("current_uA", scn.device.current_uA)
    st = scn.material.strain
    if st is not None and st.kind == "uniaxial":
        vals["strain_angle_deg"] = extra.get("strain_angle_deg", st.angle_deg)
    return {k: float(v) for k, v in vals.items()}, held


# ------------------------------------------------------------------------------ results -------
@dataclass(frozen=True)
class KnobResult:
    """A free knob at the optimum: value, bounds, which bound is active ('' if none), d objective/
    d knob (objective unit per knob unit) and the relative change of the objective for a step of
    1 % of the knob's range."""

    name: str
    unit: str
    value: float
    low: float
    high: float
    at_bound: str
    derivative: float
    percent_per_percent_range: float


@dataclass(frozen=True)
class ConstraintResult:
    """A limit at the optimum: its value, the constrained quantity there, whether it binds, the
    multiplier λ (elasticity of the objective with respect to the limit) and the first-order gain
    factor exp(0.1 λ) from relaxing the limit by 10 %."""

    key: str
    unit: str
    limit: float
    value: float
    active: bool
    multiplier: float
    gain_relax_10pct: float


@dataclass(frozen=True)
class StartResult:
    initial: dict
    final: dict
    objective: float
    feasible: bool
    success: bool
    message: str
    iterations: int


@dataclass(frozen=True)
class DesignResult:
    """The design's answer: objective (name, value, unit), free knobs and limits at the optimum,
    the point's numbers (:class:`DesignPoint`, numpy), every start, the held knob values, the
    settings used and the map of the objective over the two most important knobs (or None)."""

    objective: str
    objective_value: float
    objective_unit: str
    knobs: tuple
    constraints: tuple
    point: DesignPoint
    values: dict
    held: dict
    starts: tuple
    settings: noise.NoiseSettings
    resolution: int
    success: bool
    message: str
    importance: dict = field(default_factory=dict)
    map: dict | None = None

    @property
    def verdict(self) -> str:
        return noise.VERDICTS[int(self.point.noise.measurability)]

    def to_json(self) -> dict:
        pt = {k: float(v) for k, v in as_dict(self.point).items() if k != "noise"}
        pt.update({k: float(v) for k, v in as_dict(self.point.noise).items()})
        return {"objective": self.objective, "objective_value": self.objective_value,
                "objective_unit": self.objective_unit, "verdict": self.verdict, "success": self.success,
                "message": self.message, "resolution": self.resolution,
                "knobs": [as_dict(k) for k in self.knobs], "constraints": [as_dict(c) for c in self.constraints],
                "point": pt, "values": self.values, "held": self.held,
                "starts": [as_dict(s) for s in self.starts], "settings": as_dict(self.settings),
                "importance": self.importance,
                "map": None if self.map is None else {k: (np.asarray(v).tolist() if not isinstance(v, str) else v)
                                                      for k, v in self.map.items()}}


# ------------------------------------------------------------------------------ solving -------
def _solve(prob: _Problem, u0):
    m = len(prob.spec.limits)
    fun = lambda u: -float(prob.full(u)[0][0])
    jac = lambda u: -prob.full(u)[1][0]
    cons = ([{"type": "ineq", "fun": lambda u: prob.full(u)[0][1:], "jac": lambda u: prob.full(u)[1][1:]}]
            if m else [])
    with np.errstate(invalid="ignore"):
        return minimize(fun, np.asarray(u0, dtype=float), jac=jac, method="SLSQP", bounds=[(0.0, 1.0)] * len(u0),
                        constraints=cons, options={"maxiter": 200, "ftol": 1e-12})


def _multipliers(prob: _Problem, u):
    """λ ≥ 0 of the active constraints and bounds from ∇(−ln f) = Σ λ_i ∇g_i (non-negative least squares)."""
    vec, jac, _ = prob.full(u)
    grad_f = -jac[0]
    cols, tags = [], []
    for i in range(len(prob.spec.limits)):
        if vec[1 + i] <= _ACTIVE:
            cols.append(jac[1 + i])
            tags.append(("limit", i))
    for j in range(len(u)):
        if u[j] <= _AT_BOUND:
            cols.append(np.eye(len(u))[j])
            tags.append(("low", j))
        elif u[j] >= 1 - _AT_BOUND:
            cols.append(-np.eye(len(u))[j])
            tags.append(("high", j))
    if not cols:
        return {}
    lam, _ = nnls(np.stack(cols, axis=1), grad_f)
    return dict(zip(tags, lam))


def design(scn, spec: DesignSpec | None = None, *, settings: noise.NoiseSettings | None = None,
           progress=None) -> DesignResult:
    """Optimise the free knobs of ``spec`` (default: the scenario's ``[design]``) for its objective
    within its bounds and limits; ``settings`` default to the scenario's [device] keys.  Nothing is
    written (see :func:`run_design`).  ``progress(line)`` receives one line per start."""
    spec = spec if spec is not None else getattr(scn, "design", None)
    if spec is None or not spec.knobs:
        raise ValueError("design: no free knobs; add a [design] table with knobs = {...} (docs/design.md)")
    settings = settings if settings is not None else noise_settings(scn.device)
    prob = _Problem(scn, spec, settings)
    n = len(prob.names)
    u_init = (np.array([k[1] for k in spec.knobs]) - prob.lo) / (prob.hi - prob.lo)
    rng = np.random.default_rng(_SEED)
    starts = [u_init] + [rng.uniform(0.0, 1.0, n) for _ in range(spec.starts - 1)]
    runs, ends = [], []
    for i, u0 in enumerate(starts):
        res = _solve(prob, u0)
        u = np.clip(res.x, 0.0, 1.0)
        vec, _, _ = prob.full(u)
        feasible = bool(np.all(vec[1:] >= -1e-6) and np.isfinite(vec[0]))
        runs.append(StartResult(initial=dict(zip(prob.names, map(float, prob.x(u0)))),
                                final=dict(zip(prob.names, map(float, prob.x(u)))), objective=float(np.exp(vec[0])),
                                feasible=feasible, success=bool(res.success), message=str(res.message),
                                iterations=int(res.nit)))
        if progress is not None:
            progress(f"start {i + 1}/{len(starts)}: objective {math.exp(vec[0]):.4g}"
                     + ("" if feasible else " (infeasible)") + f", {res.message}")
        worst = float(np.min(vec[1:])) if len(vec) > 1 else 0.0
        # rank: feasible first, then the larger objective (infeasible ones by their worst constraint)
        ends.append(((1, float(vec[0])) if feasible else (0, worst), u, res, feasible))
    _, u, res, feasible = max(ends, key=lambda e: (e[0][0], e[0][1] if np.isfinite(e[0][1]) else -np.inf))
    vec, jac, pt = prob.full(u)
    lam = _multipliers(prob, u)
    span = prob.hi - prob.lo
    knobs = []
    for j, name in enumerate(prob.names):
        bound = "low" if u[j] <= _AT_BOUND else ("high" if u[j] >= 1 - _AT_BOUND else "")
        dlog = jac[0, j]
        knobs.append(KnobResult(name=name, unit=KNOBS[name].unit, value=float(prob.x(u)[j]), low=float(prob.lo[j]),
                                high=float(prob.hi[j]), at_bound=bound,
                                derivative=float(np.exp(vec[0]) * dlog / span[j]),
                                percent_per_percent_range=float(dlog)))
    cons = []
    for i, (key, limit) in enumerate(spec.limits):
        active = bool(vec[1 + i] <= _ACTIVE)
        lm = float(lam.get(("limit", i), 0.0))
        cons.append(ConstraintResult(key=key, unit=KNOBS[LIMITS[key]].unit, limit=limit,
                                     value=float(limit_value(pt, key)), active=active, multiplier=lm,
                                     gain_relax_10pct=float(math.exp(0.1 * lm))))
    values = dict(prob.base)
    values.update(dict(zip(prob.names, map(float, prob.x(u)))))
    out = DesignResult(objective=spec.objective, objective_value=float(np.exp(vec[0])),
                       objective_unit=_OBJECTIVE_UNIT[spec.objective], knobs=tuple(knobs), constraints=tuple(cons),
                       point=pt, values=values, held=prob.held, starts=tuple(runs), settings=settings,
                       resolution=spec.resolution, success=bool(res.success) and feasible,
                       message=str(res.message) if feasible else "no start ended within the limits (least "
                       "infeasible start reported)")
    if spec.map_points >= 2:
        imp, mp = objective_map(prob, u, spec.map_points)
        out = replace(out, importance=imp, map=mp)
    return out


def objective_map(prob: _Problem, u, points: int):
    """Importance of each free knob (largest |Δ ln objective| for a step of ±10 % of its range
    from the optimum) and the objective on a points × points grid over the two most important
    knobs, ±25 % of their ranges around the optimum (clipped to the bounds), with the constraint
    values g (≥ 0 feasible) on the same grid."""
    base = prob.value(u)[0][0]
    imp = {}
    for j, name in enumerate(prob.names):
        worst = 0.0
        for step in (-0.1, 0.1):
            v = u.copy()
            v[j] = min(max(v[j] + step, 0.0), 1.0)
            if v[j] != u[j]:
                worst = max(worst, abs(float(prob.value(v)[0][0] - base)))
        imp[name] = worst
    order = sorted(prob.names, key=lambda k: -imp[k])
    if len(order) == 1:
        return imp, None
    a, b = prob.names.index(order[0]), prob.names.index(order[1])
    ga = np.linspace(max(u[a] - 0.25, 0.0), min(u[a] + 0.25, 1.0), points)
    gb = np.linspace(max(u[b] - 0.25, 0.0), min(u[b] + 0.25, 1.0), points)
    obj = np.zeros((points, points))
    g = np.zeros((len(prob.spec.limits), points, points))
    for i, ub in enumerate(gb):
        for k, ua in enumerate(ga):
            v = u.copy()
            v[a], v[b] = ua, ub
            vec, _ = prob.value(v)
            obj[i, k] = math.exp(vec[0])
            g[:, i, k] = vec[1:]
    xa = prob.lo[a] + ga * (prob.hi[a] - prob.lo[a])
    xb = prob.lo[b] + gb * (prob.hi[b] - prob.lo[b])
    return imp, {"x_name": order[0], "y_name": order[1], "x": xa, "y": xb, "objective": obj,
                 "constraints": g, "limit_keys": np.array([k for k, _ in prob.spec.limits]),
                 "optimum": np.array([prob.x(u)[a], prob.x(u)[b]])}


# ------------------------------------------------------------------------------ files ---------
def _fmt(v: float, unit: str = "") -> str:
    """A number with an SI prefix for volts and seconds, plain otherwise."""
    if unit in (OUTPUTS["V2w"].unit_2d, DEVICE_FIELDS["averaging_time_snr10"].unit_2d) and v != 0 and math.isfinite(v):
        for f, pre in ((1.0, ""), (1e-3, "m"), (1e-6, "μ"), (1e-9, "n"), (1e-12, "p")):
            if abs(v) >= f:
                return f"{v / f:.3g} {pre}{unit}"
        return f"{v:.3g} {unit}"
    return f"{v:.4g} {'' if unit == DIMENSIONLESS else unit}".rstrip()


def _per(objective_unit: str, knob_unit: str) -> str:
    """The unit of d objective / d knob, e.g. 'V/deg', '/V', '' (dimensionless over dimensionless)."""
    top = "" if objective_unit == DIMENSIONLESS else objective_unit
    return top if knob_unit == DIMENSIONLESS else f"{top}/{knob_unit}"


def _duration(seconds: float) -> str:
    if not math.isfinite(seconds):
        return "never"
    for f, name in ((86400.0, "d"), (3600.0, "h"), (60.0, KNOBS["averaging_limit_min"].unit)):
        if seconds >= f:
            return f"{seconds / f:.3g} {name}"
    return _fmt(seconds, DEVICE_FIELDS["averaging_time_snr10"].unit_2d)


def verdict_line(snr, t10, verdict: str, settings: noise.NoiseSettings) -> str:
    """The measurability sentence that leads a summary."""
    tc = settings.time_constant_ms
    head = f"**{verdict.capitalize()}**"
    return (f"{head} at the chosen settings: SNR {snr:.3g} at the lock-in time constant {tc:g} "
            f"{KNOBS['time_constant_ms'].unit} ({settings.filter_slope_dB_oct} dB/oct, noise bandwidth "
            f"{noise.enbw(tc * 1e-3, settings.filter_slope_dB_oct):.3g} Hz); SNR 10 after "
            f"{_duration(t10)} of averaging (white-noise floor only: a lower bound on the noise).")


CAUTIONS = [
    "The noise model is a lower bound: contact noise, 1/f noise, amplifier current noise, pickup from "
    "the drive and the lock-in's own harmonic distortion add to it; measure the floor with the drive off and "
    "at a harmonic where no signal is expected.",
    "The thermal model is an estimate (dielectric slab plus substrate spreading, conductivities near room "
    "temperature unless set): at cryogenic temperatures the conductivities, interface resistances and the "
    "electron–phonon bottleneck can make the electron temperature rise much larger.",
    "The drive current, the current density and the gate field found here must stay within what the device, "
    "its contacts and the gate dielectric tolerate; approach them in steps and watch the gate leakage.",
    "Defer to the laboratory's local safety rules (cryogens, high voltage on gates, electrostatic discharge), "
    "which take precedence over anything said here.",
]


def artefact_warning(ratio: float) -> str:
    """'.' or a warning when an artefact is within a factor 3 of the signal (or larger)."""
    if math.isfinite(ratio) and ratio < 3.0:
        return (" — **comparable to or larger than the signal**: tell them apart by the current-angle dependence "
                "(the Hall signal follows cos(θ − θ_D), docs/theory.md §15).")
    return "."


def summary_markdown(scn, res: DesignResult) -> str:
    """``design_summary.md``: the verdict first, then the optimum, sensitivities, constraints, artefacts."""
    pt, m = res.point, res.point.noise
    lines = ["# Device design", "", verdict_line(float(m.snr_v2w_y), float(m.averaging_time_snr10), res.verdict,
                                                   res.settings), ""]
    unit = res.objective_unit
    lines += [f"Objective: maximise {OBJECTIVES[res.objective]} — **{_fmt(res.objective_value, unit)}** at the "
              f"optimum ({'converged' if res.success else 'not converged: ' + res.message}; k-mesh level "
              f"{res.resolution}, {len(res.starts)} start(s)).", "",
              f"Transverse 2ω signal {_fmt(float(pt.v2w_y_amplitude), OUTPUTS['V2w'].unit_2d)} amplitude "
              f"({_fmt(float(pt.v2w_y_rms), OUTPUTS['V2w'].unit_2d)} rms) against a noise density of "
              f"{float(m.noise_density_y) * 1e9:.3g} {KNOBS['amplifier_noise_nV_rtHz'].unit} at the transverse "
              f"probes (resistance {float(m.resistance_y):.4g} {DEVICE_FIELDS['resistance_y'].unit_2d}).", "",
              "## Optimum", "",
              "| knob | value | bounds | at bound | d objective / d knob | % change per 1 % of range |",
              "|---|---|---|---|---|---|"]
    for k in res.knobs:
        lines.append(f"| `{k.name}` | {_fmt(k.value, k.unit)} | [{k.low:g}, {k.high:g}] | {k.at_bound or '—'} | "
                     f"{(f'{k.derivative:.4g} ' + _per(unit, k.unit)).strip()} | {k.percent_per_percent_range:+.3g} |")
    if res.held:
        lines += ["", "Held at the first value of their sweep axis (not free, not in `at`): "
                  + ", ".join(f"`{k}` = {v:g} {KNOBS[k].unit}" for k, v in res.held.items()) + "."]
    lines += ["", "## Limits", ""]
    if not res.constraints:
        lines.append("No limits were given: the optimum is set by the knob bounds alone.")
    else:
        lines += ["| limit | value at the optimum | active | multiplier λ | gain from relaxing by 10 % |",
                  "|---|---|---|---|---|"]
        for c in res.constraints:
            gain = f"×{c.gain_relax_10pct:.3f}" if c.active else "—"
            lines.append(f"| `{c.key}` ≤ {_fmt(c.limit, c.unit)} | {_fmt(c.value, c.unit)} | "
                         f"{'**yes**' if c.active else 'no'} | {c.multiplier:.3g} | {gain} |")
        lines += ["", "λ is the elasticity of the objective with respect to the limit (KKT conditions of "
                  "−ln objective): relaxing an active limit by 10 % multiplies the objective by about exp(0.1 λ)."]
    lines += ["", "## Heating and artefacts at the optimum", "",
              f"* Joule power {pt.power_density:.4g} {DEVICE_FIELDS['power_density'].unit_2d}, sheet current "
              f"density {pt.current_density:.4g} {DEVICE_FIELDS['current_density'].unit_2d}: channel temperature "
              f"rise {float(m.temperature_rise):.3g} {DEVICE_FIELDS['temperature_rise'].unit_2d}"
              + (" — **more than 10 % of the bath temperature: the chosen temperature is not the electron "
                 "temperature**." if int(m.heating_flag) else " (below 10 % of the bath temperature)."),
              f"* Probe misalignment ({res.settings.probe_misalignment:g} of W): 2ω pickup "
              f"{_fmt(float(m.pickup_v2w_y), OUTPUTS['V2w'].unit_2d)}; signal/pickup {float(m.signal_to_pickup):.3g}"
              + artefact_warning(float(m.signal_to_pickup)),
              f"* Thermoelectric 2ω estimate ({res.settings.thermal_asymmetry:g} of the rise across the probes): "
              f"{_fmt(float(m.thermoelectric_v2w_y), OUTPUTS['V2w'].unit_2d)}; signal/thermoelectric "
              f"{float(m.signal_to_thermoelectric):.3g}" + artefact_warning(float(m.signal_to_thermoelectric)),
              f"* Dipole share |χ'_dipole/χ'_drude| of χ'_yxx: {float(pt.dipole_ratio):.3g}."]
    if res.map is not None:
        lines += ["", f"`design_map.png`: the objective across `{res.map['x_name']}` and `{res.map['y_name']}`, the "
                  "two knobs that move it most around the optimum (±10 % of their ranges: "
                  + ", ".join(f"`{k}` {v:.3g}" for k, v in sorted(res.importance.items(), key=lambda kv: -kv[1]))
                  + " in ln objective); dashed lines are the limits."]
    lines += ["", "`optimal_scenario.toml` holds the optimum; `crosswind run optimal_scenario.toml` recomputes it with "
              "the scenario's own numerics (automatic refinement may shift the numbers slightly from this fixed "
              "k-mesh level).", "", "## Cautions", ""] + [f"* {c}" for c in CAUTIONS]
    return "\n".join(lines) + "\n"


def optimal_scenario_text(scn, res: DesignResult) -> str:
    """The scenario with the optimum written in: free and held knobs as single values, the [design]
    table dropped, output into ``optimal``."""
    data = tomllib.loads(scn.text)
    data.pop("design", None)
    data.pop("fit", None)
    cond, dev = data.setdefault("conditions", {}), data.setdefault("device", {})
    for k, v in {**res.values, **res.held}.items():
        if k in ("width_um", "current_uA"):
            dev[k] = v
        elif k == "strain":
            data["material"]["strain"]["magnitude"] = v
        elif k == "strain_angle_deg":
            data["material"]["strain"]["angle_deg"] = v
        elif k == "current_angle_deg":
            (dev if "current_angle_deg" in dev else cond)[k] = v
        elif k in cond:
            cond[k] = v
        elif k in cond.get("scattering", {}):
            cond["scattering"][k] = v
    if scn.material.tight_binding is not None:
        data["material"]["tight_binding"] = str(scn.material.tight_binding)
    data.setdefault("output", {})["folder"] = "optimal"
    head = ("# The scenario at the optimum found by `crosswind design` "
            f"({', '.join(k.name for k in res.knobs)} free; objective {res.objective}).\n"
            "# Run it with: crosswind run optimal_scenario.toml\n")
    return head + scenario_toml(data)


def plot_map(res: DesignResult, path: Path) -> None:
    """``design_map.png``: the objective over the two most important knobs, limits dashed."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    mp = res.map
    fig, ax = plt.subplots(figsize=(6.0, 4.8))
    pcm = ax.pcolormesh(mp["x"], mp["y"], mp["objective"], shading="auto", cmap="viridis")
    fig.colorbar(pcm, ax=ax, label=_OBJECTIVE_LABEL[res.objective])
    for g, key in zip(mp["constraints"], mp["limit_keys"]):
        if np.nanmin(g) < 0 < np.nanmax(g):
            cs = ax.contour(mp["x"], mp["y"], g, levels=[0.0], colors="w", linestyles="--", linewidths=1.2)
            ax.clabel(cs, fmt={0.0: str(key)}, fontsize=8)
    ax.plot(*mp["optimum"], marker="*", color="r", markersize=14, label="optimum")
    ax.set_xlabel(f"{KNOBS[mp['x_name']].long_name} [{KNOBS[mp['x_name']].unit}]")
    ax.set_ylabel(f"{KNOBS[mp['y_name']].long_name} [{KNOBS[mp['y_name']].unit}]")
    ax.legend(loc="best", fontsize=8)
    ax.set_title("objective around the optimum")
    fig.tight_layout()
    atomic_write(path, lambda tmp: fig.savefig(tmp, dpi=120, format="png"))
    plt.close(fig)


def write_design(scn, res: DesignResult, folder) -> list:
    """Write ``design_summary.md``, ``design.json``, ``optimal_scenario.toml`` and (with a map)
    ``design_map.png`` into ``folder``; returns the paths."""
    folder = make_folder(Path(folder))
    paths = [folder / "design_summary.md", folder / "design.json", folder / "optimal_scenario.toml"]
    atomic_text(paths[0], summary_markdown(scn, res))
    atomic_text(paths[1], json.dumps(res.to_json(), indent=1, default=float))
    atomic_text(paths[2], optimal_scenario_text(scn, res))
    if res.map is not None:
        paths.append(folder / "design_map.png")
        plot_map(res, paths[-1])
    return paths


def run_design(scn, folder, *, starts: int | None = None, progress=None) -> DesignResult:
    """:func:`design` on the scenario's ``[design]`` table, then :func:`write_design`."""
    spec = getattr(scn, "design", None)
    if spec is None:
        raise ValueError(f"{scn.path}: no [design] table; add one (docs/design.md)")
    if starts is not None:
        spec = replace(spec, starts=starts)
    res = design(scn, spec, progress=progress)
    write_design(scn, res, folder)
    return res


# ------------------------------------------------------------------------------ sweep datasets
def measurability(ds, device=None, settings: noise.NoiseSettings | None = None):
    """Per-point noise floor, verdict and artefacts of a sweep dataset (``crosswind run``'s
    ``results.nc``) as an xarray Dataset on the dataset's grid (fields of
    :data:`crosswind.solver.vocabulary.DEVICE_FIELDS`, with units).  ``device``: the scenario's
    [device] (a ``Device``) or None for the dataset's ``device`` attribute; ``settings`` default to
    that device's keys.  A ``seebeck`` variable in the dataset (crystal frame) gives the
    thermoelectric estimate; without one it is NaN."""
    import xarray as xr
    dev = json.loads(ds.attrs["device"]) if device is None else device
    get = dev.get if isinstance(dev, dict) else (lambda k, d=None: getattr(dev, k, d))
    settings = settings if settings is not None else noise_settings(dev)
    cplx = lambda name: ds[name] + 1j * ds[name + "_imag"] if name + "_imag" in ds else ds[name]
    amp = ds["v2w_y_amplitude"]
    dims = list(amp.dims)
    sig = cplx("sigma_bar").transpose(*dims, "i", "j")
    v2y = cplx("v2w_y").transpose(*dims)
    v2x = cplx("v2w_x").transpose(*dims)
    T = xr.broadcast(ds["temperature_K"], amp)[0].transpose(*dims)
    seebeck = None
    if "seebeck" in ds:
        s = xr.broadcast(ds["seebeck"], amp)[0].transpose(*dims, "i", "j")
        seebeck = rotate_sigma(np.asarray(s.values), np.asarray(xr.broadcast(ds["current_angle_deg"], amp)[0]
                                                                 .transpose(*dims).values))
    m = noise.assess(np.asarray(sig.values), np.asarray(v2y.values), np.asarray(v2x.values),
                     np.asarray(ds["power_density"].transpose(*dims).values), np.asarray(T.values),
                     width_m=float(get("width_um")) * 1e-6, length_m=float(get("length_um")) * 1e-6,
                     dielectric_m=dielectric_m(dev), settings=settings, seebeck_bar=seebeck)
    coords = {d: ds[d] for d in dims}
    out = {}
    for name, v in as_dict(m).items():
        f = DEVICE_FIELDS[name]
        out[name] = xr.DataArray(np.asarray(v), dims=dims, coords=coords,
                                 attrs={"units": f.unit_2d, "long_name": f.long_name})
    res = xr.Dataset(out)
    res.attrs["verdicts"] = json.dumps({str(k): v for k, v in noise.VERDICTS.items()})
    res.attrs["noise_settings"] = json.dumps(as_dict(settings))
    return res


def value_at(ds, name: str, idx: dict) -> float:
    """The value of coordinate or field ``name`` of a sweep dataset at the grid point ``idx``
    ({dimension: index}); a fixed quantity is a scalar coordinate and has no index."""
    var = ds[name]
    return float(var.isel({d: i for d, i in idx.items() if d in var.dims}).values)


def measurability_lines(ds, scn, idx) -> list:
    """Markdown lines that lead a sweep's ``summary.md``: the verdict at the grid point ``idx`` (the
    2ω peak: {dimension: index}) with its SNR and averaging time, the count of verdicts over the
    sweep, and the heating and misalignment artefacts there (docs/theory.md §15)."""
    settings = noise_settings(scn.device)
    m = measurability(ds, scn.device, settings)
    at = m.isel({d: i for d, i in idx.items() if d in m.dims})
    val = lambda name: float(at[name].values)
    code = int(val("measurability"))
    counts = [int((m["measurability"].values == c).sum()) for c in (2, 1, 0)]
    lines = [verdict_line(val("snr_v2w_y"), val("averaging_time_snr10"), noise.VERDICTS[code], settings)
             .replace(" at the chosen settings:", " at the chosen settings (at the 2ω peak below):"),
             "",
             f"Over the sweep: {counts[0]} point(s) measurable, {counts[1]} marginal, {counts[2]} not measurable "
             f"(noise {val('noise_density_y') * 1e9:.3g} {KNOBS['amplifier_noise_nV_rtHz'].unit} at the transverse "
             f"probes at the peak; settings and formulas: docs/design.md, docs/theory.md §15).",
             ""]
    rise = val("temperature_rise")
    T = value_at(ds, "temperature_K", idx)
    heat = (" — **more than 10 % of the bath temperature: the chosen temperature is not the electron temperature**"
            if int(val("heating_flag")) else "")
    lines += [f"- Joule heating at the peak: channel temperature rise {rise:.3g} "
              f"{DEVICE_FIELDS['temperature_rise'].unit_2d} (thermal estimate){heat}"
              + ("" if heat else f", below 10 % of the bath temperature {T:g} {KNOBS['temperature_K'].unit}") + ".",
              f"- Probe misalignment ({settings.probe_misalignment:g} of W): 2ω pickup "
              f"{_fmt(val('pickup_v2w_y'), OUTPUTS['V2w'].unit_2d)}, signal/pickup {val('signal_to_pickup'):.3g}"
              + artefact_warning(val("signal_to_pickup")),
              _thermo_line(val, settings), ""]
    return lines


def _thermo_line(val, settings) -> str:
    """The thermoelectric 2ω artefact at the peak (needs the sweep's Seebeck tensor)."""
    v = val("thermoelectric_v2w_y")
    if not np.isfinite(v):
        return ("- Thermoelectric 2ω: not estimated (the dataset holds no Seebeck tensor); `crosswind design` "
                "reports it.")
    return (f"- Thermoelectric 2ω estimate ({settings.thermal_asymmetry:g} of the temperature rise across the "
            f"probes, an order-of-magnitude estimate): {_fmt(v, OUTPUTS['V2w'].unit_2d)}, signal/thermoelectric "
            f"{val('signal_to_thermoelectric'):.3g}" + artefact_warning(val("signal_to_thermoelectric")))


__all__ = ["ConstraintResult", "DESIGN_KNOBS", "DesignPoint", "DesignResult", "DesignSpec", "KnobResult", "LIMITS",
           "OBJECTIVES", "SETTINGS_KEYS", "StartResult", "artefact_warning", "design", "dielectric_m",
           "free_knob_names", "held_values", "limit_value", "measurability", "measurability_lines", "noise_settings",
           "objective_map", "optimal_scenario_text", "parse_design", "run_design", "summary_markdown", "value_at",
           "verdict_line", "write_design"]
