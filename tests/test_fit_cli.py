"""``crosswind fit`` and the ``[sensitivities]`` / ``[fit]`` scenario tables.

Checks are self-consistency checks (common practice): data invented from the model itself at known
values must be recovered within 2 standard errors; automatic-differentiation sensitivities must
agree with central finite differences of the ``crosswind run`` pipeline.
"""
import json

import numpy as np
import pytest
from test_scenario import GOOD

from crosswind.solver.cli import main
from crosswind.solver.study.chain import evaluate
from crosswind.solver.study.knobs import base_values
from crosswind.solver.study.scenario import ScenarioError, load_scenario
from crosswind.solver.study.sweep import open_results

BASE = GOOD.replace("mu_eV = [0.13, 0.15]", "mu_eV = 0.14").replace("temperature_K = [5, 20]", "temperature_K = 20") \
    .replace("current_angle_deg = [0, 90]", "current_angle_deg = 0").replace("resolution = 0", "resolution = 1")
FIT = BASE + """
[fit]
quantity = "V2w"
axis = "mu_eV"
parameters = {tilt = {initial = 3e4, bounds = [1e4, 1e5]}}
"""
TRUE_TILT = 5e4
MUS = (0.12, 0.135, 0.15, 0.165)


def write(tmp_path, text, name="s.toml"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def invented(tmp_path, scn, noise=0.02, seed=1):
    vals = base_values(scn)
    vals["tilt"] = TRUE_TILT
    vals["mu_eV"] = np.asarray(MUS)
    v = np.asarray(evaluate(scn, vals, resolution=1).output("V2w"))
    err = noise * v
    y = v + err * np.random.default_rng(seed).standard_normal(v.shape)
    p = tmp_path / "data.csv"
    p.write_text("# invented test data\nmu [eV], V2w [nV], V2w_err [nV]\n"
                 + "".join(f"{m}, {a * 1e9:.8g}, {e * 1e9:.8g}\n" for m, a, e in zip(MUS, y, err)), encoding="utf-8")
    return p


@pytest.mark.slow
def test_fit_recovers_truth_and_writes_outputs_that_rerun(tmp_path, capsys):
    sp = write(tmp_path, FIT)
    scn = load_scenario(sp)
    data = invented(tmp_path, scn)
    out = tmp_path / "fit"
    assert main(["fit", str(sp), "--data", str(data), "--output", str(out)]) == 0
    for name in ("fit_summary.md", "fit.json", "fit_curve.png", "fit_residuals.png", "fitted_scenario.toml"):
        assert (out / name).exists(), name
    res = json.loads((out / "fit.json").read_text(encoding="utf-8"))
    assert res["converged"]
    assert abs(res["values"]["tilt"] - TRUE_TILT) < 2 * res["stderr"]["tilt"]
    # the model column (rebuilt from the residuals at the optimum) is the chain at the fitted value
    vals = base_values(scn)
    vals["tilt"] = res["values"]["tilt"]
    vals["mu_eV"] = np.asarray(MUS)
    direct = np.asarray(evaluate(scn, vals, resolution=1).output("V2w"))
    np.testing.assert_allclose(res["data"]["model"], direct, rtol=1e-9)
    assert 0 < res["stderr"]["tilt"] < 0.2 * TRUE_TILT
    summ = (out / "fit_summary.md").read_text(encoding="utf-8")
    assert "χ²_red" in summ and "`tilt`" in summ and "converged" in summ
    again = load_scenario(out / "fitted_scenario.toml")
    assert float(dict(again.material.parameters)["tilt"]) == pytest.approx(res["values"]["tilt"])
    assert again.fit is not None and again.axis("mu_eV").values == (0.14,)


@pytest.mark.parametrize("content, match", [
    ("mu [eV], V2w [Ohm]\n0.12, 1\n0.13, 2\n", r"column 'V2w' is in 'Ohm' but 'V' is expected"),
    ("mu [eV], V2x [nV]\n0.12, 1\n0.13, 2\n", r"column 'V2w' is missing \(did you mean 'V2x'\?\)"),
    ("mu [eV], V2w [nV]\n0.12, 1\n", r"1 data point\(s\) for 1 free parameter"),
    ("mu [eV], V2w [nV]\n0.12, x\n0.13, 2\n", r"column 'V2w' has missing, non-numeric"),
])
def test_bad_data_file_exit_2_and_nothing_written(tmp_path, capsys, content, match):
    sp = write(tmp_path, FIT)
    data = write(tmp_path, content, "bad.csv")
    out = tmp_path / "fit"
    assert main(["fit", str(sp), "--data", str(data), "--output", str(out)]) == 2
    err = capsys.readouterr().err
    assert str(data) in err
    import re
    assert re.search(match, err), err
    assert not out.exists()


def test_unknown_fit_parameter_suggests_nearest(tmp_path, capsys):
    sp = write(tmp_path, FIT.replace("tilt = {", "tlit = {"))
    with pytest.raises(ScenarioError, match=r"\[fit.parameters\] key 'tlit': unknown knob 'tlit'\. Did you mean 'tilt'\?"):
        load_scenario(sp)
    assert main(["fit", str(sp), "--data", str(sp)]) == 2
    assert "Did you mean 'tilt'" in capsys.readouterr().err
    with pytest.raises(ScenarioError, match=r"\[sensitivities.knobs\] key 'temprature_K'.*Did you mean 'temperature_K'"):
        load_scenario(write(tmp_path, BASE + "\n[sensitivities]\nknobs = {temprature_K = 1.0}\n", "t.toml"))
    with pytest.raises(ScenarioError, match=r"\[fit\] key 'quantiy': unknown key\. Did you mean 'quantity'"):
        load_scenario(write(tmp_path, FIT.replace("quantity =", "quantiy ="), "u.toml"))


@pytest.mark.slow
def test_sensitivity_table_matches_finite_difference_of_the_run(tmp_path):
    text = BASE.replace("mu_eV = 0.14", "mu_eV = [0.13, 0.15]") + \
        "\n[sensitivities]\nknobs = {tau_fs = 1.0, tilt = 1000.0, mass = 0.01}\n"
    sp = write(tmp_path, text)
    assert main(["run", str(sp), "--no-progress"]) == 0
    out = tmp_path / "out"
    summ = (out / "summary.md").read_text(encoding="utf-8")
    assert "## Which knobs move the 2ω signal most at its peak" in summ
    rows = (out / "sensitivities.csv").read_text(encoding="utf-8").splitlines()
    assert rows[0].startswith("knob,step") and len(rows) == 4
    d_tau = float(next(r for r in rows if r.startswith("tau_fs")).split(",")[4])
    # central difference of the run pipeline itself (tau does not move the k-mesh), h = 0.05 fs
    peak = open_results(out)["v2w_y_amplitude"].max(dim="current_angle_deg")
    mu_peak = float(peak["mu_eV"][int(np.argmax(peak.values.ravel()))])
    v = []
    for tau in (99.95, 100.05):
        t2 = text.replace("tau_fs = 100", f"tau_fs = {tau}").replace(
            "mu_eV = [0.13, 0.15]", f"mu_eV = {mu_peak}").split("[sensitivities]")[0]
        p2 = write(tmp_path, t2.replace('folder = "out"', f'folder = "fd{tau}"'), f"fd{tau}.toml")
        assert main(["run", str(p2), "--no-progress"]) == 0
        v.append(float(open_results(tmp_path / f"fd{tau}")["v2w_y_amplitude"].max()))
    fd = (v[1] - v[0]) / 0.1
    assert d_tau == pytest.approx(fd, rel=1e-4)


def test_scaling_fit_from_the_command_line(tmp_path):
    text = BASE + '\n[fit]\nquantity = "ratio"\naxis = "sigma_xx"\nscaling = true\n'
    sp = write(tmp_path, text)
    s = np.linspace(1e-4, 1e-3, 6)
    c = (2e-9, 3e-6, -1e-3)
    y = c[0] + c[1] * s + c[2] * s * s
    err = np.full_like(s, 1e-12)
    y = y + err * np.random.default_rng(3).standard_normal(s.shape)
    data = write(tmp_path, "sigma_xx [S], ratio [m/V], ratio_err [m/V]\n"
                 + "".join(f"{a:.10g}, {b:.12g}, {e:.6g}\n" for a, b, e in zip(s, y, err)), "sc.csv")
    assert main(["fit", str(sp), "--data", str(data), "--output", str(tmp_path / "sc")]) == 0
    res = json.loads((tmp_path / "sc" / "fit.json").read_text(encoding="utf-8"))
    for k, truth in zip(("c0", "c1", "c2"), c):
        assert abs(res["coefficients"][k] - truth) < 3 * res["stderr"][k]
    assert "C0" in (tmp_path / "sc" / "fit_summary.md").read_text(encoding="utf-8")


@pytest.mark.slow
def test_demo_with_fit(tmp_path):
    assert main(["demo", "--output", str(tmp_path / "demo"), "--no-progress", "--fit"]) == 0
    summ = (tmp_path / "demo" / "summary.md").read_text(encoding="utf-8")
    assert "Demo fit to invented measurements" in summ and "invented" in summ
    assert (tmp_path / "demo" / "fit" / "fit_summary.md").exists()
    head = (tmp_path / "demo" / "fit" / "invented_measurements.csv").read_text(encoding="utf-8")
    assert head.startswith("# INVENTED MEASUREMENTS")


def test_best_fit_curve_reuses_the_data_length_and_residual_units():
    """The best-fit curve is evaluated in blocks of the data's length (so the programs compiled for
    the data serve it) and equals the model on the whole abscissa; a residual unit is the standard
    error when given, else the largest |y|."""
    from crosswind.solver.fitting.scenario_fit import _best_curve, _residual_unit
    seen = []

    def predict(p, x):
        seen.append(len(x))
        return p["a"] * np.asarray(x) ** 2
    x = np.array([1.0, 2.0, 4.0])
    xs, curve = _best_curve(predict, {"a": 3.0}, x)
    assert set(seen) == {3} and len(xs) >= 25 and len(xs) % 3 == 0
    assert xs[0] == 1.0 and xs[-1] == 4.0
    np.testing.assert_allclose(curve, 3.0 * xs ** 2, rtol=1e-15)
    np.testing.assert_array_equal(_residual_unit(np.array([1.0, -5.0]), np.array([0.1, 0.2])), [0.1, 0.2])
    assert _residual_unit(np.array([1.0, -5.0]), None) == 5.0
