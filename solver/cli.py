"""The ``crosswind`` command line.

    crosswind run SCENARIO [--output DIR] [--no-progress]   run (or resume) a scenario file
    crosswind demo [--output DIR] [--no-progress]           run the built-in demonstration
    crosswind models                                        list the model catalogue
    crosswind validate                                      run the validation cases

``main(argv=None)`` returns the exit status (0 success, 1 failed validation or run, 2 bad input);
errors go to stderr.
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="crosswind", description="Berry-curvature transport in real devices: "
                                "band geometry, second-order Boltzmann response and Hall-bar voltages.")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    r = sub.add_parser("run", help="run (or resume) a scenario file",
                       description="Run the sweep of a scenario file (schema: docs/scenario-files.md). "
                                   "Finished batches are checkpointed; rerunning resumes.")
    r.add_argument("scenario", metavar="SCENARIO", help="scenario file (TOML)")
    r.add_argument("--output", "-o", metavar="DIR", help="output folder (default: [output] folder of the scenario)")
    r.add_argument("--no-progress", action="store_true", help="do not show progress on stderr")
    d = sub.add_parser("demo", help="run the built-in demonstration scenario",
                       description="Run a small built-in scenario (strained MoS2 Hall bar, gate and "
                                   "temperature sweep) and write results, figures and a summary.")
    d.add_argument("--output", "-o", metavar="DIR", default="crosswind-demo", help="output folder (default: %(default)s)")
    d.add_argument("--no-progress", action="store_true", help="do not show progress on stderr")
    sub.add_parser("models", help="list the model catalogue", description="List every catalogue model with its "
                   "Hamiltonian, source and parameters.")
    sub.add_parser("validate", help="run the validation cases",
                   description="Compare computed values with published or closed-form references; exit 1 if any fails.")
    return p


def _err(msg: str) -> None:
    print(f"crosswind: error: {msg}", file=sys.stderr)


def _run(scn, output, progress: bool) -> int:
    from .report import write_report
    from .run import RunError, run_scenario
    folder = Path(output) if output else scn.output_folder
    t0 = time.time()
    try:
        ds = run_scenario(scn, folder, progress=progress)
    except RunError as exc:
        _err(str(exc))
        return 2
    write_report(ds, scn, folder)
    print(f"crosswind: wrote {folder}/results.nc, results.csv, summary.md"
          + (" and figures" if scn.figures else "") + f" in {time.time() - t0:.1f} s")
    return 0


def cmd_run(args) -> int:
    from .scenario import ScenarioError, load_scenario
    try:
        scn = load_scenario(args.scenario)
    except ScenarioError as exc:
        _err(str(exc))
        return 2
    return _run(scn, args.output, not args.no_progress)


def cmd_demo(args) -> int:
    from .demo import SCENARIO
    from .scenario import parse_scenario
    scn = parse_scenario(SCENARIO, source="<built-in demo>", base=Path.cwd())
    return _run(scn, args.output, not args.no_progress)


def cmd_models(args) -> int:
    from crosswind.models import describe_catalogue
    print(describe_catalogue())
    return 0


def cmd_validate(args) -> int:
    try:
        from crosswind.validation import run_cases
    except ImportError as exc:
        _err(f"the validation cases are not available ({exc})")
        return 2
    rows = run_cases()
    head = ("case", "source", "expected", "computed", "tolerance", "passed")
    table = [[str(r.get(h, "")) if not isinstance(r.get(h), float) else f"{r[h]:.6g}" for h in head] for r in rows]
    widths = [max(len(h), *(len(t[i]) for t in table)) if table else len(h) for i, h in enumerate(head)]
    widths[1] = min(widths[1], 48)
    fmt = lambda cells: "  ".join(c[:w].ljust(w) for c, w in zip(cells, widths))
    print(fmt(head))
    print(fmt(["-" * w for w in widths]))
    for t in table:
        print(fmt(t))
    failed = [r for r in rows if not r.get("passed")]
    print(f"\n{len(rows) - len(failed)} of {len(rows)} cases passed")
    return 1 if failed else 0


def main(argv=None) -> int:
    parser = _parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:       # --help (0) or a usage error (2)
        return int(exc.code or 0)
    if args.command is None:
        parser.print_help(sys.stderr)
        return 2
    return {"run": cmd_run, "demo": cmd_demo, "models": cmd_models, "validate": cmd_validate}[args.command](args)


if __name__ == "__main__":
    sys.exit(main())
