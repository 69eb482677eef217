"""Brillouin-zone sums of the relaxation-time Boltzmann kernels (natural units: eV, Å, fs).

For nodes k with weights w (Σ w ≈ ∫[dk]) and P conditions (μ_p, T_p, τ_p), the function
:func:`moments` returns a :class:`Moments` with these fields, summed over bands (degeneracy not yet
applied), with
F = −∂f0/∂ε (1/eV), g_a = ∂_aε (eV Å), h_ab = ∂_a∂_bε (eV Å²), Ω (Å²), G (Å²/eV),
τ̃_ν(ε) = τ(ε)/(1 + iντ(ε)) and τ̃' = dτ̃/dε:

  density      Σ [f0 − θ(n below neutrality)]                          (Å^-d)
  dos          Σ F                                                   (1/(eV Å^d))
  drude        Σ F τ̃_ω g_a g_b                                       (fs eV Å^{2-d})
  ahe          Σ f0 Ω                                                (Å^{2-d})
  dipole       Σ F g_b Ω_c              (the Berry-curvature dipole D_bc, Å^{3-d})
  dipole_tau   Σ F τ̃_ω g_b Ω_c         (τ-weighted dipole, fs Å^{3-d})
  drude2_2w    Σ F τ̃_ω [τ̃_2ω h_ab + τ̃'_2ω g_a g_b] g_c          (fs² eV Å^{3-d})
  drude2_0     Σ F τ̃_ω [τ h_ab + τ' g_a g_b] g_c                    (fs² eV Å^{3-d})
  bcp          Σ F [g_a G_bc − ½(g_b G_ac + g_c G_ab)]               (Å^{3-d}/eV)
  lorentz      Σ F τ² g_a ε_cd g_d h_cb    (2D, B ∥ z: ε_xy = 1)       (fs² eV² Å^{4-d})
  thermo1/2    Σ F (ε−μ)^{1,2} τ g_a g_b                              (fs eV^{2,3} Å^{2-d})
  nernst       Σ s(ε) Ω                                              (Å^{2-d})
  drude0       Σ F τ g_a g_b   (dc, for the thermoelectric tensors)   (fs eV Å^{2-d})
  dipole_sea   Σ [f0 − θ] ∂_bΩ_c  (Fermi-sea route to D, only when requested)

The second-order kernels are the Fermi-surface forms obtained by integrating the Fermi-sea
expressions of docs/theory.md §5.4–5.5 by parts (exact on a closed zone; for k·p windows
they avoid boundary terms).  For constant τ they reduce to
χ^ND ∝ τ̃_ω τ̃_2ω ∫ f0 ∂_a∂_b∂_c ε and χ^BCD ∝ τ̃_ω D.
"""
from __future__ import annotations

from typing import Any

import jax
import jax.numpy as jnp

from crosswind.models.geometry import geometry_at
from crosswind.solver.engine.occupation import entropy_density, fermi, minus_dfermi
from crosswind.solver.pytrees import pytree_dataclass

FIELDS = ("density", "dos", "drude", "ahe", "dipole", "dipole_tau", "drude2_2w", "drude2_0",
          "bcp", "lorentz", "thermo1", "thermo2", "nernst")


@pytree_dataclass
class Moments:
    """Kernel sums of P conditions (natural units eV, Å, fs; summed over bands, degeneracy not
    yet applied), every field with the P conditions in front; the formulas are in the module
    docstring.  Returned by :func:`moments`, :func:`moments_indexed`, the ladder
    (:func:`crosswind.solver.engine.ladder.ladder_moments`), the shared rays
    (:func:`crosswind.solver.engine.rays.ray_moments`) and the shells
    (:func:`crosswind.solver.engine.shells.shell_moments`).

    Physics (2D shapes; 3D adds the curvature index c where Ω is a vector):

    * ``density`` (P,) Å^-d relative to neutrality; ``dos`` (P,) 1/(eV Å^d);
    * ``drude`` (P, d, d) complex, fs eV Å^{2-d}: Σ F τ̃_ω g_a g_b;
    * ``ahe`` (P,) [3D (P, 3)] Å^{2-d}: Σ f0 Ω;
    * ``dipole`` (P, d) [(P, d, 3)] Å^{3-d}: Σ F g_b Ω_c; ``dipole_tau`` the same with τ̃_ω (complex, fs Å^{3-d});
    * ``drude2_2w``, ``drude2_0`` (P, d, d, d) complex, fs² eV Å^{3-d}: the nonlinear Drude kernels at 2ω and dc;
    * ``bcp`` (P, d, d, d) Å^{3-d}/eV: the Berry-connection polarizability kernel;
    * ``lorentz`` (P, d, d) fs² eV² Å^{4-d}: Σ F τ² g_a ε_cd g_d h_cb (zero in 3D);
    * ``thermo1``, ``thermo2`` (P, d, d) fs eV^{2,3} Å^{2-d}: Σ F (ε−μ)^{1,2} τ g_a g_b;
    * ``nernst`` (P,) [(P, 3)] Å^{2-d}: Σ s(ε) Ω;
    * ``drude0`` (P, d, d) fs eV Å^{2-d}: Σ F τ g_a g_b (dc);
    * ``dipole_sea`` (P, d) [(P, d, 3)] Å^{3-d}: Σ [f0 − θ] ∂_bΩ_c, the Fermi-sea route to the
      dipole; ``None`` unless requested (``sea=True``).

    Integrand magnitudes (scales of the convergence test, not physics; (P,) each):
    ``scale_ahe`` Σ f0 |Ω|, ``scale_dipole`` Σ F |g||Ω|, ``scale_drude2`` Σ F |h||g| τ²,
    ``scale_bcp`` Σ F |g||G|.
    """

    density: Any
    dos: Any
    drude: Any
    ahe: Any
    dipole: Any
    dipole_tau: Any
    drude2_2w: Any
    drude2_0: Any
    bcp: Any
    lorentz: Any
    thermo1: Any
    thermo2: Any
    nernst: Any
    drude0: Any
    scale_ahe: Any
    scale_dipole: Any
    scale_drude2: Any
    scale_bcp: Any
    dipole_sea: Any = None


