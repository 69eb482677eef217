"""Thermoelectric, Hall and occupation checks of the transport solver against closed forms and
independent scipy quadratures (never against solver output).

Sources: Sommerfeld identities and Fermi–Dirac integrals — Ashcroft & Mermin, *Solid State
Physics* (1976), ch. 2 and app. C; Drude conductivity and Hall coefficient R_H = 1/(nq) —
Ashcroft & Mermin (1976), ch. 1; weak-field Hall coefficient by Jones–Zener iteration —
docs/theory.md §7.2; transport-distribution form of σ, S, κ — Mahan & Sofo, PNAS 93, 7436
(1996); Mott formula and Wiedemann–Franz law — Ashcroft & Mermin (1976), ch. 13, and Cutler &
Mott, Phys. Rev. 181, 1336 (1969); anomalous Nernst effect and its Mott relation — Xiao, Yao,
Fang, Niu, PRL 97, 026603 (2006).  Check numbers (#n) refer to the check-value table of
docs/theory.md.
"""
import warnings

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import constants as sc
from scipy import integrate
from scipy.special import expit, log_expit

from crosswind.models import build
from crosswind.solver import mu_from_density, response, response_at_density
from crosswind.solver.engine import density as density_module
from crosswind.solver.engine.occupation import entropy_density, fermi, minus_dfermi

KB = sc.k / sc.e                                   # eV/K
HB2_M = sc.hbar ** 2 / sc.m_e / sc.e * 1e20        # ħ²/m_e in eV Å²
MSTAR = 0.5
G_SPIN = 2.0
L0 = np.pi ** 2 / 3 * KB ** 2                      # Lorenz number, V²/K² = W Ω K⁻²


def parabolic_density(mu, T):
    """Exact 2D density (m⁻²) of a spin-degenerate parabolic band at (μ, T):
    n = g m k_BT/(2πħ²) ln(1 + e^{μ/k_BT}) (Fermi–Dirac integral of order 0)."""
    kt = KB * T
    return G_SPIN * MSTAR / (2 * np.pi * HB2_M) * kt * np.logaddexp(0.0, mu / kt) * 1e20


def fermi_window_moments(mu, T, tau=lambda e: 1.0):
    """I_a = ∫ Σ(ε) (ε−μ)^a (−f0') dε, a = 0, 1, 2, for the 2D parabolic transport function
    Σ(ε) ∝ ε θ(ε) τ(ε) (Mahan & Sofo 1996), by scipy quadrature."""
    kt = KB * T

    def mdf(e):
        x = (e - mu) / kt
        return expit(x) * expit(-x) / kt

    # the window μ ± 60 k_BT (weight outside ~e^{-60}), split at μ, cut at the band bottom
    edges = [e for e in (max(0.0, mu - 60 * kt), mu, max(mu, 0.0) + 60 * kt) if e >= 0.0]
    out = []
    for a in range(3):
        f = lambda e: e * tau(e) * (e - mu) ** a * mdf(e)
        out.append(sum(integrate.quad(f, lo, hi, epsabs=0.0, epsrel=1e-13, limit=500)[0]
                       for lo, hi in zip(edges[:-1], edges[1:])))
    return out


# --------------------------------------------------------------------------------------------
# occupation functions (check #39)
# --------------------------------------------------------------------------------------------

_f = jax.jit(lambda x: fermi(x, 0.0, 1.0))
_F = jax.jit(lambda e, mu, kt: minus_dfermi(e, mu, kt))
_s = jax.jit(lambda x: entropy_density(x, 0.0, 1.0))


