"""Scenario files: one TOML file describing material, device, conditions, numerics and output.

The schema is Crosswind's own; ``docs/scenario-files.md`` documents it with a commented example.
Tables and keys (units in the key names):

    [material]            model = "<catalogue name>"  OR  tight_binding = "<file.toml>" (relative
                          to the scenario file); [material.parameters] model parameters;
                          [material.strain] either xx, yy, xy (tensor components) or
                          magnitude, angle_deg, poisson (uniaxial; ``magnitude`` may be a sweep)
    [device]              width_um, length_um, current_uA (amplitude of I0 sin ωt), frequency_Hz,
                          current_angle_deg, dielectric_nm, permittivity | capacitance_nF_cm2,
                          gate_offset_V, thickness_nm (film of a 3D model, docs/theory.md §16.5);
                          measurement and thermal settings (docs/theory.md §15):
                          probe_width_um, probe_misalignment, thermal_asymmetry,
                          amplifier_noise_nV_rtHz, time_constant_ms, filter_slope_dB_oct,
                          averaging_limit_min, substrate_um, substrate_conductivity_W_mK,
                          dielectric_conductivity_W_mK
    [conditions]          exactly one of gate_V, density_cm2, mu_eV; temperature_K;
                          tau_fs | [conditions.scattering]; current_angle_deg
    [conditions.scattering]  kind = "constant" (tau_fs) | "power-law" (tau0_fs, exponent,
                          reference_energy_eV, energy_scale_eV) | "matthiessen" (tau_impurity_fs,
                          tau_phonon_fs, reference_temperature_K)
    [numerics]            rtol, resolution ("auto" or a level 0..4), intrinsic, density_resolution,
                          batch_points
    [output]              folder (relative to the scenario file), figures
    [drive]               a polarised in-plane field besides the current drive (docs/theory.md §5.9):
                          polarisation = "linear" | "circular" | "elliptical", frequency_Hz, field_V_m
                          (phasor amplitude, S0 = field²), handedness = "counterclockwise" |
                          "clockwise" (seen from +z; circular, elliptical), ellipticity_deg (elliptical,
                          0 < χ < 45), angle_deg (linear, elliptical: direction / major axis from crystal x)
    [design]              objective, knobs {name = {initial, bounds}}, at, limits, starts, resolution,
                          map_points (``crosswind design``; :func:`crosswind.solver.study.design.parse_design`)

Every numeric condition is a value, a list of values, or a sweep {start, stop, num[, spacing =
"linear" | "log"]}; the grid is the outer product of all axes.  Loading checks everything (keys,
types, ranges, the model and its parameters) before anything is written; errors are
:class:`ScenarioError` naming the file, the table and the key, and saying what is allowed.

Plausibility (after the valid ranges): relaxation times, temperatures, densities and the gate field
are compared with the physical ranges of :mod:`crosswind.solver.vocabulary`, a chemical potential
with the model's own energy window (:func:`model_window`: the band range of a lattice model, the
validity window of a k·p model).  A clearly impossible value — most often a unit slip, ``mu_eV =
110`` for 110 meV or ``tau_fs = 0.2`` for 0.2 ps — is refused with the likely slip named ("Did you
mean 0.11 eV (110 meV)?"); an implausible one loads with a :class:`ScenarioWarning`, kept in
``Scenario.cautions`` for the summary.
"""
from __future__ import annotations

import difflib
import math
import tomllib
import warnings
from dataclasses import dataclass
from dataclasses import replace as _replace
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np
from scipy import constants

from crosswind.models import build, catalogue, load_tight_binding
from crosswind.models.domain import Lattice
from crosswind.models.strain import uniaxial
from crosswind.solver.study.chain import gate_capacitance
from crosswind.solver.study.design import SETTINGS_KEYS, DesignSpec, parse_design
from crosswind.solver.study.knobs import (
    KnobError,
    base_model,
    check_knob,
    scenario_knobs,
)
from crosswind.solver.vocabulary import (
    CARRIERS,
    GATE_FIELD_REFUSE_V_PER_NM,
    GATE_FIELD_SOURCE,
    GATE_FIELD_UNIT,
    GATE_FIELD_WARN_V_PER_NM,
    K_UNIT,
    KNOBS,
    KP_DEFAULT_LATTICE_A,
    KP_K_MAX,
    SCATTERING,
    SCATTERING_DEFAULTS,
)


class ScenarioError(ValueError):
    """A scenario file is malformed; the message names the file, table and key."""


class ScenarioWarning(UserWarning):
    """A scenario value is implausible but loads (a 5 fs relaxation time, μ outside a k·p model's
    validity window); the message names the file, table and key like a :class:`ScenarioError`."""


@dataclass(frozen=True)
class Axis:
    """One sweep axis: dataset dimension ``name``, scenario ``key``, ``unit`` and its ``values``."""

    name: str
    key: str
    unit: str
    values: tuple
    long_name: str = ""

    def __len__(self):
        return len(self.values)


@dataclass(frozen=True)
class Strain:
    """Tensor components (``kind == "tensor"``) or uniaxial strain (``kind == "uniaxial"``; the
    magnitude values live on the ``strain`` axis)."""

    kind: str
    xx: float = 0.0
    yy: float = 0.0
    xy: float = 0.0
    angle_deg: float = 0.0
    poisson: float = 0.165


@dataclass(frozen=True)
class Material:
    model: str | None
    tight_binding: Path | None
    parameters: tuple            # ((name, value), ...)
    strain: Strain | None


@dataclass(frozen=True)
class Device:
    width_um: float
    length_um: float
    current_uA: float
    frequency_Hz: float
    dielectric_nm: float | None
    permittivity: float | None
    capacitance_nF_cm2: float | None
    gate_offset_V: float
    # measurement and thermal settings (engine/noise.py); None: the default of NoiseSettings
    probe_width_um: float | None = None
    probe_misalignment: float | None = None
    thermal_asymmetry: float | None = None
    amplifier_noise_nV_rtHz: float | None = None
    time_constant_ms: float | None = None
    filter_slope_dB_oct: float | None = None
    averaging_limit_min: float | None = None
    substrate_um: float | None = None
    # film of a 3D model: sheet quantities = bulk × thickness (docs/theory.md §16.5)
    thickness_nm: float | None = None
    substrate_conductivity_W_mK: float | None = None
    dielectric_conductivity_W_mK: float | None = None


