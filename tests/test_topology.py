"""Chern numbers by the lattice link method (Fukui, Hatsugai, Suzuki, J. Phys. Soc. Jpn. 74,
1674, 2005) on the Haldane model (Haldane, PRL 61, 2015, 1988).

Check values #12-#14 of docs/theory.md (phase diagram |M| < 3√3|t2 sin φ|, lower-band
C = +sgn(sin φ) in the convention Ω = ∇×i<u|∇u>, derived and verified there, §4 and §11).
"""
import dataclasses
import warnings

import jax.numpy as jnp
import numpy as np
import pytest

from crosswind.models import BandModel, Lattice, band_geometry, build
from crosswind.models.builtin import haldane as haldane_module
from crosswind.models.twoband import hamiltonian_of
from crosswind.solver import chern_number


def haldane(phi, mass, t2=0.1):
    return build("haldane", t1=1.0, t2=t2, phi=phi, mass=mass)


# docs/theory.md check values #12, #13, #14 (t1 = 1, t2 = 0.1); Haldane, PRL 61, 2015 (1988)
PHASE_DIAGRAM = [
    (np.pi / 2, 0.0, 1),     # #12
    (np.pi / 2, 0.5, 1),     # #13
    (np.pi / 2, -0.5, 1),    # #13
    (np.pi / 2, 0.53, 0),    # #13 (boundary 3√3·0.1 = 0.519615)
    (-np.pi / 2, 0.0, -1),   # §4: C = +sgn(sin φ)
    (np.pi / 4, 0.3, 1),     # #14
    (np.pi / 4, 0.4, 0),     # #14 (boundary 0.367423)
]


@pytest.mark.parametrize("phi,mass,expected", PHASE_DIAGRAM)
def test_haldane_phase_diagram(phi, mass, expected):
    m = haldane(phi, mass)
    c = chern_number(m, bands=0, mesh=24)
    assert isinstance(c, int)
    assert c == expected
    # the upper band carries the opposite Chern number: the two add to zero
    # (sum rule Σ_n Ω_n = 0, docs/theory.md §2.1)
    assert chern_number(m, bands=1, mesh=24) == -expected
    # both bands together (determinant links over the full set): zero
    assert chern_number(m, bands=[0, 1], mesh=24) == 0


@pytest.mark.parametrize("phi,mass,expected", PHASE_DIAGRAM)
def test_coarse_mesh_gives_the_integer(phi, mass, expected):
    # docs/theory.md §4: "FHS gives the integer already on a 6×6 grid here"
    assert chern_number(haldane(phi, mass), bands=0, mesh=6) == expected


@pytest.mark.parametrize("phi,mass", [(np.pi / 2, 0.2), (-np.pi / 2, 0.0), (np.pi / 3, 0.1), (np.pi / 4, 1.0)])
def test_kubo_curvature_integrates_to_fhs_chern_number(phi, mass):
    """Ties the sign convention of band_geometry's Kubo curvature (docs/theory.md §2.1) to
    the FHS orientation (§11): C = (1/2π) Σ_k Ω(k) A_BZ/N² on a reduced-coordinate mesh.  For a
    gapped model the integrand is smooth and periodic, so the rectangle sum converges
    exponentially (≈1e-7 at N = 40 for these parameters, derived here); N = 60 with 1e-6."""
    m = haldane(phi, mass)
    n = 60
    recip = np.asarray(m.reciprocal_vectors())
    f = np.arange(n) / n
    f1, f2 = np.meshgrid(f, f, indexing="ij")
    k = np.stack([f1.ravel(), f2.ravel()], axis=-1) @ recip
    omega = np.asarray(band_geometry(m, k).berry_curvature)            # (nk, 2) Å²
    area = abs(np.linalg.det(recip))
    c_kubo = omega.sum(axis=0) * area / n**2 / (2 * np.pi)
    c_fhs = [chern_number(m, bands=b, mesh=24) for b in (0, 1)]
    np.testing.assert_allclose(c_kubo, c_fhs, rtol=0, atol=1e-6)


