"""Energy-resolved integration of 3D continuum (k·p) models: shared spherical rays around each node.

The 3D counterpart of :mod:`crosswind.solver.engine.rays` (docs/theory.md §16.3).  One set of rays
serves every condition of a call; each condition is a short sum over energy knots.

* **Cells.**  k-space is split into the Voronoi cells of the model's centres (the Weyl nodes):
  every k belongs to the nearest centre.  A cell is convex, hence star-shaped from its centre, so
  the ray from centre c in direction n covers it for 0 ≤ r < R(n), with
  R(n) = min_j |c_j − c|²/(2 n·(c_j − c)) over the centres j with n·(c_j − c) > 0 (∞ if none).  A
  model may declare a momentum cutoff Λ (static option ``kp_cutoff``, 1/Å): then R ≤ Λ, the model
  is integrated over |k − c| < Λ within each cell, and results depend on Λ (type-II nodes, whose
  Fermi surfaces are open, need it).
* **Directions.**  A product rule: Gauss–Legendre in cos θ on [−1, 0] and [0, 1] separately, times
  the periodic trapezoid rule in φ, with the polar axis along the line of the first two centres
  (z for one centre).  For centres on one line the cell faces are planes perpendicular to it, so
  R(n) jumps from finite to infinite exactly at cos θ = 0, between the two Gauss panels.
* **Radial panels.**  As in the 2D rule: the crossings of graded energy breakpoints (the union of
  all thermal windows) by every band are bracketed on a compactified probe grid and bisected;
  with fixed geometric breakpoints s·2^{m/2} (s the model's scale) and R they split each ray into
  Gauss–Legendre panels; an infinite ray ends with the compactified tail [k_last, ∞).  The
  volume element r² dr dΩ/(2π)³ is in the weights, so the 1/r² monopole curvature of a Weyl node
  is integrated with a smooth integrand.
* **Knot tables, Fermi-sea columns, cold conditions** exactly as in
  :mod:`crosswind.solver.engine.rays` (whose condition sums are reused): every node deposits w·A
  onto knot tables; the bands filled at neutrality go to "hole" columns for the density; below
  ``t_res`` a condition is extrapolated in T².

The Fermi-sea route to the dipole (``dipole_route="both"``) is refused: at a Weyl node ∇·Ω has a
δ-function (the monopole) that a pointwise ∫f0 ∂_bΩ_c cannot see, so the two routes differ by
exactly the monopole term (docs/theory.md §16.2); the Fermi-surface form is the one returned.

Placement is ``stop_gradient``ed as in the 2D rule; the error estimate of ``response`` is
|fine − coarse| between consecutive resolutions plus the extrapolation spread, and a plan whose
crossing slots or knot window overflow reports an infinite error.
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
from crosswind.solver.engine import mesh as _mesh
from crosswind.solver.engine import rays as _rays
from crosswind.solver.engine.ladder import Cols, factor_layout, point_factors

CUTOFF_KEY = "kp_cutoff"     # static option of a 3D continuum model: momentum cutoff Λ (1/Å)

#: per resolution (same count and energy settings as ``rays.RESOLUTIONS``): Gauss nodes in cos θ
#: per hemisphere, trapezoid angles in φ, Gauss nodes per radial panel
RESOLUTIONS = ((6, 12, 4), (10, 20, 5), (14, 28, 6), (20, 40, 8), (28, 56, 10))


@dataclass(frozen=True)
class ShellPlan:
    """Static shape of one shell integration: the energy part (``energy``, a
    :class:`~crosswind.solver.engine.rays.RayPlan` whose ``slots`` are the crossing panels kept per
    ray) and the direction rule (``n_cos`` Gauss nodes per hemisphere in cos θ, ``n_phi`` angles)."""

    energy: _rays.RayPlan
    n_cos: int
    n_phi: int

    @property
    def slots(self) -> int:
        return self.energy.slots

    def reusable(self, n_bands: int) -> ShellPlan:
        """This plan with the slot margin for reuse at other parameters (:meth:`RayPlan.reusable`)."""
        return dataclasses.replace(self, energy=self.energy.reusable(n_bands))

    @property
    def directions(self) -> int:
        return 2 * self.n_cos * self.n_phi

    def k_points(self, centres: int) -> int:
        """Points where the band geometry is evaluated (probe and bisection evaluate energies only)."""
        return centres * self.directions * self.energy.nodes_per_ray()


def cutoff_of(model: BandModel) -> float:
    """The model's momentum cutoff Λ (1/Å; ∞ when it declares none)."""
    return float(model.static_options().get(CUTOFF_KEY, np.inf))


