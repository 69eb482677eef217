"""The energy-resolved temperature ladder (solver/engine/ladder.py, docs/theory.md §14.2).

References the project did not write: a plain numpy uniform-grid quadrature
(validation/fermi_contour.uniform_grid_reference, converged to ~1e-14 at n = 600 for these
conditions) and the moment conditions of cubic Lagrange interpolation (common practice).
"""
import dataclasses
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy.optimize import minimize

from crosswind.models import build
from crosswind.solver import response
from crosswind.solver.engine import ladder as ld
from crosswind.solver.engine import response as resp_engine
from crosswind.solver.engine.occupation import thermal_energy
from crosswind.solver.engine.scattering import (
    ConstantTau,
    MatthiessenTau,
    PowerLawTau,
    as_scattering,
    energy_free,
    temperature_free,
)
from crosswind.validation.fermi_contour import uniform_grid_reference

MU = np.array([1.2, 1.3])
T = np.array([300.0, 100.0])
TAU = 50.0


def test_lagrange_deposition_preserves_moments_up_to_third_order():
    delta = 0.37
    for t in (0.0, 0.13, 0.5, 0.91):
        w = np.asarray(ld._lagrange(jnp.asarray(t)))
        knots = np.arange(-1, 3) * delta
        eps = t * delta
        for m in range(4):
            np.testing.assert_allclose(np.sum(w * (knots - eps) ** m), 0.0 ** m if m else 1.0,
                                       atol=1e-14)


@pytest.fixture(scope="module")
def haldane_ladder():
    model = build("haldane")
    mu, temp = jnp.asarray(MU), jnp.asarray(T)
    scat = as_scattering(TAU)
    tau = jax.tree_util.tree_map(lambda a: jnp.broadcast_to(a, (2,))[:, None], scat.arrays())
    plan = ld.make_plan(model, model.params, mu, temp, 0)

    @partial(jax.jit, static_argnames=("plan",))
    def run(model, mu, temp, plan):
        return ld.ladder_moments(model, model.params, plan, mu, thermal_energy(temp), temp,
                                 type(scat).evaluate, tau, 0.0, 1, False)

    f, c, ex, info = run(model, mu, temp, plan)
    if bool(info["overflow"]):     # budgets from the reported counts, as response() does
        plan = ld.make_plan(model, model.params, mu, temp, 0, flagged=np.asarray(info["flagged"]), old=plan)
        f, c, ex, info = run(model, mu, temp, plan)
    assert not bool(info["overflow"])
    return model, plan, run, f, c


def test_ladder_matches_an_independent_uniform_grid(haldane_ladder):
    """Haldane model (t2 = 0.1, φ = π/2) in the upper band: density of states, Drude weight,
    Fermi-sea Berry curvature and density against the plain numpy grid, within the nested
    error estimate, which must itself be small."""
    model, plan, _, f, c = haldane_ladder
    vol = float(jnp.abs(jnp.linalg.det(model.reciprocal_vectors())) / (2 * np.pi) ** 2)
    for p in range(2):
        ref = uniform_grid_reference(model, float(MU[p]), float(T[p]), 600)
        pairs = (("dos", ref["dos"], lambda m, p=p: m.dos[p]),
                 ("drude_xx", ref["drude"][0, 0], lambda m, p=p: m.drude0[p, 0, 0] / TAU),
                 ("drude_yy", ref["drude"][1, 1], lambda m, p=p: m.drude0[p, 1, 1] / TAU),
                 ("ahe", ref["ahe"], lambda m, p=p: m.ahe[p]),
                 ("density", ref["density"] - vol, lambda m, p=p: m.density[p]))
        for name, want, get in pairs:
            got, est = float(get(f)), abs(float(get(f)) - float(get(c)))
            assert est < 1e-3 * abs(want), (name, p, est)
            assert abs(got - want) <= max(est, 1e-9 * abs(want)), (name, p, got, want, est)


def test_new_conditions_reuse_the_compiled_ladder(haldane_ladder):
    model, plan, run, f, _ = haldane_ladder
    before = run._cache_size()
    f2, *_ = run(model, jnp.asarray([1.25, 1.35]), jnp.asarray([200.0, 150.0]), plan)
    assert run._cache_size() == before
    assert np.all(np.isfinite(np.asarray(f2.dos)))