@dataclass(frozen=True)
class Drive:
    """``[drive]``: a uniform in-plane field E(t) = Re[E e^{iωt}] at ``frequency_Hz`` with phasor
    E = ``field_V_m`` · ê(``ellipticity_deg``, ``angle_deg``)
    (:func:`crosswind.solver.engine.device.polarisation_phasor`; docs/theory.md §5.9).
    ``ellipticity_deg`` is the signed ellipticity angle: > 0 counterclockwise seen from +z, < 0
    clockwise, 0 linear, ±45 circular; ``polarisation`` is the kind the file named."""

    polarisation: str            # "linear" | "circular" | "elliptical"
    frequency_Hz: float
    field_V_m: float
    ellipticity_deg: float
    angle_deg: float = 0.0


@dataclass(frozen=True)
class Numerics:
    rtol: float = 1e-3
    resolution: int | None = None    # None: automatic refinement to rtol
    intrinsic: bool = True
    density_resolution: int = 2
    batch_points: int = 64           # a sweep batch gathers whole inner-axis runs up to this many points


@dataclass(frozen=True)
class SensitivitySpec:
    """``[sensitivities]``: knob → step (in the knob's unit) and the fixed mesh level used."""
    steps: tuple                 # ((knob, step), ...)
    resolution: int


@dataclass(frozen=True)
class FitSpec:
    """``[fit]``: free parameters with starting values and bounds, the measured quantity and its axis."""
    quantity: str                # "V2w" | "Vxx" | "sigma_xx" | "ratio"
    axis: str                    # "gate_V" | "density_cm2" | "mu_eV" | "temperature_K" | "current_uA" | "sigma_xx"
    parameters: tuple            # ((name, initial, low, high), ...)
    at: tuple                    # ((knob, value), ...) for swept axes held fixed
    data: Path | None
    starts: int
    resolution: int
    scaling: bool


@dataclass(frozen=True)
class Scenario:
    path: Path
    text: str
    material: Material
    device: Device
    carrier: str                 # "gate_V" | "density_cm2" | "mu_eV"
    scattering: str              # "constant" | "power-law" | "matthiessen"
    axes: tuple                  # Axis, slowest first; the current angle is always last
    numerics: Numerics
    output_folder: Path
    figures: bool
    sensitivities: SensitivitySpec | None = None
    fit: FitSpec | None = None
    design: DesignSpec | None = None
    cautions: tuple = ()         # plausibility warnings (file: [table] key 'k': ...), also issued as ScenarioWarning
    drive: Drive | None = None   # [drive]: a polarised field (docs/theory.md §5.9)

    def axis(self, name: str) -> Axis:
        for a in self.axes:
            if a.name == name:
                return a
        raise KeyError(name)

    @property
    def shape(self) -> tuple:
        return tuple(len(a) for a in self.axes)

    def build_model(self, strain_magnitude: float | None = None):
        """The band model (at one value of the strain axis, if there is one)."""
        return _build_model(self.material, strain_magnitude, self.path)


# ----------------------------------------------------------------------------- schema ---------
_TOP = ("material", "device", "conditions", "numerics", "output", "sensitivities", "fit", "design", "drive")
_MATERIAL = ("model", "tight_binding", "parameters", "strain")
_STRAIN_TENSOR = ("xx", "yy", "xy")
_STRAIN_UNIAXIAL = ("magnitude", "angle_deg", "poisson")
_DEVICE = ("width_um", "length_um", "current_uA", "frequency_Hz", "current_angle_deg", "dielectric_nm",
           "permittivity", "capacitance_nF_cm2", "gate_offset_V", "thickness_nm") + SETTINGS_KEYS
_CARRIERS = CARRIERS
_SCATTERING = SCATTERING
_SCAT_DEFAULTS = SCATTERING_DEFAULTS
_CONDITIONS = tuple(_CARRIERS) + ("temperature_K", "tau_fs", "scattering", "current_angle_deg")
_NUMERICS = ("rtol", "resolution", "intrinsic", "density_resolution", "batch_points")
_DRIVE = ("polarisation", "frequency_Hz", "field_V_m", "handedness", "ellipticity_deg", "angle_deg")
_POLARISATIONS = ("linear", "circular", "elliptical")
_HANDEDNESS = {"counterclockwise": 1.0, "clockwise": -1.0}
_OUTPUT = ("folder", "figures")
_SWEEP = ("start", "stop", "num", "spacing")
_SENS = ("knobs", "resolution")
_FIT = ("parameters", "quantity", "axis", "at", "data", "starts", "resolution", "scaling")
_FIT_PARAM = ("initial", "bounds")
_FIT_QUANTITIES = ("V2w", "Vxx", "sigma_xx", "ratio")


class _Ctx:
    def __init__(self, source: str):
        self.source = source
        self.cautions: list[str] = []

    def _where(self, table: str, key: str | None) -> str:
        return f"{self.source}: [{table}]" + (f" key '{key}'" if key else "")

    def fail(self, table: str, key: str | None, problem: str, allowed: str = ""):
        msg = f"{self._where(table, key)}: {problem}"
        if allowed:
            msg += f" Allowed: {allowed}."
        raise ScenarioError(msg)

    def warn(self, table: str, key: str | None, problem: str):
        """An implausible value: kept for ``Scenario.cautions`` (issued when loading finishes)."""
        self.cautions.append(f"{self._where(table, key)}: {problem}")

    def check_keys(self, table: str, data: dict, allowed: tuple):
        for key in data:
            if key not in allowed:
                close = difflib.get_close_matches(key, allowed, n=1, cutoff=0.5)
                hint = f" Did you mean '{close[0]}'?" if close else ""
                self.fail(table, key, f"unknown key.{hint}", ", ".join(allowed))

    def table(self, table: str, value) -> dict:
        if not isinstance(value, dict):
            self.fail(table, None, f"must be a table, got {type(value).__name__}.")
        return value


def _is_num(v) -> bool:
    """A finite TOML number that converts to float64 (an integer of 400 digits does not)."""
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return False
    try:
        return math.isfinite(float(v))
    except OverflowError:
        return False


