"""Run a scenario's sweep: batches, checkpoints and resume, the labeled dataset.

The grid is the outer product of the scenario axes (slowest first: strain, temperature,
scattering, carrier; the current angle last).  The current angle costs no k-space work: the
tensors are computed once per material/conditions point and rotated (:mod:`.device`).

Batches.  The *inner* axis is the innermost non-angle axis with more than one value (else the
last non-angle axis); a *run* is the inner axis at one combination of the other (outer) axes.  A
batch gathers consecutive runs of one strain value up to ``[numerics] batch_points`` points
(default 64; at least one run) and evaluates them in one call of ``response`` with arrays: the
energy-resolved engines then build one set of tables and compile one program for conditions that
separate batches would each have planned and compiled again (the demo's three temperatures: one
batch, 9.6 s warm instead of 13.9 s).  A carrier density or gate voltage goes
through :func:`~crosswind.solver.engine.density.mu_from_density` (gate via
:func:`~crosswind.solver.engine.density.gate_density`) at each point's temperature.

Checkpoints and resume.  Each finished batch is written to ``<folder>/batches/batch_<i>.npz``
atomically (a temporary file in the same folder, then ``os.replace``), so an interrupted run leaves
only complete batches; a checkpoint that cannot be read (empty, truncated, garbage) is recomputed
with a warning naming the file.  ``run.json`` and every checkpoint record a fingerprint of all
inputs (:func:`fingerprint_parts`: the parsed scenario, the tight-binding file's content, the
package version); a rerun with the same fingerprint loads the finished batches and computes only
the rest.  A folder holding results of other inputs is refused with the inputs that changed; a
checkpoint with another fingerprint is recomputed with a warning.

Results: ``results.nc`` (xarray Dataset, engine h5netcdf; every axis and field carries ``units``
and ``long_name`` attributes; complex tensors are stored as real part ``X`` and imaginary part
``X_imag``), ``results.csv`` (one row per grid point, tensor components as columns) and a copy of
the scenario (``scenario.toml``).  Dataset attributes hold the provenance: package version,
scenario text, numerics used (resolution levels, convergence) — the per-field error estimates
are variables ``error_<field>``.
"""
from __future__ import annotations

import contextlib
import fcntl
import hashlib
import itertools
import json
import os
import sys
import tempfile
import time
import tomllib
import zipfile
import zlib
from collections.abc import Callable
from importlib import metadata
from pathlib import Path

import numpy as np

from crosswind.solver.engine.device import sheet_rank2, sheet_rank3
from crosswind.solver.pytrees import as_dict
from crosswind.solver.study import cluster
from crosswind.solver.study.chain import evaluate
from crosswind.solver.study.design import SETTINGS_KEYS, measurability
from crosswind.solver.study.files import atomic_text, atomic_write, check_free_space
from crosswind.solver.study.knobs import base_values
from crosswind.solver.study.scenario import Scenario
from crosswind.solver.vocabulary import CF_CONVENTIONS, NON_SI_UNITS, field

ERROR_FIELDS = ("density", "sigma", "sigma_anomalous", "dipole", "chi", "chi_dc", "chi_dipole", "chi_drude",
                "chi_intrinsic")

class RunError(RuntimeError):
    """The run cannot proceed (e.g. the output folder holds another scenario)."""


def package_version() -> str:
    try:
        return metadata.version("crosswind")
    except metadata.PackageNotFoundError:
        return "unknown"


def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()[:16]


# tables that do not change the sweep's numbers: where results go, figures, later analyses
_NOT_IN_RESULTS = ("output", "sensitivities", "fit", "design")


