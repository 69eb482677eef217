"""Catalogue models "tmd", "tmd-lattice" and "weyl": Hamiltonian structure, band-edge numbers,
Berry curvature, symmetry checks, strain, and input errors.  Each check names its source."""
from dataclasses import replace
from functools import cache

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from crosswind.models import band_geometry, build
from crosswind.models.builtin import tmd_lattice
from crosswind.models.eigh import safe_eigh
from crosswind.models.twoband import hamiltonian_of
from crosswind.models.units import E2_OVER_H, E_CHARGE, HBAR_EVS

RNG = np.random.default_rng(7)


@cache
def _block_dvector(dv):
    def f(k, p):
        d0, d = dv(k, p)
        pick = (jnp.arange(d0.shape[0], dtype=d0.dtype) == p["_block"]).astype(d0.dtype)
        return (pick @ d0)[None], (pick @ d)[None]
    return f, hamiltonian_of(f)


def block(model, i):
    """The two-band block ``i`` of a d-vector model as a one-block model (per-block geometry:
    the blocks of "tmd" are degenerate in energy, so merged bands cannot be told apart).  The
    block index travels as a parameter leaf so that all blocks share one compilation."""
    f, h = _block_dvector(model.dvector)
    params = dict(model.params, _block=jnp.asarray(float(i)))
    return replace(model, dvector=f, hamiltonian=h, blocks=1, params=params)


@cache
def _batched_h(ham):
    return jax.jit(jax.vmap(ham, in_axes=(0, None)))


def _h_batch(model, ks):
    """H blocks at a batch of k (one compiled, vectorised call)."""
    return np.asarray(_batched_h(model.hamiltonian)(jnp.asarray(ks), model.params))


# ---------------------------------------------------------------------------------------------
# all three models

STRAINED = {
    "tmd": dict(strain_xx=0.02, strain_yy=-0.01, strain_xy=0.015, material="WSe2"),
    "tmd-lattice": dict(strain_xx=0.02, strain_yy=-0.01, strain_xy=0.015),
    "weyl": dict(tilt=0.3, node_position=0.3),
}


@pytest.mark.parametrize("name", sorted(STRAINED))
def test_hermitian_at_random_k(name):
    # common practice: every block of H(k) is Hermitian
    m = build(name, **STRAINED[name])
    ks = jnp.asarray(RNG.normal(scale=0.7, size=(5, m.dim)))
    h = _h_batch(m, ks)
    assert h.shape == (5, m.blocks, m.block_size, m.block_size)
    assert np.abs(h - np.conj(np.swapaxes(h, -1, -2))).max() < 1e-13


# ---------------------------------------------------------------------------------------------
# tmd (Xiao, Liu, Feng, Xu, Yao, PRL 108, 196802, 2012; docs/theory.md §9.3)

TAU = (1, 1, -1, -1)
SPIN = (1, -1, 1, -1)


def test_tmd_band_edges_gap_and_valley_contrasting_spin_splitting():
    # Xiao et al. 2012: gap Δ = 1.66 eV for MoS2 without SOC; VB spin splitting 2λ = 0.15 eV at K,
    # spin up higher at K (τ s_z = +1), spin down higher at K' (time reversal)
    m0 = build("tmd", soc=0.0)
    g0 = band_geometry(m0, jnp.zeros((1, 2)))
    e0 = np.asarray(g0.energies[0])
    assert np.allclose(e0[4:] - e0[:4], 1.66, atol=1e-12)
    m = build("tmd")
    lam = 0.075
    for i, (tau, s) in enumerate(zip(TAU, SPIN)):
        e = np.asarray(band_geometry(block(m, i), jnp.zeros((1, 2))).energies[0])
        assert e[1] == pytest.approx(1.66 / 2, abs=1e-12)                 # conduction edge +Δ/2
        assert e[0] == pytest.approx(-1.66 / 2 + lam * tau * s, abs=1e-12)
    val = [float(band_geometry(block(m, i), jnp.zeros((1, 2))).energies[0, 0]) for i in range(4)]
    assert val[0] - val[1] == pytest.approx(0.15, abs=1e-12)              # K: up above down
    assert val[3] - val[2] == pytest.approx(0.15, abs=1e-12)              # K': down above up