def map_named(fn, m):
    """``fn(name, array)`` applied to every field of a pytree dataclass (a :class:`Moments`);
    ``None`` fields stay ``None``."""
    return jax.tree_util.tree_map_with_path(lambda path, v: fn(path[0].name, v), m)


def tau_tilde(tau, dtau, nu):
    """τ̃ = τ/(1 + iντ) and dτ̃/dε = τ'/(1 + iντ)²  (ν in 1/fs)."""
    c = jnp.complex128
    den = 1.0 + 1j * (nu * tau).astype(c)
    return tau.astype(c) / den, dtau.astype(c) / (den * den)


def _eps2(dim):
    if dim == 2:
        return jnp.array([[0.0, 1.0], [-1.0, 0.0]])
    raise NotImplementedError


def point_kernels(model, params, k, mu, kt, temp, tau_eval, tau_arr, omega, filled, sea=False):
    """All kernels at one k for P conditions: a :class:`Moments` of arrays with leading P."""
    e, g, h, om, _mom, _met, G = geometry_at(model, k, params)
    dim = model.dim
    E = e[None, :]                                # (1, nb)
    M, KT = mu[:, None], kt[:, None]              # (P, 1)
    f0 = fermi(E, M, KT)                          # (P, nb)
    F = minus_dfermi(E, M, KT)
    below = (jnp.arange(e.shape[0]) < filled).astype(e.dtype)[None, :]
    tau, dtau = tau_eval(tau_arr, E, temp[:, None])   # (P, nb)
    t1, _ = tau_tilde(tau, dtau, omega)
    t2, dt2 = tau_tilde(tau, dtau, 2.0 * omega)
    out = {}
    out["density"] = jnp.sum(f0 - below, axis=1)
    out["dos"] = jnp.sum(F, axis=1)
    gg = g[:, :, None] * g[:, None, :]            # (nb, d, d)
    Fc = F.astype(jnp.complex128)
    out["drude"] = jnp.einsum("pn,nab->pab", Fc * t1, gg.astype(jnp.complex128))
    if dim == 2:
        out["ahe"] = jnp.sum(f0 * om[None, :], axis=1)
        out["dipole"] = jnp.einsum("pn,nb->pb", F, g * om[:, None])
        out["dipole_tau"] = jnp.einsum("pn,nb->pb", Fc * t1, (g * om[:, None]).astype(jnp.complex128))
        out["nernst"] = jnp.sum(entropy_density(E, M, KT) * om[None, :], axis=1)
    else:
        out["ahe"] = jnp.einsum("pn,nc->pc", f0, om)
        out["dipole"] = jnp.einsum("pn,nb,nc->pbc", F, g, om)
        out["dipole_tau"] = jnp.einsum("pn,nbc->pbc", Fc * t1, (g[:, :, None] * om[:, None, :]).astype(jnp.complex128))
        out["nernst"] = jnp.einsum("pn,nc->pc", entropy_density(E, M, KT), om)
    hg = (h[:, :, :, None] * g[:, None, None, :]).astype(jnp.complex128)      # h_ab g_c
    ggg = (gg[:, :, :, None] * g[:, None, None, :]).astype(jnp.complex128)    # g_a g_b g_c
    out["drude2_2w"] = (jnp.einsum("pn,nabc->pabc", Fc * t1 * t2, hg)
                        + jnp.einsum("pn,nabc->pabc", Fc * t1 * dt2, ggg))
    tauc, dtauc = tau.astype(jnp.complex128), dtau.astype(jnp.complex128)
    out["drude2_0"] = (jnp.einsum("pn,nabc->pabc", Fc * t1 * tauc, hg)
                       + jnp.einsum("pn,nabc->pabc", Fc * t1 * dtauc, ggg))
    gG = g[:, :, None, None] * G[:, None, :, :]                                # g_a G_bc
    kern = gG - 0.5 * (jnp.swapaxes(gG, 1, 2) + jnp.transpose(gG, (0, 3, 2, 1)))
    out["bcp"] = jnp.einsum("pn,nabc->pabc", F, kern)
    if dim == 2:
        cross = jnp.einsum("cd,nd,ncb->nb", _eps2(2), g, h)                   # ε_cd g_d h_cb
        out["lorentz"] = jnp.einsum("pn,na,nb->pab", F * tau * tau, g, cross)
    else:
        out["lorentz"] = jnp.zeros((mu.shape[0], dim, dim))
    de = E - M
    out["thermo1"] = jnp.einsum("pn,nab->pab", F * de * tau, gg)
    out["thermo2"] = jnp.einsum("pn,nab->pab", F * de * de * tau, gg)
    out["drude0"] = jnp.einsum("pn,nab->pab", F * tau, gg)
    # magnitudes of the integrands (scales for the convergence test, not physics)
    gn = jnp.sqrt(jnp.sum(g * g, axis=-1))
    omn = jnp.abs(om) if dim == 2 else jnp.sqrt(jnp.sum(om * om, axis=-1))
    out["scale_ahe"] = jnp.sum(f0 * omn[None, :], axis=1)
    out["scale_dipole"] = jnp.sum(F * (gn * omn)[None, :], axis=1)
    out["scale_drude2"] = jnp.sum(F * (jnp.sqrt(jnp.sum(h * h, axis=(-1, -2))) * gn)[None, :] * tau * tau, axis=1)
    out["scale_bcp"] = jnp.sum(F * (gn * jnp.sqrt(jnp.sum(G * G, axis=(-1, -2))))[None, :], axis=1)
    if sea:
        dom = jax.jacfwd(lambda q: geometry_at(model, q, params)[3])(k)       # ∂_b Ω
        if dim == 2:
            out["dipole_sea"] = jnp.einsum("pn,nb->pb", f0 - below, dom)
        else:
            out["dipole_sea"] = jnp.einsum("pn,ncb->pbc", f0 - below, dom)
    return Moments(**out)


