"""Tight-binding models from a TOML definition file (Crosswind's own schema).

The schema is documented with a commented example in ``docs/tight-binding-files.md``; in short:

    [model]         name, dimension (2 or 3), degeneracy = 1.0, description = "", source = ""
    [lattice]       vectors = rows a_i in Å
    [parameters.X]  default, unit, meaning, range = [lo, hi] (optional)  -- one table per parameter
    [[orbital]]     label, position (Å, Cartesian), onsite (optional, eV)
    [[hop]]         from, to (orbital labels), cell (integers), amplitude (eV)

Hamiltonian (docs/theory.md §2.5, convention I: orbital positions in the Bloch phases):

    H_ab(k) = onsite_a δ_ab + Σ_hops [ A_h e^{i k·δ_h} δ_{a,from} δ_{b,to} + (h.c.) ],
    δ_h = Σ_i cell_i a_i + τ_to − τ_from,

i.e. ``amplitude`` is the matrix element ⟨from, cell 0|H|to, cell R⟩ and its Hermitian conjugate
(``to → from`` with −R) is added automatically; listing both a hop and its exact reverse is an
error (it would count the bond twice), as is listing the same hop twice or a hop from an
orbital to itself in its own cell (that is an onsite energy).

An amplitude is one of

* a number (real, eV) or a pair ``[re, im]`` (complex, eV);
* a parameter name ``"t"``;
* a table ``{scale = s, parameter = "t", phase = "phi", phase_scale = c}`` meaning
  ``s · t · exp(i c·phi)``; every key is optional (``scale`` defaults to 1 and may be a number
  or ``[re, im]``, ``parameter`` to 1, ``phase`` to 0, ``phase_scale`` to 1).

An ``onsite`` energy takes the same forms except that it must be real (no ``[re, im]`` and no
``phase``).  Every declared parameter becomes a differentiable entry of ``model.params``.

The Hamiltonian function is built once per distinct file content (cached by its canonical
definition), vectorised over hops (one scatter-add of all hop terms), and for two orbitals the
model also gets the equivalent d-vector so band geometry uses closed forms.
"""
from __future__ import annotations

import difflib
import math
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import jax.numpy as jnp
import numpy as np

from .band_model import BandModel
from .domain import Lattice
from .params import Parameter, ParamSpec
from .phases import bloch_phase


class TightBindingFileError(ValueError):
    """A tight-binding definition file is malformed; the message names file, table and key."""


# ----------------------------------------------------------------------------- schema ---------
_TOP = {"model": "table", "lattice": "table", "parameters": "table", "orbital": "array of tables",
        "hop": "array of tables"}
_MODEL_KEYS = {"name": True, "dimension": True, "degeneracy": False, "description": False, "source": False}
_LATTICE_KEYS = {"vectors": True}
_PARAM_KEYS = {"default": True, "unit": True, "meaning": True, "range": False}
_ORBITAL_KEYS = {"label": True, "position": True, "onsite": False}
_HOP_KEYS = {"from": True, "to": True, "cell": True, "amplitude": True}
_AMP_KEYS = {"scale": False, "parameter": False, "phase": False, "phase_scale": False}
_RESERVED = {"source"}  # keyword of parse_tight_binding


class _Ctx:
    def __init__(self, source: str):
        self.source = source

    def fail(self, table: str, key: str | None, problem: str, allowed: str = "") -> None:
        where = f"table {table}" + (f", key '{key}'" if key is not None else "")
        msg = f"{self.source}: {where}: {problem}"
        if allowed:
            msg += f" {allowed}"
        raise TightBindingFileError(msg)

    def check_keys(self, table: str, data: dict, keys: dict) -> None:
        for key in data:
            if key not in keys:
                close = difflib.get_close_matches(key, list(keys), n=1)
                hint = f" Did you mean '{close[0]}'?" if close else ""
                self.fail(table, key, f"unknown key.{hint}", f"Allowed keys: {', '.join(keys)}.")
        for key, required in keys.items():
            if required and key not in data:
                self.fail(table, key, "missing required key.", f"Required keys: "
                          f"{', '.join(k for k, r in keys.items() if r)}.")

    def table(self, table: str, value, key: str | None = None) -> dict:
        if not isinstance(value, dict):
            self.fail(table, key, f"must be a table, got {_tname(value)}.")
        return value