def test_tmd_conduction_curvature_at_K():
    # docs/theory.md §9.3: |Ω_c(K)| = (at)²/(2 m²) = 8.954 Å² for MoS2 without SOC;
    # per spin block m = (Δ − λτs_z)/2 and sign −τ (§3, derived and verified there)
    m0 = build("tmd", soc=0.0)
    om = float(band_geometry(block(m0, 0), jnp.zeros((1, 2))).berry_curvature[0, 1])
    assert om == pytest.approx(-8.954, rel=1e-4)
    m = build("tmd")
    at2 = (3.193 * 1.10) ** 2
    for i, (tau, s) in enumerate(zip(TAU, SPIN)):
        mass = (1.66 - 0.075 * tau * s) / 2
        om = np.asarray(band_geometry(block(m, i), jnp.zeros((1, 2))).berry_curvature[0])
        assert om[1] == pytest.approx(-tau * at2 / (2 * mass ** 2), rel=1e-12)
        assert om[0] == pytest.approx(-om[1], rel=1e-12)                  # Σ_n Ω_n = 0 (§2.1)


def test_tmd_time_reversal_with_strain():
    # time reversal (docs/theory.md §1): H_{K',-s}(k) = H_{K,s}(-k)*, hence
    # Ω_{K',-s}(-k) = -Ω_{K,s}(k); must survive strain (derived in the tmd docstring)
    m = build("tmd", strain_xx=0.03, strain_yy=-0.01, strain_xy=0.02, tilt_conduction=2.0,
              tilt_valence=-0.7, velocity_anisotropy=1.5)
    ks = RNG.normal(scale=0.2, size=(8, 2))
    h, hm = _h_batch(m, ks), _h_batch(m, -ks)
    assert np.abs(h[:, 3] - np.conj(hm[:, 0])).max() < 1e-13
    assert np.abs(h[:, 2] - np.conj(hm[:, 1])).max() < 1e-13
    for i, j in ((0, 3), (1, 2)):
        gk = band_geometry(block(m, i), jnp.asarray(ks))
        gm = band_geometry(block(m, j), jnp.asarray(-ks))
        assert np.allclose(gm.energies, gk.energies, atol=1e-13)
        assert np.allclose(gm.berry_curvature, -gk.berry_curvature, rtol=1e-10, atol=1e-12)


def _rot(phi):
    c, s = np.cos(phi), np.sin(phi)
    return np.array([[c, -s], [s, c]])


def test_tmd_strain_terms_are_c3_covariant():
    # derived in the tmd docstring: rotating both the strain tensor and k by 2π/3 about the
    # valley leaves every band energy and Berry curvature unchanged (C3 of the K point)
    eps = np.array([[0.02, 0.013], [0.013, -0.006]])
    r = _rot(2 * np.pi / 3)
    eps_r = r @ eps @ r.T
    kw = dict(tilt_conduction=1.7, tilt_valence=-0.4, velocity_anisotropy=2.0)
    m = build("tmd", strain_xx=eps[0, 0], strain_yy=eps[1, 1], strain_xy=eps[0, 1], **kw)
    mr = build("tmd", strain_xx=eps_r[0, 0], strain_yy=eps_r[1, 1], strain_xy=eps_r[0, 1], **kw)
    ks = RNG.normal(scale=0.2, size=(8, 2))
    for i in range(4):
        g = band_geometry(block(m, i), jnp.asarray(ks))
        gr = band_geometry(block(mr, i), jnp.asarray(ks @ r.T))
        assert np.allclose(gr.energies, g.energies, atol=1e-12)
        assert np.allclose(gr.berry_curvature, g.berry_curvature, rtol=1e-10, atol=1e-12)
    # the vertical mirror x → −x maps K onto K'; combined with time reversal it maps each block
    # onto itself, H_b(k_x, k_y; ε_xy) = H_b(k_x, −k_y; −ε_xy)* (derived in the tmd docstring):
    # this is what forbids the other C3-invariant tilt Im(w k_+) = u1 k_y + u2 k_x
    mm = build("tmd", strain_xx=eps[0, 0], strain_yy=eps[1, 1], strain_xy=-eps[0, 1], **kw)
    h = _h_batch(m, ks)
    hm = _h_batch(mm, ks * np.array([1.0, -1.0]))
    assert np.abs(h - np.conj(hm)).max() < 1e-13


