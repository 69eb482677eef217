"""The shared-ray engine for continuum models (solver/engine/rays.py; docs/theory.md §14.3): closed forms,
an independent scipy quadrature, the node quadrature, sweeps, derivatives and refusals."""
import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import constants as C
from scipy.integrate import quad

from crosswind.models import build
from crosswind.solver import response
from crosswind.solver.engine import rays
from crosswind.solver.engine.occupation import thermal_energy
from crosswind.solver.engine.response import _rays_at
from crosswind.solver.engine.scattering import ConstantTau, MatthiessenTau
from validation.references import bilayer_box_grid, dirac_density, tilted_dipole_quadrature

TILTED = dict(velocity=5e5, mass=0.1, tilt=5e4)


def _info(r):
    return r.resolution


def test_dipole_matches_an_independent_scipy_quadrature_at_cryogenic_temperatures():
    """Tilted massive Dirac cone, μ = 0.15 eV: the automatic engine is the shared-ray rule; its D_x
    agrees with scipy.integrate.quad of the Fermi-surface integral (validation/references.py) to
    rtol, and the error estimate bounds the true error."""
    m = build("massive-dirac", **TILTED)
    for T in (2.0, 10.0, 20.0):
        r = response(m, mu=0.15, temperature=T, tau=100.0, rtol=1e-4)
        info = _info(r)
        assert info.engine == "rays" and info.converged
        ref = tilted_dipole_quadrature(TILTED, {"mu": 0.15, "temperature": T})
        err = abs(float(r.dipole[0]) - ref)
        assert err <= 1e-4 * abs(ref), (T, err / abs(ref))
        assert err <= float(r.error.dipole[0]), (T, err, float(r.error.dipole[0]))


def test_a_cold_window_inside_a_hot_one_is_resolved():
    """One call at 1 K and 20 K at the same μ: the graded breakpoints used to step over the cold
    window from inside the hot one (D_x at 1 K came out −3.55e-12 m instead of −9.67e-12 m).  Now
    the 1 K condition agrees with the scipy reference (validation/references.py) as a call of its own does."""
    m = build("massive-dirac", **TILTED)
    both = response(m, mu=np.array([0.15, 0.15]), temperature=np.array([1.0, 20.0]), tau=100.0,
                    engine="rays", resolution=1)
    alone = response(m, mu=0.15, temperature=1.0, tau=100.0, engine="rays", resolution=1)
    ref = tilted_dipole_quadrature(TILTED, {"mu": 0.15, "temperature": 1.0})
    assert abs(float(both.dipole[0, 0]) - ref) <= 1e-3 * abs(ref)
    assert abs(float(alone.dipole[0]) - ref) <= 1e-3 * abs(ref)


@pytest.mark.parametrize("T", [0.0, 0.3, 1.0, 10.0])
def test_density_follows_the_sommerfeld_closed_form(T):
    """Massive Dirac cone, μ = 0.15 eV, Δ = 0.1 eV: the density of states is linear above the gap,
    so n(T) = (μ² − Δ²)/(4πħ²v²) + (π²/6)(k_BT)²/(2πħ²v²) up to terms e^{−(μ−Δ)/k_BT} (Sommerfeld
    expansion, exact for a linear density of states; common practice).  T = 0 and 0.3 K are
    reached by the T² extrapolation."""
    p = dict(velocity=5e5, mass=0.1)
    m = build("massive-dirac", **p)
    r = response(m, mu=0.15, temperature=T, tau=100.0)
    hv = p["velocity"] * C.hbar / C.e * 1e10
    kt = C.k / C.e * T
    exact = dirac_density(p, {"mu": 0.15}) + (np.pi ** 2 / 6) * kt ** 2 / (2 * np.pi * hv ** 2) * 1e20
    assert abs(float(r.density) / exact - 1) < 1e-8
    assert _info(r).engine == "rays"