def _number(ctx, table, key, v, positive=False, nonneg=False) -> float:
    if not _is_num(v):
        ctx.fail(table, key, f"must be a number, got {v!r}.")
    v = float(v)
    if positive and not v > 0:
        ctx.fail(table, key, f"must be positive, got {v:g}.")
    if nonneg and v < 0:
        ctx.fail(table, key, f"must be >= 0, got {v:g}.")
    return v


def _values(ctx, table, key, v, positive=False, nonneg=False) -> tuple:
    """A value, a list of values or a sweep table → tuple of floats."""
    if isinstance(v, dict):
        ctx.check_keys(f"{table}.{key}", v, _SWEEP)
        for need in ("start", "stop", "num"):
            if need not in v:
                ctx.fail(f"{table}.{key}", need, "missing in the sweep.", "a sweep {start, stop, num[, spacing]}")
        a = _number(ctx, f"{table}.{key}", "start", v["start"])
        b = _number(ctx, f"{table}.{key}", "stop", v["stop"])
        n = v["num"]
        if not (isinstance(n, int) and not isinstance(n, bool) and n >= 1):
            ctx.fail(f"{table}.{key}", "num", f"must be an integer >= 1, got {n!r}.")
        spacing = v.get("spacing", "linear")
        if spacing == "linear":
            vals = np.linspace(a, b, n)
        elif spacing == "log":
            if not (a > 0 and b > 0):
                ctx.fail(f"{table}.{key}", "spacing", "a log sweep needs positive start and stop.")
            vals = np.geomspace(a, b, n)
        else:
            ctx.fail(f"{table}.{key}", "spacing", f"unknown spacing {spacing!r}.", '"linear", "log"')
        out = tuple(float(x) for x in vals)
    elif isinstance(v, list):
        if not v:
            ctx.fail(table, key, "an empty list has no values.")
        out = tuple(_number(ctx, table, key, x) for x in v)
    else:
        out = (_number(ctx, table, key, v),)
    for x in out:
        if positive and not x > 0:
            ctx.fail(table, key, f"every value must be positive, got {x:g}.")
        if nonneg and x < 0:
            ctx.fail(table, key, f"every value must be >= 0, got {x:g}.")
    if len(set(out)) != len(out):
        ctx.fail(table, key, "repeated values in a sweep axis.")
    return out


def _build_model(material: Material, strain_magnitude, source_path):
    params = dict(material.parameters)
    if material.strain is not None:
        st = material.strain
        if st.kind == "tensor":
            xx, yy, xy = st.xx, st.yy, st.xy
        else:
            xx, yy, xy = (float(x) for x in uniaxial(float(strain_magnitude), math.radians(st.angle_deg), st.poisson))
        params.update(strain_xx=xx, strain_yy=yy, strain_xy=xy)
    if material.model is not None:
        return build(material.model, **params)
    return load_tight_binding(material.tight_binding, **params)


def _supports_strain(material: Material, source_path) -> bool:
    """Whether the model has the strain parameters strain_xx, strain_yy, strain_xy."""
    if material.model is not None:
        return "strain_xx" in catalogue()[material.model].spec.names()
    try:
        return "strain_xx" in load_tight_binding(material.tight_binding).params
    except ValueError:      # the file itself is at fault: the build below reports it
        return True


def _material(ctx, data, base: Path):
    t = ctx.table("material", data)
    ctx.check_keys("material", t, _MATERIAL)
    has_m, has_tb = "model" in t, "tight_binding" in t
    if has_m == has_tb:
        ctx.fail("material", None, "give exactly one of 'model' (a catalogue name) and 'tight_binding' "
                 "(a definition file).", "model = \"massive-dirac\" (see `crosswind models`) or "
                 "tight_binding = \"my_model.toml\"")
    model = tb = None
    if has_m:
        model = t["model"]
        if not isinstance(model, str):
            ctx.fail("material", "model", f"must be a catalogue name (string), got {model!r}.")
        names = sorted(catalogue())
        if model not in names:
            close = difflib.get_close_matches(model, names, n=1)
            hint = f" Did you mean '{close[0]}'?" if close else ""
            ctx.fail("material", "model", f"unknown model '{model}'.{hint}", ", ".join(names))
    else:
        if not isinstance(t["tight_binding"], str):
            ctx.fail("material", "tight_binding", "must be a file path (string), relative to the scenario.")
        tb = (base / t["tight_binding"]).resolve()
        if not tb.is_file():
            ctx.fail("material", "tight_binding", f"file not found: {tb}.", "a path relative to the scenario file")
    params = ctx.table("material.parameters", t.get("parameters", {}))
    for k, v in params.items():
        if not (isinstance(v, (str, int, float)) and not isinstance(v, bool)):
            ctx.fail("material.parameters", k, f"must be a number or a name, got {v!r}.")
    strain = None
    axis = None
    if "strain" in t:
        s = ctx.table("material.strain", t["strain"])
        ctx.check_keys("material.strain", s, _STRAIN_TENSOR + _STRAIN_UNIAXIAL)
        tens = [k for k in s if k in _STRAIN_TENSOR]
        uni = [k for k in s if k in _STRAIN_UNIAXIAL]
        if tens and uni:
            ctx.fail("material.strain", uni[0], "mixes tensor components with the uniaxial form.",
                     "either xx, yy, xy or magnitude, angle_deg, poisson")
        if uni:
            if "magnitude" not in s:
                ctx.fail("material.strain", "magnitude", "missing.", "magnitude (a value or a sweep)")
            mags = _values(ctx, "material.strain", "magnitude", s["magnitude"])
            strain = Strain("uniaxial", angle_deg=_number(ctx, "material.strain", "angle_deg", s.get("angle_deg", 0.0)),
                            poisson=_number(ctx, "material.strain", "poisson", s.get("poisson", 0.165)))
            axis = _axis("strain", mags)
        else:
            strain = Strain("tensor", **{k: _number(ctx, "material.strain", k, s.get(k, 0.0)) for k in _STRAIN_TENSOR})
            if any(k.startswith("strain_") for k in params):
                ctx.fail("material.parameters", next(k for k in params if k.startswith("strain_")),
                         "strain is given twice (here and in [material.strain]).", "one of the two")
    mat = Material(model, tb, tuple(sorted(params.items())), strain)
    # build once at a representative strain: checks parameters and strain support
    if strain is not None and not _supports_strain(mat, base):
        ctx.fail("material.strain", None, "this model has no strain parameters.",
                 "strain for models with strain_xx, strain_yy, strain_xy (tmd, tmd-lattice, honeycomb)")
    try:
        probe = _build_model(mat, axis.values[0] if axis else None, base)
    except ScenarioError:
        raise
    except ValueError as exc:
        ctx.fail("material.parameters", None, str(exc))
    return mat, axis, probe


