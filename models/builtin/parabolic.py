"""2D parabolic band with optional Rashba spin–orbit coupling and Zeeman splitting.

    H = ħ²k²/(2 m* m_e) + α (k_y σ_x − k_x σ_y) + B σ_z

α = ``rashba`` (eV Å), B = ``zeeman`` (eV; spin splitting 2B).  With α = B = 0 (given as plain
numbers) the model is one spin-degenerate band (degeneracy 2); otherwise both spin bands are
explicit (degeneracy 1).  Textbook model (Bychkov & Rashba, JETP Lett. 39, 78, 1984, for the
spin–orbit term; common practice).
"""
from __future__ import annotations

import jax
import jax.numpy as jnp

from ..band_model import BandModel
from ..domain import Continuum
from ..params import ParamSpec, real
from ..registry import register
from ..twoband import hamiltonian_of
from ..units import HBAR2_OVER_ME_EVA2

SPEC = ParamSpec((
    real("effective_mass", "m_e", 0.5, "band mass m* in electron masses", 1e-4, 1e4),
    real("rashba", "eV Å", 0.0, "Rashba coefficient α", -10.0, 10.0),
    real("zeeman", "eV", 0.0, "Zeeman term B σ_z (splitting 2B)", -10.0, 10.0),
), owner="parabolic")


def _kinetic(k, p):
    return HBAR2_OVER_ME_EVA2 / (2 * p["effective_mass"]) * jnp.sum(k * k)


def h_scalar(k, p):
    return _kinetic(k, p).astype(jnp.complex128).reshape(1, 1, 1)


def dvector_spin(k, p):
    d = jnp.stack([p["rashba"] * k[1], -p["rashba"] * k[0], p["zeeman"]])
    return _kinetic(k, p)[None], d[None]


H_SPIN = hamiltonian_of(dvector_spin)


def _is_zero(x):
    return not isinstance(x, jax.core.Tracer) and float(x) == 0.0


@register("parabolic", SPEC,
          summary="2D parabolic band with optional Rashba and Zeeman terms (continuum)",
          hamiltonian="ħ²k²/(2m) + α(k_y σx − k_x σy) + Bσz",
          source="textbook free-electron band; Rashba term: Bychkov & Rashba, JETP Lett. 39, 78 (1984)")
def build_parabolic(p, s) -> BandModel:
    plain = _is_zero(p["rashba"]) and _is_zero(p["zeeman"])
    dom = Continuum(dim=2, centers=((0.0, 0.0),), scale=0.1)
    if plain:
        return BandModel(name="parabolic", dim=2, hamiltonian=h_scalar, params=p, spec=SPEC, domain=dom,
                         degeneracy=2.0, blocks=1, block_size=1, description="parabolic band")
    return BandModel(name="parabolic", dim=2, hamiltonian=H_SPIN, params=p, spec=SPEC, domain=dom,
                     degeneracy=1.0, blocks=1, block_size=2, dvector=dvector_spin,
                     # both spin bands are conduction bands: neutrality is the empty band (the
                     # two-band default, the lower band filled, would count the unbounded empty
                     # states of the lower band as holes)
                     static=(("neutral_filling", 0),),
                     description="parabolic band with spin")