@pytest.mark.parametrize("T", [0.0, 1.0])
def test_gap_hall_conductivity_is_half_quantised(T):
    """Single massive Dirac cone with μ in the gap: σ_xy = −sgn(Δ) e²/2h (Xiao, Yao, Niu, PRL 99,
    236809, 2007): the whole valence band below the knot tables, down to k = ∞, enters."""
    m = build("massive-dirac", velocity=5e5, mass=0.1)
    r = response(m, mu=0.0, temperature=T, tau=100.0)
    exact = -C.e ** 2 / (2 * C.h)
    assert abs(float(r.sigma_anomalous[0, 1].real) / exact - 1) < 1e-6


def test_agrees_with_the_node_quadrature_on_the_six_band_tmd_model():
    """Strained MoS2 (tmd, both valleys and spins) at 10 K: the shared rays and the per-condition
    node quadrature at a high level agree within the rays' own error estimate."""
    m = build("tmd", material="MoS2", strain_xx=0.01)
    r = response(m, mu=0.85, temperature=10.0, tau=100.0)
    ref = response(m, mu=0.85, temperature=10.0, tau=100.0, engine="mesh", resolution=4)
    assert _info(r).engine == "rays" and _info(r).converged
    for name in ("density", "dipole", "sigma", "chi"):
        a, b = np.asarray(getattr(r, name)), np.asarray(getattr(ref, name))
        est = np.asarray(getattr(r.error, name)) + np.asarray(getattr(ref.error, name))
        assert np.all(np.abs(a - b) <= est + 1e-12 * np.max(np.abs(b))), name


def test_a_sweep_shares_one_ray_set():
    """20 μ × 3 T in one call: the same values as one condition at a time (within the estimates),
    with far fewer k-points than separate calls."""
    m = build("massive-dirac", **TILTED)
    mu = jnp.linspace(0.14, 0.16, 20)[:, None]
    T = jnp.array([5.0, 10.0, 20.0])[None, :]
    r = response(m, mu=mu, temperature=T, tau=100.0, rtol=1e-4)
    singles = 0
    for i, j in ((0, 0), (7, 1), (19, 2)):
        s = response(m, mu=float(mu[i, 0]), temperature=float(T[0, j]), tau=100.0, rtol=1e-4)
        singles = max(singles, _info(s).k_points)
        assert abs(float(r.dipole[i, j, 0]) - float(s.dipole[0])) <= (float(r.error.dipole[i, j, 0])
                                                                      + float(s.error.dipole[0]))
    assert _info(r).k_points < 5 * singles


def test_new_values_of_a_sweep_reuse_the_compiled_program():
    m = build("massive-dirac", **TILTED)
    response(m, mu=jnp.array([0.140, 0.150]), temperature=jnp.array([10.0, 12.0]), tau=100.0)
    size = _rays_at._cache_size()
    response(m, mu=jnp.array([0.141, 0.151]), temperature=jnp.array([10.5, 12.5]), tau=jnp.array([80.0, 90.0]))
    assert _rays_at._cache_size() == size


def test_mu_and_temperature_derivatives_are_exact_derivatives_of_the_energy_sums():
    """With the plan of a concrete call, jax.grad of D_x in μ and T matches central differences
    at the same plan (the knots and rays do not move with μ or T)."""
    m = build("massive-dirac", **TILTED)
    r = response(m, mu=0.15, temperature=10.0, tau=100.0)
    plan = _info(r).plan
    lev = _info(r).level

    def d(mu, T):
        return response(m, mu=mu, temperature=T, tau=100.0, resolution=lev, plan=plan).dipole[0]

    for arg, x, h in ((0, 0.15, 1e-5), (1, 10.0, 1e-3)):
        g = float(jax.grad(d, argnums=arg)(0.15, 10.0))
        xs = [0.15, 10.0]
        up, dn = list(xs), list(xs)
        up[arg], dn[arg] = x + h, x - h
        fd = (float(d(*up)) - float(d(*dn))) / (2 * h)
        assert abs(g - fd) <= 1e-5 * abs(fd), (arg, g, fd)