def _film(ctx, probe, dev: Device, carrier, drive: bool) -> None:
    """A 3D model is a film: [device] thickness_nm turns bulk into sheet quantities (bulk ×
    thickness, docs/theory.md §16.5); a 2D model takes no thickness."""
    if probe.dim == 2:
        if dev.thickness_nm is not None:
            ctx.fail("device", "thickness_nm", "is for films of 3D models; this model is 2D.", "no thickness_nm")
        return
    if dev.thickness_nm is None:
        ctx.fail("device", "thickness_nm", f"missing: the device layer handles sheets and this model is "
                 f"{probe.dim}D.", "thickness_nm (a film: sheet = bulk × thickness, an approximation)")
    if carrier != "mu_eV":
        ctx.fail("conditions", carrier, "a 3D film is swept in μ only (a gate sets a sheet density, "
                 "whose distribution across the film is not modelled).", "mu_eV")
    if drive:
        ctx.fail("drive", None, "a polarised drive of a 3D film is not supported yet.", "no [drive] table")


def _device(ctx, data):
    t = ctx.table("device", data)
    ctx.check_keys("device", t, _DEVICE)
    for need in ("width_um", "length_um", "current_uA"):
        if need not in t:
            ctx.fail("device", need, "missing.", "width_um, length_um, current_uA (all positive)")
    if "permittivity" in t and "capacitance_nF_cm2" in t:
        ctx.fail("device", "capacitance_nF_cm2", "give either permittivity (with dielectric_nm) or "
                 "capacitance_nF_cm2, not both.")
    g = lambda k, **kw: _number(ctx, "device", k, t[k], **kw) if k in t else None
    dev = Device(width_um=g("width_um", positive=True), length_um=g("length_um", positive=True),
                 current_uA=g("current_uA", positive=True),
                 frequency_Hz=g("frequency_Hz", nonneg=True) if "frequency_Hz" in t else 17.0,
                 dielectric_nm=g("dielectric_nm", positive=True), permittivity=g("permittivity", positive=True),
                 capacitance_nF_cm2=g("capacitance_nF_cm2", positive=True),
                 gate_offset_V=g("gate_offset_V") or 0.0, thickness_nm=g("thickness_nm", positive=True),
                 **_settings(ctx, t))
    angle = _values(ctx, "device", "current_angle_deg", t["current_angle_deg"]) if "current_angle_deg" in t else None
    return dev, angle


def _settings(ctx, t) -> dict:
    """The measurement and thermal keys of [device], checked against their vocabulary ranges."""
    out = {}
    for k in SETTINGS_KEYS:
        if k in t:
            v = _number(ctx, "device", k, t[k])
            problem = KNOBS[k].check(v)
            if problem:
                ctx.fail("device", k, problem + ".")
            if k == "filter_slope_dB_oct" and v not in (6, 12, 18, 24):
                ctx.fail("device", k, f"got {v:g}.", "6, 12, 18 or 24 (dB/oct)")
            out[k] = v
    return out


def _conditions(ctx, data, dev: Device, device_angle):
    t = ctx.table("conditions", data)
    ctx.check_keys("conditions", t, _CONDITIONS)
    carriers = [k for k in _CARRIERS if k in t]
    if len(carriers) != 1:
        ctx.fail("conditions", carriers[1] if len(carriers) > 1 else None,
                 "give exactly one of gate_V, density_cm2, mu_eV.", "gate_V (needs [device] dielectric_nm "
                 "with permittivity, or capacitance_nF_cm2), density_cm2, mu_eV")
    carrier = carriers[0]
    if carrier == "gate_V":
        if dev.capacitance_nF_cm2 is None and (dev.dielectric_nm is None or dev.permittivity is None):
            ctx.fail("device", "dielectric_nm", "a gate_V sweep needs the gate capacitance.",
                     "dielectric_nm with permittivity, or capacitance_nF_cm2")
    if "temperature_K" not in t:
        ctx.fail("conditions", "temperature_K", "missing.", "a value, list or sweep in K (>= 0)")
    temps = _values(ctx, "conditions", "temperature_K", t["temperature_K"], nonneg=True)
    _plausible(ctx, "conditions", "temperature_K", temps)
    axes_scat = []
    if "tau_fs" in t and "scattering" in t:
        ctx.fail("conditions", "tau_fs", "give either tau_fs or [conditions.scattering], not both.")
    if "scattering" in t:
        s = ctx.table("conditions.scattering", t["scattering"])
        kind = s.get("kind")
        if not isinstance(kind, str) or kind not in _SCATTERING:
            ctx.fail("conditions.scattering", "kind", f"unknown or missing kind {kind!r}.",
                     ", ".join(f'"{k}"' for k in _SCATTERING))
        fields = _SCATTERING[kind]
        ctx.check_keys("conditions.scattering", s, ("kind",) + tuple(fields))
        defaults = _SCAT_DEFAULTS.get(kind, {})
        for key in fields:
            if key not in s and key not in defaults:
                ctx.fail("conditions.scattering", key, f"missing for kind = \"{kind}\".", ", ".join(fields))
            knob = KNOBS[key]
            vals = _values(ctx, "conditions.scattering", key, s.get(key, defaults.get(key)), positive=knob.positive)
            if max(abs(x) for x in vals) > knob.high:
                ctx.fail("conditions.scattering", key, f"|{key}| must be <= {knob.high:g}, got "
                         f"{max(vals, key=abs):g} (tau would overflow across the band).",
                         "exponents of order 1, e.g. -0.5 (acoustic phonons) or 1 (charged impurities)")
            if KNOBS[key].why:
                _plausible(ctx, "conditions.scattering", key, vals)
            axes_scat.append(_axis(key, vals))
    else:
        kind = "constant"
        if "tau_fs" not in t:
            ctx.fail("conditions", "tau_fs", "missing.", "tau_fs (fs) or a [conditions.scattering] table")
        taus = _values(ctx, "conditions", "tau_fs", t["tau_fs"], positive=True)
        _plausible(ctx, "conditions", "tau_fs", taus)
        axes_scat.append(_axis("tau_fs", taus))
    if "current_angle_deg" in t and device_angle is not None:
        ctx.fail("conditions", "current_angle_deg", "also given in [device]; give it in one place.")
    angle = (_values(ctx, "conditions", "current_angle_deg", t["current_angle_deg"])
             if "current_angle_deg" in t else (device_angle or (0.0,)))
    cvals = _values(ctx, "conditions", carrier, t[carrier])
    if carrier == "density_cm2":
        _plausible(ctx, "conditions", carrier, cvals)
    elif carrier == "gate_V":
        _plausible_gate(ctx, dev, cvals)
    axes = [_axis("temperature_K", temps)] + axes_scat + [_axis(carrier, cvals)]
    return carrier, kind, axes, _axis("current_angle_deg", angle)


