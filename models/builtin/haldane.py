"""Haldane model on the honeycomb lattice (Haldane, PRL 61, 2015, 1988).

Convention of docs/theory.md §4 (a_cc = ``bond_length``): NN vectors a1 = (0,1)a_cc,
a2 = (−√3/2, −1/2)a_cc, a3 = (√3/2, −1/2)a_cc; NNN vectors b1 = a2−a3, b2 = a3−a1, b3 = a1−a2.

    H(k) = 2 t2 cos φ Σ_i cos(k·b_i) + t1 Σ_i [cos(k·a_i) σ_x + sin(k·a_i) σ_y]
           + [M − 2 t2 sin φ Σ_i sin(k·b_i)] σ_z

This is the Bloch Hamiltonian with orbital positions in the phases (A at 0, B at −a1).
Topological for |M| < 3√3|t2 sin φ| with lower-band Chern number C = +sgn(sin φ).
"""
from __future__ import annotations

import jax.numpy as jnp
import numpy as np

from ..band_model import BandModel
from ..domain import Lattice
from ..params import ParamSpec, pop_lattice_length, real
from ..phases import sincos
from ..registry import register
from ..twoband import bind_length, hamiltonian_of, jet_of

SPEC = ParamSpec((
    real("t1", "eV", 1.0, "nearest-neighbour hopping", -20.0, 20.0),
    real("t2", "eV", 0.1, "next-nearest-neighbour hopping magnitude", -5.0, 5.0),
    real("phi", "rad", np.pi / 2, "phase of the next-nearest-neighbour hopping", -2 * np.pi, 2 * np.pi),
    real("mass", "eV", 0.0, "sublattice potential M (+M on A, −M on B)", -20.0, 20.0),
), owner="haldane")

S3 = np.sqrt(3.0)
_A = np.array([[0.0, 1.0], [-S3 / 2, -0.5], [S3 / 2, -0.5]])
_B = np.array([_A[1] - _A[2], _A[2] - _A[0], _A[0] - _A[1]])


def dvector(k, p, acc=1.42):
    a = jnp.asarray(_A) * acc
    b = jnp.asarray(_B) * acc
    sa, ca = sincos(a @ k)
    sb, cb = sincos(b @ k)
    d0 = 2 * p["t2"] * jnp.cos(p["phi"]) * jnp.sum(cb)
    dz = p["mass"] - 2 * p["t2"] * jnp.sin(p["phi"]) * jnp.sum(sb)
    d = jnp.stack([p["t1"] * jnp.sum(ca), p["t1"] * jnp.sum(sa), dz])
    return d0[None], d[None]


def dvector_jet(k, p, acc=1.42):
    """The d-vector above and its first and second k-derivatives as explicit Bloch sums
    (∂_a cos(k·r) = −r_a sin(k·r), ∂_a∂_b cos(k·r) = −r_a r_b cos(k·r), likewise for sin); shapes
    as ``BandModel.dvector_jet``."""
    a = jnp.asarray(_A) * acc
    b = jnp.asarray(_B) * acc
    sa, ca = sincos(a @ k)
    sb, cb = sincos(b @ k)
    c0 = 2 * p["t2"] * jnp.cos(p["phi"])
    cz = 2 * p["t2"] * jnp.sin(p["phi"])
    aa = a[:, :, None] * a[:, None, :]
    bb = b[:, :, None] * b[:, None, :]
    # (d0, dx, dy, dz) and derivatives; H = d0 + d·σ
    d = (c0 * jnp.sum(cb), p["t1"] * jnp.sum(ca), p["t1"] * jnp.sum(sa), p["mass"] - cz * jnp.sum(sb))
    g = (-c0 * (sb @ b), -p["t1"] * (sa @ a), p["t1"] * (ca @ a), -cz * (cb @ b))
    hh = (-c0 * jnp.einsum("i,iab->ab", cb, bb), -p["t1"] * jnp.einsum("i,iab->ab", ca, aa),
          -p["t1"] * jnp.einsum("i,iab->ab", sa, aa), cz * jnp.einsum("i,iab->ab", sb, bb))

    def split(d0, dx, dy, dz):
        return d0[None], jnp.stack([dx, dy, dz])[None]

    return split(*d), split(*g), split(*hh)


SPEC_FULL = ParamSpec(SPEC.parameters + (
    real("bond_length", "Å", 1.42, "carbon–carbon distance a_cc (sets the k scale)", 0.1, 100.0),
), owner="haldane")


@register("haldane", SPEC_FULL,
          summary="Haldane Chern insulator on the honeycomb lattice (2D lattice, spinless)",
          hamiltonian="2t2 cosφ Σcos(k·b_i) + t1 Σ[cos(k·a_i)σx + sin(k·a_i)σy] + [M − 2t2 sinφ Σ sin(k·b_i)]σz",
          source="Haldane, PRL 61, 2015 (1988)")
def build_haldane(p, s) -> BandModel:
    acc = pop_lattice_length(p, "bond_length", "haldane")
    dv = bind_length(dvector, acc)
    h = hamiltonian_of(dv)
    djet = bind_length(dvector_jet, acc)
    a = _A * acc
    lattice = Lattice(vectors=(tuple(a[1] - a[2]), tuple(a[2] - a[0])),
                      positions=((0.0, 0.0), tuple(-a[0])))
    return BandModel(name="haldane", dim=2, hamiltonian=h, params=p, spec=SPEC_FULL, domain=lattice,
                     degeneracy=1.0, blocks=1, block_size=2, dvector=dv, jet=jet_of(djet),
                     dvector_jet=djet,
                     static=(("bond_length", acc),), description="Haldane model",
                     source="Haldane 1988")
