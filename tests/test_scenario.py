"""Scenario files, sweep runs with checkpoints/resume and the labeled dataset."""
import json
import re

import numpy as np
import pytest

from crosswind.models import build
from crosswind.solver import response
from crosswind.solver.study import sweep as run_mod
from crosswind.solver.study.scenario import ScenarioError, ScenarioWarning, load_scenario, parse_scenario
from crosswind.solver.study.sweep import RunError, open_results, run_scenario

GOOD = """
[material]
model = "massive-dirac"
[material.parameters]
velocity = 5e5
tilt = 5e4
mass = 0.1
valleys = 2

[device]
width_um = 5
length_um = 10
current_uA = 10

[conditions]
mu_eV = [0.13, 0.15]
temperature_K = [5, 20]
tau_fs = 100
current_angle_deg = [0, 90]

[numerics]
resolution = 0

[output]
folder = "out"
figures = false
"""


def write(tmp_path, text, name="s.toml"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def test_axes_order_and_values(tmp_path):
    s = load_scenario(write(tmp_path, GOOD.replace('mu_eV = [0.13, 0.15]', 'mu_eV = {start = 0.12, stop = 0.16, num = 5}')))
    assert [a.name for a in s.axes] == ["temperature_K", "tau_fs", "mu_eV", "current_angle_deg"]
    assert s.axis("mu_eV").values == pytest.approx((0.12, 0.13, 0.14, 0.15, 0.16))
    assert s.output_folder == tmp_path / "out"


@pytest.mark.parametrize("edit, match", [
    (("width_um = 5", "widht_um = 5"), r"\[device\] key 'widht_um': unknown key\. Did you mean 'width_um'\?"),
    (("tau_fs = 100", "tau_fs = 100\ntemprature_K = 3"), r"\[conditions\] key 'temprature_K'.*Did you mean 'temperature_K'"),
    (("mu_eV = [0.13, 0.15]", "mu_eV = 0.1\ndensity_cm2 = 1e12"), r"exactly one of gate_V, density_cm2, mu_eV"),
    (("mu_eV = [0.13, 0.15]", "gate_V = [1, 2]"), r"\[device\] key 'dielectric_nm': a gate_V sweep needs the gate capacitance"),
    (('model = "massive-dirac"', 'model = "massive-dirc"'), r"\[material\] key 'model': unknown model 'massive-dirc'\. Did you mean 'massive-dirac'"),
    (("velocity = 5e5", "velocty = 5e5"), r"\[material.parameters\].*unknown parameter 'velocty'"),
    (("tau_fs = 100", "tau_fs = -3"), r"\[conditions\] key 'tau_fs': every value must be positive"),
    (("tau_fs = 100", "tau_fs = {start = 1, stop = 2}"), r"\[conditions.tau_fs\] key 'num': missing in the sweep"),
    (("resolution = 0", "resolution = 9"), r"\[numerics\] key 'resolution'.*Allowed: \"auto\" or an integer level 0\.\.4"),
    (("[output]", "[outptu]"), r"\[outptu\]: unknown table\. Did you mean '\[output\]'"),
    (("tau_fs = 100", "tau_fs = 100\n[conditions.scattering]\nkind = \"constant\"\ntau_fs = 1"),
     r"either tau_fs or \[conditions.scattering\]"),
    (("valleys = 2", "valleys = 2\n[material.strain]\nmagnitude = 0.01"), r"\[material.strain\]: this model has no strain parameters"),
])
def test_bad_scenarios_name_file_table_key_and_write_nothing(tmp_path, edit, match):
    p = write(tmp_path, GOOD.replace(*edit))
    with pytest.raises(ScenarioError, match=match) as info:
        load_scenario(p)
    assert str(p) in str(info.value)
    assert not (tmp_path / "out").exists()


def test_strain_forms_reach_the_model(tmp_path):
    text = GOOD.replace('model = "massive-dirac"', 'model = "tmd"').replace(
        "velocity = 5e5\ntilt = 5e4\nmass = 0.1\nvalleys = 2", 'material = "MoS2"')
    s = load_scenario(write(tmp_path, text + "\n[material.strain]\nmagnitude = [0.01, 0.02]\nangle_deg = 90\npoisson = 0.25\n"))
    assert s.axes[0].name == "strain" and s.axes[0].values == (0.01, 0.02)
    m = s.build_model(0.02)
    # uniaxial strain along y with Poisson ratio ν: ε_yy = s, ε_xx = −ν s (docs/theory.md §9.1 recipe)
    assert float(m.params["strain_yy"]) == pytest.approx(0.02)
    assert float(m.params["strain_xx"]) == pytest.approx(-0.005)
    s2 = load_scenario(write(tmp_path, text + "\n[material.strain]\nxx = 0.01\nyy = 0.0\nxy = 0.002\n", "t.toml"))
    assert float(s2.build_model().params["strain_xy"]) == pytest.approx(0.002)
    with pytest.raises(ScenarioError, match="mixes tensor components with the uniaxial form"):
        load_scenario(write(tmp_path, text + "\n[material.strain]\nxx = 0.01\nmagnitude = 0.1\n", "u.toml"))


def test_interrupted_sweep_resumes_without_loss_or_repeat(tmp_path, monkeypatch):
    s = load_scenario(write(tmp_path, GOOD.replace("resolution = 0", "resolution = 0\nbatch_points = 2")))
    calls = []
    real = run_mod.compute_batch

    def counting(scn, values):
        calls.append(tuple(np.asarray(values["temperature_K"])))
        return real(scn, values)

    monkeypatch.setattr(run_mod, "compute_batch", counting)

    def stop(i):
        if i == 0:
            raise KeyboardInterrupt("simulated interruption")

    with pytest.raises(KeyboardInterrupt):
        run_scenario(s, progress=False, after_batch=stop)
    assert len(calls) == 1 and (tmp_path / "out" / "batches" / "batch_00000.npz").exists()
    assert not (tmp_path / "out" / "results.nc").exists()
    ds = run_scenario(s, progress=False)
    assert len(calls) == 2 and calls[0] != calls[1]            # batch 1 only, once
    assert json.loads(ds.attrs["batches_computed_this_run"]) == [1]
    # every point equals a direct evaluation (nothing lost or shuffled)
    m = build("massive-dirac", velocity=5e5, tilt=5e4, mass=0.1, valleys=2)
    r = response(m, mu=np.array([0.13, 0.15, 0.13, 0.15]), temperature=np.array([5.0, 5.0, 20.0, 20.0]),
                 tau=100.0, frequency=17.0, resolution=0)
    got = ds["chi"].sel(i="y", j="x", k="x").transpose("temperature_K", "mu_eV").values.reshape(-1)
    assert np.allclose(got, np.asarray(r.chi)[:, 1, 0, 0].real, rtol=1e-12, atol=0)
    # a third run computes nothing
    ds3 = run_scenario(s, progress=False)
    assert len(calls) == 2 and json.loads(ds3.attrs["batches_computed_this_run"]) == []


def test_batches_gather_runs_up_to_batch_points_and_never_mix_strains(tmp_path, monkeypatch):
    """A batch is whole runs of the inner axis (mu_eV here), consecutive, at most batch_points
    points, one strain value; how the grid is cut does not change the numbers of a fixed-mesh
    sweep, every point lands in its place, and the layout is part of the fingerprint."""
    default = load_scenario(write(tmp_path, GOOD))
    assert default.numerics.batch_points == 64
    inner, outer, batches = run_mod.batch_plan(default)
    assert default.axes[inner].name == "mu_eV" and len(batches) == 1 and len(batches[0]) == 2
    three = GOOD.replace("temperature_K = [5, 20]", "temperature_K = [5, 10, 20]")
    cut = load_scenario(write(tmp_path, three.replace("resolution = 0", "resolution = 0\nbatch_points = 5"), "c.toml"))
    assert [len(b) for b in run_mod.batch_plan(cut)[2]] == [2, 1]            # 2 runs of 2 points, then 1
    one = load_scenario(write(tmp_path, three.replace("resolution = 0", "resolution = 0\nbatch_points = 1"), "o.toml"))
    assert [len(b) for b in run_mod.batch_plan(one)[2]] == [1, 1, 1]         # at least one run per batch
    tmd = GOOD.replace('model = "massive-dirac"', 'model = "tmd"').replace(
        "velocity = 5e5\ntilt = 5e4\nmass = 0.1\nvalleys = 2", 'material = "MoS2"')
    strained = load_scenario(write(tmp_path, tmd + "\n[material.strain]\nmagnitude = [0.01, 0.02]\n", "s.toml"))
    inner, outer, batches = run_mod.batch_plan(strained)
    assert outer[0] == 0 and [len(b) for b in batches] == [2, 2]              # 8 points, but two strains
    assert all(len({combo[0] for combo in b}) == 1 for b in batches)
    values = run_mod.batch_values(strained, inner, outer, batches[1])
    assert np.all(values["strain"] == 0.02) and list(values["temperature_K"]) == [5, 5, 20, 20]
    assert list(values["mu_eV"]) == [0.13, 0.15, 0.13, 0.15]
    # the same fixed-mesh sweep cut into 1 and 3 batches: the same dataset
    calls = []
    real = run_mod.compute_batch
    monkeypatch.setattr(run_mod, "compute_batch", lambda scn, v: calls.append(len(v["mu_eV"])) or real(scn, v))
    whole = run_scenario(load_scenario(write(tmp_path, three.replace('folder = "out"', 'folder = "w"'), "w.toml")),
                         progress=False)
    parts = run_scenario(load_scenario(write(tmp_path, three.replace('folder = "out"', 'folder = "p"').replace(
        "resolution = 0", "resolution = 0\nbatch_points = 2"), "p.toml")), progress=False)
    assert calls == [6, 2, 2, 2]
    for name in ("chi", "sigma", "density", "v2w_y_amplitude"):
        assert np.allclose(whole[name].values, parts[name].values, rtol=1e-12, atol=0), name
    m = build("massive-dirac", velocity=5e5, tilt=5e4, mass=0.1, valleys=2)
    r = response(m, mu=0.15, temperature=10.0, tau=100.0, frequency=17.0, resolution=0)
    got = whole["chi"].sel(i="y", j="x", k="x", temperature_K=10.0, mu_eV=0.15).values
    assert got == pytest.approx(float(np.asarray(r.chi)[1, 0, 0].real), rel=1e-12)
    # another cut is another input: the folder is refused, naming the batch layout
    other = three.replace("resolution = 0", "resolution = 0\nbatch_points = 4").replace('folder = "out"', 'folder = "w"')
    with pytest.raises(RunError, match=r"batch layout.*changed since these results were computed"):
        run_scenario(load_scenario(write(tmp_path, other, "w2.toml")), progress=False)


def test_batch_points_must_be_a_positive_integer(tmp_path):
    for bad in ("0", "2.5", "true", '"64"'):
        with pytest.raises(ScenarioError, match=r"\[numerics\] key 'batch_points': got .*a positive integer"):
            load_scenario(write(tmp_path, GOOD.replace("resolution = 0", f"resolution = 0\nbatch_points = {bad}")))


def test_dataset_reopens_with_units_axes_and_provenance(tmp_path):
    s = load_scenario(write(tmp_path, GOOD))
    run_scenario(s, progress=False)
    ds = open_results(tmp_path / "out")
    assert ds["temperature_K"].attrs["units"] == "K"
    assert ds["mu_eV"].attrs["units"] == "eV"
    assert ds["current_angle_deg"].attrs["units"] == "deg"
    assert ds["sigma"].attrs["units"] == "S" and ds["chi"].attrs["units"] == "A m V^-2"
    assert ds["v2w_y_amplitude"].attrs["units"] == "V"
    assert ds["v2w_y_amplitude"].dims == ("temperature_K", "mu_eV", "current_angle_deg")
    # a fixed quantity is a scalar coordinate, not a length-1 dimension (the CSV still lists it)
    assert ds["tau_fs"].dims == () and float(ds["tau_fs"]) == 100.0 and ds["tau_fs"].attrs["units"] == "fs"
    # CF: units and long_name everywhere; a non-SI axis says why (comment); K is SI, so no comment
    assert ds.attrs["Conventions"].startswith("CF-") and "1e-15 s" in ds["tau_fs"].attrs["comment"]
    assert "J" in ds["mu_eV"].attrs["comment"] and "comment" not in ds["temperature_K"].attrs
    assert list(ds["i"].values) == ["x", "y"]
    assert "error_chi" in ds and ds.attrs["scenario_text"] == GOOD
    assert json.loads(ds.attrs["numerics"])["levels_used"] == [0]
    # the dipole response vanishes for a current perpendicular to D (here D ∥ x, §5.6)
    amp = ds["v2w_y_amplitude"].values
    assert np.all(amp[..., 1] < 1e-9 * amp[..., 0])
    csv = (tmp_path / "out" / "results.csv").read_text().splitlines()
    assert len(csv) == 1 + 2 * 2 * 2 and "v2w_y_amplitude [V]" in csv[0] and "chi_yxx [A m V^-2]" in csv[0]


def test_folder_of_another_scenario_is_refused(tmp_path):
    s = load_scenario(write(tmp_path, GOOD))
    run_scenario(s, progress=False)
    s2 = load_scenario(write(tmp_path, GOOD.replace("tau_fs = 100", "tau_fs = 50"), "s2.toml"))
    with pytest.raises(RunError, match="different scenario"):
        run_scenario(s2, progress=False)


def test_density_axis_goes_through_mu_from_density(tmp_path):
    text = GOOD.replace("mu_eV = [0.13, 0.15]", "density_cm2 = [2e12, 3e12]").replace(
        "temperature_K = [5, 20]", "temperature_K = 10").replace("current_angle_deg = [0, 90]", "")
    text = text.replace("resolution = 0", "resolution = 0\ndensity_resolution = 1")
    ds = run_scenario(parse_scenario(text, "dens.toml", base=tmp_path), progress=False)
    # the density computed at the solved μ reproduces the requested density (per point)
    assert np.allclose(ds["density"].values.reshape(-1), [2e16, 3e16], rtol=2e-3)


# ------------------------------------------------------------------ plausibility: unit slips --
def _demo_with(old, new):
    from crosswind.solver.demo import SCENARIO
    assert old in SCENARIO
    return SCENARIO.replace(old, new)


DEMO_GATES = "gate_V = {start = 6.0, stop = 60.0, num = 12}"


@pytest.mark.parametrize("text, match", [
    # meV typed as eV: the tmd k·p model reaches 110 eV only far outside any Brillouin zone
    (lambda: _demo_with(DEMO_GATES, "mu_eV = [110, 150]"),
     r"s\.toml: \[conditions\] key 'mu_eV': μ = 110 eV is reached by the k·p model `tmd` only at wavevectors "
     r"beyond 1\.70 1/Å.*Did you mean 0\.11 eV \(110 meV\)\?"),
    # ps typed as fs: ħ/τ = 3.3 eV
    (lambda: GOOD.replace("tau_fs = 100", "tau_fs = 0.2"),
     r"s\.toml: \[conditions\] key 'tau_fs': 0\.2 fs is not a physically possible relaxation time: the level "
     r"broadening ħ/τ.*Did you mean 200 fs \(0\.2 ps\)\? Allowed: 1 … 1e\+06 fs"),
    (lambda: _demo_with("tau_impurity_fs = 400.0", "tau_impurity_fs = 0.4"),
     r"\[conditions\.scattering\] key 'tau_impurity_fs': 0\.4 fs .*Did you mean 400 fs \(0\.4 ps\)\?"),
    # m^-2 typed into a cm^-2 key: more carriers than unit cells
    (lambda: _demo_with(DEMO_GATES, "density_cm2 = [1e16, 3e16]"),
     r"\[conditions\] key 'density_cm2': 1e\+16 cm\^-2 is not a physically possible carrier density.*"
     r"Did you mean 1e\+12 cm\^-2 \(1e\+16 m\^-2\)\?"),
    (lambda: _demo_with(DEMO_GATES, "gate_V = [10, 800]"),
     r"\[conditions\] key 'gate_V': 800 V across 285 nm of dielectric is 2\.81 V/nm, beyond the breakdown field "
     r"of any gate dielectric \(SiO2 breaks down near 1 V/nm \(Sze & Ng.*Allowed: \|gate_V − gate_offset_V\| up "
     r"to 2 V/nm × dielectric_nm = 570 V"),
    (lambda: GOOD.replace("temperature_K = [5, 20]", "temperature_K = [5, 5000]"),
     r"\[conditions\] key 'temperature_K': 5000 K is not a physically possible temperature: no 2D crystal survives"),
])
def test_unit_slips_are_refused_naming_the_likely_unit(tmp_path, text, match):
    """Values a unit slip produces (meV typed as eV, ps as fs, m⁻² as cm⁻²) used to run; mu_eV = [110, 150]
    reported 1.8e18 cm⁻² from a k·p model valid near its valleys only.  Ranges and their sources:
    crosswind.solver.vocabulary (plausibility section)."""
    p = write(tmp_path, text())
    with pytest.raises(ScenarioError, match=match):
        load_scenario(p)
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("edit, match", [
    (("tau_fs = 100", "tau_fs = 5"), r"\[conditions\] key 'tau_fs': 5 fs is an unusual relaxation time \(usual: "
                                     r"10 … 1e\+05 fs; the level broadening"),
    (("mu_eV = [0.13, 0.15]", "mu_eV = [0.13, 1.5]"),
     r"\[conditions\] key 'mu_eV': μ = 1\.5 eV lies outside the validity window -1\.1\d+ … 1\.1\d+ eV of the k·p "
     r"model \(the energies its bands reach within \|k\| ≤ 0\.312 1/Å of the valley centre, \|k\|a ≤ 1\) of "
     r"`massive-dirac`; results there extrapolate"),
    (("temperature_K = [5, 20]", "temperature_K = [5, 2000]"), r"2000 K is an unusual temperature"),
])
def test_implausible_values_load_with_a_warning_kept_on_the_scenario(tmp_path, edit, match):
    p = write(tmp_path, GOOD.replace(*edit))
    with pytest.warns(ScenarioWarning, match=match):
        scn = load_scenario(p)
    assert len(scn.cautions) == 1 and re.search(match, scn.cautions[0]) and str(p) in scn.cautions[0]


def test_gate_near_breakdown_warns_with_the_field(tmp_path):
    with pytest.warns(ScenarioWarning, match=r"key 'gate_V': 200 V across 285 nm of dielectric is 0\.702 V/nm, "
                                             r"within a factor 2 of dielectric breakdown"):
        load_scenario(write(tmp_path, _demo_with(DEMO_GATES, "gate_V = [10, 200]")))


def test_normal_scenarios_load_silently(tmp_path):
    """GOOD, the demo and the demo fit scenario: no warning of any kind, no cautions."""
    import warnings

    from crosswind.solver.demo import FIT_SCENARIO, SCENARIO
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        for text in (GOOD, SCENARIO, FIT_SCENARIO):
            assert parse_scenario(text, "s.toml", base=tmp_path).cautions == ()


def test_model_window_of_a_lattice_is_its_band_range():
    """Haldane model (Haldane, PRL 61, 2015 (1988)) at φ = 0, M = 0: graphene's bands, ±3t at Γ."""
    from crosswind.solver.study.scenario import model_window
    m = build("haldane", t2=0.0, mass=0.0)
    t = float(m.params["t1"])
    win = model_window(m)
    assert win.kind == "lattice" and win.valid == pytest.approx((-3 * t, 3 * t), rel=1e-9)
    assert win.possible == pytest.approx((-9 * t, 9 * t), rel=1e-9)