def test_too_few_crossing_slots_is_overflow_and_a_concrete_call_reruns():
    """A plan whose rays have more crossings than its slots reports overflow (never a silently
    truncated rule); a concrete call then repeats with a counted plan and reports both attempts."""
    m = build("massive-dirac", **TILTED)
    mu, kt = jnp.array([0.15]), thermal_energy(jnp.array([10.0]))
    plan, grid = rays.make_plan(m, m.params, np.asarray(mu), np.asarray(kt), 1, slots=4)
    _, _, over, _ = _rays_at(m, grid, mu, kt, jnp.array([10.0]), {"tau0": jnp.array([100.0])},
                          jnp.asarray(0.0), plan=plan, tau_eval=ConstantTau.evaluate, filled=0, sea=False)
    assert bool(over)
    r = response(m, mu=0.15, temperature=10.0, tau=100.0, resolution=1, plan=(plan, grid))
    info = _info(r)
    assert info.attempts == 2 and info.plan[0].slots > 4
    assert np.isfinite(float(r.error.dipole[0]))


def test_refusals_name_the_fix():
    lattice = build("haldane")
    with pytest.raises(ValueError, match="engine='rays' integrates 2D continuum"):
        response(lattice, mu=0.5, temperature=10.0, tau=100.0, engine="rays")
    m = build("massive-dirac", **TILTED)
    with pytest.raises(ValueError, match="pass plan="):
        jax.grad(lambda mu: response(m, mu=mu, temperature=10.0, tau=100.0, resolution=1,
                                     engine="rays").dipole[0])(0.15)
    with pytest.raises(ValueError, match="'rays'"):
        response(m, mu=0.15, temperature=10.0, tau=100.0, engine="triangles")


def test_static_field_real_path_equals_the_general_one():
    """frequency = 0 takes the real-arithmetic knot sums; a negligible frequency (ωτ ~ 1e-23)
    takes the complex ones: every field agrees."""
    m = build("massive-dirac", **TILTED)
    kw = {"mu": jnp.array([0.14, 0.15]), "temperature": jnp.array([5.0, 20.0]),
          "tau": ConstantTau(100.0), "resolution": 1}
    a = response(m, frequency=0.0, engine="rays", **kw)
    b = response(m, frequency=1e-6, engine="rays", **kw)
    for name in ("sigma", "dipole", "chi", "chi_dc", "seebeck", "sigma_lorentz"):
        x, y = np.asarray(getattr(a, name)), np.asarray(getattr(b, name))
        assert np.allclose(x, y, rtol=1e-12, atol=1e-14 * np.max(np.abs(y))), name


@pytest.mark.parametrize("T", [0.0, 1.0, 10.0])
def test_rashba_gas_density_counts_both_spin_bands_from_the_empty_band(T):
    """Parabolic band with Rashba splitting, μ > 0: E± = ħ²k²/2m ± αk gives
    n = (m/πħ²)(μ + mα²/ħ²) (both bands; the density of states is constant above the band crossing,
    so the Sommerfeld correction vanishes).  Neutrality is the empty band: before the model said so,
    the lower band's empty states were counted as holes and the density was −1.8e25 m⁻²."""
    m = build("parabolic", effective_mass=0.5, rashba=0.3)
    r = response(m, mu=0.02, temperature=T, tau=100.0)
    ms, a, mu = 0.5 * C.m_e, 0.3 * C.e * 1e-10, 0.02 * C.e
    exact = ms / (np.pi * C.hbar ** 2) * (mu + ms * a ** 2 / C.hbar ** 2)
    assert abs(float(r.density) / exact - 1) < 1e-7