@pytest.mark.parametrize("T", [1.0, 300.0])
def test_sommerfeld_identities(T):
    """∫(−f0')dε = 1, ∫(ε−μ)²(−f0')dε = π²(k_BT)²/3, ∫s(x)dx = π²/3 (check #39;
    Ashcroft & Mermin 1976, app. C; derived in docs/theory.md §8, §11)."""
    mu, kt = 0.1, KB * T
    F = lambda e: float(_F(e, mu, kt))
    opts = dict(epsabs=0.0, epsrel=1e-13, limit=400)
    lo, hi = mu - 60 * kt, mu + 60 * kt
    norm, _ = integrate.quad(F, lo, hi, points=[mu], **opts)
    second, _ = integrate.quad(lambda e: (e - mu) ** 2 * F(e), lo, hi, points=[mu], **opts)
    np.testing.assert_allclose(norm, 1.0, rtol=1e-10)
    np.testing.assert_allclose(second, np.pi ** 2 * kt ** 2 / 3, rtol=1e-10)
    ent, _ = integrate.quad(lambda x: float(_s(x)), -80.0, 80.0, points=[0.0], **opts)
    np.testing.assert_allclose(ent, np.pi ** 2 / 3, rtol=1e-10)


def test_occupation_functions_agree_with_their_definitions():
    """−∂f0/∂ε is the derivative of f0; s = −f ln f − (1−f) ln(1−f) (common practice)."""
    x = np.linspace(-20.0, 20.0, 81)
    kt = 0.0258
    dfde = jax.vmap(jax.grad(lambda e: fermi(e, 0.0, kt)))(jnp.asarray(x * kt))
    np.testing.assert_allclose(-np.asarray(dfde), np.asarray(_F(x * kt, 0.0, kt)), rtol=1e-12, atol=0)
    f, g = expit(-x), expit(x)                     # f and 1 − f, each from its own tail
    s_def = -f * log_expit(-x) - g * log_expit(x)
    np.testing.assert_allclose(np.asarray(_s(x)), s_def, rtol=1e-12, atol=0)


def test_occupation_functions_at_extreme_arguments():
    """Stable at |x| = 1e3 (no NaN/inf; f0 → 0, 1; −f0', s → 0) and with relative precision in
    the Boltzmann tails (f0 = e^{−x}/(1+e^{−x}), s = (1+x)e^{−x} to leading order; common practice)."""
    big = jnp.asarray([-1e3, 1e3])
    f = np.asarray(_f(big))
    np.testing.assert_array_equal(f, [1.0, 0.0])
    F = np.asarray(_F(big, 0.0, 1.0))
    s = np.asarray(_s(big))
    assert np.all(np.isfinite(F)) and np.all(F >= 0) and np.all(F < 1e-250)
    assert np.all(np.isfinite(s)) and np.all(s >= 0) and np.all(s < 1e-250)
    for fn in (lambda x: fermi(x, 0.0, 1.0), lambda x: minus_dfermi(x, 0.0, 1.0),
               lambda x: entropy_density(x, 0.0, 1.0)):
        g = np.asarray(jax.vmap(jax.grad(fn))(big))
        assert np.all(np.isfinite(g))
    # tails: relative precision where e^{-|x|} is still a normal double
    x = np.array([-700.0, -100.0, -40.0, -30.0, 30.0, 40.0, 100.0, 700.0])
    np.testing.assert_allclose(np.asarray(_f(x)), expit(-x), rtol=1e-13, atol=0)
    ax = np.abs(x)
    np.testing.assert_allclose(np.asarray(_s(x)), np.log1p(np.exp(-ax)) + ax * expit(-ax), rtol=1e-13, atol=0)
    xm = np.array([-300.0, -40.0, 40.0, 300.0])
    np.testing.assert_allclose(np.asarray(_F(xm, 0.0, 1.0)), expit(xm) * expit(-xm), rtol=1e-12, atol=0)


# --------------------------------------------------------------------------------------------
# parabolic band: Drude, Hall, Seebeck, Lorenz (one batch of conditions, one compilation)
# --------------------------------------------------------------------------------------------

N_1E12 = 1e16                                              # 1e12 cm⁻² in m⁻²
EF_1E12 = np.pi * HB2_M / MSTAR * N_1E12 * 1e-20           # E_F = πħ²n/m (g = 2), eV
TAU = 100.0                                                # fs
# (μ eV, T K): 0 degenerate n = 1e12 cm⁻²; 1 E_F = 0.1 eV at 300 K; 2 same at 30 K;
# 3 same at 0.2 K (degenerate limit); 4 μ = −0.3 eV at 300 K (non-degenerate)
COND_MU = np.array([EF_1E12, 0.1, 0.1, 0.1, -0.3])
COND_T = np.array([1.0, 300.0, 30.0, 0.2, 300.0])


