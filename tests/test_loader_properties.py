"""Property-based checks of the three file loaders (issue 10, item 11): random mutations of valid
scenario, tight-binding and measurement files must give a result or the project's own error type
(``ScenarioError``, ``TightBindingFileError``, ``FitInputError``; all ``ValueError`` subclasses whose
message names the file), never another exception type or a hang, and loading writes nothing.

Mutations: delete, duplicate or swap lines, replace a number or a value by a hostile token (nan,
inf, 1e308, -1, 0, a string, a table, an array), insert or delete characters, truncate, and
non-UTF-8 bytes for the file readers.  Deterministic (``derandomize=True``) with a small number of
examples, so the suite is repeatable in CI."""
import os
import re
import signal
import tempfile
from contextlib import contextmanager
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from test_bad_inputs import fake_device_fields

from crosswind.models.tightbinding import TightBindingFileError, data_file, load_tight_binding, parse_tight_binding
from crosswind.solver.fitting.scenario_fit import FitInputError, load_data
from crosswind.solver.study.scenario import Scenario, ScenarioError, load_scenario, parse_scenario

SETTINGS = settings(max_examples=int(os.environ.get("CROSSWIND_FUZZ_EXAMPLES", "150")), deadline=None, derandomize=True, database=None,
                    suppress_health_check=[HealthCheck.too_slow])
HANG_S = 30          # one load taking longer than this is a hang

SCN = """\
# a scenario as a user writes it
[material]
model = "massive-dirac"
[material.parameters]
velocity = 5e5
mass = 0.1
tilt = 5e4

[device]
width_um = 4
length_um = 8
current_uA = 1
frequency_Hz = 17

[conditions]
mu_eV = [0.13, 0.15]
temperature_K = [5, 20]
current_angle_deg = [0, 90]
[conditions.scattering]
kind = "power-law"
tau0_fs = 100
exponent = 1.0

[numerics]
resolution = 0
rtol = 1e-3

[output]
folder = "results"
figures = false

[fit]
quantity = "V2w"
axis = "mu_eV"
parameters = {tilt = {initial = 3e4, bounds = [1e4, 1e5]}}
"""

TB = """\
model = { name = "chain", dimension = 2 }
lattice = { vectors = [[2.0, 0.0], [0.0, 3.0]] }
orbital = [{ label = "a", position = [0.0, 0.0], onsite = 0.1 },
           { label = "b", position = [1.0, 0.0], onsite = -0.1 }]
hop = [{ from = "a", to = "b", cell = [0, 0], amplitude = -1.0 },
       { from = "b", to = "a", cell = [1, 0], amplitude = -0.8 },
       { from = "a", to = "a", cell = [0, 1], amplitude = { scale = 0.2 } }]
"""

CSV = """\
# measured 2w voltage
mu [eV], V2w [nV], V2w_err [nV]
0.12, 1.5, 0.1
0.135, 2.25, 0.1
0.15, 3.0, 0.2
0.165, 2.5, 0.2
"""

TOKENS = ("nan", "inf", "-inf", "1e308", "-1e308", "1e-320", "-1", "0", "0.0", "-0", '"x"', "''", "[]", "{}",
          "[1, 2, 3]", "{a = 1}", "true", "false", '"nan"', "1_000", "0x10", "1979-05-27", "=", "[", "]", "{",
          '"', ",", "#", "\\", "é", "\u00a0", "\x00", "9" * 400)
NUMBER = re.compile(r"(?<![\w.])[-+]?\d+(?:\.\d*)?(?:[eE][-+]?\d+)?(?![\w.])")


