"""Linear-tetrahedron integration on adaptively refined cells (3D lattices, any temperature).

Every kernel of :mod:`crosswind.solver.engine.kernels` is Σ_n ∫[dk] φ(ε_n(k); μ, T) A_n(k) with φ an
occupation function times a relaxation-time factor and A a geometric factor.  A point sum needs a
mesh that resolves the thermal width πk_BT/|∇ε|, which in 3D at 1–20 K means 10⁸–10⁹ points.  Here
the bands and the geometric factors are instead interpolated linearly inside tetrahedra (Lehmann &
Taut, phys. stat. sol. (b) 54, 469, 1972; Blöchl, Jepsen & Andersen, PRB 49, 16223, 1994): each
tetrahedron's energy-resolved measure

    C(E) = ∫_tet A(k) θ(E − ε(k)) d³k

is then known exactly (a cubic polynomial of E between the sorted vertex energies ε1 ≤ … ≤ ε4,
:func:`piece_coefficients`), so the mesh has to resolve the bands, not k_BT (docs/theory.md §16.6).

Cells.  Level 0 is a periodic n0³ lattice of cell corners over the Brillouin zone (shifted by a
generic offset, so that no corner lands on a symmetry point such as a band touching).  A cell whose
band energies, widened by the largest band speed times its half diagonal (a bound on the band
inside the cell), reach the energy window of the conditions (μ ± W k_BT_0, :func:`table_ranges`),
or that lies near a touching of two bands straddling it, is split into eight children, down to
level L; the 8 corners of each cell are evaluated, and each cell is cut into six tetrahedra along
its main diagonal (Kuhn/Freudenthal).  Unrefined cells are entirely below or above the window: the
ones below contribute their whole tetrahedron integral (every condition sees them fully occupied),
the ones above nothing.  The leaves of level L deposit their measure onto energy knots, band by
band: only the (leaf, band) items that reach the window are cut into tetrahedra (the plan records
the most per chunk, ``TetraMeta.caps``); the others add their corner-weighted integral or nothing.

Energy axis.  Knots E_lo + jδ per temperature level (δ_l = k_BT_l/ρ, the temperatures k_BT_l of
:mod:`crosswind.solver.engine.ladder`), or one table at the deepest level's δ shared by every level
when their windows fit it (:data:`M_SHARED`; each cell is then deposited once, not once per
level); a tetrahedron deposits onto knot j the exact integral
∫ Λ_j(E) dC(E) of the linear hat function Λ_j of the knot: exact for the interior knots of each
polynomial piece by a difference array of the piece's polynomial (cost independent of the number of
knots a piece spans), and directly for the knots near its ends (two at each end of a long piece,
at most four for a short one); every weight is computed for the four barycentric coordinates and
contracted with the vertex factors last.  Σ_j table_j φ(E_j) is then ∫ (Iφ) dC
with Iφ the piecewise-linear interpolant of φ (error O(δ²φ'')).  Every condition reads the tables
as in the ladder (:func:`crosswind.solver.engine.ladder.condition_sums`, T² extrapolation below the
deepest temperature level included).

Error estimate, nested in the same program: the same sums with every cell's integral taken from
its parent's interpolant (spacing doubled, O(h²) error four times larger): the leaves of level L
replaced by their parents on knots 2δ, the unsplit leaves of the other levels and the unsplit
level-0 cells integrating the parent's (level 0: the n0/2 grid's) interpolant over themselves
(docs/theory.md §16.6).  The response returns the Richardson combination fine + (fine − coarse)/3
of the two (the h² terms cancel) with |fine − coarse| as its error (``response._nested_errors``).
Cells that a plan left
unrefined but that the run finds inside the window (a plan reused at other parameters) make the
error infinite.  The cell structure comes from the plan (a concrete pass on band energies only);
derivatives with respect to model parameters are those of the sums over the plan's cells, and μ, T
and τ enter only through φ (exact derivatives of the energy sums).
"""
from __future__ import annotations

import itertools
from dataclasses import dataclass
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np

from crosswind.models.units import KB_EVK as KB
from crosswind.solver.engine import ladder as _ladder
from crosswind.solver.engine.mesh import energies_at
from crosswind.solver.engine.occupation import T_FLOOR

W = _ladder.W
SLACK = 1.1                # the band-speed bound of the probe grid, widened
DEPOSIT_MARGIN = 1e-9      # the plan's count of deposited items: corners widened by this × slack
GAP = 8.0                  # cells with a band gap below GAP × (band-speed bound) are split
#: generic offset of the corner lattice (units of the level-0 spacing): no corner on a symmetry point
OFFSET = np.array([0.1234567, 0.2718281, 0.3141592])
#: lowest temperature level (K); colder conditions (T = 0 included) are extrapolated in T² from
#: T_DEEP and 2 T_DEEP
T_DEEP = 0.25
#: largest energy table (knots): the cubic difference arrays are expanded about the table centre
#: (rounding grows with the distance in knots) and cost K (M + 1) 4 nc doubles
M_MAX = 16384
#: (n0, L) per resolution index: level-0 cells per axis and refinement levels
RESOLUTIONS = ((12, 3), (16, 4), (16, 5), (24, 5), (32, 5), (40, 5))
RHO = 8.0                  # knots per k_BT of a temperature level
#: largest shared table: a plan with several temperature levels whose windows all fit one table at
#: the deepest level's spacing (at most this many knots) deposits every cell once, into that table
#: (level k reads it coarsened by 2^(nt−k), ρ knots per k_BT_k: :func:`coarsen`), instead of once per level
M_SHARED = 4096
CELL_CHUNK = 32            # parent cells per chunk of the refined levels (27 corners each)
POINT_CHUNK = 4096         # level-0 points per chunk


# --------------------------------------------------------------------------------------------
# one tetrahedron: the exact cumulative measure
# --------------------------------------------------------------------------------------------

def _kuhn():
    """Six tetrahedra of the unit cube (corner index 4x + 2y + z) along the main diagonal."""
    tets = []
    for perm in itertools.permutations(range(3)):
        v = np.zeros(3, int)
        path = [v.copy()]
        for ax in perm:
            v[ax] = 1
            path.append(v.copy())
        tets.append([int(4 * p[0] + 2 * p[1] + p[2]) for p in path])
    return np.array(tets)


TETS = _kuhn()                                        # (6, 4) corner indices
#: weight of each corner in the integral of a linear interpolant over the whole cube (÷ volume)
CORNER_W = np.bincount(TETS.ravel(), minlength=8) / 24.0


def _safe(x):
    return jnp.where(x > 0, x, 1.0)


