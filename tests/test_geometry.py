"""Band geometry (models/geometry.py) on the catalogue models.

Model-independent checks run on every entry of ``crosswind.models.catalogue()`` built with its
defaults, so models added later are covered automatically.  Closed forms for the massive Dirac
cone: docs/theory.md §2-§3 (derived and verified there); original model Xiao, Yao, Niu,
PRL 99, 236809 (2007).
"""
import dataclasses

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from crosswind.models import Lattice, band_geometry, build, catalogue
from crosswind.models.units import ANGSTROM, HBAR2_OVER_ME_EVA2, HBAR_EVS, M_E

FIELDS = ("energies", "energy_gradient", "energy_hessian", "berry_curvature", "orbital_moment",
          "quantum_metric", "polarizability")
NAMES = sorted(catalogue())


def k_scale(model):
    """A characteristic wavevector (1/Å): shortest reciprocal vector, or the continuum scale."""
    if isinstance(model.domain, Lattice):
        return float(np.linalg.norm(np.asarray(model.reciprocal_vectors()), axis=1).min())
    return float(model.domain.scale_for(model.params))


def generic_k(model, n=4, seed=0, reach=1e-3):
    """n random k-points (1/Å) away from band crossings.  At each point every pair of adjacent
    bands is either degenerate with equal slopes (symmetry-protected, e.g. a valley pair) or
    separated by much more than their slope difference times ``reach``·k_scale, the largest
    displacement a caller's finite-difference stencil makes, so the ascending order of the bands
    does not change inside the stencil."""
    rng = np.random.default_rng(seed)
    found = []
    for _ in range(16):      # candidates in batches of n: the same (n, d) shape the caller uses
        k = rng.normal(size=(n, model.dim)) * 0.7 * k_scale(model)
        g = band_geometry(model, k)
        e, de = np.asarray(g.energies), np.asarray(g.energy_gradient)
        gaps = np.diff(e, axis=1)
        slope = np.linalg.norm(np.diff(de, axis=1), axis=-1)
        degenerate = (gaps < 1e-8) & (slope < 1e-6 * max(np.abs(de).max(), 1e-300))
        separated = gaps > 20 * slope * reach * k_scale(model) + 1e-8
        found.extend(k[np.all(degenerate | separated, axis=1)])
        if len(found) >= n:
            return np.stack(found[:n])
    raise AssertionError("not enough generic k-points found")


def as_np(g):
    return {f: np.asarray(getattr(g, f)) for f in FIELDS}


# ---------------------------------------------------------------------------------------------
# every catalogue model
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("name", NAMES)
def test_hamiltonian_blocks_are_hermitian(name):
    m = build(name)
    for k in generic_k(m):
        h = np.asarray(m.hamiltonian(jnp.asarray(k), m.params))
        assert h.shape == (m.blocks, m.block_size, m.block_size)
        assert h.dtype == np.complex128
        np.testing.assert_allclose(h, np.conj(np.swapaxes(h, -1, -2)), rtol=0, atol=1e-12 * max(np.abs(h).max(), 1.0))


@pytest.mark.parametrize("name", NAMES)
def test_curvature_sums_to_zero_over_bands(name):
    # Σ_n Ω_n = 0 at every k (docs/theory.md §2.1)
    m = build(name)
    g = as_np(band_geometry(m, generic_k(m)))
    omega = g["berry_curvature"]
    total = omega.sum(axis=1)
    np.testing.assert_allclose(total, 0.0, rtol=0, atol=1e-10 * max(np.abs(omega).max(), 1.0))


def _energies(model, k):
    return np.asarray(band_geometry(model, k).energies)


