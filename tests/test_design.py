"""Device design by gradients (crosswind.solver.study.design): known optima, active constraints,
the Hall-bar scaling of width and current, the strain-angle knob, the files it writes and the
measurability of a sweep dataset.

Closed forms: for a Berry-curvature dipole D (time-reversal-symmetric bands, so the nonlinear
Drude and intrinsic parts cancel between valleys), the transverse 2ω voltage in the bar frame is
V_y'^2ω ∝ D·x̂' = |D| cos(θ − θ_D) (Sodemann & Fu, PRL 115, 216806 (2015); docs/theory.md §10), so
|V_y'^2ω| peaks with the current along ±D.  V^2ω ∝ I² at fixed W (docs/theory.md §10), so with
the sheet current density I/W ≤ J the amplitude is largest at I = J·W and its elasticity with
respect to J — the multiplier of that limit — is exactly 2.
"""
import json
import math
import tomllib
from pathlib import Path

import jax
import numpy as np
import pytest

from crosswind.solver.cli import main
from crosswind.solver.engine import noise
from crosswind.solver.study import design as dz
from crosswind.solver.study.chain import evaluate
from crosswind.solver.study.knobs import base_values
from crosswind.solver.study.scenario import ScenarioError, _Ctx, load_scenario, parse_scenario
from crosswind.solver.study.sweep import run_scenario

SCN = """
[material]
model = "tmd"
[material.parameters]
material = "MoS2"
[material.strain]
magnitude = 0.01
angle_deg = 0.0
poisson = 0.25

[device]
width_um = 5
length_um = 10
current_uA = 10

[conditions]
density_cm2 = {density}
temperature_K = 20
tau_fs = 100

[numerics]
resolution = 0
density_resolution = 0

[output]
folder = "out"
figures = false
"""


def scenario(tmp, density="3e12", extra=""):
    return parse_scenario(SCN.format(density=density) + extra, source=str(tmp / "s.toml"), base=tmp)


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    return tmp_path_factory.mktemp("design")


@pytest.fixture(scope="module")
def angle_and_current(folder):
    scn = scenario(folder)
    spec = dz.DesignSpec.make("amplitude", knobs={"current_angle_deg": (50.0, -60.0, 80.0),
                                                  "current_uA": (3.0, 1.0, 100.0)},
                              limits={"current_density_A_m": 2.0}, starts=2, resolution=0, map_points=3)
    return scn, spec, dz.design(scn, spec)


def test_the_optimum_current_runs_along_the_dipole(angle_and_current):
    scn, spec, res = angle_and_current
    D = np.asarray(evaluate(scn, base_values(scn), resolution=0).response.dipole).reshape(2)
    theta_d = math.degrees(math.atan2(D[1], D[0]))
    theta = {k.name: k for k in res.knobs}["current_angle_deg"].value
    # along ±D: the optimum is θ_D modulo 180° (the strain along crystal x puts D along x)
    assert abs(((theta - theta_d + 90.0) % 180.0) - 90.0) < 1e-3
    assert abs(theta) < 1e-3
    assert res.success and all(s.feasible for s in res.starts)
    # closed form away from the optimum: |V(θ)| = |V(θ*)| |cos(θ − θ*)|
    prob = dz._Problem(scn, spec, dz.noise_settings(scn.device))
    for angle in (-45.0, 20.0, 70.0):
        u = (np.array([angle, 10.0]) - prob.lo) / (prob.hi - prob.lo)
        got = math.exp(prob.value(u)[0][0])
        assert got == pytest.approx(res.objective_value * abs(math.cos(math.radians(angle - theta))), rel=1e-9)
    assert {k.name: k for k in res.knobs}["current_angle_deg"].derivative == pytest.approx(0.0, abs=1e-12)


def test_the_current_density_limit_binds_the_drive_current_with_multiplier_two(angle_and_current):
    scn, _, res = angle_and_current
    current = {k.name: k for k in res.knobs}["current_uA"]
    assert current.value == pytest.approx(2.0 * 5.0, rel=1e-8) and current.at_bound == ""
    (c,) = res.constraints
    assert c.key == "current_density_A_m" and c.active and c.value == pytest.approx(2.0, rel=1e-8)
    assert c.multiplier == pytest.approx(2.0, rel=1e-6)
    assert c.gain_relax_10pct == pytest.approx(math.exp(0.2), rel=1e-6)
    # the amplitude scales as I² (docs/theory.md §10): relaxing the limit by 10 % gains 1.1² exactly
    assert float(res.point.v2w_y_amplitude) == pytest.approx(res.objective_value, rel=1e-14)