def test_a_chunk_of_hot_conditions_skips_the_levels_it_does_not_need_exactly(haldane_ladder):
    """Conditions are sorted hot to cold and processed in chunks; a chunk whose conditions are all
    hotter than level l's parent skips level l (its sums are exactly zero there).  One condition
    per chunk, given in the reverse order: the same sums as both in one chunk."""
    model, plan, _, f, c = haldane_ladder
    ktl = np.asarray(ld.ladder_temperatures(model, model.params, plan)[0])
    assert plan.levels >= 3 and thermal_energy(300.0) >= ktl[2]        # 300 K skips level 3 and up
    scat = as_scattering(TAU)
    tau = jax.tree_util.tree_map(lambda a: jnp.broadcast_to(a, (2,))[:, None], scat.arrays())
    temp = jnp.asarray(T[::-1])
    f1, c1, _, _ = jax.jit(lambda m: ld.ladder_moments(m, m.params, plan, jnp.asarray(MU[::-1]), thermal_energy(temp),
                                                       temp, type(scat).evaluate, tau, 0.0, 1, False,
                                                       condition_chunk=1))(model)
    for got, want in ((f1, f), (c1, c)):
        for name in ("density", "dos", "drude", "dipole", "ahe", "bcp"):
            a, b = np.asarray(getattr(got, name))[::-1], np.asarray(getattr(want, name))
            np.testing.assert_allclose(a, b, rtol=1e-13, atol=1e-13 * np.abs(b).max(), err_msg=name)