@pytest.fixture(scope="module")
def parabolic():
    m = build("parabolic", effective_mass=MSTAR)
    return response(m, mu=COND_MU, temperature=COND_T, tau=TAU, resolution=2)


def test_drude_conductivity_and_mobility(parabolic):
    """σ = n e²τ/m = 5.63588e-5 S, mobility eτ/m = 351.764 cm²/Vs at n = 1e12 cm⁻², m = 0.5 m_e,
    τ = 100 fs (check #25; Ashcroft & Mermin 1976, ch. 1)."""
    r = parabolic
    sigma = np.asarray(r.sigma[0])
    closed = N_1E12 * sc.e ** 2 * TAU * 1e-15 / (MSTAR * sc.m_e)
    np.testing.assert_allclose(float(r.density[0]), N_1E12, rtol=1e-9)
    np.testing.assert_allclose(sigma[0, 0].real, closed, rtol=1e-8)
    np.testing.assert_allclose(sigma[1, 1].real, closed, rtol=1e-8)
    np.testing.assert_allclose(sigma[0, 0].real, 5.63588e-5, rtol=1e-6)
    assert abs(sigma[0, 1]) < 1e-12 * closed and abs(sigma.imag).max() == 0.0
    mobility = sigma[0, 0].real / (N_1E12 * sc.e) * 1e4    # cm²/Vs
    np.testing.assert_allclose(mobility, 351.764, rtol=1e-6)


def test_hall_coefficient_parabolic(parabolic):
    """R_H = 1/(nq) = −1/(ne) = −624.151 Ω/T for electrons at n = 1e12 cm⁻² (check #26;
    Ashcroft & Mermin 1976, ch. 1; Jones–Zener iteration, docs/theory.md §7.2).  For a
    parabolic band with constant τ the relation holds at any T with n = n(μ, T)."""
    r = parabolic
    np.testing.assert_allclose(float(r.hall_coefficient[0]), -624.151, rtol=1e-6)
    np.testing.assert_allclose(float(r.hall_coefficient[0]), -1 / (N_1E12 * sc.e), rtol=1e-8)
    for i in (1, 2, 4):
        n = parabolic_density(COND_MU[i], COND_T[i])
        np.testing.assert_allclose(float(r.hall_coefficient[i]), -1 / (n * sc.e), rtol=1e-8)
        np.testing.assert_allclose(float(r.density[i]), n, rtol=1e-9)
    # B-linear conductivity is antisymmetric, σ^B_xy = −σ^B_yx
    sb = np.asarray(r.sigma_lorentz[0])
    np.testing.assert_allclose(sb[0, 1], -sb[1, 0], rtol=1e-10)


def test_seebeck_exact_2d_constant_tau_at_300K(parabolic):
    """S = −(1/eT) ∫Σ(ε)(ε−μ)(−f0')/∫Σ(−f0') for Σ ∝ εθ(ε) (Mahan & Sofo 1996), by scipy
    quadrature, at E_F = 0.1 eV, T = 300 K.  k_BT/E_F = 0.26 is not small, so it differs from the
    degenerate Mott value −(π²/3)(k_B/e)(k_BT/E_F) = −73.290 μV/K (check #27; Cutler & Mott,
    Phys. Rev. 181, 1336, 1969) through the band bottom."""
    r = parabolic
    i0, i1, _ = fermi_window_moments(0.1, 300.0)
    exact = -i1 / (i0 * 300.0)
    S = np.asarray(r.seebeck[1])
    np.testing.assert_allclose(S[0, 0], exact, rtol=1e-7)
    np.testing.assert_allclose(S[1, 1], exact, rtol=1e-7)
    assert abs(S[0, 1]) < 1e-12 * abs(exact)
    mott = -(np.pi ** 2 / 3) * KB * (KB * 300.0 / 0.1)
    np.testing.assert_allclose(mott, -73.290e-6, rtol=1e-4)
    assert abs(S[0, 0] / mott - 1) > 0.02        # the exact value is visibly not Mott's here


