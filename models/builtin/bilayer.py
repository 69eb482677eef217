"""Bernal (AB-stacked) bilayer graphene, four-band continuum (k·p) model around K and K'.

McCann & Koshino, "The electronic properties of bilayer graphene", Rep. Prog. Phys. 76, 056503
(2013), eq. (30) with the Slonczewski–Weiss–McClure parameters (docs/theory.md §9.2).
Basis (A1, B1, A2, B2); the dimer sites B1 and A2 sit on top of each other and are coupled by
γ1.  With π = ξk_x + i k_y (k in 1/Å measured from the valley, ξ = +1 at K, −1 at K') and
ħv_i = √3 a γ_i / 2 (eV Å):

    H_ξ(k) = [[ ε_A1,      ħv0 π*,    −ħv4 π*,    ħv3 π   ],
              [ ħv0 π,     ε_B1,       γ1,       −ħv4 π*  ],
              [ −ħv4 π,    γ1,         ε_A2,      ħv0 π*  ],
              [ ħv3 π*,   −ħv4 π,      ħv0 π,     ε_B2    ]]

    ε_A1 = (−U + δ)/2,  ε_B1 = (−U + 2Δ' − δ)/2,  ε_A2 = (U + 2Δ' + δ)/2,  ε_B2 = (U − δ)/2

U = ``asymmetry`` (interlayer potential difference; layer 1 at −U/2, layer 2 at +U/2, a
perpendicular displacement field), Δ' = ``dimer_shift`` (energy of the dimer sites), δ =
``sublattice_asymmetry`` (intralayer A/B asymmetry δ_AB, e.g. an aligned substrate; default 0).
Each layer alone is the graphene cone ħv0(ξk_xσ_x + k_yσ_y) of the 'honeycomb' model near K
(docs/theory.md §3 sign conventions).  Parameter values: γ0 = 3.16, γ1 = 0.381,
γ3 = 0.38, γ4 = 0.14, Δ' = 0.022 eV (the infrared fit of Kuzmenko et al., PRB 80, 165406, 2009,
as tabulated in the review; the values are recalled, see
docs/theory.md §9.2).

``valleys=2`` (default) adds K' as a second block, H_K'(k) = H_K(−k)* (time reversal); the two
valleys do not mix.  ``degeneracy`` counts spin (default 2).  Minimal model (γ3 = γ4 = Δ' = 0):
ε = 0, 0, ±γ1 at k = 0 for U = 0; for U ≠ 0 the low bands form a "Mexican hat" with gap
|U|γ1/√(U² + γ1²) on its rim.

Strain is not part of this continuum model (it applies through bond geometry in the lattice
'honeycomb' model only); a strained bilayer needs a lattice version that is not provided here.
"""
from __future__ import annotations

import math

import jax.numpy as jnp

from ..band_model import BandModel
from ..domain import Continuum
from ..params import ParamSpec, choice, real
from ..registry import register
from ..units import ANGSTROM, HBAR_EVS

SPEC = ParamSpec((
    real("gamma0", "eV", 3.16, "intralayer nearest-neighbour hopping γ0 (velocity v0)", 0.0, 20.0),
    real("gamma1", "eV", 0.381, "interlayer dimer coupling γ1 (B1–A2)", 0.0, 5.0),
    real("gamma3", "eV", 0.38, "skew interlayer hopping γ3 (A1–B2, trigonal warping)", -5.0, 5.0),
    real("gamma4", "eV", 0.14, "skew interlayer hopping γ4 (A1–A2, B1–B2, electron–hole asymmetry)", -5.0, 5.0),
    real("dimer_shift", "eV", 0.022, "energy Δ' of the dimer sites B1, A2", -1.0, 1.0),
    real("asymmetry", "eV", 0.05, "interlayer asymmetry U (layer 1 at −U/2, layer 2 at +U/2)", -2.0, 2.0),
    real("sublattice_asymmetry", "eV", 0.0, "intralayer A/B asymmetry δ_AB (+δ/2 on A, −δ/2 on B)", -2.0, 2.0),
    real("lattice_constant", "Å", 2.46, "lattice constant a (sets ħv_i = √3aγ_i/2)", 0.1, 100.0),
    choice("valleys", 2, (1, 2), "1: valley K only; 2: K and its time-reversed partner K'"),
    choice("degeneracy", 2, (1, 2, 4), "extra degeneracy factor: 2 = spin"),
), owner="bilayer-graphene")


