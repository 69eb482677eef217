"""Catalogue models 'honeycomb' (monolayer graphene lattice with strain) and 'bilayer-graphene'
(four-band Bernal continuum model).  Each check names its source."""
from dataclasses import replace

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy.optimize import minimize_scalar

from crosswind.models import band_geometry, build
from crosswind.models.builtin import honeycomb as hc
from crosswind.models.builtin.bilayer import gamma_velocity
from crosswind.models.strain import uniaxial
from crosswind.models.units import ANGSTROM, HBAR_EVS

A = 2.46                   # Å, graphene lattice constant (docs/theory.md §9.1)
ACC = A / np.sqrt(3.0)
T = 2.8                    # eV
HV = np.sqrt(3.0) * A * T / 2   # ħv in eV Å (Xiao, Yao, Niu, PRL 99, 236809, 2007: ħv = √3at/2)
K = hc.valley_point(A)
RNG = np.random.default_rng(7)


def _random_k(n, scale=2.0):
    return jnp.asarray(RNG.uniform(-scale, scale, size=(n, 2)))


# ----------------------------------------------------------------------------- honeycomb

def test_honeycomb_hermitian_at_random_k():
    # common practice: a Bloch Hamiltonian is Hermitian at every k (also strained and gapped)
    m = build("honeycomb", staggered=0.07, strain_xx=0.05, strain_yy=-0.02, strain_xy=0.03)
    h = jax.vmap(lambda q: m.hamiltonian(q, m.params))(_random_k(16))
    assert h.shape == (16, 1, 2, 2)
    np.testing.assert_allclose(h, np.conj(np.swapaxes(h, -1, -2)), atol=1e-14)


def test_honeycomb_lattice_geometry():
    # common practice: |a_i| = a, B at distance a_cc from A, cell area (√3/2)a² (docs/theory.md §9.1)
    m = build("honeycomb")
    a = np.asarray(m.lattice_vectors())
    np.testing.assert_allclose(np.linalg.norm(a, axis=1), [A, A], rtol=1e-14)
    np.testing.assert_allclose(abs(np.linalg.det(a)), 5.2408, rtol=1e-4)
    np.testing.assert_allclose(np.linalg.norm(np.asarray(m.orbital_positions())[1]), ACC, rtol=1e-14)
    assert m.degeneracy == 2.0 and build("honeycomb", degeneracy=1).degeneracy == 1.0


def test_graphene_fermi_velocity_from_band_velocities():
    # docs/theory.md check #32 (Castro Neto et al., RMP 81, 109, 2009):
    # v_F = √3 a t/(2ħ) = 9.0627e5 m/s for a = 2.46 Å, t = 2.8 eV
    m = build("honeycomb")
    ang = np.linspace(0.0, 2 * np.pi, 7)[:-1]
    q = 1e-6 * np.stack([np.cos(ang), np.sin(ang)], axis=1)
    g = band_geometry(m, jnp.asarray(np.concatenate([K + q, -K + q])))
    speed = np.linalg.norm(np.asarray(g.velocities), axis=-1)      # (12, 2)
    expected = np.sqrt(3.0) * A * ANGSTROM * T / (2 * HBAR_EVS)
    np.testing.assert_allclose(expected, 9.0627e5, rtol=1e-5)
    # trigonal-warping corrections are of relative order q·a_cc ≈ 1.4e-6 here
    np.testing.assert_allclose(speed, expected, rtol=1e-5)
    # velocity points along ±q: conduction band radially outward (linear cone)
    v_c = np.asarray(g.velocities[:6, 1])
    np.testing.assert_allclose(np.sum(v_c * q, axis=1) / (speed[:6, 1] * 1e-6), 1.0, rtol=1e-5)


