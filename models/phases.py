"""Sine and cosine of Bloch phases k·δ together, in one fused elementwise pass.

Lattice Hamiltonians spend most of their evaluation time on e^{ik·δ}: XLA's CPU ``sin`` and
``cos`` each do their own argument reduction and cost about 11 ns per float64 element on the
project's 2-core machine, while the pair below costs about 5 ns for both (measured on 10⁷
arguments, docs/performance.md).  Method (common practice, as in the classic C math libraries):

* argument reduction x = q·π/2 + r with q = round(2x/π) and π/2 split into three parts of 33
  significant bits (Cody & Waite, "Software Manual for the Elementary Functions", 1980), so that
  each product q·(π/2)_i is exact for |q| < 2²⁰ (|x| ≲ 1.6e6) and |r| ≤ π/4;
* sin r and cos r from their Taylor series through r¹⁷ and r¹⁶ (truncation ≤ (π/4)¹⁸/18! ≈
  2e-18);
* the quadrant q mod 4 picks (±sin r, ±cos r).

The error is a few units in the last place for |x| up to about 1e6 (tested against numpy and
mpmath in tests/test_phases.py); beyond, the reduction loses what the argument's own rounding
already lost.  Derivatives are exact rules (d sin = cos dx, d cos = −sin dx) through
``jax.custom_jvp``, so nested forward derivatives (∂H, ∂²H) and reverse mode see the same pair.
"""
from __future__ import annotations

import math

import jax
import jax.numpy as jnp

# π/2 in three parts of 33 significant bits each (fdlibm's pio2_1, pio2_2, pio2_3)
_PIO2_1 = 1.57079632673412561417e+00
_PIO2_2 = 6.07710050630396597660e-11
_PIO2_3 = 2.02226624871116645580e-21
_TWO_OVER_PI = 2.0 / math.pi
_SIN = tuple((-1) ** i / math.factorial(2 * i + 1) for i in range(9))     # r, r³, ..., r¹⁷
_COS = tuple((-1) ** i / math.factorial(2 * i) for i in range(9))         # 1, r², ..., r¹⁶


def _horner(coeffs, z):
    acc = jnp.full_like(z, coeffs[-1])
    for c in coeffs[-2::-1]:
        acc = acc * z + c
    return acc


@jax.custom_jvp
def sincos(x):
    """(sin x, cos x) of a real array, elementwise (float64; see the module docstring)."""
    x = jnp.asarray(x, dtype=jnp.float64)
    q = jnp.round(x * _TWO_OVER_PI)
    r = ((x - q * _PIO2_1) - q * _PIO2_2) - q * _PIO2_3
    z = r * r
    s = _horner(_SIN, z) * r
    c = _horner(_COS, z)
    quad = jnp.where(jnp.isfinite(q), q, 0.0).astype(jnp.int64) & 3
    odd = (quad & 1) == 1
    sin = jnp.where(odd, c, s)
    cos = jnp.where(odd, s, c)
    sin = jnp.where(quad >= 2, -sin, sin)
    cos = jnp.where((quad == 1) | (quad == 2), -cos, cos)
    return sin, cos


@sincos.defjvp
def _sincos_jvp(primals, tangents):
    (x,), (dx,) = primals, tangents
    s, c = sincos(x)
    return (s, c), (c * dx, -s * dx)


def bloch_phase(x):
    """e^{ix} (complex128) of a real array x, from :func:`sincos`."""
    s, c = sincos(x)
    return jax.lax.complex(c, s)
