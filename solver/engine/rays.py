"""Energy-resolved integration of continuum (k·p) models: one set of rays for every condition.

A continuum model lives on the whole plane around each valley centre.  The node quadrature of
:mod:`crosswind.solver.engine.mesh` builds polar rays per condition, with Gauss panels around that
condition's Fermi crossings, so a sweep of P conditions costs P meshes.  This module builds one
ray set per call for all conditions together and reduces each condition to a sum over energy
knots (docs/theory.md §14.3):

* **Energy breakpoints.**  A graded list e_0 < e_1 < … covers the union of the thermal windows
  μ_p ± (W+2)·k_BT_p of the conditions, with spacing c·min{k_BT_p : ε within the window of p}:
  fine around cold conditions, coarser where only hot ones reach (``breakpoints``).
* **Radial panels.**  Along each ray (angles (i+½)·2π/n around each centre) the crossings of every
  breakpoint by every band are bracketed on a compactified probe grid and refined by bisection;
  together with fixed geometric breakpoints s·2^{m/2} (s the model's curvature scale) they split
  the ray into panels, each carrying Gauss–Legendre nodes; the last panel maps [k_last, ∞) to
  [0, 1) (the 1/k³ curvature tail of a Dirac cone to spectral accuracy, as in the node rule).
  Across a window panel a band changes by at most one breakpoint spacing, so every condition's
  occupation factor is smooth on every panel: the rule resolves all conditions at once.
* **Energy knots.**  Every node deposits w·A (A the geometric factors of
  :func:`crosswind.solver.engine.ladder.point_factors`) onto R knot tables of spacing δ_r = δ_0·2^r,
  δ_0 = k_BT_min/ρ, with the four moment-preserving cubic Lagrange weights of
  :mod:`crosswind.solver.engine.ladder`; a condition reads the table whose spacing is about k_BT_p/ρ, so
  its sum has the same short length for any temperature.  States below the tables are fully
  occupied for every condition, states above empty.
* **Fermi-sea kernels.**  Density and the Fermi-sea dipole need f0 − θ(band filled at
  neutrality), which in a continuum model is not f0 minus a finite constant; the filled bands are
  therefore deposited into separate "hole" columns and enter as −(1 − f0).  The anomalous Hall
  kernel Σ f0 Ω takes every occupied state, including the whole valence band below the tables.
* **Cold conditions.**  Below ``t_res`` (per resolution) a condition is extrapolated in T² from the
  sums at t_res and 2t_res (Sommerfeld), with the spread against the extrapolation from 2t_res and
  4t_res added to its error; T = 0 is the same formula.

Placement (rays, breakpoints, knots) is wrapped in ``stop_gradient``; μ, T, τ and ω enter only the
knot sums, so their derivatives are exact derivatives of those sums, and model parameters act
through the geometry at the placed nodes.  The error estimate is |fine − coarse| between two
resolutions (as for the node quadrature), plus the extrapolation spread; a plan whose panel
slots or knot window do not hold the conditions, or whose breakpoints and knot tables do not
resolve a condition's window (a plan reused at another T or μ, :func:`_covered`), reports an
infinite error (``overflow``).
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np

from crosswind.models.band_model import BandModel
from crosswind.models.domain import Lattice
from crosswind.models.units import KB_EVK as KB
from crosswind.solver.engine.ladder import (
    EDGE_SAFETY,
    SHARED_MIN,
    TAIL_SAFETY,
    Cols,
    _kernel_sums,
    _lagrange,
    _occupations,
    column_values,
    edge_distance,
    factor_layout,
    knot_contract,
    point_factors,
)
from crosswind.solver.engine.mesh import PROBE, energies_at, probe_radii
from crosswind.solver.pytrees import pytree_dataclass

W = 20.0                     # window half-width in k_BT (neglected weight ~ e^-20)
BISECT = 30                  # bisection steps per crossing (2^-30 of a probe interval)
GEOMETRIC = tuple(2.0 ** (m / 2.0) for m in range(-8, 9))     # fixed breakpoints in units of s
PAD_ENERGY = 1e9             # padding breakpoints (eV): never crossed

#: per resolution: (angles per centre, Gauss nodes per panel, breakpoint spacing c in k_BT,
#: knots per k_BT rho, extrapolation temperature t_res in K)
RESOLUTIONS = ((24, 5, 3.0, 6.0, 2.0), (48, 6, 2.5, 8.0, 1.0), (96, 8, 2.0, 12.0, 0.5),
               (192, 10, 1.5, 16.0, 0.25), (384, 12, 1.0, 20.0, 0.125))


@dataclass(frozen=True)
class RayPlan:
    """Static shape of one ray integration: ``angles`` rays per centre, ``nodes`` Gauss nodes per
    panel, ``levels`` energy breakpoints (padded), ``slots`` crossing panels kept per ray,
    ``knots`` per table, ``tables`` knot tables (spacings δ_0·2^r), ``rho``, ``t_res`` (K),
    whether some condition is colder than ``t_res`` (``extrapolate``) and the breakpoint spacing
    ``spacing`` (c, in units of a condition's k_BT; inf: unchecked)."""

    angles: int
    nodes: int
    levels: int
    slots: int
    knots: int
    tables: int
    rho: float
    t_res: float
    extrapolate: bool = False
    spacing: float = float("inf")
    satellites: int = 0

    @property
    def panels(self) -> int:
        # with satellites every ray also breaks where it meets their circles (_circle_breaks)
        return len(GEOMETRIC) + self.slots + circle_breaks(self.satellites)

    def nodes_per_ray(self) -> int:
        return self.panels * self.nodes + 2 * self.nodes

    def reusable(self, n_bands: int) -> RayPlan:
        """This plan with the :data:`SLOT_MARGIN` for reuse at other parameters (a call's own
        run uses the crossings counted at its parameters alone)."""
        wide = max(self.slots, _bucket(int(self.slots * SLOT_MARGIN), 16))
        return dataclasses.replace(self, slots=min(wide, 2 * n_bands * self.levels))

    def k_points(self, centres: int) -> int:
        """Points where the band geometry is evaluated (probe and bisection evaluate energies only):
        the rays of the model's ``centres`` and of the plan's satellites."""
        return (centres + self.satellites) * self.angles * self.nodes_per_ray()


@pytree_dataclass
class RayGrid:
    """The placement arrays of a plan (leaves; new values never recompile): energy breakpoints
    (levels,), the first knot ``e_lo`` and the finest knot spacing ``delta`` (eV), and the
    satellite centres (S, 3): k_x, k_y (1/Å) and the partition radius R (:func:`satellites`;
    None without)."""

    breakpoints: jax.Array
    e_lo: jax.Array
    delta: jax.Array
    satellites: jax.Array | None = None


def _gauss(n):
    x, w = np.polynomial.legendre.leggauss(n)
    return jnp.asarray(0.5 * (x + 1.0)), jnp.asarray(0.5 * w)


def _bucket(n, q):
    return int(-(-max(n, 1) // q) * q)


# --------------------------------------------------------------------------------------------
# planning (concrete values)
# --------------------------------------------------------------------------------------------

def effective_windows(mu, kt, t_res):
    """(μ, k_BT) pairs whose windows the rule must resolve: every condition at
    max(T, t_res), and the extrapolation temperatures 2·t_res, 4·t_res of cold ones."""
    mu, kt = np.asarray(mu, float).ravel(), np.asarray(kt, float).ravel()
    ktr = KB * t_res
    out = [np.stack([mu, np.maximum(kt, ktr)], -1)]
    cold = kt < ktr
    if np.any(cold):
        for f in (2.0, 4.0):
            out.append(np.stack([mu[cold], np.full(cold.sum(), f * ktr)], -1))
    return np.unique(np.concatenate(out), axis=0)


def breakpoints(mu, kt, t_res, spacing):
    """Graded energy breakpoints (eV) over the union of the windows μ ± (W+2)k_BT, with spacing
    ``spacing``·(the smallest k_BT whose window contains the energy); a step never passes the start
    of a window of finer spacing ahead (a cold window nested in a hot one is always resolved)."""
    win = effective_windows(mu, kt, t_res)
    m, k = win[:, 0], win[:, 1]
    lo, hi = m - (W + 2) * k, m + (W + 2) * k
    e, stop = float(lo.min()), float(hi.max())
    out = [e]
    while e < stop:
        inside = (lo <= e) & (hi >= e)
        if np.any(inside):
            finest = float(k[inside].min())
            step = spacing * finest
            ahead = (lo > e) & (k < finest)
            if np.any(ahead):
                step = min(step, float(lo[ahead].min()) - e)
        else:                         # a gap between windows: jump to the next one
            nxt = lo[lo > e]
            step = float(nxt.min() - e) if nxt.size else stop - e
        e = min(e + step, stop)
        out.append(e)
    return np.asarray(out)


#: crossing panels a plan keeps per ray beyond the most crossings counted on its rays, for reuse
#: at other parameters (``resolution.plan`` under ``jax.grad`` or in a fit); a call's own concrete
#: run needs no margin (it counts at its own parameters and repeats with a new plan on overflow)
SLOT_MARGIN = 1.25


def slot_count(found: int, margin: float = SLOT_MARGIN) -> int:
    """Crossing panels per ray for ``found`` crossings on the busiest ray: ``margin``·found + 4,
    rounded up to a multiple of 16 (coarse, so that a sweep's new values seldom change the shape
    and recompile)."""
    return _bucket(int(found * margin) + 4, 16)


#: satellite centres (band touchings away from the model's centre; docs/theory.md §14.3, item 6):
#: probe directions of the search, the largest gap that counts as a touching (in units of the
#: breakpoint spacing c·k_BT of the coldest window), at most this many, the partition radius R as
#: this share of the distance to the nearest other centre, and the circles (in units of R) where
#: every ray gets a breakpoint (the partition weight changes between R/2 and R)
SAT_ANGLES = 90
SAT_GAP = 2.0
SAT_MAX = 8
SAT_SHARE = 0.45
SAT_RADII = (0.5, 0.75, 1.0)
#: satellites whose circles one ray keeps as breakpoints (a ray from the centre meets at most one
#: disk when the satellites are 60° apart, as in bilayer graphene; a satellite's own rays keep
#: only its own circles)
SAT_PER_RAY = 2
#: a touching: the refined gap below this (eV; a cone apex refines to rounding level, a finite gap
#: does not, whatever the temperature); steps of the refining grid (:func:`_zoom_to_touching`);
#: smallest partition radius in units of the model's wavevector scale s (the satellite's rays find
#: their crossings on the model's probe grid, whose spacing near a centre is about s/40)
SAT_TOUCH = 1e-6
ZOOM_STEPS = 96
SAT_MIN_RADIUS = 0.125
#: a touching is a satellite when its energy lies within this many k_BT of some condition's μ
#: (farther, the weight −∂f0/∂ε of its neighbourhood is below e^{−12} ≈ 6e-6)
SAT_REACH = 12.0


def circle_breaks(satellites: int) -> int:
    """Breakpoints per ray where it meets satellite circles (:func:`_circle_breaks`)."""
    return 2 * len(SAT_RADII) * min(satellites, SAT_PER_RAY)


@partial(jax.jit, static_argnames=("angles",))
def _probe_blocks(model, params, c, *, angles):
    """Band energies block by block on a polar probe grid around ``c``: points (A, R, 2) and
    energies (A, R, blocks, block size)."""
    kr = probe_radii(model.domain.scale_for(params))[1::2]
    pts = c[None, None, :] + kr[None, :, None] * _directions(angles)[:, None, :]
    e = jax.vmap(jax.vmap(lambda q: energies_at(model, q, params, ordered=False)))(pts)
    return pts, e.reshape(e.shape[:2] + (model.blocks, model.block_size))


@jax.jit
def _zoom_to_touching(model, params, k0, block, band, step):
    """Positions (N, 2) of the smallest gap between bands ``band``, ``band`` + 1 of ``block`` near
    ``k0`` (N, 2), the gaps there and the pairs' mean energies (eV): a 5×5 grid of spacing ``step``
    around each point, moved to its smallest gap, and halved when its centre is already the
    smallest, ``ZOOM_STEPS`` times."""
    offs = jnp.stack(jnp.meshgrid(jnp.arange(-2.0, 3.0), jnp.arange(-2.0, 3.0), indexing="ij"), -1).reshape(-1, 2)

    def pair(k, b, n):
        e = energies_at(model, k, params, ordered=False).reshape(model.blocks, model.block_size)[b]
        return e[n + 1] - e[n], 0.5 * (e[n + 1] + e[n])

    def body(_, state):
        k, h = state
        pts = k[:, None, :] + h[:, :, None] * offs[None, :, :]                        # (N, 25, 2)
        g = jax.vmap(lambda q, b, n: jax.vmap(lambda x: pair(x, b, n)[0])(q))(pts, block, band)
        i = jnp.argmin(g, axis=1)
        best = jnp.take_along_axis(pts, i[:, None, None], axis=1)[:, 0]
        # the grid shrinks only once its centre is the best point (an anisotropic cone can lead a
        # shrinking grid away along its soft direction)
        centred = (i == 12) | (g[:, 12] <= jnp.take_along_axis(g, i[:, None], axis=1)[:, 0])
        return best, jnp.where(centred[:, None], 0.5 * h, h)

    k, _ = jax.lax.fori_loop(0, ZOOM_STEPS, body, (k0, step))
    return (k,) + jax.vmap(pair)(k, block, band)


def satellites(model: BandModel, params, mu, kt, t_res, spacing) -> np.ndarray:
    """Band touchings away from the model's (single) centre whose energy lies within
    ``SAT_REACH``·k_BT of some condition's μ: (S, 3) rows k_x, k_y (1/Å) and a partition radius R (1/Å).

    A touching away from the centre (the satellite Dirac points of trigonal warping in bilayer
    graphene) puts a cone apex inside the window where the rays from the centre pass at every
    distance: the band velocity turns round there, and the angular rule converges only as h².
    Such a point becomes a centre of its own rays (polar coordinates about a cone apex are
    smooth), with the partition of unity ψ_j(|k − k_j|/R_j) for its rays and 1 − Σ_j ψ_j for the
    centre's (ψ = 1 within R/2, 0 beyond R, C∞ between: :func:`_partition`).  Search: local minima
    of each adjacent pair's gap within a block on a polar probe grid, refined by a shrinking 5×5
    grid (:func:`_zoom_to_touching`); a touching is kept when its refined gap is below ``SAT_TOUCH``
    (and ``SAT_GAP``·``spacing``·k_BT_min), it lies farther than s/4 from the centre (s the
    model's wavevector scale) and its energy within ``SAT_REACH``·k_BT of some condition's μ.  R is ``SAT_SHARE`` of the
    distance to the nearest other centre or touching, and a touching with R below
    ``SAT_MIN_RADIUS``·s is left to the centre's rays."""
    dom = model.domain
    if isinstance(dom, Lattice) or model.dim != 2 or len(dom.centers) != 1 or model.block_size < 2:
        return np.zeros((0, 3))
    p = jax.lax.stop_gradient(params)
    win = effective_windows(mu, kt, t_res)
    lo = float(np.min(win[:, 0] - (W + 2) * win[:, 1]))
    hi = float(np.max(win[:, 0] + (W + 2) * win[:, 1]))
    tol = SAT_GAP * spacing * float(win[:, 1].min())
    c = np.asarray(dom.centers[0], dtype=float)
    s = float(dom.scale_for(p))
    pts, e = (np.asarray(a) for a in _probe_blocks(model, p, jnp.asarray(c), angles=SAT_ANGLES))
    gap = e[..., 1:] - e[..., :-1]                                   # (A, R, blocks, pairs)
    mid = 0.5 * (e[..., 1:] + e[..., :-1])
    # local minima over the 3×3 neighbourhood (periodic in angle, not at the radial ends)
    padded = np.concatenate([gap[-1:], gap, gap[:1]], axis=0)
    local = np.ones(gap.shape, dtype=bool)
    local[:, 0] = local[:, -1] = False
    rise = np.zeros(gap.shape)
    for da in (-1, 0, 1):
        for dr in (-1, 0, 1):
            if da or dr:
                shifted = np.roll(padded, -dr, axis=1)[1 + da:1 + da + gap.shape[0]]
                local &= gap <= shifted
                rise = np.maximum(rise, shifted - gap)
    # a touching next to a probe point leaves a gap there no larger than the gap's rise to the
    # neighbouring points (it grows linearly away from the touching); a finite gap does not.
    # A pair degenerate everywhere (a Kramers pair inside one block) has no touching to find
    split = np.max(gap, axis=(0, 1)) > 10.0 * tol
    near = local & split & (gap <= rise + tol) & (mid >= lo - gap) & (mid <= hi + gap)
    cand = np.argwhere(near)[np.argsort(gap[near])[:4 * SAT_MAX]]
    if not len(cand):
        return np.zeros((0, 3))
    cand = np.concatenate([cand, np.repeat(cand[:1], 4 * SAT_MAX - len(cand), axis=0)])   # one compiled shape
    a, r, b, n = cand.T
    # start grid spacing: the probe spacing there (angular and radial), so the touching is inside
    kr = np.linalg.norm(pts[a, r] - c, axis=1)
    step = np.maximum(kr * 2 * np.pi / SAT_ANGLES, np.linalg.norm(pts[a, r + 1] - pts[a, r - 1], axis=1))
    ks, gs, levels = (np.asarray(x) for x in _zoom_to_touching(model, p, jnp.asarray(pts[a, r]), jnp.asarray(b),
                                                                jnp.asarray(n), jnp.asarray(step[:, None])))
    found = []
    for k, g, level in zip(ks, gs, levels):
        reach = np.any(np.abs(level - win[:, 0]) <= SAT_REACH * win[:, 1])
        if g < min(tol, SAT_TOUCH) and reach and np.linalg.norm(k - c) > 0.25 * s:
            if all(np.linalg.norm(k - q) > 1e-3 * s for q in found):
                found.append(k)
    if not found:
        return np.zeros((0, 3))
    ks = np.asarray(found)
    # R from every touching found, so that no disk holds one; a satellite too close to another
    # touching for its disk to be resolved stays with the centre's rays (as without satellites)
    others = np.concatenate([c[None], ks])
    radius = []
    for j, k in enumerate(ks):
        d = np.linalg.norm(others - k, axis=1)
        d[j + 1] = np.inf
        radius.append(SAT_SHARE * d.min())
    out = np.concatenate([ks, np.asarray(radius)[:, None]], axis=1)
    return out[out[:, 2] >= SAT_MIN_RADIUS * s][:SAT_MAX]


def _partition(t):
    """ψ(t): 1 for t ≤ ½, 0 for t ≥ 1, C∞ between (every derivative vanishes at both ends)."""
    u = jnp.clip(2.0 * t - 1.0, 0.0, 1.0)
    a = jnp.where(u < 1.0, jnp.exp(-1.0 / jnp.where(u < 1.0, 1.0 - u, 1.0)), 0.0)
    b = jnp.where(u > 0.0, jnp.exp(-1.0 / jnp.where(u > 0.0, u, 1.0)), 0.0)
    return a / (a + b)


def plan_satellites(model: BandModel, params, mu, kt) -> np.ndarray:
    """:func:`satellites` for the conditions (μ, k_BT), searched with the settings of resolution 0
    (the widest windows and the largest gap tolerance), so that every resolution of a call uses
    the same satellites and the same partition."""
    return satellites(model, params, mu, kt, RESOLUTIONS[0][4], RESOLUTIONS[0][2])


def make_plan(model: BandModel, params, mu, kt, resolution: int, slots: int | None = None,
              margin: float = SLOT_MARGIN, sats: np.ndarray | None = None):
    """Plan and grid for the conditions (μ, k_BT) (eV) at ``resolution`` (index into
    ``RESOLUTIONS``).  ``slots`` (crossing panels per ray) defaults to
    :func:`slot_count` of a count on the model with ``margin``; ``sats`` (S, 3) to
    :func:`plan_satellites` of the conditions."""
    angles, nodes, c, rho, t_res = RESOLUTIONS[resolution]
    bps = breakpoints(mu, kt, t_res, c)
    nlev = _bucket(len(bps), 16)
    padded = np.concatenate([bps, np.full(nlev - len(bps), PAD_ENERGY)])
    win = effective_windows(mu, kt, t_res)
    kt_min, kt_max = float(win[:, 1].min()), float(win[:, 1].max())
    delta = kt_min / rho
    tables = int(np.floor(np.log2(kt_max / kt_min))) + 1
    coarsest = delta * 2 ** (tables - 1)
    e_lo = float(bps[0]) - 8 * coarsest
    span = float(bps[-1]) + 8 * coarsest - e_lo
    knots = _bucket(int(np.ceil(span / delta)) + window_knots(rho) + 16, 256)
    sats = plan_satellites(model, params, mu, kt) if sats is None else np.asarray(sats)
    grid = RayGrid(jnp.asarray(padded), jnp.asarray(e_lo), jnp.asarray(delta),
                   jnp.asarray(sats) if len(sats) else None)
    if slots is None:
        found = int(np.max(np.asarray(_crossing_counts(model, params, grid, angles=angles))))
        slots = slot_count(found, margin)
    slots = min(slots, 2 * model.n_bands * nlev)
    cold = bool(np.any(np.asarray(kt) < KB * t_res))
    return RayPlan(angles, nodes, nlev, slots, knots, tables, rho, t_res, cold, c, len(sats)), grid


# --------------------------------------------------------------------------------------------
# the rays
# --------------------------------------------------------------------------------------------

def _directions(n):
    theta = (jnp.arange(n, dtype=jnp.float64) + 0.5) * (2 * jnp.pi / n)
    return jnp.stack([jnp.cos(theta), jnp.sin(theta)], axis=-1)


def _ray_candidates(model, params, c, dvec, kr, levels):
    """Approximate crossings of every (band, breakpoint) on one ray: first and last crossing
    interval of the probe grid.  Returns positions (2·nb·J,) (−1: none), band, interval, level."""
    pts = c[None, :] + kr[:, None] * dvec[None, :]
    e = jax.vmap(lambda q: energies_at(model, q, params))(pts)              # (NP, nb)
    diff = e[:, :, None] - levels[None, None, :]                            # (NP, nb, J)
    cross = (diff[1:] > 0) != (diff[:-1] > 0)                               # (NP-1, nb, J)
    anyc = jnp.any(cross, axis=0)
    npi = cross.shape[0]
    first = jnp.argmax(cross, axis=0)
    last = npi - 1 - jnp.argmax(cross[::-1], axis=0)

    def locate(i):
        d0 = jnp.take_along_axis(diff, i[None], axis=0)[0]
        d1 = jnp.take_along_axis(diff, (i + 1)[None], axis=0)[0]
        frac = jnp.clip(d0 / jnp.where(d0 == d1, 1.0, d0 - d1), 0.0, 1.0)
        return kr[i] + frac * (kr[i + 1] - kr[i])

    kf = jnp.where(anyc, locate(first), -1.0)
    kl = jnp.where(anyc & (last != first), locate(last), -1.0)
    nb, J = anyc.shape
    band = jnp.broadcast_to(jnp.arange(nb)[:, None], (nb, J))
    lev = jnp.broadcast_to(jnp.arange(J)[None, :], (nb, J))
    pos = jnp.concatenate([kf.reshape(-1), kl.reshape(-1)])
    return (pos, jnp.concatenate([band.reshape(-1)] * 2), jnp.concatenate([first.reshape(-1), last.reshape(-1)]),
            jnp.concatenate([lev.reshape(-1)] * 2))


@partial(jax.jit, static_argnames=("angles",))
def _crossing_counts(model, params, grid, *, angles):
    """Crossings found on every ray (for sizing ``slots``)."""
    p = jax.lax.stop_gradient(params)
    dom = model.domain
    s = dom.scale_for(p)
    kr = probe_radii(s)
    centers = _ray_centres(model, grid)
    dirs = _directions(angles)

    def one(c, d):
        pos = _ray_candidates(model, p, c, d, kr, grid.breakpoints)[0]
        return jnp.sum(pos >= 0)

    return jax.vmap(lambda c: jax.lax.map(lambda d: one(c, d), dirs))(centers)


def _ray_centres(model, grid):
    """Origins of the ray sets (C + S, 2): the model's centres, then the grid's satellites."""
    centres = jnp.asarray(np.asarray(model.domain.centers, dtype=float))
    if grid.satellites is None:
        return centres
    return jnp.concatenate([centres, jax.lax.stop_gradient(grid.satellites)[:, :2]])


def _circle_breaks(c, dvec, sats, own):
    """Where the ray c + t·dvec (t ≥ 0) of the centre (``own`` = −1) or of satellite ``own``
    meets the circles of radii ``SAT_RADII``·R around the satellites (S, 3), where the partition
    weight changes: the largest :func:`circle_breaks` values of t (0 where it meets none).  A
    satellite's own rays keep only its own circles (the weight is zero beyond R)."""
    delta = c[None, :] - sats[:, :2]                                   # (S, 2)
    b = delta @ dvec                                                   # (S,)
    rho = sats[:, 2:3] * jnp.asarray(SAT_RADII)[None, :]               # (S, n)
    disc = b[:, None] ** 2 - jnp.sum(delta * delta, axis=1)[:, None] + rho ** 2
    root = jnp.sqrt(jnp.maximum(disc, 0.0))
    t = jnp.stack([-b[:, None] - root, -b[:, None] + root], axis=-1)   # (S, n, 2)
    mine = (own < 0) | (jnp.arange(sats.shape[0]) == own)
    t = jnp.where((disc[..., None] > 0.0) & mine[:, None, None], jnp.maximum(t, 0.0), 0.0)
    return jnp.sort(t.reshape(-1))[t.size - circle_breaks(sats.shape[0]):]


def _partition_weights(k, sats, own):
    """Partition-of-unity factor of nodes ``k`` (N, 2) on a ray of the centre (``own`` = −1) or of
    satellite ``own`` ≥ 0: 1 − Σ_j ψ(|k − k_j|/R_j), or ψ(|k − k_own|/R_own)."""
    psi = _partition(jnp.linalg.norm(k[:, None, :] - sats[None, :, :2], axis=-1) / sats[None, :, 2])   # (N, S)
    mine = jax.nn.one_hot(own, sats.shape[0], dtype=psi.dtype)
    return jnp.where(own < 0, 1.0 - jnp.sum(psi, axis=1), psi @ mine)


def crossings(model, p, c, dvec, kr, levels, slots):
    """The last ``slots`` crossings of the energy ``levels`` by any band along the ray c + k·dvec
    (probe radii ``kr``), each refined by ``BISECT`` bisections: (valid (slots,), k (slots,), number
    of crossings found; more than ``slots`` is an overflow)."""
    pos, band, itv, lev = _ray_candidates(model, p, c, dvec, kr, levels)
    found = jnp.sum(pos >= 0)
    order = jnp.argsort(pos)[-slots:]
    pos, band, itv, lev = pos[order], band[order], itv[order], lev[order]

    def f(kk):
        # whether the band-th energy (ascending) lies above its level: fewer than band + 1
        # energies at or below it (no sort of the bands at every bisection step)
        e = jax.vmap(lambda q: energies_at(model, c + q * dvec, p, ordered=False))(kk)   # (slots, nb)
        return jnp.sum(e <= levels[lev][:, None], axis=1) <= band

    a, b = kr[itv], kr[jnp.minimum(itv + 1, PROBE)]

    def body(_, st):
        a, b, fa = st
        m = 0.5 * (a + b)
        fm = f(m)
        left = fm == fa
        return jnp.where(left, m, a), jnp.where(left, b, m), jnp.where(left, fm, fa)

    a, b, _ = jax.lax.fori_loop(0, BISECT, body, (a, b, f(a)))
    return pos >= 0, 0.5 * (a + b), found


def ray_nodes(model: BandModel, params, plan: RayPlan, grid: RayGrid):
    """Nodes (N, 2) and weights (N,) of the shared rule, and whether some ray had more crossings
    than ``plan.slots`` (overflow)."""
    dom = model.domain
    p = jax.lax.stop_gradient(params)
    s = dom.scale_for(p)
    kr = probe_radii(s)
    levels = jax.lax.stop_gradient(grid.breakpoints)
    centers = _ray_centres(model, grid)
    sats = None if grid.satellites is None else jax.lax.stop_gradient(grid.satellites)
    owner = jnp.arange(centers.shape[0]) - len(dom.centers)           # −1: a model centre; j: satellite j
    dirs = _directions(plan.angles)
    x, wx = _gauss(plan.nodes)
    geo = jnp.asarray(GEOMETRIC) * s

    def one_ray(c, dvec, own):
        ok, kc, found = crossings(model, p, c, dvec, kr, levels, plan.slots)
        kc = jnp.where(ok, kc, 0.0)
        extra = [] if sats is None else [_circle_breaks(c, dvec, sats, own)]
        bps = jnp.sort(jnp.concatenate([jnp.zeros(1), geo, kc] + extra))
        lo, hi = bps[:-1], bps[1:]
        r = lo[:, None] + (hi - lo)[:, None] * x[None, :]
        wr = (hi - lo)[:, None] * wx[None, :]
        last = bps[-1]
        xt, wt = _gauss(2 * plan.nodes)
        rt = last + last * xt / (1.0 - xt)
        wrt = last * wt / (1.0 - xt) ** 2
        r = jnp.concatenate([r.reshape(-1), rt])
        wr = jnp.concatenate([wr.reshape(-1), wrt])
        pts = c[None, :] + r[:, None] * dvec[None, :]
        w = wr * r * (2 * jnp.pi / plan.angles) / (2 * jnp.pi) ** 2
        if sats is not None:
            w = w * _partition_weights(pts, sats, own)
        return pts, w, found > plan.slots

    pts, w, over = jax.vmap(lambda c, o: jax.lax.map(lambda d: one_ray(c, d, o), dirs))(centers, owner)
    return (jax.lax.stop_gradient(pts.reshape(-1, 2)), jax.lax.stop_gradient(w.reshape(-1)),
            jnp.any(over))


# --------------------------------------------------------------------------------------------
# knot tables
# --------------------------------------------------------------------------------------------

def _deposit3(acc, e, f, w, e_lo, delta):
    """Like :func:`crosswind.solver.engine.ladder._deposit`, also summing the states above the table
    (``above``), which the filled-band ("hole") columns need."""
    table, below, above = acc
    M = table.shape[0]
    pos = (jax.lax.stop_gradient(e) - e_lo) / delta
    j = jnp.floor(pos)
    t = (e - e_lo) / delta - j
    lw = _lagrange(t)
    ji = j.astype(jnp.int32)
    idx = ji[..., None] + jnp.arange(-1, 3, dtype=jnp.int32)[None, None, :]
    inside = (ji >= 1) & (ji <= M - 3)
    wf = w[:, None, None] * f
    val = lw[..., None] * wf[:, :, None, :]
    idx = jnp.where(inside[..., None], idx, M)
    table = table.at[idx.reshape(-1)].add(val.reshape(-1, f.shape[-1]), mode="drop")
    below = below + jnp.sum(jnp.where((pos < 1.0)[..., None], wf, 0.0), axis=(0, 1))
    above = above + jnp.sum(jnp.where((ji > M - 3)[..., None], wf, 0.0), axis=(0, 1))
    return table, below, above


def _layout(sea):
    layout, nc = factor_layout(2, sea)
    layout = dict(layout)
    layout["hole_one"] = Cols(nc, ())
    nc += 1
    if sea:
        layout["hole_dom"] = Cols(nc, (2,))
        nc += 2
    return layout, nc


def pad_to_chunks(k, w, chunk):
    """Nodes ``k`` (n, d) and weights ``w`` (n,) padded to whole chunks of at most ``chunk``:
    ``(k, w, c, number of chunks)``.  The padding repeats the first node with weight 0."""
    n = k.shape[0]
    c = min(chunk, n)
    nch = -(-n // c)
    pad = nch * c - n
    if pad:
        k = jnp.concatenate([k, jnp.broadcast_to(k[:1], (pad, k.shape[1]))])
        w = jnp.concatenate([w, jnp.zeros((pad,))])
    return k, w, c, nch


def build_tables(model, params, plan: RayPlan, grid: RayGrid, filled, sea, chunk=2048):
    """Knot tables (R, M, nc), below (R, nc), above (R, nc) and the overflow flag."""
    layout, nc = _layout(sea)
    k, w, over = ray_nodes(model, params, plan, grid)
    kp, wp, c, nch = pad_to_chunks(k, w, chunk)
    e_lo = jax.lax.stop_gradient(grid.e_lo)
    deltas = jax.lax.stop_gradient(grid.delta) * 2.0 ** jnp.arange(plan.tables, dtype=jnp.float64)
    nb = model.n_bands
    fill = (jnp.arange(nb) < filled).astype(jnp.float64)[:, None]

    def factors(q):
        # the filled bands go to the "hole" columns only: their full weight (which grows without
        # bound on the compactified tail) never enters a sum that is later subtracted
        e, _gn, f = point_factors(model, params, q, sea)
        f = f.at[:, layout["one"][0]].multiply(1.0 - fill[:, 0])
        extra = [fill]
        if sea:
            st = layout["dom"].start
            dom = f[:, st:st + 2]
            f = f.at[:, st:st + 2].multiply(1.0 - fill)
            extra.append(fill * dom)
        return e, jnp.concatenate([f] + extra, axis=-1)

    def body(acc, i):
        sl = lambda x: jax.lax.dynamic_slice_in_dim(x, i * c, c)
        e, f = jax.vmap(factors)(sl(kp))
        return _deposit3(acc, e, f, sl(wp), e_lo, deltas[0]), None

    init = (jnp.zeros((plan.knots, nc)), jnp.zeros((nc,)), jnp.zeros((nc,)))
    fine, _ = jax.lax.scan(jax.checkpoint(body), init, jnp.arange(nch))
    # coarser tables from the finest: each knot is a point mass moved with the same
    # moment-preserving weights (the composition preserves the moments up to cubic order)
    e_knots = (e_lo + jnp.arange(plan.knots, dtype=jnp.float64) * deltas[0])[:, None]
    accs = [fine]
    for r in range(1, plan.tables):
        t, b, a = _deposit3((jnp.zeros_like(fine[0]), jnp.zeros((nc,)), jnp.zeros((nc,))), e_knots,
                            fine[0][:, None, :], jnp.ones((plan.knots,)), e_lo, deltas[r])
        accs.append((t, b + fine[1], a + fine[2]))
    tables = jnp.stack([a[0] for a in accs])
    below = jnp.stack([a[1] for a in accs])
    above = jnp.stack([a[2] for a in accs])
    return tables, below, above, over, layout


# --------------------------------------------------------------------------------------------
# sums per condition
# --------------------------------------------------------------------------------------------

def _window(plan: RayPlan):
    """Knots per condition: μ ± (W+2)k_BT at up to 2ρ knots per k_BT, plus the Lagrange margin."""
    return window_knots(plan.rho)


def window_knots(rho):
    return int(2 * (W + 2) * 2 * rho) + 8


def _cols(vals, layout, name):
    return column_values(vals, layout, name)


def _tapered(occ, E, mu, kt):
    """Occupations that reach their limits (f0 → 1 or 0, −f0' and s → 0) smoothly between
    W and W+2 k_BT from μ (C¹ smoothstep): the knot window can then move with μ without a jump,
    so a sum is a smooth function of μ and T (bias ≤ e^{−W} ≈ 2e-9 of the integrand)."""
    x = (E - mu[:, None]) / kt[:, None]
    a = jnp.clip((jnp.abs(x) - W) / 2.0, 0.0, 1.0)
    taper = 1.0 - a * a * (3.0 - 2.0 * a)
    step = (x < 0).astype(E.dtype)
    return {"f0": step + (occ["f0"] - step) * taper, "F": occ["F"] * taper, "s": occ["s"] * taper}


def _knot_windows(plan, grid, mu, kt_occ):
    """Table index r (P,), its knot spacing (P,) and the first knot of each condition's window
    (P,): the coarsest table with at least ρ knots per k_BT, window from μ − (W+2)k_BT."""
    kt_s = jax.lax.stop_gradient(kt_occ)
    delta0 = jax.lax.stop_gradient(grid.delta)
    e_lo = jax.lax.stop_gradient(grid.e_lo)
    r = jnp.clip(jnp.floor(jnp.log2(kt_s / (plan.rho * delta0))), 0, plan.tables - 1).astype(jnp.int32)
    delta = delta0 * 2.0 ** r.astype(jnp.float64)
    start = jnp.floor((jax.lax.stop_gradient(mu) - (W + 2) * kt_s - e_lo) / delta).astype(jnp.int32) - 2
    return r, delta, start


#: slack of :func:`_covered` for a plan reused at other conditions (a finite-difference step in T
#: or μ, a fit): knots per k_BT down to ρ/√2, breakpoint gaps up to this factor × the plan's spacing
REUSE_SLACK = 1.5


def _covered(plan, grid, mu, kt_occ):
    """(P,) whether the plan resolves each condition (μ, k_BT) (a plan reused at other conditions,
    under ``jax.grad`` or in a fit, may not): a knot table with at least ρ/√2 knots per k_BT and
    none finer than the window holds, and energy breakpoints over μ ± W k_BT (where the occupations
    start to taper) no farther apart than ``REUSE_SLACK``·c·k_BT.  A plan's own conditions always
    pass (:func:`breakpoints`: every gap that reaches a window is at most c times its k_BT)."""
    kt_s = jax.lax.stop_gradient(kt_occ)
    m = jax.lax.stop_gradient(mu)
    x = jnp.log2(kt_s / (plan.rho * jax.lax.stop_gradient(grid.delta)))
    table_ok = (x >= -0.5) & (x < plan.tables)
    bps = jax.lax.stop_gradient(grid.breakpoints)
    real = bps < 0.5 * PAD_ENERGY
    first, last = bps[0], jnp.max(jnp.where(real, bps, -jnp.inf))
    lo, hi = m - W * kt_s, m + W * kt_s
    inside = (lo >= first) & (hi <= last)
    a, b = bps[:-1], bps[1:]
    tol = 1e-6 * kt_s[:, None]
    reach = (b[None, :] > lo[:, None] + tol) & (a[None, :] < hi[:, None] - tol) & real[None, 1:]
    gap = jnp.max(jnp.where(reach, (b - a)[None, :], 0.0), axis=1)
    return table_ok & inside & (gap <= REUSE_SLACK * plan.spacing * kt_s)


def _shared_span(plan):
    """Knots of a window shared by a chunk of conditions: a condition's own window plus a quarter
    of it for the spread of the conditions' windows (sorted neighbours in a sweep)."""
    Q = _window(plan)
    return Q + Q // 4


def tail_fraction(states, E, mu, kt):
    """(P,) bound on the fraction of a condition's window sums lost beyond the window μ ± W k_BT:
    TAIL_SAFETY·e^{−(W − x)}, with x k_BT the distance from μ to the nearest knot that holds states
    (``states`` (P, Q) or (Q,), nonzero there; knot energies ``E`` (P, Q)); 1 when none is within
    reach.  With μ inside a band x ≈ 0 and the bound is e^{−W}-small; with μ in a gap at x k_BT from
    a band edge the thermally activated sums decay as e^{−x} from the edge, and the part beyond the
    window is e^{−(W − x)} of them (μ 14 k_BT below the edge of a massive Dirac cone lost 1.2e-3 of
    its density, which the estimate of 9e-6 had missed; docs/theory.md §14.3)."""
    E, mu, kt = (jax.lax.stop_gradient(a) for a in (E, mu, kt))
    x = jnp.abs(E - mu[:, None]) / kt[:, None]
    near = jnp.min(jnp.where(jnp.broadcast_to(states != 0, x.shape), x, jnp.inf), axis=1)
    return jnp.minimum(1.0, TAIL_SAFETY * jnp.exp(jnp.minimum(near, 2 * W) - W))


def _window_moments(vals, E, pre, post, reach, layout, mu, kt_occ, temp, tau_eval, tau_arr, omega, sea):
    """Moments from knot values ``vals`` ((P, Q, nc), or (Q, nc) shared by all conditions), knot
    energies ``E`` (P, Q), and the table sums below (``pre``) and above (``post``) the knots (P, nc);
    and, per condition, the :func:`tail_fraction` and the :func:`edge_distance` (``reach`` knots)."""
    states = jnp.abs(_cols(vals, layout, "one")) + jnp.abs(_cols(vals, layout, "hole_one"))
    bounds = tail_fraction(states, E, mu, kt_occ), edge_distance(states, E, mu, kt_occ, reach)
    occ = _tapered(_occupations(E, mu, kt_occ), E, mu, kt_occ)
    out = _kernel_sums(vals, occ, E, mu, temp, tau_eval, tau_arr, omega, layout, sea)
    f0 = occ["f0"]
    new = {key: getattr(out, key) + _cols(pre, layout, name)
           for key, name in (("ahe", "om"), ("scale_ahe", "abs_om"))}
    # the "one" and "dom" columns hold the bands empty at neutrality, the "hole" columns the
    # filled ones: n = Σ_upper w f0 − Σ_filled w (1 − f0)
    hole = _cols(vals, layout, "hole_one")[..., None]
    new["dos"] = out.dos + knot_contract(occ["F"], hole)[:, 0]
    new["density"] = (knot_contract(f0, _cols(vals, layout, "one")[..., None])[:, 0] + _cols(pre, layout, "one")
                      - knot_contract(1.0 - f0, hole)[:, 0] - _cols(post, layout, "hole_one"))
    if sea:
        hole = _cols(vals, layout, "hole_dom")
        new["dipole_sea"] = (knot_contract(f0, _cols(vals, layout, "dom")) + _cols(pre, layout, "dom")
                             - knot_contract(1.0 - f0, hole) - _cols(post, layout, "hole_dom"))
    return dataclasses.replace(out, **new), bounds


def _sums_at(tabs, plan, grid, layout, mu, kt_occ, temp, tau_eval, tau_arr, omega, sea):
    """Kernel sums (:class:`~crosswind.solver.engine.kernels.Moments`) for conditions (P,) at
    occupation temperatures ``kt_occ`` (P,), whether each condition's window fits the tables, and
    each condition's (:func:`tail_fraction`, :func:`edge_distance`).

    Each condition sums the knots of its own window (Q knots gathered per condition); when all
    conditions of the chunk read the same table and their windows lie within
    :func:`_shared_span` knots (neighbours of a sorted sweep), they share one slice of the table
    and the sums are matrix products.  Both give the same sums: outside its own window a
    condition's tapered occupations are exactly 1 (f0) or 0, which the table sums below and above
    the knots (``pre``, ``post``) otherwise supply."""
    tables, below, above = tabs
    R, M = plan.tables, plan.knots
    Q, U = _window(plan), _shared_span(plan)
    e_lo = jax.lax.stop_gradient(grid.e_lo)
    r, delta, start = _knot_windows(plan, grid, mu, kt_occ)
    fits = (start >= 1) & (start + Q <= M - 3) & _covered(plan, grid, mu, kt_occ)
    csum = jnp.concatenate([jnp.zeros((R, 1, tables.shape[-1])), jnp.cumsum(tables, axis=1)], axis=1)
    # the nodes of a ray lie at most about one k_BT apart in energy inside the window (panels of
    # c ≤ 3 k_BT with 5 or more Gauss nodes), i.e. 2ρ knots of the finest table a condition reads
    reach = int(2 * plan.rho) + 2
    rest = (layout, mu, kt_occ, temp, tau_eval, tau_arr, omega, sea)

    def below_above(rr, lo, hi):
        # fully occupied below knot lo, empty from knot hi on
        return (below[rr] + csum[rr, jnp.clip(lo, 0, M)],
                above[rr] + csum[rr, M] - csum[rr, jnp.clip(hi, 0, M)])

    def own(_):
        j = start[:, None] + jnp.arange(Q, dtype=jnp.int32)[None, :]
        vals = tables[r[:, None], jnp.clip(j, 0, M - 1)]                      # (P, Q, nc)
        E = e_lo + j.astype(jnp.float64) * delta[:, None]
        return _window_moments(vals, E, *below_above(r, start, start + Q), reach, *rest)

    s0 = jnp.min(start)
    r0 = r[0]

    def shared(_):
        s = jnp.clip(s0, 0, M - U)
        vals = jax.lax.dynamic_slice(tables, (r0, s, jnp.int32(0)), (1, U, tables.shape[-1]))[0]  # (U, nc)
        j = s + jnp.arange(U, dtype=jnp.int32)
        E = jnp.broadcast_to(e_lo + j.astype(jnp.float64) * delta[0], (mu.shape[0], U))
        rr = jnp.full_like(r, r0)
        return _window_moments(vals, E, *below_above(rr, jnp.full_like(start, s), jnp.full_like(start, s + U)),
                               reach, *rest)

    can_share = jnp.all(r == r0) & (jnp.max(start) + Q <= s0 + U) & (s0 >= 0) & (s0 + U <= M)
    if U > M or mu.shape[0] < SHARED_MIN:
        sums, bounds = own(None)
    else:
        sums, bounds = jax.lax.cond(can_share, shared, own, None)
    return sums, fits, bounds


#: the Fermi-surface sums (weighted by −∂f0/∂ε or the entropy) that get the band-edge term of the
#: T² extrapolation's error (:func:`condition_sums`; ``ladder.EDGE_SAFETY``)
SURFACE_SUMS = ("dos", "drude", "dipole", "dipole_tau", "drude2_2w", "drude2_0", "bcp", "lorentz", "thermo1",
                "thermo2", "drude0", "nernst")


def _bshape(v, like):
    return v.reshape(v.shape + (1,) * (like.ndim - 1))


def condition_sums(tabs, plan, grid, layout, mu, kt, temp, tau_eval, tau_arr, omega, sea):
    """Sums for conditions (P,), with the T² extrapolation below ``plan.t_res`` (only when the
    plan has cold conditions, ``plan.extrapolate``).  Returns ``(sums, extrapolation_error, fits,
    tail)``, ``tail`` the :func:`tail_fraction` at max(T, t_res)."""
    ktr = KB * plan.t_res
    args = (tabs, plan, grid, layout, mu)
    rest = (temp, tau_eval, tau_arr, omega, sea)
    k0 = jnp.maximum(kt, ktr)
    s0, f0, (tail, edge) = _sums_at(*args, k0, *rest)
    if not plan.extrapolate:
        # every condition of a plan without cold ones is resolved (traced values colder than
        # t_res would be evaluated at t_res: reported as overflow)
        zero = jax.tree_util.tree_map(lambda x: jnp.zeros(x.shape), s0)
        return s0, zero, f0 & (kt >= ktr), tail
    k1, k2 = jnp.maximum(kt, 2 * ktr), jnp.maximum(kt, 4 * ktr)
    s1, f1, _ = _sums_at(*args, k1, *rest)
    s2, f2, _ = _sums_at(*args, k2, *rest)
    cold = kt < ktr

    def ext(a, b, ka, kb):
        fac = (kt ** 2 - ka ** 2) / jnp.where(ka == kb, 1.0, ka ** 2 - kb ** 2)
        return jax.tree_util.tree_map(lambda x, y: x + (x - y) * _bshape(fac, x).astype(x.dtype), a, b)

    e1 = ext(s0, s1, k0, k1)
    e2 = ext(s1, s2, k1, k2)
    res = jax.tree_util.tree_map(lambda x, y: jnp.where(_bshape(cold, x), x, y), e1, s0)
    err = jax.tree_util.tree_map(lambda x, y: jnp.where(_bshape(cold, x), jnp.abs(x - y), 0.0), e1, e2)
    # a band edge x·k_BT_res from μ breaks the T² law of the Fermi-surface sums below t_res (their
    # step at the edge is smeared alike at t_res, 2t_res and 4t_res, so the two extrapolations agree
    # on a wrong value): EDGE_SAFETY·e^{−x} of the larger of the extrapolated and the t_res value is
    # added (the Fermi-sea sums — density, Hall — are continuous at an edge and keep the spread)
    near = EDGE_SAFETY * jnp.exp(-jnp.minimum(edge, 50.0))

    def step(name):
        x, s, e = getattr(e1, name), getattr(s0, name), getattr(err, name)
        return e + jnp.where(_bshape(cold, e), _bshape(near, e) * jnp.maximum(jnp.abs(x), jnp.abs(s)), 0.0)

    err = dataclasses.replace(err, **{name: step(name) for name in SURFACE_SUMS})
    return res, err, f0 & jnp.where(cold, f1 & f2, True), tail


def ray_moments(model, params, plan: RayPlan, grid: RayGrid, mu, kt, temp, tau_eval, tau_arr, omega,
                filled, sea, condition_chunk=128):
    """Kernel sums (natural units, degeneracy not applied) for P conditions from one ray set.
    Returns ``(sums, extrapolation_error, overflow, tail)``; ``sums`` and ``extrapolation_error``
    are :class:`~crosswind.solver.engine.kernels.Moments`, ``tail`` (P,) the
    :func:`tail_fraction` of each condition."""
    if isinstance(model.domain, Lattice) or model.dim != 2:
        raise ValueError("rays: the shared ray rule integrates 2D continuum (k·p) models")
    tables, below, above, over, layout = build_tables(model, params, plan, grid, filled, sea)
    tabs = (tables, below, above)
    P = mu.shape[0]
    cc = min(condition_chunk, P)
    nch = -(-P // cc)
    pad = nch * cc - P
    # conditions sorted by table and window start, so that the neighbours in a chunk can share
    # one slice of the table (see _sums_at); the results are put back in the callers' order
    r, _, start = _knot_windows(plan, grid, mu, jnp.maximum(kt, KB * plan.t_res))
    order = jnp.argsort(r.astype(jnp.int64) * (4 * plan.knots) + start.astype(jnp.int64), stable=True)
    perm = lambda x: x[order]
    padv = lambda x: jnp.concatenate([x, jnp.broadcast_to(x[-1:], (pad,) + x.shape[1:])]) if pad else x
    args = tuple(jax.tree_util.tree_map(lambda x: padv(perm(x)), a) for a in (mu, kt, temp, tau_arr))

    def one(a):
        m, k, t, ta = a
        return condition_sums(tabs, plan, grid, layout, m, k, t, tau_eval, ta, omega, sea)

    split = lambda x: x.reshape((nch, cc) + x.shape[1:])
    out = jax.lax.map(one, jax.tree_util.tree_map(split, args))
    back = jnp.zeros_like(order).at[order].set(jnp.arange(P, dtype=order.dtype))
    out = jax.tree_util.tree_map(lambda x: x.reshape((nch * cc,) + x.shape[2:])[:P][back], out)
    sums, err, fits, tail = out
    return sums, err, over | ~jnp.all(fits), tail
