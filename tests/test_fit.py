"""Least-squares fits with autodiff Jacobians, the nonlinear-Hall scaling fit, and measurement
loading.  Synthetic data are generated from known parameters plus Gaussian noise (fixed seeds)."""
import math

import jax.numpy as jnp
import numpy as np
import pytest
from scipy.optimize import least_squares

from crosswind.models import build
from crosswind.models.units import ANGSTROM, E_CHARGE, HBAR_EVS, HBAR_JS
from crosswind.solver import FitResult, load_measurements, response, scaling_fit
from crosswind.solver.fitting import fit

# ---------------------------------------------------------------------------------------------
# analytic dipole signal: docs/theory.md §5.5 and §6 (first order in the tilt, T = 0)
#   χ_yxx = -e³τD_x/(2ħ²),  D_x = -3ħtΔ(μ²-Δ²)/(8πμ⁴)   (one valley, μ > Δ)
# ---------------------------------------------------------------------------------------------
MU = jnp.linspace(0.12, 0.3, 10)


def chi_dipole(p, mu=MU):
    ht = p["tilt"] * HBAR_EVS / ANGSTROM                                  # eV Å
    d = -3 * ht * p["mass"] * (mu ** 2 - p["mass"] ** 2) / (8 * jnp.pi * mu ** 4) * ANGSTROM   # m
    return -(E_CHARGE ** 3) * (p["tau"] * 1e-15) * d / (2 * HBAR_JS ** 2)  # A m / V²


TRUE = dict(mass=0.1, tilt=5e4, tau=100.0)
_clean = np.asarray(chi_dipole({k: jnp.asarray(v) for k, v in TRUE.items()}))
NOISE = 0.01 * np.max(np.abs(_clean))
DATA = _clean + NOISE * np.random.default_rng(7).standard_normal(_clean.shape)


def residual(p):
    return (chi_dipole(p) - DATA) / NOISE


def _scipy_reference(fun, names, x0, lower, upper):
    """Independent run: scipy's trust-region solver with a finite-difference Jacobian."""
    vec = lambda v: np.asarray(fun(dict(zip(names, map(jnp.asarray, v)))))
    return least_squares(vec, x0, jac="2-point", bounds=(lower, upper), x_scale=np.abs(x0), method="trf",
                         ftol=1e-12, xtol=1e-12, gtol=1e-12)


def test_recovers_mass_and_tilt_within_two_standard_errors():
    r = fit(residual, dict(mass=0.07, tilt=3e4, tau=100.0), fixed={"tau"},
            bounds=dict(mass=(0.01, 0.119), tilt=(0.0, 2e5)))
    assert isinstance(r, FitResult)
    assert r.converged, r.message
    assert r.free == ("mass", "tilt") and r.values["tau"] == 100.0 and r.stderr["tau"] == 0.0
    for k in ("mass", "tilt"):
        assert abs(r.values[k] - TRUE[k]) < 2 * r.stderr[k], (k, r.values[k], r.stderr[k])
        assert 0 < r.stderr[k] < 0.1 * TRUE[k]
    assert r.dof == MU.size - 2
    assert 0.2 < r.chi2_reduced < 3.0
    assert r.identifiability_warnings == ()
    np.testing.assert_allclose(np.diag(r.correlation), 1.0, rtol=1e-12)
    # agreement with an independent finite-difference-Jacobian run on the same residuals
    names = ["mass", "tilt"]
    ref = _scipy_reference(lambda p: residual(dict(p, tau=jnp.asarray(100.0))), names,
                           np.array([0.07, 3e4]), [0.01, 0.0], [0.119, 2e5])
    np.testing.assert_allclose([r.values[k] for k in names], ref.x, rtol=1e-6)
    np.testing.assert_allclose(r.cost, ref.cost, rtol=1e-9)


