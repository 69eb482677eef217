"""The ``crosswind`` command line.

    crosswind run SCENARIO [--output DIR] [--no-progress] [--cluster ADDRESS]   run (or resume) a scenario file
    crosswind fit SCENARIO --data FILE [--output DIR] [--starts N] [--cluster ADDRESS]   fit the [fit] parameters
    crosswind design SCENARIO [--output DIR] [--starts N]  optimise the [design] knobs (docs/design.md)
    crosswind demo [--output DIR] [--no-progress] [--fit]    run the built-in demonstration
    crosswind models                                        list the model catalogue
    crosswind validate [--wide] [--markdown FILE]           run the validation cases (sources in full)

``main(argv=None)`` returns the exit status (0 success, 1 failed validation or run, 2 bad input,
130 interrupted by Ctrl-C: ``run`` says how to resume); errors go to stderr, one line each.
"""
from __future__ import annotations

import argparse
import contextlib
import shutil
import sys
import textwrap
import time
import warnings
from pathlib import Path

import crosswind.validation as validation
from crosswind import __version__
from crosswind.models import describe_catalogue
from crosswind.solver.demo import SCENARIO, run_demo_fit
from crosswind.solver.fitting import scenario_fit
from crosswind.solver.fitting.peak_sensitivity import write_sensitivities
from crosswind.solver.fitting.scenario_fit import FitInputError
from crosswind.solver.reporting.report import write_report
from crosswind.solver.study import cluster, sweep
from crosswind.solver.study import design as device_design
from crosswind.solver.study.files import OutputError, atomic_text
from crosswind.solver.study.scenario import ScenarioError, ScenarioWarning, load_scenario, parse_scenario
from crosswind.solver.study.sweep import RunError


def _cluster_options(parser, what: str) -> None:
    parser.add_argument("--cluster", nargs="?", const="local", metavar="ADDRESS",
                        help=f"run {what} on a Dask cluster (pip install \"crosswind[cluster]\"): 'local' or 'local:N' "
                             "starts N single-threaded worker processes on this machine (loopback only; 'local': one "
                             "per core), tcp://host:port connects to a running scheduler, 'off' runs here; default: "
                             f"${cluster.ENV}, else here (docs/cluster.md)")
    parser.add_argument("--dashboard", metavar="HOST:PORT", help="with --cluster local[:N]: serve the Dask dashboard "
                        "at this address, e.g. 127.0.0.1:8787 (default: no dashboard)")


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="crosswind", description="Berry-curvature transport in real devices: "
                                "band geometry, second-order Boltzmann response and Hall-bar voltages.")
    p.add_argument("--version", action="version", version=f"crosswind {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    r = sub.add_parser("run", help="run (or resume) a scenario file",
                       description="Run the sweep of a scenario file (schema: docs/scenario-files.md). "
                                   "Finished batches are checkpointed; rerunning resumes.")
    r.add_argument("scenario", metavar="SCENARIO", help="scenario file (TOML)")
    r.add_argument("--output", "-o", metavar="DIR", help="output folder (default: [output] folder of the scenario)")
    r.add_argument("--no-progress", action="store_true", help="do not show progress on stderr")
    _cluster_options(r, "the batches")
    f = sub.add_parser("fit", help="fit a scenario's [fit] parameters to measurements",
                       description="Fit the free parameters of the scenario's [fit] table to a CSV file of "
                                   "measurements (docs/fitting.md) and write fit_summary.md, fit.json, plots and "
                                   "fitted_scenario.toml.")
    f.add_argument("scenario", metavar="SCENARIO", help="scenario file (TOML) with a [fit] table")
    f.add_argument("--data", "-d", metavar="FILE", help="measurements (CSV with 'name [unit]' columns); "
                   "default: [fit] data")
    f.add_argument("--output", "-o", metavar="DIR", help="output folder (default: fit-<scenario name> next to it)")
    f.add_argument("--starts", type=int, metavar="N", help="number of starting points (default: [fit] starts)")
    f.add_argument("--progress", action="store_true", default=None,
                   help="show each iteration (cost, parameter values) on stderr; default: when stderr is a terminal")
    f.add_argument("--no-progress", dest="progress", action="store_false", help="do not show the iterations")
    _cluster_options(f, "the starting points (--starts N) in parallel")
    g = sub.add_parser("design", help="optimise a device's knobs for a measurable 2ω signal",
                       description="Maximise the scenario's [design] objective (SNR, amplitude or dipole share of "
                                   "the transverse 2ω signal) over its free knobs within their bounds and limits, by "
                                   "gradients through the evaluation chain (docs/design.md); write design_summary.md, "
                                   "design.json, design_map.png and optimal_scenario.toml.")
    g.add_argument("scenario", metavar="SCENARIO", help="scenario file (TOML) with a [design] table")
    g.add_argument("--output", "-o", metavar="DIR", help="output folder (default: design-<scenario name> next to it)")
    g.add_argument("--starts", type=int, metavar="N", help="number of starting points (default: [design] starts)")
    g.add_argument("--no-progress", action="store_true", help="do not show one line per start on stderr")
    d = sub.add_parser("demo", help="run the built-in demonstration scenario",
                       description="Run a small built-in scenario (strained MoS2 Hall bar, gate and "
                                   "temperature sweep) and write results, figures and a summary.")
    d.add_argument("--output", "-o", metavar="DIR", default="crosswind-demo",
                   help="output folder (default: %(default)s)")
    d.add_argument("--no-progress", action="store_true", help="do not show progress on stderr")
    d.add_argument("--fit", action="store_true", help="also fit invented measurements (generated from the demo "
                   "model plus noise) and report the recovered parameters (adds minutes)")
    sub.add_parser("models", help="list the model catalogue", description="List every catalogue model with its "
                   "Hamiltonian, source and parameters.")
    v = sub.add_parser("validate", help="run the validation cases",
                       description="Compare computed values with published or closed-form references; exit 1 if "
                                   "any fails. The source column is wrapped to the terminal, never cut.")
    v.add_argument("--wide", action="store_true", help="print each source on one line (no wrapping)")
    v.add_argument("--markdown", metavar="FILE", help="also write the table as Markdown to FILE")
    v.add_argument("--no-progress", action="store_true", help="do not show per-case progress on stderr")
    return p