def test_default_bands_is_lower_half_and_below_energy():
    m = haldane(np.pi / 2, 0.0)            # cos φ = 0: bands symmetric about 0 eV
    assert chern_number(m, mesh=12) == 1
    assert chern_number(m, below=0.0, mesh=12) == 1
    assert chern_number(m, below=5.0, mesh=12) == 0     # both bands


def test_orientation_independent_of_reciprocal_handedness():
    # Swapping the Bravais vectors makes det(b1, b2) < 0 and reverses the loop orientation of
    # the reduced mesh; the Chern number of the same Hamiltonian must not change (common practice).
    m = haldane(np.pi / 2, 0.0)
    swapped = dataclasses.replace(m, domain=Lattice(vectors=m.domain.vectors[::-1], positions=m.domain.positions))
    assert np.linalg.det(np.asarray(swapped.reciprocal_vectors())) < 0
    assert chern_number(swapped, bands=0, mesh=12) == 1


# --- 3D: planes of a layered model ------------------------------------------------------------
_C = 3.0  # Å, layer spacing


def _layered_dvector(k, p):
    """Haldane layers with a k_z-dependent sublattice mass M + 2 t_z cos(k_z c)."""
    d0, d = haldane_module.dvector(k[:2], p)
    return d0, d.at[0, 2].add(2 * p["tz"] * jnp.cos(k[2] * _C))


_LAYERED_H = hamiltonian_of(_layered_dvector)


def _layered_model():
    base = haldane(np.pi / 2, 0.6)
    a = np.asarray(base.domain.vectors)
    lattice = Lattice(vectors=(tuple(a[0]) + (0.0,), tuple(a[1]) + (0.0,), (0.0, 0.0, _C)),
                      positions=tuple(tuple(p) + (0.0,) for p in base.domain.positions))
    params = dict(base.params, tz=jnp.asarray(0.3))
    return BandModel(name="layered-haldane", dim=3, hamiltonian=_LAYERED_H, params=params, spec=base.spec,
                     domain=lattice, blocks=1, block_size=2, dvector=_layered_dvector)


def test_3d_plane_chern_numbers():
    # Each k_z plane is a 2D Haldane model with mass M(k_z) = 0.6 + 0.6 cos(k_z c):
    # f3 = 0 -> M = 1.2 (trivial), f3 = 1/2 -> M = 0 (C = +1) (derived in docs/theory.md §4);
    # the plane (b1, b2) is oriented along b1 × b2 = +z, the orientation of the 2D model
    m = _layered_model()
    assert chern_number(m, bands=0, mesh=12) == 0
    assert chern_number(m, bands=0, mesh=12, plane_at=0.5) == 1
    assert chern_number(m, bands=0, mesh=12, plane_at=0.5, plane_axis=2) == 1
    # a vertical plane (fixed f1) contains both M(k_z) signs, so its Chern number is zero
    assert chern_number(m, bands=0, mesh=12, plane_at=0.1, plane_axis=0) == 0
    with pytest.raises(ValueError, match="plane_axis must be 0, 1 or 2"):
        chern_number(m, bands=0, mesh=6, plane_axis=3)


# --- diagnostics and errors --------------------------------------------------------------------
def test_continuum_model_is_rejected_with_valley_hint():
    with pytest.raises(ValueError, match="closed Brillouin zone.*valley Chern number"):
        chern_number(build("massive-dirac"), bands=0)


def test_gap_closing_on_the_mesh_raises():
    # exactly at the phase boundary M = 3√3 t2 the K point (on a 24-mesh) is a touching
    m = haldane(np.pi / 2, 3 * np.sqrt(3) * 0.1)
    with pytest.raises(ValueError, match="not defined at a gap closing"):
        chern_number(m, bands=0, mesh=24)