def test_seebeck_mott_limit_at_30K(parabolic):
    """At 30 K (k_BT/E_F = 0.026) S → −(π²/3)(k_B/e)(k_BT/E_F): for Σ ∝ ε the Sommerfeld series
    terminates, so only e^{−E_F/k_BT} ≈ 1e-17 corrections remain (Cutler & Mott 1969)."""
    S = float(parabolic.seebeck[2][0, 0])
    mott = -(np.pi ** 2 / 3) * KB * (KB * 30.0 / 0.1)
    np.testing.assert_allclose(S, mott, rtol=1e-6)
    assert S < 0                                  # electrons: negative thermopower


def test_lorenz_degenerate_limit(parabolic):
    """κ_e/(σT) → L0 = (π²/3)(k_B/e)² = 2.443004509e-8 W Ω K⁻² (check #3; Wiedemann–Franz law,
    Ashcroft & Mermin 1976, ch. 1 and 13).  At 0.2 K the correction −(π²/3)(k_BT/E_F)² is 1e-7;
    the finite-T value is compared with the quadrature reference."""
    np.testing.assert_allclose(L0, 2.443004509e-8, rtol=1e-9)
    L = float(parabolic.lorenz[3])
    np.testing.assert_allclose(L, L0, rtol=1e-6)
    i0, i1, i2 = fermi_window_moments(0.1, 0.2)
    np.testing.assert_allclose(L, (i2 - i1 ** 2 / i0) / (i0 * 0.2 ** 2), rtol=1e-8)


def test_lorenz_non_degenerate_2d(parabolic):
    """μ = −0.3 eV at 300 K (12 k_BT below the band bottom): L = 2(k_B/e)² = 1.4852e-8 W Ω K⁻²
    for a 2D parabolic band with constant τ (check #40; derived in docs/theory.md §8)."""
    L = float(parabolic.lorenz[4])
    np.testing.assert_allclose(2 * KB ** 2, 1.4852e-8, rtol=1e-4)
    np.testing.assert_allclose(L, 1.4852e-8, rtol=1e-4)
    i0, i1, i2 = fermi_window_moments(-0.3, 300.0)
    np.testing.assert_allclose(L, (i2 - i1 ** 2 / i0) / (i0 * 300.0 ** 2), rtol=1e-8)
    # the same quadrature at E_F = 0.1 eV, 300 K (intermediate degeneracy)
    i0, i1, i2 = fermi_window_moments(0.1, 300.0)
    np.testing.assert_allclose(float(parabolic.lorenz[1]), (i2 - i1 ** 2 / i0) / (i0 * 300.0 ** 2), rtol=1e-7)


# --------------------------------------------------------------------------------------------
# fixed density: μ(T) of a 2D parabolic band (check #28)
# --------------------------------------------------------------------------------------------

def test_mu_from_density_2d_parabolic():
    """At fixed n, μ(T) = k_BT ln(e^{E_F/k_BT} − 1) exactly in 2D (docs/theory.md §11);
    E_F = 10 meV, T = 100 K → 6.76055 meV (check #28).  dμ/dT (implicit derivative) against the
    closed form k_B[ln(e^a − 1) − a e^a/(e^a − 1)], a = E_F/k_BT, and central differences."""
    m = build("parabolic", effective_mass=MSTAR)
    ef = 0.010
    n = ef * MSTAR / (np.pi * HB2_M) * 1e20          # n = g m E_F/(2πħ²), m⁻²
    h = 0.05
    Ts = np.array([100.0 - h, 100.0, 100.0 + h])
    mus = np.asarray(mu_from_density(m, n, Ts, resolution=1))
    a = ef / (KB * Ts)
    np.testing.assert_allclose(mus, KB * Ts * np.log(np.expm1(a)), rtol=1e-9)
    np.testing.assert_allclose(mus[1], 6.76055e-3, rtol=1e-6)
    dmu = float(jax.grad(lambda T: mu_from_density(m, n, T, resolution=1))(100.0))
    a1 = a[1]
    closed = KB * (np.log(np.expm1(a1)) - a1 * np.exp(a1) / np.expm1(a1))
    np.testing.assert_allclose(dmu, closed, rtol=1e-7)
    np.testing.assert_allclose(dmu, (mus[2] - mus[0]) / (2 * h), rtol=1e-6)


