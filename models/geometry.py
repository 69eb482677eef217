"""Band geometry at a batch of k-points by automatic differentiation.

For each k the Hamiltonian blocks H(k) and their k-derivatives (``jax.jacfwd``) give, by the
gauge-invariant sums over states of docs/theory.md §2 (never by differentiating
eigenvectors):

* energies ε_n (eV), energy gradients ∂ε_n/∂k (eV Å) and velocities (1/ħ)∂ε_n/∂k (m/s);
* energy Hessian ∂_a∂_b ε_n = <n|∂_a∂_b H|n> + 2 Re Σ_{m≠n} V^a_nm V^b_mn /(ε_n−ε_m) (eV Å²)
  and inverse mass (1/ħ²)∂_a∂_bε in units of 1/m_e;
* Berry curvature Ω_n = −2 Im Σ_{m≠n} V^x_nm V^y_mn /(ε_n−ε_m)² (Å²; Ω = ∇_k × i<u|∇_k u>;
  2D: z component, 3D: vector Ω^c = −ε_abc Im Σ V^a V^b/(Δε)²);
* orbital moment m_n = −(e/ħ) Σ_{m≠n} Im[V^x_nm V^y_mn]/(ε_n−ε_m) (eV/T; carrier charge −e);
* quantum metric g^n_ab = Σ_{m≠n} Re[V^a_nm V^b_mn]/(ε_n−ε_m)² (Å²) and Berry-connection
  polarizability G^n_ab = 2 Re Σ_{m≠n} V^a_nm V^b_mn /(ε_n−ε_m)³ (Å²/eV; Gao, Yang, Niu,
  PRL 112, 166601, 2014);

with V^a = U† ∂_aH U.  Two-band blocks with a d-vector use the closed forms H = d0 + d·σ,
ε = d0 ± |d|, Ω_± = ∓ d·(∂_x d × ∂_y d)/(2|d|³), g = (∂d̂·∂d̂)/4, G_± = ± g/|d|, m = |d|Ω_+/ħ.

Degeneracies: bands of one block closer than ``DEGENERACY_TOL`` (1e-9 eV) form a group.  Pairs
inside a group are left out of every sum (the non-Abelian treatment), and each member of the
group is given the group average of every quantity, which is gauge invariant (for a Kramers
pair the group trace is what enters any physical response).  At an exact two-band touching the
curvature, metric, polarizability and moment are therefore set to zero there (the point has zero
measure; only its neighbourhood carries weight) and the velocity is the group mean.  Gradients
with respect to parameters stay finite because every division is masked first.
"""
from __future__ import annotations

from functools import partial

import jax
import jax.numpy as jnp

from .band_model import BandModel
from .eigh import DEGENERACY_TOL, safe_eigh, safe_inverse_gaps
from .pytrees import pytree_dataclass
from .twoband import dvector_jet
from .units import ANGSTROM, GRAD_TO_VELOCITY, HBAR2_OVER_ME_EVA2, HBAR_EVS

# (e/ħ)·[eV Å²] expressed in eV/T: X[eV Å²]·1e-20 / ħ[eV s]
_MOMENT_FACTOR = ANGSTROM ** 2 / HBAR_EVS


@pytree_dataclass
class BandGeometry:
    """Band-resolved geometry at ``nk`` k-points; bands in ascending energy."""

    energies: jax.Array            # (nk, nb) eV
    energy_gradient: jax.Array     # (nk, nb, d) eV Å
    energy_hessian: jax.Array      # (nk, nb, d, d) eV Å²
    berry_curvature: jax.Array     # (nk, nb) Å² in 2D, (nk, nb, 3) in 3D
    orbital_moment: jax.Array      # (nk, nb) eV/T in 2D, (nk, nb, 3) in 3D
    quantum_metric: jax.Array      # (nk, nb, d, d) Å²
    polarizability: jax.Array      # (nk, nb, d, d) Å²/eV (Berry connection polarizability)

    @property
    def velocities(self):
        """(1/ħ)∂ε/∂k in m/s, shape (nk, nb, d)."""
        return self.energy_gradient * GRAD_TO_VELOCITY

    @property
    def inverse_mass(self):
        """(1/ħ²)∂_a∂_b ε in units of 1/m_e, shape (nk, nb, d, d)."""
        return self.energy_hessian / HBAR2_OVER_ME_EVA2

    @property
    def connection_polarizability(self):
        return self.polarizability