def test_covariance_matches_linearised_least_squares():
    # common practice (Numerical Recipes §15.5): C = (JᵀJ)⁻¹ χ²/(m-n); J here by central differences
    r = fit(residual, dict(mass=0.07, tilt=3e4, tau=100.0), fixed={"tau"})
    p = np.array([r.values["mass"], r.values["tilt"]])
    h = 1e-6 * p
    cols = []
    for i in range(2):
        up, dn = p.copy(), p.copy()
        up[i] += h[i]
        dn[i] -= h[i]
        f = lambda v: np.asarray(residual(dict(mass=jnp.asarray(v[0]), tilt=jnp.asarray(v[1]), tau=jnp.asarray(100.0))))
        cols.append((f(up) - f(dn)) / (2 * h[i]))
    J = np.stack(cols, axis=1)
    rr = np.asarray(residual({k: jnp.asarray(v) for k, v in r.values.items()}))
    cov = np.linalg.inv(J.T @ J) * (rr @ rr) / (rr.size - 2)
    np.testing.assert_allclose(r.covariance, cov, rtol=1e-5)
    r_abs = fit(residual, dict(mass=0.07, tilt=3e4, tau=100.0), fixed={"tau"}, absolute_sigma=True)
    np.testing.assert_allclose(r_abs.covariance, np.linalg.inv(J.T @ J), rtol=1e-5)


def test_sigma_argument_weights_the_residuals():
    raw = lambda p: chi_dipole(p) - DATA
    a = fit(raw, dict(mass=0.07, tilt=3e4, tau=100.0), fixed={"tau"}, sigma=np.full(DATA.shape, NOISE))
    b = fit(residual, dict(mass=0.07, tilt=3e4, tau=100.0), fixed={"tau"})
    for k in ("mass", "tilt"):
        np.testing.assert_allclose(a.values[k], b.values[k], rtol=1e-9)
        np.testing.assert_allclose(a.stderr[k], b.stderr[k], rtol=1e-6)


def test_tau_and_tilt_scaling_a_dipole_signal_are_flagged():
    # χ_BCD ∝ τ·D and D ∝ tilt at first order (§5.5, §6): the data fix only the product τ·tilt
    r = fit(residual, dict(mass=0.1, tilt=3e4, tau=150.0), fixed={"mass"})
    text = " ".join(r.identifiability_warnings)
    assert "tilt and tau are correlated" in text
    assert not r.converged and "tilt, tau" in r.message and "combination" in r.message
    # the product is still determined
    np.testing.assert_allclose(r.values["tilt"] * r.values["tau"], TRUE["tilt"] * TRUE["tau"], rtol=0.05)


def test_several_starts_escape_a_local_minimum():
    x = jnp.linspace(0.0, 10.0, 60)
    rng = np.random.default_rng(3)
    y = np.sin(2.3 * np.asarray(x)) + 0.05 * rng.standard_normal(x.shape)
    res = lambda p: (jnp.sin(p["w"] * x) - y) / 0.05
    one = fit(res, dict(w=1.0), bounds=dict(w=(0.5, 4.0)), jit=True)
    many = fit(res, dict(w=1.0), bounds=dict(w=(0.5, 4.0)), starts=12, seed=1, jit=True)
    assert many.starts_tried == 12 and len(many.start_costs) == 12
    assert many.cost < 0.1 * one.cost
    assert abs(many.values["w"] - 2.3) < 2 * many.stderr["w"]
    assert many.cost == min(c for c in many.start_costs if np.isfinite(c))


def test_non_convergence_says_why():
    x = jnp.linspace(0.0, 1.0, 8)
    y = np.asarray(2.0 * x + 1.0)
    stop = fit(lambda p: (p["a"] * jnp.exp(p["b"] * x) - y), dict(a=1.0, b=3.0), max_evaluations=2)
    assert not stop.converged and "max_evaluations=2" in stop.message
    nan_start = fit(lambda p: jnp.log(p["a"] - 1.0) * x - y, dict(a=0.5))
    assert not nan_start.converged and "not finite" in nan_start.message and "starting point" in nan_start.message
    assert math.isnan(nan_start.cost)
    nan_jac = fit(lambda p: jnp.sqrt(p["a"]) * x - y, dict(a=0.0))
    assert not nan_jac.converged and "Jacobian is not finite" in nan_jac.message and "a" in nan_jac.message
    flat = fit(lambda p: p["a"] * x + 0.0 * p["b"] - y, dict(a=1.0, b=1.0))
    assert not flat.converged and "do not change with b" in flat.message
    assert math.isnan(flat.stderr["b"]) and np.isfinite(flat.stderr["a"])