def _dirac_density(mu, T, v=5e5, gap=0.1):
    """n(μ, T) (m⁻²) of one massive Dirac cone ε = ±√((ħvk)² + Δ²), counted from neutrality: the
    density of states |ε|/(2π(ħv)²) outside the gap (common practice), electrons minus holes by
    scipy quadrature over the energy."""
    hv = sc.hbar * v / sc.e * 1e10                             # eV Å
    kt = KB * T

    def carriers(m):      # ∫_Δ^∞ ε f(ε − m) dε, the Fermi function as expit (no overflow)
        return integrate.quad(lambda e: e * expit(-(e - m) / kt), gap, np.inf, epsabs=0, epsrel=1e-13,
                              limit=400, points=None)[0]
    return (carriers(mu) - carriers(-mu)) / (2 * np.pi * hv ** 2) * 1e20


def test_mu_from_density_refuses_a_3d_continuum_model_naming_the_fix():
    with pytest.raises(NotImplementedError, match=r"no density mesh for the 3D continuum model 'weyl-kp'; "
                                                  r"give the chemical potential instead \(mu_eV\)"):
        mu_from_density(build("weyl-kp"), 1e24, 10.0, resolution=1)


def test_mu_from_density_massive_dirac_band_edges_and_gap():
    """μ(n, T) of a massive Dirac cone against a root of the energy-quadrature density (brentq):
    1, 10 and 150 K, densities from 10¹⁰ to 5·10¹² cm⁻² of both signs, so μ lies just above a band
    edge (1 K), deep in a band, and inside the gap where n is exponential in μ (150 K, lowest
    densities: a secant step there used to stall and left μ 60 meV off)."""
    from scipy.optimize import brentq
    m = build("massive-dirac", velocity=5e5, mass=0.1)
    dens = np.geomspace(1e14, 5e16, 12)
    n = np.concatenate([dens, -dens] * 3)
    T = np.repeat([1.0, 10.0, 150.0], 24)
    mus = np.asarray(mu_from_density(m, n, T, resolution=1))
    ref = np.array([brentq(lambda x, ni=ni, ti=ti: _dirac_density(x, ti) - ni, -0.5, 0.5, xtol=1e-14)
                    for ni, ti in zip(n, T)])
    assert np.all(np.abs(ref[48:52]) < 0.1)                   # 150 K, ~10¹⁰ cm⁻²: μ in the gap
    np.testing.assert_allclose(mus, ref, rtol=0, atol=1e-9)


def test_response_at_density_massive_dirac_against_the_energy_quadrature_root():
    """μ of the response's own n(μ) (shared rays) against the brentq root of the energy-quadrature
    density: 1 K just above the band edge (10¹⁰ cm⁻²: the rays' density carries a per-cent error
    there, so the root falls back to the node mesh placed at μ), deep in the bands, 10 K, and 150 K
    with μ in the gap.  Every μ within MU_SHARE·rtol·max(k_BT, MU_FLOOR) of the reference (the
    documented acceptance), and the returned response is the one at the returned μ."""
    from scipy.optimize import brentq
    m = build("massive-dirac", velocity=5e5, mass=0.1)
    dens = np.array([1e14, 1e15, 5e16])
    n = np.concatenate([dens, -dens] * 3)
    T = np.repeat([1.0, 10.0, 150.0], 6)
    mu, r = response_at_density(m, n, T, TAU)
    ref = np.array([brentq(lambda x, ni=ni, ti=ti: _dirac_density(x, ti) - ni, -0.5, 0.5, xtol=1e-14)
                    for ni, ti in zip(n, T)])
    assert np.all(np.abs(ref[12:14]) < 0.1)                   # 150 K, 10¹⁰ cm⁻²: μ in the gap
    tol = density_module.MU_SHARE * 1e-3 * np.maximum(KB * T, density_module.MU_FLOOR)
    assert np.all(np.abs(mu - ref) <= tol), np.abs(mu - ref) / tol
    again = response(m, mu=mu, temperature=T, tau=TAU)
    np.testing.assert_allclose(np.asarray(r.density), np.asarray(again.density), rtol=1e-12)
    np.testing.assert_allclose(np.asarray(r.sigma), np.asarray(again.sigma), rtol=1e-12)
    assert r.resolution.engine == "rays" and r.density.shape == n.shape


