"""Memory budget of one :func:`~crosswind.solver.engine.response.response` call.

The node quadrature evaluates every kernel for a chunk of k-points and a block of conditions at
once, so its working memory is about (k-points per chunk) × (conditions per block) × (bytes per
k-point and condition).  ``response`` splits the conditions into blocks small enough that this
stays within the budget, whatever the number of conditions (10 000 μ points once asked for 87 GB):

* default 2 GiB (``DEFAULT_GIB``);
* the environment variable ``CROSSWIND_MEMORY_GIB`` (a positive number of GiB) overrides it;
* ``response(..., memory_gib=...)`` overrides both for one call.

The budget covers the condition-dependent working arrays of concrete calls; the process itself
(Python, JAX, compiled programs: a few hundred MB) comes on top.  Under ``jax.grad`` the reverse
pass keeps what it needs of every block.
"""
from __future__ import annotations

import math
import os
from functools import lru_cache

from crosswind.models.domain import Lattice
from crosswind.solver.engine.mesh import node_count

DEFAULT_GIB = 2.0
ENV = "CROSSWIND_MEMORY_GIB"
# safety factor on the estimate of :func:`_pair_bytes`: measured peak-RSS growth per (k-point,
# condition) of an unblocked call was 1.3 kB (honeycomb lattice) and 1.7 kB (massive Dirac rays,
# ray rule included) against the 1.26 kB estimated for two bands in 2D
OVERHEAD = 2.0
# share of the budget given to the blocked arrays (the rest: geometry chunk, mesh scores, results)
SHARE = 0.5


def budget_bytes(memory_gib=None) -> float:
    """The working-memory budget in bytes: ``memory_gib`` if given, else ``$CROSSWIND_MEMORY_GIB``,
    else 2 GiB.  A value that is not a positive finite number is refused with the fix."""
    source = "response: memory_gib"
    if memory_gib is None:
        raw = os.environ.get(ENV, "").strip()
        if not raw:
            return DEFAULT_GIB * 2 ** 30
        source = f"environment variable {ENV}"
        try:
            memory_gib = float(raw)
        except ValueError:
            raise ValueError(f"{source} must be a number of GiB, e.g. {ENV}=2; got {raw!r}") from None
    if isinstance(memory_gib, bool) or not isinstance(memory_gib, (int, float)) or not (
            math.isfinite(memory_gib) and memory_gib > 0):
        raise ValueError(f"{source} must be a positive number of GiB, e.g. 2; got {memory_gib!r}")
    return float(memory_gib) * 2 ** 30


@lru_cache(maxsize=64)
def _pair_bytes(dim: int, bands: int, sea: bool) -> int:
    """Bytes of the kernel values of one k-point and one condition (the arrays of
    :func:`~crosswind.solver.engine.kernels.point_kernels` for P = 1), times ``OVERHEAD``."""
    per_band = 8 * (8 + 4 * dim + 2 * dim ** 2 + 2 * dim ** 3)          # f0, F, τ, τ̃, Fermi products
    out = 8 * (2 + 2 * dim ** 2 + dim + 2 * dim + 2 * 2 * dim ** 3 + dim ** 3 + 4 * dim ** 2 + dim + 4)
    if sea:
        out += 8 * dim ** 2
    return int(OVERHEAD * (out + bands * per_band))


def condition_block(model, res, P: int, chunk: int, sea: bool, budget: float) -> int:
    """Conditions per block so that (nodes per chunk) × block × bytes per pair stays within
    ``SHARE`` of ``budget`` bytes (at least 1, at most P)."""
    nodes = min(chunk, node_count(model, res))
    per_condition = nodes * _pair_bytes(model.dim, model.n_bands, bool(sea))
    if not isinstance(model.domain, Lattice):
        # continuum rays: each condition also holds its own ray rule (nodes, weights, probe grid)
        per_condition += 8 * (model.dim + 1) * node_count(model, res)
    return int(max(1, min(P, (SHARE * budget) // per_condition)))