def test_width_and_current_follow_the_hall_bar_relations(folder):
    scn = scenario(folder)
    other = parse_scenario(SCN.format(density="3e12").replace("width_um = 5", "width_um = 2.5")
                           .replace("current_uA = 10", "current_uA = 7"), source="o.toml", base=folder)
    vals = dict(base_values(scn), width_um=2.5, current_uA=7.0, strain_angle_deg=0.0)
    pt = dz._point(scn, 0, noise.NoiseSettings(), vals, "amplitude")
    ref = evaluate(other, base_values(other), resolution=0).reading
    assert float(pt.v2w_y_amplitude) == pytest.approx(float(ref.v2w_y_amplitude[0]), rel=1e-12)
    assert float(pt.power_density) == pytest.approx(float(ref.power_density[0]), rel=1e-12)
    assert float(pt.current_density) == pytest.approx(float(ref.current_density[0]), rel=1e-12)


def test_the_strain_angle_knob_is_the_scenario_strain_axis(folder):
    scn = scenario(folder)
    turned = parse_scenario(SCN.format(density="3e12").replace("angle_deg = 0.0", "angle_deg = 30.0"),
                            source="t.toml", base=folder)
    a = evaluate(scn, dict(base_values(scn), strain_angle_deg=30.0), resolution=0)
    b = evaluate(turned, base_values(turned), resolution=0)
    np.testing.assert_allclose(np.asarray(a.chi_bar), np.asarray(b.chi_bar), rtol=1e-12, atol=1e-30)
    np.testing.assert_allclose(np.asarray(a.sigma_bar), np.asarray(b.sigma_bar), rtol=1e-12)
    # and it is differentiable
    g = jax.grad(lambda t: evaluate(scn, dict(base_values(scn), strain_angle_deg=t), resolution=0).V2w[0])(30.0)
    assert np.isfinite(float(g))


def test_snr_design_widens_the_bar_to_its_bound_under_a_current_density_limit(folder):
    # SNR ∝ I²/W at fixed noise (probe arms a fifth of W: R_y independent of W), I ≤ J W → SNR ∝ J² W
    scn = scenario(folder)
    spec = dz.DesignSpec.make("snr", knobs={"width_um": (4.0, 2.0, 8.0), "current_uA": (5.0, 1.0, 50.0)},
                              limits={"current_density_A_m": 1.0, "temperature_rise_K": 5.0}, starts=1, resolution=0,
                              map_points=0)
    res = dz.design(scn, spec)
    k = {x.name: x for x in res.knobs}
    assert k["width_um"].at_bound == "high" and k["width_um"].value == pytest.approx(8.0, rel=1e-9)
    assert k["current_uA"].value == pytest.approx(8.0, rel=1e-7)
    act = {c.key: c for c in res.constraints}
    assert act["current_density_A_m"].active and not act["temperature_rise_K"].active
    assert act["temperature_rise_K"].multiplier == 0.0
    assert 1.9 < act["current_density_A_m"].multiplier <= 2.0 + 1e-9   # the Joule rise adds a little noise
    assert res.verdict in noise.VERDICTS.values() and res.map is None


def test_the_design_table_is_checked(folder):
    scn = scenario(folder)
    ctx = _Ctx("s.toml")
    good = {"objective": "snr", "knobs": {"gate_V": {"initial": 1, "bounds": [0, 2]}}}
    with pytest.raises(ScenarioError, match=r"\[design.knobs\] key 'gate_V': not a design knob of this scenario"):
        dz.parse_design(ctx, good, scn)
    with pytest.raises(ScenarioError, match=r"\[design\] key 'objective': unknown objective 'loud'"):
        dz.parse_design(ctx, {"objective": "loud", "knobs": {}}, scn)
    bad = {"knobs": {"current_uA": {"initial": 5}}}
    with pytest.raises(ScenarioError, match=r"\[design.knobs.current_uA\] key 'bounds': must be \[low, high\]"):
        dz.parse_design(ctx, bad, scn)
    lim = {"knobs": {"current_uA": {"bounds": [1, 5]}}, "limits": {"current_density": 1.0}}
    with pytest.raises(ScenarioError, match=r"\[design.limits\] key 'current_density': unknown key. Did you mean "
                                            r"'current_density_A_m'\?"):
        dz.parse_design(ctx, lim, scn)
    gate = {"knobs": {"current_uA": {"bounds": [1, 5]}}, "limits": {"gate_field_V_nm": 0.3}}
    with pytest.raises(ScenarioError, match="a gate-field limit needs a gate_V scenario"):
        dz.parse_design(ctx, gate, scn)
    spec = dz.parse_design(ctx, {"knobs": {"current_uA": {"bounds": [1, 5]}, "strain_angle_deg": {"initial": 10,
                                 "bounds": [0, 90]}}, "limits": {"strain": 0.02}}, scn)
    assert spec.knobs == (("current_uA", 3.0, 1.0, 5.0), ("strain_angle_deg", 10.0, 0.0, 90.0))
    assert spec.limits == (("strain", 0.02),) and spec.resolution == 0 and spec.objective == "snr"