@pytest.mark.parametrize("name", NAMES)
def test_velocity_and_hessian_match_finite_differences(name):
    """Autodiff gradients and sum-over-states Hessians against central differences of the
    energies alone (common practice).  Gradient: step 1e-5·k_scale, error O(h²) ≈ 1e-9 relative.
    Hessian: 4-point mixed second difference with Richardson extrapolation (steps 5e-4 and
    2.5e-4 of k_scale, error O(h⁴) plus round-off, ≈ 2e-7 relative for the catalogue models)."""
    m = build(name)
    k = generic_k(m)
    geo = band_geometry(m, k)
    g = as_np(geo)
    s = k_scale(m)
    eye = np.eye(m.dim)

    h = 1e-5 * s
    fd_grad = np.stack([(_energies(m, k + h * e) - _energies(m, k - h * e)) / (2 * h) for e in eye], axis=-1)
    grad = g["energy_gradient"]
    np.testing.assert_allclose(grad, fd_grad, rtol=0, atol=1e-6 * np.abs(grad).max())
    np.testing.assert_allclose(np.asarray(geo.velocities), grad * ANGSTROM / HBAR_EVS, rtol=1e-12)

    def second(hh):
        out = np.zeros(grad.shape + (m.dim,))
        for a in range(m.dim):
            for b in range(m.dim):
                ea, eb = hh * eye[a], hh * eye[b]
                out[..., a, b] = (_energies(m, k + ea + eb) - _energies(m, k + ea - eb)
                                  - _energies(m, k - ea + eb) + _energies(m, k - ea - eb)) / (4 * hh * hh)
        return out

    h2 = 5e-4 * s
    fd_hess = (4 * second(h2 / 2) - second(h2)) / 3
    hess = g["energy_hessian"]
    np.testing.assert_allclose(hess, fd_hess, rtol=0, atol=1e-6 * np.abs(hess).max())


# models with a closed-form two-band path: defaults plus non-default settings that switch on
# every term (tilt, valley pair, Haldane phase and mass, Rashba + Zeeman)
DVECTOR_CASES = [(n, {}) for n in NAMES if build(n).dvector is not None] + [
    ("massive-dirac", dict(valleys=2, tilt=5e4, mass=-0.07)),
    ("haldane", dict(phi=1.0, mass=0.1, t2=0.07)),
    ("parabolic", dict(rashba=0.3, zeeman=0.01)),
]


@pytest.mark.parametrize("name,kw", DVECTOR_CASES, ids=[f"{n}-{i}" for i, (n, _) in enumerate(DVECTOR_CASES)])
def test_dvector_path_matches_eigh_path(name, kw):
    # the closed two-band forms (models/geometry.py docstring, docs/theory.md §2.3) must
    # agree with the general sums over states (§2.1-§2.4) for every field
    m = build(name, **kw)
    general = dataclasses.replace(m, dvector=None)
    k = generic_k(m)
    a, b = as_np(band_geometry(m, k)), as_np(band_geometry(general, k))
    # absolute floor from the model's own scales (length L = 1/k_scale, energy E), so fields
    # that vanish by symmetry (Ω of graphene) are compared against round-off, not against zero
    length, energy = 1 / k_scale(m), np.abs(a["energies"]).max()
    natural = dict(energies=energy, energy_gradient=energy * length, energy_hessian=energy * length**2,
                   berry_curvature=length**2, orbital_moment=energy * length**2 * ANGSTROM**2 / HBAR_EVS,
                   quantum_metric=length**2, polarizability=length**2 / energy)
    for f in FIELDS:
        scale = max(np.abs(a[f]).max(), np.abs(b[f]).max())
        np.testing.assert_allclose(a[f], b[f], rtol=0, atol=1e-10 * scale + 1e-12 * natural[f], err_msg=f)


# ---------------------------------------------------------------------------------------------
# massive Dirac cone: closed forms and check values (docs/theory.md §2.3, §3)
# ---------------------------------------------------------------------------------------------
HV = 5e5 * HBAR_EVS / ANGSTROM     # ħv in eV Å for v = 5e5 m/s (3.29106 eV Å)
DELTA = 0.1


def dirac_closed_forms(k, tau):
    """Per band (lower, upper): Ω, g, G, m of H = ħv(τk_xσ_x + k_yσ_y) + Δσ_z (docs/theory.md §2-§3)."""
    e = np.sqrt(HV**2 * np.sum(k**2, axis=-1) + DELTA**2)
    om_up = -tau * HV**2 * DELTA / (2 * e**3)
    g = HV**2 * (np.eye(2)[None] * e[:, None, None] ** 2 - HV**2 * k[:, :, None] * k[:, None, :]) / (4 * e[:, None, None] ** 4)
    mom = -tau * HV**2 * DELTA / (2 * e**2) * ANGSTROM**2 / HBAR_EVS    # -τ e ħ v² Δ/(2E²) in eV/T
    return e, om_up, g, mom