def fingerprint_parts(scn: Scenario) -> dict:
    """A hash per input the sweep's numbers depend on: the parsed scenario (so a comment-only edit
    changes nothing; [output], [sensitivities], [fit] and [design] are left out, and so are the
    measurement settings of [device], whose measurability fields are recomputed on every run), the
    content of every file it reads (the tight-binding definition), the package version and the
    batch layout (:func:`batch_plan`)."""
    data = {k: v for k, v in tomllib.loads(scn.text).items() if k not in _NOT_IN_RESULTS}
    if isinstance(data.get("device"), dict):
        data["device"] = {k: v for k, v in data["device"].items() if k not in SETTINGS_KEYS}
    parts = {"scenario": _sha(json.dumps(data, sort_keys=True, default=str).encode()),
             "package version": package_version(),
             # how the grid is cut into batches (checkpoints are batches; a batch's numbers depend
             # on the conditions it shares its tables with)
             "batch layout": _sha(json.dumps(batch_plan(scn)).encode())}
    tb = scn.material.tight_binding
    if tb is not None:
        try:
            parts[f"tight-binding file {tb}"] = _sha(Path(tb).read_bytes())
        except OSError as exc:
            raise RunError(f"{tb}: cannot read the tight-binding file ({exc.strerror or exc})") from exc
    return parts


def fingerprint(scn: Scenario) -> str:
    """One hash of :func:`fingerprint_parts` (stored in ``run.json`` and in every checkpoint)."""
    return _sha(json.dumps(fingerprint_parts(scn), sort_keys=True).encode())


def refuse_foreign(folder: Path) -> None:
    """A folder without ``run.json`` must be empty (apart from a run's lock file): results never
    go into a folder of other files."""
    if not (folder / "run.json").exists() and any(p.name != LOCK_NAME for p in folder.iterdir()):
        raise RunError(f"{folder} exists and is not empty; choose another --output folder")