def test_the_design_files(angle_and_current, folder):
    scn, _, res = angle_and_current
    out = folder / "written"
    paths = dz.write_design(scn, res, out)
    assert [p.name for p in paths] == ["design_summary.md", "design.json", "optimal_scenario.toml", "design_map.png"]
    text = (out / "design_summary.md").read_text(encoding="utf-8")
    lead = text.split("\n")[2]
    assert lead.startswith(f"**{res.verdict.capitalize()}** at the chosen settings: SNR ")
    assert "SNR 10 after" in lead and "## Cautions" in text and "lower bound" in text
    assert "| `current_density_A_m` ≤ 2 A m^-1 | 2 A m^-1 | **yes** | 2 | ×1.221 |" in text
    data = json.loads((out / "design.json").read_text(encoding="utf-8"))
    assert data["constraints"][0]["active"] is True and data["verdict"] == res.verdict
    opt = parse_scenario((out / "optimal_scenario.toml").read_text(encoding="utf-8"), source="opt.toml", base=out)
    assert opt.device.current_uA == pytest.approx(10.0, rel=1e-8)
    assert opt.axis("current_angle_deg").values[0] == pytest.approx(0.0, abs=1e-3)
    assert "design" not in tomllib.loads(opt.text)
    assert res.map is not None and np.asarray(res.map["objective"]).shape == (3, 3)


def test_measurability_of_a_sweep_dataset(folder):
    scn = parse_scenario(SCN.format(density="[2e12, 4e12]") + "", source=str(folder / "m.toml"), base=folder)
    ds = run_scenario(scn, folder / "sweep", progress=False)
    m = dz.measurability(ds)
    assert set(m.data_vars) == set(noise.Measurability.__dataclass_fields__)
    assert m["snr_v2w_y"].dims == ds["v2w_y_amplitude"].dims
    assert m["averaging_time_snr10"].attrs["units"] == "s" and m["resistance_y"].attrs["units"] == "Ohm"
    point = ds.isel(density_cm2=1, current_angle_deg=0).squeeze()
    sig = point["sigma_bar"].values + 1j * point["sigma_bar_imag"].values
    v2y = complex(point["v2w_y"].values + 1j * point["v2w_y_imag"].values)
    v2x = complex(point["v2w_x"].values + 1j * point["v2w_x_imag"].values)
    want = noise.assess(sig, v2y, v2x, float(point["power_density"]), 20.0, width_m=5e-6, length_m=10e-6,
                        dielectric_m=285e-9)
    got = m.isel(density_cm2=1, current_angle_deg=0).squeeze()
    for name in ("snr_v2w_y", "averaging_time_snr10", "temperature_rise", "pickup_v2w_y", "resistance_y"):
        assert float(got[name]) == pytest.approx(float(getattr(want, name)), rel=1e-12), name
    # the sweep stores the Seebeck tensor (crystal frame = bar frame at angle 0): the thermoelectric estimate
    seebeck = point["seebeck"].values + (1j * point["seebeck_imag"].values if "seebeck_imag" in point else 0)
    thermo = noise.assess(sig, v2y, v2x, float(point["power_density"]), 20.0, width_m=5e-6, length_m=10e-6,
                          dielectric_m=285e-9, seebeck_bar=seebeck)
    assert np.isfinite(float(got["thermoelectric_v2w_y"]))
    assert float(got["thermoelectric_v2w_y"]) == pytest.approx(float(thermo.thermoelectric_v2w_y), rel=1e-12)
    # the lead lines of a sweep summary: the verdict at the peak first
    a = ds["v2w_y_amplitude"]
    peak = dict(zip(a.dims, (int(i) for i in np.unravel_index(int(np.nanargmax(a.values)), a.shape))))
    lines = dz.measurability_lines(ds, scn, peak)
    code = int(m["measurability"].isel(peak).values)
    assert lines[0].startswith(f"**{noise.VERDICTS[code].capitalize()}** at the chosen settings (at the 2ω peak")
    assert "SNR 10 after" in lines[0] and "Over the sweep:" in lines[2]
    assert any(line.startswith("- Joule heating at the peak") for line in lines)
    # the sweep's own dataset carries the same fields; measurement settings are not part of the run's
    # fingerprint: a rerun with another time constant resumes every batch and recomputes the SNR
    np.testing.assert_allclose(ds["snr_v2w_y"].values, m["snr_v2w_y"].values, rtol=1e-14)
    slower = parse_scenario(SCN.format(density="[2e12, 4e12]").replace("current_uA = 10\n", "current_uA = 10\n"
                            "time_constant_ms = 4000\n"), source=str(folder / "m.toml"), base=folder)
    again = run_scenario(slower, folder / "sweep", progress=False)
    assert json.loads(again.attrs["batches_computed_this_run"]) == []
    np.testing.assert_allclose(again["snr_v2w_y"].values, 2.0 * ds["snr_v2w_y"].values, rtol=1e-12)