def _frame(centers):
    """Orthonormal rows (e1, e2, axis): the polar axis along the first two centres (z for one)."""
    c = np.asarray(centers, dtype=float)
    axis = c[1] - c[0] if len(c) > 1 else np.array([0.0, 0.0, 1.0])
    axis = axis / np.linalg.norm(axis)
    trial = np.eye(3)[int(np.argmin(np.abs(axis)))]
    e1 = trial - axis * (trial @ axis)
    e1 /= np.linalg.norm(e1)
    return np.stack([e1, np.cross(axis, e1), axis])


def directions(model: BandModel, n_cos: int, n_phi: int):
    """Unit directions (ND, 3) and their solid-angle weights (ND,) (sum 4π)."""
    x, w = np.polynomial.legendre.leggauss(n_cos)
    ct = np.concatenate([0.5 * (x - 1.0), 0.5 * (x + 1.0)])            # [−1, 0] and [0, 1]
    wc = np.concatenate([0.5 * w, 0.5 * w])
    phi = (np.arange(n_phi) + 0.5) * (2 * np.pi / n_phi)
    st = np.sqrt(1.0 - ct ** 2)
    local = np.stack([st[:, None] * np.cos(phi)[None], st[:, None] * np.sin(phi)[None],
                      np.broadcast_to(ct[:, None], (ct.size, n_phi))], -1).reshape(-1, 3)
    dirs = local @ _frame(model.domain.centers)
    wts = np.broadcast_to(wc[:, None] * (2 * np.pi / n_phi), (ct.size, n_phi)).reshape(-1)
    return jnp.asarray(dirs), jnp.asarray(wts)


def cell_radius(centers, i, dirs, cutoff):
    """R(n) (ND,) of the Voronoi cell of centre ``i`` along ``dirs``, capped at ``cutoff``."""
    c = np.asarray(centers, dtype=float)
    out = jnp.full(dirs.shape[:1], cutoff)
    for j in range(len(c)):
        if j == i:
            continue
        sep = c[j] - c[i]
        proj = dirs @ jnp.asarray(sep)
        face = float(sep @ sep) / (2.0 * jnp.where(proj > 0, proj, 1.0))
        out = jnp.minimum(out, jnp.where(proj > 0, face, jnp.inf))
    return out


def _check(model):
    if isinstance(model.domain, Lattice) or model.dim != 3:
        raise ValueError("shells: the shared shell rule integrates 3D continuum (k·p) models")


# --------------------------------------------------------------------------------------------
# planning (concrete values)
# --------------------------------------------------------------------------------------------

def _energy_plan(mu, kt, resolution):
    """The energy part of a plan (breakpoints, knot tables) with the settings of
    ``rays.RESOLUTIONS[resolution]``, as :func:`crosswind.solver.engine.rays.make_plan`."""
    angles, nodes, c, rho, t_res = _rays.RESOLUTIONS[resolution]
    bps = _rays.breakpoints(mu, kt, t_res, c)
    nlev = _rays._bucket(len(bps), 16)
    win = _rays.effective_windows(mu, kt, t_res)
    kt_min, kt_max = float(win[:, 1].min()), float(win[:, 1].max())
    delta = kt_min / rho
    tables = int(np.floor(np.log2(kt_max / kt_min))) + 1
    e_lo = float(bps[0]) - 8 * delta * 2 ** (tables - 1)
    span = float(bps[-1]) + 8 * delta * 2 ** (tables - 1) - e_lo
    knots = _rays._bucket(int(np.ceil(span / delta)) + _rays.window_knots(rho) + 16, 256)
    grid = _rays.RayGrid(jnp.asarray(np.concatenate([bps, np.full(nlev - len(bps), _rays.PAD_ENERGY)])),
                         jnp.asarray(e_lo), jnp.asarray(delta))
    cold = bool(np.any(np.asarray(kt) < KB * t_res))
    return _rays.RayPlan(angles, nodes, nlev, 1, knots, tables, rho, t_res, cold, c), grid