def test_shared_slice_knot_sums_equal_per_condition_windows():
    """Neighbouring conditions of a sorted sweep (one table, windows within the shared span) are
    summed as matrix products over one table slice; the sums equal those of one gathered window
    per condition (chunks smaller than SHARED_MIN), to rounding."""
    layout, nc = rays._layout(False)
    R, M, P = 2, 2048, 96
    rng = np.random.default_rng(1)
    tabs = (jnp.asarray(rng.normal(size=(R, M, nc))), jnp.asarray(rng.normal(size=(R, nc))),
            jnp.asarray(rng.normal(size=(R, nc))))
    plan = rays.RayPlan(48, 6, 16, 8, M, R, 8.0, 1.0)
    # breakpoints over every window (a condition outside them would be reported as not fitting)
    grid = rays.RayGrid(jnp.linspace(0.0, 0.2, 16), jnp.asarray(0.0), jnp.asarray(1e-4))
    mu = jnp.asarray(np.sort(rng.uniform(0.1, 0.103, P)))
    kt = jnp.asarray(rng.uniform(0.88e-3, 1.5e-3, P))            # all on table 0 (ρδ0 = 0.8 meV)
    temp = kt / 8.617333262e-5
    tau_eval = ConstantTau.evaluate
    tau = {"tau0": jnp.full((P, 1), 60.0)}

    def sums(sl):
        return rays._sums_at(tabs, plan, grid, layout, mu[sl], kt[sl], temp[sl], tau_eval,
                             {"tau0": tau["tau0"][sl]}, None, False)

    assert P >= rays.SHARED_MIN
    shared, fits, _ = sums(slice(None))
    assert bool(jnp.all(fits))
    own = [sums(slice(i, i + 8))[0] for i in range(0, P, 8)]
    for field in ("density", "dos", "drude", "dipole", "ahe", "bcp", "drude2_2w", "thermo2", "nernst"):
        a = np.asarray(getattr(shared, field))
        b = np.concatenate([np.asarray(getattr(o, field)) for o in own])
        np.testing.assert_allclose(a, b, rtol=1e-11, atol=1e-11 * np.max(np.abs(b)))


def test_a_call_counts_its_own_crossings_and_reports_a_plan_with_a_margin():
    """The call's own runs keep just the crossings counted at its parameters (no slot margin);
    the plan it reports for reuse at other parameters carries the 25 % margin and gives the same
    sums where both apply."""
    m = build("massive-dirac", **TILTED)
    mu, T = np.linspace(0.14, 0.17, 5), 5.0
    kt = np.full(5, float(thermal_energy(T)))
    r = response(m, mu=mu, temperature=T, tau=100.0, resolution=1, engine="rays")
    counts = []
    for lev in (0, 1):
        p, g = rays.make_plan(m, m.params, mu, kt, lev, margin=1.0)
        counts.append((p, int(np.max(np.asarray(rays._crossing_counts(m, m.params, g, angles=p.angles))))))
    # the case tells the two apart: at level 0 the margin takes a larger slot bucket
    assert rays.slot_count(counts[0][1], 1.0) < rays.slot_count(counts[0][1])
    centres = len(m.domain.centers)
    assert _info(r).k_points == sum(p.k_points(centres) for p, _ in counts)
    plan, grid = _info(r).plan
    # the reported plan is the call's own plan widened by the margin (more slots than it used)
    assert plan.slots >= rays.SLOT_MARGIN * counts[1][1]
    assert plan.slots == counts[1][0].reusable(m.n_bands).slots > counts[1][0].slots
    again = response(m, mu=mu, temperature=T, tau=100.0, resolution=1, plan=_info(r).plan, engine="rays",
                     estimate_error=False)
    for name in ("density", "sigma", "dipole", "chi"):
        a, b = np.asarray(getattr(r, name)), np.asarray(getattr(again, name))
        np.testing.assert_allclose(b, a, rtol=1e-12, atol=1e-12 * np.max(np.abs(a)), err_msg=name)


