"""Relaxation-time models in the transport solver: constant, power-law τ(ε) and Matthiessen τ(T),
checked against closed forms and scipy quadratures over energy (never against solver output).

Sources: Drude σ = ne²τ/m and Matthiessen's rule — Ashcroft & Mermin, *Solid State Physics*
(1976), ch. 1 and 16; energy-dependent τ in the transport distribution — Mahan & Sofo, PNAS 93,
7436 (1996); Mott thermopower with τ ∝ ε^r — Cutler & Mott, Phys. Rev. 181, 1336 (1969);
Berry-curvature-dipole nonlinear Hall effect and its τ-independent E⊥/E∥² — Sodemann & Fu,
PRL 115, 216806 (2015) and docs/theory.md §5.5, §5.7, §6.  Check numbers (#n) refer to the
check-value table of docs/theory.md.
"""
import dataclasses

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import constants as sc
from scipy import integrate
from scipy.special import expit

from crosswind.models import build
from crosswind.solver import ConstantTau, MatthiessenTau, PowerLawTau, response

KB = sc.k / sc.e                      # eV/K
MSTAR = 0.5
G_SPIN = 2.0
HB2_M = sc.hbar ** 2 / sc.m_e / sc.e * 1e20     # ħ²/m_e, eV Å²


def parabolic_density(mu, T):
    """n(μ, T) = g m k_BT/(2πħ²) ln(1 + e^{μ/k_BT}) for a 2D parabolic band, m⁻²."""
    kt = KB * T
    return G_SPIN * MSTAR / (2 * np.pi * HB2_M) * kt * np.logaddexp(0.0, mu / kt) * 1e20


def drude_closed(n, tau_fs):
    """σ = n e²τ/m (Ashcroft & Mermin 1976, ch. 1), S."""
    return n * sc.e ** 2 * tau_fs * 1e-15 / (MSTAR * sc.m_e)


def tdf_moments(mu, T, tau):
    """I_a = ∫ τ(ε) ε (ε−μ)^a (−f0') dε (eV^{1+a} fs), a = 0, 1, for the 2D parabolic transport
    function Σ(ε) = g ε τ(ε)/(2πħ²) θ(ε) (Mahan & Sofo 1996)."""
    kt = KB * T
    mdf = lambda e: expit((e - mu) / kt) * expit(-(e - mu) / kt) / kt
    # the window μ ± 60 k_BT (weight outside ~e^{-60}), split at μ, cut at the band bottom
    edges = [e for e in (max(0.0, mu - 60 * kt), mu, max(mu, 0.0) + 60 * kt) if e >= 0.0]
    out = []
    for a in range(2):
        f = lambda e: tau(e) * e * (e - mu) ** a * mdf(e)
        out.append(sum(integrate.quad(f, lo, hi, epsabs=0.0, epsrel=1e-13, limit=500)[0]
                       for lo, hi in zip(edges[:-1], edges[1:])))
    return out


def sigma_from_tdf(i0):
    """σ = e² g/(2πħ²) ∫ τ ε (−f0') dε, with I0 in eV·fs (independent of the mass in 2D)."""
    return sc.e ** 2 * G_SPIN / (2 * np.pi * sc.hbar ** 2) * i0 * sc.e * 1e-15


# --------------------------------------------------------------------------------------------
# the models themselves
# --------------------------------------------------------------------------------------------

def test_matthiessen_rule_hand_values():
    """1/τ = 1/τ_imp + T/(τ_ph T_ref) (Matthiessen's rule; Ashcroft & Mermin 1976, ch. 16):
    τ_imp = 200 fs, τ_ph = 100 fs at 300 K → 200, 100, 66.667 fs at 0, 150, 300 K."""
    s = MatthiessenTau(tau_impurity=200.0, tau_phonon=100.0, reference_temperature=300.0)
    T = jnp.asarray([[0.0], [150.0], [300.0], [600.0]])
    e = jnp.asarray([[-0.2, 0.0, 0.5]])
    t, dt = s.evaluate(s.arrays(), jnp.broadcast_to(e, (4, 3)), jnp.broadcast_to(T, (4, 3)))
    expected = np.array([200.0, 100.0, 200.0 / 3.0, 40.0])
    np.testing.assert_allclose(np.asarray(t), np.broadcast_to(expected[:, None], (4, 3)), rtol=1e-14)
    np.testing.assert_array_equal(np.asarray(dt), 0.0)