@pytest.fixture(scope="module")
def dirac_k():
    return np.random.default_rng(3).normal(size=(6, 2)) * 0.03


def test_dirac_single_valley_closed_forms(dirac_k):
    m = build("massive-dirac", velocity=5e5, mass=DELTA)
    g = as_np(band_geometry(m, dirac_k))
    e, om_up, metric, mom = dirac_closed_forms(dirac_k, tau=1)
    np.testing.assert_allclose(g["energies"], np.stack([-e, e], -1), rtol=1e-12)
    np.testing.assert_allclose(g["berry_curvature"], np.stack([-om_up, om_up], -1), rtol=1e-10)
    np.testing.assert_allclose(g["quantum_metric"], np.stack([metric, metric], 1), rtol=1e-10, atol=1e-10 * metric.max())
    # BCP G^c = g/E = -G^v (docs/theory.md §2.3)
    bcp = metric / e[:, None, None]
    np.testing.assert_allclose(g["polarizability"], np.stack([-bcp, bcp], 1), rtol=1e-10, atol=1e-10 * bcp.max())
    np.testing.assert_allclose(g["orbital_moment"], np.stack([mom, mom], -1), rtol=1e-10)


def test_dirac_valley_pair_has_opposite_curvature(dirac_k):
    # valleys=2 adds the time-reversed partner (τ = -1).  A tilt (∝ identity, no effect on Ω)
    # splits the valleys in energy so the ascending band order is known: for k_x > 0,
    # bands = [τ=-1 lower, τ=+1 lower, τ=-1 upper, τ=+1 upper].
    k = np.abs(dirac_k[:, :1]) * np.array([[1.0, 0.0]]) + dirac_k * np.array([[0.0, 1.0]])
    k = k + np.array([[0.01, 0.0]])
    m = build("massive-dirac", velocity=5e5, mass=DELTA, tilt=5e4, valleys=2)
    g = as_np(band_geometry(m, k))
    _, om_plus, _, mom_plus = dirac_closed_forms(k, tau=1)
    np.testing.assert_allclose(g["berry_curvature"], np.stack([om_plus, -om_plus, -om_plus, om_plus], -1), rtol=1e-10)
    np.testing.assert_allclose(g["orbital_moment"], np.stack([-mom_plus, mom_plus, -mom_plus, mom_plus], -1), rtol=1e-10)


def test_dirac_check_values_5_6_9():
    m = build("massive-dirac", velocity=5e5, mass=DELTA)
    k = np.array([[0.0, 0.0], [DELTA / HV, 0.0]])       # k = 0 and ħvk = Δ
    g = band_geometry(m, k)
    omega = np.asarray(g.berry_curvature)
    # check value #5: Ω_c(0) = -τ·541.554 Å² (τ = +1)
    assert omega[0, 1] == pytest.approx(-541.554, rel=1e-5)
    # check value #6: |Ω_c| = 191.468 Å² at ħvk = Δ
    assert abs(omega[1, 1]) == pytest.approx(191.468, rel=1e-5)
    # check value #9: m* = Δ/v² = 0.0703528 m_e at the band edge; m_z(0) = -τ·8.22765e-4 eV/T
    inv_mass = np.asarray(g.inverse_mass)[0, 1]
    np.testing.assert_allclose(inv_mass, np.eye(2) / 0.0703528, rtol=1e-5, atol=1e-12)
    assert DELTA * 1.602176634e-19 / 5e5**2 / M_E == pytest.approx(0.0703528, rel=1e-5)
    assert float(g.orbital_moment[0, 1]) == pytest.approx(-8.22765e-4, rel=1e-5)
    assert float(g.orbital_moment[0, 0]) == pytest.approx(-8.22765e-4, rel=1e-5)
    # inverse-mass unit conversion: (1/ħ²)∂²ε = v²/Δ in 1/m_e
    assert float(g.energy_hessian[0, 1, 0, 0]) / HBAR2_OVER_ME_EVA2 == pytest.approx(1 / 0.0703528, rel=1e-5)