def _tname(v) -> str:
    if isinstance(v, bool):
        return "a boolean"
    if isinstance(v, int):
        return "an integer"
    if isinstance(v, float):
        return "a float"
    if isinstance(v, str):
        return "a string"
    if isinstance(v, list):
        return "an array"
    if isinstance(v, dict):
        return "a table"
    return type(v).__name__


MAX_LATTICE_A = 1e6       # Å: longer lattice vectors are a unit mistake (0.1 mm)
MAX_CELL = 1000           # hops reach at most this many cells (a longer one is a typing mistake)


def _is_num(v) -> bool:
    """A TOML number that converts to float64 (an integer of 400 digits does not)."""
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return False
    try:
        float(v)
    except OverflowError:
        return False
    return True


def _string(ctx, table, key, v) -> str:
    if not isinstance(v, str):
        ctx.fail(table, key, f"must be a string, got {_tname(v)}.")
    return v


def _number(ctx, table, key, v) -> float:
    if not _is_num(v) or not math.isfinite(float(v)):
        ctx.fail(table, key, f"must be a finite number, got {_tname(v)} {v!r}.")
    return float(v)


def _is_finite(v) -> bool:
    return _is_num(v) and math.isfinite(float(v))


def _vector(ctx, table, key, v, dim, what="numbers in Å") -> tuple[float, ...]:
    if not isinstance(v, list) or len(v) != dim or not all(_is_num(x) for x in v):
        ctx.fail(table, key, f"must be an array of {dim} {what} (the model's dimension is {dim}), got {v!r}.")
    if not all(_is_finite(x) for x in v):
        ctx.fail(table, key, f"must hold finite numbers, got {v!r}.", "Replace nan/inf by the value in Å.")
    return tuple(float(x) for x in v)


# ----------------------------------------------------------------------------- amplitudes -----
@dataclass(frozen=True)
class _Amp:
    scale: complex
    parameter: str | None = None
    phase: str | None = None
    phase_scale: float = 1.0


def _param_ref(ctx, table, key, name, declared) -> str:
    if not isinstance(name, str):
        ctx.fail(table, key, f"a parameter reference must be a string, got {_tname(name)}.")
    if name not in declared:
        close = difflib.get_close_matches(name, list(declared), n=1)
        hint = f" Did you mean '{close[0]}'?" if close else ""
        ctx.fail(table, key, f"parameter '{name}' is not declared.{hint}",
                 f"Declare it as [parameters.{name}] or use one of: {', '.join(declared) or '(none declared)'}.")
    return name


_AMP_FORMS = ("Allowed: a number, [re, im], a parameter name, or a table "
              "{scale = s, parameter = \"t\", phase = \"phi\", phase_scale = c} meaning s·t·exp(i c·phi).")
_ONSITE_FORMS = ("Allowed: a real number, a parameter name, or a table {scale = s, parameter = \"M\"} "
                 "with real s.")


def _scale(ctx, table, key, v, real_only) -> complex:
    pair = not real_only and isinstance(v, list) and len(v) == 2 and all(_is_num(x) for x in v)
    if not (_is_num(v) or pair):
        ctx.fail(table, key, f"invalid value {v!r}.", _ONSITE_FORMS if real_only else _AMP_FORMS)
    re_im = v if pair else [v, 0.0]
    if not all(_is_finite(x) for x in re_im):
        ctx.fail(table, key, f"must be finite, got {v!r}.", "Replace nan/inf by the energy in eV.")
    return complex(float(re_im[0]), float(re_im[1]))