def check_manifest(folder: Path, fp: str, parts: dict) -> None:
    """Refuse a folder whose ``run.json`` was written from other inputs, naming what changed;
    refuse a non-empty folder without one."""
    manifest = folder / "run.json"
    if not manifest.exists():
        refuse_foreign(folder)
        return
    try:
        old = json.loads(manifest.read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise RunError(f"{manifest}: unreadable ({exc}); delete the folder or choose another --output") from exc
    if old.get("fingerprint") == fp:
        return
    before = old.get("inputs") if isinstance(old.get("inputs"), dict) else {}
    changed = sorted(k for k in set(before) | set(parts) if before.get(k) != parts.get(k))
    what = (", ".join(changed) if before else "the inputs") + " changed since these results were computed"
    raise RunError(f"{folder} holds results of a different scenario, model file or package version ({what}); "
                   "rerun into another --output folder or delete this one")


_atomic_write, _atomic_text = atomic_write, atomic_text     # names used before solver/study/files.py


def _savez(tmp: str, res: dict):
    with open(tmp, "wb") as f:       # a file object: np.savez would append ".npz" to a name
        np.savez(f, **res)


def batch_plan(scn: Scenario):
    """(inner axis index, outer axis indices, batches): each batch a tuple of outer index tuples
    (runs of the inner axis), consecutive, of one strain value, at most ``batch_points`` points
    (at least one run).  Axes exclude the angle (last axis)."""
    axes = scn.axes[:-1]
    multi = [i for i, a in enumerate(axes) if len(a) > 1]
    inner = multi[-1] if multi else len(axes) - 1
    outer = [i for i in range(len(axes)) if i != inner]
    combos = list(itertools.product(*[range(len(axes[i])) for i in outer]))
    runs = max(1, scn.numerics.batch_points // len(axes[inner]))
    strain = outer.index(0) if 0 in outer and axes[0].name == "strain" else None
    batches, group = [], []
    for combo in combos:
        if group and (len(group) == runs or (strain is not None and combo[strain] != group[0][strain])):
            batches.append(tuple(group))
            group = []
        group.append(combo)
    batches.append(tuple(group))
    return inner, outer, batches


def prepare_folder(folder: Path) -> None:
    """Create ``folder`` (with its parents) and check that a file can be written in it; an
    ``OSError`` (a parent that is a file, no permission, read-only disk) becomes a
    :class:`RunError` naming the folder and the fix."""
    try:
        folder.mkdir(parents=True, exist_ok=True)
        fd, probe = tempfile.mkstemp(prefix=".write-test.", dir=folder)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        raise RunError(f"cannot create or write the output folder {folder} ({exc.strerror or exc}); choose "
                       "another --output folder or fix its permissions") from exc


CHECKPOINT_ERRORS = (OSError, ValueError, EOFError, KeyError, zipfile.BadZipFile, zlib.error)


def load_checkpoint(path: Path, fp: str) -> dict | None:
    """The arrays of a finished batch, or ``None`` with a warning on stderr naming the file when it
    is empty, truncated, not a checkpoint or written from other inputs (fingerprint ``fp``): the
    batch is then simply recomputed."""
    try:
        with np.load(path) as z:
            res = {k: z[k] for k in z.files}
        if not {"mu", "sigma"} <= set(res):
            raise ValueError("not a Crosswind batch checkpoint")
    except CHECKPOINT_ERRORS as exc:
        print(f"crosswind: warning: checkpoint {path} is unreadable ({type(exc).__name__}: {exc}); "
              "recomputing that batch", file=sys.stderr, flush=True)
        return None
    if str(res.pop("_fingerprint", "")) != fp:
        print(f"crosswind: warning: checkpoint {path} was computed from other inputs (fingerprint differs); "
              "recomputing that batch", file=sys.stderr, flush=True)
        return None
    return res


class _Progress:
    def __init__(self, total: int, enabled: bool):
        self.total, self.done, self.enabled = total, 0, enabled
        self.bar = None
        if enabled:
            try:
                from tqdm import tqdm
                self.bar = tqdm(total=total, unit="batch", desc="crosswind", file=sys.stderr)
            except ImportError:
                self.bar = None

    def phase(self, text: str):
        """A phase line ("compiling …") above the bar, so a long first batch is not silent."""
        if not self.enabled:
            return
        self.t_begin = time.time()
        if self.bar is not None:
            self.bar.write(f"crosswind: {text}", file=sys.stderr)
        else:
            print(f"crosswind: {text}", file=sys.stderr, flush=True)

    def update(self, skipped=False, workers: int | None = None):
        """One more batch finished (``skipped``: loaded from its checkpoint); ``workers``: Dask
        workers in use (clustered runs)."""
        self.done += 1
        if not skipped:
            self.computed = getattr(self, "computed", 0) + 1
            self.t_first = getattr(self, "t_first", None) or time.time()
        if not self.enabled:
            return
        if self.bar is not None:
            if workers is not None:
                self.bar.set_postfix_str(f"{workers} worker{'s' if workers != 1 else ''}", refresh=False)
            self.bar.update(1)
        else:
            tag = " (from checkpoint)" if skipped else ""
            if workers is not None:
                tag += f" on {workers} worker{'s' if workers != 1 else ''}"
            left = self.total - self.done
            if not skipped and left and self.computed > 1:     # batches after the first (no compile time)
                tag += f", about {(time.time() - self.t_first) / (self.computed - 1) * left:.0f} s left"
            elif not skipped and left and getattr(self, "t_begin", None):
                tag += (f", at most about {(time.time() - self.t_begin) * left:.0f} s left "
                        "(the first batch included compiling)")
            print(f"crosswind: batch {self.done}/{self.total}{tag}", file=sys.stderr, flush=True)

    def close(self):
        if self.bar is not None:
            self.bar.close()


def error_available(info: dict) -> bool:
    """False when ``response`` made no comparison: the node quadrature at level 0 has no coarser
    level, so its |fine − coarse| is 0 by construction; the dataset then holds NaN ("unavailable")."""
    return not (info.get("engine") == "mesh" and int(info["level"]) == 0)


def compute_batch(scn: Scenario, values: dict) -> dict:
    """Evaluate one batch through the chain (:func:`crosswind.solver.study.chain.evaluate`) at the
    scenario's numerics, with error estimates.  ``values`` maps each non-angle axis (knob name) to a
    1-D array of the batch's P points; the device quantities are given for every current angle, (P, A).
    Returns the arrays of the checkpoint (names of :mod:`crosswind.solver.vocabulary`)."""
    P = len(next(iter(values.values())))
    angles = np.asarray(scn.axes[-1].values, dtype=float)
    knobs = base_values(scn, dict(values, current_angle_deg=np.broadcast_to(angles, (P, len(angles)))), who="sweep")
    if "strain" in knobs:
        knobs["strain"] = float(np.asarray(knobs["strain"]).reshape(-1)[0])   # one strain per batch
    got = evaluate(scn, knobs, resolution=scn.numerics.resolution, rtol=scn.numerics.rtol, estimate_error=True)
    r = got.response
    out = {"mu": np.asarray(got.mu), "density": np.asarray(r.density)}
    for k in ("sigma", "sigma_drude", "sigma_anomalous", "dipole", "chi", "chi_dc", "seebeck"):
        out[k] = np.asarray(getattr(r, k))
    parts = as_dict(r.chi_parts)
    for part, v in parts.items():
        out[f"chi_{part}"] = np.asarray(v)
    res = r.resolution
    compared = error_available(as_dict(res))
    for k in ERROR_FIELDS:
        # "chi_dipole", ... name the χ parts (r.error.chi_parts.dipole, ...)
        e = np.asarray(getattr(r.error.chi_parts, k[4:]) if k.startswith("chi_") and k[4:] in parts
                       else getattr(r.error, k))
        out[f"error_{k}"] = e if compared else np.full(e.shape, np.nan)
    out["has_error_estimate"] = np.full(P, int(compared))
    out["resolution_level"] = np.full(P, int(res.level))
    out["converged"] = np.full(P, -1 if res.converged is None else int(bool(res.converged)))
    nodes = -1 if res.nodes_per_condition is None else int(res.nodes_per_condition)   # -1: energy engines
    out["nodes_per_condition"] = np.full(P, nodes)
    for k, v in as_dict(got.reading).items():
        out[f"dev_{k}"] = np.asarray(v)
    out["dev_sigma_bar"] = np.asarray(got.sigma_bar)
    out["dev_chi_bar"] = np.asarray(got.chi_bar)
    if scn.device.thickness_nm is not None:
        out = film_sheet_fields(out, scn.device.thickness_nm * 1e-9)
    return out


def film_sheet_fields(out: dict, thickness_m: float) -> dict:
    """Crystal-frame fields of a 3D model as the sheet quantities of a film of ``thickness_m``:
    bulk × thickness, in-plane components (docs/theory.md §16.5, an approximation): density m⁻³ → m⁻²,
    σ (…, 3, 3) S/m → (…, 2, 2) S, χ (…, 3, 3, 3) A/V² → (…, 2, 2, 2) A·m/V², the dipole D_az (…, 3, 3)
    → D_a (…, 2) m (the in-plane gradient of Ω_z, as for a 2D sheet); the Seebeck tensor is intensive
    (in-plane block only).  Error estimates alike; Hall-bar fields are already sheet quantities."""
    def sheet(key, v):
        base = key[6:] if key.startswith("error_") else key
        if base.startswith("dev_") or base in ("mu", "has_error_estimate", "resolution_level", "converged",
                                               "nodes_per_condition"):
            return v
        if base == "density":
            return v * thickness_m
        if base == "seebeck":
            return v[..., :2, :2]
        if base == "dipole":
            return v[..., :2, 2] * thickness_m
        if base.startswith("chi"):
            return sheet_rank3(v, thickness_m)
        if base.startswith("sigma"):
            return sheet_rank2(v, thickness_m)
        raise RuntimeError(f"film_sheet_fields: no sheet rule for {key!r}")   # a new field: add its rule
    return {k: sheet(k, v) for k, v in out.items()}


def batch_values(scn: Scenario, inner: int, outer, batch) -> dict:
    """{axis name: the batch's P values} of ``batch`` (runs at outer index tuples,
    :func:`batch_plan`), run after run."""
    axes = scn.axes[:-1]
    n = len(axes[inner])
    values = {}
    for i, a in enumerate(axes):
        if i == inner:
            values[a.name] = np.tile(np.asarray(a.values, dtype=float), len(batch))
        else:
            values[a.name] = np.repeat([float(a.values[dict(zip(outer, combo))[i]]) for combo in batch], n)
    return values


def compute_plan_batch(scn: Scenario, values: dict, inner: int) -> dict:
    """:func:`compute_batch` of one batch of the plan (a strain-only sweep: one model per point)."""
    P = len(next(iter(values.values())))
    if "strain" in values and inner == 0 and P > 1:
        # strain is the only sweep: one model per point (model parameters are scalars)
        parts = [compute_batch(scn, {k: v[j:j + 1] for k, v in values.items()}) for j in range(P)]
        return {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}
    return compute_batch(scn, values)


def _batch_task(payload: dict, b: int) -> tuple:
    """Worker side of a clustered sweep: batch ``b`` of the scenario in ``payload`` (text and
    arrays only, :func:`cluster.scenario_payload`); the scenario is parsed and the model built
    once per worker process."""
    def run():
        scn = cluster.worker_scenario(payload)
        inner, outer, batches = batch_plan(scn)
        return compute_plan_batch(scn, batch_values(scn, inner, outer, batches[b]), inner)
    return cluster.worker_record(run)


FINITE_FIELDS = ("mu", "density", "sigma", "sigma_drude", "sigma_anomalous", "dipole", "chi", "chi_dc",
                 "chi_dipole", "chi_drude", "chi_intrinsic")


def check_finite_batch(scn: Scenario, b: int, values: dict, res: dict) -> None:
    """Refuse a batch whose response fields hold NaN/inf (a non-finite input traced past the
    API checks, an overflow in a scattering model, a model that is NaN somewhere): the error names
    the first bad point by its axis values, and nothing of the batch is checkpointed."""
    for name in FINITE_FIELDS:
        if name not in res:
            continue
        v = np.asarray(res[name])
        bad = ~np.isfinite(v).reshape(len(v), -1).all(axis=1)
        if bad.any():
            j = int(np.argmax(bad))
            units = {a.name: a.unit for a in scn.axes}
            point = ", ".join(f"{k} = {float(x[j]):g} {units.get(k, '')}".rstrip() for k, x in values.items())
            raise RunError(f"batch {b}, point {point}: {name} is not finite ({int(bad.sum())} of {len(v)} "
                           "points); nothing was written for this batch. Check the model and the scattering "
                           "parameters at that point (e.g. a power-law exponent that overflows tau).")


LOCK_NAME = ".crosswind.lock"


@contextlib.contextmanager
def folder_lock(folder: Path):
    """Hold an exclusive ``flock`` on ``<folder>/.crosswind.lock`` (which records the owner's pid)
    for the duration of a run; a second writer is refused with a :class:`RunError` naming it."""
    path = folder / LOCK_NAME
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            owner = os.pread(fd, 32, 0).decode(errors="replace").strip() or "?"
            raise RunError(f"{folder} is being written by another crosswind run (pid {owner}); wait for it to "
                           "finish (then rerun to resume) or choose another --output folder") from None
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
        yield
    finally:
        os.close(fd)          # releases the lock


def run_scenario(scn: Scenario, output: Path | str | None = None, *, progress: bool = True,
                 after_batch: Callable[[int], None] | None = None, client=None):
    """Run (or resume) the sweep of ``scn``; returns the xarray Dataset (also written to disk).
    ``after_batch(i)`` is called after batch ``i`` is checkpointed (for tests and monitoring).
    The output folder is locked for the run (:func:`folder_lock`).

    ``client``: a ``distributed.Client`` (e.g. of :func:`crosswind.solver.study.cluster.open_client`,
    or a notebook's own): the batches still to compute run as Dask tasks on its workers, and are
    checkpointed here as they finish (docs/cluster.md); the dataset is the serial run's."""
    folder = Path(output) if output is not None else scn.output_folder
    prepare_folder(folder)
    refuse_foreign(folder)              # before the lock file: a foreign folder is left untouched
    with folder_lock(folder):
        return _run_locked(scn, folder, progress, after_batch, client)


def _run_locked(scn: Scenario, folder: Path, progress: bool, after_batch, client=None):
    parts = fingerprint_parts(scn)
    fp = _sha(json.dumps(parts, sort_keys=True).encode())
    check_manifest(folder, fp, parts)
    inner, outer, batches = batch_plan(scn)
    _atomic_text(folder / "run.json", json.dumps({"fingerprint": fp, "inputs": parts, "version": package_version(),
                                                  "batches": len(batches),
                                                  "points_per_batch": [len(c) * len(scn.axes[inner]) for c in batches],
                                                  "started": time.strftime("%Y-%m-%dT%H:%M:%S")}, indent=1))
    _atomic_text(folder / "scenario.toml", scn.text)
    bdir = folder / "batches"
    bdir.mkdir(exist_ok=True)
    prog = _Progress(len(batches), progress)
    results, computed, t0 = [None] * len(batches), [], time.time()
    workers: dict = {}
    try:
        for b, batch in enumerate(batches):
            path = bdir / f"batch_{b:05d}.npz"
            done = load_checkpoint(path, fp) if path.exists() else None
            if done is not None:
                results[b] = done
                prog.update(skipped=True)
                continue
            if client is not None:
                continue                 # computed on the cluster below
            if not computed:
                prog.phase(f"compiling the k-space kernels for {scn.material.model or scn.material.tight_binding.name} "
                           "(first run only; cached afterwards)…")
            values = batch_values(scn, inner, outer, batch)
            res = compute_plan_batch(scn, values, inner)
            _keep_batch(scn, bdir, fp, b, values, res, results, computed, after_batch, prog)
        missing = [b for b, r in enumerate(results) if r is None]
        if client is not None and missing:
            prog.phase(f"computing {len(missing)} batch(es) on {cluster.describe(client)} (each worker builds the "
                       "model and compiles the kernels once)…")
            payload = cluster.scenario_payload(scn)
            futures = cluster.submit_ordered(client, _batch_task, {b: (payload, b) for b in missing},
                                             name=f"crosswind-batch-{fp}")
            for b, (res, who) in cluster.finished(client, futures):
                cluster.check_version(who)
                values = batch_values(scn, inner, outer, batches[b])
                mine = workers.setdefault(who["worker"], {"pid": who["pid"], "batches": [], "programs_compiled": [],
                                                          "seconds": []})
                for k in ("batches", "programs_compiled", "seconds"):
                    mine[k].append(b if k == "batches" else who[k])
                _keep_batch(scn, bdir, fp, b, values, res, results, computed, after_batch, prog,
                            workers=cluster.workers_in_use(client))
    finally:
        prog.close()
    ds = assemble(scn, results, inner, outer, batches)
    # noise floor, verdict and artefacts per point (docs/theory.md §15; cheap, from the device fields)
    m = measurability(ds, scn.device)
    ds = ds.merge(m)
    ds.attrs.update(noise_settings=m.attrs["noise_settings"], measurability_codes=m.attrs["verdicts"])
    ds.attrs["batches_computed_this_run"] = json.dumps(sorted(computed))
    ds.attrs["wall_time_s_this_run"] = round(time.time() - t0, 3)
    if client is not None:      # who computed what, and the XLA programs each task had to build
        ds.attrs["cluster_workers_this_run"] = json.dumps(workers)
    write_results(ds, folder)
    return ds


def _keep_batch(scn, bdir, fp, b, values, res, results, computed, after_batch, prog, workers=None):
    """Check a computed batch, checkpoint it atomically and count it."""
    check_finite_batch(scn, b, values, res)
    _atomic_write(bdir / f"batch_{b:05d}.npz", lambda tmp: _savez(tmp, dict(res, _fingerprint=np.array(fp))))
    results[b] = res
    computed.append(b)
    prog.update(workers=workers)
    if after_batch is not None:
        after_batch(b)


def assemble(scn: Scenario, results, inner, outer, batches):
    """Place batch results on the full grid and label it."""
    import xarray as xr
    axes = scn.axes[:-1]
    shape = tuple(len(a) for a in axes)
    A = len(scn.axes[-1])
    comp = ["x", "y"]
    grid: dict = {}
    n = shape[inner]
    for b, batch in enumerate(batches):
        res = results[b]
        for k, v in res.items():
            if k not in grid:
                grid[k] = np.zeros(shape + v.shape[1:], dtype=v.dtype)
            for r, combo in enumerate(batch):
                sl = [0] * len(axes)
                for i, c in zip(outer, combo):
                    sl[i] = c
                sl[inner] = slice(None)
                # run r of the batch (P = runs × inner points) is the inner axis at this combo
                grid[k][tuple(sl)] = v[r * n:(r + 1) * n]
    dims = [a.name for a in axes]
    coords = {a.name: (a.name, np.asarray(a.values), {"units": a.unit, "long_name": a.long_name,
                                                      "scenario_key": a.key,
                                                      **({"comment": NON_SI_UNITS[a.unit]} if a.unit in NON_SI_UNITS
                                                         else {})}) for a in scn.axes}
    coords.update({n: (n, comp, {"long_name": f"{pos} Cartesian index of a tensor (crystal or bar frame, see "
                                              "the field's long_name)", "units": "1"})
                   for n, pos in (("i", "first"), ("j", "second"), ("k", "third"))})
    data = {}
    for k, v in grid.items():
        name = k[4:] if k.startswith("dev_") else k
        d = list(dims) + (["current_angle_deg"] if k.startswith("dev_") else [])
        extra = v.ndim - len(d)
        d = d + ["i", "j", "k"][:extra]
        f = field(name)
        attrs = {"units": f.unit(2), "long_name": f.long_name}
        if np.iscomplexobj(v):
            data[name] = (d, v.real, attrs)
            data[name + "_imag"] = (d, v.imag, dict(attrs, long_name="imaginary part of " + attrs["long_name"]))
        else:
            data[name] = (d, v, attrs)
    ds = xr.Dataset(data, coords=coords)
    if ds.sizes["current_angle_deg"] != A:     # a bookkeeping bug, never a user error
        raise RuntimeError(f"assemble: {ds.sizes['current_angle_deg']} current angles in the dataset, {A} expected")
    # only swept axes are dimensions; a fixed value becomes a scalar coordinate (with its
    # attributes).  The current angle stays a dimension: it is the axis of every Hall-bar reading.
    ds = ds.squeeze([a.name for a in scn.axes[:-1] if len(a) == 1])
    numerics = {"rtol": scn.numerics.rtol,
                "resolution": "auto" if scn.numerics.resolution is None else scn.numerics.resolution,
                "error_estimate": ("|fine - coarse|" if np.all(grid.get("has_error_estimate", 1) == 1) else
                                   "unavailable (NaN) where has_error_estimate = 0: level 0 has no coarser level"),
                "intrinsic": scn.numerics.intrinsic, "density_resolution": scn.numerics.density_resolution,
                "levels_used": sorted({int(x) for x in np.unique(grid["resolution_level"])}),
                "all_converged": (None if np.all(grid["converged"] < 0)
                                  else bool(np.all(grid["converged"] == 1)))}
    ds.attrs.update({
        "title": "Crosswind sweep", "Conventions": CF_CONVENTIONS, "crosswind_version": package_version(),
        "scenario_file": str(scn.path), "scenario_text": scn.text,
        "numerics": json.dumps(numerics), "carrier_axis": scn.carrier, "scattering": scn.scattering,
        "device": json.dumps(scn.device.__dict__),
        "conventions": "q = -e; E(t) = Re[E exp(i omega t)]; j2w_a = chi_abc E_b E_c (Sodemann-Fu phasor); "
                       "drive I(t) = I0 sin(omega t); omega/2omega phasors quoted for a cosine drive; "
                       "bar frame x' along the current at current_angle from crystal x",
        "model": "relaxation-time Boltzmann theory, band-independent tau, to second order in E",
    })
    if scn.device.thickness_nm is not None:
        ds.attrs["film"] = (f"3D model as a film of thickness {scn.device.thickness_nm:g} nm: crystal-frame fields "
                            "are sheet quantities = bulk x thickness (in-plane components; dipole: D_az x thickness), "
                            "an approximation without subbands, surface states or surface scattering "
                            "(docs/theory.md §16.5)")
    return ds


def flat_table(ds):
    """One row per grid point; the index holds every axis of the scenario (swept or fixed, in the
    scenario's order, angle included), tensor components become columns (``chi_yxx``)."""
    import pandas as pd
    axes = [n for n, c in ds.coords.items() if "scenario_key" in c.attrs]
    swept = [d for d in axes if d in ds.dims]
    shape = tuple(ds.sizes[d] for d in swept)
    rows = int(np.prod(shape))
    grids = np.meshgrid(*[ds[d].values for d in swept], indexing="ij") if swept else []
    index = [grids[swept.index(a)].reshape(rows) if a in swept else np.full(rows, ds[a].values.item())
             for a in axes]
    cols, units = {}, {}
    for name, var in ds.data_vars.items():
        tdims = [d for d in var.dims if d in ("i", "j", "k")]
        own = [d for d in swept if d in var.dims]
        v = var.transpose(*own, *tdims).values
        # put the grid axes the field lacks in as length-1 axes, then broadcast over the whole grid
        v = v.reshape(tuple(ds.sizes[d] if d in own else 1 for d in swept) + v.shape[len(own):])
        v = np.broadcast_to(v, shape + v.shape[len(swept):]).reshape(rows, -1)
        combos = list(itertools.product(*[ds[d].values for d in tdims])) if tdims else [()]
        for c, combo in enumerate(combos):
            col = f"{name}_{''.join(combo)}" if tdims else name
            cols[col], units[col] = v[:, c], var.attrs.get("units", "")
    frame = pd.DataFrame(cols, index=pd.MultiIndex.from_arrays(index, names=axes) if axes else None)
    frame.columns = [f"{c} [{units[c]}]" if units[c] else c for c in frame.columns]
    if axes:
        frame.index.names = [f"{n} [{ds[n].attrs.get('units', '')}]" for n in axes]
    return frame


def write_results(ds, folder: Path):
    """``results.nc`` and ``results.csv``, atomically, after checking the disk can hold them (an
    HDF5 writer may crash rather than raise on a full disk)."""
    check_free_space(folder, 4 * int(ds.nbytes), "results.nc and results.csv")
    _atomic_write(folder / "results.nc", lambda tmp: ds.to_netcdf(tmp, engine="h5netcdf"))
    frame = flat_table(ds)
    _atomic_write(folder / "results.csv", lambda tmp: frame.to_csv(tmp))


def open_results(folder) -> object:
    """The dataset written by :func:`run_scenario` (loaded into memory)."""
    import xarray as xr
    with xr.open_dataset(Path(folder) / "results.nc", engine="h5netcdf") as ds:
        return ds.load()
