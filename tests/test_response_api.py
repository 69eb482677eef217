"""Interface properties of ``response``: shapes, broadcasting, no recompilation on new sweep
values, differentiability at a fixed mesh, error messages."""
import dataclasses

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from crosswind.models import build
from crosswind.solver import response
from crosswind.solver.engine.response import ChiParts, Resolution, Response, _moments_at
from crosswind.solver.pytrees import as_dict

DIRAC = dict(velocity=5e5, mass=0.1, tilt=5e4)


def test_shapes_follow_broadcast_of_conditions():
    m = build("massive-dirac", **DIRAC)
    r = response(m, mu=jnp.array([0.12, 0.15, 0.2]), temperature=jnp.array([[5.0], [20.0]]), tau=100.0,
                 resolution=1)
    assert r.density.shape == (2, 3)
    assert r.sigma.shape == (2, 3, 2, 2)
    assert r.dipole.shape == (2, 3, 2)
    assert r.chi.shape == (2, 3, 2, 2, 2)
    assert set(as_dict(r.chi_parts)) == {"dipole", "drude", "intrinsic"}
    for k in ("sigma", "dipole", "chi", "density"):
        assert getattr(r.error, k).shape == getattr(r, k).shape
    np.testing.assert_allclose(sum(as_dict(r.chi_parts).values()), r.chi, rtol=1e-14, atol=0)
    np.testing.assert_allclose(sum(as_dict(r.chi_dc_parts).values()), r.chi_dc, rtol=1e-14, atol=0)


def test_response_is_a_typed_pytree_and_its_error_has_its_structure():
    """Response, its χ parts and its error estimate are typed pytrees: ``r.error`` mirrors ``r`` (one
    real array per field and χ part), ``r.resolution`` is static metadata, and jit/tree_map keep the
    types."""
    m = build("massive-dirac", **DIRAC)
    r = response(m, mu=jnp.array([0.12, 0.15]), temperature=10.0, tau=100.0, resolution=1)
    assert isinstance(r.chi_parts, ChiParts) and isinstance(r.chi_dc_parts, ChiParts)
    assert isinstance(r.error, Response) and isinstance(r.error.chi_parts, ChiParts)
    assert r.error.error is None and r.error.resolution is None and r.error.units == r.units
    values, errors = jax.tree_util.tree_leaves(dataclasses.replace(r, error=None)), jax.tree_util.tree_leaves(r.error)
    assert len(values) == len(errors) == 23          # 17 array fields (chi_dc_full, chi_circular included) + 2 × 3 χ parts
    for v, e in zip(values, errors):
        assert v.shape == e.shape and not np.iscomplexobj(np.asarray(e))
    assert np.all(np.isfinite(np.asarray(r.error.sigma))) and np.all(np.isfinite(np.asarray(r.error.chi_parts.drude)))
    res = r.resolution
    assert isinstance(res, Resolution) and res.engine == "mesh" and res.level == 1 and res.converged is None
    assert res.nodes_per_condition > 0 and res.condition_block >= 1 and res.window_unresolved == 0
    assert res.plan is None and res.attempts is None and res.levels is None
    hash(jax.tree_util.tree_structure(r))             # static metadata is hashable (jit arguments)
    assert r.units["sigma"] == "S" and dict(r.units) == r.units
    doubled = jax.jit(lambda x: jax.tree_util.tree_map(lambda a: 2 * a, x))(r)
    assert isinstance(doubled, Response) and doubled.resolution == res
    np.testing.assert_array_equal(np.asarray(doubled.chi_parts.drude), 2 * np.asarray(r.chi_parts.drude))


def test_new_sweep_values_do_not_recompile():
    m = build("massive-dirac", **DIRAC)
    response(m, mu=jnp.array([0.12, 0.15]), temperature=jnp.array([5.0, 10.0]), tau=jnp.array([50.0, 100.0]),
             resolution=1)
    size = _moments_at._cache_size()
    response(m, mu=jnp.array([0.13, 0.25]), temperature=jnp.array([7.0, 30.0]), tau=jnp.array([80.0, 10.0]),
             resolution=1)
    m2 = build("massive-dirac", velocity=4e5, mass=0.12, tilt=3e4)   # new parameter values, same model
    response(m2, mu=jnp.array([0.13, 0.25]), temperature=jnp.array([7.0, 30.0]), tau=jnp.array([80.0, 10.0]),
             resolution=1)
    assert _moments_at._cache_size() == size


