"""Sensitivities (∂field/∂knob) of the response: finite-difference agreement, closed-form
derivatives, linearity of the tilted-Dirac dipole, band touching and low temperature, the report
table, forward/reverse agreement and vmap.

All default-tier tests share one model structure (massive-dirac, one valley), one condition per
call and one mesh level, so they reuse two compiled programs (the response and its JVP)."""
import dataclasses

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from crosswind.models import build
from crosswind.models.units import ANGSTROM, E2_OVER_H, HBAR_EVS
from crosswind.solver import MatthiessenTau, response
from crosswind.solver.engine.response import ChiParts, Response
from crosswind.solver.engine.sensitivity import gradient, sensitivities, sensitivity_table
from crosswind.solver.pytrees import as_dict

LEVEL = 2            # converged for derivative integrands too (level 1 is not, for ∂/∂velocity)
PARAMS = dict(velocity=5e5, mass=0.1, tilt=5e4)          # docs/theory.md §6 set
COND = dict(mu=0.15, temperature=20.0, tau=100.0)
NAMES = ["mass", "tilt", "velocity", "mu", "temperature", "tau"]
STEPS = dict(mass=2e-6, tilt=1.0, velocity=20.0, mu=2e-6, temperature=1e-3, tau=1e-3)


def _resp(params=None, **cond):
    p = dict(PARAMS, **(params or {}))
    c = dict(COND, **cond)
    return response(build("massive-dirac", **p), resolution=LEVEL, **c)


def _shifted(name, h, params=None, cond=None):
    p, c = dict(PARAMS, **(params or {})), dict(COND, **(cond or {}))
    (c if name in c else p)[name] += h
    return response(build("massive-dirac", **p), resolution=LEVEL, **c)


def _leaves(r):
    """{"sigma": ..., "chi_parts.dipole": ..., ...}: every array of a Response except its error."""
    flat, _ = jax.tree_util.tree_flatten_with_path(dataclasses.replace(r, error=None))
    return {".".join(k.name for k in path): np.asarray(v) for path, v in flat}


@pytest.fixture(scope="module")
def base():
    model = build("massive-dirac", **PARAMS)
    value, sens = sensitivities(model, NAMES, resolution=LEVEL, with_value=True, **COND)
    return model, value, sens


def test_every_field_matches_central_differences(base):
    # common practice (docs/theory.md §A4): forward-mode derivatives against central differences
    _, value, sens = base
    for name in NAMES:
        h = STEPS[name]
        up, down = _leaves(_shifted(name, h)), _leaves(_shifted(name, -h))
        ad = _leaves(sens[name])
        for field, a in ad.items():
            if np.all(np.isnan(_leaves(value)[field])):
                assert np.all(np.isnan(a)), field          # not computed -> no derivative
                continue
            fd = (up[field] - down[field]) / (2 * h)
            scale = np.max(np.abs(fd))
            if name == "tau" and field in ("hall_coefficient", "seebeck", "lorenz"):
                # ratios of two ∝τ integrals: τ-independent for constant τ (derived, docs/theory.md §7–8)
                v = np.max(np.abs(_leaves(value)[field]))
                assert np.max(np.abs(a)) * COND["tau"] < 1e-10 * v, field
                continue
            assert np.isfinite(a).all(), (name, field)
            # a derivative that moves the field by < 1e-9 of itself per 100 % change of the knob counts
            # as zero (e.g. the Dirac DOS μ/(2π(ħv)²) depends on neither Δ nor T for μ in the band, §3)
            x = (PARAMS | COND)[name]
            floor = 1e-9 * np.max(np.abs(_leaves(value)[field])) / abs(x)
            np.testing.assert_allclose(a, fd, rtol=0, atol=max(1e-5 * scale, floor), err_msg=f"d{field}/d{name}")