def test_tmd_velocity_anisotropy():
    # warping term of the tmd docstring: for strain along x, v_x = v(1 + η u1), v_y = v(1 − η u1)
    eta, sxx = 1.3, 0.02
    m = build("tmd", strain_xx=sxx, velocity_anisotropy=eta, tilt_conduction=0.0, tilt_valence=0.0)
    m0 = build("tmd")
    kappa = 0.3
    e = band_geometry(m, jnp.array([[kappa, 0.0], [0.0, kappa]])).energies
    e0 = band_geometry(m0, jnp.array([[(1 + eta * sxx) * kappa, 0.0], [0.0, (1 - eta * sxx) * kappa]])).energies
    assert np.allclose(e, e0, atol=1e-12)


def _fermi_surface_vx_omega(model, mu=0.86, kT=0.01, n=81, kmax=0.25):
    """Σ_k (−f0') v_x Ω over all bands on a mesh symmetric about the valley centre."""
    q = np.linspace(-kmax, kmax, n)
    kx, ky = np.meshgrid(q, q, indexing="ij")
    k = jnp.asarray(np.stack([kx.ravel(), ky.ravel()], 1))
    g = band_geometry(model, k)
    x = (np.asarray(g.energies) - mu) / kT
    w = 1.0 / (4 * kT * np.cosh(x / 2) ** 2)
    return float(np.sum(w * np.asarray(g.energy_gradient[..., 0]) * np.asarray(g.berry_curvature)))


def test_tmd_curvature_dipole_needs_strain_tilt():
    # C3 forbids an in-plane Berry-curvature dipole (Sodemann & Fu, PRL 115, 216806, 2015); strain
    # tilt creates one (Son, Kim, Ahn, Lee, Lee, PRL 123, 036806, 2019).  Crude Fermi-surface sum
    # of v_x Ω in the conduction band (μ 30 meV above the edge); real dipole tests live with the solver.
    ref = abs(_fermi_surface_vx_omega(build("tmd", strain_xx=0.01, velocity_anisotropy=0.0)))
    assert ref > 1.0
    assert abs(_fermi_surface_vx_omega(build("tmd"))) < 1e-12 * ref
    # warping alone keeps Ω(−k) = Ω(k) in each valley: no dipole (tmd docstring)
    warp = build("tmd", strain_xx=0.01, tilt_conduction=0.0, tilt_valence=0.0, velocity_anisotropy=2.0)
    assert abs(_fermi_surface_vx_omega(warp)) < 1e-12 * ref
    # the two valleys add rather than cancel under time reversal (Sodemann & Fu 2015)
    m = build("tmd", strain_xx=0.01)
    parts = [_fermi_surface_vx_omega(block(m, i)) for i in range(4)]
    assert parts[0] == pytest.approx(parts[3], rel=1e-10)
    assert parts[1] == pytest.approx(parts[2], rel=1e-10)
    assert sum(parts) == pytest.approx(_fermi_surface_vx_omega(m), rel=1e-10)