@pytest.mark.parametrize("delta", [0.01, -0.03])
def test_gap_and_berry_curvature_near_k_match_massive_dirac(delta):
    # Xiao, Yao, Niu, PRL 99, 236809 (2007): near K the model is ħv(q_xσ_x + q_yσ_y) + Δσ_z with
    # ħv = √3at/2; closed form Ω_c = −τ(ħv)²Δ/(2E³), τ = +1 at K (docs/theory.md §3)
    m = build("honeycomb", staggered=delta)
    g0 = band_geometry(m, jnp.asarray(K[None]))
    np.testing.assert_allclose(np.asarray(g0.energies[0]), [-abs(delta), abs(delta)], atol=1e-12)
    # at K itself the linear expansion is exact (the k-derivatives of d at K are exactly ħv)
    om0 = -HV ** 2 * delta / (2 * abs(delta) ** 3)
    np.testing.assert_allclose(np.asarray(g0.berry_curvature[0]), [-om0, om0], rtol=1e-10)
    # ħv|q| = |Δ| in three directions: lattice corrections of relative order q·a_cc
    qn = abs(delta) / HV
    ang = np.array([0.0, 1.0, 2.0])
    q = qn * np.stack([np.cos(ang), np.sin(ang)], axis=1)
    g = band_geometry(m, jnp.asarray(K + q))
    e = np.sqrt((HV * qn) ** 2 + delta ** 2)
    om = -HV ** 2 * delta / (2 * e ** 3)
    np.testing.assert_allclose(np.asarray(g.berry_curvature[:, 1]), om, rtol=qn * ACC)
    np.testing.assert_allclose(np.asarray(g.berry_curvature[:, 0]), -om, rtol=qn * ACC)
    # K' = −K carries τ = −1
    gp = band_geometry(m, jnp.asarray(-K[None]))
    np.testing.assert_allclose(np.asarray(gp.berry_curvature[0]), [om0, -om0], rtol=1e-10)


def test_unstaggered_graphene_has_no_berry_curvature():
    # docs/theory.md §1: P and T together (PT) force Ω = 0; inversion alone gives
    # Ω(−k) = Ω(k).  Unstaggered graphene has both, so Ω vanishes away from K, K'.
    m = build("honeycomb")
    k = _random_k(32)
    om = np.asarray(band_geometry(m, k).berry_curvature)
    om_minus = np.asarray(band_geometry(m, -k).berry_curvature)
    np.testing.assert_allclose(om, 0.0, atol=1e-12)
    np.testing.assert_allclose(om_minus, om, atol=1e-12)


def test_staggered_graphene_time_reversal_odd_curvature():
    # docs/theory.md §1 (Xiao, Chang, Niu, RMP 82, 1959, 2010): time reversal gives
    # ε(−k) = ε(k) and Ω(−k) = −Ω(k); points near K so that the curvature is large
    m = build("honeycomb", staggered=0.1, strain_xx=0.02, strain_xy=-0.01)
    k = jnp.asarray(K[None] + RNG.uniform(-0.1, 0.1, size=(16, 2)))
    g, gm = band_geometry(m, k), band_geometry(m, -k)
    assert np.min(np.abs(np.asarray(g.berry_curvature))) > 1.0       # Å², a real test
    np.testing.assert_allclose(np.asarray(gm.energies), np.asarray(g.energies), rtol=1e-12)
    np.testing.assert_allclose(np.asarray(gm.berry_curvature), -np.asarray(g.berry_curvature), rtol=1e-9)


def _first_order_dirac_point(eps, beta=3.37):
    # Derived here: with κ = (1+ε)k, f = Σ t_i e^{iκ·δ_i}, t_i ≈ t(1 − β δ_i·ε·δ_i/a_cc²); expanding
    # f about K to first order, f = 0 at κ = K + (β/a_cc)((ε_xx−ε_yy)/2, −ε_xy), so
    # k_D = (1 − ε)K + (β/a_cc)((ε_xx−ε_yy)/2, −ε_xy)  (pseudo-gauge field shift plus the
    # deformed reciprocal lattice; Pereira, Castro Neto, Peres, PRB 80, 045401, 2009)
    return K - eps @ K + beta / ACC * np.array([(eps[0, 0] - eps[1, 1]) / 2, -eps[0, 1]])