# ----------------------------------------------------------------------------- plausibility ---
def _range_text(low: float, high: float, unit: str) -> str:
    if math.isinf(low) and math.isinf(high):
        return "any value"
    if math.isinf(low):
        return f"up to {high:.3g} {unit}"
    if math.isinf(high):
        return f"from {low:.3g} {unit}"
    if low == -high:
        return f"|value| up to {high:.3g} {unit}"
    return f"{low:.3g} … {high:.3g} {unit}"


def _plausible(ctx, table: str, key: str, values, knob=None) -> None:
    """Refuse values outside the knob's ``refuse`` range (naming the likely unit slip), warn about
    values outside its ``warn`` range (ranges and reasons: :mod:`crosswind.solver.vocabulary`)."""
    k = knob or KNOBS[key]
    usual = _range_text(k.warn_low, k.warn_high, k.unit)
    bad = [v for v in values if not k.refuse_low <= v <= k.refuse_high]
    if bad:
        ctx.fail(table, key, f"{bad[0]:g} {k.unit} is not a physically possible {k.long_name}: {k.why}."
                 f"{k.slip_hint(bad[0])}", f"{_range_text(k.refuse_low, k.refuse_high, k.unit)}; outside {usual} "
                 "it loads with a warning")
    odd = [v for v in values if not k.warn_low <= v <= k.warn_high]
    if odd:
        ctx.warn(table, key, f"{odd[0]:g} {k.unit} is an unusual {k.long_name} (usual: {usual}; {k.why}); "
                 "check the value and its unit.")


@dataclass(frozen=True)
class ModelWindow:
    """The energies (eV) where a model describes a crystal.  ``valid``: the band range of a lattice
    model (coarse k grid over the zone), or for a continuum (k·p) model the energies its bands reach
    within |k| ≤ ``k_valid`` (1/Å) of the valley centres; ``possible``: beyond it by the window's
    width (a lattice) or reached only beyond every Brillouin zone, |k| > KP_K_MAX (a k·p model)."""

    kind: str                    # "lattice" | "k·p"
    valid: tuple                 # (low, high) eV
    possible: tuple              # (low, high) eV
    k_valid: float | None = None

    def describe(self) -> str:
        lo, hi = self.valid
        if self.kind == "lattice":
            return f"the band range {lo:.4g} … {hi:.4g} eV of the lattice model (every band full or empty outside it)"
        return (f"the validity window {lo:.4g} … {hi:.4g} eV of the k·p model (the energies its bands reach within "
                f"|k| ≤ {self.k_valid:.3g} {K_UNIT} of the valley centre, |k|a ≤ 1)")


@jax.jit
def _hamiltonians(model, k):
    return jax.vmap(model.hamiltonian, in_axes=(0, None))(k, model.params)


def _energies(model, k) -> np.ndarray:
    h = np.asarray(_hamiltonians(model, jnp.asarray(k, dtype=jnp.float64)))
    if not np.all(np.isfinite(h)):
        return np.full((len(k), 1), np.nan)
    return np.linalg.eigvalsh(h).reshape(len(k), -1)


def _disc(centers, radius: float, n_r: int = 12, n_phi: int = 24) -> np.ndarray:
    r = np.linspace(0.0, radius, n_r)
    phi = np.linspace(0.0, 2 * np.pi, n_phi, endpoint=False)
    ring = (r[:, None, None] * np.stack([np.cos(phi), np.sin(phi)], -1)[None]).reshape(-1, 2)
    return np.concatenate([np.asarray(c, dtype=float)[None, :2] + ring for c in centers])


def model_window(model) -> ModelWindow | None:
    """The :class:`ModelWindow` of a 2D model (None when its bands are not finite there).  A k·p
    model is trusted within |k| ≤ max(1/a, its curvature scale), a = its ``lattice_constant`` or
    KP_DEFAULT_LATTICE_A (vocabulary).  None for a 3D model (films: no window is checked)."""
    if model.dim != 2:
        return None
    if isinstance(model.domain, Lattice):
        b = np.asarray(model.reciprocal_vectors())[:2, :2]
        u = np.linspace(-0.5, 0.5, 25)                  # holds Γ, M and (multiples of 1/3) K
        e = _energies(model, np.stack(np.meshgrid(u, u), -1).reshape(-1, 2) @ b)
        if not np.all(np.isfinite(e)):
            return None
        lo, hi = float(e.min()), float(e.max())
        width = hi - lo
        return ModelWindow("lattice", (lo, hi), (lo - width, hi + width))
    dom = model.domain
    a = float(model.params["lattice_constant"]) if "lattice_constant" in model.params else KP_DEFAULT_LATTICE_A
    scale = float(dom.scale_for(model.params) if hasattr(dom, "scale_for") else dom.scale)
    k_valid = max(1.0 / a, scale)
    e_valid = _energies(model, _disc(dom.centers, k_valid))
    e_max = _energies(model, _disc(dom.centers, max(KP_K_MAX, k_valid)))
    if not (np.all(np.isfinite(e_valid)) and np.all(np.isfinite(e_max))):
        return None
    lo, hi = float(e_valid.min()), float(e_valid.max())
    width = hi - lo
    return ModelWindow("k·p", (lo, hi), (float(e_max.min()) - width, float(e_max.max()) + width), k_valid)