def test_padding_chunks_of_a_refined_level_are_skipped_without_changing_the_sums(haldane_ladder):
    """A plan with every refined budget raised by whole chunks of padding (zero-weight cells that
    the scan skips) gives the same fine and coarse sums as the fitted plan, and every level flags the same number of
    cells (the skipped points' outputs are never read)."""
    from dataclasses import replace
    model, plan, run, f, c = haldane_ladder
    wide = replace(plan, budgets=tuple(b + 3 * 4096 // 4 for b in plan.budgets))
    f2, c2, _, info = run(model, jnp.asarray(MU), jnp.asarray(T), wide)
    assert not bool(info["overflow"])
    info0 = run(model, jnp.asarray(MU), jnp.asarray(T), plan)[3]
    np.testing.assert_array_equal(np.asarray(info["flagged"]), np.asarray(info0["flagged"]))
    for got, want in ((f2, f), (c2, c)):
        for name in ("density", "dos", "drude", "dipole", "ahe", "bcp"):
            a, b = np.asarray(getattr(got, name)), np.asarray(getattr(want, name))
            np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-13 * np.abs(b).max(), err_msg=name)


def test_response_engine_option_and_k_point_count():
    model = build("haldane")
    dirac = build("massive-dirac")
    assert response(dirac, mu=0.15, temperature=10.0, tau=100.0).resolution.engine == "rays"
    assert response(dirac, mu=0.15, temperature=10.0, tau=100.0, resolution=1).resolution.engine == "mesh"
    r = response(model, mu=1.2, temperature=300.0, tau=TAU, engine="ladder", resolution=0)
    info = r.resolution
    assert info.engine == "ladder" and info.attempts >= 1 and info.levels == info.plan.levels
    # every attempt is counted: the final plan's points, plus those of runs that overflowed
    assert info.k_points >= info.plan.k_points(2)
    assert (info.k_points == info.plan.k_points(2)) == (info.attempts == 1)
    m = response(model, mu=1.2, temperature=300.0, tau=TAU, resolution=3)
    minfo = m.resolution
    assert minfo.k_points == minfo.nodes_per_condition + response(
        model, mu=1.2, temperature=300.0, tau=TAU, resolution=2).resolution.nodes_per_condition
    for name in ("dos", "density"):
        a, b = float(getattr(r, name)), float(getattr(m, name))
        assert abs(a - b) <= 2 * (float(getattr(r.error, name)) + float(getattr(m.error, name))) + 1e-9 * abs(b), name
    s1, s2 = float(r.sigma[0, 0].real), float(m.sigma[0, 0].real)
    assert abs(s1 - s2) <= 2 * (float(r.error.sigma[0, 0]) + float(m.error.sigma[0, 0])) + 1e-9 * abs(s2)


def test_auto_engine_keeps_the_node_quadrature_for_hot_3d_lattices():
    """The ladder is not affordable in 3D (measured: Weyl model at 30 K above 8 GiB after 14 min):
    'auto' routes a 3D lattice above TETRA_AUTO_MAX_T to the node quadrature (below it to the
    tetrahedra: tests/test_tetra.py)."""
    r = response(build("weyl"), mu=0.05, temperature=300.0, tau=TAU, max_level=1)
    assert r.resolution.engine == "mesh"


def test_ladder_refuses_continuum_models_and_unknown_engines():
    dirac = build("massive-dirac")
    with pytest.raises(ValueError, match="engine='mesh' for continuum"):
        response(dirac, mu=0.15, temperature=10.0, tau=100.0, engine="ladder")
    with pytest.raises(ValueError, match="engine must be 'auto', 'mesh'"):
        response(dirac, mu=0.15, temperature=10.0, tau=100.0, engine="fast")


@pytest.mark.slow
def test_gradient_in_mu_matches_finite_differences_with_a_fixed_plan():
    """∂σ_xx/∂μ by jax.grad through the ladder (plan from a concrete call) against central
    differences; knots sit on a fixed lattice, so small steps of μ do not move them."""
    model = build("haldane")
    plan = response(model, mu=1.2, temperature=300.0, tau=TAU, engine="ladder", resolution=0).resolution.plan
    f = lambda mu: response(model, mu=mu, temperature=300.0, tau=TAU, engine="ladder", resolution=0,
                            plan=plan).sigma[0, 0].real
    g = float(jax.grad(f)(1.2))
    h = 1e-5
    fd = float((f(1.2 + h) - f(1.2 - h)) / (2 * h))
    assert abs(g - fd) <= 1e-7 * abs(fd)


@pytest.mark.slow
def test_gradient_in_a_model_parameter_matches_finite_differences():
    """∂σ_xx/∂t2 of the Haldane model by jax.grad with a fixed plan (fixed temperature ladder and
    level-0 grid) against central differences.  Cell selection still follows the bands, and a cell
    entering a window adds weight ~e^{-W}: measured, the difference quotient settles at ~1e-5
    relative for steps 1e-6–1e-5 (grad − FD: 4.7e-6 at h = 1e-5)."""
    plan = response(build("haldane"), mu=1.2, temperature=300.0, tau=TAU, engine="ladder",
                    resolution=0).resolution.plan
    f = lambda t2: response(build("haldane", t2=t2), mu=1.2, temperature=300.0, tau=TAU,
                            engine="ladder", resolution=0, plan=plan).sigma[0, 0].real
    g = float(jax.grad(f)(0.1))
    h = 1e-5
    fd = float((f(0.1 + h) - f(0.1 - h)) / (2 * h))
    assert np.isfinite(g)
    assert abs(g - fd) <= 2e-5 * abs(fd)


@pytest.mark.slow
def test_tight_binding_file_against_an_independent_uniform_grid():
    """The square-lattice Chern model read from a tight-binding file (models/data/square_chern.toml),
    μ 50 meV above the conduction-band bottom, 100 K: density of states and Fermi-sea Berry
    curvature by the ladder (automatic, rtol 1e-3) against the numpy grid (n = 1200; unchanged at
    n = 1600), within the ladder's own estimate."""
    import importlib.resources as ir

    from scipy import constants as sc

    from crosswind.models import load_tight_binding
    model = load_tight_binding(str(ir.files("crosswind.models").joinpath("data/square_chern.toml")))
    mu = 1.05
    ref = uniform_grid_reference(model, mu, 100.0, 1200)
    r = response(model, mu=mu, temperature=100.0, tau=TAU)
    assert r.resolution.engine == "ladder" and r.resolution.converged
    g = model.degeneracy
    dos, dos_err = float(r.dos) * sc.e / g / 1e20, float(r.error.dos) * sc.e / g / 1e20
    q = sc.e ** 2 / sc.hbar * g
    ahe, ahe_err = -float(r.sigma_anomalous[0, 1].real) / q, float(r.error.sigma_anomalous[0, 1]) / q
    assert abs(dos - ref["dos"]) <= dos_err and dos_err < 1e-4 * ref["dos"]
    assert abs(ahe - ref["ahe"]) <= ahe_err and ahe_err < 1e-4 * abs(ref["ahe"])


def _merged_windows(mu, R):
    """The union of the windows [μ − R, μ + R] as disjoint intervals, merged in a plain loop."""
    merged = []
    for m in np.sort(mu):
        if merged and m - R <= merged[-1][1]:
            merged[-1][1] = m + R
        else:
            merged.append([m - R, m + R])
    return merged


@pytest.mark.parametrize("extra,n0", [(0, 48), (1, 48), (0, 288)])
def test_level_budget_counts_match_a_plain_numpy_count(extra, n0):
    """The compiled per-level count of flagged cells (budget sizing) against the same estimate
    written out in numpy (one level at a time, energies and speeds from band_geometry, the union
    of the conditions' windows merged interval by interval) on the grid it uses (level 0 for
    n0 = 48; from ladder.COUNT_HALF on the n0/2 grid with second-order Taylor energies and
    gradients at the level-0 cell centres), and against the count on the level-0 grid itself
    (within 0.1 % here); with a fifth condition the compiled count pads the conditions to 8."""
    from crosswind.models.geometry import band_geometry
    model = build("honeycomb", staggered=0.2, strain_xx=0.01)
    dim = 2
    mu = np.array([0.25, 0.3, 0.31, 0.6, 0.45][:4 + extra])
    kt = np.asarray(thermal_energy(np.array([40.0, 10.0, 200.0, 5.0, 20.0][:4 + extra])))
    ktl = 0.02 / 2.0 ** np.arange(8)                   # the last parent is colder than every condition
    got = ld._level_counts(model, model.params, n0, mu, kt, ktl)
    b = np.asarray(model.reciprocal_vectors(model.params))
    hd0 = 0.5 * np.sqrt(np.sum(b * b)) / n0

    def count(n):
        # bands on the n-grid; for n = n0/2 each point is the corner of 2² level-0 cells, whose
        # centres get the second-order Taylor energies and gradients (δk = ±h/2 per axis)
        geo = band_geometry(model, jnp.asarray(ld._grid(n, dim) @ b))
        e = np.asarray(geo.energies)
        g = np.asarray(geo.energy_gradient)                            # (N, nb, d)
        if n != n0:
            h = np.asarray(geo.energy_hessian)                         # (N, nb, d, d)
            dks = [np.array([sx, sy]) / n0 @ b for sx in (-0.5, 0.5) for sy in (-0.5, 0.5)]
            e = np.concatenate([e + g @ dk + 0.5 * np.einsum("nbde,d,e->nb", h, dk, dk) for dk in dks])
            g = np.concatenate([g + h @ dk for dk in dks])
        gn = np.linalg.norm(g, axis=-1)
        out = []
        for lev in range(1, len(ktl)):
            rel = mu[kt < ktl[lev - 1]]
            if rel.size == 0:
                out.append(0.0)
                continue
            R = ld.W * ktl[lev - 1] + ld.SLACK * gn.max() * hd0 / 2 ** (lev - 1)
            merged = _merged_windows(rel, R)
            s = np.maximum(gn * hd0, 1e-12)
            overlap = sum(np.clip(np.minimum(e + s, hi) - np.maximum(e - s, lo), 0.0, None) for lo, hi in merged)
            out.append(float(np.sum(np.max(overlap / (2 * s), axis=-1))) * 2 ** (dim * (lev - 1)))
        return out

    want = count(n0 // 2 if n0 >= ld.COUNT_HALF else n0)
    assert want[0] > 0 and want[-1] == 0.0          # a level no condition needs counts nothing
    np.testing.assert_allclose(got, want, rtol=1e-9)
    np.testing.assert_allclose(got, count(n0), rtol=1e-3)


def test_level_counts_compile_once_per_power_of_two_of_conditions():
    model = build("haldane")
    ktl = 0.02 / 2.0 ** np.arange(4)
    kt = np.asarray(thermal_energy(np.full(7, 20.0)))
    mu = np.linspace(1.0, 1.3, 7)
    ld._level_counts(model, model.params, 16, mu[:5], kt[:5], ktl)
    before = ld._level_fractions._cache_size()
    for n in (6, 7):
        ld._level_counts(model, model.params, 16, mu[:n], kt[:n], ktl)
    assert ld._level_fractions._cache_size() == before


def _random_sums_inputs(P, M, nc, seed=0):
    rng = np.random.default_rng(seed)
    table = jnp.asarray(rng.normal(size=(M, nc)))
    below = jnp.asarray(rng.normal(size=(nc,)))
    mu = jnp.asarray(np.sort(rng.uniform(0.05, 0.07, P)))
    kt = jnp.asarray(rng.uniform(0.4e-3, 0.9e-3, P))
    tau = {"tau0": jnp.full((P, 1), 80.0)}
    return table, below, mu, kt, tau


@pytest.mark.parametrize("first", [True, False, "views"])
def test_shared_slice_knot_sums_equal_per_condition_windows(first):
    """The matrix-product form over one shared table slice (chunks of ≥ SHARED_MIN conditions)
    gives the sums of one gathered window per condition (small chunks), to rounding; also on
    level 0's second view (``views``: knots 2δ, the form hot conditions read)."""
    layout, nc = ld.factor_layout(2, False)
    P, M, rho = 96, 1024, 6.0
    table, below, mu, kt, tau = _random_sums_inputs(P, M, nc)
    acc, view = (table, below), None
    if first == "views":
        acc, view = ld.hot_views(acc, 2), jnp.ones((P,), jnp.int32)
    e_lo, delta = 0.03, 0.9e-3 / rho / (2 if first is False else 1) / (2 if first == "views" else 1)
    tau_eval = as_scattering(80.0).evaluate
    kt_lo = 0.5 * kt if first is False else kt
    kt_win = jnp.full((P,), 0.9e-3) if first is False else kt
    temp = kt / 8.617333262e-5

    def sums(sl):
        return ld._level_sums(acc, e_lo, delta, mu[sl], kt[sl], kt_lo[sl], kt_win[sl], temp[sl],
                              tau_eval, {"tau0": tau["tau0"][sl]}, None, layout, False, rho, first is not False,
                              0.0, None if view is None else view[sl])

    shared = sums(slice(None))
    assert P >= ld.SHARED_MIN
    own = [sums(slice(i, i + 8)) for i in range(0, P, 8)]
    for field in ("density", "dos", "drude", "dipole", "ahe", "bcp", "drude2_2w", "thermo2", "nernst"):
        a = np.asarray(getattr(shared, field))
        b = np.concatenate([np.asarray(getattr(o, field)) for o in own])
        np.testing.assert_allclose(a, b, rtol=1e-11, atol=1e-11 * np.max(np.abs(b)))


def test_window_coverage_measures_the_union_of_the_windows():
    """Length of (−∞, x] inside the union of [μ − R, μ + R] over the relevant conditions, against
    the intervals merged in a plain loop (overlapping, repeated and isolated μ; conditions not
    relevant leave no window; none relevant: zero)."""
    rng = np.random.default_rng(3)
    mu = np.concatenate([rng.uniform(0.0, 1.0, 12), [0.5, 0.5, 2.0]])
    relevant = np.ones(mu.size, bool)
    relevant[[1, 4]] = False
    R = 0.04
    x = np.linspace(-0.2, 2.2, 301)
    merged = _merged_windows(mu[relevant], R)
    want = sum(np.clip(x - lo, 0.0, hi - lo) for lo, hi in merged)
    got = ld.window_coverage(jnp.asarray(x), jnp.asarray(mu), jnp.asarray(relevant), R)
    np.testing.assert_allclose(np.asarray(got), want, rtol=0, atol=1e-14)
    none = ld.window_coverage(jnp.asarray(x), jnp.asarray(mu), jnp.zeros(mu.size, bool), R)
    assert np.all(np.asarray(none) == 0.0)


def test_sweep_groups_join_conditions_with_equal_keys_only():
    keys = np.array([[0.1, 50.0], [0.2, 50.0], [0.1, 50.0], [0.1, 80.0], [0.2, 50.0], [0.1, 80.0],
                     [0.1, 50.0], [0.2, 50.0]])
    rep, group = (np.asarray(a) for a in ld.sweep_groups(keys, chunk=2))
    assert rep.shape == (4,) and group.shape == (8,)                # 3 distinct keys, padded to 4
    np.testing.assert_array_equal(keys[rep[group]], keys)           # every condition's row holds its key
    assert len(set(group.tolist())) == 3
    assert ld.sweep_groups(keys, chunk=8) is None                   # fewer than 2 chunks of conditions
    assert ld.sweep_groups(np.arange(16.0)[:, None], chunk=2) is None   # all distinct: nothing to share


@pytest.mark.parametrize("engine", ["ladder", pytest.param("tetra", marks=pytest.mark.slow)])
def test_a_sweep_sharing_its_ladder_temperature_sums_gives_the_same_response(engine, monkeypatch):
    """Conditions that differ in T alone (τ free of T) read the sums at the ladder temperatures
    from one member of their (μ, τ) group; the result must be that of every condition summing
    every level itself.  Temperatures cover every step of the ladder: hotter than its top level,
    inside each step, below the deepest level (T² extrapolation) and T = 0."""
    if engine == "ladder":
        model, mus = build("haldane"), [1.2, 1.25, 1.3]
        plan = ld.make_plan(model, model.params, jnp.asarray([1.25]), jnp.asarray([10.0]), 0)
        ktl = np.asarray(ld.ladder_temperatures(model, model.params, plan)[0]) / float(thermal_energy(1.0))
        temps = np.concatenate([[0.0], 0.7 * ktl, [1.3 * ktl[0]]])
    else:
        # the tetrahedra's temperature levels follow the conditions (20, 10, 5 K here)
        model, mus = build("weyl", tilt=0.3, node_position=0.3), [0.08, 0.1, 0.12]
        temps = np.array([5.0, 8.0, 12.0, 20.0])
    mu, temp, tau = np.meshgrid(mus, temps, [50.0, 80.0], indexing="ij")
    kw = dict(mu=mu, temperature=temp, tau=tau, engine=engine, resolution=0)
    used = []
    real = ld.sweep_groups

    def spy(keys, chunk=128):
        out = real(keys, chunk=2)
        used.append(out is not None and out[0].shape[0] < keys.shape[0])
        return out

    monkeypatch.setattr(ld, "sweep_groups", spy)
    shared = response(model, **kw)
    if engine == "ladder":
        # new sweep values of the same structure reuse the compiled program
        size = resp_engine._ladder_at._cache_size()
        response(model, **dict(kw, mu=mu + 0.01, temperature=temp * 1.1), plan=shared.resolution.plan)
        assert resp_engine._ladder_at._cache_size() == size
    monkeypatch.setattr(ld, "sweep_groups", lambda keys, chunk=128: None)
    apart = response(model, plan=shared.resolution.plan, **kw)
    assert used and all(used)
    for name in ("density", "dos", "sigma", "sigma_anomalous", "dipole", "chi", "chi_dc", "seebeck",
                 "thermal_conductivity", "nernst"):
        # the same sums up to rounding: values and their error estimates (differences of sums)
        # agree to 1e-9 of the field's largest value or estimate (the thermoelectric sums cancel
        # to ~1e-4 of their terms, the Haldane dipole vanishes by symmetry; a level counted twice
        # or left out differs by far more)
        err = np.asarray(getattr(apart.error, name))
        scale = max(np.max(np.abs(np.asarray(getattr(apart, name)))), np.max(err[np.isfinite(err)], initial=0.0))
        for a, b in ((getattr(shared, name), getattr(apart, name)),
                     (getattr(shared.error, name), getattr(apart.error, name))):
            a, b = np.asarray(a), np.asarray(b)
            assert np.array_equal(np.isfinite(a), np.isfinite(b)), name
            ok = np.isfinite(b)
            assert np.max(np.abs(a[ok] - b[ok]), initial=0.0) <= 1e-9 * scale, name


def test_a_temperature_dependent_tau_keeps_temperature_in_the_sharing_key():
    mu, temp = np.repeat([0.1, 0.2], 4), np.tile([1.0, 5.0, 10.0, 20.0], 2)
    tau = {"tau0": np.full(8, 50.0)}
    free = resp_engine._sharing_keys(mu, temp, tau, True)
    bound = resp_engine._sharing_keys(mu, temp, tau, False)
    assert free.shape == (8, 2) and bound.shape == (8, 3)
    assert len(np.unique(free, axis=0)) == 2 and len(np.unique(bound, axis=0)) == 8
    assert temperature_free(as_scattering(50.0)) and temperature_free(PowerLawTau(50.0, exponent=1.0))
    assert not temperature_free(MatthiessenTau(100.0, 50.0))

    class WarmingTau(ConstantTau):            # a subclass with a T-dependent τ of its own
        @staticmethod
        def evaluate(arr, energy, temperature):
            t = arr["tau0"] / (1.0 + temperature / 100.0) + 0.0 * energy
            return t, jnp.zeros_like(t)

    assert isinstance(as_scattering(WarmingTau(50.0)), WarmingTau) and not temperature_free(WarmingTau(50.0))


@pytest.mark.parametrize("dim,sea,shared", [(2, False, False), (2, True, True), (3, False, True), (3, True, False)])
@pytest.mark.parametrize("omega", [None, 0.05])
def test_energy_free_tau_leaves_the_knot_sums_with_the_same_moments(dim, sea, shared, omega):
    """A τ free of ε (constant, Matthiessen) is one number per condition: the sums that take it out
    of the knot sums (and drop the ∂τ/∂ε term) equal the general per-knot form to rounding."""
    layout, nc = ld.factor_layout(dim, sea)
    P, Q = 7, 40
    rng = np.random.default_rng(dim + 2 * sea)
    vals = jnp.asarray(rng.normal(size=(Q, nc) if shared else (P, Q, nc)))
    mu = jnp.asarray(rng.uniform(0.1, 0.2, P))
    kt = jnp.asarray(rng.uniform(1e-3, 5e-3, P))
    E = mu[:, None] + kt[:, None] * jnp.linspace(-20.0, 20.0, Q)[None, :] if not shared else \
        jnp.broadcast_to(jnp.linspace(0.05, 0.25, Q)[None, :], (P, Q))
    occ = ld._occupations(E, mu, kt)
    temp = kt / 8.617333262e-5
    for scat in (ConstantTau(jnp.asarray(rng.uniform(20.0, 90.0, P))), MatthiessenTau(400.0, 100.0)):
        fn = type(scat).evaluate
        assert energy_free(fn)
        arr = jax.tree_util.tree_map(lambda a: jnp.broadcast_to(a, (P,))[:, None], scat.arrays())
        free = ld._kernel_sums(vals, occ, E, mu, temp, fn, arr, omega, layout, sea)
        general = ld._kernel_sums(vals, occ, E, mu, temp, lambda a, e, t, fn=fn: fn(a, e, t), arr, omega, layout, sea)
        for name in free.__dataclass_fields__:
            a, b = getattr(free, name), getattr(general, name)
            if b is None:
                assert a is None, name
                continue
            a, b = np.asarray(a), np.asarray(b)
            assert a.shape == b.shape, name
            np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-12 * np.max(np.abs(b)), err_msg=name)


def test_only_the_energy_free_tau_functions_themselves_count_as_energy_free():
    assert energy_free(type(as_scattering(50.0)).evaluate) and energy_free(MatthiessenTau.evaluate)
    assert not energy_free(PowerLawTau.evaluate)

    class Inherited(ConstantTau):              # the same function: still free of ε
        pass

    class Warming(ConstantTau):                # its own τ(ε): never taken for energy-free
        @staticmethod
        def evaluate(arr, energy, temperature):
            t = arr["tau0"] * (1.0 + energy) ** 2
            return t, 2.0 * arr["tau0"] * (1.0 + energy)

    assert energy_free(Inherited.evaluate) and not energy_free(Warming.evaluate)


def _pocket_density_t0(m, mu, band=1):
    """n(μ, T = 0) of the conduction-band pockets around ±K: the areas of {ε < μ} around each band
    minimum (scipy Nelder–Mead from ±K), their boundaries found by bisection along 512 rays
    (star-shaped pockets); degeneracy × Σ area/(2π)², in m⁻².  Plain numpy on the model's H(k)."""
    H = jax.jit(jax.vmap(lambda k: m.H(k)[0]))
    eig = lambda k: np.linalg.eigvalsh(np.asarray(H(jnp.asarray(k))))[:, band]
    K = np.array([4 * np.pi / (3 * 2.46), 0.0])
    th = 2 * np.pi * (np.arange(512) + 0.5) / 512
    u = np.stack([np.cos(th), np.sin(th)], -1)
    area = 0.0
    for s in (1, -1):
        kc = minimize(lambda k: float(eig(k[None])[0]), s * K, method="Nelder-Mead",
                      options=dict(xatol=1e-10, fatol=1e-14, maxiter=4000)).x
        lo, hi = np.zeros(512), np.full(512, 0.1)
        for _ in range(60):
            mid = 0.5 * (lo + hi)
            below = eig(kc[None] + mid[:, None] * u) < mu
            lo, hi = np.where(below, mid, lo), np.where(below, hi, mid)
        area += np.pi * np.mean((0.5 * (lo + hi)) ** 2)
    return m.degeneracy * area / (2 * np.pi) ** 2 * 1e20


def test_t0_extrapolation_next_to_a_band_edge_is_bounded():
    """Below the deepest ladder level the sums are extrapolated in T²; with a band edge a few
    k_BT_L from μ a 2D density of states step makes X(T) − X(0) ∝ k_BT ln(1 + e^{−d/k_BT}), not
    T², and the spread of two extrapolations misses it (both agree on a wrong value).  Gapped,
    strained honeycomb, μ 1.5 meV above the conduction-band edge, T = 0, resolution 1
    (k_BT_L = 0.4 meV): the density against the pocket areas of an independent contour search
    must lie within the error (before the band-edge term: 9.5e12 m⁻² off with an error of
    1.7e12)."""
    m = build("honeycomb", staggered=0.2, strain_xx=0.01)
    mu = 0.2015
    r = response(m, mu=mu, temperature=0.0, tau=100.0, engine="ladder", resolution=1)
    ref = _pocket_density_t0(m, mu)
    assert abs(float(r.density) - ref) > 0.01 * ref          # the case is a hard one: 1.7 % off
    assert abs(float(r.density) - ref) <= float(r.error.density)


def test_coarsened_tables_keep_the_moments_of_every_state():
    """A level-0 table re-deposited onto knots of twice the spacing (the views hot conditions
    read) keeps Σ (E − c)^m, m ≤ 3, of the deposited states, as a direct deposit at 2δ does
    (moment conditions of cubic Lagrange interpolation, common practice); the states lie well
    inside the table, as every window does."""
    rng = np.random.default_rng(3)
    M, delta, e_lo = 256, 0.01, -1.0
    e = jnp.asarray(rng.uniform(e_lo + M * delta / 4, e_lo + 3 * M * delta / 4, (500, 2)))
    f = jnp.asarray(rng.normal(size=(500, 2, 3)))
    w = jnp.asarray(rng.uniform(0.5, 1.5, 500))
    acc = ld._deposit(ld._new_acc(M, 3), e, f, w, e_lo, delta)
    views = ld.hot_views(acc, 3)
    for v, (table, below) in enumerate(zip(*views)):
        knots = e_lo + np.arange(M) * delta * 2 ** v
        for m in range(4):
            want = np.einsum("n,nb,nbc->c", np.asarray(w), (np.asarray(e) - 0.3) ** m, np.asarray(f))
            got = np.asarray(table).T @ (knots - 0.3) ** m
            np.testing.assert_allclose(got, want, rtol=1e-11, atol=1e-11 * np.max(np.abs(want)))
        np.testing.assert_array_equal(np.asarray(below), 0.0)


def test_a_hot_partner_condition_leaves_a_cold_one_unchanged():
    """Level 0's knots stay k_BT_0/ρ apart whatever the hottest condition of the call; hotter
    conditions read coarsened views of the same table.  Gapped, strained honeycomb, μ = 0.3 eV at
    20 K, resolution 0: a (−1 eV, 6000 K) partner in the same call changed its density of states,
    Drude weight, dipole and density by 21–36 % when the partner set the level-0 spacing.  The hot
    condition itself must match a plain numpy uniform grid (converged at 6000 K) within its
    estimate, and a plan whose views do not reach the hot condition must report overflow."""
    m = build("honeycomb", staggered=0.2, strain_xx=0.01)
    scat = as_scattering(TAU)

    @partial(jax.jit, static_argnames=("plan",))
    def run(mu, temp, plan):
        tau = jax.tree_util.tree_map(lambda a: jnp.broadcast_to(a, mu.shape)[:, None], scat.arrays())
        return ld.ladder_moments(m, m.params, plan, mu, thermal_energy(temp), temp, type(scat).evaluate, tau,
                                 0.0, 1, False)

    def at(mu, temp):
        mu, temp = jnp.asarray(mu), jnp.asarray(temp)
        plan = ld.make_plan(m, m.params, mu, temp, 0)
        out = run(mu, temp, plan)
        assert not bool(out[3]["overflow"])
        return plan, out

    _, (alone, _, _, _) = at([0.3], [20.0])
    plan, (both, coarse, ex, _) = at([0.3, -1.0], [20.0, 6000.0])
    assert plan.views == 5 and plan.kt0 < 0.04
    for field in ("dos", "drude0", "dipole", "density"):
        a, b = np.asarray(getattr(alone, field))[0], np.asarray(getattr(both, field))[0]
        assert np.max(np.abs(a - b)) <= 1e-7 * np.max(np.abs(a)), field
    ref = uniform_grid_reference(m, -1.0, 6000.0, 400)
    vol = float(jnp.abs(jnp.linalg.det(m.reciprocal_vectors())) / (2 * np.pi) ** 2)
    for want, get in ((ref["dos"], lambda x: x.dos[1]), (ref["drude"][0, 0], lambda x: x.drude0[1, 0, 0] / TAU),
                      (ref["density"] - vol, lambda x: x.density[1])):
        err = abs(float(get(both)) - float(get(coarse))) + float(get(ex))
        assert abs(float(get(both)) - want) <= err
        assert err <= 1e-4 * abs(want)
    # a plan whose views stop below the hot condition (a plan reused for hotter conditions; the
    # table itself still holds the window): reported, never a window cut short in silence
    short = dataclasses.replace(plan, views=3)
    assert bool(run(jnp.asarray([0.3, -1.0]), jnp.asarray([20.0, 6000.0]), short)[3]["overflow"])


def test_mu_deep_in_a_gap_reports_the_window_truncation():
    """μ in the gap of the TMD lattice, 30–40 k_BT below the conduction band (100 and 150 K,
    resolution 1): the thermally activated sums lie at the edge of, or beyond, the windows of
    W k_BT, the same at every resolution, so |fine − coarse| cannot see what they lose.  The
    error must bound the distance to a plain numpy uniform grid (converged to 1e-14 at n = 300);
    before the window-truncation term (``ladder.window_tails``) the density of states was 3.0e19
    off with an error of 2.7e17, and 8.2e25 off with 2.0e25 (J⁻¹ m⁻²)."""
    m = build("tmd-lattice")
    mu, temp = [1.25, 1.3], [100.0, 150.0]
    r = response(m, mu=mu, temperature=temp, tau=100.0, engine="ladder", resolution=1)
    for p in range(2):
        ref = uniform_grid_reference(m, mu[p], temp[p], 300)["dos"] * m.degeneracy * 1e20 / 1.602176634e-19
        got, err = float(np.asarray(r.dos)[p]), float(np.asarray(r.error.dos)[p])
        assert abs(got - ref) > 0.02 * ref                     # the case is a hard one
        assert abs(got - ref) <= err