def _amplitude(ctx, table, key, v, declared, real_only=False) -> _Amp:
    if isinstance(v, str):
        return _Amp(1.0 + 0j, _param_ref(ctx, table, key, v, declared))
    if isinstance(v, dict):
        sub = f"{key}"
        for k in v:
            if k not in _AMP_KEYS or (real_only and k in ("phase", "phase_scale")):
                allowed = [a for a in _AMP_KEYS if not (real_only and a in ("phase", "phase_scale"))]
                close = difflib.get_close_matches(k, allowed, n=1)
                hint = f" Did you mean '{close[0]}'?" if close else ""
                extra = " An onsite energy is real: it takes no phase." if real_only and k in _AMP_KEYS else ""
                ctx.fail(table, f"{sub}.{k}", f"unknown key.{hint}{extra}",
                         f"Allowed keys: {', '.join(allowed)}.")
        s = _scale(ctx, table, f"{sub}.scale", v.get("scale", 1.0), real_only)
        p = _param_ref(ctx, table, f"{sub}.parameter", v["parameter"], declared) if "parameter" in v else None
        ph = _param_ref(ctx, table, f"{sub}.phase", v["phase"], declared) if "phase" in v else None
        c = _number(ctx, table, f"{sub}.phase_scale", v["phase_scale"]) if "phase_scale" in v else 1.0
        if "phase_scale" in v and ph is None:
            ctx.fail(table, f"{sub}.phase_scale", "is given without 'phase'.",
                     "Name the phase parameter with phase = \"...\".")
        return _Amp(s, p, ph, c)
    return _Amp(_scale(ctx, table, key, v, real_only))


# ----------------------------------------------------------------------------- definition -----
@dataclass(frozen=True)
class _Definition:
    """Canonical, hashable content of a file (the cache key of the Hamiltonian function)."""

    names: tuple[str, ...]                 # declared parameter names, in file order
    n_orb: int
    hop_from: tuple[int, ...]
    hop_to: tuple[int, ...]
    hop_delta: tuple[tuple[float, ...], ...]   # Å
    hop_amp: tuple[_Amp, ...]
    onsite: tuple[_Amp, ...]               # one per orbital


def _coefficients(amps, names):
    """Arrays (scale, parameter index, phase index, phase scale) for vectorised evaluation.
    Index 0 of the value vector is 1.0 (no parameter), index 1 is 0.0 (no phase)."""
    idx = {n: i + 2 for i, n in enumerate(names)}
    scale = np.array([a.scale for a in amps], dtype=complex)
    pidx = np.array([idx[a.parameter] if a.parameter else 0 for a in amps], dtype=np.int64)
    phidx = np.array([idx[a.phase] if a.phase else 1 for a in amps], dtype=np.int64)
    phs = np.array([a.phase_scale for a in amps], dtype=float)
    return scale, pidx, phidx, phs


def _evaluate(coeffs, vals):
    scale, pidx, phidx, phs = coeffs
    mag = vals[pidx].astype(jnp.complex128) * jnp.asarray(scale)
    return mag * jnp.exp(1j * (jnp.asarray(phs) * vals[phidx]).astype(jnp.complex128))


