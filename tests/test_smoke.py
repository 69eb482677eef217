import jax.numpy as jnp

from crosswind.models import band_geometry, build


def test_float64_is_on():
    m = build("massive-dirac")
    g = band_geometry(m, jnp.zeros((1, 2)))
    assert g.energies.dtype == jnp.float64