def test_power_law_tau_values():
    """τ(ε) = τ0(|ε − ε_ref|/ε_s)^r with |x| → sqrt(x² + η²), and ∂τ/∂ε (common practice)."""
    s = PowerLawTau(tau0=100.0, exponent=1.5, reference_energy=-0.1, energy_scale=0.05, smoothing=1e-3)
    e = jnp.asarray([-0.1, 0.0, 0.1, 0.3])
    t, dt = s.evaluate(s.arrays(), e, jnp.zeros(4))
    x = np.asarray(e) + 0.1
    r = np.sqrt(x ** 2 + 1e-6)
    np.testing.assert_allclose(np.asarray(t), 100.0 * (r / 0.05) ** 1.5, rtol=1e-13)
    np.testing.assert_allclose(np.asarray(dt), 100.0 * 1.5 * (r / 0.05) ** 0.5 * x / r / 0.05, rtol=1e-12, atol=1e-12)


# --------------------------------------------------------------------------------------------
# parabolic band with τ(ε) (one batch per scattering model)
# --------------------------------------------------------------------------------------------

MU = np.array([0.1, 0.1, 0.1, 0.1, 0.1])
TEMP = np.array([300.0, 0.1, 0.1, 300.0, 300.0])
EXPONENT = np.array([0.0, 0.0, 1.0, 1.0, -0.5])
TAU0, ESCALE, ETA = 100.0, 0.05, 1e-6


def tau_of(r):
    return lambda e: TAU0 * (np.sqrt(e * e + ETA * ETA) / ESCALE) ** r


@pytest.fixture(scope="module")
def band():
    return build("parabolic", effective_mass=MSTAR)


@pytest.fixture(scope="module")
def power_law(band):
    tau = PowerLawTau(tau0=TAU0, exponent=EXPONENT, energy_scale=ESCALE, smoothing=ETA)
    return response(band, mu=MU, temperature=TEMP, tau=tau, resolution=2)


def test_power_law_exponent_zero_is_constant_tau(band, power_law):
    """PowerLawTau with r = 0 is ConstantTau(τ0): every field agrees to rounding."""
    const = response(band, mu=MU, temperature=TEMP, tau=ConstantTau(TAU0), resolution=2)
    leaves = lambda r: jax.tree_util.tree_flatten_with_path(dataclasses.replace(r, error=None))[0]
    for (path, a), (_, b) in zip(leaves(power_law), leaves(const)):
        name = jax.tree_util.keystr(path)                  # every field and every χ part
        a, b = np.asarray(a)[:2], np.asarray(b)[:2]
        scale = np.nanmax(np.abs(b)) if np.any(np.isfinite(b)) else 0.0
        np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-13 * scale, err_msg=name, equal_nan=True)


def test_power_law_sigma_degenerate_is_fermi_surface_value(power_law):
    """Degenerate limit (0.1 K, E_F = 0.1 eV): σ = n e² τ(E_F)/m with τ(E_F) = τ0(E_F/ε_s)^r = 2τ0
    for r = 1 (Ashcroft & Mermin 1976, ch. 1; the Sommerfeld correction (π²/6)(k_BT/E_F)²r(1+r)
    is 2e-8 here)."""
    n = parabolic_density(0.1, 0.1)
    tau_f = tau_of(1.0)(0.1)
    np.testing.assert_allclose(tau_f, 2 * TAU0, rtol=1e-9)
    np.testing.assert_allclose(float(power_law.sigma[2][0, 0].real), drude_closed(n, tau_f), rtol=1e-7)
    np.testing.assert_allclose(float(power_law.sigma[1][0, 0].real), drude_closed(n, TAU0), rtol=1e-9)