DESIGN = """
[design]
objective = "amplitude"
starts = 1
map_points = 0
knobs = {current_angle_deg = {initial = 20.0, bounds = [-45.0, 45.0]}}
at = {width_um = 5.0}
[design.limits]
current_density_A_m = 3.0
"""
SETTINGS = "current_uA = 10\ntime_constant_ms = 300\nfilter_slope_dB_oct = 12\nprobe_width_um = 0.8\n"


def test_a_scenario_file_with_a_design_table_and_measurement_keys(folder):
    text = SCN.format(density="3e12").replace("current_uA = 10\n", SETTINGS) + DESIGN
    scn = parse_scenario(text, source="d.toml", base=folder)
    assert scn.design.objective == "amplitude" and scn.design.knobs == (("current_angle_deg", 20.0, -45.0, 45.0),)
    assert scn.design.at == (("width_um", 5.0),) and scn.design.limits == (("current_density_A_m", 3.0),)
    s = dz.noise_settings(scn.device)
    assert (s.time_constant_ms, s.filter_slope_dB_oct, s.probe_width_um, s.amplifier_noise_nV_rtHz) == (300, 12, 0.8, 4)
    with pytest.raises(ScenarioError, match=r"\[device\] key 'time_constant_s': unknown key. Did you mean "
                                            r"'time_constant_ms'\?"):
        parse_scenario(text.replace("time_constant_ms", "time_constant_s"), source="d.toml", base=folder)
    with pytest.raises(ScenarioError, match=r"\[device\] key 'filter_slope_dB_oct': got 9. Allowed: 6, 12, 18 or 24"):
        parse_scenario(text.replace("filter_slope_dB_oct = 12", "filter_slope_dB_oct = 9"), source="d.toml",
                       base=folder)
    with pytest.raises(ScenarioError, match=r"\[design\] key 'objectif': unknown key"):
        parse_scenario(text.replace('objective = "amplitude"', 'objectif = "snr"'), source="d.toml", base=folder)


def test_the_documented_example_loads():
    scn = load_scenario(Path(__file__).resolve().parents[1] / "docs" / "design" / "wse2_design.toml")
    assert scn.design.objective == "snr" and [k[0] for k in scn.design.knobs] == [
        "current_angle_deg", "gate_V", "width_um", "current_uA", "strain"]
    assert dict(scn.design.limits) == {"current_density_A_m": 20.0, "temperature_rise_K": 0.5,
                                       "gate_field_V_nm": 0.3, "strain": 0.015}
    assert dz.noise_settings(scn.device).dielectric_conductivity_W_mK == 0.2


def test_the_design_command(folder, capsys):
    path = folder / "cmd.toml"
    path.write_text(SCN.format(density="3e12") + DESIGN, encoding="utf-8")
    rc = main(["design", str(path), "--output", str(folder / "cmd-out"), "--no-progress"])
    out = capsys.readouterr().out
    assert rc == 0, out
    assert "design_summary.md, design.json, optimal_scenario.toml" in out
    assert (folder / "cmd-out" / "optimal_scenario.toml").is_file()
    assert main(["design", str(folder / "missing.toml")]) == 2