def _det_bary(lam):
    """det of 4×4 barycentric rows (each summing to 1) = the 3×3 determinant of the rows 1–3 minus
    row 0 in the columns 1–3 (written out: no LAPACK call per tetrahedron)."""
    d = lam[..., 1:, 1:] - lam[..., :1, 1:]
    return (d[..., 0, 0] * (d[..., 1, 1] * d[..., 2, 2] - d[..., 1, 2] * d[..., 2, 1])
            - d[..., 0, 1] * (d[..., 1, 0] * d[..., 2, 2] - d[..., 1, 2] * d[..., 2, 0])
            + d[..., 0, 2] * (d[..., 1, 0] * d[..., 2, 1] - d[..., 1, 1] * d[..., 2, 0]))


def _bary_mean(lam, A):
    """Σ_i lam_i A_i (..., nc) for barycentric weights ``lam`` (..., 4); ``A`` None stands for the
    identity (the four barycentric coordinates themselves: ``lam``), written as broadcast
    products (a batched product of such small matrices is several times slower on CPU)."""
    if A is None:
        return lam
    return sum(lam[..., i, None] * A[..., i, :] for i in range(4))


def _prism(E, e, A):
    """∫ A θ(E − ε) over the reference tetrahedron (volume 1) for ε2 ≤ E ≤ ε3: the prism with
    ends (v1, p13, p14) and (v2, p23, p24), cut into three tetrahedra; p_ij = v_i + t_ij (v_j − v_i).
    ``E`` (...,), ``e`` (..., 4) sorted, ``A`` (..., 4, nc) or None (the identity)."""
    eye = jnp.eye(4)

    def p(i, j):
        t = jnp.clip((E - e[..., i]) / _safe(e[..., j] - e[..., i]), 0.0, 1.0)[..., None]
        unit = lambda n: eye[n].reshape((1,) * (t.ndim - 1) + (4,))
        return (1 - t) * unit(i) + t * unit(j)

    v1 = jnp.broadcast_to(eye[0], E.shape + (4,))
    v2 = jnp.broadcast_to(eye[1], E.shape + (4,))
    p13, p14, p23, p24 = p(0, 2), p(0, 3), p(1, 2), p(1, 3)
    total = 0.0
    for verts in ((v1, p13, p14, p24), (v1, p13, p23, p24), (v1, v2, p23, p24)):
        lam = jnp.stack(verts, axis=-2)                               # (..., 4 vertices, 4 bary)
        vol = jnp.abs(_det_bary(lam))
        centre = jnp.mean(lam, axis=-2)                               # (..., 4)
        total = total + vol[..., None] * _bary_mean(centre, A)
    return total


def _corner_tet(E, e, A):
    """Occupied part for ε1 ≤ E ≤ ε2: the tetrahedron at v1 scaled by t_i = (E−ε1)/(ε_i−ε1)."""
    t = jnp.clip((E[..., None] - e[..., :1]) / _safe(e[..., 1:] - e[..., :1]), 0.0, 1.0)   # (..., 3)
    vol = jnp.prod(t, axis=-1)
    # barycentric centroid of the scaled tetrahedron: v1 + Σ_i t_i (v_i − v1)/4
    centre = jnp.concatenate([1.0 - jnp.sum(t, axis=-1, keepdims=True) / 4.0, t / 4.0], axis=-1)
    return vol[..., None] * _bary_mean(centre, A)


def _top_tet(E, e, A):
    """Occupied part for ε3 ≤ E ≤ ε4: the whole minus the tetrahedron at v4 scaled by
    s_i = (ε4−E)/(ε4−ε_i)."""
    s = jnp.clip((e[..., 3:] - E[..., None]) / _safe(e[..., 3:] - e[..., :3]), 0.0, 1.0)
    vol = jnp.prod(s, axis=-1)
    centre = jnp.concatenate([s / 4.0, 1.0 - jnp.sum(s, axis=-1, keepdims=True) / 4.0], axis=-1)
    return _bary_mean(jnp.full(centre.shape, 0.25), A) - vol[..., None] * _bary_mean(centre, A)


def cumulative(E, e, A):
    """C(E)/V = ∫ A θ(E − ε) over a tetrahedron of unit volume with sorted vertex energies ``e``
    (..., 4) and vertex factors ``A`` (..., 4, nc), for energies ``E`` (...,): exact for linear ε
    and A (the reference of :func:`piece_coefficients`)."""
    c1, c2, c3 = _corner_tet(E, e, A), _prism(E, e, A), _top_tet(E, e, A)
    full = jnp.mean(A, axis=-2)
    Eb = E[..., None]
    return jnp.where(Eb <= e[..., :1], 0.0,
                     jnp.where(Eb <= e[..., 1:2], c1,
                               jnp.where(Eb <= e[..., 2:3], c2, jnp.where(Eb <= e[..., 3:], c3, full))))


#: inverse Vandermonde of s = 0, 1/4, 1/2, 3/4, 1: quartic coefficients from five samples
_S = np.linspace(0.0, 1.0, 5)
_VINV = np.linalg.inv(_S[:, None] ** np.arange(5)[None, :])


def piece_coefficients(e, A):
    """Quartic coefficients q (..., 3 pieces, 5 powers, nc) of C on each piece [ε_k, ε_{k+1}] in
    s ∈ [0, 1] (C(ε_k + s(ε_{k+1} − ε_k)) − C(ε_k) = Σ_m q_m s^m, q_0 = 0 up to rounding; unit
    volume): the occupied volume is cubic in E and the mean of the linear A over it linear, so
    five exact samples per piece determine it.  Empty pieces get zeros.  ``A`` None: the identity
    (nc = 4, the measures of the four barycentric coordinates)."""
    out = []
    for k, fn in enumerate((_corner_tet, _prism, _top_tet)):
        lo, hi = e[..., k], e[..., k + 1]
        Es = lo[..., None] + (hi - lo)[..., None] * jnp.asarray(_S).reshape((1,) * lo.ndim + (5,))
        samp = fn(Es, e[..., None, :], None if A is None else A[..., None, :, :])    # (..., 5, nc)
        samp = samp - samp[..., :1, :]
        q = jnp.stack([sum(float(_VINV[m, j]) * samp[..., j, :] for j in range(1, 5)) for m in range(5)],
                      axis=-2)
        out.append(jnp.where((hi > lo)[..., None, None], q, 0.0))
    return jnp.stack(out, axis=-3)


# --------------------------------------------------------------------------------------------
# projection onto the knots of one table
# --------------------------------------------------------------------------------------------

def _powers(s, n):
    """s^0 … s^(n−1) stacked on a new last axis by products (a float power s**0 has a NaN
    derivative at s = 0, where most pieces start)."""
    out = [jnp.ones_like(s)]
    for _ in range(n - 1):
        out.append(out[-1] * s)
    return jnp.stack(out, axis=-1)


