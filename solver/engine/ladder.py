"""Energy-resolved k-space integration on lattices: a ladder of resolutions and temperatures.

Every kernel of :mod:`crosswind.solver.engine.kernels` is Σ_n ∫[dk] φ(ε_n(k); μ, T) A_n(k), with φ an
occupation function (f0, −∂f0/∂ε or the entropy s) times a relaxation-time factor of ε and T, and
A a geometric factor (1, g_a g_b, g_b Ω, ...).  A periodic trapezoid (uniform offset grid of spacing
h) integrates such an integrand with spectral accuracy once h resolves its narrowest feature, the
thermal width πk_BT/|∇ε| (error ≈ exp(−2π²k_BT/(|∇ε|h)); common practice).  At 2–20 K that
needs ~10⁸ points on a whole-zone grid.  The ladder (docs/theory.md §14) writes instead, for the
occupation part only,

    φ(T) = φ(T*_0) + Σ_{l=1..L} [φ(T*_l) − φ(T*_{l−1})],      T*_l = max(T, T_l),

with T_l = T_0/2^l and k_BT_0 = κ·v_max·h_0 (v_max the largest |∇ε| of the model, h_0 the level-0
spacing).  Level 0 is the uniform n0^d grid over the whole zone, resolving φ(T*_0).  The l-th
difference is resolved by a grid of spacing h_0/2^l and vanishes (to e^{−W}) farther than
W·k_BT_{l−1} from every μ, so it is summed only over the cells of level l−1 that come that close
(each split into 2^d children): a uniform grid wherever its integrand is not negligible, hence
spectrally accurate, with no resolution seams.  Points therefore concentrate in shells around
the Fermi contours of the requested μ whose width halves with every level.

Energy axis.  Each point and band deposits w·A onto knots E_lo + jδ_l of its level with the four
cubic Lagrange weights of its energy (the moments Σ (E_j − ε)^m, m ≤ 3, are preserved), so for
any smooth φ, Σ_j table_j φ(E_j) = Σ_k w A φ(ε) + O(δ⁴φ'''').  With δ_l = k_BT_l/ρ the tables
are built once per call, independently of μ, T, τ and ω; every condition is then a short sum
over the knots within its window (conditions cost knots, not k-points).  Level 0 keeps δ_0 =
k_BT_0/ρ whatever the hottest condition; one hotter than k_BT_0 reads a view of its table coarsened
to 2^v δ_0 (:func:`hot_views`), so that a hot partner never coarsens a cold condition's sums.

Below the deepest level (T < T_L) the partial sums X(T_L), X(T_{L−1}), X(T_{L−2}) — each the full
result at that temperature — are extrapolated in T² (Sommerfeld expansion, valid when k_BT_L is
small against the distance of μ to band edges and van Hove points); T = 0 is the same formula.

Error estimate, nested in the same program: the sums repeated on the sub-grid of spacing 2h at
every level (every other level-0 point; one child per refined cell) with knots 2δ, plus the
spread of the T² extrapolation; cells flagged beyond a level's budget make the error infinite
(``overflow``), never a silently truncated sum.  Cell selection and knot placement are wrapped
in ``stop_gradient``: derivatives with respect to model parameters are those of the sums over the
placed points; μ, T and τ enter only through φ, so their derivatives are exact derivatives of the
energy sums.
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from functools import cache, partial
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
from scipy.optimize import minimize

from crosswind.models.geometry import geometry_at
from crosswind.models.units import KB_EVK as KB
from crosswind.solver.engine.kernels import Moments, tau_tilde
from crosswind.solver.engine.mesh import energies_at
from crosswind.solver.engine.occupation import T_FLOOR, occupations
from crosswind.solver.engine.scattering import energy_free

W = 20.0                   # window half-width in k_BT: neglected weight ~ e^-20 ≈ 2e-9
#: conditions per chunk from which the knot sums also compile the shared-slice form (matrix
#: products over one table slice); smaller chunks keep one gathered window per condition only
SHARED_MIN = 64
SLACK = 1.5                # cell-size reach in units of |∇ε|·(half diagonal)
PROBE = 24                 # points per direction of the v_max probe grid


@dataclass(frozen=True)
class Plan:
    """Static shape of one ladder: ``n0`` level-0 points per reciprocal vector, ``budgets[l-1]``
    cells of level l−1 refined at level l, ``knots[l]`` energy knots of level l (fine), ``kappa``
    (k_BT_0 = κ v_max h_0), ``rho`` (δ_l = k_BT_l/ρ) and ``views``: 0 when no condition is hotter
    than k_BT_0, else the number of views of level 0's tables that such conditions read (view v:
    knots 2^v δ_0, :func:`hot_views`), so that a condition up to 2^views k_BT_0 sums knots of
    ρ–2ρ per k_BT while the level-0 spacing stays k_BT_0/ρ whatever the hottest condition."""

    n0: int
    budgets: tuple
    knots: tuple
    kappa: float
    rho: float
    kt0: float | None = None      # k_BT_0 in eV, fixed by make_plan (None: from the probe, traced)
    views: int = 0

    @property
    def levels(self) -> int:
        return len(self.budgets)

    def k_points(self, dim: int) -> int:
        """Distinct k-points at which the band geometry is evaluated (probe grid included)."""
        return PROBE ** dim + self.n0 ** dim + sum(b * 2 ** dim for b in self.budgets)


#: (n0, kappa, rho) per resolution index (2D; 3D uses n0 // 4, at least 12)
RESOLUTIONS = ((32, 0.8, 4.0), (48, 1.0, 6.0), (64, 1.25, 8.0), (96, 1.5, 10.0), (128, 1.8, 12.0),
               (192, 2.2, 16.0))


def n0_of(resolution: int, dim: int) -> int:
    n0 = RESOLUTIONS[resolution][0]
    return n0 if dim == 2 else max(12, n0 // 4)


# --------------------------------------------------------------------------------------------
# geometric factors (dimension-generic)
# --------------------------------------------------------------------------------------------

class Cols(NamedTuple):
    """Columns of one geometric factor in the flat factor vector: ``start``, the tensor
    ``shape``, and for a symmetric tensor ``expand`` (full flat index -> stored column, stored
    columns = distinct components only; None: every component stored) and ``pick``."""

    start: int
    shape: tuple
    expand: tuple | None = None
    pick: tuple | None = None      # full flat positions of the stored components (symmetric only)

    @property
    def stored(self) -> int:
        if self.expand is not None:
            return max(self.expand) + 1
        return int(np.prod(self.shape)) if self.shape else 1

    @property
    def cols(self) -> slice:
        return slice(self.start, self.start + self.stored)


def _symmetric(shape, groups):
    """(full flat positions of the distinct components, full flat index -> distinct index) of a
    tensor symmetric under permutations of the axes inside each of ``groups``."""
    canon = []
    for ix in np.ndindex(*shape):
        ix = list(ix)
        for g in groups:
            vals = sorted(ix[a] for a in g)
            for a, v in zip(g, vals):
                ix[a] = v
        canon.append(tuple(ix))
    distinct = list(dict.fromkeys(canon))
    pick = tuple(int(np.ravel_multi_index(c, shape)) for c in distinct)
    return pick, tuple(distinct.index(c) for c in canon)


def factor_layout(dim, sea):
    """Named column blocks (:class:`Cols`) of the flat factor vector and its length.  Symmetric
    tensors keep their distinct components only: g_a g_b (a↔b), ∂_a∂_bε g_c (a↔b), g_a g_b g_c
    (all), and the polarizability term g_a G_bc − … (b↔c)."""
    layout, nc = _factor_layout(dim, sea)
    return dict(layout), nc


@cache
def _factor_layout(dim, sea):
    om = () if dim == 2 else (3,)
    d2, d3 = (dim, dim), (dim,) * 3
    # the Lorentz (ordinary Hall, B ∥ z) factor exists in 2D only: 3D tables carry no zero columns
    lor = [("lor", d2, ())] if dim == 2 else []
    items = ([("one", (), ()), ("gg", d2, ((0, 1),)), ("gom", (dim,) + om, ()), ("hg", d3, ((0, 1),)),
              ("ggg", d3, ((0, 1, 2),)), ("bcp", d3, ((1, 2),))] + lor
             + [("om", om, ()), ("abs_om", (), ()), ("sc_dip", (), ()), ("sc_dr2", (), ()), ("sc_bcp", (), ())])
    if sea:
        items.append(("dom", (dim,) + om, ()))
    out, start = {}, 0
    for name, shape, groups in items:
        pick, expand = _symmetric(shape, groups) if groups else (None, None)
        out[name] = Cols(start, shape, expand, pick)
        start += out[name].stored
    return out, start


def expand_cols(x, cols: Cols):
    """Stored columns ``x`` (..., stored) of one factor as its full tensor (...,) + shape."""
    if cols.expand is not None:
        x = x[..., np.asarray(cols.expand)]
    return x.reshape(x.shape[:-1] + cols.shape)


def column_values(vals, layout, name):
    """The ``name`` factor of flat values (..., nc) as its full tensor (...,) + shape."""
    return expand_cols(vals[..., layout[name].cols], layout[name])


def point_factors(model, params, k, sea):
    """Energies (nb,), |∇ε| (nb,) and the flat factor vector (nb, nc) at one k."""
    e, g, h, om, _mom, _met, G = geometry_at(model, k, params)
    nb, dim = e.shape[0], model.dim
    gg = g[:, :, None] * g[:, None, :]
    hg = h[:, :, :, None] * g[:, None, None, :]
    ggg = gg[:, :, :, None] * g[:, None, None, :]
    gG = g[:, :, None, None] * G[:, None, :, :]
    bcp = gG - 0.5 * (jnp.swapaxes(gG, 1, 2) + jnp.transpose(gG, (0, 3, 2, 1)))
    gn = jnp.sqrt(jnp.sum(g * g, axis=-1))
    if dim == 2:
        cross = jnp.einsum("cd,nd,ncb->nb", jnp.array([[0.0, 1.0], [-1.0, 0.0]]), g, h)
        lor = g[:, :, None] * cross[:, None, :]
        gom = g * om[:, None]
        omv = om[:, None]
        omn = jnp.abs(om)
    else:
        lor = None                               # no Lorentz factor in 3D (factor_layout)
        gom = g[:, :, None] * om[:, None, :]
        omv = om
        omn = jnp.sqrt(jnp.sum(om * om, axis=-1))
    # magnitudes for the convergence floors (not physics): no derivative, and none of the
    # infinite slopes of sqrt at a band extremum
    sg = jax.lax.stop_gradient
    scales = [sg(omn)[:, None], sg(gn * omn)[:, None],
              sg(jnp.sqrt(jnp.sum(h * h, axis=(-1, -2))) * gn)[:, None],
              sg(gn * jnp.sqrt(jnp.sum(G * G, axis=(-1, -2))))[:, None]]
    def stored(name, x):
        x = x.reshape(nb, -1)
        pick = _factor_layout(dim, False)[0][name].pick
        return x if pick is None else x[:, np.asarray(pick)]

    parts = ([jnp.ones((nb, 1)), stored("gg", gg), gom.reshape(nb, -1), stored("hg", hg),
              stored("ggg", ggg), stored("bcp", bcp)] + ([] if lor is None else [lor.reshape(nb, -1)])
             + [omv.reshape(nb, -1)] + scales)
    if sea:
        dom = jax.jacfwd(lambda q: geometry_at(model, q, params)[3])(k)     # (nb, [3,] d) ∂_bΩ
        if dim == 3:
            dom = jnp.swapaxes(dom, 1, 2)                                    # (nb, b, c)
        parts.append(dom.reshape(nb, -1))
    return e, jax.lax.stop_gradient(gn), jnp.concatenate(parts, axis=-1)


def _energy_and_speed(model, params, k):
    e, g = geometry_at(model, k, params)[:2]
    return e, jnp.sqrt(jnp.sum(g * g, axis=-1))


# --------------------------------------------------------------------------------------------
# deposition onto energy knots
# --------------------------------------------------------------------------------------------

def _lagrange(t):
    """Cubic Lagrange weights of knots j−1, j, j+1, j+2 at fractional position t ∈ [0, 1)."""
    return jnp.stack([-t * (t - 1) * (t - 2) / 6, (t + 1) * (t - 1) * (t - 2) / 2,
                      -(t + 1) * t * (t - 2) / 2, (t + 1) * t * (t - 1) / 6], axis=-1)


def nearest_mu_distance(e, mu, relevant):
    """|e − μ| to the nearest μ of the conditions (P,) marked ``relevant`` (inf if none), for
    energies ``e`` of any shape: the sorted μ (non-relevant ones moved to +inf) bisected."""
    rel = jnp.sort(jnp.where(relevant, mu, jnp.inf))
    if rel.shape[0] == 1:
        return jnp.abs(e - rel[0])
    j = jnp.clip(jnp.searchsorted(rel, e), 1, rel.shape[0] - 1)
    return jnp.minimum(jnp.abs(e - rel[j - 1]), jnp.abs(e - rel[j]))


def window_coverage(x, mu, relevant, R):
    """Length of (−∞, x] ∩ ∪_p [μ_p − R, μ_p + R] over the conditions (P,) marked ``relevant``,
    for ``x`` of any shape.  With μ sorted, window p adds the new part [max(μ_p − R,
    μ_{p−1} + R), μ_p + R] to the union of the windows before it; the parts are disjoint and
    ordered, so the length is their cumulative sum up to x (a bisection) plus the part x falls in."""
    rel = jnp.sort(jnp.where(relevant, mu, jnp.inf))
    b = rel + R
    a = jnp.maximum(rel - R, jnp.concatenate([jnp.full((1,), -jnp.inf), b[:-1]]))
    length = jnp.where(jnp.isfinite(rel), b - a, 0.0)
    cum = jnp.concatenate([jnp.zeros((1,)), jnp.cumsum(length)])
    j = jnp.searchsorted(b, x, side="right")
    jc = jnp.minimum(j, rel.shape[0] - 1)
    part = jnp.where(j < rel.shape[0], jnp.clip(x - a[jc], 0.0, length[jc]), 0.0)
    return cum[j] + part


def _deposit(acc, e, f, w, e_lo, delta):
    """Add points (energies ``e`` (N, nb), factors ``f`` (N, nb, nc), weights ``w`` (N,)) to
    ``acc`` = (table (M, nc), below (nc,)).  States below the first knot go to ``below`` (fully
    occupied for every condition), states above the last knots are left out (empty for every
    condition: the plan places every window inside the table, and a window that does not fit is
    reported as overflow)."""
    table, below = acc
    M = table.shape[0]
    pos = (jax.lax.stop_gradient(e) - e_lo) / delta
    j = jnp.floor(pos)
    t = (e - e_lo) / delta - j
    lw = _lagrange(t)                                                    # (N, nb, 4)
    ji = j.astype(jnp.int32)
    idx = ji[..., None] + jnp.arange(-1, 3, dtype=jnp.int32)[None, None, :]
    inside = (ji >= 1) & (ji <= M - 3)
    wf = w[:, None, None] * f                                            # (N, nb, nc)
    val = lw[..., None] * wf[:, :, None, :]                              # (N, nb, 4, nc)
    idx = jnp.where(inside[..., None], idx, M)
    table = table.at[idx.reshape(-1)].add(val.reshape(-1, f.shape[-1]), mode="drop")
    is_below = pos < 1.0
    below = below + jnp.sum(jnp.where(is_below[..., None], wf, 0.0), axis=(0, 1))
    return table, below


def _new_acc(M, nc):
    return (jnp.zeros((M, nc)), jnp.zeros((nc,)))


def hot_view_count(ratio):
    """:attr:`Plan.views` for the hottest condition at ``ratio`` = k_BT_max/k_BT_0:
    ⌊log2 ratio⌋ + 1, or 0 when no condition is hotter than k_BT_0."""
    return int(np.floor(np.log2(ratio * (1 + 1e-12)))) + 1 if ratio > 1 else 0


def view_of(kt, kt0, views):
    """(P,) the view of level 0 (:func:`hot_views`) a condition at ``kt`` reads: ⌊log2(k_BT/k_BT_0)⌋,
    within 0 … views − 1 (ρ–2ρ knots per k_BT for a hot condition, the table itself otherwise)."""
    ratio = jax.lax.stop_gradient(kt / kt0)
    return jnp.clip(jnp.floor(jnp.log2(ratio * (1 + 1e-12))), 0, views - 1).astype(jnp.int32)


def coarsened(acc):
    """``acc`` = (table (M, nc), below) re-deposited onto knots of twice the spacing, the same
    first knot: fine knot 2k sits on coarse knot k, fine knot 2k+1 halfway between k and k+1 and
    goes to k−1 … k+2 with the cubic Lagrange weights of t = 1/2, (−1, 9, 9, −1)/16.  The moments
    Σ (E_j − ε)^m, m ≤ 3, of every deposited state are preserved (a composition of two maps that
    preserve them), so a sum over the coarse knots keeps the O(δ⁴ φ⁗) accuracy of a direct
    deposit at 2δ.  A share below the first knot joins ``below``; shares beyond the last knot
    (states above every window) are dropped.  Returns ((M/2, nc), below)."""
    table, below = acc
    even, odd = table[0::2], table[1::2]
    z1 = jnp.zeros((1,) + odd.shape[1:])
    z2 = jnp.zeros((2,) + odd.shape[1:])
    prev1 = jnp.concatenate([z1, odd[:-1]])                 # odd[k−1]
    prev2 = jnp.concatenate([z2, odd[:-2]])                 # odd[k−2]
    next1 = jnp.concatenate([odd[1:], z1])                  # odd[k+1]
    out = even + (9.0 / 16.0) * (odd + prev1) - (1.0 / 16.0) * (next1 + prev2)
    return out, below - odd[0] / 16.0


def hot_views(acc, count):
    """``count`` views of level 0's table: the table itself and its successive :func:`coarsened`
    forms, zero-padded to the table's length and stacked: ((count, M, nc), (count, nc))."""
    if count > 1 and acc[0].shape[0] % 2 ** (count - 1):
        raise ValueError(f"hot_views: a table of {acc[0].shape[0]} knots cannot be halved {count - 1} times; "
                         "level 0 needs a multiple of 2^(views - 1) knots (make_plan gives a power of two)")
    views = [acc]
    for _ in range(count - 1):
        views.append(coarsened(views[-1]))
    M = acc[0].shape[0]

    def pad(t):
        return jnp.concatenate([t, jnp.zeros((M - t.shape[0],) + t.shape[1:])]) if t.shape[0] < M else t

    return jnp.stack([pad(v[0]) for v in views]), jnp.stack([v[1] for v in views])