def _mutate(data, text: str) -> str:
    """One to three random edits of ``text``."""
    for _ in range(data.draw(st.integers(1, 3), label="edits")):
        lines = text.split("\n")
        op = data.draw(st.sampled_from(["delete_line", "duplicate_line", "swap_lines", "number", "value",
                                        "insert", "delete_span", "truncate"]), label="op")
        if op in ("delete_line", "duplicate_line", "swap_lines"):
            i = data.draw(st.integers(0, len(lines) - 1), label="line")
            if op == "delete_line":
                del lines[i]
            elif op == "duplicate_line":
                lines.insert(i, lines[i])
            else:
                j = data.draw(st.integers(0, len(lines) - 1), label="other line")
                lines[i], lines[j] = lines[j], lines[i]
            text = "\n".join(lines)
        elif op == "number":
            spots = list(NUMBER.finditer(text))
            if spots:
                m = spots[data.draw(st.integers(0, len(spots) - 1), label="number")]
                new = data.draw(st.one_of(st.sampled_from(TOKENS),
                                          st.floats(allow_nan=False, allow_infinity=False).map(repr),
                                          st.integers(-10 ** 30, 10 ** 30).map(str)), label="replacement")
                text = text[:m.start()] + new + text[m.end():]
        elif op == "value":
            spots = [m for m in re.finditer(r"= *([^\n,}\]]+)", text)]
            if spots:
                m = spots[data.draw(st.integers(0, len(spots) - 1), label="value")]
                new = data.draw(st.sampled_from(TOKENS), label="token")
                text = text[:m.start(1)] + new + text[m.end(1):]
        elif op == "insert":
            i = data.draw(st.integers(0, len(text)), label="at")
            text = text[:i] + data.draw(st.text(max_size=4), label="chars") + text[i:]
        elif op == "delete_span":
            i = data.draw(st.integers(0, max(0, len(text) - 1)), label="from")
            text = text[:i] + text[i + data.draw(st.integers(1, 12), label="length"):]
        else:
            text = text[:data.draw(st.integers(0, len(text)), label="keep")]
    return text


@contextmanager
def _no_hang():
    def alarm(signum, frame):
        raise TimeoutError(f"a load took longer than {HANG_S} s")
    old = signal.signal(signal.SIGALRM, alarm)
    signal.alarm(HANG_S)
    try:
        yield
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, old)


def _outcome(load, own: type, name: str):
    """``load()``'s result, or its exception if it is the project's own type with a message naming
    the file; any other exception fails the test with the input that caused it."""
    with _no_hang():
        try:
            return load()
        except own as exc:
            msg = str(exc)
            assert msg and name in msg, f"{type(exc).__name__} without the file name: {msg!r}"
            assert "Traceback" not in msg
            return exc


def _files(folder: Path):
    return sorted(p.relative_to(folder) for p in folder.rglob("*"))


@contextmanager
def _empty_dir():
    with tempfile.TemporaryDirectory(prefix="crosswind-load-") as d:
        yield Path(d)


def test_the_valid_files_load(tmp_path):
    """The unmutated files are valid (otherwise every mutation below would only test refusals)."""
    assert isinstance(parse_scenario(SCN, source="s.toml", base=tmp_path), Scenario)
    assert parse_tight_binding(TB, source="t.toml").n_bands == 2
    (tmp_path / "d.csv").write_text(CSV, encoding="utf-8")
    x, y, err = load_data(parse_scenario(SCN, source="s.toml", base=tmp_path), tmp_path / "d.csv")
    assert x.shape == y.shape == err.shape == (4,)


@pytest.mark.parametrize("which, old, new, match", [
    ("scenario", 'kind = "power-law"', "kind = []", r"s\.toml: \[conditions\.scattering\] key 'kind': unknown or missing kind \[\]"),
    ("scenario", "mass = 0.1", "mass = " + "9" * 400, r"s\.toml: \[material\.parameters\]"),
    ("tb", "amplitude = -1.0", "amplitude = " + "9" * 400, r"t\.toml: table \[\[hop\]\] #1, key 'amplitude'"),
    ("tb", "cell = [1, 0]", "cell = [1, " + "9" * 400 + "]", r"t\.toml: table \[\[hop\]\] #2, key 'cell'"),
    ("tb", TB[TB.index("hop = "):], "", r"t\.toml: table \[\[hop\]\]: no hops.*Add at least one \[\[hop\]\]"),
    ("tb", "[0.0, 3.0]]", "[0.0, 3e300]]", r"t\.toml: table \[lattice\], key 'vectors': a lattice vector is longer than 1e\+06 Å"),
])
def test_inputs_found_by_the_property_tests_raise_the_projects_error(which, old, new, match, tmp_path):
    """Each of these once escaped as TypeError, OverflowError or a numpy reshape ValueError (or, for
    the 3e300 Å lattice, loaded with an overflowing cell volume)."""
    if which == "scenario":
        assert old in SCN
        with pytest.raises(ScenarioError, match=match):
            parse_scenario(SCN.replace(old, new, 1), source="s.toml", base=tmp_path)
    else:
        assert old in TB
        with pytest.raises(TightBindingFileError, match=match):
            parse_tight_binding(TB.replace(old, new, 1), source="t.toml")


def test_measurement_file_that_is_not_utf8_names_the_file(tmp_path):
    """Once a bare "'utf-8' codec can't decode byte 0x80" without the file name."""
    path = tmp_path / "d.csv"
    path.write_bytes(b"\x80" + CSV.encode("utf-8"))
    with pytest.raises(FitInputError, match=r"d\.csv: not UTF-8 text \(byte 0x80 at position 0\); save the "
                                            r"measurement file as UTF-8"):
        load_data(parse_scenario(SCN, source="s.toml", base=tmp_path), path)