TWO_BAND_CASES = [
    ("massive-dirac", dict(tilt=3e4)),
    ("haldane", dict(phi=1.0, mass=0.1)),
    ("parabolic", dict(rashba=0.3, zeeman=0.01)),
]


@pytest.mark.parametrize("closed_form", [True, False], ids=["dvector", "eigh"])
@pytest.mark.parametrize("name,kw", TWO_BAND_CASES, ids=[c[0] for c in TWO_BAND_CASES])
def test_two_band_moment_identity(name, kw, closed_form):
    # m_c = m_v = (e/ħ) E Ω_c with E = half the direct gap (docs/theory.md §2.4, derived)
    m = build(name, **kw)
    if not closed_form:
        m = dataclasses.replace(m, dvector=None)
    g = as_np(band_geometry(m, generic_k(m)))
    half_gap = (g["energies"][:, 1] - g["energies"][:, 0]) / 2
    expected = half_gap * g["berry_curvature"][:, 1] * ANGSTROM**2 / HBAR_EVS
    np.testing.assert_allclose(g["orbital_moment"], np.stack([expected, expected], -1), rtol=1e-9,
                               atol=1e-12 * np.abs(expected).max())


# ---------------------------------------------------------------------------------------------
# symmetries (docs/theory.md §1)
# ---------------------------------------------------------------------------------------------
def test_time_reversal_pair_curvature_is_odd():
    # T-symmetric valley pair (tilt splits the valleys; ε_n(-k) = ε_n(k) band by band):
    # Ω_n(-k) = -Ω_n(k), m_n(-k) = -m_n(k)
    m = build("massive-dirac", tilt=5e4, valleys=2)
    k = generic_k(m)
    g, gm = as_np(band_geometry(m, k)), as_np(band_geometry(m, -k))
    np.testing.assert_allclose(gm["energies"], g["energies"], rtol=1e-12)
    np.testing.assert_allclose(gm["berry_curvature"], -g["berry_curvature"], rtol=1e-10)
    np.testing.assert_allclose(gm["orbital_moment"], -g["orbital_moment"], rtol=1e-10)


def test_inversion_symmetric_haldane_curvature_is_even():
    # Haldane with M = 0 keeps inversion (A <-> B) while φ ≠ 0 breaks T: Ω_n(-k) = +Ω_n(k)
    m = build("haldane", phi=1.0, mass=0.0)
    k = generic_k(m)
    g, gm = as_np(band_geometry(m, k)), as_np(band_geometry(m, -k))
    np.testing.assert_allclose(gm["energies"], g["energies"], rtol=1e-12)
    np.testing.assert_allclose(gm["berry_curvature"], g["berry_curvature"], rtol=1e-10)
    # ... and a sublattice mass breaks it: the same comparison must then fail
    mb = build("haldane", phi=1.0, mass=0.2)
    ob, obm = (np.asarray(band_geometry(mb, q).berry_curvature) for q in (k, -k))
    assert np.abs(ob - obm).max() > 1e-3 * np.abs(ob).max()


# ---------------------------------------------------------------------------------------------
# exact band touchings: finite parameter gradients, documented values at the touching
# ---------------------------------------------------------------------------------------------
K_GRAPHENE = 4 * np.pi / (3 * np.sqrt(3) * 1.42)   # K point for a_cc = 1.42 Å (docs/theory.md §4)

TOUCHINGS = [
    ("massive-dirac", dict(mass=0.0, tilt=2e4), np.array([[0.0, 0.0]])),
    ("haldane", dict(mass=0.0, t2=0.0), np.array([[K_GRAPHENE, 0.0]])),
]