@pytest.mark.parametrize("comps", [dict(strain_xx=1e-3), dict(strain_yy=1e-3), dict(strain_xy=1e-3),
                                   dict(strain_xx=1e-3, strain_yy=-1.65e-4, strain_xy=3e-4)])
def test_strain_moves_dirac_point_as_first_order_theory(comps):
    def error(scale):
        c = {k: v * scale for k, v in comps.items()}
        m = build("honeycomb", **c)
        kd = np.asarray(hc.dirac_point(m))
        # it is a band touching: d vanishes there
        np.testing.assert_allclose(np.asarray(m.dvector(jnp.asarray(kd), m.params)[1]), 0.0, atol=1e-12)
        eps = np.asarray(hc.strain_of(m.params))
        pred = _first_order_dirac_point(eps)
        return kd, np.linalg.norm(kd - pred), np.linalg.norm(pred - K)

    kd, err, shift = error(1.0)
    assert np.linalg.norm(kd - K) > 1e-4                 # it moved away from K
    assert err < 1e-2 * shift                             # first order holds to O(ε) relative
    _, err_half, _ = error(0.5)
    assert 3.0 < err / err_half < 5.0                     # the residual is second order in ε
    # the other valley is its time-reversal partner: k_D' = −k_D (Ω, ε symmetric under T)
    m = build("honeycomb", **comps)
    np.testing.assert_allclose(np.asarray(hc.dirac_point(m, valley=-1)), -kd, atol=1e-12)


def _dirac_velocities(m):
    """Conduction-band velocity along x at k_D ± q x̂ and along y at k_D ± q ŷ (the ± average
    removes the O(q) trigonal-warping term)."""
    kd = np.asarray(hc.dirac_point(m))
    q = 1e-6
    pts = np.stack([kd + [q, 0], kd - [q, 0], kd + [0, q], kd - [0, q]])
    v = np.asarray(band_geometry(m, jnp.asarray(pts)).velocities[:, 1])
    return (v[0, 0] - v[1, 0]) / 2, (v[2, 1] - v[3, 1]) / 2


def test_uniaxial_strain_makes_velocity_anisotropic():
    # Derived here: at the shifted Dirac point the linear coefficients are ħv(1 − βε_xx) and
    # ħv(1 − βε_yy) in κ = (1+ε)k, so v_ij = v[δ_ij + (1 − β)ε_ij] in the laboratory frame
    # (agrees with Oliva-Leyva & Naumis, PRB 88, 085430, 2013).  Stretching along x (zigzag)
    # weakens t_2, t_3 (bonds with x components) and lowers v_x; the Poisson contraction along y
    # raises v_y.  Uniaxial strain with ν = 0.165 (Pereira et al., PRB 80, 045401, 2009).
    beta, nu = 3.37, 0.165
    v0x, v0y = _dirac_velocities(build("honeycomb"))
    np.testing.assert_allclose([v0x, v0y], HV * ANGSTROM / HBAR_EVS, rtol=1e-10)

    def rel(mag, angle):
        vx, vy = _dirac_velocities(hc.build_strained_honeycomb(mag, angle, poisson=nu))
        return vx / v0x - 1.0, vy / v0y - 1.0

    for angle, (along, across) in ((0.0, (0, 1)), (np.pi / 2, (1, 0))):   # zigzag, armchair
        e = 1e-3
        dv = rel(e, angle)
        assert dv[along] < 0 < dv[across]
        first = np.array([(1 - beta) * e, -(1 - beta) * nu * e])
        resid = np.abs(np.array([dv[along], dv[across]]) - first)
        dv_half = rel(e / 2, angle)
        resid_half = np.abs(np.array([dv_half[along], dv_half[across]]) - first / 2)
        # first order holds up to O(ε) relative to the leading strain effect (β − 1)ε
        assert np.all(resid < 1e-2 * (beta - 1) * e)
        assert np.all((resid / resid_half > 3.0) & (resid / resid_half < 5.0))  # second-order rest