SEA_KERNELS = ("density", "ahe", "scale_ahe", "dipole_sea")


def moments_indexed(model, params, n, node_fn, mu, kt, temp, tau_eval, tau_arr, omega, filled,
                    sea=False, chunk=4096):
    """Σ_k w(k)·kernels(k) over ``n`` nodes produced chunk by chunk by ``node_fn(indices)``, which
    returns ``(k, w)`` or ``(k, w_surface, w_sea)``: Fermi-sea kernels (``SEA_KERNELS``, integrands
    spread over the whole zone) take ``w_sea``, the Fermi-window kernels ``w_surface`` (indices ≥ n
    get weight 0).  Only one chunk of nodes and geometry exists at a time, so memory does not grow
    with the mesh; ``jax.checkpoint`` keeps reverse-mode memory bounded too."""
    nchunks = -(-n // chunk)

    def one(kk):
        return point_kernels(model, params, kk, mu, kt, temp, tau_eval, tau_arr, omega, filled, sea)

    def body(acc, c):
        idx = c * chunk + jnp.arange(chunk)
        out = node_fn(idx)
        kk, ws = out[0], out[1]
        wsea = out[2] if len(out) > 2 else ws
        ws, wsea = jnp.where(idx < n, ws, 0.0), jnp.where(idx < n, wsea, 0.0)
        vals = jax.vmap(one)(kk)
        part = map_named(lambda key, v: jnp.tensordot((wsea if key in SEA_KERNELS else ws).astype(v.dtype), v,
                                                      axes=(0, 0)), vals)
        return jax.tree_util.tree_map(jnp.add, acc, part), None

    k0 = node_fn(jnp.zeros((1,), dtype=jnp.int64))[0]
    shapes = jax.eval_shape(one, k0[0])
    init = jax.tree_util.tree_map(lambda s: jnp.zeros(s.shape, s.dtype), shapes)
    acc, _ = jax.lax.scan(jax.checkpoint(body), init, jnp.arange(nchunks))
    return acc


def moments(model, params, k, w, mu, kt, temp, tau_eval, tau_arr, omega, filled, sea=False, chunk=4096):
    """Σ_k w(k)·kernels(k) for explicit node arrays ``k`` (n, d) and weights ``w`` (n,)."""
    n = k.shape[0]
    chunk = min(chunk, n)

    def node_fn(idx):
        safe = jnp.minimum(idx, n - 1)
        return k[safe], w[safe]

    return moments_indexed(model, params, n, node_fn, mu, kt, temp, tau_eval, tau_arr, omega, filled,
                           sea, chunk)