def _fd(f, x, h):
    return (f(x + h) - f(x - h)) / (2 * h)


@pytest.mark.parametrize("wrt", ["mu", "temperature", "tau", "mass"])
def test_gradients_match_central_differences(wrt):
    base = dict(mu=0.15, temperature=20.0, tau=100.0, mass=0.1)
    steps = dict(mu=1e-5, temperature=1e-3, tau=1e-3, mass=1e-6)

    def dipole(x):
        v = dict(base, **{wrt: x})
        m = build("massive-dirac", velocity=5e5, mass=v["mass"], tilt=5e4)
        r = response(m, mu=v["mu"], temperature=v["temperature"], tau=v["tau"], resolution=2)
        return r.chi[1, 0, 0].real

    g = jax.grad(dipole)(base[wrt])
    fd = _fd(dipole, base[wrt], steps[wrt])
    assert np.isfinite(g)
    np.testing.assert_allclose(g, fd, rtol=1e-5)


def test_gradient_finite_at_low_temperature():
    m = build("massive-dirac", **DIRAC)
    g = jax.grad(lambda T: response(m, mu=0.15, temperature=T, tau=100.0, resolution=1).sigma[0, 0].real)(0.0)
    assert np.isfinite(g)


def test_automatic_resolution_needs_concrete_values():
    m = build("massive-dirac", **DIRAC)
    with pytest.raises(ValueError, match="resolution="):
        jax.grad(lambda mu: response(m, mu=mu, temperature=5.0, tau=100.0).sigma[0, 0].real)(0.15)


def test_bad_conditions_give_clear_errors():
    m = build("massive-dirac", **DIRAC)
    with pytest.raises(ValueError, match="temperature must be >= 0"):
        response(m, mu=0.1, temperature=-1.0, tau=100.0)
    with pytest.raises(ValueError, match="tau must be positive"):
        response(m, mu=0.1, temperature=1.0, tau=0.0)
    with pytest.raises(ValueError, match="do not broadcast"):
        response(m, mu=jnp.zeros(3), temperature=jnp.ones(2), tau=100.0)
    with pytest.raises(ValueError, match="resolution must be a level"):
        response(m, mu=0.1, temperature=1.0, tau=100.0, resolution=99)
    with pytest.raises(TypeError, match="BandModel"):
        response("massive-dirac", mu=0.1, temperature=1.0, tau=100.0)


def test_memory_does_not_grow_with_the_mesh():
    """Chunked evaluation: from 192² to 768² coarse cells the compiled working memory (XLA's own
    memory analysis) grows by less than 32 bytes per cell — one refinement score and flag per cell,
    no per-k geometry (which would take hundreds of bytes per k-point).  The 4096² run is in
    benchmarks/."""
    from crosswind.solver.engine.scattering import ConstantTau

    m = build("haldane")
    args = (m, jnp.array([0.0]), jnp.array([1e-2]), jnp.array([10.0]), {"tau0": jnp.array([100.0])},
            jnp.asarray(0.0))
    kw = dict(tau_eval=ConstantTau.evaluate, filled=1, sea=False, chunk=4096)
    small = _moments_at.lower(*args, level=3, **kw).compile().memory_analysis().temp_size_in_bytes
    large = _moments_at.lower(*args, level=5, **kw).compile().memory_analysis().temp_size_in_bytes
    assert (large - small) / (768 ** 2 - 192 ** 2) < 32
    assert large < 64 * 2 ** 20


def test_skipping_the_error_estimate_keeps_values():
    m = build("massive-dirac", **DIRAC)
    a = response(m, mu=0.15, temperature=10.0, tau=100.0, resolution=1)
    b = response(m, mu=0.15, temperature=10.0, tau=100.0, resolution=1, estimate_error=False)
    np.testing.assert_array_equal(np.asarray(a.chi), np.asarray(b.chi))
    assert np.all(np.isnan(np.asarray(b.error.chi)))
    assert np.all(np.isnan(np.asarray(b.error.chi_parts.dipole)))
    assert np.all(np.isfinite(np.asarray(a.error.chi)))
