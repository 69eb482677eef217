"""The fused occupation triple (f0, −∂f0/∂ε, s) of the energy-resolved sums against mpmath at 50
digits and against scipy's closed forms, with its custom derivative checked against mpmath's
derivatives (first and second order).  Fermi–Dirac functions and the entropy per state
s = −f ln f − (1−f) ln(1−f): common practice (e.g. Ashcroft & Mermin, Solid State Physics, 1976,
ch. 2; the entropy form from memory, checked here by its own definition in mpmath)."""
import jax
import jax.numpy as jnp
import mpmath as mp
import numpy as np
import pytest

from crosswind.solver.engine.occupation import occupations

mp.mp.dps = 50
X = np.array([-800.0, -60.0, -37.5, -20.0, -3.0, -0.7, -1e-9, 0.0, 1e-9, 0.4, 2.5, 19.0, 38.0, 70.0, 800.0])


def _ref(x):
    x = mp.mpf(x)
    f = 1 / (mp.exp(x) + 1)
    g = f * (1 - f)
    s = -f * mp.log(f) - (1 - f) * mp.log(1 - f) if 0 < f < 1 else mp.mpf(0)
    return f, g, s


def test_values_match_mpmath_to_relative_precision():
    kt = 1.0            # x exactly as given (a scaled energy would round x, and e^{-x} with it)
    f0, F, s = occupations(jnp.asarray(X), 0.0, kt)
    for i, x in enumerate(X):
        f, g, ss = _ref(x)
        for got, want in ((f0[i], f), (F[i] * kt, g), (s[i], ss)):
            want = float(want)
            if want == 0.0 or abs(want) < 1e-300:
                assert abs(float(got)) < 1e-300
            else:
                assert abs(float(got) - want) <= 4e-15 * abs(want), (x, float(got), want)


def test_energy_scaled_values_match_scipy_closed_forms():
    """At a realistic k_BT: f0 against scipy's logistic function, −∂f0/∂ε against
    sech²(x/2)/(4k_BT), s against its definition through scipy's log-logistic."""
    from scipy.special import expit, log_expit
    e = np.linspace(-0.3, 0.4, 701)
    mu, kt = 0.05, 8.617e-4
    x = (e - mu) / kt
    f0, F, s = occupations(jnp.asarray(e), mu, kt)
    f, g = expit(-x), expit(x)
    np.testing.assert_allclose(f0, f, rtol=1e-13, atol=0)
    np.testing.assert_allclose(F, 1.0 / (4 * kt * np.cosh(np.clip(0.5 * x, -300, 300)) ** 2), rtol=1e-12, atol=0)
    np.testing.assert_allclose(s, -f * log_expit(-x) - g * log_expit(x), rtol=1e-12, atol=0)


@pytest.mark.parametrize("x", [-30.0, -2.0, -1e-12, 0.0, 0.3, 5.0, 40.0])
def test_derivatives_match_mpmath_first_and_second_order(x):
    """d/dx and d²/dx² of every member (through the custom JVP, twice) against mpmath.diff; at
    x = 0 the |x| inside the primal must not leak into the derivative."""
    refs = [lambda t, i=i: _ref(t)[i] for i in range(3)]
    one = jax.grad(lambda t, i: occupations(t, 0.0, 1.0)[i])
    two = jax.grad(jax.grad(lambda t, i: occupations(t, 0.0, 1.0)[i]))
    for i in range(3):
        d1 = float(mp.diff(refs[i], x))
        d2 = float(mp.diff(refs[i], x, 2))
        g1 = float(one(jnp.float64(x), i))
        g2 = float(two(jnp.float64(x), i))
        assert abs(g1 - d1) <= 1e-13 * max(abs(d1), 1e-300) + 1e-300, (i, x, g1, d1)
        # second derivatives are O(0.1) near x = 0, where f'' itself vanishes: an absolute floor
        assert abs(g2 - d2) <= 1e-12 * abs(d2) + 1e-16, (i, x, g2, d2)


def test_derivatives_in_mu_and_temperature_match_finite_differences():
    e = jnp.linspace(-0.02, 0.03, 9)

    def total(mu, kt):
        f0, F, s = occupations(e, mu, kt)
        return jnp.sum(f0 * 1.3 + F * 1e-3 - 0.7 * s)

    mu, kt = 0.004, 0.0021
    gm, gk = jax.grad(total, argnums=(0, 1))(mu, kt)
    h = 1e-7
    fm = (total(mu + h, kt) - total(mu - h, kt)) / (2 * h)
    fk = (total(mu, kt + h) - total(mu, kt - h)) / (2 * h)
    assert abs(float(gm) - float(fm)) <= 1e-6 * abs(float(fm))
    assert abs(float(gk) - float(fk)) <= 1e-6 * abs(float(fk))