def _err(msg: str) -> None:
    print(f"crosswind: error: {msg}", file=sys.stderr)


def _say_if_outside(folder: Path, scn) -> None:
    """First line of output when results go outside the scenario file's folder (e.g. ``../../x``)."""
    home = Path(str(scn.path)).resolve().parent
    where = folder.resolve()
    if Path(str(scn.path)).is_file() and home != where and home not in where.parents:
        print(f"crosswind: writing results to {where} (outside the scenario's folder {home})", flush=True)


def _cluster_client(args):
    """A context giving the Dask client asked for by ``--cluster`` (else ``$CROSSWIND_CLUSTER``), or
    ``None``; connecting happens on entry, before anything is written."""
    address = args.cluster if getattr(args, "cluster", None) is not None else cluster.address_from_environment()
    if cluster.parse_address(address) is None:
        if getattr(args, "dashboard", None):
            raise cluster.ClusterError("--dashboard needs --cluster local or local:N")
        return contextlib.nullcontext(None)
    if getattr(args, "dashboard", None) and cluster.parse_address(address)[0] != "local":
        raise cluster.ClusterError("--dashboard is for a local cluster; a running scheduler serves its own dashboard")
    return cluster.open_client(address, dashboard=getattr(args, "dashboard", None))


def _run(scn, output, progress: bool, args=None) -> int:
    folder = Path(output) if output else scn.output_folder
    _say_if_outside(folder, scn)
    t0 = time.time()
    try:
        with _cluster_client(args) as client:
            ds = sweep.run_scenario(scn, folder, progress=progress, client=client)
        if progress:
            print("crosswind: writing " + ("figures and " if scn.figures else "") + "summary…", file=sys.stderr,
                  flush=True)
        extra, sections = "", []
        if scn.sensitivities is not None:
            sections.append(write_sensitivities(scn, ds, folder))
            extra = ", sensitivities.csv"
        write_report(ds, scn, folder, sections)
    except (RunError, OutputError, cluster.ClusterError) as exc:
        _err(str(exc))
        return 2
    except KeyboardInterrupt:
        print(f"\ncrosswind: interrupted; finished batches are checkpointed in {folder}: run the same "
              "command again to resume", file=sys.stderr)
        return 130
    print(f"crosswind: wrote {folder}/results.nc, results.csv, summary.md{extra}"
          + (" and figures" if scn.figures else "") + f" in {time.time() - t0:.1f} s")
    line = _headline_line(folder / "summary.md")
    if line:
        print(f"crosswind: {line}")
    return 0


