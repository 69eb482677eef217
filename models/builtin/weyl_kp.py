"""Weyl k·p models (3D continuum): linearised tilted, anisotropic Weyl nodes, and a regularised
continuum Weyl pair.  Conventions and derivations: docs/theory.md §16.

``weyl-kp`` — each node a valley (one two-band block) in its own relative momentum q = k − K_s,
all blocks integrated around q = 0::

    H_s(q) = E_s + ħ t_s·q + χ_s ħ (v_x q_x σ_x + v_y q_y σ_y + v_z q_z σ_z),   |q| < Λ

Node s = + has chirality χ_+ = ``chirality`` (χ = sign det ∂d_a/∂q_b, the handedness of
H = χħv q·σ), tilt t_+ = (``tilt_x``, ``tilt_y``, ``tilt_z``) and energy E_+ = E_0 + δ/2; its
partner (``nodes=2``) has χ_− = −χ_+ (Nielsen–Ninomiya), E_− = E_0 − δ/2 and tilt t_− = t_+
(``partner_tilt="same"``, inversion broken, as in the lattice ``weyl`` model) or −t_+
(``"opposite"``, the inversion image).  The node is type I when |t·n̂| < |V n̂| in every direction
n̂ (isotropic: |t| < v), type II otherwise.  ``cutoff`` Λ bounds every valley (|q| < Λ): a type-II
node has open electron and hole pockets, so all its Fermi-surface results depend on Λ, and every
Fermi-sea result (density of the filled band, σ^A) is that of the bounded model.  The
topological Hall conductivity of a separated pair, (e²/h)(2k0/2π), comes from the filled bands
between the nodes, far from them: a linearised model does not contain it (use ``weyl-pair-kp``).
``nodes=1`` keeps the node at K_+ alone (not a crystal by Nielsen–Ninomiya, useful for checks of
one node: its Fermi-surface Berry flux and the trace of the dipole, docs/theory.md §16.2).

``weyl-pair-kp`` — one two-band block over all k with two nodes at (±k0, 0, 0)::

    H(k) = E_0 + ħ t·k + [ħv_x (k_x² − k0²)/(2k0) + b (k_y² + k_z²)] σ_x + ħv_y k_y σ_y + χ ħv_z k_z σ_z

the continuum limit of the cubic-lattice ``weyl`` model (its d_x expanded to second order).  Near
(±k0, 0, 0) it is a Weyl node with velocities (v_x, v_y, v_z), chirality ±χ and energy
E_0 ± ħ t_x k0 (the tilt is the same at both nodes).  b > 0 (``curvature``) regularises it: every
plane of fixed k_x is a two-band insulator (a Wilson-mass Dirac model) whose filled band has
Chern number |C| = 1 for |k_x| < k0 and 0 outside, so with the Fermi level at the nodes
σ^A = (e²/h)(2k0/2π) in magnitude (Burkov & Balents, PRL 107, 127205, 2011) exactly from the Fermi
sea, without a cutoff; the b k_⊥² term also closes every Fermi surface at large k (a type-II tilt
gives large closed pockets whose size depends on b and k0).  Derivation and sign: docs/theory.md §16.1.
"""
from __future__ import annotations

from functools import cache

import jax.numpy as jnp

from ..band_model import BandModel
from ..domain import Continuum
from ..params import ParamSpec, choice, pop_lattice_length, real
from ..registry import register
from ..twoband import bind_length, hamiltonian_of
from ..units import ANGSTROM, HBAR_EVS

#: static option read by the 3D continuum integrator: momentum cutoff Λ (1/Å) around each centre
CUTOFF_KEY = "kp_cutoff"

_HV = HBAR_EVS / ANGSTROM          # ħ·(1 m/s) in eV Å


def _velocity(axis, default):
    return real(f"velocity_{axis}", "m/s", default, f"node velocity v_{axis}", 1.0, 1e8)


def _tilt(axis, owner):
    return real(f"tilt_{axis}", "m/s", 0.0, f"tilt velocity t_{axis} ({owner})", -1e8, 1e8)


SPEC_KP = ParamSpec((
    _velocity("x", 3e5), _velocity("y", 3e5), _velocity("z", 3e5),
    _tilt("x", "node +"), _tilt("y", "node +"), _tilt("z", "node +"),
    real("node_energy", "eV", 0.0, "mean node energy E_0", -10.0, 10.0),
    real("energy_split", "eV", 0.0, "node energies E_± = E_0 ± δ/2 (δ = energy_split)", -10.0, 10.0),
    real("cutoff", "1/Å", 0.5, "momentum cutoff Λ around each node (|q| < Λ; results of a type-II "
         "node depend on it; sets the mesh, not traceable)", 1e-4, 100.0),
    choice("chirality", 1, (1, -1), "chirality χ of the node at K_+ (its partner has −χ)"),
    choice("nodes", 2, (2, 1), "2: the pair; 1: the node at K_+ alone (checks)"),
    choice("partner_tilt", "same", ("same", "opposite"),
           "tilt of the partner node: t_− = t_+ (inversion broken) or −t_+ (inversion image)"),
    choice("degeneracy", 1, (1, 2), "extra degeneracy factor"),
), owner="weyl-kp")


def _node(q, p, chi, tilt_sign, energy_sign):
    hv = jnp.stack([p["velocity_x"], p["velocity_y"], p["velocity_z"]]) * _HV
    ht = jnp.stack([p["tilt_x"], p["tilt_y"], p["tilt_z"]]) * _HV * tilt_sign
    d0 = p["node_energy"] + 0.5 * energy_sign * p["energy_split"] + ht @ q
    return d0, chi * hv * q