@pytest.mark.parametrize("frequency", [pytest.param(0.0, marks=pytest.mark.slow), 5e11])
def test_tau_gradients_through_the_energy_free_sums_match_central_differences(frequency):
    """τ leaves the knot sums when it is free of ε (constant, Matthiessen): ∂/∂τ of χ and of the
    ac Drude σ by jax.grad with a fixed plan against central differences (goal: every field
    differentiable in τ; the ac field makes τ̃_ω = τ/(1 + iωτ) complex)."""
    m = build("massive-dirac", **TILTED)
    kw = dict(mu=0.15, temperature=10.0, resolution=0, engine="rays", frequency=frequency)
    plan = _info(response(m, tau=100.0, **kw)).plan

    def fields(tau):
        r = response(m, tau=tau, plan=plan, estimate_error=False, **kw)
        return r.chi[1, 0, 0].real, r.sigma[0, 0].real

    def fields_matthiessen(t_ph):
        r = response(m, tau=MatthiessenTau(400.0, t_ph), plan=plan, estimate_error=False, **kw)
        return r.chi[1, 0, 0].real, r.sigma[0, 0].real

    for f, x, h in ((fields, 100.0, 1e-3), (fields_matthiessen, 150.0, 1e-3)):
        g = np.asarray(jax.jacfwd(lambda t: jnp.stack(f(t)))(x))
        fd = (np.asarray(f(x + h)) - np.asarray(f(x - h))) / (2 * h)
        assert np.all(np.isfinite(g)) and np.all(np.abs(fd) > 0)
        np.testing.assert_allclose(g, fd, rtol=1e-6, err_msg=f.__name__)


def test_a_reused_plan_flags_conditions_it_does_not_resolve():
    """A plan reused under jit (a fit, jax.grad) at conditions it was not made for gives error =
    inf where its knot tables or breakpoints do not resolve the condition (before, a 10 K plan
    read at 40 K returned a density of states 47 % low with no flag), and stays finite for the
    steps of a finite difference.  The flagged values are checked to be wrong (over 10 % off a
    fresh call at the same condition)."""
    m = build("massive-dirac", velocity=5e5, mass=0.1)
    mus = np.linspace(0.12, 0.30, 6)
    p10 = _info(response(m, mu=mus, temperature=10.0, tau=100.0, resolution=0, engine="rays")).plan
    p50 = _info(response(m, mu=mus, temperature=50.0, tau=100.0, resolution=0, engine="rays")).plan

    def at(plan, mu, T):
        return jax.jit(lambda mu, T: (lambda r: (r.dos, r.error.dos))(
            response(m, mu=mu, temperature=T, tau=100.0, resolution=0, plan=plan, estimate_error=False)))(mu, T)

    kt10 = float(thermal_energy(10.0))
    cases = [(p10, 0.2, 10.0, True), (p10, 0.2 + 1e-4, 10.0 + 1e-3, True), (p10, 0.2, 10.0 - 1e-3, True),
             (p10, 0.2, 40.0, False), (p50, 0.2, 4.0, False), (p10, 0.30 + 30 * kt10, 10.0, False)]
    for plan, mu, T, ok in cases:
        dos, err = at(plan, mu, T)
        assert bool(np.isfinite(float(err)) or np.isnan(float(err))) == ok, (mu, T)
        if not ok:
            assert np.isposinf(float(err))
    # the flagged cases are the wrong ones: the fresh call's value is the reference
    for plan, mu, T in ((p10, 0.2, 40.0), (p50, 0.2, 4.0)):
        fresh = response(m, mu=mu, temperature=T, tau=100.0, resolution=0, engine="rays")
        assert abs(float(at(plan, mu, T)[0]) / float(fresh.dos) - 1) > 0.1


def _activated_density(mu, T, mass, velocity):
    """n(μ, T) of one massive Dirac cone (g(ε) = |ε|/(2πħ²v²) for |ε| > Δ, relative to
    neutrality), m⁻²: electrons above Δ minus holes below −Δ, by scipy quadrature over ±60 k_BT of
    each edge (weight beyond: e^-60)."""
    kt = C.k / C.e * T
    hv = velocity * C.hbar / C.e * 1e10                                      # eV Å
    occ = lambda e, m: e / (1.0 + np.exp((e - m) / kt))
    ne = quad(occ, mass, mass + 60 * kt, args=(mu,), epsabs=0.0, epsrel=1e-12, limit=200)[0]
    nh = quad(occ, mass, mass + 60 * kt, args=(-mu,), epsabs=0.0, epsrel=1e-12, limit=200)[0]
    return (ne - nh) / (2 * np.pi * hv ** 2) * 1e20


