"""Chern numbers of lattice models by the lattice (link-variable) method.

Method: Fukui, Hatsugai, Suzuki, "Chern numbers in discretized Brillouin zone: efficient method
of computing (spin) Hall conductances", J. Phys. Soc. Jpn. 74, 1674 (2005); recipe and sign in
docs/theory.md §11.

On an N×N mesh in reduced coordinates, k = (i/N) b1 + (j/N) b2 (so k + b_j is exactly a mesh
point again), the chosen set of bands gives the link variables

    U_μ(k) = det <u(k)|u(k + δ_μ)>        (determinant over the chosen set: non-Abelian)

and the plaquette phase F(k) = Arg[U_1(k) U_2(k+δ_1) U_1(k+δ_2)^* U_2(k)^*] in (−π, π].
Since U_μ ≈ exp(−i A_μ δ) for A = i<u|∇u>, Arg of the loop product is minus the Berry flux, so

    C = −(1/2π) Σ_k F(k) · sgn det(b1, b2)

in the convention Ω = ∇_k × i<u|∇_k u> (docs/theory.md §0.1; the Haldane lower band has
C = +sgn(sin φ), §4).  The factor sgn det(b1, b2) makes the result independent of the
handedness of the reciprocal vectors.

Gauge: the Hamiltonians of Crosswind lattice models include the orbital positions in the Bloch
phases (docs/theory.md §2.5, convention I), which are not periodic in k.  Eigenvectors are
multiplied by exp(i k·τ_α) (τ_α = ``model.orbital_positions()``, deformed by strain where the
model says so), which makes them eigenvectors of the k-periodic Hamiltonian; the mesh then
wraps around the Brillouin zone exactly.

3D lattices: the Chern number of a plane of the Brillouin zone.  ``plane_axis`` = j holds the
reduced coordinate along b_j fixed at ``plane_at`` (default: j = 2, i.e. b3, at 0); the mesh spans
the other two reciprocal vectors in cyclic order (b_{j+1}, b_{j+2}) and the plane is oriented
along b_{j+1} × b_{j+2} (for a cubic lattice: plane_axis=2 gives the k_z-plane oriented along +z,
plane_axis=0 the k_x-plane oriented along +x).
"""
from __future__ import annotations

import math
import numbers
import warnings

import jax
import jax.numpy as jnp
import numpy as np

from crosswind.models.band_model import BandModel
from crosswind.models.domain import Lattice
from crosswind.models.eigh import DEGENERACY_TOL

__all__ = ["chern_number"]

# A plaquette flux this close to ±π means the mesh does not resolve the curvature there.
_COARSE_FLUX = 0.8 * math.pi


@jax.jit
def _periodic_states(model: BandModel, kpts, tau):
    """Energies (nk, nb) ascending and periodic-gauge eigenvectors (nk, nb, nb) as columns,
    embedded in the full block-diagonal basis."""
    s, m = model.blocks, model.block_size
    eye_s = jnp.eye(s, dtype=jnp.complex128)

    def one(k):
        h = model.hamiltonian(k, model.params)                         # (S, m, m)
        w, u = jnp.linalg.eigh(h)                                      # (S, m), (S, m, m)
        phase = jnp.exp(1j * (tau @ k).astype(jnp.complex128))         # (m,)
        u = phase[None, :, None] * u
        full = jnp.einsum("st,sij->sitj", eye_s, u).reshape(s * m, s * m)
        w = w.reshape(s * m)
        order = jnp.argsort(w)
        return w[order], full[:, order]

    return jax.vmap(one)(kpts)