@pytest.mark.parametrize("closed_form", [True, False], ids=["dvector", "eigh"])
@pytest.mark.parametrize("name,kw,k", TOUCHINGS, ids=[c[0] for c in TOUCHINGS])
def test_exact_touching_is_finite_and_documented(name, kw, k, closed_form):
    model = build(name, **kw)
    if not closed_form:
        model = dataclasses.replace(model, dvector=None)
    g = as_np(band_geometry(model, k))
    e = g["energies"][0]
    assert abs(e[1] - e[0]) < 1e-9                     # it is a touching
    # documented meaning (models/geometry.py): Ω, metric, BCP and moment are zero at the point;
    # the two bands share the group-mean velocity (here the tilt velocity, or zero)
    for f in ("berry_curvature", "orbital_moment", "quantum_metric", "polarizability"):
        np.testing.assert_array_equal(g[f], 0.0, err_msg=f)
    np.testing.assert_allclose(g["energy_gradient"][0, 0], g["energy_gradient"][0, 1], rtol=0, atol=1e-12)
    if name == "massive-dirac":
        tilt_grad = 2e4 * HBAR_EVS / ANGSTROM
        np.testing.assert_allclose(g["energy_gradient"][0, :, 0], tilt_grad, rtol=1e-12)

    def total(params):
        out = band_geometry(model.with_params(**params), k)
        return sum(jnp.sum(getattr(out, f)) for f in FIELDS)

    grads = jax.jacfwd(total)(dict(model.params))    # forward mode: cheaper to compile than reverse
    for key, val in grads.items():
        assert np.all(np.isfinite(np.asarray(val))), key


def test_band_geometry_rejects_wrong_k_shape():
    m = build("massive-dirac")
    with pytest.raises(ValueError, match=r"shape \(nk, 2\).*Reshape with k\.reshape\(-1, 2\)"):
        band_geometry(m, np.zeros(2))
    with pytest.raises(ValueError, match=r"shape \(nk, 2\).*got \(4, 3\)"):
        band_geometry(m, np.zeros((4, 3)))


@pytest.mark.slow          # ≈ 15 s: compiling reverse mode through the second k-derivatives
def test_reverse_mode_gradient_at_touching_matches_forward():
    # the degeneracy-safe eigh rule (models/eigh.py) must give the same finite derivative in
    # reverse mode (what jax.grad through a response uses) as in forward mode
    model = dataclasses.replace(build("haldane", mass=0.0, t2=0.0), dvector=None)
    k = np.array([[K_GRAPHENE, 0.0], [0.3, 0.2]])      # the touching and a generic point

    def total(params):
        out = band_geometry(model.with_params(**params), k)
        return sum(jnp.sum(getattr(out, f)) for f in FIELDS)

    rev = jax.grad(total)(dict(model.params))
    fwd = jax.jacfwd(total)(dict(model.params))
    for key in rev:
        assert np.isfinite(float(rev[key])), key
        assert float(rev[key]) == pytest.approx(float(fwd[key]), rel=1e-9, abs=1e-12), key


def test_block_band_geometry_is_band_geometry_block_by_block():
    """The per-block geometry (one program for all blocks, used for the report's sector panels)
    holds the same bands as band_geometry, ascending within each block: merged and sorted, the
    energies and curvatures agree."""
    from crosswind.models.geometry import block_band_geometry
    for name, kw in (("tmd", dict(material="MoS2", strain_xx=0.01)), ("massive-dirac", dict(valleys=2, tilt=3e4)),
                     ("bilayer-graphene", {})):
        m = build(name, **kw)
        k = np.random.default_rng(3).normal(scale=0.05, size=(40, 2))
        g, gb = band_geometry(m, k), block_band_geometry(m, k)
        e = np.asarray(gb.energies)
        assert e.shape == (40, m.blocks, m.block_size)
        assert np.all(np.diff(e, axis=-1) >= 0)
        flat_e, flat_om = e.reshape(40, -1), np.asarray(gb.berry_curvature).reshape(40, -1)
        order = np.argsort(flat_e, axis=1, kind="stable")
        np.testing.assert_allclose(np.take_along_axis(flat_e, order, 1), np.asarray(g.energies), rtol=0, atol=1e-12)
        np.testing.assert_allclose(np.take_along_axis(flat_om, order, 1), np.asarray(g.berry_curvature),
                                   rtol=1e-10, atol=1e-12 * np.abs(flat_om).max())
