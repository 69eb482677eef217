"""Symmetry rules of the Berry-curvature dipole and its current (Sodemann & Fu, PRL 115, 216806,
2015: a 2D dipole needs at most one mirror line and lies perpendicular to it; docs/theory.md
§5.6)."""
import numpy as np
import pytest

from crosswind.models import build
from crosswind.solver import response

COND = dict(mu=0.7, temperature=300.0, tau=100.0, resolution=3)


@pytest.fixture(scope="module")
def honeycomb_pair():
    """Gapped honeycomb (C3v in the plane) unstrained and with 2 % strain along x (zigzag), which
    keeps the mirror x → −x only."""
    r0 = response(build("honeycomb", hopping=2.8, staggered=0.5), **COND)
    r1 = response(build("honeycomb", hopping=2.8, staggered=0.5, strain_xx=0.02), **COND)
    return r0, r1


def test_c3_symmetric_honeycomb_has_no_dipole(honeycomb_pair):
    r0, r1 = honeycomb_pair
    d0 = np.abs(np.asarray(r0.dipole))
    err0 = np.asarray(r0.error.dipole)
    scale = np.abs(np.asarray(r1.dipole)).max()
    assert scale > 1e-14                       # the strained value is a real, finite dipole (m)
    # C3 forces D = 0: the unstrained value vanishes within its own integration error, and that
    # error is far below the strain-induced dipole
    assert np.all(d0 <= 3 * err0 + 1e-12 * scale)
    assert err0.max() < 1e-3 * scale


def test_uniaxial_strain_dipole_is_perpendicular_to_the_mirror_line(honeycomb_pair):
    _, r1 = honeycomb_pair
    dx, dy = np.asarray(r1.dipole)
    # mirror x → −x (mirror line = y axis): D_x even, D_y odd → D ∥ x, perpendicular to the line
    assert abs(dy) < 1e-8 * abs(dx)
    assert float(np.asarray(r1.error.dipole).max()) < 1e-2 * abs(dx)


def test_dipole_current_is_perpendicular_to_the_field():
    """2D dipole current j = −(e³τ/2ħ²)(D·E) ẑ × E is transverse for every field direction."""
    m = build("massive-dirac", velocity=5e5, mass=0.1, tilt=5e4, valleys=2)
    r = response(m, mu=0.15, temperature=10.0, tau=100.0, resolution=1)
    chi = np.asarray(r.chi_parts.dipole).real
    rng = np.random.default_rng(0)
    for _ in range(5):
        e = rng.normal(size=2)
        j = np.einsum("abc,b,c->a", chi, e, e)
        assert abs(j @ e) < 1e-12 * np.linalg.norm(j) * np.linalg.norm(e)
        assert np.linalg.norm(j) > 0