@SETTINGS
@given(data=st.data())
def test_mutated_scenarios_load_or_raise_scenario_error(data):
    text = _mutate(data, SCN)
    with _empty_dir() as folder:
        got = _outcome(lambda: parse_scenario(text, source="s.toml", base=folder), ScenarioError, "s.toml")
        assert isinstance(got, (Scenario, ScenarioError)), type(got)
        assert _files(folder) == []                  # reading a scenario writes nothing


@SETTINGS
@given(data=st.data())
def test_mutated_tight_binding_files_load_or_raise_their_error(data):
    text = _mutate(data, TB if data.draw(st.booleans(), label="which") else data_file("haldane.toml").read_text("utf-8"))
    got = _outcome(lambda: parse_tight_binding(text, source="t.toml"), TightBindingFileError, "t.toml")
    if not isinstance(got, TightBindingFileError):
        assert got.n_bands >= 1 and got.dim in (2, 3)


@SETTINGS
@given(data=st.data())
def test_mutated_measurement_files_load_or_raise_fit_input_error(data):
    text = _mutate(data, CSV)
    with _empty_dir() as folder:
        scn = parse_scenario(SCN, source="s.toml", base=folder)
        path = folder / "d.csv"
        path.write_text(text, encoding="utf-8")
        got = _outcome(lambda: load_data(scn, path), FitInputError, "d.csv")
        if not isinstance(got, FitInputError):
            x, y, err = got
            assert x.shape == y.shape and np.all(np.isfinite(x)) and np.all(np.isfinite(y))
            assert err is None or (err.shape == y.shape and np.all(err > 0))
        assert _files(folder) == [Path("d.csv")]


@SETTINGS
@given(blob=st.binary(max_size=64), at=st.integers(0, 400), which=st.sampled_from(["scenario", "tb", "csv"]))
def test_files_with_arbitrary_bytes_load_or_raise_the_projects_error(blob, at, which):
    """Raw bytes (non-UTF-8 included) spliced into each file: a result or the reader's own error."""
    base = {"scenario": SCN, "tb": TB, "csv": CSV}[which].encode("utf-8")
    with _empty_dir() as folder:
        path = folder / {"scenario": "s.toml", "tb": "t.toml", "csv": "d.csv"}[which]
        path.write_bytes(base[:at] + blob + base[at:])
        if which == "scenario":
            got = _outcome(lambda: load_scenario(path), ScenarioError, path.name)
        elif which == "tb":
            got = _outcome(lambda: load_tight_binding(path), TightBindingFileError, path.name)
        else:
            scn = parse_scenario(SCN, source="s.toml", base=folder)
            got = _outcome(lambda: load_data(scn, path), FitInputError, path.name)
        assert got is not None
        assert _files(folder) == [Path(path.name)]


def _fake_batch(scn, values):
    """A stand-in for the k-space work of one batch: the arrays the runner assembles."""
    P, A = len(next(iter(values.values()))), len(scn.axes[-1])
    mu = np.asarray(values.get("mu_eV", np.zeros(P)), dtype=float)
    return {"mu": mu, "sigma": np.ones((P, 2, 2), dtype=complex), "resolution_level": np.zeros(P, dtype=int),
            "converged": np.full(P, -1), **fake_device_fields(P, A)}


@settings(SETTINGS, max_examples=min(SETTINGS.max_examples, 30),
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_runs_of_mutated_scenarios_finish_or_stop_cleanly(data, monkeypatch):
    """A mutated scenario that loads is run (k-space work stubbed out): the sweep either writes its
    dataset or stops with ``RunError``, leaving no dataset and no stray temporary file."""
    from crosswind.solver.study import sweep as run_mod
    from crosswind.solver.study.sweep import RunError, run_scenario
    monkeypatch.setattr(run_mod, "compute_batch", _fake_batch)
    text = _mutate(data, SCN)
    with _empty_dir() as folder:
        got = _outcome(lambda: parse_scenario(text, source="s.toml", base=folder), ScenarioError, "s.toml")
        if isinstance(got, ScenarioError):
            return
        out = folder / "out"
        with _no_hang():
            try:
                run_scenario(got, out, progress=False)
                ok = True
            except RunError as exc:
                assert str(exc), "RunError without a message"
                ok = False
        assert (out / "results.nc").exists() == ok
        assert not [p for p in out.rglob("*") if ".tmp" in p.name], _files(out)