def _make_hamiltonian(defn: _Definition):
    names = defn.names
    m = defn.n_orb
    nh = len(defn.hop_amp)
    hop_c = _coefficients(defn.hop_amp, names) if nh else None
    on_c = _coefficients(defn.onsite, names)
    fi = np.asarray(defn.hop_from, dtype=np.int64)
    ti = np.asarray(defn.hop_to, dtype=np.int64)
    delta = np.asarray(defn.hop_delta, dtype=float).reshape(nh, -1)
    diag = np.arange(m)

    def values(params):
        fixed = jnp.array([1.0, 0.0], dtype=jnp.float64)
        if not names:
            return fixed
        return jnp.concatenate([fixed, jnp.stack([jnp.asarray(params[n], dtype=jnp.float64) for n in names])])

    def hamiltonian(k, params):
        vals = values(params)
        h = jnp.zeros((m, m), dtype=jnp.complex128)
        if nh:
            phase = bloch_phase(jnp.asarray(delta) @ k)                              # (nh,)
            h = h.at[fi, ti].add(_evaluate(hop_c, vals) * phase)
            h = h + jnp.conj(h.T)
        h = h.at[diag, diag].add(jnp.real(_evaluate(on_c, vals)).astype(jnp.complex128))
        return h[None]

    def dvector(k, params):
        h = hamiltonian(k, params)[0]
        d0 = 0.5 * jnp.real(h[0, 0] + h[1, 1])
        d = jnp.stack([jnp.real(h[0, 1]), -jnp.imag(h[0, 1]), 0.5 * jnp.real(h[0, 0] - h[1, 1])])
        return d0[None], d[None]

    def jet(k, params):
        """H, ∂H, ∂²H as explicit Bloch sums over the hoppings (phase e^{ik·δ} → iδ_A, −δ_Aδ_B)."""
        vals = values(params)
        d = k.shape[0]
        h = jnp.zeros((m, m), dtype=jnp.complex128)
        dh = jnp.zeros((m, m, d), dtype=jnp.complex128)
        d2h = jnp.zeros((m, m, d, d), dtype=jnp.complex128)
        if nh:
            dl = jnp.asarray(delta)
            t = _evaluate(hop_c, vals) * bloch_phase(dl @ k)                             # (nh,)
            dc = dl.astype(jnp.complex128)
            h = h.at[fi, ti].add(t)
            dh = dh.at[fi, ti].add(t[:, None] * 1j * dc)
            d2h = d2h.at[fi, ti].add(-t[:, None, None] * dc[:, :, None] * dc[:, None, :])
            h = h + jnp.conj(h.T)
            dh = dh + jnp.conj(jnp.swapaxes(dh, 0, 1))
            d2h = d2h + jnp.conj(jnp.swapaxes(d2h, 0, 1))
        h = h.at[diag, diag].add(jnp.real(_evaluate(on_c, vals)).astype(jnp.complex128))
        return h[None], dh[None], d2h[None]

    hamiltonian.__name__ = "tight_binding_hamiltonian"
    dvector.__name__ = "tight_binding_dvector"
    jet.__name__ = "tight_binding_jet"
    return hamiltonian, (dvector if m == 2 else None), jet


_FUNCTIONS: dict[_Definition, tuple] = {}


def _functions_for(defn: _Definition):
    if defn not in _FUNCTIONS:
        _FUNCTIONS[defn] = _make_hamiltonian(defn)
    return _FUNCTIONS[defn]