def _honeycomb_pocket_density(model, mu, n_theta=96):
    """T = 0 electron density (m⁻², degeneracy applied) of the K/K′ conduction pockets of the
    honeycomb model below μ: the enclosed areas ½∮r(θ)²dθ (trapezoid in θ, spectral for a smooth
    contour) with r(θ) from brentq on the plain-numpy band energies (validation/fermi_contour.py)."""
    from scipy.optimize import brentq

    from validation.fermi_contour import BandEvaluator, band_extremum
    ev = BandEvaluator(model)
    b = np.asarray(model.reciprocal_vectors())
    k = (b[0] - b[1]) / 3.0
    th = 2 * np.pi * np.arange(n_theta) / n_theta
    u = np.stack([np.cos(th), np.sin(th)], axis=1)
    area = 0.0
    for s in (1, -1):
        c = band_extremum(model, s * k, 1, "min", ev)
        band = lambda r, j: ev.energies((c + r * u[j])[None])[0, 1] - mu      # noqa: E731
        rs = np.array([brentq(band, 0.0, 0.2, args=(j,), xtol=1e-15) for j in range(n_theta)])
        area += 0.5 * np.sum(rs ** 2) * (2 * np.pi / n_theta)
    return model.degeneracy * area / (2 * np.pi) ** 2 * 1e20


@pytest.mark.slow                 # ≈ 40 s: the ladder at 2 K, several plans compiled
def test_response_at_density_honeycomb_pocket_at_2K():
    """Gapped strained honeycomb, 10¹² cm⁻² at 2 K: the root of the ladder's n(μ) against the
    pocket areas of an independent contour reference (T = 0, plus the Sommerfeld term
    (π²/6)(k_BT)²n''(μ), common practice).  The uniform level-1 mesh of ``mu_from_density`` does not
    resolve this pocket: its root gave 3.4× the target density (docs/performance.md)."""
    m = build("honeycomb", staggered=0.2, strain_xx=0.01)
    n_t, T = 1e16, 2.0
    with warnings.catch_warnings():
        warnings.simplefilter("error")            # the root is certain to MU_SHARE·rtol·k_BT
        mu, r = response_at_density(m, n_t, T, TAU)
    mu = float(mu)
    h = 2e-4
    n0, np_, nm = (_honeycomb_pocket_density(m, mu + d) for d in (0.0, h, -h))
    sommerfeld = np.pi ** 2 / 6 * (KB * T) ** 2 * (np_ - 2 * n0 + nm) / h ** 2
    assert abs(n0 + sommerfeld - n_t) <= 2 * float(r.error.density) + 2e-6 * n_t, (n0 + sommerfeld) / n_t - 1
    assert r.resolution.engine == "ladder" and r.resolution.converged


def test_response_at_density_refuses_a_fixed_mesh_and_3d_models_naming_the_fix():
    m = build("massive-dirac")
    with pytest.raises(ValueError, match=r"the root follows the automatic engine and resolution; for a fixed "
                                         r"mesh use mu_from_density\(model, density, temperature, resolution=\.\.\.\)"):
        response_at_density(m, 1e16, 10.0, TAU, resolution=1)
    with pytest.raises(ValueError, match=r"2D models only \('weyl-kp' is 3D\); use mu_from_density"):
        response_at_density(build("weyl-kp"), 1e24, 10.0, TAU)


# --------------------------------------------------------------------------------------------
# anomalous Nernst effect of one massive Dirac valley (check #29)
# --------------------------------------------------------------------------------------------

DIRAC = dict(velocity=5e5, mass=0.1, valleys=1)
H_MU = 1e-4                                      # eV, central-difference step in μ
ANE_MU = np.array([0.15 - H_MU, 0.15, 0.15 + H_MU, 0.0, 0.05])
ANE_T = 10.0


@pytest.fixture(scope="module")
def dirac_ane():
    m = build("massive-dirac", **DIRAC)
    return response(m, mu=ANE_MU, temperature=ANE_T, tau=TAU, resolution=1)


