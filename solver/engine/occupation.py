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


def entropy_density(energy, mu, kt):
    """s = −f ln f − (1−f) ln(1−f) (dimensionless), stable for all x."""
    ax = jnp.abs((energy - mu) / kt)
    return jnp.log1p(jnp.exp(-ax)) + ax * fermi(ax, 0.0, 1.0)