# ----------------------------------------------------------------------------- parsing --------
def _parse(data: dict, ctx: _Ctx):
    for key in data:
        if key not in _TOP:
            close = difflib.get_close_matches(key, list(_TOP), n=1)
            hint = f" Did you mean '{close[0]}'?" if close else ""
            ctx.fail("(top level)", key, f"unknown table.{hint}",
                     "Allowed: [model], [lattice], [parameters.<name>], [[orbital]], [[hop]].")
    for key in ("model", "lattice", "orbital"):
        if key not in data:
            form = f"[[{key}]]" if _TOP[key] == "array of tables" else f"[{key}]"
            ctx.fail("(top level)", key, f"missing required table {form}.")

    # [model]
    model = ctx.table("[model]", data["model"])
    ctx.check_keys("[model]", model, _MODEL_KEYS)
    name = _string(ctx, "[model]", "name", model["name"])
    dim = model["dimension"]
    if not isinstance(dim, int) or isinstance(dim, bool) or dim not in (2, 3):
        ctx.fail("[model]", "dimension", f"must be the integer 2 or 3, got {dim!r}.")
    degeneracy = _number(ctx, "[model]", "degeneracy", model.get("degeneracy", 1.0))
    if degeneracy <= 0:
        ctx.fail("[model]", "degeneracy", f"must be positive, got {degeneracy:g}.")
    description = _string(ctx, "[model]", "description", model.get("description", ""))
    source = _string(ctx, "[model]", "source", model.get("source", ""))

    # [lattice]
    lat = ctx.table("[lattice]", data["lattice"])
    ctx.check_keys("[lattice]", lat, _LATTICE_KEYS)
    vecs = lat["vectors"]
    if not isinstance(vecs, list) or len(vecs) != dim:
        ctx.fail("[lattice]", "vectors", f"must list {dim} rows (one per lattice vector) for dimension {dim}, "
                 f"got {len(vecs) if isinstance(vecs, list) else _tname(vecs)}.")
    vectors = tuple(_vector(ctx, "[lattice]", f"vectors[{i}]", v, dim) for i, v in enumerate(vecs))
    a = np.asarray(vectors)
    longest = float(np.max(np.sqrt(np.sum(a * a, axis=1)))) if np.all(np.abs(a) < 1e100) else math.inf
    if not longest <= MAX_LATTICE_A:
        ctx.fail("[lattice]", "vectors", f"a lattice vector is longer than {MAX_LATTICE_A:g} Å.",
                 "Give the vectors in Å (a few Å for a crystal, up to ~1e3 Å for a moiré cell).")
    if abs(np.linalg.det(a)) < 1e-12:
        ctx.fail("[lattice]", "vectors", "the lattice vectors are linearly dependent (zero cell volume).")

    # [parameters.<name>]
    params_tbl = ctx.table("[parameters]", data.get("parameters", {}))
    parameters: list[Parameter] = []
    for pname, entry in params_tbl.items():
        tname = f"[parameters.{pname}]"
        if not pname.isidentifier() or pname in _RESERVED:
            ctx.fail(tname, None, f"parameter name '{pname}' is not allowed.",
                     "Use a Python identifier (letters, digits, underscore; not 'source').")
        entry = ctx.table(tname, entry)
        ctx.check_keys(tname, entry, _PARAM_KEYS)
        default = _number(ctx, tname, "default", entry["default"])
        unit = _string(ctx, tname, "unit", entry["unit"])
        meaning = _string(ctx, tname, "meaning", entry["meaning"])
        bounds = (-math.inf, math.inf)
        if "range" in entry:
            rng = entry["range"]
            if not isinstance(rng, list) or len(rng) != 2 or not all(_is_num(x) for x in rng) or not rng[0] <= rng[1]:
                ctx.fail(tname, "range", f"must be [lo, hi] with lo <= hi, got {rng!r}.",
                         "Use -inf/inf (TOML floats) for an open end.")
            bounds = (float(rng[0]), float(rng[1]))
            if not bounds[0] <= default <= bounds[1]:
                ctx.fail(tname, "default", f"{default:g} is outside range [{bounds[0]:g}, {bounds[1]:g}].")
        parameters.append(Parameter(name=pname, unit=unit, default=default, meaning=meaning, bounds=bounds))
    declared = [p.name for p in parameters]

    # [[orbital]]
    orbs = data["orbital"]
    if not isinstance(orbs, list) or not orbs:
        ctx.fail("[[orbital]]", None, "must be an array of tables [[orbital]] with at least one entry.")
    labels: dict[str, int] = {}
    positions, onsite = [], []
    for i, orb in enumerate(orbs):
        tname = f"[[orbital]] #{i + 1}"
        orb = ctx.table(tname, orb)
        ctx.check_keys(tname, orb, _ORBITAL_KEYS)
        label = _string(ctx, tname, "label", orb["label"])
        if not label:
            ctx.fail(tname, "label", "must not be empty.")
        if label in labels:
            ctx.fail(tname, "label", f"'{label}' is already used by orbital #{labels[label] + 1}.",
                     "Labels must be unique.")
        labels[label] = i
        positions.append(_vector(ctx, tname, "position", orb["position"], dim))
        onsite.append(_amplitude(ctx, tname, "onsite", orb.get("onsite", 0.0), declared, real_only=True))

    # [[hop]]
    hops = data.get("hop", [])
    if not isinstance(hops, list):
        ctx.fail("[[hop]]", None, "must be an array of tables [[hop]].")
    tau = np.asarray(positions)
    seen: dict[tuple, int] = {}
    hf, ht, hd, ha = [], [], [], []
    for i, hop in enumerate(hops):
        tname = f"[[hop]] #{i + 1}"
        hop = ctx.table(tname, hop)
        ctx.check_keys(tname, hop, _HOP_KEYS)
        ends = []
        for key in ("from", "to"):
            lab = _string(ctx, tname, key, hop[key])
            if lab not in labels:
                close = difflib.get_close_matches(lab, list(labels), n=1)
                hint = f" Did you mean '{close[0]}'?" if close else ""
                ctx.fail(tname, key, f"orbital '{lab}' does not exist.{hint}",
                         f"Orbital labels: {', '.join(labels)}.")
            ends.append(labels[lab])
        cell = hop["cell"]
        if not isinstance(cell, list) or len(cell) != dim or not all(
                isinstance(c, int) and not isinstance(c, bool) and abs(c) <= MAX_CELL for c in cell):
            ctx.fail(tname, "cell", f"must be an array of {dim} integers of at most {MAX_CELL} in size (lattice "
                     f"displacement of the 'to' orbital's cell, e.g. {[0] * dim}), got {cell!r}.")
        f, t = ends
        key = (f, t, tuple(cell))
        rev = (t, f, tuple(-c for c in cell))
        if f == t and not any(cell):
            ctx.fail(tname, "cell", f"a hop from '{hop['from']}' to itself in its own cell is an onsite energy.",
                     "Use 'onsite' in its [[orbital]] table instead.")
        if key in seen:
            ctx.fail(tname, "cell", f"the same hop is already listed as hop #{seen[key] + 1}.",
                     "List each bond once (add amplitudes in one entry).")
        if rev in seen:
            ctx.fail(tname, "cell", f"this hop is the reverse of hop #{seen[rev] + 1}; the Hermitian "
                     "conjugate is added automatically.", "List each bond in one direction only.")
        seen[key] = i
        amp = _amplitude(ctx, tname, "amplitude", hop["amplitude"], declared)
        delta = np.asarray(cell, dtype=float) @ a + tau[t] - tau[f]
        hf.append(f)
        ht.append(t)
        hd.append(tuple(float(x) for x in delta))
        ha.append(amp)

    if not hf:
        ctx.fail("[[hop]]", None, "no hops: without hopping the bands are flat and carry no current.",
                 "Add at least one [[hop]] table (from, to, cell, amplitude).")
    defn = _Definition(names=tuple(declared), n_orb=len(orbs), hop_from=tuple(hf), hop_to=tuple(ht),
                       hop_delta=tuple(hd), hop_amp=tuple(ha), onsite=tuple(onsite))
    spec = ParamSpec(tuple(parameters), owner=f"{name} ({ctx.source})")
    lattice = Lattice(vectors=vectors, positions=tuple(positions))
    return defn, spec, lattice, dict(name=name, dim=dim, degeneracy=degeneracy,
                                     description=description, source=source)