def make_plan(model: BandModel, params, mu, kt, resolution: int, slots: int | None = None,
              margin: float = _rays.SLOT_MARGIN):
    """Plan and grid for the conditions (μ, k_BT) (eV) at ``resolution``: the energy settings of
    ``rays.RESOLUTIONS[resolution]``, the directions of ``RESOLUTIONS[resolution]``; ``slots``
    defaults to :func:`crosswind.solver.engine.rays.slot_count` of a count of the crossings on
    every ray with ``margin``."""
    _check(model)
    n_cos, n_phi, nodes = RESOLUTIONS[resolution]
    energy, grid = _energy_plan(mu, kt, resolution)
    energy = dataclasses.replace(energy, nodes=nodes, angles=2 * n_cos * n_phi)
    if slots is None:
        found = int(np.max(np.asarray(_crossing_counts(model, params, grid, n_cos=n_cos, n_phi=n_phi))))
        slots = _rays.slot_count(found, margin)
    slots = min(slots, 2 * model.n_bands * energy.levels)
    return ShellPlan(dataclasses.replace(energy, slots=slots), n_cos, n_phi), grid


def _rays_of(model, params, n_cos, n_phi):
    """Per centre: centre (3,), directions (ND, 3), weights (ND,), radii R (ND,)."""
    dirs, wd = directions(model, n_cos, n_phi)
    cut = cutoff_of(model)
    centers = model.domain.centers
    radii = jnp.stack([cell_radius(centers, i, dirs, cut) for i in range(len(centers))])
    return jnp.asarray(np.asarray(centers, dtype=float)), dirs, wd, radii


def _probe(s, R):
    """Probe radii on [0, R]: the compactified grid of the 2D rule, clipped at R (clipped points
    repeat, and an interval of zero length holds no crossing)."""
    return jnp.minimum(_mesh.probe_radii(s), R)


@partial(jax.jit, static_argnames=("n_cos", "n_phi"))
def _crossing_counts(model, params, grid, *, n_cos, n_phi):
    p = jax.lax.stop_gradient(params)
    s = model.domain.scale_for(p)
    centers, dirs, _wd, radii = _rays_of(model, p, n_cos, n_phi)

    def one(c, d, R):
        pos = _rays._ray_candidates(model, p, c, d, _probe(s, R), grid.breakpoints)[0]
        return jnp.sum(pos >= 0)

    return jax.vmap(lambda c, Rc: jax.lax.map(lambda a: one(c, *a), (dirs, Rc)))(centers, radii)


# --------------------------------------------------------------------------------------------
# the rays
# --------------------------------------------------------------------------------------------

def shell_nodes(model: BandModel, params, plan: ShellPlan, grid):
    """Nodes (N, 3) and weights (N,) of the shared rule (Σ w X ≈ ∫d³k/(2π)³ X over every cell),
    and whether some ray had more crossings than ``plan.slots`` (overflow)."""
    p = jax.lax.stop_gradient(params)
    s = model.domain.scale_for(p)
    levels = jax.lax.stop_gradient(grid.breakpoints)
    centers, dirs, wd, radii = _rays_of(model, p, plan.n_cos, plan.n_phi)
    x, wx = _rays._gauss(plan.energy.nodes)
    xt, wt = _rays._gauss(2 * plan.energy.nodes)
    geo = jnp.asarray(_rays.GEOMETRIC) * s
    slots = plan.slots

    def one_ray(c, dvec, wdir, R):
        kr = _probe(s, R)
        ok, kc, found = _rays.crossings(model, p, c, dvec, kr, levels, slots)
        finite = jnp.isfinite(R)
        kc = jnp.where(ok, jnp.minimum(kc, R), 0.0)
        ends = jnp.stack([jnp.asarray(0.0), jnp.where(finite, R, 0.0)])
        bps = jnp.sort(jnp.concatenate([ends, jnp.minimum(geo, R), kc]))
        lo, hi = bps[:-1], bps[1:]
        r = (lo[:, None] + (hi - lo)[:, None] * x[None, :]).reshape(-1)
        wr = ((hi - lo)[:, None] * wx[None, :]).reshape(-1)
        last = bps[-1]
        rt = last + last * xt / (1.0 - xt)                     # [last, ∞) for an open cell
        wrt = jnp.where(finite, 0.0, last * wt / (1.0 - xt) ** 2)
        r = jnp.concatenate([r, rt])
        wr = jnp.concatenate([wr, wrt])
        pts = c[None, :] + r[:, None] * dvec[None, :]
        return pts, wr * r * r * wdir / (2 * jnp.pi) ** 3, found > slots

    pts, w, over = jax.vmap(lambda c, Rc: jax.lax.map(lambda a: one_ray(c, *a), (dirs, wd, Rc)))(centers, radii)
    return (jax.lax.stop_gradient(pts.reshape(-1, 3)), jax.lax.stop_gradient(w.reshape(-1)),
            jnp.any(over))