def test_units_and_shapes(base):
    _, value, sens = base
    assert set(sens) == set(NAMES)
    assert sens["tau"].units["sigma"] == "(S) / (fs)"
    assert sens["mass"].units["chi"] == "(A m V^-2) / (eV)"
    assert sens["temperature"].units["dipole"] == "(m) / (K)"
    leaves, values = _leaves(sens["mu"]), _leaves(value)
    assert set(leaves) == set(values) and len(leaves) == 23      # 17 arrays (chi_dc_full, chi_circular incl.) + 2 × 3 χ parts
    for f, a in leaves.items():
        assert np.shape(a) == np.shape(values[f]), f
    assert isinstance(sens["mu"], Response) and isinstance(sens["mu"].chi_parts, ChiParts)
    assert set(as_dict(sens["mu"].chi_parts)) == {"dipole", "drude", "intrinsic"}
    # the error estimate has the structure of the response: |∂(error)/∂mu| per field, real
    err = sens["mu"].error
    assert isinstance(err, Response) and err.error is None and err.resolution is None
    assert err.chi_parts.dipole.shape == value.chi_parts.dipole.shape
    assert not np.iscomplexobj(np.asarray(err.sigma)) and err.units["sigma"] == "(S) / (eV)"
    assert np.all(np.isnan(np.asarray(sens["mu"].dipole_sea)))     # dipole_route="surface": not computed


def test_drude_and_dipole_are_linear_in_tau(base):
    # derived in docs/theory.md §5.2 and §5.5: at ω = 0 σ^Drude ∝ τ, χ^BCD ∝ τ, χ^ND ∝ τ², χ^int ∝ τ⁰
    _, value, sens = base
    tau = COND["tau"]
    d = sens["tau"]
    def same(a, b):   # equal to rounding; symmetry-zero components compared on the field's own scale
        a, b = np.asarray(a), np.asarray(b)
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-12 * np.max(np.abs(b)))

    np.testing.assert_allclose(d.sigma[0, 0], value.sigma[0, 0] / tau, rtol=1e-12)
    same(d.sigma_drude, value.sigma_drude / tau)
    same(d.chi_parts.dipole, value.chi_parts.dipole / tau)
    same(d.chi_parts.drude, 2 * value.chi_parts.drude / tau)
    same(d.dipole, 0.0 * value.dipole)
    np.testing.assert_allclose(d.sigma_anomalous, 0.0, atol=1e-30)
    np.testing.assert_allclose(d.chi_parts.intrinsic, 0.0, atol=1e-30)
    assert abs(value.chi_parts.dipole[1, 0, 0]) > 0


def test_tilted_dirac_dipole_linear_in_tilt_and_first_order_slope():
    # docs/theory.md §6 (first order in t/v, T = 0): D_x = -3ħtΔ(μ²-Δ²)/(8πμ⁴); the neglected
    # terms are O((t/v)²) relative (0.3 % at t/v = 0.1, §13.9), so at t/v = 0.01 D(2t) = 2D(t) to ~1e-4
    t = 5e3
    d1 = _resp({"tilt": t}, temperature=2.0).dipole[0]
    d2 = _resp({"tilt": 2 * t}, temperature=2.0).dipole[0]
    assert abs(d2 / (2 * d1) - 1) < 3e-4
    model0 = build("massive-dirac", **dict(PARAMS, tilt=0.0))
    s0 = sensitivities(model0, ["tilt"], resolution=LEVEL, **dict(COND, temperature=2.0))["tilt"]
    mu, mass = COND["mu"], PARAMS["mass"]
    slope = -3 * (HBAR_EVS / ANGSTROM) * mass * (mu ** 2 - mass ** 2) / (8 * np.pi * mu ** 4) * ANGSTROM
    np.testing.assert_allclose(s0.dipole[0], slope, rtol=2e-4)      # thermal correction ~(k_BT/0.05 eV)²
    np.testing.assert_allclose(d1 / t, slope, rtol=2e-4)
    # ∂D/∂tilt at finite tilt against central differences
    model = build("massive-dirac", **dict(PARAMS, tilt=t))
    st = sensitivities(model, ["tilt"], resolution=LEVEL, **dict(COND, temperature=2.0))["tilt"]
    fd = (_resp({"tilt": t + 1.0}, temperature=2.0).dipole[0] - _resp({"tilt": t - 1.0}, temperature=2.0).dipole[0]) / 2.0
    np.testing.assert_allclose(st.dipole[0], fd, rtol=1e-5)