def test_velocity_tensor_with_shear_first_order():
    # Derived here (same expansion as above, general ε): ∂d_i/∂k_j at the Dirac point equals
    # ħv[δ_ij + (1 − β)ε_ij] up to O(ε²) (Oliva-Leyva & Naumis, PRB 88, 085430, 2013)
    def resid(e):
        m = build("honeycomb", strain_xx=0.3 * e, strain_xy=e)
        kd = hc.dirac_point(m)
        jac = np.asarray(jax.jacfwd(lambda q: m.dvector(q, m.params)[1][0, :2])(kd)) / HV
        return np.abs(jac - np.eye(2) - (1 - 3.37) * np.asarray(hc.strain_of(m.params)))

    r, r_half = resid(1e-3), resid(5e-4)
    assert np.max(r) < 1e-2 * (3.37 - 1) * 1e-3
    np.testing.assert_allclose(r / r_half, 4.0, rtol=0.1)       # the rest is second order


def test_build_strained_honeycomb_uses_uniaxial_components():
    # Pereira et al. (2009) uniaxial tensor, docs/theory.md §9.1
    m = hc.build_strained_honeycomb(0.1, np.pi / 6, poisson=0.2, staggered=0.02)
    xx, yy, xy = uniaxial(0.1, np.pi / 6, 0.2)
    ref = build("honeycomb", strain_xx=xx, strain_yy=yy, strain_xy=xy, staggered=0.02)
    for name in ref.params:
        np.testing.assert_allclose(float(m.params[name]), float(ref.params[name]), rtol=1e-15)
    c = hc.build_strained_honeycomb(0.1, 0.0)
    np.testing.assert_allclose([float(c.params["strain_xx"]), float(c.params["strain_yy"])],
                               [0.1, -0.0165], rtol=1e-14)
    # deformed lattice: the zigzag vector a1 − a2 = a x̂ stretches by 1 + ε_xx
    a = np.asarray(c.lattice_vectors())
    np.testing.assert_allclose(a[0] - a[1], [A * 1.1, 0.0], atol=1e-12)
    with pytest.raises(ValueError, match="set from magnitude/angle/poisson"):
        hc.build_strained_honeycomb(0.1, 0.0, strain_xx=0.01)


def test_energy_gradient_wrt_strain_matches_finite_difference():
    # common practice: autodiff through build() against central finite differences
    k = jnp.array([[0.9, 0.3], [K[0] + 0.02, 0.01]])

    def energy(x):
        m = build("honeycomb", strain_xx=x, staggered=0.05)
        return jnp.sum(band_geometry(m, k).energies[:, 1])

    x, h = 0.02, 1e-5
    grad = jax.grad(energy)(x)
    fd = (energy(x + h) - energy(x - h)) / (2 * h)
    assert np.isfinite(float(grad)) and abs(float(grad)) > 1.0
    np.testing.assert_allclose(float(grad), float(fd), rtol=1e-7)


def test_honeycomb_bad_parameters():
    # clear errors naming the fix (project rule)
    with pytest.raises(ValueError, match="unknown parameter 'hoping'.*Did you mean 'hopping'"):
        build("honeycomb", hoping=2.7)
    with pytest.raises(ValueError, match="'strain_xx' = 0.5 .*outside the allowed range"):
        build("honeycomb", strain_xx=0.5)
    with pytest.raises(ValueError, match="'degeneracy' = 4 is not allowed"):
        build("honeycomb", degeneracy=4)
    with pytest.raises(ValueError, match="valley must be"):
        hc.valley_point(A, valley=2)
    with pytest.raises(ValueError, match="lattice_constant"):
        jax.grad(lambda a: build("honeycomb", lattice_constant=a).params["hopping"])(2.46)


# ----------------------------------------------------------------------------- bilayer

def _second_block(k, p):
    return _H2(k, p)[1:2]