def test_bad_fit_input_is_explained():
    with pytest.raises(ValueError, match="2 residual.*3 free parameter"):
        fit(lambda p: jnp.stack([p["a"], p["b"] + p["c"]]), dict(a=1.0, b=1.0, c=1.0))
    with pytest.raises(ValueError, match="outside its bounds"):
        fit(residual, dict(mass=0.5, tilt=3e4, tau=100.0), bounds=dict(mass=(0.0, 0.2)))
    with pytest.raises(ValueError, match="not in initial"):
        fit(residual, dict(mass=0.1, tilt=3e4, tau=100.0), fixed={"gap"})
    with pytest.raises(ValueError, match="every parameter is fixed"):
        fit(residual, dict(mass=0.1), fixed={"mass"})
    with pytest.raises(ValueError, match="jacobian='2-point'"):
        fit(lambda p: np.asarray(p["a"]) * np.ones(3), dict(a=1.0))
    with pytest.raises(ValueError, match="sigma must be positive"):
        fit(residual, dict(mass=0.1, tilt=3e4, tau=100.0), sigma=-1.0)


def test_finite_difference_jacobian_option_for_plain_numpy_residuals():
    x = np.linspace(0, 1, 12)
    y = 3.0 * x ** 2 + 0.5
    r = fit(lambda p: float(p["a"]) * x ** 2 + float(p["c"]) - y, dict(a=1.0, c=0.0), jacobian="2-point")
    assert r.converged
    np.testing.assert_allclose([r.values["a"], r.values["c"]], [3.0, 0.5], rtol=1e-6)


# ---------------------------------------------------------------------------------------------
# scaling law E⊥/E∥² = C0 + C1σ + C2σ²  (Du et al., Nat. Commun. 10, 3047, 2019; Kang et al.,
# Nat. Mater. 18, 324, 2019; docs/theory.md §12.2)
# ---------------------------------------------------------------------------------------------

def test_scaling_fit_recovers_coefficients():
    sigma = np.linspace(1e-4, 1e-3, 14)
    c = (7e-10, 2e-6, 3e-3)
    exact = c[0] + c[1] * sigma + c[2] * sigma ** 2
    err = 0.01 * exact
    noisy = exact + err * np.random.default_rng(11).standard_normal(sigma.shape)
    s = scaling_fit(sigma, noisy, err)
    for v, e, t in zip(s.coefficients, s.stderr, c):
        assert abs(v - t) < 2 * e
        assert e < 0.5 * abs(t)
    assert s.dof == 11 and 0.2 < s.chi2_reduced < 3
    np.testing.assert_allclose(s.predict(sigma), noisy - s.residuals, rtol=1e-12)
    assert "dipole" in s.meaning["c0"] and "skew" in s.meaning["c1"] and "skew" in s.meaning["c2"]
    # noise-free data: exact coefficients
    e0 = scaling_fit(sigma, exact)
    np.testing.assert_allclose(e0.coefficients, c, rtol=1e-9)
    # with unit weights the covariance is scaled by the residual variance (common practice)
    x = np.stack([np.ones_like(sigma), sigma, sigma ** 2], axis=1)
    beta, *_ = np.linalg.lstsq(x, noisy, rcond=None)
    resid = noisy - x @ beta
    cov = np.linalg.inv(x.T @ x) * (resid @ resid) / (sigma.size - 3)
    u = scaling_fit(sigma, noisy)
    np.testing.assert_allclose(u.coefficients, beta, rtol=1e-8)
    np.testing.assert_allclose(u.covariance, cov, rtol=1e-6)


