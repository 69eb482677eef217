"""Hermitian eigendecomposition with a degeneracy-safe derivative rule.

``jnp.linalg.eigh`` differentiates through 1/(ε_m − ε_n), which is inf/NaN for degenerate
pairs (Kramers pairs, touchings on the mesh).  ``safe_eigh`` uses the same forward pass and a
``custom_jvp`` in which pairs closer than ``tol`` (eV) are masked *before* the division
(double-``where``), so derivatives of gauge-invariant quantities stay finite.  Within a
degenerate group the eigenvector derivative is left undetermined (set to zero), which is exact
for quantities that are traces over the group.
"""
from __future__ import annotations

from functools import partial

import jax
import jax.numpy as jnp

DEGENERACY_TOL = 1e-9  # eV


def safe_inverse_gaps(w, tol=DEGENERACY_TOL):
    """Matrix inv[n, m] = 1/(ε_n − ε_m), zero where |ε_n − ε_m| <= tol (incl. n = m)."""
    gap = w[..., :, None] - w[..., None, :]
    ok = jnp.abs(gap) > tol
    return jnp.where(ok, 1.0 / jnp.where(ok, gap, 1.0), 0.0), ok


@partial(jax.custom_jvp, nondiff_argnums=(1,))
def safe_eigh(h, tol=DEGENERACY_TOL):
    """Eigenvalues (ascending) and eigenvectors (columns) of the Hermitian matrix ``h``."""
    w, u = jnp.linalg.eigh(h)
    return w, u


@safe_eigh.defjvp
def _safe_eigh_jvp(tol, primals, tangents):
    (h,), (dh,) = primals, tangents
    w, u = jnp.linalg.eigh(h)
    dh_t = jnp.conj(jnp.swapaxes(u, -1, -2)) @ dh @ u
    dw = jnp.real(jnp.diagonal(dh_t, axis1=-2, axis2=-1))
    inv, _ = safe_inverse_gaps(w, tol)
    # dU = U (F ∘ dH_t) with F_ij = 1/(ε_j − ε_i) = -inv[i, j]
    du = u @ (-inv.astype(dh_t.dtype) * dh_t)
    return (w, u), (dw, du)