def _curl_components(t, dim):
    """From an antisymmetric-in-use tensor t[..., a, b] return z (2D) or the 3-vector (3D)
    of t_ab with the orientation c = (a, b): z=(x,y), x=(y,z), y=(z,x)."""
    if dim == 2:
        return t[..., 0, 1]
    return jnp.stack([t[..., 1, 2], t[..., 2, 0], t[..., 0, 1]], axis=-1)


def _group_mean(w, x, tol):
    same = (jnp.abs(w[..., :, None] - w[..., None, :]) <= tol).astype(w.dtype)
    norm = same.sum(-1)
    flat = x.reshape(x.shape[: w.ndim] + (-1,))
    out = jnp.einsum("...nm,...mj->...nj", same, flat) / norm[..., None]
    return out.reshape(x.shape)


def _blocks_eigh(model: BandModel, k, params, tol):
    """Per-block geometry at one k via eigh and the sums over states."""
    d = model.dim
    if model.jet is not None:                                         # explicit Bloch sums
        h, dh, d2h = model.jet(k, params)
    else:
        h = model.hamiltonian(k, params)                              # (S, m, m)
        dh = jax.jacfwd(model.hamiltonian, argnums=0)(k, params)       # (S, m, m, d)
        d2h = jax.jacfwd(jax.jacfwd(model.hamiltonian, argnums=0), argnums=0)(k, params)
    w, u = safe_eigh(h, tol)                                         # (S, m), (S, m, m)
    ud = jnp.conj(jnp.swapaxes(u, -1, -2))
    v = jnp.einsum("sni,sijA,sjm->sAnm", ud, dh, u)                  # (S, d, m, m)
    hess_h = jnp.einsum("sni,sijAB,sjn->snAB", ud, d2h, u).real       # (S, m, d, d)
    inv, _ = safe_inverse_gaps(w, tol)                               # (S, m, m)
    inv = inv.astype(v.dtype)
    prod = jnp.einsum("sAnm,sBmn->snmAB", v, v)                      # V^a_nm V^b_mn
    grad = jnp.real(jnp.einsum("sAnn->snA", v))
    hess = hess_h + 2 * jnp.einsum("snm,snmAB->snAB", inv, prod).real
    w2 = jnp.einsum("snm,snmAB->snAB", inv ** 2, prod)
    omega = _curl_components(-2 * w2.imag, d)
    metric = w2.real
    bcp = 2 * jnp.einsum("snm,snmAB->snAB", inv ** 3, prod).real
    mom = _curl_components(-jnp.einsum("snm,snmAB->snAB", inv, prod).imag, d) * _MOMENT_FACTOR
    return w, grad, hess, omega, mom, metric, bcp


def _safe_norm(d, tol):
    sq = jnp.sum(d * d, axis=-1)
    ok = sq > tol * tol
    return jnp.where(ok, jnp.sqrt(jnp.where(ok, sq, 1.0)), 0.0), ok


