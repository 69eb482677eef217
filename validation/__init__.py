"""Validation cases (data + sources) run by ``crosswind validate`` and by the test suite.

Each case in ``cases.toml`` names its published source; expected values are closed forms,
handbook constants or independent scipy quadratures (``references.py``), never solver output.
"""
from __future__ import annotations

import re
import time
import tomllib
from importlib import resources

import numpy as np

from crosswind.models import build
from crosswind.solver.engine.response import response

from . import references


def load_cases():
    text = resources.files(__name__).joinpath("cases.toml").read_text(encoding="utf-8")
    return tomllib.loads(text)["case"]


def _pick(r, quantity):
    m = re.fullmatch(r"([a-z_]+)(?:\.([a-z]+))?(?:\[([0-9, ]+)\])?", quantity)
    if not m:
        raise ValueError(f"validation: cannot read quantity '{quantity}'")
    name, part, idx = m.groups()
    val = getattr(r, name)
    if part:
        val = getattr(val, part)          # a χ part: "chi_parts.drude"
    val = np.asarray(val)
    if idx:
        val = val[tuple(int(i) for i in idx.split(","))]
    return complex(val).real


def evaluate_case(case) -> dict:

    cond = dict(case["conditions"])
    if isinstance(cond.get("mu"), str):
        cond["mu"] = getattr(references, cond["mu"])(case["params"])
    kwargs = dict(mu=cond["mu"], temperature=cond["temperature"], tau=cond["tau"],
                  frequency=cond.get("frequency", 0.0), rtol=case.get("solver_rtol", 1e-3),
                  engine=case.get("engine", "mesh"), resolution=case.get("resolution"))
    r = response(build(case["model"], **case["params"]), **kwargs)
    value = _pick(r, case["quantity"])
    if "ratio_to" in case:
        r2 = response(build(case["model"], **case["ratio_to"]), **kwargs)
        value = value / _pick(r2, case["quantity"])
    if "reference" in case:
        expected = float(getattr(references, case["reference"])(case["params"], cond))
    else:
        expected = float(case["expected"])
    rtol, atol = case.get("rtol", 0.0), case.get("atol", 0.0)
    passed = abs(value - expected) <= atol + rtol * abs(expected)
    return {"case": case["name"], "source": case["source"], "expected": expected, "computed": value,
            "tolerance": f"rtol {rtol:g}" if rtol else f"atol {atol:g}", "passed": bool(passed)}


def run_cases(names=None, progress=None) -> list[dict]:
    """Evaluate every case (or those named) and return table rows.  ``progress(i, n, name, seconds)``,
    when given, is called before each case (``seconds`` None) and after it (its wall time)."""
    cases = [c for c in load_cases() if not names or c["name"] in names]
    rows = []
    for i, case in enumerate(cases, 1):
        if progress:
            progress(i, len(cases), case["name"], None)
        t0 = time.perf_counter()
        rows.append(evaluate_case(case))
        if progress:
            progress(i, len(cases), case["name"], time.perf_counter() - t0)
    return rows


def format_table(rows) -> str:
    head = f"{'case':<38} {'expected':>14} {'computed':>14} {'tolerance':>11}  pass  source"
    lines = [head, "-" * len(head)]
    for r in rows:
        lines.append(f"{r['case']:<38} {r['expected']:>14.6e} {r['computed']:>14.6e} {r['tolerance']:>11}  "
                     f"{'yes' if r['passed'] else 'NO ':<4}  {r['source']}")
    return "\n".join(lines)
