"""Fermi–Dirac occupation in numerically stable forms, and the chemical potential from a density.

With x = (ε − μ)/k_BT:

* f0 = 1/(e^x + 1)
* −∂f0/∂ε = f0(1 − f0)/k_BT = sech²(x/2)/(4k_BT)   (normalised to 1, 1/eV)
* s(x) = −f ln f − (1−f) ln(1−f) = ln(1 + e^{−|x|}) + |x| f(|x|)   (entropy per state, k_B = 1)

all three from the single exponential e^{−|x|} (no overflow, relative precision in both tails;
derivatives from the closed forms by a custom JVP).

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
def _three(x):
    """(f0, f0(1 − f0), s) at x from the one exponential e = e^{−|x|} ∈ (0, 1] (no overflow for any
    x, relative precision in both tails): f0 = e/(1+e) for x > 0 and 1/(1+e) otherwise,
    f0(1 − f0) = e/(1+e)², s = ln(1+e) + |x|·e/(1+e)."""
    a = jnp.abs(x)
    e = jnp.exp(-a)
    q = 1.0 / (1.0 + e)
    fa = e * q                            # f(|x|)
    return jnp.where(x > 0, fa, q), fa * q, jnp.log1p(e) + a * fa


@_three.defjvp
def _three_jvp(primals, tangents):
    (x,), (t,) = primals, tangents
    f, g, s = _three(x)
    # f' = −f(1 − f) = −g,  g' = −g(1 − 2f) = −g tanh(x/2) (accurate near x = 0, where 1 − 2f
    # cancels),  s' = x f' = −x g: closed forms, so the |x| inside never differentiates
    return (f, g, s), (-g * t, -g * jnp.tanh(0.5 * x) * t, -x * g * t)


def occupations(energy, mu, kt):
    """(f0, −∂f0/∂ε in 1/eV, s) together from one exponential: the energy-resolved sums evaluate
    all three on every knot of every condition (separately they cost about five transcendental
    evaluations)."""
    f, g, s = _three((energy - mu) / kt)
    return f, g / kt, s


def fermi(energy, mu, kt):
    """f0 = 1/(e^x + 1) with relative precision in both tails (½(1 − tanh(x/2)) loses all digits
    of e^{−x} beyond x ≈ 37), also for ∂f0/∂x."""
    return _three((energy - mu) / kt)[0]


def minus_dfermi(energy, mu, kt):
    """−∂f0/∂ε = f0(1 − f0)/k_BT in 1/eV."""
    return _three((energy - mu) / kt)[1] / kt


def entropy_density(energy, mu, kt):
    """s = −f ln f − (1−f) ln(1−f) (dimensionless), stable for all x."""
    return _three((energy - mu) / kt)[2]