def parse_tight_binding(text: str, source: str = "<string>", **values: Any) -> BandModel:
    """A :class:`BandModel` from the text of a tight-binding definition (TOML).

    ``source`` names the text in error messages.  ``values`` override parameter defaults with the
    checks of ``build`` (unknown name → the valid names; out of range → the range).
    """
    ctx = _Ctx(source)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise TightBindingFileError(f"{source}: not valid TOML: {exc}.") from exc
    try:
        defn, spec, lattice, meta = _parse(data, ctx)
    except TightBindingFileError:
        raise
    except (TypeError, ValueError, KeyError, IndexError, AttributeError, OverflowError, ZeroDivisionError) as exc:
        # a combination the checks above do not name: still this file's error, never a traceback
        raise TightBindingFileError(f"{source}: an entry has an unexpected type or value ({type(exc).__name__}: "
                                    f"{exc}). Check each table against docs/tight-binding-files.md.") from exc
    real, _ = spec.resolve(values)
    h, dv, jet = _functions_for(defn)
    return BandModel(name=meta["name"], dim=meta["dim"], hamiltonian=h, params=real, spec=spec,
                     domain=lattice, degeneracy=meta["degeneracy"], blocks=1, block_size=defn.n_orb,
                     dvector=dv, jet=jet, description=meta["description"] or f"tight-binding model from {source}",
                     source=meta["source"] or source)


def load_tight_binding(path, /, **values: Any) -> BandModel:
    """A :class:`BandModel` from a tight-binding definition file (TOML, schema in
    ``docs/tight-binding-files.md``).  ``values`` override parameter defaults (checked)."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError as exc:
        raise TightBindingFileError(f"{p}: tight-binding file not found.") from exc
    except UnicodeDecodeError as exc:
        raise TightBindingFileError(f"{p}: not UTF-8 text (byte 0x{exc.object[exc.start]:02x} at position "
                                    f"{exc.start}); save the tight-binding file as UTF-8.") from exc
    return parse_tight_binding(text, str(p), **values)


def data_file(name: str) -> Path:
    """Path of an example definition shipped with Crosswind (e.g. ``"haldane.toml"``)."""
    return Path(__file__).parent / "data" / name
