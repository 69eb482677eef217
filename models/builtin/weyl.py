"""Magnetic Weyl semimetal: two-band cubic-lattice model with one pair of (optionally tilted)
Weyl nodes, time reversal broken.

Simple cubic lattice of constant a (``lattice_constant``), two orbitals on the same site::

    H(k) = d0(k) + d(k)·σ
    d_x = t (cos k0a − cos k_xa) + m (2 − cos k_ya − cos k_za)
    d_y = t sin k_ya,   d_z = t sin k_za,   d0 = w sin k_xa

t = ``hopping``, m = ``mass``, w = ``tilt`` (eV), k0 = ``node_position``·π/a.  The gap closes
only at the two nodes (±k0, 0, 0) provided 2m > t(1 − cos k0a) (no further nodes at the zone
boundary; true for the defaults).  The tilt is along the node separation x (d0 is odd in k_x, so
both nodes are tilted the same way in the lab frame: at (±k0, 0, 0) the tilt velocity is
w a cos(k0 a)/ħ).

Each plane of fixed k_x is a two-dimensional two-band insulator whose mass at (k_y, k_z) = 0 is
t(cos k0a − cos k_xa): negative for |k_x| < k0, where the plane is a Chern insulator with
|C| = 1, positive (C = 0) outside.  With the Fermi level at the nodes (w = 0) the filled lower band
therefore gives the anomalous Hall conductivity of a magnetic Weyl pair, |σ_yz| = (e²/h)·2k0/(2π)
(Burkov & Balents, PRL 107, 127205, 2011; Yang, Lu, Ran, PRB 84, 075129, 2011), with the Berry
curvature component Ω_x along the node separation.  (The sign in d_x is chosen so that the Chern
planes lie between the nodes; writing t(cos k_xa − cos k0a) instead would put them outside,
giving (e²/h)(2π/a − 2k0)/(2π).)  A generic lattice model of this type is common practice.
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
    real("hopping", "eV", 1.0, "hopping t (node dispersion along x and in the y–z plane)", -20.0, 20.0),
    real("mass", "eV", 1.0, "band-inversion mass m; keep 2m > t(1 − cos k0a) for one node pair",
         -20.0, 20.0),
    real("node_position", "π/a", 0.5, "nodes at k_x = ±node_position·π/a", 0.0, 1.0),
    real("tilt", "eV", 0.0, "tilt w in d0 = w sin(k_x a)", -20.0, 20.0),
    real("lattice_constant", "Å", 3.0, "cubic lattice constant a (sets the lattice, not traceable)",
         0.1, 100.0),
), owner="weyl")


def dvector(k, p, a=3.0):
    s, c = sincos(k * a)
    t, m = p["hopping"], p["mass"]
    k0a = p["node_position"] * np.pi
    dx = t * (jnp.cos(k0a) - c[0]) + m * (2.0 - c[1] - c[2])
    d = jnp.stack([dx, t * s[1], t * s[2]])
    d0 = p["tilt"] * s[0]
    return d0[None], d[None]


def dvector_jet(k, p, a=3.0):
    """The d-vector and its first and second k-derivatives written out (the cosines and sines of
    k_i a and their derivatives a·(−sin, cos), a²·(−cos, −sin)): d0 and d depend on one component
    of k each term, so every second derivative is diagonal in the axes."""
    ka = k * a
    t, m, w = p["hopping"], p["mass"], p["tilt"]
    k0a = p["node_position"] * np.pi
    s, c = sincos(ka)
    dx = t * (jnp.cos(k0a) - c[0]) + m * (2.0 - c[1] - c[2])
    d0, dy, dz = w * s[0], t * s[1], t * s[2]
    zero = jnp.zeros_like(dx)
    # first derivatives along (x, y, z)
    g0 = jnp.stack([w * a * c[0], zero, zero])
    gx = jnp.stack([t * a * s[0], m * a * s[1], m * a * s[2]])
    gy = jnp.stack([zero, t * a * c[1], zero])
    gz = jnp.stack([zero, zero, t * a * c[2]])
    # second derivatives (diagonal)
    h0 = jnp.diag(jnp.stack([-w * a * a * s[0], zero, zero]))
    hx = jnp.diag(jnp.stack([t * a * a * c[0], m * a * a * c[1], m * a * a * c[2]]))
    hy = jnp.diag(jnp.stack([zero, -t * a * a * s[1], zero]))
    hz = jnp.diag(jnp.stack([zero, zero, -t * a * a * s[2]]))

    def split(e0, ex, ey, ez):
        return e0[None], jnp.stack([ex, ey, ez])[None]

    return split(d0, dx, dy, dz), split(g0, gx, gy, gz), split(h0, hx, hy, hz)


@register("weyl", SPEC,
          summary="magnetic Weyl semimetal, one pair of tilted nodes at (±k0, 0, 0) (3D cubic lattice)",
          hamiltonian="w sin k_xa + [t(cos k0a − cos k_xa) + m(2 − cos k_ya − cos k_za)]σx "
                      "+ t sin k_ya σy + t sin k_za σz",
          source="common practice; AHE of a Weyl pair: Burkov & Balents, PRL 107, 127205 (2011); "
                 "Yang, Lu, Ran, PRB 84, 075129 (2011)")
def build_weyl(p, s) -> BandModel:
    a = pop_lattice_length(p, "lattice_constant", "weyl")
    dv = bind_length(dvector, a)
    h = hamiltonian_of(dv)
    djet = bind_length(dvector_jet, a)
    lattice = Lattice(vectors=((a, 0.0, 0.0), (0.0, a, 0.0), (0.0, 0.0, a)),
                      positions=((0.0, 0.0, 0.0), (0.0, 0.0, 0.0)))
    return BandModel(name="weyl", dim=3, hamiltonian=h, params=p, spec=SPEC, domain=lattice,
                     degeneracy=1.0, blocks=1, block_size=2, dvector=dv, jet=jet_of(djet),
                     dvector_jet=djet,
                     static=(("lattice_constant", a),), description="Weyl pair on a cubic lattice",
                     source="common practice")
