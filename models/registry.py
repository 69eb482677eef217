"""The model catalogue: ``build(name, **params)`` and the listing behind ``crosswind models``."""
from __future__ import annotations

import difflib
from collections.abc import Callable
from dataclasses import dataclass

from .band_model import BandModel
from .params import ParamSpec


@dataclass(frozen=True)
class CatalogueEntry:
    name: str
    spec: ParamSpec
    builder: Callable[[dict, dict], BandModel]
    summary: str
    hamiltonian: str
    source: str


_CATALOGUE: dict[str, CatalogueEntry] = {}


def register(name: str, spec: ParamSpec, *, summary: str, hamiltonian: str, source: str):
    """Decorator adding ``builder(real_params, static_params) -> BandModel`` to the catalogue."""

    def deco(builder):
        _CATALOGUE[name] = CatalogueEntry(name, spec, builder, summary, hamiltonian, source)
        return builder

    return deco


def catalogue() -> dict[str, CatalogueEntry]:
    """All catalogue entries by name (the built-in ones register when ``crosswind.models`` is imported)."""
    return dict(_CATALOGUE)


def build(name: str, **params) -> BandModel:
    """Build a catalogue model.

    ``params`` are checked against the model's parameter spec: an unknown name raises
    ``ValueError`` listing the valid ones; a concrete value out of range raises ``ValueError``
    giving the range.  Traced JAX values are accepted so gradients flow through the model.

    Units and conventions (every model): energies in eV, lengths in Å, k in 1/Å, velocities in
    m/s, strain dimensionless (ε_ij, ε_xy half the engineering shear); each parameter's unit,
    default, range and meaning are listed by ``crosswind models`` (or ``catalogue()[name].spec``),
    its Hamiltonian H(k) and published source by ``catalogue()[name].hamiltonian``/``.source``.
    H(k) is in eV with k measured in 1/Å (from the valley centre for a k·p model; lattice Bloch
    phases include the orbital positions, docs/theory.md §2.5).  Examples of the formulas behind
    the names: ``massive-dirac`` H = ħt k_x + ħv(k_xσ_x + k_yσ_y) + Δσ_z (one valley; gap 2|Δ|, a Dirac
    "mass" is half the gap); ``haldane`` H = 2t2 cosφ Σcos(k·b_i) + t1 Σ[cos(k·a_i)σ_x +
    sin(k·a_i)σ_y] + [M − 2t2 sinφ Σ sin(k·b_i)]σ_z.  Returns a :class:`BandModel` pytree (real
    parameters are leaves, so ``jax.grad`` flows through them); pass it to ``band_geometry`` or
    ``response``.
    """
    if name not in _CATALOGUE:
        close = difflib.get_close_matches(name, list(_CATALOGUE), n=1)
        hint = f" Did you mean '{close[0]}'?" if close else ""
        raise ValueError(f"unknown model '{name}'.{hint} Available: {', '.join(sorted(_CATALOGUE))}.")
    entry = _CATALOGUE[name]
    real, static = entry.spec.resolve(params)
    return entry.builder(real, static)


def describe_catalogue() -> str:
    """Human-readable listing: every model, its Hamiltonian, source and parameters."""
    lines = []
    for name, e in sorted(catalogue().items()):
        lines.append(f"{name}: {e.summary}")
        lines.append(f"  H = {e.hamiltonian}")
        lines.append(f"  source: {e.source}")
        lines.append(e.spec.table())
        lines.append("")
    return "\n".join(lines)