def gamma_velocity(gamma, lattice_constant=2.46):
    """v_i = √3 a γ_i/(2ħ) in m/s for a hopping γ_i (eV) and lattice constant a (Å)."""
    return math.sqrt(3.0) * lattice_constant * gamma / 2 * ANGSTROM / HBAR_EVS


def block(k, p, xi):
    """The 4×4 Hamiltonian of valley ``xi`` (±1) at k (1/Å measured from the valley), eV."""
    s = math.sqrt(3.0) * p["lattice_constant"] / 2
    v0, v3, v4 = ((s * p[g]).astype(jnp.complex128) for g in ("gamma0", "gamma3", "gamma4"))
    pi = (xi * k[0]).astype(jnp.complex128) + 1j * k[1].astype(jnp.complex128)
    pc = jnp.conj(pi)
    u, dp, dl, g1 = p["asymmetry"], p["dimer_shift"], p["sublattice_asymmetry"], p["gamma1"]
    diag = jnp.stack([(-u + dl) / 2, (-u + 2 * dp - dl) / 2, (u + 2 * dp + dl) / 2, (u - dl) / 2])
    z = jnp.zeros((), dtype=jnp.complex128)
    g1c = g1.astype(jnp.complex128)
    off = jnp.stack([
        jnp.stack([z, v0 * pc, -v4 * pc, v3 * pi]),
        jnp.stack([v0 * pi, z, g1c, -v4 * pc]),
        jnp.stack([-v4 * pi, g1c, z, v0 * pc]),
        jnp.stack([v3 * pc, -v4 * pi, v0 * pi, z]),
    ])
    return off + jnp.diag(diag.astype(jnp.complex128))


def hamiltonian_one(k, p):
    """Valley K only: blocks of shape (1, 4, 4)."""
    return block(k, p, 1)[None]


def hamiltonian_two(k, p):
    """Valleys K and K' (= H_K(−k)*): blocks of shape (2, 4, 4)."""
    return jnp.stack([block(k, p, 1), block(k, p, -1)])


def _scale(p):
    """Characteristic wavevector (1/Å) for mesh placement: |U| (at least 10 meV) over ħv0."""
    hv = jnp.sqrt(3.0) * p["lattice_constant"] * p["gamma0"] / 2
    return jnp.maximum(jnp.abs(p["asymmetry"]), 0.01) / jnp.maximum(hv, 1e-6)


@register("bilayer-graphene", SPEC,
          summary="Bernal bilayer graphene, four-band SWMcC k·p model around K (and K') (continuum, 2D)",
          hamiltonian="McCann–Koshino 4×4 in (A1,B1,A2,B2): ħv0 π, γ1 (B1–A2), ħv3 π (A1–B2), "
                      "−ħv4 π, ±U/2 layer potential, Δ' on dimer sites; π = ξk_x + ik_y",
          source="McCann & Koshino, Rep. Prog. Phys. 76, 056503 (2013)")
def build_bilayer(p, s) -> BandModel:
    two = s["valleys"] == 2
    return BandModel(
        name="bilayer-graphene", dim=2, hamiltonian=hamiltonian_two if two else hamiltonian_one,
        params=p, spec=SPEC, domain=Continuum(dim=2, centers=((0.0, 0.0),), scale=_scale),
        degeneracy=float(s["degeneracy"]), blocks=2 if two else 1, block_size=4,
        static=tuple(sorted(s.items())), description="Bernal bilayer graphene (continuum)",
        source=SPEC.owner)
