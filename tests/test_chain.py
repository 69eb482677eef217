"""The one evaluation chain: a sweep point and the fit's model evaluation at the same knobs agree.

Both ``crosswind run`` (the sweep, in batches) and ``crosswind fit`` (the fit's predictor, traced and
jitted) call :func:`crosswind.solver.study.chain.evaluate`; at the same knobs and the same k-mesh
level they must give the same device numbers (to 1e-12, round-off of a different XLA program).
The gate → density step is checked against the parallel-plate formula n = ε0εr(V − V0)/(e d) with
CODATA constants from ``scipy.constants`` (common practice).
"""
import jax
import numpy as np
import pytest
from scipy import constants

from crosswind.solver import mu_from_density
from crosswind.solver.fitting.scenario_fit import predictor
from crosswind.solver.study.chain import _SCATTERING_CLASS, ChainResult, evaluate, gate_capacitance
from crosswind.solver.study.knobs import base_model, base_values
from crosswind.solver.study.scenario import parse_scenario
from crosswind.solver.study.sweep import run_scenario
from crosswind.solver.vocabulary import SCATTERING

SCN = """
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
dielectric_nm = 285
permittivity = 3.9
gate_offset_V = 1.5

[conditions]
gate_V = [20.0, 35.0, 50.0]
temperature_K = [5, 20]
[conditions.scattering]
kind = "matthiessen"
tau_impurity_fs = 300
tau_phonon_fs = 150

[numerics]
resolution = 1
density_resolution = 1

[output]
folder = "out"
figures = false
"""

FIT = """
[fit]
quantity = "{q}"
axis = "gate_V"
at = {{temperature_K = 20}}
parameters = {{tilt = {{initial = 4e4, bounds = [1e4, 1e5]}}}}
"""


@pytest.fixture(scope="module")
def swept(tmp_path_factory):
    folder = tmp_path_factory.mktemp("chain")
    scn = parse_scenario(SCN, source="s.toml", base=folder)
    return scn, run_scenario(scn, folder / "out", progress=False)


@pytest.mark.parametrize("q, field", [("V2w", "v2w_y_amplitude"), ("Vxx", "v_xx"), ("sigma_xx", "sigma_bar"),
                                      ("ratio", "nonlinear_ratio")])
def test_a_sweep_point_and_the_fit_prediction_agree(swept, tmp_path, q, field):
    scn, ds = swept
    fit_scn = parse_scenario(SCN + FIT.format(q=q), source="f.toml", base=tmp_path)
    predict, base = predictor(fit_scn)
    gates = np.asarray(ds["gate_V"].values)
    got = np.asarray(jax.jit(predict)({"tilt": base["tilt"]}, gates))
    point = ds.sel(temperature_K=20.0, current_angle_deg=0.0).squeeze()
    if field == "v_xx":
        want = np.abs(point["v_xx"].values + 1j * point["v_xx_imag"].values)
    elif field == "sigma_bar":
        want = point["sigma_bar"].sel(i="x", j="x").values
    else:
        want = point[field].values
    np.testing.assert_allclose(got, want, rtol=1e-12, atol=0)


def test_the_chain_returns_typed_results_and_solves_the_gate_density(swept):
    scn, ds = swept
    knobs = base_values(scn, {"gate_V": np.array([20.0, 50.0]), "temperature_K": 5.0})
    out = evaluate(scn, knobs, resolution=1)
    assert isinstance(out, ChainResult) and out.V2w.shape == (2,) and out.reading.v_xx.shape == (2,)
    assert out.output("V2w") is out.V2w
    with pytest.raises(KeyError, match="unknown output 'V2x'; choose from V2w, Vxx, sigma_xx, ratio"):
        out.output("V2x")
    cap = constants.epsilon_0 * 3.9 / 285e-9
    assert gate_capacitance(scn.device) == pytest.approx(cap, rel=1e-15)
    n = np.asarray(out.response.density)
    np.testing.assert_allclose(n, cap * (np.array([20.0, 50.0]) - 1.5) / constants.e, rtol=1e-9)
    np.testing.assert_allclose(out.mu, ds["mu"].sel(temperature_K=5.0, gate_V=[20.0, 50.0]).values.ravel(), rtol=1e-12)


def test_automatic_resolution_takes_mu_from_the_responses_own_density(swept):
    """With resolution=None the chain solves the gate density on the response engine itself: its μ
    and response are those of density.response_at_density at the gate density (not of the node
    mesh root followed by a response), and μ agrees with the root on the node mesh placed at each
    μ (accurate for this continuum model) to MU_SHARE·rtol·k_BT."""
    from crosswind.solver.engine import density as dm
    scn, _ = swept
    gates, T = np.array([20.0, 50.0]), 5.0
    knobs = base_values(scn, {"gate_V": gates, "temperature_K": T})
    out = evaluate(scn, knobs, resolution=None)
    r = out.response
    assert r.resolution.engine == "rays" and r.resolution.converged
    target = gate_capacitance(scn.device) * (gates - 1.5) / constants.e
    model = base_model(scn)
    tau = _SCATTERING_CLASS[scn.scattering](*[knobs[k] for k in SCATTERING[scn.scattering]])
    mu_root, r_root = dm.response_at_density(model, target, np.full(2, T), tau, scn.device.frequency_Hz,
                                             start_resolution=scn.numerics.density_resolution)
    np.testing.assert_allclose(np.asarray(out.mu), mu_root, rtol=1e-13)
    np.testing.assert_allclose(np.asarray(r.sigma), np.asarray(r_root.sigma), rtol=1e-12)
    node = np.asarray(mu_from_density(model, target, T, resolution=1))
    kt = constants.k * T / constants.e
    assert np.all(np.abs(np.asarray(out.mu) - node) <= dm.MU_SHARE * 1e-3 * kt), np.abs(np.asarray(out.mu) - node)


def test_angles_as_a_trailing_axis_rotate_the_same_tensors(swept):
    scn, _ = swept
    knobs = base_values(scn, {"gate_V": np.array([35.0]), "temperature_K": 20.0,
                              "current_angle_deg": np.array([[0.0, 30.0, 90.0]])})
    many = evaluate(scn, knobs, resolution=1)
    assert many.V2w.shape == (1, 3)
    one = evaluate(scn, dict(knobs, current_angle_deg=30.0), resolution=1)
    np.testing.assert_allclose(many.V2w[:, 1], one.V2w, rtol=1e-13)


def test_a_swept_knob_without_a_value_is_named(swept):
    scn, _ = swept
    with pytest.raises(ValueError, match=r"evaluate: no value for \['temperature_K', 'gate_V'\]"):
        evaluate(scn, base_values(scn), resolution=1)
