"""Helpers for two-band blocks H = d0·1 + d·σ, and for binding static lattice lengths."""
from __future__ import annotations

from functools import cache

import jax
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


def blocks_of(d0, d):
    """Blocks H = d0·1 + d·σ of shape (S, 2, 2, *t) from d0 (S, *t) and d (S, 3, *t) (any trailing
    derivative axes t: the map is linear, so it holds for every k-derivative too)."""
    cx = jax.lax.complex
    zero = jnp.zeros_like(d0)
    dx, dy, dz = d[:, 0], d[:, 1], d[:, 2]
    return jnp.stack([jnp.stack([cx(d0 + dz, zero), cx(dx, -dy)], axis=1),
                      jnp.stack([cx(dx, dy), cx(d0 - dz, zero)], axis=1)], axis=1)


@cache
def jet_of(dvector_jet):
    """The blocks' jet ``(H, ∂H, ∂²H)`` from a d-vector jet ``((d0, d), (∂d0, ∂d), (∂²d0, ∂²d))``
    (one object per function, for JAX's compilation cache)."""

    def jet(k, params):
        return tuple(blocks_of(a, b) for a, b in dvector_jet(k, params))

    jet.__name__ = f"jet_of_{getattr(dvector_jet, '__name__', 'dvector_jet')}"
    return jet


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