def test_derivatives_finite_at_band_touching():
    # mass = 0: the bands touch at k = 0 (a point the quadrature never samples).  Closed form,
    # docs/theory.md §3: σ_xy = -(e²/2h)Δ/|μ| per valley for μ in the band, so ∂σ_xy/∂Δ = -(e²/2h)/μ
    cond = dict(COND, temperature=2.0)
    model = build("massive-dirac", **dict(PARAMS, mass=0.0))
    s = sensitivities(model, ["mass", "mu", "tilt"], resolution=LEVEL, **cond)
    for name, r in s.items():
        for field, a in _leaves(r).items():
            if field != "dipole_sea":
                assert np.all(np.isfinite(a)), (name, field)
    np.testing.assert_allclose(s["mass"].sigma_anomalous[0, 1].real, -0.5 * E2_OVER_H / COND["mu"], rtol=1e-4)
    h = 1e-6
    up = _resp({"mass": h}, temperature=2.0)
    down = _resp({"mass": -h}, temperature=2.0)
    np.testing.assert_allclose(s["mass"].dipole[0], (up.dipole[0] - down.dipole[0]) / (2 * h), rtol=1e-5)
    np.testing.assert_allclose(s["mass"].sigma_anomalous[0, 1].real,
                               (up.sigma_anomalous[0, 1].real - down.sigma_anomalous[0, 1].real) / (2 * h), rtol=1e-5)


def test_derivatives_at_low_temperature():
    # common practice: central differences, with steps well inside k_BT (T = 1 K: k_BT = 86 µeV)
    cond = dict(COND, temperature=1.0)
    model = build("massive-dirac", **PARAMS)
    s = sensitivities(model, ["mu", "temperature"], resolution=LEVEL, **cond)
    for field in ("sigma", "dipole", "chi"):
        assert np.all(np.isfinite(np.asarray(getattr(s["mu"], field))))
        assert np.all(np.isfinite(np.asarray(getattr(s["temperature"], field))))
    h = 1e-7
    fd = (_resp(mu=COND["mu"] + h, temperature=1.0).dipole[0] - _resp(mu=COND["mu"] - h, temperature=1.0).dipole[0]) / (2 * h)
    np.testing.assert_allclose(s["mu"].dipole[0], fd, rtol=1e-5)
    # below the 1 mK floor the response is the T = 0 limit: zero and finite temperature derivative
    s0 = sensitivities(model, ["temperature"], resolution=LEVEL, **dict(COND, temperature=0.0))["temperature"]
    assert np.all(np.asarray(s0.sigma) == 0) and np.all(np.asarray(s0.dipole) == 0)


def test_sensitivity_table_orders_changes_per_step(base):
    model, value, sens = base
    target = lambda r: r.chi[1, 0, 0].real
    steps = {"tau": 1.0, "temperature": 1.0, "tilt": 1e3, "mass": 1e-3}   # per fs, per K, per 1 km/s, per meV
    rows = sensitivity_table(model, target, steps, resolution=LEVEL, **COND)
    assert [r.knob for r in rows] == sorted(steps, key=lambda k: -abs(float(sens[k].chi[1, 0, 0].real) * steps[k]))
    for r in rows:
        expect = float(sens[r.knob].chi[1, 0, 0].real) * steps[r.knob]
        np.testing.assert_allclose(r.change, expect, rtol=1e-12)
        np.testing.assert_allclose(r.relative, expect / float(value.chi[1, 0, 0].real), rtol=1e-12)
    units = {r.knob: r.unit for r in rows}
    assert units == {"tau": "fs", "temperature": "K", "tilt": "m/s", "mass": "eV"}
    # χ_BCD ∝ τ (§5.5): the change per femtosecond is χ/τ
    np.testing.assert_allclose(next(r for r in rows if r.knob == "tau").relative, 1.0 / COND["tau"], rtol=1e-6)


