"""``crosswind fit``: fit a scenario's free parameters to measurements (the ``[fit]`` table).

The model prediction at the measured axis values goes through the device pipeline of
``crosswind run`` (:func:`crosswind.solver.study.chain.evaluate`: gate → density → μ → response →
Hall bar), differentiable end to end, so :func:`crosswind.solver.fitting.fit.fit` gets its Jacobian by
forward-mode automatic differentiation.  Free parameters are named as the knobs of
:mod:`crosswind.solver.study.chain`; every other number keeps its scenario value.

Data: a CSV file read by :func:`crosswind.solver.fitting.measurements.load_measurements` with the columns
``<axis column> [unit]``, ``<quantity> [unit]`` and optionally ``<quantity>_err [unit]`` (standard
errors; with them the covariance is absolute).  The axis column is named after the knob
(``gate_V``, ``density_cm2``, ``mu_eV``, ``temperature_K``, ``current_uA``; ``sigma_xx`` for the
scaling analysis); the short names ``gate``, ``density``, ``mu``, ``temperature``, ``current`` of
earlier files are read too.

Outputs (folder): ``fit_summary.md``, ``fit.json``, ``fit_curve.png`` (fitted curve over the data),
``fit_residuals.png``, ``fitted_scenario.toml`` (the scenario with the best-fit values written
back; rerun it with ``crosswind run``).  With ``[fit] scaling = true`` (quantity "ratio" against
"sigma_xx") the data are fitted by E⊥/E∥² = C0 + C1σ + C2σ² (:func:`~crosswind.solver.fitting.fit.scaling_fit`).
"""
from __future__ import annotations

import json
import math
import tomllib
from dataclasses import asdict, dataclass
from pathlib import Path

import jax.numpy as jnp
import numpy as np

from crosswind.solver.fitting.fit import fit, scaling_fit, start_runner
from crosswind.solver.fitting.measurements import load_measurements
from crosswind.solver.reporting.plotting import pyplot
from crosswind.solver.study import cluster
from crosswind.solver.study.chain import evaluate
from crosswind.solver.study.files import atomic_figure, atomic_text, make_folder, scenario_toml
from crosswind.solver.study.knobs import base_values, scenario_knobs
from crosswind.solver.vocabulary import KNOBS, OUTPUTS

#: unit of each fit axis column (the column is named after the knob; an older short name is also read)
AXIS_COLUMNS = {k: KNOBS[k].unit for k in ("gate_V", "density_cm2", "mu_eV", "temperature_K", "current_uA")}
AXIS_COLUMNS["sigma_xx"] = OUTPUTS["sigma_xx"].unit_2d
LEGACY_COLUMNS = {"gate_V": ("gate",), "density_cm2": ("density",), "mu_eV": ("mu",),
                  "temperature_K": ("temperature",), "current_uA": ("current",)}
QUANTITY_UNITS = {k: f.unit_2d for k, f in OUTPUTS.items()}
SHOW = {"V2w": (1e9, "nV"), "Vxx": (1e3, "mV"), "sigma_xx": (1e3, "mS"), "ratio": (1.0, "m/V")}


