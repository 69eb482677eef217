"""Massive (optionally tilted) Dirac cone, continuum model.

One valley (τ = +1):  H = ħt k_x + ħv (k_x σ_x + k_y σ_y) + Δ σ_z,  Δ = ``mass`` (half the gap).
``valleys=2`` adds the time-reversed partner H'(k) = H(−k)* = −ħt k_x + ħv(−k_x σ_x + k_y σ_y) + Δσ_z
as a second block.  Conventions and closed forms: docs/theory.md §3 and §6; original
model: Xiao, Yao, Niu, PRL 99, 236809 (2007) (they write the gap as Δ, here the mass is Δ).
"""
from __future__ import annotations

import jax.numpy as jnp

from ..band_model import BandModel
from ..domain import Continuum
from ..params import ParamSpec, choice, real
from ..registry import register
from ..twoband import hamiltonian_of
from ..units import ANGSTROM, HBAR_EVS

SPEC = ParamSpec((
    real("velocity", "m/s", 5e5, "Dirac velocity v", 1.0, 1e8),
    real("mass", "eV", 0.1, "Dirac mass Δ (+Δσ_z); the gap is 2|Δ|", -10.0, 10.0),
    real("tilt", "m/s", 0.0, "tilt velocity t along x (ħt k_x)", -1e8, 1e8),
    choice("valleys", 1, (1, 2), "1: one cone (τ=+1); 2: add the time-reversed partner"),
    choice("degeneracy", 1, (1, 2, 3, 4), "extra degeneracy factor (spin etc.)"),
), owner="massive-dirac")


def _hv(p, key):
    return p[key] * HBAR_EVS / ANGSTROM  # eV Å


def dvector_one(k, p):
    hv, ht = _hv(p, "velocity"), _hv(p, "tilt")
    d0 = jnp.stack([ht * k[0]])
    d = jnp.stack([jnp.stack([hv * k[0], hv * k[1], p["mass"]])])
    return d0, d


def dvector_two(k, p):
    hv, ht = _hv(p, "velocity"), _hv(p, "tilt")
    d0 = jnp.stack([ht * k[0], -ht * k[0]])
    d = jnp.stack([jnp.stack([hv * k[0], hv * k[1], p["mass"]]),
                   jnp.stack([-hv * k[0], hv * k[1], p["mass"]])])
    return d0, d


H_ONE = hamiltonian_of(dvector_one)
H_TWO = hamiltonian_of(dvector_two)


def _scale(p):
    """Curvature scale |Δ|/ħv (1/Å) for mesh placement (at least 1e-4)."""
    return jnp.maximum(jnp.abs(p["mass"]) / _hv(p, "velocity"), 1e-4)


@register("massive-dirac", SPEC,
          summary="massive Dirac cone with tilt, one valley or a time-reversed pair (continuum, 2D)",
          hamiltonian="ħt k_x + ħv(τ k_x σ_x + k_y σ_y) + Δσ_z, valley τ=+1 and (valleys=2) its partner H(−k)*",
          source="Xiao, Yao, Niu, PRL 99, 236809 (2007); tilt as in Sodemann & Fu, PRL 115, 216806 (2015)")
def build_massive_dirac(p, s) -> BandModel:
    two = s["valleys"] == 2
    return BandModel(
        name="massive-dirac", dim=2, hamiltonian=H_TWO if two else H_ONE, params=p, spec=SPEC,
        domain=Continuum(dim=2, centers=((0.0, 0.0),), scale=_scale),
        degeneracy=float(s["degeneracy"]), blocks=2 if two else 1, block_size=2,
        dvector=dvector_two if two else dvector_one, static=tuple(sorted(s.items())),
        description="massive Dirac cone", source=SPEC.owner)
