"""Homogeneous strain through bond geometry (Pereira, Castro Neto, Peres, PRB 80, 045401, 2009).

The strain tensor ε (symmetric, dimensionless, tensor components; ε_xy is half the engineering
shear) deforms every vector of the crystal: bond vectors δ' = (1+ε)δ, lattice vectors
a' = (1+ε)a, orbital positions τ' = (1+ε)τ, and hence the reciprocal lattice b' = (1+ε)^{-T} b.
Hoppings follow their bond length, t(δ') = t exp[−β(|δ'|/|δ| − 1)] (β = −d ln t / d ln |δ|,
≈ 3.37 for graphene).  Everything is written with ``jax.numpy`` so it stays differentiable in
the strain components.
"""
from __future__ import annotations

import jax.numpy as jnp


def strain_tensor(xx, yy, xy, dim: int = 2):
    """ε from its components (2D, or 3D with only the in-plane block set)."""
    e2 = jnp.stack([jnp.stack([xx, xy]), jnp.stack([xy, yy])])
    if dim == 2:
        return e2
    return jnp.zeros((3, 3)).at[:2, :2].set(e2)


def uniaxial(magnitude, angle, poisson=0.165):
    """Components (xx, yy, xy) of uniaxial strain ``magnitude`` along ``angle`` (rad from x),
    with transverse contraction −ν·magnitude:
    ε = magnitude·[[cos²θ − ν sin²θ, (1+ν) sinθ cosθ], [(1+ν) sinθ cosθ, sin²θ − ν cos²θ]]."""
    c, s = jnp.cos(angle), jnp.sin(angle)
    return (magnitude * (c * c - poisson * s * s),
            magnitude * (s * s - poisson * c * c),
            magnitude * (1 + poisson) * s * c)


def deformation(eps):
    """The matrix (1 + ε) that maps undeformed vectors to deformed ones."""
    return jnp.eye(eps.shape[0]) + eps


def deform(vectors, eps):
    """Deformed rows (1+ε)v for an array of row vectors."""
    return vectors @ deformation(eps).T


def scaled_hopping(t, bond, eps, beta):
    """t exp[−β(|(1+ε)δ|/|δ| − 1)] for bond vector(s) ``bond`` (rows), exponential decay law."""
    b = jnp.asarray(bond)
    new = deform(b, eps)
    ratio = jnp.linalg.norm(new, axis=-1) / jnp.linalg.norm(b, axis=-1)
    return t * jnp.exp(-beta * (ratio - 1.0))