@dataclass(frozen=True)
class FitReport:
    """What ``crosswind fit`` found (also written as ``fit.json``): the fitted ``values`` with
    standard errors ``stderr`` in ``units`` (knob units), the ``correlation`` matrix of the ``free``
    parameters, χ²_red and degrees of freedom, the optimiser's verdict (``converged``, ``message``,
    ``status`` "ok" | "unreliable" | "failed", ``problems``, ``at_bound``,
    ``identifiability_warnings``) and the data with the model at the best fit (``data``)."""

    quantity: str
    quantity_unit: str
    axis: str
    data_file: str
    points: int
    resolution: int
    values: dict
    stderr: dict
    units: dict
    initial: dict
    correlation: list
    free: list
    chi2_reduced: float
    dof: int
    converged: bool
    message: str
    status: str
    problems: list
    at_bound: list
    identifiability_warnings: list
    starts: int
    nfev: int
    absolute_errors: bool
    data: dict
    scaling = False

    def to_json(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class ScalingReport:
    """The scaling analysis E⊥/E∥² = C0 + C1σ_xx + C2σ_xx² (``[fit] scaling = true``): coefficients
    c0, c1, c2 with standard errors, units and meanings, correlation, χ²_red (also ``fit.json``)."""

    data_file: str
    points: int
    coefficients: dict
    stderr: dict
    units: dict
    meaning: dict
    correlation: list
    chi2_reduced: float
    dof: int
    scaling = True
    status = "ok"

    def to_json(self) -> dict:
        return {"scaling": True, **asdict(self)}


class FitInputError(ValueError):
    """Bad data file or fit request; the message names the file, column or parameter and the fix."""


def load_data(scn, path):
    spec = scn.fit
    col, unit = spec.axis, AXIS_COLUMNS[spec.axis]
    q = spec.quantity
    cols = {col: unit, q: QUANTITY_UNITS[q], f"{q}_err": QUANTITY_UNITS[q]}
    npar = max(len(spec.parameters), 3 if spec.scaling else 1)
    try:
        data = load_measurements(path, cols, min_points=npar, optional=(f"{q}_err",), aliases=LEGACY_COLUMNS)
    except (ValueError, FileNotFoundError) as exc:
        raise FitInputError(str(exc)) from None
    err = data.get(f"{q}_err")
    if err is not None and (np.any(err <= 0)):
        raise FitInputError(f"{path}: column '{q}_err' must hold positive standard errors")
    if not spec.scaling and data[q].size <= len(spec.parameters) and err is None:
        raise FitInputError(f"{path}: {data[q].size} data point(s) for {len(spec.parameters)} free parameter(s) "
                            "leave no degrees of freedom for error estimates; add points, give a "
                            f"'{q}_err [unit]' column, or free fewer parameters")
    _refuse_duplicates(path, col, unit, data[col])
    return data[col], data[q], err


def _refuse_duplicates(path, col, unit, x):
    """Repeated abscissae are refused: listed twice, every row would count as independent data and
    shrink the standard errors; conflicting repeats would pull the fit apart."""
    values, counts = np.unique(np.asarray(x), return_counts=True)
    rep = values[counts > 1]
    if rep.size:
        shown = ", ".join(f"{v:g}" for v in rep[:5]) + (" …" if rep.size > 5 else "")
        raise FitInputError(f"{path}: column '{col} [{unit}]' repeats the value(s) {shown}; merge repeated "
                            "measurements into one row (their mean, with the standard error of the mean in the "
                            "error column) or remove the extra rows")


def predictor(scn):
    spec = scn.fit
    at = dict(spec.at)
    base = base_values(scn, {k: v for k, v in at.items()}, who="[fit]")
    base.pop(spec.axis, None)
    missing = [k for k, v in base.items() if v is None]
    if missing:
        raise FitInputError(f"{scn.path}: [fit]: {', '.join(missing)} are swept in the scenario; fix them for "
                            f"the fit with at = {{{missing[0]} = ...}}")

    def predict(params, x):
        vals = dict(base)
        vals.update(params)
        vals[spec.axis] = jnp.asarray(x, dtype=jnp.float64)
        return evaluate(scn, vals, resolution=spec.resolution).output(spec.quantity)

    return predict, base


def _problem(scn, x, y, err):
    """(predict, residual function, initial values, bounds, fit options) of the scenario's fit."""
    spec = scn.fit
    predict, _ = predictor(scn)
    initial = {n: i for n, i, _, _ in spec.parameters}
    bounds = {n: (lo, hi) for n, _, lo, hi in spec.parameters}
    unit = _residual_unit(y, err)
    resid = lambda p: (predict(p, x) - jnp.asarray(y)) / (1.0 if err is not None else unit)
    return predict, resid, initial, bounds, {"sigma": err, "jit": True}


def _residual_unit(y, err):
    """What one unit of a fit residual is in the data's unit: the standard errors when given
    (the residual is divided by them), else the largest |y|."""
    return np.asarray(err, dtype=float) if err is not None else float(np.max(np.abs(y))) or 1.0


def _best_curve(predict, best, x, points=25):
    """The model at the best fit on at least ``points`` abscissae over the data's range, evaluated in
    blocks of the data's length: the programs compiled for the data serve every block (another
    length would trace and compile the whole chain again)."""
    m = len(x)
    blocks = -(-points // m)
    xs = np.linspace(float(np.min(x)), float(np.max(x)), blocks * m)
    return xs, np.concatenate([np.asarray(predict(best, xs[i * m:(i + 1) * m])) for i in range(blocks)])


_RUNNERS: dict = {}


def _start_task(payload, x, y, err, start, label):
    """Worker side of a clustered multi-start fit: one start (text and arrays travel); the residual
    is compiled once per worker and kept for its later starts."""
    def run():
        key = (repr(sorted(payload.items())), x.tobytes(), y.tobytes(), None if err is None else err.tobytes())
        if key not in _RUNNERS:
            _, resid, initial, bounds, options = _problem(cluster.worker_scenario(payload), x, y, err)
            _RUNNERS[key] = start_runner(resid, initial, bounds=bounds, **options)
        return _RUNNERS[key](start, label)
    return cluster.worker_record(run)


def _starts_on(client, scn, x, y, err, progress):
    """``run_starts`` of :func:`~crosswind.solver.fitting.fit.fit`: every start a Dask task."""
    def run_starts(points):
        n = len(points)
        payload = cluster.scenario_payload(scn)
        args = {i: (payload, x, y, err, p, f"start {i + 1}/{n}") for i, p in enumerate(points)}
        if progress is not None:
            progress(f"{n} starts on {cluster.describe(client)} (each worker compiles the model once)…")
        out = {}
        for i, (outcome, who) in cluster.finished(client, cluster.submit_ordered(client, _start_task, args,
                                                                                 name="crosswind-fit-start")):
            cluster.check_version(who)
            out[i] = outcome
            if progress is not None:
                cost = "failed" if outcome[0] is None else f"cost {float(outcome[0][0].cost):.4g}"
                progress(f"start {i + 1}/{n} finished on {who['worker']}: {cost} ({len(out)}/{n} done)")
        return [out[i] for i in range(n)]
    return run_starts


def run_fit(scn, data_path, folder, *, starts=None, progress=None, client=None) -> FitReport | ScalingReport:
    """Fit, write every output into ``folder``; returns the report (``fit.json`` holds the same).  ``progress(line)``
    receives one line per iteration (cost and parameter values).  ``client`` (a ``distributed.Client``):
    the starting points run in parallel as Dask tasks (docs/cluster.md), with the same result."""
    spec = scn.fit
    x, y, err = load_data(scn, data_path)
    folder = Path(folder)
    if spec.scaling:
        return _run_scaling(scn, x, y, err, data_path, folder)
    if progress is not None:
        progress(f"of {len(spec.parameters)} parameter(s) to {y.size} points: the first evaluation compiles the "
                 "k-space kernels…")
    predict, resid, initial, bounds, options = _problem(scn, x, y, err)
    n_starts = starts or spec.starts
    on_cluster = _starts_on(client, scn, x, y, err, progress) if client is not None and n_starts > 1 else None
    res = fit(resid, initial, bounds=bounds, starts=n_starts, absolute_sigma=err is not None, progress=progress,
              run_starts=on_cluster, **options)
    best = {k: jnp.asarray(v) for k, v in res.values.items()}
    xs, curve = _best_curve(predict, best, x)
    # the model at the data from the residuals at the optimum (r = (model − y)/unit): no new evaluation
    # (a fit whose every start failed has no residuals: evaluate there)
    model_at = (np.asarray(predict(best, x)) if res.residuals is None
                else np.asarray(y) + np.asarray(res.residuals) * _residual_unit(y, err))
    units = scenario_knobs(scn)
    make_folder(folder)
    out = FitReport(
        quantity=spec.quantity, quantity_unit=QUANTITY_UNITS[spec.quantity], axis=spec.axis,
        data_file=str(data_path), points=int(y.size), resolution=spec.resolution,
        values={k: res.values[k] for k in res.free}, stderr={k: res.stderr[k] for k in res.free},
        units={k: units[k] for k in res.free}, initial=initial,
        correlation=np.asarray(res.correlation).tolist(), free=list(res.free),
        chi2_reduced=res.chi2_reduced, dof=res.dof, converged=res.converged, message=res.message,
        status=res.status, problems=list(res.problems), at_bound=list(res.at_bound),
        identifiability_warnings=list(res.identifiability_warnings), starts=res.starts_tried,
        nfev=res.nfev, absolute_errors=err is not None,
        data={"x": x.tolist(), "y": y.tolist(), "err": None if err is None else err.tolist(),
              "model": model_at.tolist()})
    atomic_text(folder / "fit.json", json.dumps(out.to_json(), indent=1, default=float))
    _plots(scn, x, y, err, xs, curve, model_at, folder)
    atomic_text(folder / "fitted_scenario.toml", fitted_scenario_text(scn, res.values, res.free))
    atomic_text(folder / "fit_summary.md", fit_markdown(scn, out))
    return out


def _plots(scn, x, y, err, xs, curve, model_at, folder):
    plt = pyplot()
    spec = scn.fit
    f, u = SHOW[spec.quantity]
    col, unit = spec.axis, AXIS_COLUMNS[spec.axis]
    fig, ax = plt.subplots(figsize=(5.5, 4.0))
    ax.errorbar(x, y * f, yerr=None if err is None else err * f, fmt="o", label="data")
    ax.plot(xs, curve * f, "-", label="best fit")
    ax.set_xlabel(f"{col} ({unit})")
    ax.set_ylabel(f"{spec.quantity} ({u})")
    ax.legend()
    fig.tight_layout()
    atomic_figure(fig, folder / "fit_curve.png", dpi=110)
    plt.close(fig)
    fig, ax = plt.subplots(figsize=(5.5, 3.2))
    r = (y - model_at) / (err if err is not None else 1.0)
    ax.axhline(0, color="k", lw=0.6)
    ax.plot(x, r if err is not None else r * f, "o")
    ax.set_xlabel(f"{col} ({unit})")
    ax.set_ylabel("(data − model)/error" if err is not None else f"data − model ({u})")
    fig.tight_layout()
    atomic_figure(fig, folder / "fit_residuals.png", dpi=110)
    plt.close(fig)


def fit_markdown(scn, out) -> str:
    q, ax = out.quantity, out.axis
    lines = ["# Crosswind fit", "",
             f"Scenario `{Path(str(scn.path)).name}`; data `{Path(out.data_file).name}` ({out.points} points): "
             f"{OUTPUTS[q].long_name} against `{ax}`, model through the `crosswind run` device pipeline at k-mesh "
             f"level {out.resolution}.", "",
             "## Best-fit values", "", "| parameter | value | standard error | unit | start |", "|---|---|---|---|---|"]
    for k in out.free:
        err = "not meaningful (at a bound)" if k in out.at_bound else f"{out.stderr[k]:.3g}"
        lines.append(f"| `{k}` | {out.values[k]:.6g} | {err} | {out.units[k]} | {out.initial[k]:g} |")
    lines += ["", "Standard errors from the local covariance (JᵀJ)⁻¹"
              + (" with the data's standard errors (absolute)." if out.absolute_errors
                 else " scaled by χ²_red (no error column in the data)."), ""]
    if len(out.free) > 1:
        lines += ["## Correlation matrix", "", "| | " + " | ".join(f"`{k}`" for k in out.free) + " |",
                  "|---" * (len(out.free) + 1) + "|"]
        for k, row in zip(out.free, out.correlation):
            lines.append(f"| `{k}` | " + " | ".join(f"{c:+.3f}" for c in row) + " |")
        lines.append("")
    verdict = {"ok": "", "failed": "**FIT FAILED** (not converged); the values above are not a result.",
               "unreliable": "**FIT UNRELIABLE**: do not quote these values; reasons below."}[out.status]
    lines += ["## Fit quality", ""] + ([verdict, ""] if verdict else []) + [
              f"- {'converged' if out.converged else '**NOT converged**'}: {out.message}",
              f"- χ²_red = {out.chi2_reduced:.4g} ({out.dof} degrees of freedom), {out.nfev} model evaluations, "
              f"{out.starts} start(s)"]
    lines += [f"- **problem**: {w}" for w in out.problems]
    if out.identifiability_warnings:
        lines += [f"- identifiability: {w}" for w in out.identifiability_warnings]
    else:
        lines.append("- identifiability: no warnings (all |correlations| ≤ 0.99, JᵀJ well conditioned)")
    lines += ["", "Files: `fit_curve.png` (fitted curve over the data), `fit_residuals.png`, `fit.json`, "
              "`fitted_scenario.toml` (rerun with `crosswind run`).", ""]
    return "\n".join(lines)


def _run_scaling(scn, s, y, err, data_path, folder):
    try:
        sf = scaling_fit(s, y, err)
    except ValueError as exc:
        raise FitInputError(f"{data_path}: {exc}") from None
    make_folder(folder)
    out = ScalingReport(data_file=str(data_path), points=int(s.size),
                        coefficients=dict(zip(("c0", "c1", "c2"), sf.coefficients)),
                        stderr=dict(zip(("c0", "c1", "c2"), sf.stderr)), units=sf.units, meaning=sf.meaning,
                        correlation=np.asarray(sf.correlation).tolist(), chi2_reduced=sf.chi2_reduced, dof=sf.dof)
    atomic_text(folder / "fit.json", json.dumps(out.to_json(), indent=1, default=float))
    plt = pyplot()
    xs = np.linspace(float(np.min(s)), float(np.max(s)), 50)
    for name, (xv, yv, lab) in {"fit_curve.png": (xs, sf.predict(xs), "C0 + C1σ + C2σ²"),
                                "fit_residuals.png": (s, sf.residuals, "residual")}.items():
        fig, ax = plt.subplots(figsize=(5.5, 4.0))
        if name == "fit_curve.png":
            ax.errorbar(s, y, yerr=err, fmt="o", label="data")
        ax.plot(xv, yv, "-" if name == "fit_curve.png" else "o", label=lab)
        ax.set_xlabel("σ_xx (S)")
        ax.set_ylabel("E⊥/E∥² (m/V)")
        ax.legend()
        fig.tight_layout()
        atomic_figure(fig, folder / name, dpi=110)
        plt.close(fig)
    lines = ["# Crosswind scaling fit", "",
             f"Data `{Path(str(data_path)).name}` ({s.size} points): E⊥/E∥² = C0 + C1 σ_xx + C2 σ_xx² "
             "(Du et al., Nat. Commun. 10, 3047, 2019; Kang et al., Nat. Mater. 18, 324, 2019).", "",
             "| coefficient | value | standard error | unit | meaning |", "|---|---|---|---|---|"]
    for k, v, e in zip(("c0", "c1", "c2"), sf.coefficients, sf.stderr):
        lines.append(f"| {k.upper()} | {v:+.4e} | {e:.2e} | {sf.units[k]} | {sf.meaning[k]} |")
    lines += ["", f"χ²_red = {sf.chi2_reduced:.4g} ({sf.dof} degrees of freedom).", ""]
    atomic_text(folder / "fit_summary.md", "\n".join(lines))
    return out


# ------------------------------------------------------------------ writing the scenario back -
def _where(scn, knob, data):
    """(table path, key) where a knob lives in the scenario TOML."""
    if knob == "strain":
        return ("material", "strain"), "magnitude"
    if knob in ("temperature_K", "tau_fs", "gate_V", "density_cm2", "mu_eV"):
        return ("conditions",), knob
    if knob in ("tau0_fs", "exponent", "reference_energy_eV", "energy_scale_eV", "tau_impurity_fs",
                "tau_phonon_fs", "reference_temperature_K"):
        return ("conditions", "scattering"), knob
    if knob == "gate_offset_V":
        return ("device",), knob
    if knob == "current_angle_deg":
        return (("device",) if "current_angle_deg" in data.get("device", {}) else ("conditions",)), knob
    return ("material", "parameters"), knob


def fitted_scenario_text(scn, values, free) -> str:
    data = tomllib.loads(scn.text)
    for k in free:
        path, key = _where(scn, k, data)
        t = data
        for p in path:
            t = t.setdefault(p, {})
        t[key] = float(values[k])
    fitt = data.get("fit", {})
    for k in free:
        if k in fitt.get("parameters", {}):
            sp = fitt["parameters"][k]
            lo, hi = (sp.get("bounds") or [-math.inf, math.inf])
            sp["initial"] = float(min(max(values[k], lo), hi))
    if "data" in fitt:
        fitt["data"] = str(scn.fit.data)
    if scn.material.tight_binding is not None:
        data["material"]["tight_binding"] = str(scn.material.tight_binding)
    data.setdefault("output", {})["folder"] = "rerun"
    head = (f"# Scenario with best-fit values written back by `crosswind fit` ({', '.join(free)}).\n"
            f"# Rerun with: crosswind run fitted_scenario.toml\n")
    return head + scenario_toml(data)


__all__ = ["run_fit", "FitInputError", "FitReport", "ScalingReport", "predictor",
           "fitted_scenario_text", "AXIS_COLUMNS"]
