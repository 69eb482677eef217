"""k-space quadrature: where the k-points go and what each weighs.

Every rule returns nodes k (1/Å) and weights w (Å^-d) that already include the Brillouin-zone
measure d^dk/(2π)^d, so Σ w·X ≈ ∫[dk] X.

Periodic lattices — :func:`refined_lattice_nodes`: a uniform N^d grid in reduced coordinates
(offset by half a step so that high-symmetry points such as K are not sampled exactly), with a
quarter of its cells — those crossed by a Fermi contour of any requested μ (within the thermal
window) or holding a small gap (curvature hot spot) — split into 4×4 (3D: 2×2×2) sub-cells for the
Fermi-window integrands.  Fermi-sea integrands (density, anomalous Hall) keep the uniform rule,
whose periodic trapezoid accuracy a mixed-resolution rule would spoil, and refinement is skipped
when the flagged cells exceed the budget (a window covering much of the zone is smooth on the grid).  For an integrand
periodic and smooth over the zone this trapezoid rule converges faster than any power of 1/N;
Fermi-surface integrands converge once the spacing resolves k_BT/ħv.

Continuum (k·p) windows — :func:`ray_rule`: polar rays around each valley centre.  Along each ray
the radial integral is split at fixed "hot-spot" breakpoints (multiples of the model's curvature
scale Δ/ħv, where the Berry curvature lives) and at every Fermi crossing k_F of any band, with a
thermal window k_F ± W·k_BT/|∂ε/∂k| on either side (W = 36, e^{-36} ≈ 2e-16).  Each panel
carries Gauss–Legendre nodes; the last panel maps [k_last, ∞) to u ∈ [0, 1) by
k = k_last + s·u/(1−u), which integrates the slow 1/k³ curvature tail of a Dirac cone to
spectral accuracy (the infinite-domain value, no cutoff).  Crossings are bracketed on a probe
grid and located by bisection.  Mesh placement is a numerical choice, not physics: it is wrapped
in ``stop_gradient`` so derivatives are those of the integrand at fixed nodes.
"""
from __future__ import annotations

from dataclasses import dataclass

import jax
import jax.numpy as jnp
import numpy as np

from crosswind.models.band_model import BandModel
from crosswind.models.domain import Lattice

WINDOW = 36.0


@dataclass(frozen=True)
class Resolution:
    """One refinement level.  Lattice: ``n`` points per reciprocal vector.  Continuum:
    ``n`` angles per centre and ``nodes`` Gauss–Legendre nodes per radial panel."""

    n: int
    nodes: int = 0


def lattice_levels(dim: int):
    base = (24, 48, 96, 192, 384, 768) if dim == 2 else (12, 18, 24, 36, 48, 64)
    return tuple(Resolution(n) for n in base)


def ray_levels():
    return tuple(Resolution(n, q) for n, q in ((24, 12), (48, 20), (96, 32), (192, 48), (384, 64)))


def lattice_nodes(model: BandModel, res: Resolution, params=None):
    """``(n, node_fn)`` for the uniform offset grid over the (possibly strained) zone; node_fn maps
    flat indices to (k, w) on the fly, so the mesh never exists in memory as a whole."""
    dim, n = model.dim, res.n
    b = jax.lax.stop_gradient(model.reciprocal_vectors(params))
    vol = jnp.abs(jnp.linalg.det(b)) / (2 * jnp.pi) ** dim
    total = n ** dim

    def node_fn(idx):
        digits = []
        rest = idx
        for _ in range(dim):
            digits.append(rest % n)
            rest = rest // n
        red = (jnp.stack(digits[::-1], axis=-1).astype(jnp.float64) + 0.5) / n
        return red @ b, jnp.full(idx.shape, 1.0) * (vol / total)

    return total, node_fn


REFINE_SUB = {2: 4, 3: 2}      # sub-cells per direction in a refined cell
REFINE_SHARE = 0.25           # share of coarse cells that may be refined