def test_mu_in_a_gap_reports_the_window_truncation():
    """μ in the gap of a massive Dirac cone (Δ = 0.1 eV) at 50 K, x = 9, 14 and 19 k_BT below the
    band edge: the thermally activated sums lose about e^{−(W − x)} of themselves beyond the window
    μ ± W k_BT (W = 20), at every resolution.  The error must bound the true error of the density
    (against scipy quadrature of ∫ g f0) and the call must not claim convergence where the loss
    exceeds rtol, nor refine in vain.  Before the tail term the estimate was 9e-6 of the density
    against a true error of 1.2e-3 at x = 14, and the call said converged."""
    mass, velocity, T = 0.1, 5e5, 50.0
    m = build("massive-dirac", velocity=velocity, mass=mass)
    kt = C.k / C.e * T
    for x, converged in ((9.3, True), (13.9, False), (18.6, False)):
        mu = mass - x * kt
        r = response(m, mu=mu, temperature=T, tau=100.0, rtol=1e-3)
        info = _info(r)
        ref = _activated_density(mu, T, mass, velocity)
        assert abs(float(r.density) - ref) <= float(r.error.density), (x, float(r.density) / ref - 1)
        assert info.converged is converged, x
        assert info.level == 1, x                       # the truncation does not fall with resolution
    assert abs(float(r.density) / ref - 1) > 0.05       # x = 18.6: the loss is real (about 11 %)


def test_t0_extrapolation_next_to_a_band_edge_is_bounded():
    """Below t_res the sums are extrapolated in T² (Sommerfeld); a step of the density of states
    within a few k_B·t_res of μ breaks that law, and the spread of two extrapolations cannot see it
    (both scales smear the step alike).  Massive Dirac cone at T = 0, fixed resolution 1 (t_res =
    1 K): the DOS against its closed form |μ|/(2πħ²v²) above the gap, 0 inside, must lie within
    the error (before the band-edge term: value 3.8e35 against 0 with an error of 8.0e34); far
    from the edge the estimate stays as tight as before (a few per cent)."""
    mass, velocity = 0.1, 5e5
    m = build("massive-dirac", velocity=velocity, mass=mass)
    kr = C.k / C.e * 1.0
    hv = velocity * C.hbar / C.e * 1e10
    xs = np.array([-0.3, 0.3, 1.0, 12.0])
    r = response(m, mu=mass + xs * kr, temperature=0.0, tau=100.0, resolution=1, engine="rays")
    for i, x in enumerate(xs):
        mu = mass + x * kr
        ref = (abs(mu) / (2 * np.pi * hv ** 2) if abs(mu) > mass else 0.0) * 1e20 / C.e
        assert abs(float(r.dos[i]) - ref) <= float(r.error.dos[i]), x
    assert float(r.error.dos[-1]) < 0.05 * ref


def test_trigonal_warping_pockets_of_bilayer_graphene_against_a_cartesian_grid():
    """Bilayer graphene at U = 0 (one valley), μ = 0.5 meV, 2 K: four Fermi pockets around the
    central and the three satellite Dirac points of trigonal warping (McCann & Koshino, Rep. Prog.
    Phys. 76, 056503, 2013); the three satellite pockets are each a few degrees wide seen from K.
    Rays from K alone converged only once they resolved them (and σ_xx only as h², the velocity
    turning round at each satellite cone): 9.4e-4 off in the density with 192 and 384 rays, σ_xx
    unconverged at 768.  The satellites are now centres of their own rays (``rays.satellites``,
    a partition of unity).  Against the plain numpy grid of
    ``validation.references.bilayer_box_grid``: the automatic call converges at resolution 2 (it
    ended at the top resolution, unconverged), with the density and the density of states within
    their estimates (9e-6 and 5e-6 off; at resolution 2 without satellites 0.26 and 3.6e-2)."""
    m = build("bilayer-graphene", asymmetry=0.0, valleys=1)
    dens, dos = bilayer_box_grid(dict(asymmetry=0.0, valleys=1), dict(mu=0.0005, temperature=2.0))
    r = response(m, mu=0.0005, temperature=2.0, tau=100.0)
    assert r.resolution.converged and r.resolution.level == 2 and r.resolution.plan[0].satellites == 3
    assert abs(float(r.density) - dens) <= float(r.error.density) < 1e-4 * dens
    assert abs(float(r.dos) - dos) <= float(r.error.dos) < 1e-3 * dos