def _headline_line(path: Path) -> str:
    """The first sentence of the summary's headline (the 2ω result, or why it is zero), plain text."""
    try:
        text = path.read_text(encoding="utf-8")
        para = text.split("## Where the second-harmonic signal peaks", 1)[1].strip().split("\n\n")[0]
    except (OSError, IndexError):
        return ""
    para = para.replace("**", "")
    if para.startswith("The transverse 2ω voltage is largest at"):
        return "2ω transverse signal " + para.split(": ", 1)[1].split(" for a drive")[0] + " at " \
            + para.split(" is largest at ", 1)[1].split(": ", 1)[0]
    return para.split(". ")[0] + "."


def _load(path):
    """Load a scenario; its plausibility warnings are printed as one ``crosswind: warning:`` line each."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ScenarioWarning)
        scn = load_scenario(path)
    for line in scn.cautions:
        print(f"crosswind: warning: {line}", file=sys.stderr, flush=True)
    return scn


def cmd_fit(args) -> int:
    try:
        scn = _load(args.scenario)
    except ScenarioError as exc:
        _err(str(exc))
        return 2
    if scn.fit is None:
        _err(f"{args.scenario}: no [fit] table; add one (docs/fitting.md)")
        return 2
    data = args.data or scn.fit.data
    if data is None:
        _err(f"{args.scenario}: no data file; pass --data FILE or set [fit] data")
        return 2
    if args.starts is not None and args.starts < 1:
        _err("--starts must be >= 1")
        return 2
    default = Path(args.scenario).resolve().parent / f"fit-{Path(args.scenario).stem}"
    folder = Path(args.output) if args.output else default
    t0 = time.time()
    try:
        show = sys.stderr.isatty() if args.progress is None else args.progress
        one_start = (args.starts or scn.fit.starts) == 1 or scn.fit.scaling     # nothing to spread over workers
        with contextlib.nullcontext(None) if one_start else _cluster_client(args) as client:
            out = scenario_fit.run_fit(scn, data, folder, starts=args.starts, client=client,
                          progress=(lambda line: print(f"crosswind: fit {line}", file=sys.stderr, flush=True)) if show
                          else None)
    except (FitInputError, OutputError, cluster.ClusterError) as exc:
        _err(str(exc))
        return 2
    print(f"crosswind: wrote {folder}/fit_summary.md, fit.json, fit_curve.png, fit_residuals.png"
          + ("" if out.scaling else ", fitted_scenario.toml") + f" in {time.time() - t0:.1f} s")
    status = out.status
    if status != "ok":
        why = out.message if status == "failed" else "; ".join(out.problems)
        verdict = {"failed": "the fit failed", "unreliable": "the fit is unreliable"}[status]
        _err(f"{verdict}: {why} (details in {folder}/fit_summary.md)")
        return 1
    return 0


def cmd_design(args) -> int:
    try:
        scn = _load(args.scenario)
    except ScenarioError as exc:
        _err(str(exc))
        return 2
    if getattr(scn, "design", None) is None:
        _err(f"{args.scenario}: no [design] table; add one (docs/design.md)")
        return 2
    if args.starts is not None and args.starts < 1:
        _err("--starts must be >= 1")
        return 2
    folder = (Path(args.output) if args.output
              else Path(args.scenario).resolve().parent / f"design-{Path(args.scenario).stem}")
    t0 = time.time()
    show = None if args.no_progress else (lambda line: print(f"crosswind: design {line}", file=sys.stderr, flush=True))
    try:
        out = device_design.run_design(scn, folder, starts=args.starts, progress=show)
    except OutputError as exc:
        _err(str(exc))
        return 2
    print(f"crosswind: wrote {folder}/design_summary.md, design.json, optimal_scenario.toml"
          + (", design_map.png" if out.map is not None else "") + f" in {time.time() - t0:.1f} s")
    print(f"crosswind: {out.verdict} at the optimum: {out.objective} = {out.objective_value:.4g} "
          + ", ".join(f"{k.name} = {k.value:.4g}" for k in out.knobs))
    if not out.success:
        _err(f"the design did not converge: {out.message} (details in {folder}/design_summary.md)")
        return 1
    return 0


def cmd_run(args) -> int:
    try:
        scn = _load(args.scenario)
    except ScenarioError as exc:
        _err(str(exc))
        return 2
    return _run(scn, args.output, not args.no_progress, args)


def cmd_demo(args) -> int:
    scn = parse_scenario(SCENARIO, source="<built-in demo>", base=Path.cwd())
    rc = _run(scn, args.output, not args.no_progress)
    if rc != 0 or not args.fit:
        return rc
    t0 = time.time()
    try:
        run_demo_fit(Path(args.output))
    except OutputError as exc:
        _err(str(exc))
        return 2
    print(f"crosswind: demo fit to invented measurements written to {args.output}/fit in {time.time() - t0:.1f} s")
    return 0


def cmd_models(args) -> int:
    print(describe_catalogue())
    return 0


def _validation_progress(i: int, n: int, name: str, seconds: float | None) -> None:
    if seconds is None:
        print(f"crosswind: validation case {i}/{n}: {name} …", file=sys.stderr, flush=True)
    else:
        print(f"crosswind: validation case {i}/{n}: {name} done in {seconds:.1f} s", file=sys.stderr, flush=True)


VALIDATE_HEAD = ("case", "source", "expected", "computed", "tolerance", "passed")


def _cell(r, h) -> str:
    v = r.get(h, "")
    return f"{v:.6g}" if isinstance(v, float) else str(v)


def validation_table(rows, width: int | None = None, wide: bool = False) -> str:
    """The validation table for a terminal: every column in full; the source column (the published
    source is the point of the table) is wrapped at word boundaries to fit ``width`` characters,
    never cut (``wide``: one line per case)."""
    table = [[_cell(r, h) for h in VALIDATE_HEAD] for r in rows]
    widths = [max(len(h), *(len(t[i]) for t in table)) if table else len(h) for i, h in enumerate(VALIDATE_HEAD)]
    if not wide:
        width = width or shutil.get_terminal_size((120, 24)).columns
        room = width - sum(w for i, w in enumerate(widths) if i != 1) - 2 * (len(widths) - 1)
        widths[1] = max(24, min(widths[1], room))
    fmt = lambda cells: "  ".join(c.ljust(w) for c, w in zip(cells, widths)).rstrip()
    lines = [fmt(VALIDATE_HEAD), fmt(["-" * w for w in widths])]
    for t in table:
        src = [t[1]] if wide else (textwrap.wrap(t[1], widths[1], break_long_words=False, break_on_hyphens=False)
                                   or [""])
        lines.append(fmt([t[0], src[0], *t[2:]]))
        lines += [fmt(["", more] + [""] * (len(widths) - 2)) for more in src[1:]]
    return "\n".join(lines)


def validation_markdown(rows) -> str:
    esc = lambda c: c.replace("|", "\\|")
    lines = ["| " + " | ".join(VALIDATE_HEAD) + " |", "|" + "---|" * len(VALIDATE_HEAD)]
    lines += ["| " + " | ".join(esc(_cell(r, h)) for h in VALIDATE_HEAD) + " |" for r in rows]
    return "\n".join(lines) + "\n"


def cmd_validate(args) -> int:
    rows = validation.run_cases(progress=None if getattr(args, "no_progress", False) else _validation_progress)
    print(validation_table(rows, wide=getattr(args, "wide", False)))
    failed = [r for r in rows if not r.get("passed")]
    print(f"\n{len(rows) - len(failed)} of {len(rows)} cases passed")
    if getattr(args, "markdown", None):
        atomic_text(Path(args.markdown), validation_markdown(rows))
        print(f"crosswind: wrote the table to {args.markdown}")
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
    commands = {"run": cmd_run, "fit": cmd_fit, "design": cmd_design, "demo": cmd_demo, "models": cmd_models,
                "validate": cmd_validate}
    try:
        return commands[args.command](args)
    except KeyboardInterrupt:
        print("\ncrosswind: interrupted (exit 130)", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
