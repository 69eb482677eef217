"""Scenario files, sweep runs with checkpoints/resume and the labeled dataset."""
import json

import numpy as np
import pytest

from crosswind.models import build
from crosswind.solver import response
from crosswind.solver.study import sweep as run_mod
from crosswind.solver.study.sweep import RunError, open_results, run_scenario
from crosswind.solver.study.scenario import ScenarioError, load_scenario, parse_scenario

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
    s = load_scenario(write(tmp_path, GOOD))
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
    got = ds["chi"].values[:, 0, :, 1, 0, 0].reshape(-1)
    assert np.allclose(got, np.asarray(r.chi)[:, 1, 0, 0].real, rtol=1e-12, atol=0)
    # a third run computes nothing
    ds3 = run_scenario(s, progress=False)
    assert len(calls) == 2 and json.loads(ds3.attrs["batches_computed_this_run"]) == []


def test_dataset_reopens_with_units_axes_and_provenance(tmp_path):
    s = load_scenario(write(tmp_path, GOOD))
    run_scenario(s, progress=False)
    ds = open_results(tmp_path / "out")
    assert ds["temperature_K"].attrs["units"] == "K"
    assert ds["mu_eV"].attrs["units"] == "eV"
    assert ds["current_angle_deg"].attrs["units"] == "deg"
    assert ds["sigma"].attrs["units"] == "S" and ds["chi"].attrs["units"] == "A m V^-2"
    assert ds["v2w_y_amplitude"].attrs["units"] == "V"
    assert ds["v2w_y_amplitude"].dims == ("temperature_K", "tau_fs", "mu_eV", "current_angle_deg")
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