# --------------------------------------------------------------------------------------------
# the ladder
# --------------------------------------------------------------------------------------------

def _chunks(n, chunk):
    return -(-n // chunk)


def _grid(n, dim):
    """Reduced coordinates (n^dim, dim) of the offset grid (i + 1/2)/n."""
    ax = (np.arange(n) + 0.5) / n
    return np.stack(np.meshgrid(*([ax] * dim), indexing="ij"), -1).reshape(-1, dim)


@jax.jit
def probe_speed(model, params):
    """Largest |∇ε| (eV Å) over all bands on a PROBE^d grid (sets the temperature ladder).
    Compiled: planning calls it outside any trace, where op-by-op dispatch of the mapped band
    geometry cost about 0.17 s per call."""
    red = jnp.asarray(_grid(PROBE, model.dim))
    b = model.reciprocal_vectors(params)
    _, gn = jax.vmap(lambda q: _energy_and_speed(model, params, q))(red @ b)
    return jnp.max(gn)


def ladder_temperatures(model, params, plan: Plan):
    """k_BT_l (eV) of levels 0..L and the level-0 spacing h_0 (1/Å), traced."""
    p = jax.lax.stop_gradient(params)
    b = model.reciprocal_vectors(p)
    h0 = jnp.max(jnp.sqrt(jnp.sum(b * b, axis=-1))) / plan.n0
    if plan.kt0 is not None:
        # a fixed ladder: derivatives and fits see the same temperatures at every parameter value
        kt0 = jnp.asarray(plan.kt0)
    else:
        kt0 = plan.kappa * jnp.maximum(probe_speed(model, p), 1e-6) * h0
    return kt0 / 2.0 ** jnp.arange(plan.levels + 1, dtype=jnp.float64), h0


def build_tables(model, params, plan: Plan, mu, kt, sea, chunk=4096):
    """Fine and coarse energy tables of every level for the conditions (mu, kt) (P,).  Returns
    ``(levels, info)``: ``levels[l]`` = dict(fine=(table, below), coarse=(...),
    e_lo, delta); ``info``: ``kt_ladder`` (L+1,), ``flagged`` and ``overflow`` per refined level."""
    dim = model.dim
    n0, L = plan.n0, plan.levels
    layout, nc = factor_layout(dim, sea)
    b = jax.lax.stop_gradient(model.reciprocal_vectors(params))
    vol = jnp.abs(jnp.linalg.det(b)) / (2 * jnp.pi) ** dim
    ktl, h0 = ladder_temperatures(model, params, plan)
    mu_s, kt_s = jax.lax.stop_gradient(mu), jax.lax.stop_gradient(kt)
    halfdiag = 0.5 * jnp.sqrt(jnp.sum(b * b)) / n0
    nb = model.n_bands

    def knots_for(level, kt_window, relevant):
        mlo = jnp.min(jnp.where(relevant, mu_s, jnp.inf))
        mhi = jnp.max(jnp.where(relevant, mu_s, -jnp.inf))
        any_rel = jnp.any(relevant)
        mlo, mhi = jnp.where(any_rel, mlo, 0.0), jnp.where(any_rel, mhi, 0.0)
        delta = ktl[level] / plan.rho
        M = plan.knots[level]
        # knots on a fixed lattice of spacing δ (a small change of μ never moves them)
        centre = jnp.floor(0.5 * (mlo + mhi) / delta) * delta
        e_lo = centre - (M // 2) * delta
        # the window must fit: reported as overflow otherwise
        stencil = 2 ** max(plan.views - 1, 0) if level == 0 else 1
        fits = (mhi - mlo + 2 * W * kt_window + 12 * stencil * delta) <= (M - 1) * delta
        if level == 0:
            # a condition hotter than the views of level 0 hold (a plan reused for hotter
            # conditions) would need more knots than its window sums
            fits = fits & (jnp.max(kt_s) <= 2.0 ** plan.views * ktl[0] * (1 + 1e-12))
        return e_lo, delta, fits

    stride = 2 ** dim

    def evaluate(red, w, e_lo, delta, coarse_mask, acc_f, acc_c):
        """Geometry at reduced points ``red`` (n, d) in chunks; deposit fine (all points) and
        coarse (``coarse_mask`` points at 2^d·w, knots 2δ).  Points come in blocks of 2^d (the
        children of one coarser cell) whose first member is the only one the mask can select, so
        the coarse deposit reads every 2^d-th point.  Returns accs, energies, speeds."""
        n = red.shape[0]
        c = min(_round(chunk, stride), n)
        nch = _chunks(n, c)
        pad = nch * c - n
        # padding repeats the first point (weight 0): never a special point such as Γ, where a
        # band extremum would put an infinite slope into a zero-weight derivative
        redp = jnp.concatenate([red, jnp.broadcast_to(red[:1], (pad, dim))]) if pad else red
        wp = jnp.concatenate([w, jnp.zeros((pad,))]) if pad else w
        cm = jnp.concatenate([coarse_mask, jnp.zeros((pad,), bool)]) if pad else coarse_mask

        def body(accs, i):
            af, ac = accs
            sl = lambda x: jax.lax.dynamic_slice_in_dim(x, i * c, c)
            kk = sl(redp) @ b
            ww = sl(wp)
            e, gn, f = jax.vmap(lambda q: point_factors(model, params, q, sea))(kk)
            af = _deposit(af, e, f, ww, e_lo, delta)
            first = slice(None, None, stride)
            ac = _deposit(ac, e[first], f[first], jnp.where(sl(cm)[first], ww[first] * stride, 0.0),
                          e_lo, 2 * delta)
            return (af, ac), (jax.lax.stop_gradient(e), gn)

        def skip(accs, i):
            zeros = jnp.zeros((c, nb))
            return accs, (zeros, zeros)

        def live_body(accs, i):
            # a refined level's budget beyond its flagged cells is padding (weight 0) gathered in
            # its trailing chunks (the flagged cells come first): those chunks are skipped.  The
            # outputs of a skipped point are never read (the next level flags valid points only)
            live = jnp.any(jax.lax.dynamic_slice_in_dim(wp, i * c, c) > 0)
            return jax.lax.cond(live, body, skip, accs, i)

        (acc_f, acc_c), (e, gn) = jax.lax.scan(jax.checkpoint(live_body), (acc_f, acc_c), jnp.arange(nch))
        return acc_f, acc_c, e.reshape(-1, nb)[:n], gn.reshape(-1, nb)[:n]

    levels = []
    # level 0: the whole zone
    if n0 % 2:
        raise ValueError(f"ladder: the level-0 grid needs an even n0 (got {n0}); plans from make_plan "
                         "always have one, so pass plan=None or a plan returned by response")
    # level 0 in blocks of 2^d points (the children of one cell of the n0/2 grid), the point with
    # all indices even first: the nested sub-grid of the error estimate
    half = np.stack(np.meshgrid(*([np.arange(n0 // 2)] * dim), indexing="ij"), -1).reshape(-1, dim)
    offs = np.stack(np.meshgrid(*([np.arange(2)] * dim), indexing="ij"), -1).reshape(-1, dim)
    idx0 = (2 * half[:, None, :] + offs[None, :, :]).reshape(-1, dim)
    red0 = jnp.asarray((idx0 + 0.5) / n0)
    cmask0 = jnp.asarray(np.all(idx0 % 2 == 0, axis=-1))
    kt0w = jnp.maximum(ktl[0], jnp.max(kt_s))
    e_lo, delta, fits = knots_for(0, kt0w, jnp.ones_like(mu_s, dtype=bool))
    M0 = plan.knots[0]
    acc_f, acc_c, e_prev, g_prev = evaluate(red0, jnp.full((n0 ** dim,), vol / n0 ** dim), e_lo, delta,
                                            cmask0, _new_acc(M0, nc), _new_acc((M0 + 1) // 2, nc))
    levels.append(dict(fine=acc_f, coarse=acc_c, e_lo=e_lo, delta=delta))
    if plan.views:
        # conditions hotter than k_BT_0 read views of level 0 (Plan.views)
        levels[0]["views"] = dict(fine=hot_views(acc_f, plan.views), coarse=hot_views(acc_c, plan.views))
    red_prev, valid_prev = red0, jnp.ones((n0 ** dim,), bool)
    flagged_all, overflow_all, fits_all = [], [], [fits]
    sub = np.stack(np.meshgrid(*([np.array([-0.25, 0.25])] * dim), indexing="ij"), -1).reshape(-1, dim)
    for lev in range(1, L + 1):
        s_prev = 1.0 / (n0 * 2 ** (lev - 1))                          # reduced spacing of level lev-1
        relevant = kt_s < ktl[lev - 1]
        dist = nearest_mu_distance(e_prev, mu_s, relevant)
        reach = W * ktl[lev - 1] + SLACK * g_prev * halfdiag / 2 ** (lev - 1)
        score = jnp.min((dist - reach) / reach, axis=-1)
        score = jnp.where(valid_prev, score, jnp.inf)
        flag = score < 0
        B = plan.budgets[lev - 1]
        Bc = min(B, score.shape[0])
        # the flagged cells in index order (a linear-time compaction; a full sort for top_k cost
        # ~60 ms per level).  Beyond the budget the choice is immaterial: overflow is reported
        nflag = jnp.sum(flag)
        chosen = jnp.nonzero(flag, size=Bc, fill_value=0)[0]
        chosen_ok = jnp.arange(Bc) < nflag
        flagged_all.append(nflag)
        overflow_all.append(nflag > Bc)
        parents = red_prev[chosen]                                   # (Bc, d)
        red = (parents[:, None, :] + jnp.asarray(sub)[None, :, :] * s_prev).reshape(-1, dim)
        ok = jnp.repeat(chosen_ok, sub.shape[0])
        w = jnp.where(ok, vol / (n0 ** dim * 2 ** (dim * lev)), 0.0)
        cmask = jnp.tile(jnp.arange(sub.shape[0]) == 0, Bc) & ok
        e_lo, delta, fits = knots_for(lev, ktl[lev - 1], relevant)
        fits_all.append(fits)
        M = plan.knots[lev]
        acc_f, acc_c, e_prev, g_prev = evaluate(red, w, e_lo, delta, cmask, _new_acc(M, nc),
                                                _new_acc((M + 1) // 2, nc))
        levels.append(dict(fine=acc_f, coarse=acc_c, e_lo=e_lo, delta=delta))
        red_prev, valid_prev = red, ok
    info = {"kt_ladder": ktl, "flagged": jnp.stack(flagged_all) if flagged_all else jnp.zeros((0,), int),
            "overflow": (jnp.any(jnp.stack(overflow_all)) if overflow_all else jnp.asarray(False))
            | ~jnp.all(jnp.stack(fits_all)),
            "vol": vol, "layout": layout}
    return levels, info


# --------------------------------------------------------------------------------------------
# energy sums per condition
# --------------------------------------------------------------------------------------------

def _occupations(E, mu, kt):
    """f0, −∂f0/∂ε and s at knot energies E (P, Q) for (mu, kt) (P,)."""
    f0, F, s = occupations(E, mu[:, None], kt[:, None])
    return {"f0": f0, "F": F, "s": s}


def knot_contract(weight, vals):
    """Σ_q weight (P, Q) × vals: per-condition knot values (P, Q, n) or knots shared by every
    condition (Q, n) (one matrix product instead of P small ones)."""
    return jnp.einsum("pq,qc->pc" if vals.ndim == 2 else "pq,pqc->pc", weight, vals)


def _column_sum(vals, layout, name, weight):
    """Σ_q weight (P, Q) × the ``name`` columns of ``vals`` ((P, Q, nc) or shared (Q, nc)), shaped
    (P,) + shape."""
    cols = layout[name]
    return expand_cols(knot_contract(weight, vals[..., cols.cols]), cols)


def _lorentz(s, weight, layout, P):
    """The Lorentz sum Σ F τ² g ε g h (2D); zero in 3D, where the layout has no such columns."""
    if "lor" in layout:
        return s("lor", weight)
    dim = layout["gg"].shape[0]
    return jnp.zeros((P, dim, dim))


def _tau_free_fields(s, occ, sea):
    """The fields without τ (density, DOS, Hall, dipole, BCP, Nernst sums and their scales) from
    the knot-sum function ``s(name, weight)`` and the occupations: the same in every form below."""
    F, f0 = occ["F"], occ["f0"]
    return dict(density=s("one", f0), dos=s("one", F), ahe=s("om", f0), dipole=s("gom", F), bcp=s("bcp", F),
                nernst=s("om", occ["s"]), scale_ahe=s("abs_om", f0), scale_dipole=s("sc_dip", F),
                scale_bcp=s("sc_bcp", F), dipole_sea=s("dom", f0) if sea else None)


def _kernel_sums_dc(vals, occ, E, mu, tau, dtau, layout, sea):
    """:func:`_kernel_sums` for a static field (ω = 0): τ̃_ω = τ̃_2ω = τ is real, so the Drude and
    dipole sums equal their dc forms and χ^2ω = χ^dc; real arithmetic only (about half the work)."""
    F = occ["F"]
    s = lambda name, weight: _column_sum(vals, layout, name, weight)
    c = lambda x: x.astype(jnp.complex128)
    Ft = F * tau
    de = E - jnp.broadcast_to(mu[:, None], E.shape)
    drude0 = s("gg", Ft)
    second = s("hg", Ft * tau) + s("ggg", Ft * dtau)
    return Moments(drude=c(drude0), dipole_tau=c(s("gom", Ft)), drude2_2w=c(second), drude2_0=c(second),
                   lorentz=_lorentz(s, Ft * tau, layout, E.shape[0]), thermo1=s("gg", Ft * de),
                   thermo2=s("gg", Ft * de * de), drude0=drude0, scale_drude2=s("sc_dr2", Ft * tau),
                   **_tau_free_fields(s, occ, sea))


def _kernel_sums_free(vals, occ, E, mu, temp, tau_eval, tau_arr, omega, layout, sea):
    """:func:`_kernel_sums` for a τ free of the band energy (``scattering.energy_free``): τ is one
    number per condition, so every τ factor leaves the knot sum and ∂τ/∂ε = 0 removes the ``ggg``
    term; the knot weights are f0, F, F(ε − μ), F(ε − μ)² and s alone (no per-knot τ products)."""
    tau, _ = tau_eval(tau_arr, E[:, :1], temp[:, None])
    tau = tau[:, 0]
    F = occ["F"]
    de = E - jnp.broadcast_to(mu[:, None], E.shape)
    s = lambda name, weight: _column_sum(vals, layout, name, weight)
    b = lambda t, x: t.reshape(t.shape + (1,) * (x.ndim - 1)) * x
    common = _tau_free_fields(s, occ, sea)
    Fgg, Fhg, Fgom = s("gg", F), s("hg", F), common["dipole"]
    drude0 = b(tau, Fgg)
    Fde = F * de
    common.update(lorentz=b(tau * tau, _lorentz(s, F, layout, E.shape[0])), thermo1=b(tau, s("gg", Fde)),
                  thermo2=b(tau, s("gg", Fde * de)), drude0=drude0, scale_drude2=b(tau * tau, s("sc_dr2", F)))
    c = lambda x: x.astype(jnp.complex128)
    if omega is None:
        second = c(b(tau * tau, Fhg))
        return Moments(drude=c(drude0), dipole_tau=c(b(tau, Fgom)), drude2_2w=second, drude2_0=second, **common)
    zero = jnp.zeros_like(tau)
    t1, _ = tau_tilde(tau, zero, omega)
    t2, _ = tau_tilde(tau, zero, 2.0 * omega)
    return Moments(drude=b(t1, c(Fgg)), dipole_tau=b(t1, c(Fgom)), drude2_2w=b(t1 * t2, c(Fhg)),
                   drude2_0=b(t1 * c(tau), c(Fhg)), **common)


def _kernel_sums(vals, occ, E, mu, temp, tau_eval, tau_arr, omega, layout, sea):
    """The kernel sums of :func:`crosswind.solver.engine.kernels.point_kernels` (a
    :class:`~crosswind.solver.engine.kernels.Moments`, natural units, degeneracy not applied) from
    knot values ``vals`` (P, Q, nc) and occupation weights ``occ`` (each (P, Q)); ``E`` (P, Q) the
    knot energies.  ``omega=None`` marks a static field
    (the real-arithmetic path of :func:`_kernel_sums_dc`)."""
    if energy_free(tau_eval):
        return _kernel_sums_free(vals, occ, E, mu, temp, tau_eval, tau_arr, omega, layout, sea)
    tau, dtau = tau_eval(tau_arr, E, jnp.broadcast_to(temp[:, None], E.shape))
    if omega is None:
        return _kernel_sums_dc(vals, occ, E, mu, tau, dtau, layout, sea)
    t1, _ = tau_tilde(tau, dtau, omega)
    t2, dt2 = tau_tilde(tau, dtau, 2.0 * omega)
    tauc, dtauc = tau.astype(jnp.complex128), dtau.astype(jnp.complex128)
    F = occ["F"]

    def s(name, weight):
        cols = layout[name]
        v = vals[..., cols.cols]
        if jnp.iscomplexobj(weight):          # real tables: two real sums, no complex copy
            out = jax.lax.complex(knot_contract(weight.real, v), knot_contract(weight.imag, v))
        else:
            out = knot_contract(weight, v)
        return expand_cols(out, cols)

    Fc = F.astype(jnp.complex128)
    de = E - jnp.broadcast_to(mu[:, None], E.shape)
    return Moments(drude=s("gg", Fc * t1), dipole_tau=s("gom", Fc * t1),
                   drude2_2w=s("hg", Fc * t1 * t2) + s("ggg", Fc * t1 * dt2),
                   drude2_0=s("hg", Fc * t1 * tauc) + s("ggg", Fc * t1 * dtauc),
                   lorentz=_lorentz(s, F * tau * tau, layout, E.shape[0]),
                   thermo1=s("gg", F * de * tau), thermo2=s("gg", F * de * de * tau),
                   drude0=s("gg", F * tau), scale_drude2=s("sc_dr2", F * tau * tau),
                   **_tau_free_fields(s, occ, sea))


def _window_values(tables, view, e_lo, delta, start, Q):
    """Knot values (P, Q, nc) and energies (P, Q) from knot index ``start`` (P,) of each
    condition's view ``view`` (P,) of the stacked ``tables`` (V, M, nc), whose knots are spaced
    ``delta`` (P,); knots outside the table read as zero."""
    M = tables.shape[1]
    j = start[:, None] + jnp.arange(Q, dtype=jnp.int32)[None, :]
    inside = (j >= 0) & (j < M)
    v = jnp.where(inside[..., None], tables[view[:, None], jnp.clip(j, 0, M - 1)], 0.0)
    return v, e_lo + j.astype(jnp.float64) * delta[:, None]


def _level_sums(acc, e_lo, delta, mu, kt_hi, kt_lo, kt_win, temp, tau_eval, tau_arr, omega, layout,
                sea, rho, first, filled_vol, view=None):
    """Σ_j table_j [φ(E_j; kt_hi) − φ(E_j; kt_lo)] over the knots within W·kt_win of μ (for the
    first level: φ(kt_hi) alone, plus the fully occupied states below the window).

    ``view`` (P,), level 0 only: ``acc`` then holds the stacked views of :func:`hot_views` and
    each condition reads view v (knots 2^v δ, ρ–2ρ per k_BT of the hot conditions, so the first
    level's window then sums twice the knots).

    Each condition sums the Q knots of its own window; when the windows of all conditions of the
    chunk lie within one slice of the table (the whole table when it has at most 4Q knots, else 2Q
    knots around neighbours in μ: ladder_moments sorts them) of one view, they read that shared
    slice instead, with every weight set to zero outside the condition's own window (f0 to 1 below
    it on the first level), and the sums become matrix products: the same sums."""
    Q = int(2 * (W + 1) * rho * (1 if first and view is None else 2)) + 8
    tables, belows = acc
    if view is None:
        tables, belows = tables[None], belows[None]
        view = jnp.zeros(mu.shape, jnp.int32)
    M = tables.shape[1]
    dv = delta * 2.0 ** view.astype(jnp.float64)                                     # (P,)
    # the shared slice: the whole table when it is short (one matrix product over at most 4Q
    # knots still beats Q gathered knots per condition), else 2Q knots
    U = M if M <= 4 * Q else 2 * Q
    start = jnp.floor(jax.lax.stop_gradient((mu - W * kt_win - e_lo) / dv)).astype(jnp.int32) - 2

    def occupations(E):
        occ = _occupations(E, mu, kt_hi)
        if not first:
            lo = _occupations(E, mu, kt_lo)
            occ = {k: occ[k] - lo[k] for k in occ}
        return occ

    def finish(out, lo):
        if not first:
            return out
        csum = jnp.concatenate([jnp.zeros((tables.shape[0], 1, tables.shape[2])), jnp.cumsum(tables, axis=1)],
                               axis=1)
        pre = belows[view] + csum[view, jnp.clip(lo, 0, M)]                          # (P, nc)
        add = {}
        for key, name in (("density", "one"), ("ahe", "om"), ("scale_ahe", "abs_om"),
                          ("dipole_sea", "dom")):
            if getattr(out, key) is not None:
                add[key] = getattr(out, key) + column_values(pre, layout, name)
        add["density"] = add["density"] - filled_vol
        return dataclasses.replace(out, **add)

    def own(_):
        vals, E = _window_values(tables, view, e_lo, dv, start, Q)
        return finish(_kernel_sums(vals, occupations(E), E, mu, temp, tau_eval, tau_arr, omega, layout, sea),
                      start)

    s0 = jnp.clip(jnp.min(start), 0, M - U)
    v0 = view[0]

    def shared(_):
        vals = jax.lax.dynamic_slice(tables[v0], (s0, jnp.int32(0)), (U, tables.shape[2]))   # (U, nc)
        j = s0 + jnp.arange(U, dtype=jnp.int32)
        E = jnp.broadcast_to(e_lo + j.astype(jnp.float64) * dv[0], (mu.shape[0], U))
        rel = j[None, :] - start[:, None]
        inside = (rel >= 0) & (rel < Q)
        occ = {k: jnp.where(inside, v, 0.0) for k, v in occupations(E).items()}
        if first:
            occ["f0"] = jnp.where(rel < 0, 1.0, occ["f0"])
        out = _kernel_sums(vals, occ, E, mu, temp, tau_eval, tau_arr, omega, layout, sea)
        return finish(out, jnp.full_like(start, s0))

    if mu.shape[0] < SHARED_MIN:
        return own(None)
    # every condition's window (its part inside the table: outside it reads zero) in the slice,
    # all of one view
    can_share = ((jnp.clip(jnp.min(start), 0, M) >= s0)
                 & (jnp.clip(jnp.max(start) + Q, 0, M) <= s0 + U)
                 & jnp.all(view == v0))
    return jax.lax.cond(can_share, shared, own, None)


def _tree_add(a, b):
    return jax.tree_util.tree_map(jnp.add, a, b)


def _level_part(levels, info, plan, lv, which, mu, k_hi, k_lo, temp, tau_eval, tau_arr, omega, filled, sea):
    """Level ``lv``'s knot sums Σ_j table_j [φ(E_j; k_hi) − φ(E_j; k_lo)] (level 0: φ(k_hi) and the
    filled states below its table) for conditions (P,), from the ``which`` ("fine"/"coarse") tables."""
    lev = levels[lv]
    # knots per k_BT of the level (a table shared by several levels carries its own)
    rho = lev.get("rho", plan.rho) * (1.0 if which == "fine" else 0.5)
    delta = lev["delta"] if which == "fine" else 2 * lev["delta"]
    if lv == 0:
        # a condition hotter than k_BT_0 reads the view of ρ–2ρ knots per its k_BT (Plan.views)
        hot = "views" in lev
        view = view_of(k_hi, info["kt_ladder"][0], plan.views) if hot else None
        return _level_sums(lev["views"][which] if hot else lev[which], lev["e_lo"], delta, mu, k_hi, None, k_hi,
                           temp, tau_eval, tau_arr, omega, info["layout"], sea, rho, True, filled * info["vol"], view)
    return _level_sums(lev[which], lev["e_lo"], delta, mu, k_hi, k_lo, info["kt_ladder"][lv - 1], temp,
                       tau_eval, tau_arr, omega, info["layout"], sea, rho, False, 0.0)


def edge_distance(states, E, mu, kt, reach):
    """(P,) a lower bound on the distance from μ to the nearest band edge within the window, in
    units of ``kt`` (inf if there is none).  The nodes of a ray sit some tenths of k_BT apart in
    energy, finer than the knots, so single knots between them hold nothing: a knot counts as
    holding states when one within ``reach`` knots does, which moves an edge by up to ``reach``
    knots towards its empty side; that many knot spacings are taken off the distance.  (Used by the
    T² extrapolation's error here and in :mod:`crosswind.solver.engine.rays`.)"""
    E, mu, kt = (jax.lax.stop_gradient(a) for a in (E, mu, kt))
    s = jnp.broadcast_to(states != 0, E.shape).astype(jnp.int32)
    c = jnp.pad(jnp.cumsum(s, axis=1), ((0, 0), (reach + 1, reach)), mode="edge").at[:, :reach + 1].set(0)
    n = E.shape[1]
    held = (c[:, 2 * reach + 1:2 * reach + 1 + n] - c[:, :n]) > 0        # any within ±reach knots
    edge = held[:, 1:] != held[:, :-1]
    x = jnp.abs(0.5 * (E[:, 1:] + E[:, :-1]) - mu[:, None]) / kt[:, None]
    shift = reach * (E[:, 1] - E[:, 0]) / kt
    return jnp.maximum(jnp.min(jnp.where(edge, x, jnp.inf), axis=1) - shift, 0.0)


#: factor of the band-edge term of the T² extrapolation's error (:func:`_extrapolated`,
#: :func:`crosswind.solver.engine.rays.condition_sums`) and the distance (in k_BT of the deepest
#: level) within which an edge is looked for: beyond it the term is below 2e-5 of the value
EDGE_SAFETY = 2.0
EDGE_SEARCH = 12.0


def deepest_edges(levels, info, plan, mu):
    """(P,) :func:`edge_distance` from each μ to the nearest band edge, in units of the deepest
    level's k_BT_L, read from the states ("one" column) of that level's fine table within
    ``EDGE_SEARCH`` k_BT_L of μ (inf if none); that table resolves every state near μ on knots of
    k_BT_L/ρ, so an edge is placed within two knots."""
    L = plan.levels
    lev = levels[L]
    table = lev["fine"][0]
    M = table.shape[0]
    rho = lev.get("rho", plan.rho)
    ktl = jax.lax.stop_gradient(info["kt_ladder"][L])
    delta = jax.lax.stop_gradient(lev["delta"])
    e_lo = jax.lax.stop_gradient(lev["e_lo"])
    half = int(np.ceil(EDGE_SEARCH * rho)) + 4
    m = jax.lax.stop_gradient(mu)
    j = jnp.floor((m - e_lo) / delta).astype(jnp.int32)[:, None] + jnp.arange(-half, half + 1, dtype=jnp.int32)[None, :]
    one = table[jnp.clip(j, 0, M - 1), info["layout"]["one"].start]
    states = jnp.where((j >= 0) & (j < M), one, 0.0)
    E = e_lo + j.astype(jnp.float64) * delta
    return edge_distance(states, E, m, jnp.full(m.shape, ktl), 2)


#: safety factor of the window-truncation bounds (:func:`window_tails`, and
#: :func:`crosswind.solver.engine.rays.tail_fraction`: there the bound holds with about a factor 2
#: to spare for a band edge in a gap, measured on a massive Dirac cone; the factor covers the
#: (ε − μ)² weight of the thermal conductivity's sums)
TAIL_SAFETY = 4.0


def window_tails(levels, info, plan, mu, kt):
    """(P,) bound on the fraction of each condition's sums lost to the windows: (s + 1)·
    TAIL_SAFETY·e^{−(W − x)} (at most 1), x k_BT* the distance from μ to the nearest state,
    k_BT* = max(k_BT, k_BT_L), s the level of the condition's temperature step.

    Every level l ≤ s sums the states within W k_BT_{l−1} ≥ W k_BT* of μ in full; a state farther
    out is left with the telescoped part φ(T_m) of the levels that reach it, and W k_BT_m < d
    there, so each such shell of states keeps at most e^{−W} of its weight where the truth is
    smaller still.  With μ in a gap x k_BT* from a band edge, the sums themselves are ~e^{−x} of
    that weight: a fraction e^{−(W − x)} per shell (a 2D step of the density of states), one shell
    per level.  x is read from the fine table of the condition's own step level (level 0's view
    for hot conditions), whose knots (at most k_BT*/ρ apart) cover the window: a knot that holds
    states proves one within 2 knots (the deposit's stencil; 3 knots of a coarsened view, whose
    re-deposit spreads a state up to 2.87 knots), so x is taken that much farther out, an upper
    bound, and the bound is conservative.  μ inside a band gives x of 2–3 knots, 2.5/ρ at most,
    and t ≈ (L + 1)·4·e^{2.5/ρ − W}, about 1e-7."""
    ktl = jax.lax.stop_gradient(info["kt_ladder"])
    L = plan.levels
    m = jax.lax.stop_gradient(mu)
    kts = jnp.maximum(jax.lax.stop_gradient(kt), ktl[L])
    s = jnp.minimum(step_level(kts, ktl), L)
    one = info["layout"]["one"].start
    near = jnp.full(m.shape, jnp.inf)
    for lv in range(L + 1):
        lev = levels[lv]
        table = lev["fine"][0]
        delta = jax.lax.stop_gradient(lev["delta"]) * jnp.ones(m.shape)
        view = jnp.zeros(m.shape, jnp.int32)
        if lv == 0 and "views" in lev:
            table = lev["views"]["fine"][0]
            view = view_of(kts, ktl[0], plan.views)
            delta = delta * 2.0 ** view.astype(jnp.float64)
        else:
            table = table[None]
        # the window ±(W + 1) k_BT*: ρ–2ρ knots per k_BT* on the step level
        per = (1 if lv == 0 and "views" not in lev else 2) * lev.get("rho", plan.rho)
        Q = int(2 * (W + 1) * per) + 8
        M = table.shape[1]
        e_lo = jax.lax.stop_gradient(lev["e_lo"])
        j = (jnp.floor((m - (W + 1) * kts - e_lo) / delta).astype(jnp.int32) - 2)[:, None] \
            + jnp.arange(Q, dtype=jnp.int32)[None, :]
        held = jnp.where((j >= 0) & (j < M), table[view[:, None], jnp.clip(j, 0, M - 1), one], 0.0) != 0
        d = jnp.abs(e_lo + j.astype(jnp.float64) * delta[:, None] - m[:, None])
        reach = jnp.where(view > 0, 3.0, 2.0) * delta
        d = jnp.min(jnp.where(held, d, jnp.inf), axis=1) + reach
        near = jnp.where(s == lv, d, near)
    x = jnp.minimum(near / kts, 2 * W)
    return jnp.minimum(1.0, (s + 1).astype(jnp.float64) * TAIL_SAFETY * jnp.exp(x - W))


def _extrapolated(total, partial, kt, ktl, L, edge=None):
    """The sums returned for conditions (P,) with running totals ``partial[l]`` over levels 0..l
    (each the full result at k_BT_l for a condition colder than it) and final ``total``: below the
    deepest level, X(T) = X0 + a T² from the partial sums at T_L and T_{L−1}, with the spread
    against the same from T_{L−1} and T_{L−2} as its error.  A band edge ``edge`` (P,) k_BT_L from μ
    (:func:`deepest_edges`) breaks the T² law (a 2D step of the density of states gives
    X(T) − X(0) ∝ k_BT ln(1 + e^{−d/k_BT}), and the two extrapolations agree on a wrong value): the
    error then also gets EDGE_SAFETY·e^{−x} of the larger of the extrapolated and the T_L value,
    for every field (the density's step is a kink, smaller still).  Returns ``(sums, error)``."""
    below = kt < ktl[L]
    tL, t1 = ktl[L], ktl[L - 1] if L >= 1 else ktl[L]

    def extrap(x_lo, x_hi, k_lo, k_hi):
        a = jax.tree_util.tree_map(lambda u, v: (u - v) / (k_hi ** 2 - k_lo ** 2).astype(u.dtype), x_hi, x_lo)
        return jax.tree_util.tree_map(lambda x, aa: x + aa * _b((kt ** 2 - k_lo ** 2).astype(aa.dtype), aa),
                                      x_lo, a)

    if L >= 2:
        ext1 = extrap(partial[L], partial[L - 1], tL, t1)
        ext2 = extrap(partial[L - 1], partial[L - 2], t1, ktl[L - 2])
        sel = lambda x, y: jnp.where(_b(below, x), x, y)
        result = jax.tree_util.tree_map(sel, ext1, total)
        err = jax.tree_util.tree_map(lambda x, y: jnp.where(_b(below, x), jnp.abs(x - y), 0.0), ext1, ext2)
        if edge is not None:
            near = EDGE_SAFETY * jnp.exp(-jnp.minimum(edge, 50.0))
            err = jax.tree_util.tree_map(
                lambda e, x, y: e + jnp.where(_b(below, e), _b(near, e) * jnp.maximum(jnp.abs(x), jnp.abs(y)), 0.0),
                err, ext1, partial[L])
    else:
        result = total
        err = jax.tree_util.tree_map(lambda x: jnp.where(_b(below, x), jnp.inf, 0.0), total)
    return result, err


def condition_sums(levels, info, plan: Plan, mu, kt, temp, tau_eval, tau_arr, omega, filled, sea,
                   which="fine", edge=None):
    """Kernel sums for conditions (P,) from the tables of :func:`build_tables`, with the T²
    extrapolation below the deepest level (``edge``: :func:`deepest_edges` of the conditions, read
    once for the fine and the coarse sums).  Returns ``(sums, extrapolation_error)``."""
    ktl = info["kt_ladder"]
    L = plan.levels
    kstar = [jnp.maximum(kt, ktl[lv]) for lv in range(L + 1)]
    partial = []
    total = None
    for lv in range(L + 1):
        if lv == 0:
            part = _level_part(levels, info, plan, 0, which, mu, kstar[0], None, temp, tau_eval, tau_arr,
                               omega, filled, sea)
        else:
            def refined(lv=lv):
                return _level_part(levels, info, plan, lv, which, mu, kstar[lv], kstar[lv - 1], temp,
                                   tau_eval, tau_arr, omega, filled, sea)
            # a condition with k_BT ≥ k_BT_{l−1} has φ(T*_l) = φ(T*_{l−1}): its level-l sum is
            # exactly zero.  A block of conditions that all are (ladder_moments sorts them by
            # temperature) skips the level's knot sums
            # (the zero branch takes its structure from the running total: no second trace)
            part = jax.lax.cond(jnp.any(kt < ktl[lv - 1]), refined,
                                lambda t=total: jax.tree_util.tree_map(jnp.zeros_like, t))
        total = part if total is None else _tree_add(total, part)
        partial.append(total)
    return _extrapolated(total, partial, kt, ktl, L, edge)


def step_level(kt, ktl):
    """(P,) the ladder level whose temperature step holds each k_BT: 0 for k_BT ≥ k_BT_0, l for
    k_BT_l ≤ k_BT < k_BT_{l−1}, L + 1 below the deepest level.  Every level before it sums
    φ(T_l) − φ(T_{l−1}) at ladder temperatures only (shared by a sweep: :func:`shared_totals`), the level itself
    φ(T) − φ(T_{l−1}), and every level after it exactly zero."""
    return jnp.sum(kt[:, None] < ktl[None, :], axis=1)


def step_sums(levels, info, plan: Plan, mu, kt, temp, tau_eval, tau_arr, omega, filled, sea, which="fine"):
    """The term of each condition's own temperature step alone (:func:`step_level`): level s's sum
    of φ(T*_s) − φ(T*_{s−1}) (level 0: φ(T*_0) with the filled states below its table), zero below
    the deepest level.  A condition at exactly k_BT_l gives the ladder-temperature term of level l,
    φ(T_l) − φ(T_{l−1}), of its (μ, τ).  A chunk (sorted by temperature) sums only the levels its
    conditions' steps are on."""
    ktl = info["kt_ladder"]
    lp = step_level(kt, ktl)

    def own(lv):
        k_lo = None if lv == 0 else jnp.maximum(kt, ktl[lv - 1])
        return _level_part(levels, info, plan, lv, which, mu, jnp.maximum(kt, ktl[lv]), k_lo, temp,
                           tau_eval, tau_arr, omega, filled, sea)

    shape = jax.eval_shape(partial(own, 0))
    zeros = lambda: jax.tree_util.tree_map(lambda a: jnp.zeros(a.shape, a.dtype), shape)
    step = None
    for lv in range(plan.levels + 1):
        at = lp == lv
        part = jax.lax.cond(jnp.any(at), partial(own, lv), zeros)
        part = jax.tree_util.tree_map(lambda x, at=at: jnp.where(_b(at, x), x, 0.0), part)
        step = part if step is None else _tree_add(step, part)
    return step


def shared_totals(step, virtual, group, kt, ktl, L, edge=None):
    """:func:`condition_sums` of conditions (P,) from their own step terms ``step`` and the
    ladder-temperature terms ``virtual`` (L + 1, G, ...) of the (μ, τ) groups (``group`` (P,) each
    condition's row): the running totals over the levels before a condition's step, plus its step,
    and the T² extrapolation below the deepest level from the totals at T_L … T_{L−2}; the same
    terms added in the same order.  Returns ``(sums, extrapolation_error)``."""
    running, totals = None, []
    for lv in range(L + 1):
        term = jax.tree_util.tree_map(lambda x, lv=lv: x[lv], virtual)
        running = term if running is None else _tree_add(running, term)
        totals.append(running)
    stacked = jax.tree_util.tree_map(lambda *x: jnp.stack(x), *totals)            # (L + 1, G, ...)
    read = lambda lv: jax.tree_util.tree_map(lambda x: x[lv, group], stacked)
    lp = step_level(kt, ktl)
    prior = jax.tree_util.tree_map(lambda x: jnp.where(_b(lp >= 1, x), x, 0.0), read(jnp.clip(lp - 1, 0, L)))
    total = _tree_add(prior, step)
    # below the deepest level every level is at ladder temperatures: total = the group's last total
    return _extrapolated(total, {lv: read(lv) for lv in range(max(L - 2, 0), L + 1)}, kt, ktl, L, edge)


def _b(v, like):
    """Broadcast a (P,) array against ``like`` (P, ...)."""
    return v.reshape(v.shape + (1,) * (like.ndim - 1))


def ladder_moments(model, params, plan: Plan, mu, kt, temp, tau_eval, tau_arr, omega, filled, sea,
                   chunk=4096, condition_chunk=128, groups=None):
    """Fine and coarse kernel sums for P conditions from one ladder.  Returns
    ``(fine, coarse, extrapolation_error, info)``; conditions are processed in chunks of
    ``condition_chunk`` (memory bounded for any number of conditions)."""
    levels, info = build_tables(model, params, plan, mu, kt, sea, chunk)
    return moments_from_tables(levels, info, plan, mu, kt, temp, tau_eval, tau_arr, omega, filled, sea,
                               condition_chunk, groups, tails=True)


def sweep_groups(keys, chunk=128):
    """Conditions that share their ladder-temperature sums, from concrete per-condition ``keys``
    (P, n): μ, every τ parameter, and T where τ depends on it.  Returns ``(rep, group)`` for
    :func:`moments_from_tables` (``rep`` (G,) one member of each distinct key in order of μ,
    padded by repeats to a power of two of at least ``chunk`` rows; ``group`` (P,) each
    condition's row), or None when sharing would save less than half of the rows (G > P/2)."""
    keys = np.asarray(keys, dtype=float)
    P = keys.shape[0]
    if P < 2 * chunk:
        return None
    _, first, group = np.unique(keys, axis=0, return_index=True, return_inverse=True)
    G = _pow2(first.size, floor=chunk)
    if G > P // 2:
        return None
    rep = np.concatenate([first, np.full(G - first.size, first[-1])])
    return jnp.asarray(rep, jnp.int32), jnp.asarray(group.reshape(P), jnp.int32)


def _padded(x, n):
    """``x`` (P, ...) extended to n rows by repeating its last row."""
    pad = n - x.shape[0]
    return jnp.concatenate([x, jnp.broadcast_to(x[-1:], (pad,) + x.shape[1:])]) if pad else x


def moments_from_tables(levels, info, plan, mu, kt, temp, tau_eval, tau_arr, omega, filled, sea,
                        condition_chunk=128, groups=None, tails=False):
    """:func:`ladder_moments` from tables already built (also those of
    :mod:`crosswind.solver.engine.tetra`).  ``tails``: also return each condition's
    :func:`window_tails` as ``info["tail"]`` (P,) (the ladder's own tables only).

    ``groups`` = (rep (G,), group (P,)) marks conditions that share μ and τ (a μ × T sweep with a
    temperature-free τ): their terms at the ladder temperatures depend on nothing else, so they are
    formed once per group, as the step terms of one member of each group (``rep``, padded by
    repeats) placed at every k_BT_l (:func:`step_sums`), and each condition sums the term of its own
    step only (:func:`shared_totals`): the same sums, at about 1/(L + 1) of the per-condition work,
    and one compiled set of level sums as without groups."""
    P = mu.shape[0]
    cond_args = (mu, kt, temp, tau_arr)
    if groups is not None:
        rep, group = groups
        G, K = rep.shape[0], plan.levels + 1
        ktl = info["kt_ladder"]
        # G × (L + 1) more conditions: each group's member at every ladder temperature
        per_level = lambda x: jnp.tile(jnp.take(x, rep, axis=0), (K,) + (1,) * (x.ndim - 1))
        extra = (per_level(mu), jnp.repeat(ktl, G), per_level(temp), jax.tree_util.tree_map(per_level, tau_arr))
        cond_args = jax.tree_util.tree_map(lambda x, y: jnp.concatenate([x, y]), cond_args, extra)
    N = cond_args[0].shape[0]
    cc = min(condition_chunk, N)
    nch = _chunks(N, cc)
    padv = lambda x: _padded(x, nch * cc)
    # conditions sorted hot to cold, so that a chunk's conditions need the same ladder levels
    # (condition_sums skips a level none of them needs); the results are put back in order below
    # (and by μ within a temperature: neighbouring windows can share one table slice)
    m_all, kt_all = cond_args[0], cond_args[1]
    order = jnp.lexsort((jax.lax.stop_gradient(m_all), -jax.lax.stop_gradient(kt_all)))
    take = lambda x: jnp.take(x, order, axis=0)
    args = jax.tree_util.tree_map(lambda x: padv(take(x)), cond_args)

    def one(a):
        m, k, t, ta = a
        tail = (window_tails(levels, info, plan, m, k),) if tails else ()
        if groups is not None:
            return tuple(step_sums(levels, info, plan, m, k, t, tau_eval, ta, omega, filled, sea, w)
                         for w in ("fine", "coarse")) + tail
        edge = deepest_edges(levels, info, plan, m) if plan.levels >= 2 else None
        f, ef = condition_sums(levels, info, plan, m, k, t, tau_eval, ta, omega, filled, sea, "fine", edge)
        c, ec = condition_sums(levels, info, plan, m, k, t, tau_eval, ta, omega, filled, sea, "coarse", edge)
        return (f, c, jax.tree_util.tree_map(jnp.maximum, ef, ec)) + tail

    split = lambda x: x.reshape((nch, cc) + x.shape[1:])
    out = jax.lax.map(one, jax.tree_util.tree_map(split, args))
    back = jnp.argsort(order)
    out = jax.tree_util.tree_map(lambda x: jnp.take(x.reshape((nch * cc,) + x.shape[2:])[:N], back, axis=0), out)
    if tails:
        info = dict(info, tail=out[-1][:P])
    if groups is None:
        return out[0], out[1], out[2], info
    real = lambda x: x[:P]
    virtual = lambda x: x[P:].reshape((K, G) + x.shape[1:])
    edge = deepest_edges(levels, info, plan, mu) if plan.levels >= 2 else None
    f, ef = shared_totals(jax.tree_util.tree_map(real, out[0]), jax.tree_util.tree_map(virtual, out[0]), group,
                          kt, ktl, plan.levels, edge)
    c, ec = shared_totals(jax.tree_util.tree_map(real, out[1]), jax.tree_util.tree_map(virtual, out[1]), group,
                          kt, ktl, plan.levels, edge)
    return f, c, jax.tree_util.tree_map(jnp.maximum, ef, ec), info


# --------------------------------------------------------------------------------------------
# planning (concrete values): levels, budgets and knot counts
# --------------------------------------------------------------------------------------------

#: per resolution index (K): conditions colder than this are extrapolated in T² from the deepest
#: levels (when k_BT is not small against the distance of μ to a band edge, the extrapolation's
#: error grows by the edge term of _extrapolated; a higher resolution then goes colder)
T_DEEP = (16.0, 8.0, 4.0, 2.0, 1.0, 0.5)


def _pow2(x, floor=64):
    return int(max(floor, 2 ** int(np.ceil(np.log2(max(x, 1.0))))))


#: level-0 resolution of the narrowest Berry-curvature hot spot per resolution index: the strip
#: half-width a of the band-gap zero must satisfy 2πa/h0 ≥ HOT (aliasing error ~ e^{-HOT})
HOT = (24.0, 30.0, 36.0, 42.0, 48.0, 54.0)
N0_MAX = {2: 768, 3: 96}


#: budget of a refined level = BUDGET_SLACK × its expected count of flagged cells (+64, rounded up to
#: 256).  The counts of :func:`_level_fractions` came 0–2 % above the cells the run flagged
#: (honeycomb at 1–10 K and 2 meV above a band edge, Haldane, tmd-lattice, sweeps; the earlier
#: factor 1.3 left about 23 % of every refined level's points at zero weight); a level that still
#: overflows is rerun with budgets from the counts it reports
BUDGET_SLACK = 1.1


def _round(x, q):
    return int(q * np.ceil(max(x, 1.0) / q))


def make_plan(model, params, mu, temperature, resolution: int, flagged=None, old=None) -> Plan:
    """The ladder for concrete conditions.  n0 resolves the narrowest Berry-curvature hot spot
    (half-width a = gap/(2 v_max) of the smallest gap between adjacent bands of a block, so that
    2πa/h0 ≥ HOT[resolution]); enough levels to reach min(T) (or T_DEEP[resolution]); budgets from the
    fraction of every level-0 cell that each level's window covers; knot counts that fit the μ
    range.  ``flagged`` (counts returned by a run that overflowed) raises the budgets of ``old``."""
    dim = model.dim
    _, kappa, rho = RESOLUTIONS[resolution]
    mu = np.atleast_1d(np.asarray(mu, dtype=float)).ravel()
    kt = KB * np.maximum(np.atleast_1d(np.asarray(temperature, dtype=float)).ravel(), T_FLOOR)
    b = np.asarray(model.reciprocal_vectors(params))
    bmax = float(np.max(np.linalg.norm(b, axis=-1)))
    a_hot = hotspot_width(model, params)
    n0 = n0_of(resolution, dim)
    if np.isfinite(a_hot):
        n0 = max(n0, _round(bmax * HOT[resolution] / (2 * np.pi * a_hot), 8))
    n0 = min(n0, N0_MAX[dim])
    probe = Plan(n0, (), (64,), kappa, rho)
    ktl0 = float(ladder_temperatures(model, params, probe)[0][0])
    if not np.isfinite(ktl0):
        raise ValueError(f"response: the band energies or velocities of model '{model.name}' are NaN or "
                         "infinite somewhere in the Brillouin zone (found while planning the k-space "
                         "ladder); check the Hamiltonian and its parameters there")
    target = KB * max(float(np.min(kt)) / KB, T_DEEP[resolution])
    if ktl0 > target and n0 < N0_MAX[dim]:
        # refine level 0 by a factor in [1, 2) so that a level resolves exactly the coldest
        # condition: the deepest (most populous) level is then no finer than it must be
        lf = int(np.floor(np.log2(ktl0 / target)))
        n0 = min(_round(n0 * (ktl0 / 2.0 ** lf) / target, 8), N0_MAX[dim])
        probe = Plan(n0, (), (64,), kappa, rho)
        ktl0 = float(ladder_temperatures(model, params, probe)[0][0])
    L = max(2, int(np.ceil(np.log2(ktl0 / target)))) if ktl0 > target else 2
    ktl = ktl0 / 2.0 ** np.arange(L + 1)
    span = float(np.ptp(mu)) if mu.size else 0.0
    k0 = max(ktl0, float(kt.max()))
    views = hot_view_count(k0 / ktl0)
    # level 0 keeps knots of k_BT_0/ρ and grows to hold the hottest window (with room for the
    # four-knot stencils of its coarsest view)
    knots = [_pow2((span + 2 * W * k0 + 16 * 2 ** max(views - 1, 0) * ktl0 / rho) / (ktl0 / rho) + 16)]
    for lev in range(1, L + 1):
        knots.append(_pow2((span + 2 * W * ktl[lev - 1]) / (ktl[lev] / rho) + 32))
    if old is not None and flagged is not None and len(old.budgets) == L and old.n0 == n0 \
            and old.kt0 == float(ktl0):
        grow, budgets = 1.0, []
        for bud, f in zip(old.budgets, flagged):
            # a level that overflowed also starves the levels below it: scale those too
            grow = max(grow, 1.3 * f / bud if f > bud else 1.0)   # overflowed: a wider margin
            budgets.append(_round(bud * grow, 256) if grow > 1 else bud)
        budgets = tuple(budgets)
    else:
        counts = _level_counts(model, params, n0, mu, kt, ktl)
        budgets = tuple(_round(BUDGET_SLACK * c + 64, 256) for c in counts)
    return Plan(n0, budgets, tuple(knots), kappa, rho, float(ktl0), views)


def hotspot_width(model, params, probe=96):
    """Half-width a (1/Å) of the analytic strip of the Berry curvature at the smallest gap Δ
    between adjacent bands of any Hamiltonian block: a = Δ/(2 v_max) (a Dirac gap 2m closes at
    k = ±i m/ħv; common practice).  The gap minimum is located on a probe grid and polished by a
    Nelder–Mead search; inf for blocks with a single band."""
    if model.block_size < 2:
        return np.inf
    b = np.asarray(model.reciprocal_vectors(params))
    red = _grid(probe, model.dim)
    gaps = np.asarray(_block_gaps_jit(model, params, jnp.asarray(red @ b)))
    i = int(np.argmin(gaps))
    f = lambda r: float(_block_gaps_jit(model, params, jnp.asarray((r[None, :] % 1.0) @ b))[0])
    res = minimize(f, red[i], method="Nelder-Mead",
                   options=dict(xatol=1e-7, fatol=1e-10, initial_simplex=None, maxiter=400))
    gap = min(float(res.fun), float(gaps[i]))
    vmax = float(probe_speed(model, params))
    return max(gap, 0.0) / (2 * max(vmax, 1e-6))


@jax.jit
def _block_gaps_jit(model, params, k):
    def one(q):
        w = energies_at(model, q, params, ordered=False).reshape(-1, model.block_size)   # (S, m)
        return jnp.min(w[:, 1:] - w[:, :-1])
    return jax.vmap(one)(k)


def _level_counts(model, params, n0, mu, kt, ktl):
    """Expected number of flagged level-(l−1) cells for l = 1..L, from the level-0 grid: the
    fraction of each level-0 cell's energy range [ε − |∇ε|h, ε + |∇ε|h] inside the union of the
    windows of level l (:func:`window_coverage`), times the 2^{d(l−1)} cells of level l−1 in it."""
    ktl = np.asarray(ktl, dtype=float)
    # conditions padded to a power of two by repeating the last one (a repeated μ changes no
    # distance): one compiled program for every sweep length in the same bucket
    mu, kt = np.asarray(mu, dtype=float).ravel(), np.asarray(kt, dtype=float).ravel()
    pad = _pow2(mu.size, floor=1) - mu.size
    mu, kt = np.concatenate([mu, np.repeat(mu[-1:], pad)]), np.concatenate([kt, np.repeat(kt[-1:], pad)])
    fracs, anyrel = _level_fractions(model, params, jnp.asarray(mu), jnp.asarray(kt),
                                     jnp.asarray(ktl[:-1]), n0=n0)
    fracs, anyrel = np.asarray(fracs), np.asarray(anyrel)
    return [float(f) * 2 ** (model.dim * lev) if a else 0
            for lev, (f, a) in enumerate(zip(fracs, anyrel))]


#: level-0 points per axis from which the budget counts use the n0/2 grid (see _level_fractions)
COUNT_HALF = 128


@partial(jax.jit, static_argnames=("n0",))
def _level_fractions(model, params, mu, kt, kt_parent, *, n0):
    """Σ over level-0 cells of the window fraction for each refined level (parent temperatures
    ``kt_parent`` (L,)), and whether any condition needs the level: one compiled program (the
    per-level numpy loop cost about 0.5 s per call on a 720² grid).

    From n0 = ``COUNT_HALF`` on, the bands are evaluated on the n0/2 grid only, whose points are
    the common corners of 2^d level-0 cells; each of those cells gets the energy and gradient of
    the second-order Taylor expansion to its centre (δk = ±h/2 per axis: ε + ∇ε·δk + ½δk·H·δk,
    ∇ε + H·δk): a quarter of the band evaluations in 2D (an eighth in 3D), exact for quadratic
    bands (band edges).  Measured against the level-0 count per level (honeycomb, Haldane; μ in
    the bands and 0.5 meV above a gap edge; 2–200 K; n0 = 80–768): within 0.6 %, mostly 1e-4; on
    coarse grids (n0 ≤ 48) up to 13 % below, so below COUNT_HALF the level-0 grid is used."""
    dim = model.dim
    m = 2 if n0 >= COUNT_HALF else 1
    b = model.reciprocal_vectors(params)
    hd0 = 0.5 * jnp.sqrt(jnp.sum(b * b)) / n0
    red = jnp.asarray(_grid(n0 // m, dim))
    e, g, h = jax.vmap(lambda q: geometry_at(model, q, params)[:3])(red @ b)  # (N, nb), (N, nb, d), (N, nb, d, d)
    if m == 2:
        offs = np.stack(np.meshgrid(*([np.array([-0.5, 0.5])] * dim), indexing="ij"), -1).reshape(-1, dim)
        dk = jnp.asarray(offs / n0) @ b                                           # (2^d, d)
        es = e[:, None, :] + jnp.einsum("nbd,sd->nsb", g, dk) + 0.5 * jnp.einsum("nbde,sd,se->nsb", h, dk, dk)
        gs = g[:, None] + jnp.einsum("nbde,se->nsbd", h, dk)
        # a point on a band touching may have no finite second derivative: the cells there keep
        # the corner's own values (a budget estimate only)
        ok = jnp.isfinite(es) & jnp.all(jnp.isfinite(gs), axis=-1)
        e = jnp.where(ok, es, e[:, None, :]).reshape(-1, e.shape[-1])
        g = jnp.where(ok[..., None], gs, g[:, None]).reshape(-1, g.shape[1], dim)
    gn = jnp.sqrt(jnp.sum(g * g, axis=-1))
    s = jnp.maximum(gn * hd0, 1e-12)
    gmax = jnp.max(gn)

    def one(args):
        ktp, scale = args
        relevant = kt < ktp
        # the cell-size reach at the largest speed (a few per cent of the window: a slight overcount)
        R = W * ktp + SLACK * gmax * hd0 / scale
        overlap = window_coverage(e + s, mu, relevant, R) - window_coverage(e - s, mu, relevant, R)
        return jnp.sum(jnp.max(overlap / (2 * s), axis=-1)), jnp.any(relevant)

    scales = 2.0 ** jnp.arange(kt_parent.shape[0], dtype=jnp.float64)
    return jax.lax.map(one, (kt_parent, scales))