def test_scaling_fit_bad_input():
    s = np.array([1e-4, 2e-4, 3e-4, 4e-4])
    with pytest.raises(ValueError, match="one ratio per conductivity"):
        scaling_fit(s, s[:3])
    with pytest.raises(ValueError, match="NaN/inf at index 2"):
        scaling_fit(s, np.array([1.0, 2.0, np.nan, 3.0]))
    with pytest.raises(ValueError, match="distinct"):
        scaling_fit(np.array([1e-4, 1e-4, 2e-4, 2e-4]), np.ones(4))
    with pytest.raises(ValueError, match="exactly"):
        scaling_fit(s[:3], np.ones(3))


# ---------------------------------------------------------------------------------------------
# measurement files
# ---------------------------------------------------------------------------------------------

def _write(tmp_path, text, name="data.csv"):
    p = tmp_path / name
    p.write_text(text)
    return p


def test_load_measurements_converts_prefixed_units(tmp_path):
    p = _write(tmp_path, "# sample A\ngate [V], current [uA], V2w [nV], sigma_xx [mS], n [cm^-2], ratio [nm/V]\n"
                         "-1, 10, 41.5, 0.5, 1e12, 0.7\n"
                         "0, 20, 166, 0.6, 2e12, 0.8\n")
    d = load_measurements(p, {"current": "A", "V2w": "V", "sigma_xx": "S", "n": "m^-2", "ratio": "m/V",
                              "gate": "mV"})
    np.testing.assert_allclose(d["current"], [1e-5, 2e-5], rtol=1e-12)
    np.testing.assert_allclose(d["V2w"], [41.5e-9, 166e-9], rtol=1e-12)
    np.testing.assert_allclose(d["sigma_xx"], [5e-4, 6e-4], rtol=1e-12)
    np.testing.assert_allclose(d["n"], [1e16, 2e16], rtol=1e-12)
    np.testing.assert_allclose(d["ratio"], [0.7e-9, 0.8e-9], rtol=1e-12)
    np.testing.assert_allclose(d["gate"], [-1000.0, 0.0], rtol=1e-12)
    q = _write(tmp_path, "T [K], E [meV], R [kOhm]\n1.5, 2, 1\n3, 4, 2\n", "b.csv")
    e = load_measurements(q, {"E": "eV", "R": "Ohm", "T": "K"}, min_points=2)
    np.testing.assert_allclose(e["E"], [2e-3, 4e-3], rtol=1e-12)
    np.testing.assert_allclose(e["R"], [1e3, 2e3], rtol=1e-12)


def test_load_measurements_errors_name_file_column_and_fix(tmp_path):
    good = "current [uA], V2w [nV]\n1, 2\n3, 4\n"
    p = _write(tmp_path, good)
    with pytest.raises(ValueError, match=r"data\.csv: column 'V3w' is missing.*add a column 'V3w \[V\]'"):
        load_measurements(p, {"current": "A", "V3w": "V"})
    with pytest.raises(ValueError, match=r"column 'V2w' is in 'nV' but 'A' is expected"):
        load_measurements(p, {"V2w": "A"})
    q = _write(tmp_path, "current [uAmp], V2w\n1, 2\n", "u.csv")
    with pytest.raises(ValueError, match=r"u\.csv: column 'current' has unknown unit 'uAmp'.*uA"):
        load_measurements(q, {"current": "A"})
    with pytest.raises(ValueError, match=r"column 'V2w' has no unit.*'V2w \[V\]'"):
        load_measurements(q, {"V2w": "V"})
    with pytest.raises(ValueError, match="unknown unit 'Volt'"):
        load_measurements(p, {"V2w": "Volt"})
    r = _write(tmp_path, "current [uA], V2w [nV]\n1, 2\n2, nan\n3, \n4, x\n", "n.csv")
    with pytest.raises(ValueError, match=r"n\.csv: column 'V2w' has missing.*line\(s\) 3, 4, 5"):
        load_measurements(r, {"current": "A", "V2w": "V"})
    with pytest.raises(ValueError, match=r"2 data row\(s\) but at least 3 are needed"):
        load_measurements(p, {"current": "A"}, min_points=3)
    with pytest.raises(FileNotFoundError, match="no file"):
        load_measurements(tmp_path / "absent.csv", {"current": "A"})
    s = _write(tmp_path, "current [uA], V2w [nV]\n1, 2, 3\n", "s.csv")
    with pytest.raises(ValueError, match="line 2 has 3 values but the header has 2"):
        load_measurements(s, {"current": "A"})