def _hat_weights(alpha, beta, s0, s1):
    """Weights w_m (..., 5) with ∫_{s0}^{s1} (α + βs) dC(s) = Σ_m w_m q_m for dC = Σ_m m q_m s^{m−1} ds:
    w_m = α (s1^m − s0^m) + β m (s1^{m+1} − s0^{m+1})/(m + 1) (w_0 = 0).  Scalars per item; the
    contraction with the per-column q is one small matrix product."""
    m = jnp.arange(5, dtype=jnp.float64).reshape((1,) * s0.ndim + (5,))
    p0, p1 = _powers(s0, 6), _powers(s1, 6)
    return (alpha[..., None] * (p1[..., :5] - p0[..., :5])
            + beta[..., None] * m * (p1[..., 1:] - p0[..., 1:]) / (m + 1))


def vertex_coefficients(e):
    """Piece polynomials of the four barycentric weights, (..., 3, 5, 4): C is linear in the vertex
    factors, C(E) = Σ_v C_v(E) A_v with C_v the measure of the barycentric coordinate λ_v, so the
    quartic fit and the projection run on four columns and the factors enter once, at the end."""
    return piece_coefficients(e, None)


def project(acc, e, qv, A, e_lo, delta, M):
    """Deposit items (sorted energies ``e`` (N, 4), vertex piece coefficients ``qv`` (N, 3, 5, 4) of
    :func:`vertex_coefficients` already scaled by the volume, vertex factors ``A`` (N, 4, nc)) onto
    a table of M knots E_lo + jδ.  ``acc`` = (table (M, nc), diff (M + 1, 4, nc), below (nc,)).  The
    measure below the first knot goes to ``below``; above the last knot it is dropped (the plan
    places every window inside the table).  Every weight is computed per vertex and contracted with
    ``A`` last (C is linear in the vertex factors)."""
    table, diff, below = acc
    nc = table.shape[-1]
    x = (e - e_lo) / delta                                                   # (N, 4) knot units
    xs = jax.lax.stop_gradient(x)
    top = float(M - 1)
    # below the first knot: the part of each piece's increment at x < 0
    part = 0.0
    for k in range(3):
        lo, hi = x[:, k], x[:, k + 1]
        s0 = jnp.clip(-lo / _safe(hi - lo), 0.0, 1.0)
        pw = _powers(s0, qv.shape[2])
        pk = sum(qv[:, k, m] * pw[:, m, None] for m in range(qv.shape[2]))
        part = part + jnp.where((lo < 0)[:, None], pk, 0.0)
    below = below + jnp.einsum("nv,nvc->c", part, A)
    jref = M // 2
    rows, idx, starts, stops = [], [], [], []
    for k in range(3):
        lo, hi = x[:, k], x[:, k + 1]
        los, his = xs[:, k], xs[:, k + 1]
        L = hi - lo
        Ls = _safe(L)
        a = jnp.clip(lo, 0.0, top)
        b = jnp.clip(hi, 0.0, top)
        valid = (jax.lax.stop_gradient(b) > jax.lax.stop_gradient(a)) & (his > los)
        ja = jnp.floor(jnp.clip(los, 0.0, top)).astype(jnp.int32)
        jb = jnp.ceil(jnp.clip(his, 0.0, top)).astype(jnp.int32)
        long = (jb - ja) >= 4
        qk = qv[:, k]                                                         # (N, 5, 4)
        # boundary knots: exact hat integrals
        cand = jnp.where(long[:, None], jnp.stack([ja, ja + 1, jb - 1, jb], -1),
                         ja[:, None] + jnp.arange(4, dtype=jnp.int32)[None, :])
        ok = valid[:, None] & (cand <= jb[:, None]) & (cand <= M - 1)
        jf = cand.astype(jnp.float64)
        sA = lambda xv, lo=lo, Ls=Ls: (xv - lo[:, None]) / Ls[:, None]
        # left side of the hat: x in [max(a, j−1), min(b, j)], Λ = x − (j − 1)
        l0, l1 = jnp.maximum(a[:, None], jf - 1), jnp.minimum(b[:, None], jf)
        r0, r1 = jnp.maximum(a[:, None], jf), jnp.minimum(b[:, None], jf + 1)
        lo_b = lo[:, None]
        Lb = L[:, None]
        w = (_hat_weights(lo_b - (jf - 1), Lb, sA(l0), sA(jnp.maximum(l1, l0)))
             + _hat_weights((jf + 1) - lo_b, -Lb, sA(r0), sA(jnp.maximum(r1, r0))))       # (N, 4, 5)
        w = jnp.where(ok[..., None], w, 0.0)
        rows.append(sum(w[:, :, m, None] * qk[:, None, m, :] for m in range(5)))          # (N, 4, 4)
        idx.append(jnp.where(ok, cand, M))
        # interior knots ja+2 .. jb−2 of long pieces: ∫Λ_j g = g(j) + g''(j)/12 for the cubic
        # g = dC/dx = Σ G_m u^m (u = x − lo), as a cubic polynomial of y = j − jref
        Li = jnp.where(long, L, 1.0)[:, None]
        G0, G1, G2, G3 = (m * qk[:, m] / Li ** m for m in range(1, 5))                # (N, 4 vertices)
        d = (jref - lo)[:, None]
        c0 = G0 + G1 * d + G2 * d * d + G3 * d ** 3 + G2 / 6.0 + G3 * d / 2.0
        c1 = G1 + 2 * G2 * d + 3 * G3 * d * d + G3 / 2.0
        c2 = G2 + 3 * G3 * d
        rows.append(jnp.where((long & valid)[:, None, None], jnp.stack([c0, c1, c2, G3], axis=1), 0.0))
        starts.append(jnp.where(long & valid, ja + 2, M))
        stops.append(jnp.where(long & valid, jb - 1, M))
    # every knot weight and interior coefficient (N, 24 rows, 4 vertices) times the vertex factors:
    # written as four broadcast products (a batched 4×4 matrix product is several times slower here)
    R = jnp.concatenate(rows, axis=1)
    vals = sum(R[:, :, v, None] * A[:, None, v, :] for v in range(4)).reshape(-1, 3, 2, 4, nc)
    table = table.at[jnp.stack(idx, 1).reshape(-1)].add(vals[:, :, 0].reshape(-1, nc), mode="drop")
    coef = vals[:, :, 1].reshape(-1, 4, nc)
    diff = diff.at[jnp.stack(starts, 1).reshape(-1)].add(coef, mode="drop")
    diff = diff.at[jnp.stack(stops, 1).reshape(-1)].add(-coef, mode="drop")
    return table, diff, below