def _plausible_mu(ctx, model, values) -> None:
    """μ against the model's window: refused beyond ``possible``, a warning outside ``valid``."""
    win = model_window(model)
    if win is None:
        return
    k = KNOBS["mu_eV"]
    (vlo, vhi), (plo, phi) = win.valid, win.possible
    bad = [v for v in values if not plo <= v <= phi]
    if bad:
        v = bad[0]
        where = (f"beyond the band range {vlo:.4g} … {vhi:.4g} eV of `{model.name}` by more than its width: every "
                 "band is full or empty there" if win.kind == "lattice" else
                 f"reached by the k·p model `{model.name}` only at wavevectors beyond {KP_K_MAX:.2f} {K_UNIT} from "
                 "its valley centre, outside the Brillouin zone of any 2D crystal")
        ctx.fail("conditions", "mu_eV", f"μ = {v:g} eV is {where}.{k.slip_hint(v, vlo, vhi)}",
                 f"{plo:.4g} … {phi:.4g} eV; outside {win.describe()} it loads with a warning")
    odd = [v for v in values if not vlo <= v <= vhi]
    if odd:
        ctx.warn("conditions", "mu_eV", f"μ = {odd[0]:g} eV lies outside {win.describe()} of `{model.name}`; "
                 "results there extrapolate the model beyond its validity.")


def _plausible_gate(ctx, dev, values) -> None:
    """The gate field |V − V0|/d against dielectric breakdown and the induced density against the
    density ranges (parallel plate, as the chain computes it)."""
    dv = max(abs(v - dev.gate_offset_V) for v in values)
    if dev.dielectric_nm is not None:
        f = dv / dev.dielectric_nm
        allowed = (f"|gate_V − gate_offset_V| up to {GATE_FIELD_REFUSE_V_PER_NM:g} {GATE_FIELD_UNIT} × dielectric_nm "
                   f"= {GATE_FIELD_REFUSE_V_PER_NM * dev.dielectric_nm:g} V")
        text = (f"{dv:g} V across {dev.dielectric_nm:g} nm of dielectric is {f:.3g} {GATE_FIELD_UNIT}")
        if f > GATE_FIELD_REFUSE_V_PER_NM:
            ctx.fail("conditions", "gate_V", f"{text}, beyond the breakdown field of any gate dielectric "
                     f"({GATE_FIELD_SOURCE}). Check gate_V and [device] dielectric_nm (nm).", allowed)
        if f > GATE_FIELD_WARN_V_PER_NM:
            ctx.warn("conditions", "gate_V", f"{text}, within a factor 2 of dielectric breakdown "
                     f"({GATE_FIELD_SOURCE}); check gate_V and [device] dielectric_nm.")
    n_cm2 = float(gate_capacitance(dev)) * dv / constants.e * 1e-4
    k = KNOBS["density_cm2"]
    if n_cm2 > k.refuse_high:
        ctx.fail("conditions", "gate_V", f"the gate induces {n_cm2:.3g} {k.unit}: {k.why}. Check gate_V and the "
                 "[device] capacitance.", f"an induced |density| up to {k.refuse_high:g} {k.unit}")
    if n_cm2 > k.warn_high:
        ctx.warn("conditions", "gate_V", f"the gate induces {n_cm2:.3g} {k.unit}, an unusual density (usual: up to "
                 f"{k.warn_high:g} {k.unit}; {k.why}); check gate_V and the [device] capacitance.")


def _axis(knob: str, values) -> Axis:
    """The sweep axis of a knob: its one name, scenario key, unit and long name from the vocabulary."""
    k = KNOBS[knob]
    key = "current_angle_deg" if knob == "current_angle_deg" else k.scenario_key
    return Axis(k.name, key, k.unit, tuple(values), k.long_name)


def _drive(ctx, data, taus=()) -> Drive:
    """``[drive]``: a polarised field; every key checked, each error naming the fix.  With a constant
    relaxation time (``taus``, fs) a drive with ωτ < 0.01 everywhere loads with a caution: the
    helicity-odd current goes as ωτ/(1 + ω²τ²) (docs/theory.md §5.9)."""
    t = ctx.table("drive", data)
    ctx.check_keys("drive", t, _DRIVE)
    kinds = ", ".join(f'"{k}"' for k in _POLARISATIONS)
    kind = t.get("polarisation")
    if kind not in _POLARISATIONS:
        close = difflib.get_close_matches(str(kind), _POLARISATIONS, n=1)
        hint = f" Did you mean '{close[0]}'?" if close else ""
        ctx.fail("drive", "polarisation", f"unknown or missing polarisation {kind!r}.{hint}", kinds)
    for need, what in (("frequency_Hz", "the drive frequency in Hz (> 0; a static field has no helicity)"),
                       ("field_V_m", "the phasor amplitude |E| of the in-plane field in the sheet, V/m (> 0)")):
        if need not in t:
            ctx.fail("drive", need, "missing.", what)
    freq = _number(ctx, "drive", "frequency_Hz", t["frequency_Hz"], positive=True)
    field = _number(ctx, "drive", "field_V_m", t["field_V_m"], positive=True)
    hands = ", ".join(f'"{k}"' for k in _HANDEDNESS)
    if kind == "linear":
        for key in ("handedness", "ellipticity_deg"):
            if key in t:
                ctx.fail("drive", key, "a linearly polarised field has no " + key.split("_")[0] + "; remove the "
                         "key, or set polarisation = \"elliptical\" or \"circular\".")
        ell = 0.0
    else:
        if "handedness" not in t:
            ctx.fail("drive", "handedness", f"missing for polarisation = \"{kind}\" (the sense of rotation of "
                     "E(t) seen from +z).", hands)
        hand = t["handedness"]
        if hand not in _HANDEDNESS:
            ctx.fail("drive", "handedness", f"got {hand!r} (left/right mean opposite things in optics and "
                     "engineering, so the sense of rotation seen from +z is asked for).", hands)
        if kind == "circular":
            for key, why in (("ellipticity_deg", "it is 45° for circular polarisation"),
                             ("angle_deg", "a circularly polarised field has no axis")):
                if key in t:
                    ctx.fail("drive", key, f"{why}; remove the key, or set polarisation = \"elliptical\".")
            ell = 45.0
        else:
            if "ellipticity_deg" not in t:
                ctx.fail("drive", "ellipticity_deg", "missing for polarisation = \"elliptical\".",
                         "the ellipticity angle χ in degrees, 0 < χ < 45 (tan χ = minor/major axis)")
            ell = _number(ctx, "drive", "ellipticity_deg", t["ellipticity_deg"])
            if not 0.0 < ell < 45.0:
                ctx.fail("drive", "ellipticity_deg", f"must lie strictly between 0 and 45 degrees, got {ell:g} "
                         "(0 is linear, 45 circular; the sense of rotation is the key handedness).",
                         "0 < ellipticity_deg < 45, or polarisation = \"linear\" / \"circular\"")
        ell *= _HANDEDNESS[hand]
    angle = _number(ctx, "drive", "angle_deg", t.get("angle_deg", 0.0))
    wt = [2 * math.pi * freq * t * 1e-15 for t in taus]
    if wt and max(wt) < 0.01 and kind != "linear":
        ctx.warn("drive", "frequency_Hz", f"ωτ is at most {max(wt):.2g} at {freq:g} Hz: the helicity-odd current "
                 "goes as ωτ/(1 + ω²τ²) and is negligible (docs/theory.md §5.9); circular photogalvanic "
                 "measurements use THz fields, ωτ of order 1. Check the value and its unit.")
    return Drive(polarisation=kind, frequency_Hz=freq, field_V_m=field, ellipticity_deg=ell, angle_deg=angle)