_H2 = build("bilayer-graphene", valleys=2).hamiltonian


def _block(model, index):
    """Valley K' (block 1) of a two-valley model as its own one-block model."""
    assert index == 1
    return replace(model, hamiltonian=_second_block, blocks=1)


def test_bilayer_hermitian_at_random_k():
    # common practice: Hermitian blocks (McCann & Koshino, Rep. Prog. Phys. 76, 056503, 2013, eq. 30 layout)
    m = build("bilayer-graphene", valleys=2, asymmetry=0.1, sublattice_asymmetry=0.01)
    h = jax.vmap(lambda q: m.hamiltonian(q, m.params))(_random_k(16, 0.1))
    assert h.shape == (16, 2, 4, 4)
    np.testing.assert_allclose(h, np.conj(np.swapaxes(h, -1, -2)), atol=1e-14)


def test_bilayer_minimal_model_at_k0_and_monolayer_velocity():
    # McCann & Koshino (2013): at k = 0 without asymmetry the minimal model has ε = 0, 0, ±γ1
    m = build("bilayer-graphene", valleys=1, gamma3=0.0, gamma4=0.0, dimer_shift=0.0, asymmetry=0.0)
    e = np.asarray(band_geometry(m, jnp.zeros((1, 2))).energies[0])
    np.testing.assert_allclose(e, [-0.381, 0.0, 0.0, 0.381], atol=1e-14)
    # v = √3aγ0/(2ħ) (docs/theory.md §9.2): γ0 = 3.16 eV, a = 2.46 Å
    np.testing.assert_allclose(gamma_velocity(3.16, 2.46),
                               np.sqrt(3) * 2.46e-10 * 3.16 / (2 * HBAR_EVS), rtol=1e-14)


def _minimal_dispersion(p, u, g1, hv):
    # McCann & Koshino (2013), minimal model with asymmetry U (their eq. for ε_α^±):
    # ε² = γ1²/2 + U²/4 + (vp)² − sqrt(γ1⁴/4 + (vp)²(γ1² + U²))   (low-energy pair)
    x = (hv * p) ** 2
    return np.sqrt(g1 ** 2 / 2 + u ** 2 / 4 + x - np.sqrt(g1 ** 4 / 4 + x * (g1 ** 2 + u ** 2)))


@pytest.mark.parametrize("u", [0.05, -0.2])
def test_bilayer_mexican_hat_gap(u):
    # McCann & Koshino (2013): gap at the "Mexican-hat" rim Δ_g = |U|γ1/sqrt(U² + γ1²)
    g1 = 0.381
    m = build("bilayer-graphene", valleys=1, gamma3=0.0, gamma4=0.0, dimer_shift=0.0, asymmetry=u)
    hv = 3.16 * np.sqrt(3) * A / 2

    def e_c(p, ang):
        k = jnp.asarray([p * np.cos(ang), p * np.sin(ang)])
        return float(jnp.linalg.eigvalsh(m.H(k)[0])[2])

    for ang in (0.0, 0.7):                        # the minimal model is isotropic
        res = minimize_scalar(lambda p: e_c(p, ang), bounds=(0.0, 0.1), method="bounded",
                              options={"xatol": 1e-10})
        gap = 2 * res.fun                           # ε_v = −ε_c in the minimal model
        np.testing.assert_allclose(gap, abs(u) * g1 / np.sqrt(u ** 2 + g1 ** 2), rtol=1e-9)
        assert res.x > 1e-3                          # the minimum is on a rim, not at k = 0
    ps = np.array([0.0, 0.01, 0.03])
    e = np.array([e_c(p, 0.3) for p in ps])
    np.testing.assert_allclose(e, _minimal_dispersion(ps, u, g1, hv), rtol=1e-10)


