"""Sensitivities of the 2ω signal at its peak to the scenario's knobs (the ``[sensitivities]`` table).

After a sweep, the grid point where |V_y^2ω| is largest is taken (the peak of ``summary.md``) and
the derivative of |V_y^2ω| with respect to every requested knob is computed by forward-mode
automatic differentiation (``jax.jvp``) through the whole device pipeline of
:mod:`crosswind.solver.study.chain` — strain magnitude → strain components → model, gate → density →
μ (implicit derivative of the density solve), scattering → response → Hall bar.  The change per
step is the linear estimate derivative × step.

Accuracy: derivatives are taken on a fixed k-mesh (``[sensitivities] resolution``; default the
run's fixed level, else 2).  Derivative integrands are sharper than the values, so level ≥ 2 is
more accurate for derivatives than the level-1 mesh that is often enough for the values
(:mod:`crosswind.solver.engine.sensitivity`).  Knobs that move the k-mesh placement (μ, temperature for
continuum models) are differentiated at fixed nodes.
"""
from __future__ import annotations

import csv
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np

from crosswind.solver.engine.sensitivity import SensitivityRow
from crosswind.solver.reporting.report import peak_index
from crosswind.solver.study.chain import evaluate
from crosswind.solver.study.files import atomic_write
from crosswind.solver.study.knobs import base_values, scenario_knobs


def peak_values(scn, ds) -> dict:
    """Concrete knob values at the grid point of the largest |V_y^2ω|."""
    idx = peak_index(ds)
    at = {}
    for a in scn.axes:
        if a.name in idx and ds.sizes[a.name] > 1 and a.name != "current_angle_deg":
            at[a.name] = float(ds[a.name].values[idx[a.name]])
    if "current_angle_deg" in idx:
        at["current_angle_deg"] = float(ds["current_angle_deg"].values[idx["current_angle_deg"]])
    return base_values(scn, at, who="[sensitivities]")


def peak_sensitivities(scn, ds) -> list[SensitivityRow]:
    """Rows (knob, step, change of |V_y^2ω| in V, unit, derivative, relative), largest |change| first."""
    spec = scn.sensitivities
    base = peak_values(scn, ds)
    x = {k: jnp.asarray(v, dtype=jnp.float64) for k, v in base.items()}
    f = lambda xx: evaluate(scn, xx, resolution=spec.resolution).V2w[0]
    units = scenario_knobs(scn)
    rows = []
    for knob, step in spec.steps:
        t = {k: jnp.zeros((), jnp.float64) for k in x}
        t[knob] = jnp.ones((), jnp.float64)
        value, d = jax.jvp(f, (x,), (t,))
        value, d = float(value), float(d)
        change = d * step
        rows.append(SensitivityRow(knob, float(step), change, units[knob], d,
                                   change / value if value != 0 else float("nan")))
    rows.sort(key=lambda r: -abs(r.change) if np.isfinite(r.change) else 0.0)
    return rows


def write_csv(rows, path: Path):
    """``sensitivities.csv``, written atomically."""
    def write(tmp):
        with open(tmp, "w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh)
            w.writerow(["knob", "step", "knob unit", "change of V2w_y_amplitude [V]",
                        "derivative [V per knob unit]", "relative change [1]"])
            for r in rows:
                w.writerow([r.knob, f"{r.step:.10g}", r.unit, f"{r.change:.10g}", f"{r.derivative:.10g}",
                            f"{r.relative:.10g}"])
    atomic_write(path, write)


def markdown(rows, resolution: int) -> str:
    lines = ["## Which knobs move the 2ω signal most at its peak", "",
             f"Change of |V_y^2ω| at the peak for the given step of each knob (linear estimate from the "
             f"derivative by automatic differentiation through the whole device pipeline, fixed k-mesh level "
             f"{resolution}{'; level ≥ 2 is more accurate for derivatives' if resolution < 2 else ''}); "
             "largest first. Numbers also in `sensitivities.csv`.", "",
             "| knob | step | change of V_y^2ω (nV) | relative change |", "|---|---|---|---|"]
    for r in rows:
        unit = "" if r.unit == "1" else f" {r.unit}"
        lines.append(f"| `{r.knob}` | {r.step:g}{unit} | {r.change * 1e9:+.4g} | {r.relative:+.3g} |")
    return "\n".join(lines) + "\n"


def write_sensitivities(scn, ds, folder) -> str:
    """Compute the table at the peak, write ``sensitivities.csv`` and return its Markdown section
    for ``summary.md`` (:func:`crosswind.solver.reporting.report.write_report` places it)."""
    rows = peak_sensitivities(scn, ds)
    write_csv(rows, Path(folder) / "sensitivities.csv")
    return markdown(rows, scn.sensitivities.resolution)


__all__ = ["peak_sensitivities", "write_sensitivities", "peak_values"]