@pytest.mark.slow
def test_bilayer_pocket_drude_weight_is_within_its_estimate_of_a_finer_resolution():
    """The pocket case above: σ_xx at resolution 2 (1.3845834e-5 S) lies within its estimate
    (1.4e-4 relative) of resolution 4 (1.3845732e-5 S, estimate 3.7e-8), which 192, 384 and 768
    rays from K alone approached as h² (1.511e-5, 1.406e-5, 1.390e-5 S)."""
    m = build("bilayer-graphene", asymmetry=0.0, valleys=1)
    r2, r4 = (response(m, mu=0.0005, temperature=2.0, tau=100.0, engine="rays", resolution=lev) for lev in (2, 4))
    assert abs(float(r2.sigma[0, 0].real) - float(r4.sigma[0, 0].real)) <= float(r2.error.sigma[0, 0])
    assert float(r4.error.sigma[0, 0]) < 1e-6 * float(r4.sigma[0, 0].real)


def test_satellite_dirac_points_of_bilayer_graphene_sit_at_the_closed_form():
    """With γ4 = Δ' = 0 and U = 0 the satellite Dirac points of trigonal warping lie at
    |k| = γ1 v3/(ħv0²) in the directions 0° and ±120° from k_x for valley K (McCann & Fal'ko,
    PRL 96, 086805, 2006): the search finds all three to 1e-9.  It finds none when they are gapped
    (U = 0.05 eV) or outside every window (μ = 30 meV at 10 K), and none in MoS2."""
    m = build("bilayer-graphene", asymmetry=0.0, valleys=1, gamma4=0.0, dimer_shift=0.0)
    kt = np.array([thermal_energy(2.0)])
    sats = rays.plan_satellites(m, m.params, np.array([0.0005]), kt)
    hv = lambda g: np.sqrt(3.0) * 2.46 / 2 * g                     # ħv_i = √3aγ_i/2 (eV Å)
    k_s = 0.381 * hv(0.38) / hv(3.16) ** 2
    np.testing.assert_allclose(np.hypot(sats[:, 0], sats[:, 1]), k_s, rtol=1e-9)
    np.testing.assert_allclose(np.sort(np.degrees(np.arctan2(sats[:, 1], sats[:, 0]))), [-120.0, 0.0, 120.0],
                               atol=1e-6)
    np.testing.assert_allclose(sats[:, 2], 0.45 * k_s, rtol=1e-9)   # partition radius: 0.45 of the way to K
    gapped = build("bilayer-graphene", valleys=1)
    assert len(rays.plan_satellites(gapped, gapped.params, np.array([0.0005]), kt)) == 0
    assert len(rays.plan_satellites(m, m.params, np.array([0.03]), np.array([thermal_energy(10.0)]))) == 0
    tmd = build("tmd", material="MoS2", strain_xx=0.01)
    assert len(rays.plan_satellites(tmd, tmd.params, np.array([0.85]), kt)) == 0


def test_the_bilayer_reference_grid_refuses_a_box_too_small_or_two_valleys():
    """The Cartesian reference counts only the states inside its box around K: at U = 0.2 eV,
    μ = 0.1228 eV and 10 K a band comes within 5 k_BT of μ on the edge of ±0.04 Å⁻¹ (that box had
    cut 1.7e-4 of the density of states), so it refuses; it also refuses a model with two valleys."""
    cond = dict(mu=0.1228, temperature=10.0)
    with pytest.raises(ValueError, match=r"within 4\.\d k_BT of μ on the box's edge; raise half_width"):
        bilayer_box_grid(dict(valleys=1, asymmetry=0.2), cond, n=50)
    with pytest.raises(ValueError, match="pass valleys=1"):
        bilayer_box_grid(dict(asymmetry=0.2), cond, n=50)
    assert np.isfinite(bilayer_box_grid(dict(valleys=1, asymmetry=0.2), cond, half_width=0.06, n=50)[0])