def test_tmd_material_presets_and_overrides():
    # Table I of Xiao et al. 2012 (docs/theory.md §9.3): a, t, Δ, 2λ
    table = {"MoS2": (3.193, 1.10, 1.66, 0.15), "WS2": (3.197, 1.37, 1.79, 0.43),
             "MoSe2": (3.313, 0.94, 1.47, 0.18), "WSe2": (3.310, 1.19, 1.60, 0.46)}
    for mat, vals in table.items():
        p = build("tmd", material=mat).params
        got = tuple(float(p[k]) for k in ("lattice_constant", "hopping", "gap", "soc"))
        assert got == vals
    p = build("tmd", material="WS2", gap=1.5).params
    assert float(p["gap"]) == 1.5 and float(p["hopping"]) == 1.37
    assert dict(build("tmd", material="WSe2").static)["material"] == "WSe2"


def test_tmd_gradient_through_preset_parameter():
    # common practice: derivatives flow through overridden preset values (here ∂gap_edge/∂Δ = 1/2)
    f = lambda d: band_geometry(build("tmd", gap=d), jnp.zeros((1, 2))).energies[0, -1]
    assert float(jax.grad(f)(1.7)) == pytest.approx(0.5, abs=1e-12)


# ---------------------------------------------------------------------------------------------
# tmd-lattice (Liu, Shan, Yao, Yao, Xiao, PRB 88, 085433, 2013; docs/theory.md §9.4)

A = 3.190
K_POINT = np.array([4 * np.pi / (3 * A), 0.0])


def test_tmd_lattice_bond_sum_equals_closed_form():
    # docs/theory.md §9.4 matrix elements vs the bond-sum form used for strain
    m = build("tmd-lattice", soc=0.0)
    ks = RNG.normal(scale=1.5, size=(6, 2))
    h = _h_batch(m, ks)
    ref = np.asarray(jax.jit(jax.vmap(lambda k: tmd_lattice.closed_form(k, m.params, A)))(jnp.asarray(ks)))
    assert np.abs(h[:, 0] - ref).max() < 1e-13
    assert np.abs(h[:, 1] - ref).max() < 1e-13


def test_tmd_lattice_K_point_gap_and_soc_splitting():
    # docs/theory.md check #34 (Liu et al. 2013 GGA NN set): gap at K 1.6628 eV (without SOC,
    # i.e. the spin-averaged gap), valence SOC splitting at K 0.1460 eV; tol 1e-4 abs
    m = build("tmd-lattice")
    b = np.asarray(m.reciprocal_vectors())
    assert np.allclose((2 * b[0] + b[1]) / 3, K_POINT, atol=1e-14)       # K = (4π/(3a), 0)
    e0 = np.asarray(band_geometry(build("tmd-lattice", soc=0.0), K_POINT[None]).energies[0])
    assert e0[2] - e0[1] == pytest.approx(1.6628, abs=1e-4)
    g = band_geometry(m, K_POINT[None])
    e = np.asarray(g.energies[0])
    assert e[1] - e[0] == pytest.approx(0.1460, abs=1e-4)
    assert e[2] - (e[0] + e[1]) / 2 == pytest.approx(1.6628, abs=1e-4)
    # C3 makes K a stationary point of every band (common practice)
    assert np.abs(np.asarray(g.energy_gradient)).max() < 1e-12


def test_tmd_lattice_spin_blocks_are_time_reversed():
    # time reversal (docs/theory.md §1): H_↓(k) = H_↑(−k)*, also under strain
    m = build("tmd-lattice", strain_xx=0.02, strain_xy=-0.01)
    ks = RNG.normal(scale=1.0, size=(4, 2))
    assert np.abs(_h_batch(m, ks)[:, 1] - np.conj(_h_batch(m, -ks)[:, 0])).max() < 1e-13


def _corner(model):
    b = model.reciprocal_vectors()
    return (2 * b[0] + b[1]) / 3