def test_bad_names_and_options_are_explained():
    model = build("massive-dirac", **PARAMS)
    with pytest.raises(ValueError, match="Did you mean 'tilt'"):
        sensitivities(model, ["tlit"], resolution=LEVEL, **COND)
    with pytest.raises(ValueError, match="structural"):
        sensitivities(model, ["valleys"], resolution=LEVEL, **COND)
    with pytest.raises(ValueError, match="resolution=2"):
        sensitivities(model, ["mu"], resolution=None, **COND)
    with pytest.raises(ValueError, match="constant relaxation time"):
        sensitivities(model, ["tau"], mu=0.15, temperature=20.0, tau=MatthiessenTau(100.0, 300.0), resolution=LEVEL)
    with pytest.raises(ValueError, match="gradient"):
        sensitivities(model, ["mu"], resolution=LEVEL, mode="reverse", **COND)
    with pytest.raises(ValueError, match="step for 'tau'"):
        sensitivity_table(model, lambda r: r.chi[1, 0, 0].real, {"tau": 0.0}, resolution=LEVEL, **COND)


@pytest.mark.slow
def test_forward_and_reverse_mode_agree(base):
    # common practice (docs/theory.md §A4): reverse mode (jax.grad) against forward mode
    model, _, sens = base
    target = lambda r: r.chi[1, 0, 0].real + 1e9 * r.sigma[0, 0].real * r.dipole[0]
    rev = gradient(model, target, NAMES, resolution=LEVEL, **COND)
    fwd = gradient(model, target, NAMES, resolution=LEVEL, mode="forward", **COND)
    for n in NAMES:
        assert np.isfinite(rev[n])
        np.testing.assert_allclose(rev[n], fwd[n], rtol=1e-10, atol=0)
    np.testing.assert_allclose(fwd["tilt"], sens["tilt"].chi[1, 0, 0].real
                               + 1e9 * (sens["tilt"].sigma[0, 0].real * _resp().dipole[0]
                                        + _resp().sigma[0, 0].real * sens["tilt"].dipole[0]), rtol=1e-10)


@pytest.mark.slow
def test_vmap_over_mu_matches_pointwise(base):
    # common practice (docs/theory.md §A4): derivatives under jax.vmap equal the pointwise ones
    model, _, _ = base
    mus = jnp.array([0.12, 0.15, 0.2])
    target = lambda r: r.dipole[0]

    def one(mu):
        return gradient(model, target, ["mass", "tilt"], mu=mu, temperature=COND["temperature"], tau=COND["tau"],
                        resolution=LEVEL, mode="forward")

    batched = jax.vmap(one)(mus)
    swept = sensitivities(model, ["mass", "tilt", "mu"], resolution=LEVEL, **dict(COND, mu=mus))
    for i, mu in enumerate(np.asarray(mus)):
        s = sensitivities(model, ["mass", "tilt", "mu"], resolution=LEVEL, **dict(COND, mu=float(mu)))
        for n in ("mass", "tilt"):
            np.testing.assert_allclose(batched[n][i], s[n].dipole[0], rtol=1e-10)
        for n in ("mass", "tilt", "mu"):       # an array condition: each point against its own value
            np.testing.assert_allclose(swept[n].dipole[i], s[n].dipole, rtol=1e-10, atol=1e-10 * abs(s[n].dipole[0]))
            np.testing.assert_allclose(swept[n].sigma[i], s[n].sigma, rtol=1e-10, atol=1e-10 * abs(s[n].sigma[0, 0]))


@pytest.mark.slow
def test_batched_tangents_match_one_by_one(base):
    model, _, sens = base
    batched = sensitivities(model, NAMES, resolution=LEVEL, mode="jacfwd", **COND)
    for n in NAMES:
        for f in ("sigma", "dipole", "chi", "density"):
            # components that vanish by symmetry (here χ_yyy of the x-tilted cone, ~1e-13 of the
            # largest component) are rounding noise: judged against the field's scale, as above
            want = np.asarray(getattr(sens[n], f))
            np.testing.assert_allclose(np.asarray(getattr(batched[n], f)), want,
                                       rtol=1e-10, atol=1e-10 * np.max(np.abs(want)))