def _select(bands, below, n_bands, energies):
    """Indices of the chosen bands (sorted tuple)."""
    if below is not None:
        if bands is not None:
            raise ValueError("chern_number: give either bands=... or below=..., not both.")
        e = np.asarray(energies)
        top = e.max(axis=0)
        bottom = e.min(axis=0)
        chosen = [n for n in range(n_bands) if top[n] < below]
        for n in range(n_bands):
            if bottom[n] < below <= top[n]:
                raise ValueError(
                    f"chern_number: the energy below={below:g} eV lies inside band {n} "
                    f"(from {bottom[n]:.6g} to {top[n]:.6g} eV on the mesh), so the bands below it "
                    "are not separated by a gap; choose an energy inside a gap.")
        if not chosen:
            raise ValueError(
                f"chern_number: no band lies entirely below {below:g} eV (the lowest band starts "
                f"at {bottom[0]:.6g} eV); choose a higher energy or pass bands=... explicitly.")
        return tuple(chosen)
    if bands is None:
        if n_bands < 2:
            raise ValueError("chern_number: the model has a single band; pass bands=0 explicitly.")
        return tuple(range(n_bands // 2))
    if isinstance(bands, numbers.Integral):
        bands = [bands]
    try:
        idx = [int(b) for b in bands]
    except TypeError as exc:
        raise ValueError(
            "chern_number: bands must be a band index, a sequence of indices (ascending energy "
            f"over all blocks), or None; got {bands!r}.") from exc
    if any(isinstance(b, bool) or not isinstance(b, numbers.Integral) for b in bands):
        raise ValueError(f"chern_number: band indices must be integers, got {bands!r}.")
    if not idx:
        raise ValueError("chern_number: bands is empty; choose at least one band index.")
    bad = [b for b in idx if not 0 <= b < n_bands]
    if bad:
        raise ValueError(
            f"chern_number: band indices {bad} are out of range; the model has {n_bands} bands "
            f"(indices 0..{n_bands - 1} in ascending energy).")
    if len(set(idx)) != len(idx):
        raise ValueError(f"chern_number: band indices repeat in {idx}.")
    return tuple(sorted(idx))


def chern_number(model: BandModel, bands=None, mesh: int = 24, *, below: float | None = None,
                 plane_at: float | None = None, plane_axis: int | None = None) -> int:
    """Chern number of a set of bands of a 2D lattice model (or of a k-plane of a 3D one).

    Parameters
    ----------
    model : a lattice ``BandModel`` (continuum models raise ``ValueError``).
    bands : band index, or sequence of indices, counted in ascending energy over all
        ``model.n_bands`` bands (all blocks merged, as in ``band_geometry``).  The set is treated
        together (determinant links), so degenerate groups inside it are fine.  Default: the
        lower half of the bands.
    mesh : N, the number of mesh points along each reciprocal vector (N×N plaquettes).
    below : alternative to ``bands``: take every band lying entirely below this energy (eV)
        on the mesh; an energy inside a band raises ``ValueError``.
    plane_at, plane_axis : 3D lattices only: the plane k = Σ_j f_j b_j with f_{plane_axis}
        = plane_at held fixed (defaults 0.0 and 2), meshed over the other two reduced
        coordinates in cyclic order; the result is the Chern number of that plane oriented
        along b_{axis+1} × b_{axis+2}.

    Returns the Chern number as a Python ``int``.  Raises ``ValueError`` when the chosen bands
    touch the other bands on a mesh point (the Chern number is not defined at a gap closing) and
    warns (``RuntimeWarning``) when a plaquette carries a Berry flux close to π, i.e. the mesh is
    too coarse to trust the integer; then use a larger ``mesh``.
    """
    if not isinstance(model.domain, Lattice):
        raise ValueError(
            f"chern_number: '{model.name}' is a continuum (k·p) model; a Chern number needs a "
            "closed Brillouin zone, which only lattice models have. For a valley Chern number "
            "integrate the Berry curvature instead: C_v = (1/2π) ∫ d²k Σ_occupied Ω_n(k) with "
            "band_geometry(model, k).berry_curvature over a window around each valley "
            "(±1/2 per massive Dirac cone, docs/theory.md §3).")
    if isinstance(mesh, bool) or not isinstance(mesh, numbers.Integral) or mesh < 2:
        raise ValueError(f"chern_number: mesh must be an integer >= 2 (points per reciprocal vector), got {mesh!r}.")
    n = int(mesh)
    dim = model.dim
    if dim == 2:
        if plane_at is not None or plane_axis is not None:
            raise ValueError("chern_number: plane_at/plane_axis select a plane of a 3D lattice; leave them "
                             f"out for the 2D model '{model.name}'.")
    elif dim == 3:
        plane_at = 0.0 if plane_at is None else float(plane_at)
        plane_axis = 2 if plane_axis is None else plane_axis
        if isinstance(plane_axis, bool) or plane_axis not in (0, 1, 2):
            raise ValueError(f"chern_number: plane_axis must be 0, 1 or 2 (the reciprocal vector held fixed), "
                             f"got {plane_axis!r}.")
    else:  # pragma: no cover - the domain classes only allow 2 or 3
        raise ValueError(f"chern_number: unsupported dimension {dim}.")

    recip = jnp.asarray(model.reciprocal_vectors(), dtype=jnp.float64)   # rows b_j (1/Å)
    tau = jnp.asarray(model.orbital_positions(), dtype=jnp.float64)      # (m, d) Å
    if tau.shape[0] != model.block_size:
        raise ValueError(
            f"chern_number: '{model.name}' lists {tau.shape[0]} orbital positions but its blocks have "
            f"{model.block_size} orbitals; the lattice needs one position per orbital of a block.")

    frac = jnp.arange(n, dtype=jnp.float64) / n
    f1, f2 = jnp.meshgrid(frac, frac, indexing="ij")
    red = [f1.reshape(-1), f2.reshape(-1)]
    if dim == 3:
        # reduced coordinates (f_{j+1}, f_{j+2}) run over the mesh, f_j is fixed
        red.append(jnp.full((n * n,), plane_at, dtype=jnp.float64))
        basis = recip[jnp.asarray([(plane_axis + 1) % 3, (plane_axis + 2) % 3, plane_axis])]
    else:
        basis = recip
    kpts = jnp.stack(red, axis=-1) @ basis                                # (N², d)

    energies, vecs = _periodic_states(model, kpts, tau)
    idx = _select(bands, below, model.n_bands, energies)

    e = np.asarray(energies)
    chosen = np.zeros(model.n_bands, dtype=bool)
    chosen[list(idx)] = True
    if not chosen.all():
        gaps = np.abs(e[:, chosen][:, :, None] - e[:, ~chosen][:, None, :]).min(axis=(1, 2))
        worst = int(np.argmin(gaps))
        if gaps[worst] <= DEGENERACY_TOL:
            kk = np.asarray(kpts[worst])
            raise ValueError(
                f"chern_number: bands {list(idx)} touch another band at k = {np.round(kk, 6).tolist()} 1/Å "
                f"(gap {gaps[worst]:.2e} eV): the Chern number is not defined at a gap closing. Move the "
                "parameters off the phase boundary, or include the touching band in the set.")

    psi = vecs[:, :, jnp.asarray(idx)].reshape(n, n, model.n_bands, len(idx))
    flux = _plaquette_flux(psi)
    # reduced-coordinate loops run b1 -> b2; in 2D that is the (x, y) orientation only when
    # det(b1, b2) > 0.  In 3D the plane is oriented along b1 x b2 by definition.
    sign = float(np.sign(np.linalg.det(np.asarray(recip)))) if dim == 2 else 1.0
    raw = -sign * float(jnp.sum(flux)) / (2 * math.pi)
    if not math.isfinite(raw) or abs(raw - round(raw)) > 0.1:
        raise ValueError(
            f"chern_number: the lattice sum {raw!r} is not close to an integer: the chosen bands nearly "
            f"touch others on the {n}×{n} mesh. Increase mesh (e.g. mesh={2 * n}) or move off the gap closing.")
    worst_flux = float(jnp.max(jnp.abs(flux)))
    if worst_flux > _COARSE_FLUX:
        warnings.warn(
            f"chern_number: a plaquette of the {n}×{n} mesh carries Berry flux {worst_flux:.3f} rad "
            f"(close to π): the mesh does not resolve the curvature; repeat with a larger mesh "
            f"(e.g. mesh={2 * n}) to confirm the integer.", RuntimeWarning, stacklevel=2)
    return int(round(raw))


@jax.jit
def _plaquette_flux(psi):
    """Plaquette phases F (N, N) in (−π, π] from states psi (N, N, basis, nchosen)."""
    def link(axis):
        nxt = jnp.roll(psi, -1, axis=axis)
        ov = jnp.einsum("ijan,ijam->ijnm", jnp.conj(psi), nxt)
        return jnp.linalg.det(ov)

    u1, u2 = link(0), link(1)
    loop = u1 * jnp.roll(u2, -1, axis=0) * jnp.conj(jnp.roll(u1, -1, axis=1)) * jnp.conj(u2)
    return jnp.angle(loop)