def test_coarse_mesh_warns_and_fine_mesh_recovers():
    # gap 2·|0.515 − 0.5196| ≈ 9 meV at K: a 10-mesh cannot resolve the curvature peak
    m = haldane(np.pi / 2, 0.515)
    with pytest.warns(RuntimeWarning, match="larger mesh"):
        chern_number(m, bands=0, mesh=10)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert chern_number(m, bands=0, mesh=24) == 1


def test_bad_arguments_name_the_fix():
    m = haldane(np.pi / 2, 0.0)
    with pytest.raises(ValueError, match="out of range.*2 bands"):
        chern_number(m, bands=2, mesh=6)
    with pytest.raises(ValueError, match="either bands=... or below="):
        chern_number(m, bands=0, below=0.0, mesh=6)
    with pytest.raises(ValueError, match="inside band 0"):
        chern_number(m, below=-1.0, mesh=6)
    with pytest.raises(ValueError, match="plane_at/plane_axis select a plane of a 3D lattice"):
        chern_number(m, bands=0, mesh=6, plane_at=0.5)
    with pytest.raises(ValueError, match="mesh must be an integer >= 2"):
        chern_number(m, bands=0, mesh=1)
    with pytest.raises(ValueError, match="bands is empty"):
        chern_number(m, bands=[], mesh=6)


PERIODIC_CASES = [
    ("haldane", dict(phi=np.pi / 3, mass=0.1)),
    # strained lattices: deformed reciprocal vectors and orbital positions must match the
    # Hamiltonian built from the deformed bonds (models/strain.py)
    ("honeycomb", dict(staggered=0.2, strain_xx=0.03, strain_yy=-0.01, strain_xy=0.02)),
    ("tmd-lattice", dict(strain_xx=0.02, strain_xy=0.01)),
]


@pytest.mark.parametrize("name,kw", PERIODIC_CASES, ids=[c[0] for c in PERIODIC_CASES])
def test_periodic_gauge_wraps_exactly(name, kw):
    # The states used for the links must be k-periodic up to a phase: |<u(k)|u(k + b_j)>| = 1
    # for every non-degenerate band.  The Hamiltonians carry orbital positions in their Bloch
    # phases (convention I, docs/theory.md §2.5), so this holds only after the
    # exp(i k·τ) gauge factor with the model's (strained) positions and reciprocal vectors.
    from crosswind.solver.engine.topology import _periodic_states

    m = build(name, **kw)
    recip = np.asarray(m.reciprocal_vectors())
    k0 = np.array([0.137, 0.411]) @ recip
    kpts = jnp.asarray(np.stack([k0, k0 + recip[0], k0 + recip[1]]))
    e, vecs = _periodic_states(m, kpts, m.orbital_positions())
    np.testing.assert_allclose(np.asarray(e[1:]), np.asarray(e[:1]).repeat(2, 0), rtol=0, atol=1e-10)
    gaps = np.abs(np.diff(np.asarray(e[0])))
    single = np.ones(m.n_bands, dtype=bool)
    single[:-1] &= gaps > 1e-6
    single[1:] &= gaps > 1e-6
    assert single.any()
    overlaps = np.abs(np.einsum("an,kan->kn", np.conj(np.asarray(vecs[0])), np.asarray(vecs[1:])))
    np.testing.assert_allclose(overlaps[:, single], 1.0, rtol=0, atol=1e-10)


def test_strained_gapped_honeycomb_is_trivial():
    # staggered honeycomb (T-symmetric, gap 2Δ): C = 0 for each band, with and without strain
    # (common practice; docs/theory.md §4 with t2 = 0)
    for strain in (0.0, 0.05):
        m = build("honeycomb", staggered=0.3, strain_xx=strain, strain_xy=strain / 2)
        assert [chern_number(m, bands=b, mesh=12) for b in (0, 1)] == [0, 0]