def _mott_prefactor(T):
    """π²k_B²T/(3e) in units where ∂σ/∂μ is in S/eV and α in A/K."""
    return np.pi ** 2 / 3 * KB ** 2 * T


def test_anomalous_nernst_massive_dirac(dirac_ane):
    """α_xy = (e k_B/ħ)∫[dk] Ω s(ε); Mott value per valley per spin at μ = 0.15 eV, Δ = 0.1 eV,
    T = 10 K: |α_xy| = (π²/3)k_B(k_BT)(e/2h)Δ/μ² = 2.1032e-11 A/K (check #29; Xiao, Yao, Fang,
    Niu, PRL 97, 026603, 2006).  Sign: σ_xy = −(e²/2h)Δ/μ rises with μ, so α_xy < 0."""
    alpha = np.asarray(dirac_ane.nernst[1])
    mott_closed = -_mott_prefactor(ANE_T) * (sc.e ** 2 / (2 * sc.h)) * 0.1 / 0.15 ** 2
    np.testing.assert_allclose(abs(mott_closed), 2.1032e-11, rtol=1e-4)
    np.testing.assert_allclose(alpha[0, 1], mott_closed, rtol=1e-3)
    np.testing.assert_allclose(alpha[1, 0], -alpha[0, 1], rtol=1e-12)
    assert alpha[0, 0] == 0.0 and alpha[1, 1] == 0.0


def test_nernst_mott_relation_with_sigma_xy(dirac_ane):
    """α_xy = −(π²k_B²T/3e) ∂σ_xy/∂μ (Mott relation, Xiao et al. 2006), with ∂σ_xy/∂μ from the
    solver's own σ_xy at μ ± 1e-4 eV.  The next Sommerfeld term is (7π²/5)(k_BT/μ)² ≈ 5e-4."""
    r = dirac_ane
    sxy = np.asarray(r.sigma_anomalous[:, 0, 1].real)
    dsdmu = (sxy[2] - sxy[0]) / (2 * H_MU)                 # S/eV
    assert dsdmu > 0
    alpha = float(r.nernst[1][0, 1])
    np.testing.assert_allclose(alpha, -_mott_prefactor(ANE_T) * dsdmu, rtol=1e-3)
    # σ_xy itself: −(e²/2h)Δ/μ up to the Sommerfeld term (π²/3)(k_BT/μ)² = 1.1e-4 (§3)
    np.testing.assert_allclose(sxy[1], -(sc.e ** 2 / (2 * sc.h)) * 0.1 / 0.15, rtol=3e-4)


def test_nernst_vanishes_in_the_gap(dirac_ane):
    """μ in the gap at 10 K: s(ε) ≲ e^{−58} on both bands, so α_xy = 0 while σ_xy = −e²/2h
    (Xiao et al. 2006; docs/theory.md §3)."""
    r = dirac_ane
    ref = abs(float(r.nernst[1][0, 1]))
    for i in (3, 4):
        assert abs(float(r.nernst[i][0, 1])) < 1e-12 * ref
        np.testing.assert_allclose(float(r.sigma[i][0, 1].real), -sc.e ** 2 / (2 * sc.h), rtol=1e-6)


@pytest.mark.slow                 # ≈ 30 s: reverse mode through the solver needs its own compilation
def test_dsigma_xy_dmu_by_autodiff(dirac_ane):
    """jax.grad of σ_xy with respect to μ at a fixed mesh equals the central difference, and gives
    the Mott α_xy (Xiao et al. 2006)."""
    m = build("massive-dirac", **DIRAC)
    g = float(jax.grad(lambda mu: response(m, mu=mu, temperature=ANE_T, tau=TAU,
                                           resolution=1).sigma[0, 1].real)(0.15))
    sxy = np.asarray(dirac_ane.sigma[:, 0, 1].real)
    np.testing.assert_allclose(g, (sxy[2] - sxy[0]) / (2 * H_MU), rtol=1e-6)
    np.testing.assert_allclose(float(dirac_ane.nernst[1][0, 1]), -_mott_prefactor(ANE_T) * g, rtol=1e-3)