@pytest.mark.parametrize("i", [2, 3, 4])
def test_power_law_sigma_and_seebeck_match_energy_quadrature(power_law, i):
    """σ = e²∫Σ(ε)(−f0')dε and S = −∫Σ(ε)(ε−μ)(−f0')/(eT∫Σ(−f0')) with Σ ∝ ετ(ε)θ(ε)
    (Mahan & Sofo 1996), τ ∝ ε^r with r = 1, −1/2, by scipy quadrature over energy."""
    i0, i1 = tdf_moments(MU[i], TEMP[i], tau_of(EXPONENT[i]))
    np.testing.assert_allclose(float(power_law.sigma[i][0, 0].real), sigma_from_tdf(i0), rtol=1e-7)
    np.testing.assert_allclose(float(power_law.seebeck[i][0, 0]), -i1 / (i0 * TEMP[i]), rtol=1e-6)


def test_power_law_seebeck_mott_with_energy_dependent_tau(power_law):
    """Mott: S = −(π²/3)(k_B/e) k_BT ∂ln σ(ε)/∂ε = −(π²/3)(k_B/e)(k_BT/E_F)(1 + r) for
    σ(ε) ∝ ε^{1+r} (Cutler & Mott 1969); r = 1 doubles the constant-τ value."""
    S = float(power_law.seebeck[2][0, 0])
    kt = KB * 0.1
    np.testing.assert_allclose(S, -(np.pi ** 2 / 3) * KB * (kt / 0.1) * 2.0, rtol=1e-6)


def test_matthiessen_sigma_follows_tau_of_T(band):
    """σ_xx(T) = n(μ, T) e² τ(T)/m with 1/τ(T) = 1/τ_imp + T/(τ_ph T_ref) (Ashcroft & Mermin 1976,
    ch. 1 and 16): τ is energy independent, so the parabolic Drude form is exact at every T."""
    T = np.array([1.0, 77.0, 150.0, 300.0])
    s = MatthiessenTau(tau_impurity=200.0, tau_phonon=100.0, reference_temperature=300.0)
    r = response(band, mu=0.1, temperature=T, tau=s, resolution=2)
    tau_T = 1.0 / (1.0 / 200.0 + T / (100.0 * 300.0))
    expected = drude_closed(parabolic_density(0.1, T), tau_T)
    np.testing.assert_allclose(np.asarray(r.sigma[:, 0, 0].real), expected, rtol=1e-8)
    np.testing.assert_allclose(np.asarray(r.sigma[:, 1, 1].real), expected, rtol=1e-8)


@pytest.mark.slow                 # ≈ 30 s: reverse mode through the solver needs its own compilation
def test_dsigma_dtau_is_sigma_over_tau(band):
    """At ω = 0 and constant τ, σ_xx ∝ τ, so ∂σ_xx/∂τ = σ_xx/τ = n e²/m (Drude; Ashcroft & Mermin
    1976, ch. 1), by jax.grad through the solver at a fixed mesh."""
    f = lambda tau: response(band, mu=0.1, temperature=30.0, tau=tau, resolution=2).sigma[0, 0].real
    g = float(jax.grad(f)(100.0))
    sigma = float(f(100.0))
    np.testing.assert_allclose(g, sigma / 100.0, rtol=1e-12)
    np.testing.assert_allclose(g, drude_closed(parabolic_density(0.1, 30.0), 1.0), rtol=1e-8)


# --------------------------------------------------------------------------------------------
# Berry-curvature dipole: E⊥/E∥² is τ-independent (checks #21, #22)
# --------------------------------------------------------------------------------------------