def test_bilayer_curvature_sum_rule_and_valley_pair():
    # docs/theory.md §2.1: Σ_n Ω_n = 0 at every k; time reversal maps valley K to K':
    # Ω_K'(−k) = −Ω_K(k) (Xiao, Chang, Niu, RMP 82, 1959, 2010), full SWMcC parameter set
    m2 = build("bilayer-graphene", valleys=2, asymmetry=0.05)
    k = jnp.asarray(RNG.uniform(-0.05, 0.05, size=(16, 2)))
    om = np.asarray(band_geometry(m2, k).berry_curvature)
    assert np.max(np.abs(om)) > 100.0                               # Å²: large near K
    np.testing.assert_allclose(np.sum(om, axis=1), 0.0, atol=1e-9 * np.max(np.abs(om)))
    m1 = build("bilayer-graphene", valleys=1, asymmetry=0.05)     # the K block alone
    np.testing.assert_allclose(np.asarray(m1.H(k[0])), np.asarray(m2.H(k[0])[0:1]), rtol=1e-15)
    gk = band_geometry(m1, k)
    gkp = band_geometry(_block(m2, 1), -k)
    np.testing.assert_allclose(np.asarray(gkp.energies), np.asarray(gk.energies), rtol=1e-12)
    np.testing.assert_allclose(np.asarray(gkp.berry_curvature), -np.asarray(gk.berry_curvature),
                               rtol=1e-8, atol=1e-10)
    # trigonal warping (γ3) breaks ε_K(k) = ε_K(−k) within one valley
    assert np.max(np.abs(np.asarray(band_geometry(m1, -k).energies - gk.energies))) > 1e-4


def test_bilayer_inversion_flips_curvature_with_asymmetry():
    # McCann & Koshino (2013): inversion exchanges the layers (A1↔B2, B1↔A2), k → −k and K ↔ K',
    # so U → −U; with time reversal Ω_K'(−k) = −Ω_K(k) this gives Ω_K(k; −U) = −Ω_K(k; U) and
    # equal energies (docs/theory.md §1), for the full parameter set
    k = jnp.asarray(RNG.uniform(-0.05, 0.05, size=(8, 2)))
    g = band_geometry(build("bilayer-graphene", valleys=1, asymmetry=0.05), k)
    gm = band_geometry(build("bilayer-graphene", valleys=1, asymmetry=-0.05), k)
    assert np.max(np.abs(np.asarray(g.berry_curvature))) > 100.0
    np.testing.assert_allclose(np.asarray(gm.energies), np.asarray(g.energies), rtol=1e-12)
    np.testing.assert_allclose(np.asarray(gm.berry_curvature), -np.asarray(g.berry_curvature),
                               rtol=1e-8, atol=1e-10)


def test_bilayer_gap_at_k0_and_its_gradient():
    # minimal model at k = 0: the non-dimer sites A1, B2 sit at ∓U/2, so the gap there is
    # exactly |U| (McCann & Koshino 2013); autodiff in U against central finite differences
    def gap(u):
        mb = build("bilayer-graphene", valleys=1, asymmetry=u, gamma3=0.0, gamma4=0.0, dimer_shift=0.0)
        e = jnp.linalg.eigvalsh(mb.H(jnp.zeros(2))[0])
        return e[2] - e[1]

    g = jax.grad(gap)(0.05)
    np.testing.assert_allclose(float(gap(0.05)), 0.05, rtol=1e-12)
    np.testing.assert_allclose(float(g), float((gap(0.05 + 1e-6) - gap(0.05 - 1e-6)) / 2e-6), rtol=1e-7)
    np.testing.assert_allclose(float(g), 1.0, rtol=1e-12)


def test_bilayer_bad_parameters():
    with pytest.raises(ValueError, match="Did you mean 'gamma1'"):
        build("bilayer-graphene", gama1=0.4)
    with pytest.raises(ValueError, match="'valleys' = 3 is not allowed"):
        build("bilayer-graphene", valleys=3)
    with pytest.raises(ValueError, match="'gamma1' = -1 .*outside the allowed range"):
        build("bilayer-graphene", gamma1=-1.0)