def _numerics(ctx, data):
    t = ctx.table("numerics", data)
    ctx.check_keys("numerics", t, _NUMERICS)
    rtol = _number(ctx, "numerics", "rtol", t.get("rtol", 1e-3), positive=True)
    if not rtol < 1:
        ctx.fail("numerics", "rtol", f"must lie in (0, 1), got {rtol:g}.", "e.g. 1e-3")
    res = t.get("resolution", "auto")
    if res == "auto":
        res = None
    elif not (isinstance(res, int) and not isinstance(res, bool) and 0 <= res <= 4):
        ctx.fail("numerics", "resolution", f"got {res!r}.", '"auto" or an integer level 0..4')
    intr = t.get("intrinsic", True)
    if not isinstance(intr, bool):
        ctx.fail("numerics", "intrinsic", f"must be true or false, got {intr!r}.")
    dres = t.get("density_resolution", 2)
    if not (isinstance(dres, int) and not isinstance(dres, bool) and 0 <= dres <= 4):
        ctx.fail("numerics", "density_resolution", f"got {dres!r}.", "an integer level 0..4")
    bp = t.get("batch_points", 64)
    if not (isinstance(bp, int) and not isinstance(bp, bool) and bp >= 1):
        ctx.fail("numerics", "batch_points", f"got {bp!r}.", "a positive integer (points per sweep batch), e.g. 64")
    return Numerics(rtol=rtol, resolution=res, intrinsic=intr, density_resolution=dres, batch_points=bp)


def _output(ctx, data, base: Path):
    t = ctx.table("output", data)
    ctx.check_keys("output", t, _OUTPUT)
    folder = t.get("folder", "results")
    if not isinstance(folder, str) or not folder:
        ctx.fail("output", "folder", f"must be a folder name (string), got {folder!r}.")
    figs = t.get("figures", True)
    if not isinstance(figs, bool):
        ctx.fail("output", "figures", f"must be true or false, got {figs!r}.")
    return (base / folder), figs


def parse_scenario(text: str, source: str = "<string>", base: Path | str | None = None) -> Scenario:
    """A :class:`Scenario` from TOML text; ``base`` is the folder relative paths refer to.  Every
    problem is a :class:`ScenarioError` naming the file (never another exception type); every
    implausible value a :class:`ScenarioWarning` (also kept in ``Scenario.cautions``)."""
    return _issue_cautions(_parse_checked(text, source, base))


def _issue_cautions(scn: Scenario) -> Scenario:
    for text in scn.cautions:       # stack: here, parse_scenario / load_scenario, their caller
        warnings.warn(ScenarioWarning(text), stacklevel=3)
    return scn


def _parse_checked(text: str, source: str, base: Path | str | None) -> Scenario:
    try:
        return _parse_scenario(text, source, base)
    except ScenarioError:
        raise
    except (TypeError, ValueError, KeyError, IndexError, AttributeError, OverflowError, ZeroDivisionError) as exc:
        # a combination the checks do not name: still this file's error, never a traceback
        raise ScenarioError(f"{source}: an entry has an unexpected type or value ({type(exc).__name__}: {exc}). "
                            "Check each table against docs/scenario-files.md.") from exc


def _parse_scenario(text: str, source: str, base: Path | str | None) -> Scenario:
    ctx = _Ctx(source)
    base = Path(base) if base is not None else Path.cwd()
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ScenarioError(f"{source}: not valid TOML: {exc}.") from exc
    for key in data:
        if key not in _TOP:
            close = difflib.get_close_matches(key, _TOP, n=1, cutoff=0.5)
            hint = f" Did you mean '[{close[0]}]'?" if close else ""
            ctx.fail(key, None, f"unknown table.{hint}", ", ".join(f"[{k}]" for k in _TOP))
    for need in ("material", "device", "conditions"):
        if need not in data:
            ctx.fail(need, None, "missing table.", "[material], [device], [conditions], [numerics], [output]")
    material, strain_axis, probe = _material(ctx, data["material"], base)
    device, dev_angle = _device(ctx, data["device"])
    carrier, kind, axes, angle_axis = _conditions(ctx, data["conditions"], device, dev_angle)
    _film(ctx, probe, device, carrier, "drive" in data)
    if carrier == "mu_eV":
        _plausible_mu(ctx, probe, axes[-1].values)
    numerics = _numerics(ctx, data.get("numerics", {}))
    folder, figs = _output(ctx, data.get("output", {}), base)
    all_axes = ([strain_axis] if strain_axis else []) + axes + [angle_axis]
    scn = Scenario(path=Path(source), text=text, material=material, device=device, carrier=carrier,
                   scattering=kind, axes=tuple(all_axes), numerics=numerics, output_folder=folder,
                   figures=figs)
    sens = _sensitivities(ctx, data["sensitivities"], scn) if "sensitivities" in data else None
    fit = _fit(ctx, data["fit"], scn, base) if "fit" in data else None
    design = parse_design(ctx, data["design"], scn) if "design" in data else None
    taus = next((a.values for a in all_axes if a.name == "tau_fs"), ())
    drive = _drive(ctx, data["drive"], taus) if "drive" in data else None
    return _replace(scn, sensitivities=sens, fit=fit, design=design, drive=drive, cautions=tuple(ctx.cautions))