def _kp_factory(chi, nodes, partner):
    sign = 1.0 if partner == "same" else -1.0

    def dvector(k, p):
        parts = [_node(k, p, float(chi), 1.0, 1.0)]
        if nodes == 2:
            parts.append(_node(k, p, -float(chi), sign, -1.0))
        return jnp.stack([a for a, _ in parts]), jnp.stack([b for _, b in parts])

    dvector.__name__ = f"weyl_kp_{'p' if chi > 0 else 'm'}{nodes}_{partner}"
    return dvector


# module-level functions for every static choice (stable identity: JAX's caches hit)
_KP = {(c, n, t): _kp_factory(c, n, t) for c in (1, -1) for n in (1, 2) for t in ("same", "opposite")}


SPEC_PAIR = ParamSpec((
    real("node_k0", "1/Å", 0.1, "nodes at k_x = ±k0 (sets the integration centres, not traceable)",
         1e-4, 10.0),
    _velocity("x", 3e5), _velocity("y", 3e5), _velocity("z", 3e5),
    real("curvature", "eV Å²", 10.0, "b in b(k_y² + k_z²)σ_x; b > 0 puts the Chern planes between the "
         "nodes and closes the Fermi surfaces", 1e-3, 1e3),
    _tilt("x", "both nodes"), _tilt("y", "both nodes"), _tilt("z", "both nodes"),
    real("node_energy", "eV", 0.0, "E_0; the nodes lie at E_0 ± ħt_x k0", -10.0, 10.0),
    choice("chirality", 1, (1, -1), "chirality χ of the node at (+k0, 0, 0) (the other has −χ)"),
    choice("degeneracy", 1, (1, 2), "extra degeneracy factor"),
), owner="weyl-pair-kp")


def _pair_factory(chi):
    def dvector(k, p, k0):
        vx, vy, vz = (p[f"velocity_{a}"] * _HV for a in "xyz")
        dx = vx * (k[0] ** 2 - k0 ** 2) / (2.0 * k0) + p["curvature"] * (k[1] ** 2 + k[2] ** 2)
        ht = jnp.stack([p["tilt_x"], p["tilt_y"], p["tilt_z"]]) * _HV
        d0 = p["node_energy"] + ht @ k
        return d0[None], jnp.stack([dx, vy * k[1], chi * vz * k[2]])[None]

    dvector.__name__ = f"weyl_pair_kp_{'p' if chi > 0 else 'm'}"
    return dvector


_PAIR = {c: _pair_factory(float(c)) for c in (1, -1)}


@cache
def _pair_scale(k0: float):
    """Mesh-placement wavevector (1/Å) of a pair at ±k0: the geometric mean of k0 and ħv_⊥/b, where
    the b k_⊥² term takes over (one function per k0: stable identity, JAX's caches hit)."""

    def scale(p):
        hv = jnp.minimum(p["velocity_y"], p["velocity_z"]) * _HV
        return jnp.sqrt(k0 * hv / p["curvature"])

    return scale


@register("weyl-kp", SPEC_KP,
          summary="linearised tilted, anisotropic Weyl node pair (or one node), type I or II, "
                  "momentum cutoff Λ (continuum, 3D)",
          hamiltonian="H_s = E_s + ħt_s·q + χ_s ħ(v_x q_xσ_x + v_y q_yσ_y + v_z q_zσ_z), |q| < Λ; "
                      "χ_− = −χ_+, E_± = E_0 ± δ/2, t_− = ±t_+",
          source="Weyl k·p node: Armitage, Mele, Vishwanath, RMP 90, 015001 (2018); type II: "
                 "Soluyanov et al., Nature 527, 495 (2015)")
def build_weyl_kp(p, s) -> BandModel:
    cut = pop_lattice_length(p, "cutoff", "weyl-kp")
    dv = _KP[(s["chirality"], s["nodes"], s["partner_tilt"])]
    return BandModel(name="weyl-kp", dim=3, hamiltonian=hamiltonian_of(dv), params=p, spec=SPEC_KP,
                     domain=Continuum(dim=3, centers=((0.0, 0.0, 0.0),), scale=cut / 8.0),
                     degeneracy=float(s["degeneracy"]), blocks=s["nodes"], block_size=2, dvector=dv,
                     static=tuple(sorted(s.items())) + ((CUTOFF_KEY, cut),),
                     description="linearised Weyl nodes", source=SPEC_KP.owner)

@register("weyl-pair-kp", SPEC_PAIR,
          summary="regularised continuum Weyl pair at (±k0, 0, 0), tilted and anisotropic, type I or II "
                  "(continuum, 3D)",
          hamiltonian="E_0 + ħt·k + [ħv_x(k_x² − k0²)/(2k0) + b(k_y² + k_z²)]σ_x + ħv_y k_yσ_y "
                      "+ χħv_z k_zσ_z",
          source="continuum limit of the two-band cubic model (common practice); AHE of a Weyl pair: "
                 "Burkov & Balents, PRL 107, 127205 (2011)")
def build_weyl_pair_kp(p, s) -> BandModel:
    k0 = pop_lattice_length(p, "node_k0", "weyl-pair-kp")
    dv = bind_length(_PAIR[s["chirality"]], k0)
    return BandModel(name="weyl-pair-kp", dim=3, hamiltonian=hamiltonian_of(dv), params=p,
                     spec=SPEC_PAIR,
                     domain=Continuum(dim=3, centers=((k0, 0.0, 0.0), (-k0, 0.0, 0.0)),
                                      scale=_pair_scale(k0)),
                     degeneracy=float(s["degeneracy"]), blocks=1, block_size=2, dvector=dv,
                     static=tuple(sorted(s.items())) + (("node_k0", k0),),
                     description="regularised Weyl pair", source=SPEC_PAIR.owner)
