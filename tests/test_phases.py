"""The fused sine/cosine of Bloch phases (crosswind.models.phases) against numpy and mpmath, and
its derivatives against the exact rules."""
import jax
import jax.numpy as jnp
import mpmath
import numpy as np

from crosswind.models.phases import bloch_phase, sincos


def test_sincos_matches_numpy_to_a_few_ulp_over_a_wide_range():
    rng = np.random.default_rng(3)
    x = np.concatenate([rng.uniform(-40, 40, 200_000), rng.uniform(-1e5, 1e5, 20_000),
                        np.arange(-64, 65) * np.pi / 4,                   # quadrant boundaries
                        np.array([0.0, -0.0, 1e-300, 5e-9, np.pi / 4 * (1 - 1e-15)])])
    s, c = (np.asarray(v) for v in jax.jit(sincos)(jnp.asarray(x)))
    # numpy's own sin/cos are within an ulp: two ulps of 1 between them
    assert np.max(np.abs(s - np.sin(x))) <= 2.3e-16
    assert np.max(np.abs(c - np.cos(x))) <= 2.3e-16


def test_sincos_against_mpmath_at_hard_arguments():
    # near multiples of π/2 the reduction cancels most digits: the three-part π/2 keeps them
    mpmath.mp.dps = 40
    xs = [float(mpmath.mpf(n) * mpmath.pi / 2) for n in (1, 3, 7, 101, 1001, 99999)] + [1e5 + 0.1, 355.0]
    s, c = (np.asarray(v) for v in sincos(jnp.asarray(xs)))
    for x, si, ci in zip(xs, s, c):
        ref_s, ref_c = mpmath.sin(mpmath.mpf(x)), mpmath.cos(mpmath.mpf(x))
        assert abs(si - float(ref_s)) <= 2.5e-16 * max(1.0, abs(float(ref_s))) + 1e-30
        assert abs(ci - float(ref_c)) <= 2.5e-16 * max(1.0, abs(float(ref_c))) + 1e-30


def test_sincos_derivatives_follow_the_exact_rules():
    x = jnp.linspace(-7.0, 7.0, 57)
    s, c = sincos(x)
    ds = jax.vmap(jax.grad(lambda v: sincos(v)[0]))(x)
    dc = jax.vmap(jax.grad(lambda v: sincos(v)[1]))(x)
    d2s = jax.vmap(jax.jacfwd(jax.jacfwd(lambda v: sincos(v)[0])))(x)
    np.testing.assert_array_equal(np.asarray(ds), np.asarray(c))
    np.testing.assert_array_equal(np.asarray(dc), -np.asarray(s))
    np.testing.assert_array_equal(np.asarray(d2s), -np.asarray(s))


def test_bloch_phase_and_non_finite_arguments():
    x = jnp.asarray([0.3, -2.0, 11.0])
    np.testing.assert_allclose(np.asarray(bloch_phase(x)), np.exp(1j * np.asarray(x)), rtol=0, atol=4.5e-16)
    s, c = sincos(jnp.asarray([np.inf, -np.inf, np.nan]))
    assert np.all(np.isnan(np.asarray(s))) and np.all(np.isnan(np.asarray(c)))