def finish_table(acc, M):
    """The table (M, nc) from the boundary part and the cumulated interior polynomial."""
    table, diff, below = acc
    c = jnp.cumsum(diff, axis=0)[:M]                                            # (M, 4, nc)
    y = (jnp.arange(M) - M // 2).astype(jnp.float64)[:, None]
    return table + c[:, 0] + y * (c[:, 1] + y * (c[:, 2] + y * c[:, 3])), below


def coarsen(table, c: int):
    """The knot table (M, nc) of spacing δ as the table of spacing cδ on the knots 0, c, 2c, …
    (M/c of them): the hat of width cδ is Σ_r (1 − |r|/c) Λ_{ci+r} on the fine knots, so
    T'_i = Σ_{|r|<c} (1 − |r|/c) table_{ci+r} = ∫ Λ'_i dC exactly (the right half only at knot 0:
    the measure below it is in ``below``; the fine knots past the last coarse one are dropped,
    as the measure above the last knot is)."""
    if c == 1:
        return table
    M, nc = table.shape
    pad = jnp.concatenate([jnp.zeros((c, nc)), table, jnp.zeros((c, nc))])
    out = 0.0
    for r in range(-(c - 1), c):
        out = out + (1.0 - abs(r) / c) * pad[c + r: c + r + M: c]
    return out


# --------------------------------------------------------------------------------------------
# cells, corners and plans
# --------------------------------------------------------------------------------------------

#: the 27 corner points of the eight children of a cell (index 9a + 3b + c, a, b, c ∈ {0, 1, 2})
_OFFS27 = np.array(list(itertools.product(range(3), repeat=3)))
_CUBE = np.array(list(itertools.product(range(2), repeat=3)))            # corner index 4x + 2y + z
#: children (8) × corners (8) -> index into the 27 points; the parent's own corners
CHILD_CORNERS = np.array([[9 * (o[0] + d[0]) + 3 * (o[1] + d[1]) + (o[2] + d[2]) for d in _CUBE]
                          for o in _CUBE])
PARENT_CORNERS = np.array([9 * 2 * d[0] + 3 * 2 * d[1] + 2 * d[2] for d in _CUBE])


def _edge_ends(q):
    """The ends 2⌊q/2⌋ and 2⌈q/2⌉ (componentwise) of the coarse edge whose midpoint or end the fine
    point ``q`` (…, 3) is, in units of the fine spacing: the coarse grid's linear interpolant at
    ``q`` is the mean of its values at the two ends (the Kuhn triangulation of the fine cells
    refines the coarse one: both are the arrangements x_i ∈ Z, x_i − x_j ∈ Z at their spacing)."""
    return 2 * (q // 2), 2 * (-(-q // 2))


#: the parent's linear interpolant at the 27 points (each the midpoint or an end of a parent edge)
_HALF_LO, _HALF_HI = (e @ np.array([9, 3, 1]) for e in _edge_ends(_OFFS27))
#: corner weights folded onto the 27 points: S_FINE[o, p] = Σ_d w_d [corner d of child o is p]; S_HALF
#: the same for the parent's interpolant at those corners; S_PARENT[p] for the parent cell itself
S_FINE = np.zeros((8, 27))
S_HALF = np.zeros((8, 27))
for _o in range(8):
    for _d in range(8):
        _p = CHILD_CORNERS[_o, _d]
        S_FINE[_o, _p] += CORNER_W[_d]
        S_HALF[_o, _HALF_LO[_p]] += 0.5 * CORNER_W[_d]
        S_HALF[_o, _HALF_HI[_p]] += 0.5 * CORNER_W[_d]
S_PARENT = np.zeros(27)
S_PARENT[PARENT_CORNERS] = CORNER_W


@dataclass(frozen=True)
class TetraMeta:
    """Static shape of a plan: ``n0`` level-0 cells per axis, ``sizes[l−1]`` parent cells (padded)
    refined at level l = 1..L, ``nt`` temperature levels below k_BT_0, ``knots`` per temperature
    table, ``rho`` knots per k_BT, ``slack`` (eV Å, the band-speed bound) and ``caps``: the most
    (cell, band) items of one chunk of the deepest level that reach the window, children (fine
    tables) and parents (coarse tables); only those are deposited.  ``shared``: every temperature
    level reads one table at the deepest level's spacing (:data:`M_SHARED`)."""

    n0: int
    sizes: tuple
    nt: int
    knots: int
    rho: float
    slack: float
    caps: tuple = (0, 0)
    shared: bool = False

    @property
    def tables(self) -> int:          # energy tables deposited: one when shared, else one per level
        return 1 if self.shared else self.nt + 1

    @property
    def levels(self) -> int:          # temperature levels (as the ladder's condition sums read them)
        return self.nt

    @property
    def depth(self) -> int:           # refinement levels
        return len(self.sizes)


@dataclass(frozen=True, eq=False)
class TetraPlan:
    """A concrete cell structure: ``meta`` (static) and the arrays ``kt_ladder`` (nt + 1,) k_BT_l (eV)
    of the temperature tables, ``refine0`` (n0³,) level-0 cells split, ``parents[l−1]``
    (sizes[l−1], 3) integer cell coordinates on the level-(l−1) grid (−1: padding), ``refine[l−1]``
    (sizes[l−1], 8) which children of those parents are split again (levels 1..L−1), and
    ``counts`` the valid parents per level."""

    meta: TetraMeta
    kt_ladder: np.ndarray
    refine0: np.ndarray
    parents: tuple
    refine: tuple
    counts: tuple

    @property
    def levels(self) -> int:
        return self.meta.nt

    def k_points(self, dim: int = 3) -> int:
        """Band-geometry points of the cells: n0³ plus 19 new corners per split cell (the corners
        on a face shared by two split neighbours are counted by both: an upper bound)."""
        return self.meta.n0 ** 3 + 19 * int(sum(self.counts))

    def arrays(self):
        return (jnp.asarray(self.kt_ladder), jnp.asarray(self.refine0), tuple(jnp.asarray(p) for p in self.parents),
                tuple(jnp.asarray(r) for r in self.refine))


_SIGNS = np.array(list(itertools.product((1.0, -1.0), repeat=3)))


def _halfdiag(b, n):
    """Half the longest diagonal of a cell spanned by b_i/n: no point of the cell is farther from
    its nearest corner."""
    return 0.5 * float(np.max(np.linalg.norm(_SIGNS @ np.asarray(b), axis=-1))) / n


def _bucket(x):
    """Round up to 4 buckets per octave and to a multiple of CELL_CHUNK (few distinct compiled
    shapes; at most 25 % padding above 4·CELL_CHUNK)."""
    x = max(int(x), CELL_CHUNK)
    step = 2 ** max(int(np.floor(np.log2(x))) - 2, 0)
    return int(CELL_CHUNK * np.ceil(step * np.ceil(x / step) / CELL_CHUNK))


def temperature_levels(temperature):
    """k_BT_0 = k_B max(T) (eV) and the number of halvings below it that reach min(T), for the
    concrete temperatures of a call: one table for a single temperature; at least two levels when
    a condition lies below T_DEEP (T = 0 included), for the T² extrapolation."""
    t = np.maximum(np.atleast_1d(np.asarray(temperature, dtype=float)), T_FLOOR)
    cold = float(t.min()) < T_DEEP
    # colder than T_DEEP: levels down to T_DEEP, extrapolated from T_DEEP and 2 T_DEEP
    kt0 = KB * max(float(t.max()), 4 * T_DEEP if cold else T_DEEP)
    target = KB * max(float(t.min()), T_DEEP)
    nt = 0
    while kt0 / 2.0 ** nt > target * (1 + 1e-12):
        nt += 1
    return kt0, nt


def table_ranges(mu, ktl, rho, M, shared=False):
    """(e_lo (K,), δ (K,), fits, (w_lo, w_hi)) of the temperature tables: M knots of spacing
    δ_k = k_BT_k/ρ (``shared``: the deepest level's δ for every level, one table) centred on the μ
    range; level k must hold μ ± W k_BT_{k−1} (level 0: ± W k_BT_0).
    [w_lo, w_hi] = [min μ − W k_BT_0 − 6δ_0, max μ + W k_BT_0 + 6δ_0] is the window of the cells:
    below it every condition's occupation is 1, above it 0 (to e^{−W}), and every level's window
    lies inside it."""
    mlo, mhi = jnp.min(mu), jnp.max(mu)
    delta = ktl / rho if not shared else jnp.full(ktl.shape, ktl[-1] / rho)
    centre = jnp.floor(0.5 * (mlo + mhi) / delta) * delta
    e_lo = centre - (M // 2) * delta
    kwin = jnp.concatenate([ktl[:1], ktl[:-1]])
    fits = jnp.all((mhi - mlo + 2 * W * kwin + 12 * delta) <= (M - 1) * delta)
    reach = W * ktl[0] + 6 * delta[0]
    return e_lo, delta, fits, (mlo - reach, mhi + reach)


def finest_spacings():
    """Finest cell edge per resolution (units of the reciprocal vectors): 1/(n0·2^L)."""
    return tuple(1.0 / (n0 * 2 ** L) for n0, L in RESOLUTIONS)


def span_limit(temperature) -> float:
    """Widest μ range (eV) whose energy tables fit :data:`M_MAX` knots at these temperatures (the
    knot count of :func:`make_plan`: span + 2W k_BT_{k−1} at spacing k_BT_k/ρ, plus 32, per level)."""
    kt0, nt = temperature_levels(temperature)
    ktl = kt0 / 2.0 ** np.arange(nt + 1)
    return min((M_MAX - 32) * ktl[k] / RHO - 2 * W * ktl[k - 1 if k else 0] for k in range(nt + 1))


@dataclass(frozen=True, eq=False)
class TetraGroups:
    """A call split into μ groups whose tables each fit :data:`M_MAX` knots (a sweep wider than
    a few hundred k_BT at the lowest temperature): condition i belongs to group
    ``searchsorted(cuts, μ_i, side="right")``; ``plans[g]`` is the plan of group g (None before
    it is made)."""

    cuts: tuple
    plans: tuple = ()

    def group_of(self, mu):
        return np.searchsorted(np.asarray(self.cuts, dtype=float), np.asarray(mu, dtype=float), side="right")

    @property
    def levels(self) -> int:
        return max((p.levels for p in self.plans if p is not None), default=0)

    def k_points(self, dim: int = 3) -> int:
        return sum(p.k_points(dim) for p in self.plans if p is not None)


def mu_groups(mu, temperature, limit: float | None = None):
    """The cuts between contiguous μ groups of the concrete ``mu`` such that every group spans at
    most ``limit`` (default: :func:`span_limit` of all temperatures, 0.1 % margin); () when one
    group holds them all.  Greedy from the lowest μ: the fewest groups."""
    mu = np.unique(np.asarray(mu, dtype=float).ravel())
    limit = 0.999 * span_limit(temperature) if limit is None else float(limit)
    cuts, start = [], mu[0]
    for m in mu[1:]:
        if m - start > limit:
            cuts.append(float(m))
            start = m
    return tuple(cuts)


@jax.jit
def _energies(model, params, red):
    """Band energies per block (…, S, m) at reduced points ``red`` (…, 3): no derivatives (the
    closed two-band form d0 ± |d| where the model has one, else eigvalsh)."""
    b = model.reciprocal_vectors(params)
    w = jax.vmap(lambda q: energies_at(model, q @ b, params, ordered=False))(red.reshape(-1, red.shape[-1]))
    return w.reshape(red.shape[:-1] + (-1, model.block_size))


def _merged(Eb):
    """Per-block energies (…, S, m) merged and sorted (…, S·m), the order of geometry_at."""
    return np.sort(Eb.reshape(Eb.shape[:-2] + (-1,)), axis=-1)


def _points0(n0):
    idx = np.stack(np.meshgrid(*([np.arange(n0)] * 3), indexing="ij"), -1).reshape(-1, 3)
    return (OFFSET[None, :] + idx) / n0


def _points27(parents, level, n0):
    """Reduced coordinates (B, 27, 3) of the children's corners of level-(level−1) cells
    ``parents`` (B, 3): level-l corner c' = 2p + (0, 1, 2)³ at (OFFSET + c'/2^l)/n0."""
    return (OFFSET[None, None, :] * 2 ** level + 2 * parents[:, None, :] + _OFFS27[None]) / (n0 * 2 ** level)


def _cell_corners0(n0):
    """(n0³, 8) point indices of the corners of every level-0 cell (periodic)."""
    idx = np.stack(np.meshgrid(*([np.arange(n0)] * 3), indexing="ij"), -1).reshape(-1, 1, 3)
    c = (idx + _CUBE[None]) % n0
    return c[..., 0] * n0 * n0 + c[..., 1] * n0 + c[..., 2]


def _block_ends(n0):
    """Two (n0³, 8) point-index arrays: for corner d of level-0 cell c, the ends of the edge of its
    2×2×2 block (the n0/2 grid) whose midpoint or end it is (n0 even)."""
    idx = np.stack(np.meshgrid(*([np.arange(n0)] * 3), indexing="ij"), -1).reshape(-1, 1, 3)
    blk, q = 2 * (idx // 2), (idx % 2) + _CUBE[None]                                 # (n0³, 8, 3)
    out = []
    for end in _edge_ends(q):
        c = (blk + end) % n0
        out.append(c[..., 0] * n0 * n0 + c[..., 1] * n0 + c[..., 2])
    return out


def _intersects(Ec, s, lo, hi):
    """(…, nb) whether a cell with corner energies ``Ec`` (…, 8, nb) reaches [lo, hi] (band-speed
    bound ``s`` on the excursion between corners), and whether it lies below lo (for a cell that
    does not reach the window: its highest corner below lo)."""
    emin, emax = Ec.min(axis=-2), Ec.max(axis=-2)
    return (emin - s <= hi) & (emax + s >= lo), emax < lo


def _near_touching(Eb, s, lo, hi):
    """(…,) whether a cell with per-block corner energies ``Eb`` (…, 8, S, m) comes within GAP·s
    of a touching of two adjacent bands of one block that straddle the window (the lower one
    reaching down into or below it, the upper one up into or above it): the Berry curvature of
    the pair varies there on the scale of the gap, so such cells are split down to the deepest
    level.  Pairs both below the window (their curvatures cancel) or both above it are left."""
    if Eb.shape[-1] < 2:
        return np.zeros(Eb.shape[:-3], bool)
    gap = (Eb[..., 1:] - Eb[..., :-1]).min(axis=-3)                           # (…, S, m − 1)
    low = Eb[..., :-1].min(axis=-3) - s <= hi
    high = Eb[..., 1:].max(axis=-3) + s >= lo
    return np.any((gap < GAP * s) & low & high, axis=(-2, -1))


def _balanced(n, nchunk):
    """An order of the rows with item counts ``n`` that deals them, largest first, into ``nchunk``
    consecutive chunks in alternating direction, so that every chunk holds about the same total."""
    srt = np.argsort(-n, kind="stable")
    i = np.arange(len(n))
    rnd, pos = i // nchunk, i % nchunk
    chunk = np.where(rnd % 2 == 0, pos, nchunk - 1 - pos)
    return srt[np.argsort(chunk, kind="stable")]


def _cap(n):
    """Items per chunk to reserve for per-row counts ``n`` (ordered by :func:`_balanced`): the
    largest chunk total, rounded up to a multiple of 16 (fewer distinct compiled shapes)."""
    tot = n.reshape(-1, CELL_CHUNK).sum(axis=1)
    return int(16 * np.ceil(max(int(tot.max()), 1) / 16))


def make_plan(model, params, mu, temperature, resolution: int, cap: int = 250000) -> TetraPlan:
    """Cell structure for concrete conditions: level-0 n0³ cells, split down to L levels wherever a
    cell reaches the window of the level-0 table (energies only, :func:`_energies`); a level with more than
    ``cap`` cells to split ends the refinement there (the nested estimate then reports the
    accuracy reached)."""
    if model.dim != 3:
        raise ValueError("response: engine='tetra' integrates 3D lattice models; use engine='ladder' "
                         "for 2D lattices")
    n0, L = RESOLUTIONS[resolution]
    mu = np.atleast_1d(np.asarray(mu, dtype=float)).ravel()
    kt0, nt = temperature_levels(temperature)
    ktl = kt0 / 2.0 ** np.arange(nt + 1)
    span = float(np.ptp(mu))
    M = max(_ladder._pow2((span + 2 * W * ktl[k - 1 if k else 0]) / (ktl[k] / RHO) + 32)
            for k in range(nt + 1))
    if M > M_MAX:
        raise ValueError(f"response: engine='tetra' would need energy tables of {M} knots (μ range "
                         f"{span:.3g} eV at {float(ktl[-1]) / KB:.3g} K); at most {M_MAX}: split the sweep into "
                         "μ ranges a few hundred k_BT wide, or raise the lowest temperature")
    # one table for every level when their windows fit it at the deepest spacing
    M_sh = _ladder._pow2((span + 2 * W * ktl[0]) / (ktl[-1] / RHO) + 32)
    shared = nt >= 1 and M_sh <= M_SHARED
    if shared:
        M = M_sh
    _, _, _, (wlo, whi) = table_ranges(jnp.asarray(mu), jnp.asarray(ktl), RHO, M, shared)
    lo, hi = float(wlo), float(whi)
    b = np.asarray(model.reciprocal_vectors(params))
    vmax = float(_ladder.probe_speed(model, params))
    if not np.isfinite(vmax):
        raise ValueError(f"response: the band energies or velocities of model '{model.name}' are NaN or "
                         "infinite somewhere in the Brillouin zone (found while planning the tetrahedron "
                         "cells); check the Hamiltonian and its parameters there")
    slack = SLACK * max(vmax, 1e-6)
    Eb = np.asarray(_energies(model, params, jnp.asarray(_points0(n0))))[_cell_corners0(n0)]
    s0 = slack * _halfdiag(b, n0)
    cut, _ = _intersects(_merged(Eb), s0, lo, hi)
    refine0 = np.any(cut, axis=-1) | _near_touching(Eb, s0, lo, hi)
    parents, refine, counts, sizes = [], [], [], []
    caps = (0, 0)
    cur = np.argwhere(refine0.reshape(n0, n0, n0))
    for lev in range(1, L + 1):
        if cur.shape[0] == 0:
            break
        B = _bucket(cur.shape[0])
        pad = np.full((B - cur.shape[0], 3), -1)
        par = np.concatenate([cur, pad]).astype(np.int32)
        red = _points27(np.where(par < 0, 0, par), lev, n0)
        E27 = np.asarray(_energies(model, params, jnp.asarray(red)))                    # (B, 27, S, m)
        Eb = E27[:, CHILD_CORNERS]                                                     # (B, 8, 8, S, m)
        s_l = slack * _halfdiag(b, n0 * 2 ** lev)
        cut, _ = _intersects(_merged(Eb), s_l, lo, hi)                                 # (B, 8, nb)
        valid = par[:, :1] >= 0
        r = (np.any(cut, axis=-1) | _near_touching(Eb, s_l, lo, hi)) & valid            # (B, 8)
        nxt = (2 * par[:, None, :] + _CUBE[None])[r]
        if lev == L or nxt.shape[0] == 0 or nxt.shape[0] > cap:
            # the deepest level: only (cell, band) items whose corners reach the window are
            # deposited (their linear interpolant lies between the corner values: no slack; a
            # rounding margin keeps the plan's count at or above the run's)
            cut, _ = _intersects(_merged(Eb), DEPOSIT_MARGIN * s_l, lo, hi)
            nf = np.sum(cut & valid[..., None], axis=(1, 2))
            cutp, _ = _intersects(_merged(E27[:, PARENT_CORNERS]), DEPOSIT_MARGIN * s_l, lo, hi)    # (B, nb)
            nc_ = np.sum(cutp & valid, axis=-1)
            # the valid rows (first) dealt into the fewest chunks; the chunks after them hold only
            # padding, which the run skips
            nv = CELL_CHUNK * -(-cur.shape[0] // CELL_CHUNK)
            order = np.concatenate([_balanced(nf[:nv], nv // CELL_CHUNK), np.arange(nv, B)])
            par, nf, nc_ = par[order], nf[order], nc_[order]
            caps = (_cap(nf), _cap(nc_))
            parents.append(par)
            counts.append(int(cur.shape[0]))
            sizes.append(B)
            break
        parents.append(par)
        counts.append(int(cur.shape[0]))
        sizes.append(B)
        refine.append(r)
        cur = nxt
    # no cell to split (μ in a gap far from every band): the level-0 cells alone, depth 0
    refine = refine[:max(len(parents) - 1, 0)]
    meta = TetraMeta(n0, tuple(sizes), nt, M, RHO, float(slack), caps, shared)
    return TetraPlan(meta, ktl, refine0, tuple(parents), tuple(refine), tuple(counts))


# --------------------------------------------------------------------------------------------
# the tables of one plan (traced)
# --------------------------------------------------------------------------------------------

def _factors(model, params, k, sea):
    e, _gn, f = jax.vmap(lambda q: _ladder.point_factors(model, params, q, sea))(k)
    return e, f


#: _EARLIER[i, j]: vertex j comes before vertex i among equal energies
_EARLIER = np.arange(4)[None, :] < np.arange(4)[:, None]


def _tet_items(E, F):
    """Tetrahedra of cells with corner energies ``E`` (..., 8, nb) and factors ``F`` (..., 8, nb, nc):
    flat sorted vertex energies (N, 4) and factors (N, 4, nc), N = (...)·6·nb."""
    Et = jnp.moveaxis(E[..., TETS, :], -1, -3)                   # (..., nb, 6, 4)
    Ft = jnp.moveaxis(F[..., TETS, :, :], -2, -4)                # (..., nb, 6, 4, nc)
    nc = F.shape[-1]
    Et, Ft = Et.reshape(-1, 4), Ft.reshape(-1, 4, nc)
    # sorted by rank (ties by vertex index): four elements need no general sort
    es = jax.lax.stop_gradient(Et)
    lower = (es[:, None, :] < es[:, :, None]) | ((es[:, None, :] == es[:, :, None]) & _EARLIER[None])
    rank = jnp.sum(lower, axis=-1)                                         # (N, 4): vertex i -> place
    at = rank[:, None, :] == jnp.arange(4)[None, :, None]                  # (N, place, vertex)
    order = jnp.sum(jnp.where(at, jnp.arange(4)[None, None, :], 0), axis=-1)
    return jnp.sum(jnp.where(at, Et[:, None, :], 0.0), axis=-1), jnp.take_along_axis(Ft, order[..., None], -2)


def build_tables(model, params, meta: TetraMeta, arrays, mu, kt, sea):
    """Fine and coarse energy tables of every temperature level; ``(levels, info)`` in the form
    :func:`crosswind.solver.engine.ladder.condition_sums` reads."""
    ktl, refine0, parents, refine = arrays
    layout, nc = _ladder.factor_layout(3, sea)
    b = jax.lax.stop_gradient(model.reciprocal_vectors(params))
    vol = jnp.abs(jnp.dot(b[0], jnp.cross(b[1], b[2]))) / (2 * jnp.pi) ** 3
    n0, L, M = meta.n0, meta.depth, meta.knots
    K, KT = meta.nt + 1, meta.tables
    Mc = (M + 1) // 2
    nb = model.n_bands
    e_lo, delta, fits, (lo, hi) = table_ranges(jax.lax.stop_gradient(mu), ktl, meta.rho, M, meta.shared)
    # a plan made for colder conditions: the level-0 table would cut their windows short
    fits = fits & (jnp.max(jax.lax.stop_gradient(kt)) <= ktl[0] * (1 + 1e-9))
    # stale: a leaf that reaches the window by more than rounding (plan: energies without derivatives)
    tight = 1 - 1e-9
    diag = jnp.max(jnp.sqrt(jnp.sum((jnp.asarray(_SIGNS) @ b) ** 2, axis=-1)))
    slack = lambda n: meta.slack * 0.5 * diag / n
    cw = jnp.asarray(CORNER_W)

    # level 0: every point, its cells' fully occupied bands
    red0 = jnp.asarray(_points0(n0))
    N0 = red0.shape[0]
    c0 = min(POINT_CHUNK, N0)
    nch = -(-N0 // c0)
    redp = jnp.concatenate([red0, jnp.broadcast_to(red0[:1], (nch * c0 - N0, 3))])

    def body0(_, i):
        kk = jax.lax.dynamic_slice_in_dim(redp, i * c0, c0) @ b
        return None, _factors(model, params, kk, sea)

    _, (e0, f0) = jax.lax.scan(jax.checkpoint(body0), None, jnp.arange(nch))
    e0, f0 = e0.reshape(-1, nb)[:N0], f0.reshape(-1, nb, nc)[:N0]
    corners = jnp.asarray(_cell_corners0(n0))
    cut, bel = _intersects(jax.lax.stop_gradient(e0)[corners], slack(n0) * tight, lo, hi)
    leaf0 = ~refine0
    stale = jnp.any(jnp.any(cut, -1) & leaf0)
    wcell = jnp.where(bel & leaf0[:, None], vol / n0 ** 3, 0.0)                      # (n0³, nb)
    pw = jnp.zeros((N0, nb)).at[corners].add(wcell[:, None, :] * cw[None, :, None])
    below = jnp.einsum("pn,pnc->c", pw, f0)
    # the nested estimate of the unrefined cells: each cell integrates the linear interpolant of
    # its 2×2×2 block of the n0/2 grid instead (corner q of the block's 27 points: the mean of the
    # block corners 2⌊q/2⌋ and 2⌈q/2⌉); a whole block of such cells adds the block's own integral
    pw_c = jnp.zeros((N0, nb))
    for ends in _block_ends(n0):
        pw_c = pw_c.at[jnp.asarray(ends)].add(0.5 * wcell[:, None, :] * cw[None, :, None])
    below_c = jnp.einsum("pn,pnc->c", pw_c, f0)

    proj = lambda m: jax.vmap(partial(project, M=m), in_axes=(0, None, None, None, 0, 0))
    acc_f = (jnp.zeros((KT, M, nc)), jnp.zeros((KT, M + 1, 4, nc)), jnp.zeros((KT, nc)))
    acc_c = (jnp.zeros((KT, Mc, nc)), jnp.zeros((KT, Mc + 1, 4, nc)), jnp.zeros((KT, nc)))
    e_lo_t, delta_t = e_lo[:KT], delta[:KT]
    for lev in range(1, L + 1):
        par = parents[lev - 1]
        B = meta.sizes[lev - 1]
        nchunk = B // CELL_CHUNK
        valid = par[:, 0] >= 0
        parc = jnp.where(par < 0, 0, par)
        deepest = lev == L
        R = refine[lev - 1] if not deepest else jnp.zeros((B, 8), bool)
        n_l = n0 * 2 ** lev
        V_l = vol / n_l ** 3
        s_l = slack(n_l)

        def body(carry, i, lev=lev, parc=parc, valid=valid, R=R, V_l=V_l, s_l=s_l, deepest=deepest):
            bf, bc, stale, af, ac = carry
            sl = lambda x: jax.lax.dynamic_slice_in_dim(x, i * CELL_CHUNK, CELL_CHUNK)
            p, ok, r = sl(parc), sl(valid), sl(R)
            red = (jnp.asarray(OFFSET)[None, None, :] * 2 ** lev + 2 * p[:, None, :].astype(jnp.float64)
                   + jnp.asarray(_OFFS27, dtype=jnp.float64)[None]) / (n0 * 2 ** lev)
            e, f = _factors(model, params, red.reshape(-1, 3) @ b, sea)
            e, f = e.reshape(CELL_CHUNK, 27, nb), f.reshape(CELL_CHUNK, 27, nb, nc)
            ech = e[:, CHILD_CORNERS]                                          # (c, 8, 8, nb)
            # corner-weighted integrals of children (S_FINE) or of the parent's interpolant over
            # them (S_HALF) with weights w (c, 8, nb): folded onto the 27 points first
            on27 = lambda w, S: jnp.einsum("kpn,kpnc->c", jnp.einsum("kon,op->kpn", w, jnp.asarray(S)), f)
            if not deepest:
                cut, bel = _intersects(jax.lax.stop_gradient(ech), s_l * tight, lo, hi)  # (c, 8, nb)
                leaf = ~r & ok[:, None]
                stale = stale | jnp.any(jnp.any(cut, -1) & leaf)
                w = jnp.where(bel & leaf[..., None], V_l, 0.0)
                bf = bf + on27(w, S_FINE)
                # nested estimate: the parent's interpolant over the same leaves
                bc = bc + on27(w, S_HALF)
            else:
                # children (fine tables) and the parents themselves (coarse tables, spacing 2h):
                # the deposit integrates the linear interpolant, which lies between the corner
                # values, so a (cell, band) item whose corners all lie below the window adds its
                # corner-weighted integral and one whose corners reach it is deposited (at most
                # caps per chunk, or the plan overflowed)
                cf, cc = meta.caps
                cut, bel = _intersects(jax.lax.stop_gradient(ech), 0.0, lo, hi)              # (c, 8, nb)
                okc = ok[:, None, None]
                bf = bf + on27(jnp.where(bel & ~cut & okc, V_l, 0.0), S_FINE)
                ep = e[:, PARENT_CORNERS]                                                    # (c, 8, nb)
                cutp, belp = _intersects(jax.lax.stop_gradient(ep), 0.0, lo, hi)              # (c, nb)
                wp = jnp.where(belp & ~cutp & ok[:, None], 8 * V_l, 0.0)
                bc = bc + jnp.einsum("kn,p,kpnc->c", wp, jnp.asarray(S_PARENT), f)
                cc8 = jnp.asarray(CHILD_CORNERS)
                for sel, cap_, per, V, tabs, m_, dl in (((cut & okc).reshape(-1), cf, 8, V_l, "f", M, delta_t),
                                                        ((cutp & ok[:, None]).reshape(-1), cc, 1, 8 * V_l, "c",
                                                         Mc, 2 * delta_t)):
                    nsel = jnp.sum(sel)
                    stale = stale | (nsel > cap_)
                    pick = jnp.nonzero(sel, size=cap_, fill_value=0)[0]
                    live = jnp.arange(cap_) < nsel
                    # item (cell, child, band) or (cell, band) -> its 8 corner points among the 27
                    kk, nn = pick // (per * nb), pick % nb
                    pts = cc8[(pick // nb) % 8] if per == 8 else jnp.broadcast_to(
                        jnp.asarray(PARENT_CORNERS), (cap_, 8))
                    Ei = e[kk[:, None], pts, nn[:, None]]                                     # (cap, 8)
                    Fi = f[kk[:, None], pts, nn[:, None]]                                     # (cap, 8, nc)
                    et, ft = _tet_items(Ei[..., None], Fi[..., None, :])
                    vt = jnp.where(jnp.repeat(live, 6), V / 6, 0.0)
                    qv = vertex_coefficients(et) * vt[:, None, None, None]
                    if tabs == "f":
                        af = proj(m_)(af, et, qv, ft, e_lo_t, dl)
                    else:
                        ac = proj(m_)(ac, et, qv, ft, e_lo_t, dl)
            return (bf, bc, stale, af, ac), None

        def live_body(carry, i, body=body, valid=valid):
            # a chunk of padding only (the plan puts the valid parents first): nothing to add
            live = jnp.any(jax.lax.dynamic_slice_in_dim(valid, i * CELL_CHUNK, CELL_CHUNK))
            return jax.lax.cond(live, lambda c: body(c, i)[0], lambda c: c, carry), None

        zero = jnp.zeros((nc,))
        (bf_l, bc_l, stale, acc_f, acc_c), _ = jax.lax.scan(
            jax.checkpoint(live_body), (zero, zero, stale, acc_f, acc_c), jnp.arange(nchunk))
        below = below + bf_l
        below_c = below_c + bc_l
    tab_f, bel_f = jax.vmap(partial(finish_table, M=M))(acc_f)
    tab_c, bel_c = jax.vmap(partial(finish_table, M=Mc))(acc_c)
    levels = []
    for k in range(K):
        extra, extra_c = (below, below_c) if k == 0 else (0.0, 0.0)
        t = 0 if meta.shared else k
        # shared: level k reads the one table coarsened to its own spacing, ρ knots per k_BT_k
        c = 2 ** (meta.nt - k) if meta.shared else 1
        levels.append(dict(fine=(coarsen(tab_f[t], c), bel_f[t] + extra),
                           coarse=(coarsen(tab_c[t], c), bel_c[t] + extra_c),
                           e_lo=e_lo[t], delta=delta[t] * c, rho=meta.rho))
    info = {"kt_ladder": ktl, "overflow": stale | ~fits, "vol": vol, "layout": layout}
    return levels, info


def tetra_moments(model, params, meta, arrays, mu, kt, temp, tau_eval, tau_arr, omega, filled, sea,
                  condition_chunk=128, groups=None):
    """Fine and coarse kernel sums for P conditions from one cell structure (the ladder's condition
    sums: :func:`crosswind.solver.engine.ladder.moments_from_tables`)."""
    levels, info = build_tables(model, params, meta, arrays, mu, kt, sea)
    return _ladder.moments_from_tables(levels, info, meta, mu, kt, temp, tau_eval, tau_arr, omega, filled,
                                       sea, condition_chunk, groups)
