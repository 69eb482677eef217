"""Helpers for two-band blocks H = d0·1 + d·σ, and for binding static lattice lengths."""
from __future__ import annotations

from functools import cache

import jax.numpy as jnp

PAULI = jnp.array([[[0, 1], [1, 0]], [[0, -1j], [1j, 0]], [[1, 0], [0, -1]]], dtype=jnp.complex128)
EYE2 = jnp.eye(2, dtype=jnp.complex128)


def from_dvector(d0, d):
    """Blocks (S, 2, 2) from d0 (S,) and d (S, 3)."""
    return (d0.astype(jnp.complex128)[:, None, None] * EYE2[None]
            + jnp.einsum("sc,cij->sij", d.astype(jnp.complex128), PAULI))


def dvector_jet(h, dh, d2h):
    """The d-vector of two-band blocks and its first and second k-derivatives from the blocks'
    jet (H (S, 2, 2), ∂H (S, 2, 2, d), ∂²H (S, 2, 2, d, d)), by the linear map of H = d0 + d·σ:
    d0 = Re(H₀₀ + H₁₁)/2, d_x = Re H₀₁, d_y = −Im H₀₁, d_z = Re(H₀₀ − H₁₁)/2 (the same map holds
    for every derivative).  Returns ``((d0, d), (∂d0, ∂d), (∂²d0, ∂²d))`` with shapes (S,), (S, 3);
    (S, d), (S, 3, d); (S, d, d), (S, 3, d, d)."""

    def split(x):
        d0 = 0.5 * jnp.real(x[:, 0, 0] + x[:, 1, 1])
        d = jnp.stack([jnp.real(x[:, 0, 1]), -jnp.imag(x[:, 0, 1]), 0.5 * jnp.real(x[:, 0, 0] - x[:, 1, 1])],
                      axis=1)
        return d0, d

    return split(h), split(dh), split(d2h)


@cache
def bind_length(fn, length: float):
    """``fn(k, p, length)`` as a function of (k, p), one object per (fn, length), so that models
    built twice with the same lattice share JAX's compilation cache."""

    def bound(k, p):
        return fn(k, p, length)

    bound.__name__ = f"{fn.__name__}_{length:g}"
    return bound


@cache
def hamiltonian_of(dvector):
    """A Hamiltonian function built from a d-vector function (kept as a module-level object by
    the caller so that its identity, and hence JAX's compilation cache, is stable)."""

    def h(k, params):
        d0, d = dvector(k, params)
        return from_dvector(d0, d)

    h.__name__ = f"H_from_{getattr(dvector, '__name__', 'dvector')}"
    return h