def _blocks_dvector(model: BandModel, k, params, tol):
    """Per-block geometry at one k from the closed two-band forms."""
    dim = model.dim
    f = model.dvector
    if model.dvector_jet is not None:                                # written-out d-vector jet
        (d0, dv), (jd0, jdv), (hd0, hdv) = model.dvector_jet(k, params)
    elif model.jet is not None:                                      # explicit Bloch sums
        (d0, dv), (jd0, jdv), (hd0, hdv) = dvector_jet(*model.jet(k, params))
    else:
        d0, dv = f(k, params)                                        # (S,), (S, 3)
        jd0, jdv = jax.jacfwd(f, argnums=0)(k, params)               # (S, d), (S, 3, d)
        hd0, hdv = jax.jacfwd(jax.jacfwd(f, argnums=0), argnums=0)(k, params)
    e, ok = _safe_norm(dv, tol)                                      # (S,)
    inv_e = jnp.where(ok, 1.0 / jnp.where(ok, e, 1.0), 0.0)
    nhat = dv * inv_e[:, None]
    proj = jnp.einsum("sc,scA->sA", nhat, jdv)                      # d̂·∂_a d
    dd = jnp.einsum("scA,scB->sAB", jdv, jdv)
    perp = dd - proj[:, :, None] * proj[:, None, :]
    metric = perp * (inv_e ** 2)[:, None, None] / 4.0
    hess_e = jnp.einsum("sc,scAB->sAB", nhat, hdv) + perp * inv_e[:, None, None]
    # Ω_+ tensor: -(1/2|d|^3) d·(∂_a d × ∂_b d)
    cross = jnp.cross(jdv[:, :, :, None], jdv[:, :, None, :], axis=1)  # (S, 3, d, d)
    trip = jnp.einsum("sc,scAB->sAB", dv, cross)
    om_plus = _curl_components(-0.5 * trip * (inv_e ** 3)[:, None, None], dim)
    signs = jnp.array([-1.0, 1.0])
    w = d0[:, None] + signs[None, :] * e[:, None]                    # (S, 2)
    grad = jd0[:, None, :] + signs[None, :, None] * proj[:, None, :]
    hess = hd0[:, None] + signs[None, :, None, None] * hess_e[:, None]
    if dim == 2:
        omega = signs[None, :] * om_plus[:, None]
        mom = jnp.broadcast_to((e * om_plus)[:, None], w.shape) * _MOMENT_FACTOR
    else:
        omega = signs[None, :, None] * om_plus[:, None, :]
        mom = jnp.broadcast_to((e[:, None] * om_plus)[:, None, :], w.shape + (3,)) * _MOMENT_FACTOR
    metric2 = jnp.broadcast_to(metric[:, None], w.shape + metric.shape[-2:])
    bcp = signs[None, :, None, None] * (metric * inv_e[:, None, None])[:, None]
    return w, grad, hess, omega, mom, metric2, bcp


def geometry_at(model: BandModel, k, params=None, tol: float = DEGENERACY_TOL):
    """Geometry at a single k-point (shape ``(d,)``) as a tuple of per-band arrays, merged over
    blocks and sorted in ascending energy.  Pure and traceable: the building block the solver
    maps over chunks of k-points."""
    p = model.params if params is None else params
    fn = _blocks_dvector if model.dvector is not None else _blocks_eigh
    w, grad, hess, omega, mom, metric, bcp = fn(model, k, p, tol)
    if model.dvector is None:
        # group averages inside each block.  Closed two-band forms need none: the two bands of a
        # block are within tol only where |d| <= tol, and there every quantity is already equal
        # for both (d̂ and 1/|d| are masked to zero), so the average would return its input
        grad, hess, omega, mom, metric, bcp = (
            _group_mean(w, x, tol) for x in (grad, hess, omega, mom, metric, bcp))
    nb = model.n_bands
    flat = lambda x: x.reshape((nb,) + x.shape[2:])
    single = w.shape[0] == 1
    w, grad, hess, omega, mom, metric, bcp = map(flat, (w, grad, hess, omega, mom, metric, bcp))
    if single:
        # one block is already ascending ((d0 − |d|, d0 + |d|), or eigh's order) and a tie keeps
        # that order in the stable argsort too: the sort and its seven gathers are skipped
        return w, grad, hess, omega, mom, metric, bcp
    order = jnp.argsort(w)
    return tuple(x[order] for x in (w, grad, hess, omega, mom, metric, bcp))


