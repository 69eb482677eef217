"""The ``crosswind`` command line: help, exit codes, errors on stderr, a small run and the demo."""
import subprocess
import sys
from pathlib import Path

import pytest
from test_scenario import GOOD

import crosswind.validation
from crosswind.solver.cli import main


@pytest.mark.parametrize("argv", [["--help"], ["run", "--help"], ["demo", "--help"], ["models", "--help"],
                                  ["validate", "--help"], ["fit", "--help"], ["design", "--help"]])
def test_help_on_every_command(argv, capsys):
    assert main(argv) == 0
    assert "usage: crosswind" in capsys.readouterr().out


def test_usage_errors_exit_2(capsys):
    assert main([]) == 2
    assert main(["frobnicate"]) == 2
    assert "invalid choice" in capsys.readouterr().err


def test_bad_scenario_reports_on_stderr_and_writes_nothing(tmp_path, capsys):
    p = tmp_path / "bad.toml"
    p.write_text(GOOD.replace("width_um", "widht_um"), encoding="utf-8")
    assert main(["run", str(p), "--output", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err
    assert "Did you mean 'width_um'" in err and str(p) in err
    assert not (tmp_path / "o").exists() and not (tmp_path / "out").exists()
    assert main(["run", str(tmp_path / "missing.toml")]) == 2
    assert "scenario file not found" in capsys.readouterr().err


def test_models_lists_the_catalogue(capsys):
    assert main(["models"]) == 0
    out = capsys.readouterr().out
    assert "massive-dirac" in out and "tmd" in out


def test_validate_exit_status_follows_the_cases(monkeypatch, capsys):
    rows = [{"case": "a", "source": "s", "expected": 1.0, "computed": 1.0, "tolerance": 1e-6, "passed": True}]
    monkeypatch.setattr(crosswind.validation, "run_cases", lambda **kw: rows)
    assert main(["validate"]) == 0
    assert "1 of 1 cases passed" in capsys.readouterr().out
    rows.append({"case": "b", "source": "s", "expected": 1.0, "computed": 2.0, "tolerance": 1e-6, "passed": False})
    assert main(["validate"]) == 1


def test_small_run_writes_results_figures_and_summary(tmp_path, capsys):
    p = tmp_path / "s.toml"
    p.write_text(GOOD.replace("figures = false", "figures = true"), encoding="utf-8")
    assert main(["run", str(p), "--no-progress"]) == 0
    out = tmp_path / "out"
    for name in ("results.nc", "results.csv", "summary.md", "bands.png", "curvature_map.png", "responses.png",
                 "angle.png", "scaling.png", "scenario.toml"):
        assert (out / name).exists(), name
    summary = (out / "summary.md").read_text(encoding="utf-8")
    assert "nV amplitude" in summary and "Berry-curvature dipole" in summary and "safety rules" in summary


def test_console_script_help():
    exe = Path(sys.executable).with_name("crosswind")
    cmd = [str(exe), "--help"] if exe.exists() else [sys.executable, "-m", "crosswind.solver.cli", "--help"]
    res = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    assert res.returncode == 0 and "demo" in res.stdout


@pytest.mark.slow
def test_demo_runs(tmp_path):
    assert main(["demo", "--output", str(tmp_path / "demo"), "--no-progress"]) == 0
    assert (tmp_path / "demo" / "summary.md").exists() and (tmp_path / "demo" / "scaling.png").exists()


def test_version_is_the_package_version(capsys):
    import crosswind
    assert main(["--version"]) == 0
    assert capsys.readouterr().out.strip() == f"crosswind {crosswind.__version__}"
    assert crosswind.__version__ not in ("", "0+unknown")
