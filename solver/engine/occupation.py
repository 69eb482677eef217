"""Fermi–Dirac occupation in numerically stable forms, and the chemical potential from a density.

With x = (ε − μ)/k_BT:

* f0 = 1/(e^x + 1), evaluated as the logistic function of −x (no overflow, relative precision
  in both tails)
* −∂f0/∂ε = sech²(x/2)/(4k_BT)                    (normalised to 1, 1/eV)
* s(x) = −f ln f − (1−f) ln(1−f) = ln(1 + e^{−|x|}) + |x| f(|x|)   (entropy per state, k_B = 1)

T → 0: temperatures below ``T_FLOOR`` (1 mK) are evaluated at ``T_FLOOR``.  The k-space meshes
of :mod:`crosswind.solver.engine.mesh` scale their Fermi windows with k_BT, so the quadrature error does
not grow as T falls, and at 1 mK the Sommerfeld corrections (k_BT/E_F)² are ~1e-14 for E_F of
order 10 meV: the result is the T = 0 limit to all printed digits.  The floor is applied with
``jnp.maximum`` before any division, so gradients stay finite (zero below the floor).
"""
from __future__ import annotations

import jax
import jax.numpy as jnp

from crosswind.models.units import KB_EVK

T_FLOOR = 1e-3  # K


def thermal_energy(temperature):
    """k_B·max(T, T_FLOOR) in eV."""
    return KB_EVK * jnp.maximum(jnp.asarray(temperature, dtype=jnp.float64), T_FLOOR)


@jax.custom_jvp
def _occupation(x):
    return jax.nn.sigmoid(-x)


@_occupation.defjvp
def _occupation_jvp(primals, tangents):
    (x,), (t,) = primals, tangents
    # df/dx = −f(x)(1 − f(x)) = −σ(x)σ(−x): both factors from their own accurate tails
    return jax.nn.sigmoid(-x), -t * jax.nn.sigmoid(x) * jax.nn.sigmoid(-x)


def fermi(energy, mu, kt):
    """f0 = 1/(e^x + 1) as the logistic function of −x: relative precision in both tails
    (½(1 − tanh(x/2)) loses all digits of e^{−x} beyond x ≈ 37), also for ∂f0/∂x."""
    return _occupation((energy - mu) / kt)


def minus_dfermi(energy, mu, kt):
    """−∂f0/∂ε in 1/eV."""
    c = jnp.cosh(jnp.clip(0.5 * (energy - mu) / kt, -300.0, 300.0))
    return 1.0 / (4.0 * kt * c * c)


@jax.custom_jvp
def _three(x):
    a = jnp.abs(x)
    e = jnp.exp(-a)                       # in (0, 1]: no overflow for any x
    q = 1.0 / (1.0 + e)
    fa = e * q                            # f(|x|), relative precision in the tail
    return jnp.where(x > 0, fa, q), fa * q, jnp.log1p(e) + a * fa


@_three.defjvp
def _three_jvp(primals, tangents):
    (x,), (t,) = primals, tangents
    f, g, s = _three(x)
    # f' = −f(1 − f) = −g,  g' = −g(1 − 2f) = −g tanh(x/2) (accurate near x = 0, where 1 − 2f
    # cancels),  s' = x f' = −x g;  no |x| kink at x = 0
    return (f, g, s), (-g * t, -g * jnp.tanh(0.5 * x) * t, -x * g * t)


def occupations(energy, mu, kt):
    """(f0, −∂f0/∂ε, s) together from one exponential e^{−|x|} (the three functions above cost
    about five transcendental evaluations; the energy-resolved sums evaluate them on every knot of
    every condition): f0 = e/(1+e) for x > 0 and 1/(1+e) otherwise, −∂f0/∂ε = e/(1+e)²/k_BT,
    s = ln(1+e) + |x|·e/(1+e).  Same values to rounding; derivatives from the closed forms
    f0' = −f0(1−f0), s' = x f0' (a custom JVP, so the |x| inside never differentiates)."""
    f, g, s = _three((energy - mu) / kt)
    return f, g / kt, s


def entropy_density(energy, mu, kt):
    """s = −f ln f − (1−f) ln(1−f) (dimensionless), stable for all x."""
    ax = jnp.abs((energy - mu) / kt)
    return jnp.log1p(jnp.exp(-ax)) + ax * fermi(ax, 0.0, 1.0)