def _level(ctx, table, key, v, default):
    if v is None:
        return default
    if not (isinstance(v, int) and not isinstance(v, bool) and 0 <= v <= 4):
        ctx.fail(table, key, f"got {v!r}.", "an integer k-mesh level 0..4 (2 or more for accurate derivatives)")
    return v


def _knob_check(ctx, table, scn, name, units):
    kind = scn.material.strain.kind if scn.material.strain is not None else None
    try:
        check_knob(name, units, base_model(scn), "knob", kind)
    except KnobError as exc:
        ctx.fail(table, name, exc.problem, ", ".join(units))


def _sensitivities(ctx, data, scn):
    t = ctx.table("sensitivities", data)
    ctx.check_keys("sensitivities", t, _SENS)
    knobs = ctx.table("sensitivities.knobs", t.get("knobs", {}))
    units = scenario_knobs(scn)
    if not knobs:
        ctx.fail("sensitivities", "knobs", "missing or empty.", "knobs = {knob = step, ...} with knobs "
                 + ", ".join(units))
    steps = []
    for k, v in knobs.items():
        _knob_check(ctx, "sensitivities.knobs", scn, k, units)
        st = _number(ctx, "sensitivities.knobs", k, v)
        if st == 0:
            ctx.fail("sensitivities.knobs", k, "the step must be non-zero.")
        steps.append((k, st))
    default = scn.numerics.resolution if scn.numerics.resolution is not None else 2
    return SensitivitySpec(tuple(steps), _level(ctx, "sensitivities", "resolution", t.get("resolution"), default))


def _fit(ctx, data, scn, base):
    t = ctx.table("fit", data)
    ctx.check_keys("fit", t, _FIT)
    scaling = t.get("scaling", False)
    if not isinstance(scaling, bool):
        ctx.fail("fit", "scaling", f"must be true or false, got {scaling!r}.")
    q = t.get("quantity")
    if q not in _FIT_QUANTITIES:
        close = difflib.get_close_matches(str(q), _FIT_QUANTITIES, n=1)
        hint = f" Did you mean '{close[0]}'?" if close else ""
        ctx.fail("fit", "quantity", f"unknown or missing quantity {q!r}.{hint}",
                 ", ".join(f'"{x}"' for x in _FIT_QUANTITIES))
    axes_ok = (scn.carrier, "temperature_K", "current_uA") + (("sigma_xx",) if scaling else ())
    ax = t.get("axis")
    if ax not in axes_ok:
        close = difflib.get_close_matches(str(ax), axes_ok, n=1)
        hint = f" Did you mean '{close[0]}'?" if close else ""
        ctx.fail("fit", "axis", f"unknown or missing axis {ax!r} for this scenario.{hint}",
                 ", ".join(f'"{x}"' for x in axes_ok))
    if scaling and (q != "ratio" or ax != "sigma_xx"):
        ctx.fail("fit", "scaling", "the scaling analysis fits quantity = \"ratio\" against axis = \"sigma_xx\".",
                 'quantity = "ratio", axis = "sigma_xx"')
    if ax == "sigma_xx" and not scaling:
        ctx.fail("fit", "axis", "sigma_xx as the axis is for the scaling analysis.", "scaling = true")
    units = scenario_knobs(scn)
    params = []
    ptab = ctx.table("fit.parameters", t.get("parameters", {}))
    if not ptab and not scaling:
        ctx.fail("fit", "parameters", "missing or empty.", "parameters = {name = {initial = ..., bounds = [lo, hi]}}"
                 " with names " + ", ".join(k for k in units if k != ax))
    for name, spec in ptab.items():
        _knob_check(ctx, "fit.parameters", scn, name, {k: u for k, u in units.items() if k != ax})
        sp = ctx.table(f"fit.parameters.{name}", spec)
        ctx.check_keys(f"fit.parameters.{name}", sp, _FIT_PARAM)
        if "initial" not in sp:
            ctx.fail(f"fit.parameters.{name}", "initial", "missing.", "initial = starting value")
        init = _number(ctx, f"fit.parameters.{name}", "initial", sp["initial"])
        lo, hi = -math.inf, math.inf
        if "bounds" in sp:
            b = sp["bounds"]
            if not (isinstance(b, list) and len(b) == 2):
                ctx.fail(f"fit.parameters.{name}", "bounds", f"must be [low, high], got {b!r}.")
            lo = _number(ctx, f"fit.parameters.{name}", "bounds", b[0])
            hi = _number(ctx, f"fit.parameters.{name}", "bounds", b[1])
            if not lo < init < hi:
                ctx.fail(f"fit.parameters.{name}", "bounds",
                         f"need low < initial < high, got {lo:g} < {init:g} < {hi:g}.")
        params.append((name, init, lo, hi))
    at = []
    for k, v in ctx.table("fit.at", t.get("at", {})).items():
        _knob_check(ctx, "fit.at", scn, k, {kk: u for kk, u in units.items() if kk != ax})
        at.append((k, _number(ctx, "fit.at", k, v)))
    data_path = t.get("data")
    if data_path is not None and not isinstance(data_path, str):
        ctx.fail("fit", "data", "must be a file path (string), relative to the scenario.")
    starts = t.get("starts", 1)
    if not (isinstance(starts, int) and not isinstance(starts, bool) and starts >= 1):
        ctx.fail("fit", "starts", f"must be an integer >= 1, got {starts!r}.")
    default = scn.numerics.resolution if scn.numerics.resolution is not None else 1
    return FitSpec(quantity=q, axis=ax, parameters=tuple(params), at=tuple(at),
                   data=(base / data_path).resolve() if data_path else None, starts=starts,
                   resolution=_level(ctx, "fit", "resolution", t.get("resolution"), default), scaling=scaling)


def load_scenario(path) -> Scenario:
    """Read and check a scenario file (nothing is written)."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError as exc:
        raise ScenarioError(f"{p}: scenario file not found.") from exc
    except IsADirectoryError as exc:
        raise ScenarioError(f"{p}: is a folder, not a scenario file.") from exc
    except UnicodeDecodeError as exc:
        raise ScenarioError(f"{p}: not UTF-8 text (byte 0x{exc.object[exc.start]:02x} at position {exc.start}); "
                            "save the scenario file as UTF-8.") from exc
    return _issue_cautions(_parse_checked(text, str(p), base=p.resolve().parent))