# --------------------------------------------------------------------------------------------
# knot tables and sums
# --------------------------------------------------------------------------------------------

def _layout(sea):
    layout, nc = factor_layout(3, sea)
    layout = dict(layout)
    layout["hole_one"] = Cols(nc, ())
    return layout, nc + 1


def build_tables(model, params, plan: ShellPlan, grid, filled, chunk=2048):
    """Knot tables (R, M, nc), below (R, nc), above (R, nc), the overflow flag and the layout."""
    layout, nc = _layout(False)
    k, w, over = shell_nodes(model, params, plan, grid)
    k, w, c, nch = _rays.pad_to_chunks(k, w, chunk)
    ep = plan.energy
    e_lo = jax.lax.stop_gradient(grid.e_lo)
    deltas = jax.lax.stop_gradient(grid.delta) * 2.0 ** jnp.arange(ep.tables, dtype=jnp.float64)
    fill = (jnp.arange(model.n_bands) < filled).astype(jnp.float64)[:, None]
    one = layout["one"][0]

    def factors(q):
        # filled bands count in the "hole" column only (their full weight grows without bound)
        e, _gn, f = point_factors(model, params, q, False)
        return e, jnp.concatenate([f.at[:, one].multiply(1.0 - fill[:, 0]), fill], axis=-1)

    def body(acc, i):
        e, f = jax.vmap(factors)(jax.lax.dynamic_slice_in_dim(k, i * c, c))
        return _rays._deposit3(acc, e, f, jax.lax.dynamic_slice_in_dim(w, i * c, c), e_lo, deltas[0]), None

    zero = lambda: (jnp.zeros((ep.knots, nc)), jnp.zeros((nc,)), jnp.zeros((nc,)))
    fine, _ = jax.lax.scan(jax.checkpoint(body), zero(), jnp.arange(nch))
    # coarser tables: every fine knot moved as a point mass (moments preserved to cubic order)
    e_knots = (e_lo + jnp.arange(ep.knots, dtype=jnp.float64) * deltas[0])[:, None]
    accs = [fine]
    for r in range(1, ep.tables):
        t, b, a = _rays._deposit3(zero(), e_knots, fine[0][:, None, :], jnp.ones((ep.knots,)), e_lo, deltas[r])
        accs.append((t, b + fine[1], a + fine[2]))
    tabs = tuple(jnp.stack([a[i] for a in accs]) for i in range(3))
    return tabs, over, layout


def shell_moments(model, params, plan: ShellPlan, grid, mu, kt, temp, tau_eval, tau_arr, omega,
                  filled, sea=False, condition_chunk=128):
    """Kernel sums (natural units, degeneracy not applied) for P conditions from one shell set.
    Returns ``(sums, extrapolation_error, overflow, tail)`` as :func:`crosswind.solver.engine.rays.ray_moments`."""
    _check(model)
    if sea:
        raise ValueError("shells: the Fermi-sea dipole misses the monopole δ-function at each Weyl node "
                         "(docs/theory.md §16.2); use dipole_route='surface' for 3D continuum models")
    tabs, over, layout = build_tables(model, params, plan, grid, filled)

    def one(a):
        m, k, t, ta = a
        out = _rays.condition_sums(tabs, plan.energy, grid, layout, m[None], k[None], t[None],
                                   tau_eval, jax.tree_util.tree_map(lambda v: v[None], ta), omega, False)
        return jax.tree_util.tree_map(lambda v: v[0], out)

    sums, err, fits, tail = jax.lax.map(one, (mu, kt, temp, tau_arr), batch_size=min(condition_chunk, mu.shape[0]))
    return sums, err, over | ~jnp.all(fits), tail