def _gap_at_corner(sxx):
    m = build("tmd-lattice").with_params(strain_xx=sxx)
    e = band_geometry(m, _corner(m)[None]).energies[0]
    return e[2] - e[1]


_LATTICE = build("tmd-lattice")


@jax.jit
def _gap_at_corner_eigh(sxx):
    # the same gap from the model's Hamiltonian and the degeneracy-safe eigh used by the geometry
    m = _LATTICE.with_params(strain_xx=sxx)
    w = jnp.sort(safe_eigh(m.hamiltonian(_corner(m), m.params))[0].ravel())
    return w[2] - w[1]


def test_tmd_lattice_strain_moves_extremum_and_changes_gap_smoothly():
    # bond-geometry strain (Pereira, Castro Neto, Peres, PRB 80, 045401, 2009; §9.5): the corner
    # moves to (1+ε)^{-T}K, the band extrema leave it (C3 broken), the gap changes smoothly
    m = build("tmd-lattice", strain_xx=0.01)
    corner = np.asarray(_corner(m))
    assert np.allclose(corner, K_POINT / np.array([1.01, 1.0]), atol=1e-14)
    grad = np.asarray(band_geometry(m, corner[None]).energy_gradient[0, 2])
    assert abs(grad[0]) > 1e-2                                          # eV Å: extremum moved
    s = np.linspace(-0.01, 0.01, 9)
    gaps = np.array([float(_gap_at_corner(x)) for x in s])
    coef = np.polyfit(s, gaps, 2)
    assert np.abs(np.polyval(coef, s) - gaps).max() < 1e-5               # smooth (no kinks)
    assert abs(coef[1]) > 0.5                                           # eV per unit strain


def test_tmd_lattice_strain_gradient_matches_finite_differences():
    # common practice (diffrax-style gradient test): jax.grad vs central differences
    # (through the Hamiltonian: strained bonds, hopping scaling and the moved zone corner)
    x, h = 0.004, 1e-5
    g = float(jax.grad(_gap_at_corner_eigh)(x))
    fd = (float(_gap_at_corner_eigh(x + h)) - float(_gap_at_corner_eigh(x - h))) / (2 * h)
    assert g == pytest.approx(fd, rel=1e-6)
    assert float(_gap_at_corner_eigh(x)) == pytest.approx(float(_gap_at_corner(x)), abs=1e-12)


@pytest.mark.slow
def test_tmd_lattice_strain_gradient_through_band_geometry():
    # common practice: the same check through band_geometry (heavier to compile)
    x, h = 0.004, 1e-5
    g = float(jax.grad(_gap_at_corner)(x))
    fd = (float(_gap_at_corner(x + h)) - float(_gap_at_corner(x - h))) / (2 * h)
    assert g == pytest.approx(fd, rel=1e-6)


# ---------------------------------------------------------------------------------------------
# weyl (Burkov & Balents, PRL 107, 127205, 2011; Yang, Lu, Ran, PRB 84, 075129, 2011)

AW = 3.0


def test_weyl_nodes_at_plus_minus_k0():
    # gap closes only at (±k0, 0, 0) (weyl docstring, common practice); a tilt does not move them
    k0 = 0.3 * np.pi / AW
    pts = np.array([[k0, 0, 0], [-k0, 0, 0],
                    [0.0, 0, 0], [k0, 0.05, 0], [k0, 0, 0.05], [1.2 * k0, 0, 0], [k0, np.pi / AW, 0]])
    for tilt in (0.0, 0.4):
        e = np.asarray(band_geometry(build("weyl", node_position=0.3, tilt=tilt), pts).energies)
        gap = e[:, 1] - e[:, 0]
        assert np.abs(gap[:2]).max() < 1e-12
        assert gap[2:].min() > 0.05