# ---------------------------------------------------------------------------------------------
# a fit through the full response (slow: compiles the response and its JVP for a 4-point sweep)
# ---------------------------------------------------------------------------------------------
GATE_MU = jnp.array([0.12, 0.15, 0.2, 0.25])
WIDTH, LENGTH, CURRENT = 5e-6, 10e-6, 10e-6           # m, m, A


def _device_signals(p):
    model = build("massive-dirac", velocity=5e5, mass=0.1, tilt=0.0, valleys=2).with_params(
        mass=p["mass"], tilt=p["tilt"])
    r = response(model, GATE_MU, 20.0, p["tau"], resolution=2)   # derivative integrands converged
    sxx, syy = r.sigma[:, 0, 0].real, r.sigma[:, 1, 1].real
    # Hall-bar voltages, docs/theory.md §10: V_xx = I L/(W σ_xx), V_y^{2ω} = χ_yxx I²/(W σ_xx² σ_yy)
    vxx = CURRENT * LENGTH / (WIDTH * sxx)
    v2w = r.chi[:, 1, 0, 0].real * CURRENT ** 2 / (WIDTH * sxx ** 2 * syy)
    return vxx, v2w, r.chi_parts.dipole[:, 1, 0, 0].real


@pytest.mark.slow
def test_fit_through_response_recovers_device_parameters():
    truth = {k: jnp.asarray(v) for k, v in TRUE.items()}
    vxx0, v2w0, chi0 = (np.asarray(a) for a in _device_signals(truth))
    rng = np.random.default_rng(5)
    s_v, s_2 = 0.005 * vxx0, 0.01 * np.abs(v2w0)
    vxx_d = vxx0 + s_v * rng.standard_normal(4)
    v2w_d = v2w0 + s_2 * rng.standard_normal(4)

    def res(p):
        vxx, v2w, _ = _device_signals(p)
        return jnp.concatenate([(vxx - vxx_d) / s_v, (v2w - v2w_d) / s_2])

    bounds = dict(mass=(0.02, 0.115), tilt=(0.0, 2e5), tau=(10.0, 500.0))
    r = fit(res, dict(mass=0.08, tilt=3e4, tau=70.0), bounds=bounds)
    assert r.converged, r.message
    for k in TRUE:
        assert abs(r.values[k] - TRUE[k]) < 2 * r.stderr[k], (k, r.values[k], r.stderr[k])
    names = list(TRUE)
    ref = _scipy_reference(res, names, np.array([0.08, 3e4, 70.0]), [b[0] for b in bounds.values()],
                           [b[1] for b in bounds.values()])
    np.testing.assert_allclose([r.values[k] for k in names], ref.x, rtol=1e-6)

    # a dipole-only signal fixes only τ·tilt (χ_BCD ∝ τ D, D ∝ tilt to first order, §5.5–6)
    chi_d = chi0 * (1 + 0.01 * rng.standard_normal(4))

    def res_dip(p):
        return (_device_signals(p)[2] - chi_d) / (0.01 * np.abs(chi0))

    d = fit(res_dip, dict(mass=0.1, tilt=3e4, tau=150.0), fixed={"mass"})
    assert any("tilt and tau are correlated" in w for w in d.identifiability_warnings), d.identifiability_warnings