def band_geometry(model: BandModel, k, tol: float = DEGENERACY_TOL) -> BandGeometry:
    """Band geometry at a batch of wavevectors ``k`` (shape ``(nk, d)`` in 1/Å).

    Returns a :class:`BandGeometry` whose fields have a leading ``nk`` axis and bands in
    ascending energy.  Vectorised with ``jax.vmap`` (no Python loop over k-points) and
    differentiable with respect to ``model.params``.  All fields are real (float64).

    Fields, units and formulas (sums over states with V^a = U†∂_aH U, never differentiated
    eigenvectors; docs/theory.md §2):

    * ``energies`` ε_n [eV]; ``energy_gradient`` ∂ε_n/∂k [eV·Å] (``velocities`` = ∂ε/ħ∂k [m/s]);
      ``energy_hessian`` ∂_a∂_bε_n [eV·Å²] (``inverse_mass`` in 1/m_e);
    * ``berry_curvature`` Ω_n = −2 Im Σ_{m≠n} V^x_nm V^y_mn/(ε_n−ε_m)² [Å²] (Ω = ∇ₖ×i⟨u|∇ₖu⟩;
      2D: the z component, 3D: a vector); two-band d-vector form Ω_± = ∓ d·(∂_xd × ∂_yd)/(2|d|³);
    * ``orbital_moment`` m_n = −(e/ħ) Σ_{m≠n} Im[V^x_nm V^y_mn]/(ε_n−ε_m) [eV/T] (carrier charge −e);
    * ``quantum_metric`` g^n_ab = Σ_{m≠n} Re[V^a_nm V^b_mn]/(ε_n−ε_m)² [Å²];
    * ``polarizability`` G^n_ab = 2 Re Σ_{m≠n} V^a_nm V^b_mn/(ε_n−ε_m)³ [Å²/eV] (Berry-connection
      polarizability; Gao, Yang, Niu, PRL 112, 166601 (2014)).

    Bands of one block closer than ``tol`` (eV) form a degenerate group: pairs inside it are left
    out of the sums and each member gets the group average (see the module docstring).
    """
    k = jnp.asarray(k, dtype=jnp.float64)
    if k.ndim != 2 or k.shape[1] != model.dim:
        raise ValueError(
            f"band_geometry: k must have shape (nk, {model.dim}) in 1/Å for the {model.dim}D model "
            f"'{model.name}', got {tuple(k.shape)}. Reshape with k.reshape(-1, {model.dim})."
        )
    out = _batched(model, k, tol)
    return BandGeometry(*out)


@partial(jax.jit, static_argnums=(2,))
def _batched(model, k, tol):
    return jax.vmap(lambda q: geometry_at(model, q, None, tol))(k)


def block_band_geometry(model: BandModel, k, tol: float = DEGENERACY_TOL) -> BandGeometry:
    """:func:`band_geometry` block by block: every field has the shape ``(nk, S, m, ...)`` for the
    S blocks of m bands of the Hamiltonian, energies ascending within each block (no merging or
    sorting across blocks: a valley or spin sector stays identifiable).  One compiled program for
    all blocks."""
    k = jnp.asarray(k, dtype=jnp.float64)
    if k.ndim != 2 or k.shape[1] != model.dim:
        raise ValueError(f"block_band_geometry: k must have shape (nk, {model.dim}) in 1/Å, got {tuple(k.shape)}")
    return BandGeometry(*_batched_blocks(model, k, tol))


@partial(jax.jit, static_argnums=(2,))
def _batched_blocks(model, k, tol):
    def one(q):
        fn = _blocks_dvector if model.dvector is not None else _blocks_eigh
        w, *rest = fn(model, q, model.params, tol)
        if model.dvector is not None:            # closed two-band forms: see geometry_at
            return (w, *rest)
        return (w, *(_group_mean(w, x, tol) for x in rest))
    return jax.vmap(one)(k)