def test_weyl_curvature_sum_rule():
    # docs/theory.md §2.1: Σ_n Ω_n = 0 at every k
    m = build("weyl", tilt=0.2)
    om = np.asarray(band_geometry(m, jnp.asarray(RNG.normal(size=(10, 3)))).berry_curvature)
    assert np.abs(om.sum(axis=1)).max() < 1e-12
    assert np.abs(om).max() > 1e-3


def _slice_mesh(kx, n):
    q = (np.arange(n) + 0.5) * 2 * np.pi / (n * AW) - np.pi / AW
    x, y, z = np.meshgrid(np.atleast_1d(kx), q, q, indexing="ij")
    return np.stack([x.ravel(), y.ravel(), z.ravel()], 1)


def test_weyl_chern_slices():
    # Yang, Lu, Ran 2011: planes between the nodes are Chern insulators (|C| = 1), outside C = 0;
    # Riemann sum of Ω_x of the lower band over a 40×40 slice = 2π C (mesh accuracy 1e-4 here)
    m = build("weyl")
    n = 40
    kxs = np.array([0.0, 0.2, 0.35, 0.65, 0.8, 1.0]) * np.pi / AW
    om = np.asarray(band_geometry(m, _slice_mesh(kxs, n)).berry_curvature[:, 0, 0]).reshape(len(kxs), -1)
    c = om.sum(axis=1) * (2 * np.pi / (n * AW)) ** 2 / (2 * np.pi)
    assert np.allclose(c, [-1, -1, -1, 0, 0, 0], atol=1e-4)


def test_weyl_anomalous_hall_conductivity():
    # Burkov & Balents 2011: |σ_yz| = (e²/h)·2k0/(2π) with μ at the nodes; sign from
    # σ_ab = −(e²/ħ)∫[dk] f Ω_c (docs/theory.md §5.3) with C = −1 between the nodes.
    # k_x midpoints put the nodes halfway between slices, so the k_x sum of the step C(k_x) is exact.
    m = build("weyl")
    n, nx = 64, 16
    kx = (np.arange(nx) + 0.5) * 2 * np.pi / (nx * AW) - np.pi / AW
    om = np.asarray(band_geometry(m, _slice_mesh(kx, n)).berry_curvature[:, 0, 0])
    dv = (2 * np.pi / (n * AW)) ** 2 * 2 * np.pi / (nx * AW)               # Å⁻³
    e2_over_hbar = E_CHARGE / HBAR_EVS                                    # S
    sigma = -e2_over_hbar * om.sum() * dv / (2 * np.pi) ** 3 * 1e10       # S/m
    k0 = 0.5 * np.pi / AW * 1e10                                          # 1/m
    assert sigma == pytest.approx(E2_OVER_H * 2 * k0 / (2 * np.pi), rel=1e-4)


# ---------------------------------------------------------------------------------------------
# bad input


def test_bad_parameters_name_the_fix():
    with pytest.raises(ValueError, match="unknown parameter 'gapp'.*Did you mean 'gap'"):
        build("tmd", gapp=1.0)
    with pytest.raises(ValueError, match=r"'material' = 'MoTe2' is not allowed; choose one of \['MoS2'"):
        build("tmd", material="MoTe2")
    with pytest.raises(ValueError, match="'strain_xx' = 0.9 .*outside the allowed range"):
        build("tmd-lattice", strain_xx=0.9)
    with pytest.raises(ValueError, match="unknown parameter 'strain'.*Did you mean 'strain_"):
        build("tmd-lattice", strain=0.01)
    with pytest.raises(ValueError, match="'node_position' = 1.5 .*outside the allowed range"):
        build("weyl", node_position=1.5)
    with pytest.raises(ValueError, match="'lattice_constant' sets the lattice and cannot be traced"):
        jax.jit(lambda a: build("weyl", lattice_constant=a).params["mass"])(3.0)
    with pytest.raises(ValueError, match="'lattice_constant' sets the lattice and cannot be traced"):
        jax.jit(lambda a: build("tmd-lattice", lattice_constant=a).params["t0"])(3.19)