TILTED = dict(velocity=5e5, mass=0.1, tilt=5e4, valleys=2)     # ħv = 3.29106 eV Å, t = 0.1 v
TAUS = np.array([50.0, 100.0, 200.0])


@pytest.fixture(scope="module")
def tilted_pair():
    m = build("massive-dirac", **TILTED)
    return response(m, mu=0.15, temperature=5.0, tau=TAUS, resolution=1)


def test_dipole_chi_value_and_tau_scaling(tilted_pair):
    """χ_yxx = −e³τD_x/(2ħ²) = 3.5759e-13 A·m/V² for the T-related pair of tilted massive Dirac
    valleys at μ = 0.15 eV, Δ = 0.1 eV, τ = 100 fs (check #21; Sodemann & Fu 2015;
    docs/theory.md §6).  χ^BCD ∝ τ; the nonlinear Drude and intrinsic parts vanish by
    time reversal (docs/theory.md §5.6)."""
    r = tilted_pair
    dip = np.asarray(r.chi_parts.dipole[:, 1, 0, 0])
    np.testing.assert_allclose(float(r.chi[1][1, 0, 0].real), 3.5759e-13, rtol=1e-3)
    np.testing.assert_allclose(dip.real / TAUS, np.full(3, dip[1].real / 100.0), rtol=1e-12)
    for part in ("drude", "intrinsic"):
        assert np.max(np.abs(np.asarray(getattr(r.chi_parts, part)))) < 1e-9 * abs(dip[1])
    # D_x of the pair: 2 × (−0.096696 Å) (check #17)
    np.testing.assert_allclose(float(r.dipole[1][0]), 2 * -0.096696e-10, rtol=1e-3)


def test_transverse_field_ratio_is_tau_independent(tilted_pair):
    """E⊥/E∥² = χ_yxx/σ_yy = 7.186e-10 m/V, the same for τ = 50, 100, 200 fs: χ^BCD and σ are both
    ∝ τ (check #22; Sodemann & Fu 2015; docs/theory.md §5.7).  σ_xx, σ_yy of the tilted pair:
    2 × 2.46999e-4 S and 2 × 2.48794e-4 S at τ = 100 fs (docs/theory.md §6)."""
    r = tilted_pair
    ratio = np.asarray(r.chi_parts.dipole[:, 1, 0, 0].real / r.sigma[:, 1, 1].real)
    np.testing.assert_allclose(ratio, np.full(3, 7.186e-10), rtol=2e-3)
    np.testing.assert_allclose(ratio, np.full(3, ratio[1]), rtol=1e-12)
    np.testing.assert_allclose(float(r.sigma[1][0, 0].real), 2 * 2.46999e-4, rtol=1e-4)
    np.testing.assert_allclose(float(r.sigma[1][1, 1].real), 2 * 2.48794e-4, rtol=1e-4)


# --------------------------------------------------------------------------------------------
# bad input
# --------------------------------------------------------------------------------------------

@pytest.mark.parametrize("tau", [0.0, -5.0, [100.0, -1.0], np.array([0.0]), jnp.asarray(-1.0),
                                 ConstantTau(-2.0), PowerLawTau(tau0=0.0, exponent=1.0),
                                 MatthiessenTau(tau_impurity=-1.0, tau_phonon=100.0),
                                 MatthiessenTau(tau_impurity=100.0, tau_phonon=0.0)])
def test_non_positive_tau_is_refused(band, tau):
    with pytest.raises(ValueError, match=r"response: tau must be positive \(fs\)"):
        response(band, mu=0.1, temperature=[1.0, 2.0], tau=tau)


@pytest.mark.parametrize("T", [-1.0, [10.0, -0.5]])
def test_negative_temperature_is_refused(band, T):
    with pytest.raises(ValueError, match=r"response: temperature must be >= 0 K"):
        response(band, mu=0.1, temperature=T, tau=100.0)