def _lattice_scores(model, res, mu, kt, params=None, chunk=4096):
    """Refinement score of every coarse cell (negative: needs refinement), chunked, and for every
    condition the largest band slope |∇ε| (eV Å) met near its Fermi contour (0: no contour).

    A cell needs refinement when some band passes within the thermal window of some μ across the
    cell (|ε−μ| < 36 k_BT + 2|∇ε|h, h the cell diameter) — the Fermi contour — or when two
    adjacent bands come closer than their change across the cell — a small gap, where the Berry
    curvature is concentrated."""
    p = jax.lax.stop_gradient(model.params if params is None else params)
    mu, kt = jax.lax.stop_gradient(mu), jax.lax.stop_gradient(kt)
    total, node_fn = lattice_nodes(model, res, p)
    b = jax.lax.stop_gradient(model.reciprocal_vectors(p))
    h = jnp.sum(jnp.sqrt(jnp.sum(b * b, axis=-1))) / res.n
    band_e = lambda q: energies_at(model, q, p)

    def score(q):
        e = band_e(q)
        g = jnp.sqrt(jnp.sum(jax.jacfwd(band_e)(q) ** 2, axis=-1))                 # (nb,)
        reach = WINDOW * kt[None, :] + 2 * g[:, None] * h
        dist = jnp.abs(e[:, None] - mu[None, :])
        fermi = (dist - reach) / (reach + 1e-12)
        slope = jnp.max(jnp.where(dist < reach, g[:, None], 0.0), axis=0)           # (P,)
        if e.shape[0] > 1:
            spread = 2 * (g[1:] + g[:-1]) * h
            gap = ((e[1:] - e[:-1]) - spread) / (spread + 1e-12)
            return jnp.minimum(jnp.min(fermi), jnp.min(gap)), slope
        return jnp.min(fermi), slope

    chunk = min(chunk, total)
    nchunks = -(-total // chunk)

    def body(top, c):
        idx = c * chunk + jnp.arange(chunk)
        kk, _w = node_fn(jnp.minimum(idx, total - 1))
        sc, slope = jax.vmap(score)(kk)
        return jnp.maximum(top, jnp.max(slope, axis=0)), jnp.where(idx < total, sc, jnp.inf)

    slope, sc = jax.lax.scan(body, jnp.zeros(mu.shape), jnp.arange(nchunks))
    return sc.reshape(-1)[:total], slope


def refined_lattice_rule(model: BandModel, res: Resolution, mu, kt, params=None):
    """Uniform offset grid plus a fixed budget of refined cells (REFINE_SHARE of the coarse cells,
    the most urgent by :func:`_lattice_scores`, each split into REFINE_SUB^d sub-cells) placed on the
    Fermi contours of all requested μ and on small-gap hot spots.  Returns ``(n, node_fn, window)``:
    ``window[p]`` is the finest node spacing on the Fermi contour of condition p over the half-width
    of its thermal window, h·max|∇ε|/(W k_BT) (W = 36); above 1 the window falls between the nodes
    and the Fermi-window integrands are not resolved (T → 0 at a fixed level)."""
    dim, n = model.dim, res.n
    p = model.params if params is None else params
    total, coarse = lattice_nodes(model, res, p)
    m = REFINE_SUB[dim]
    sub = m ** dim
    budget = max(1, int(REFINE_SHARE * total))
    mu1, kt1 = jnp.atleast_1d(mu), jnp.atleast_1d(kt)
    scores, slope = _lattice_scores(model, res, mu1, kt1, p)
    _, chosen = jax.lax.top_k(-scores, budget)
    chosen = jax.lax.stop_gradient(chosen)
    # refine only when every flagged cell fits the budget: otherwise the thermal window covers much
    # of the zone, the integrand is smooth on the grid scale and the uniform (spectrally accurate)
    # rule is the better one
    active = jnp.sum(scores < 0) <= budget
    refined = jnp.zeros((total,), dtype=bool).at[chosen].set(active)
    b = jax.lax.stop_gradient(model.reciprocal_vectors(p))
    step = jnp.max(jnp.sqrt(jnp.sum(b * b, axis=-1))) / n / jnp.where(active, m, 1)
    window = jax.lax.stop_gradient(step * slope / (WINDOW * kt1))
    grid = np.stack(np.meshgrid(*([(np.arange(m) + 0.5) / m - 0.5] * dim), indexing="ij"), -1).reshape(-1, dim)
    offsets = jnp.asarray(grid) / n                                              # reduced, (sub, dim)

    def node_fn(idx):
        is_coarse = idx < total
        safe = jnp.minimum(idx, total - 1)
        kc, wfull = coarse(safe)
        wc = jnp.where(refined[safe], 0.0, wfull)
        j = jnp.maximum(idx - total, 0)
        cell = chosen[jnp.minimum(j // sub, budget - 1)]
        kcell, wcell = coarse(cell)
        kf = kcell + offsets[j % sub] @ b
        k = jnp.where(is_coarse[:, None], kc, kf)
        w = jnp.where(is_coarse, wc, jnp.where(active, wcell / sub, 0.0))
        # Fermi-sea integrands use the plain uniform rule (coarse nodes at full weight)
        w_sea = jnp.where(is_coarse, wfull, 0.0)
        return k, w, w_sea

    return total + budget * sub, node_fn, window


def refined_lattice_nodes(model: BandModel, res: Resolution, mu, kt, params=None):
    """``(n, node_fn)`` of :func:`refined_lattice_rule`."""
    total, node_fn, _window = refined_lattice_rule(model, res, mu, kt, params)
    return total, node_fn


def lattice_rule(model: BandModel, res: Resolution, params=None, mu=None, kt=None):
    """Explicit arrays: ``(k, w)`` of the uniform grid, or with ``mu``/``kt`` the rule that
    ``response`` uses, ``(k, w_surface, w_sea)`` (Fermi-window and Fermi-sea weights)."""
    if mu is None:
        total, node_fn = lattice_nodes(model, res, params)
    else:
        total, node_fn = refined_lattice_nodes(model, res, mu, kt, params)
    return node_fn(jnp.arange(total))


def _gauss(n):
    x, w = np.polynomial.legendre.leggauss(n)
    return jnp.asarray(0.5 * (x + 1.0)), jnp.asarray(0.5 * w)


PROBE = 160
MAX_CROSSINGS = 2
HOTSPOTS = (0.5, 2.0, 8.0)


def probe_midpoints(s, count: int = PROBE):
    """Midpoints u_i = (i + ½)/count of [0, 1) mapped onto a ray by the compactification
    k = 4s·u/(1 − u) (s: the model's momentum scale, Å⁻¹).  Returns the radii and the midpoint
    weights dk/du / count = 4s/(1 − u)² / count."""
    u = (jnp.arange(count, dtype=jnp.float64) + 0.5) / count
    return 4.0 * s * u / (1.0 - u), 4.0 * s / (1.0 - u) ** 2 / count


def probe_radii(s):
    """Probe radii of a ray used to bracket band crossings: k = 0, then :func:`probe_midpoints`
    (PROBE + 1 radii, ascending)."""
    return jnp.concatenate([jnp.zeros(1), probe_midpoints(s)[0]])


def energies_at(model: BandModel, k, params, ordered: bool = True):
    """All band energies at one k (ascending; block by block with ``ordered=False``), cheap path
    (no derivatives)."""
    if model.dvector is not None:
        d0, d = model.dvector(k, params)
        e = jnp.sqrt(jnp.sum(d * d, axis=-1))
        w = jnp.stack([d0 - e, d0 + e], axis=-1).reshape(-1)
    else:
        w = jnp.linalg.eigvalsh(model.hamiltonian(k, params)).reshape(-1)
    return jnp.sort(w) if ordered else w


def ray_rule(model: BandModel, res: Resolution, mu, kt, params=None, with_window: bool = False):
    """Polar quadrature for one condition (scalar ``mu`` eV, ``kt`` eV).  Returns (k, w), and with
    ``with_window`` also the angular resolution ratio of :func:`_angular_ratio` (above 1 the
    Fermi-window integrands are not resolved by the rays)."""
    dom = model.domain
    if dom.dim != 2:
        raise NotImplementedError("continuum integration is implemented for 2D models; "
                                  "use a lattice model for 3D responses")
    p = model.params if params is None else params
    p = jax.lax.stop_gradient(p)
    mu = jax.lax.stop_gradient(mu)
    kt = jax.lax.stop_gradient(kt)
    s = dom.scale_for(p)
    nth = res.n
    theta = (jnp.arange(nth, dtype=jnp.float64) + 0.5) * (2 * jnp.pi / nth)
    dirs = jnp.stack([jnp.cos(theta), jnp.sin(theta)], axis=-1)          # (nth, 2)
    centers = jnp.asarray(np.asarray(dom.centers, dtype=float))           # (C, 2)
    # probe grid along a ray (compactified)
    kr = probe_radii(s)                                                   # (PROBE+1,)

    def per_ray(c, dvec):
        pts = c[None, :] + kr[:, None] * dvec[None, :]
        e = jax.vmap(lambda q: energies_at(model, q, p))(pts) - mu        # (PROBE+1, nb)
        sgn = e > 0
        cross = sgn[1:] != sgn[:-1]                                       # (PROBE, nb)
        lo = jnp.broadcast_to(kr[:-1, None], cross.shape)
        hi = jnp.broadcast_to(kr[1:, None], cross.shape)
        band = jnp.broadcast_to(jnp.arange(e.shape[1])[None, :], cross.shape)
        key = jnp.where(cross, lo, jnp.inf).reshape(-1)
        order = jnp.argsort(key)[:MAX_CROSSINGS]
        found = jnp.isfinite(key[order])
        a0, b0, nb_ = lo.reshape(-1)[order], hi.reshape(-1)[order], band.reshape(-1)[order]

        def band_e(kk, n):
            return energies_at(model, c + kk * dvec, p)[n] - mu

        def bisect(a, b, n):
            fa = band_e(a, n)

            def body(_, ab):
                a, b, fa = ab
                m = 0.5 * (a + b)
                fm = band_e(m, n)
                left = jnp.sign(fm) == jnp.sign(fa)
                return (jnp.where(left, m, a), jnp.where(left, b, m), jnp.where(left, fm, fa))

            a, b, _ = jax.lax.fori_loop(0, 48, body, (a, b, fa))
            kf = 0.5 * (a + b)
            h = 1e-6 * jnp.maximum(kf, s)
            slope = jnp.abs(band_e(kf + h, n) - band_e(jnp.maximum(kf - h, 0.0), n)) / (
                kf + h - jnp.maximum(kf - h, 0.0))
            return kf, slope

        kf, slope = jax.vmap(bisect)(a0, b0, nb_)
        width = WINDOW * kt / jnp.maximum(slope, 1e-12)
        return kf, width, found, nb_

    def per_center(c):
        return jax.vmap(lambda dv: per_ray(c, dv))(dirs)

    kf, width, found, bands = jax.vmap(per_center)(centers)             # (C, nth, X)
    # crossings that were not found collapse onto k = 0 (zero-width panels)
    kf_s = jnp.where(found, kf, 0.0)
    order = jnp.argsort(kf_s, axis=-1)
    srt = jnp.take_along_axis(kf_s, order, axis=-1)
    wid_s = jnp.take_along_axis(jnp.where(found, width, 0.0), order, axis=-1)
    # keep each thermal window inside half the distance to its neighbours (and k >= 0)
    prev = jnp.concatenate([jnp.zeros(srt.shape[:-1] + (1,)), srt[..., :-1]], axis=-1)
    nxt = jnp.concatenate([srt[..., 1:], jnp.full(srt.shape[:-1] + (1,), jnp.inf)], axis=-1)
    room = 0.45 * jnp.minimum(srt - prev, jnp.where(nxt > srt, nxt - srt, jnp.inf))
    room = jnp.where(srt - prev > 0, room, 0.45 * jnp.minimum(srt, jnp.where(nxt > srt, nxt - srt, jnp.inf)))
    wid_s = jnp.minimum(wid_s, room)
    hot = jnp.broadcast_to(jnp.asarray(HOTSPOTS) * s, srt.shape[:-1] + (len(HOTSPOTS),))
    bps = jnp.concatenate([jnp.zeros(srt.shape[:-1] + (1,)), hot, srt - wid_s, srt, srt + wid_s], axis=-1)
    bps = jnp.sort(jnp.maximum(bps, 0.0), axis=-1)                        # (C, nth, B)
    x, wx = _gauss(res.nodes)
    a, b = bps[..., :-1], bps[..., 1:]
    r = a[..., None] + (b - a)[..., None] * x[None, None, None, :]   # (C, nth, B-1, q)
    wr = (b - a)[..., None] * wx[None, None, None, :]
    # tail [k_last, ∞): k = k_last + t u/(1-u)
    last = bps[..., -1:]
    t = jnp.maximum(last, s)
    ut, wut = _gauss(res.nodes)
    ut, wut = ut[None, None, :], wut[None, None, :]
    rt = last + t * ut / (1.0 - ut)
    wrt = t * wut / (1.0 - ut) ** 2
    r = jnp.concatenate([r.reshape(r.shape[:2] + (-1,)), rt], axis=-1)   # (C, nth, R)
    wr = jnp.concatenate([wr.reshape(wr.shape[:2] + (-1,)), jnp.broadcast_to(wrt, rt.shape)], axis=-1)
    pts = centers[:, None, None, :] + r[..., None] * dirs[None, :, None, :]
    wts = wr * r * (2 * jnp.pi / nth) / (2 * jnp.pi) ** 2
    out = (jax.lax.stop_gradient(pts.reshape(-1, 2)), jax.lax.stop_gradient(wts.reshape(-1)))
    if with_window:
        nb = energies_at(model, centers[0], p).shape[0]                  # bands per k (static)
        out += (jax.lax.stop_gradient(_angular_ratio(kf, width, found, bands, nb, nth)),)
    return out


def _angular_ratio(kf, width, found, bands, n_bands, nth):
    """Angular resolution of the rays on the Fermi contours they do not resolve by construction.

    Along a ray the panels sit on the thermal window, so a contour that encloses its centre is
    resolved at any temperature (k_F(θ) is smooth).  A contour that does not enclose the centre
    (a pocket seen from outside: only some rays cross it) or that passes within its thermal window
    of the centre (k_F < window) is tangent to some rays: there the occupation, as a function of
    the angle, changes over Δθ ≈ window / pocket size, which the angular spacing 2π/n must resolve.
    Returns max over such (centre, band) of (largest k_F)·(2π/n) / (smallest window); above 1 the
    Fermi-window integrands are not resolved (T → 0 at a fixed level; docs/theory.md §14)."""
    ratios = []
    for b in range(n_bands):
        mine = found & (bands == b)                                       # (C, nth, X)
        hit = jnp.any(mine, axis=-1)                                      # (C, nth)
        partial = jnp.any(hit, axis=-1) & ~jnp.all(hit, axis=-1)          # (C,)
        through = jnp.any(mine & (kf < width), axis=(-2, -1))
        reach = jnp.max(jnp.where(mine, kf, 0.0), axis=(-2, -1))
        narrow = jnp.min(jnp.where(mine, width, jnp.inf), axis=(-2, -1))
        r = reach * (2 * jnp.pi / nth) / jnp.maximum(narrow, 1e-300)
        ratios.append(jnp.max(jnp.where(partial | through, r, 0.0)))
    return jnp.max(jnp.stack(ratios))


def node_count(model: BandModel, res: Resolution) -> int:
    if isinstance(model.domain, Lattice):
        total = res.n ** model.dim
        return total + max(1, int(REFINE_SHARE * total)) * REFINE_SUB[model.dim] ** model.dim
    panels = len(HOTSPOTS) + 3 * MAX_CROSSINGS
    return len(model.domain.centers) * res.n * (panels + 1) * res.nodes
