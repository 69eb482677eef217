"""``response``: linear, anomalous Hall and second-order (2ω and rectified) currents of a band model.

Conventions (docs/theory.md §0, docs/theory.md §A2): carrier charge q = −e; E(t) = Re[E e^{iωt}];
j_a = σ_ab E_b; j(t) = Re[j⁽⁰⁾ + j⁽²ω⁾ e^{2iωt}] with j⁽²ω⁾_a = χ_abc E_b E_c and
j⁽⁰⁾_a = χ^dc_abc E_b E_c* (Sodemann & Fu, PRL 115, 216806, 2015, phasor convention; a static
field E gives j = 2χ^dc E E).  χ is symmetrised in its last two indices (exact for linear
polarisation); ``chi_dc_full`` keeps the antisymmetric part that elliptical drive probes.  Results in SI: 2D sheet
conductivity S, dipole m, χ A·m/V² (3D: S/m, dimensionless, A/V²).  ∫[dk] = ∫d^dk/(2π)^d, summed
over bands and multiplied by the model's degeneracy.

Response coefficients (τ̃_ν = τ/(1+iντ), F = −∂f0/∂ε, v = ∇_kε/ħ):

* Drude  σ^D_ab(ω) = q² ∫[dk] F τ̃_ω v_a v_b                                  (∝ τ)
* anomalous Hall (intrinsic)  σ^A_ab = −(q²/ħ) ε_abc ∫[dk] f0 Ω_c  (2D: σ_xy = −(e²/ħ)∫f0Ω = −σ_yx);
  a filled Chern band gives σ_xy = −C e²/h (TKNN; Thouless et al., PRL 49, 405, 1982)  (τ⁰)
* Berry-curvature dipole  D_bc = ∫[dk] F ħ v_b Ω_c = ∫[dk] f0 ∂_bΩ_c (2D: D_b, the z-curvature dipole)
* dipole term  χ^BCD_abc = −(q³/2ħ²) ε_acd ∫[dk] F τ̃_ω ħv_b Ω_d   → −(q³τ̃_ω/2ħ²) ε_acd D_bd for
  constant τ; 2D: χ_yxx = −e³τD_x/(2ħ²(1+iωτ))  (Sodemann & Fu 2015)                  (∝ τ)
* nonlinear Drude  χ^ND,2ω_abc = (q³/2ħ³) ∫[dk] F τ̃_ω [τ̃_2ω ∂_a∂_bε + τ̃'_2ω ∂_aε∂_bε] ∂_cε
  → q³τ²/(2ħ³(1+iωτ)(1+2iωτ)) ∫[dk] f0 ∂_a∂_b∂_c ε for constant τ; the rectified χ^ND,dc has
  τ̃_2ω → τ                                                                          (∝ τ²)
* full rectified tensor (not symmetrised in b, c; docs/theory.md §5.9): χ^full = χ^BCD (unsymmetrised)
  + χ^ND,dc + χ^int, j⁽⁰⁾_a = Re[χ^full_abc E_b E_c*] for any polarisation.  Its antisymmetric part is
  the dipole term alone, ½(χ_abc − χ_acb) = (e³τ̃_ω/4ħ²) ε_bc D_a in 2D (q = −e, constant τ), and the
  helicity-odd current (Berry-curvature-dipole circular photogalvanic effect; Moore & Orenstein,
  PRL 105, 026805, 2010; Sodemann & Fu 2015; Deyo, Golub, Ivchenko & Spivak, arXiv:0904.1917, 2009)
  is j_a = C_a S3, S3 = −i(E × E*)_z = 2 Im(E_x E_y*) (> 0: E rotates from x to y), with
  C_ae = −½ ε_bce Im χ^full_abc → C = (e³/4ħ²) ωτ²/(1+ω²τ²) D for constant τ (3D: C_ad s_d, s = −i E × E*,
  C = −(q³/4ħ²) ωτ²/(1+ω²τ²) (D − 1 Tr D))                                                  (∝ τ)
* intrinsic (Berry-connection polarizability; Gao, Yang, Niu, PRL 112, 166601, 2014)
  χ^int_abc = ½ (q³/ħ) ∫[dk] f0 [∂_aG_bc − ½(∂_bG_ac + ∂_cG_ab)]  (½: phasor convention, ω ≪ gap).
  This is one published form of a disputed τ⁰ sector (docs/theory.md §5.5c); switch it off with
  ``intrinsic=False``.                                                                 (τ⁰)
* Lorentz (ordinary) Hall to first order in B_z: σ_ab(B) = B (q³/ħ) ∫[dk] τ² f0' ε_cd v_a v_d ∂v_b/∂k_c
  (Jones–Zener iteration), ``sigma_lorentz`` = ∂σ/∂B_z in S/T and ``hall_coefficient``
  R_H = −σ^B_yx/(σ_xx σ_yy) (→ 1/(nq) for a parabolic band)
* thermoelectric (Mahan & Sofo, PNAS 93, 7436, 1996 transport function; dc Drude part):
  L_α = q²∫[dk] F τ (ε−μ)^α v v; S = L_0⁻¹L_1/(qT); κ_e = [L_2 − L_1 L_0⁻¹ L_1]/(q²T);
  ``lorenz`` = κ_xx/(σ_xx T).  Anomalous Nernst (Xiao, Yao, Fang, Niu, PRL 97, 026603, 2006):
  α_ab = (e k_B/ħ) ε_abc ∫[dk] Ω_c s(ε), j = σE + α(−∇T).

Integration (:mod:`crosswind.solver.engine.mesh`) is repeated at two resolutions; ``error`` holds
|fine − coarse| for every field (the fine value is returned).  With ``resolution=None`` the level is
raised until every field passes ``rtol`` relative to its own size (or, for a field that vanishes by
symmetry, to the size of its integrand).
"""
from __future__ import annotations

import dataclasses
import warnings
from collections.abc import Mapping
from dataclasses import dataclass
from functools import partial
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from crosswind.models.band_model import BandModel
from crosswind.models.domain import Lattice
from crosswind.models.units import ANGSTROM, E_CHARGE, HBAR_JS, KB_EVK
from crosswind.solver.engine import ladder as _ladder
from crosswind.solver.engine import mesh as _mesh
from crosswind.solver.engine import rays as _rays
from crosswind.solver.engine import shells as _shells
from crosswind.solver.engine import tetra as _tetra
from crosswind.solver.engine.inputs import check_arguments
from crosswind.solver.engine.kernels import Moments, moments, moments_indexed
from crosswind.solver.engine.memory import budget_bytes, condition_block
from crosswind.solver.engine.occupation import T_FLOOR, thermal_energy
from crosswind.solver.engine.scattering import as_scattering, temperature_free
from crosswind.solver.pytrees import pytree_dataclass, static
from crosswind.solver.vocabulary import units_of

E = E_CHARGE
HB = HBAR_JS
FS = 1e-15


@pytree_dataclass
class ChiParts:
    """The three parts of a second-order coefficient χ_abc, whose sum is the coefficient itself
    (``Response.chi_parts`` sum to ``chi`` at 2ω, ``Response.chi_dc_parts`` to the rectified
    ``chi_dc``).  Each is complex (complex128), shaped (conditions..., d, d, d), symmetric in b, c,
    in SI units A·m/V² for a 2D sheet (A/V² in 3D):

    * ``dipole``: Berry-curvature dipole term χ^BCD = −(q³/2ħ²) ε_acd ∫[dk] F τ̃_ω ħv_b Ω_d (∝ τ);
    * ``drude``: nonlinear Drude term χ^ND (∝ τ²; in ``chi_dc_parts`` with τ̃_2ω → τ);
    * ``intrinsic``: Berry-connection-polarizability term (τ⁰; zero with ``intrinsic=False``).

    In ``Response.error`` the same fields hold the real error estimate |fine − coarse| (same units).
    """

    dipole: Any
    drude: Any
    intrinsic: Any


@dataclass(frozen=True)
class Resolution:
    """How a :class:`Response` was integrated: static metadata of the pytree (hashable, never
    traced; ``jax.jit``/``jax.vmap`` treat it as part of the tree structure).

    Every engine:

    * ``engine`` (str): ``"mesh"`` (node quadrature), ``"ladder"`` (energy-resolved, 2D lattices),
      ``"rays"`` (energy-resolved, 2D continuum models) or ``"shells"`` (energy-resolved, 3D
      continuum models);
    * ``level`` (int): refinement level of the returned values (index into the engine's resolutions);
    * ``k_points`` (int): distinct k-points where the band geometry was evaluated (all passes and
      conditions);
    * ``converged`` (bool or None): whether every checked field met ``rtol`` with automatic
      refinement (``resolution=None``); None at a fixed level; False whenever a thermal window is
      unresolved;
    * ``unconverged_fields`` (tuple of str): the fields that did not.

    Node quadrature (``engine="mesh"``; None for the other engines):

    * ``nodes_per_condition`` (int): nodes of the mesh at ``level`` for one condition;
    * ``condition_block`` (int): conditions evaluated together within the memory budget;
    * ``window_unresolved`` (int): conditions whose thermal window falls between the nodes
      (None when traced);
    * ``window_ratio`` (float): the largest node spacing / thermal window (only when some
      window is unresolved, else None).

    Energy-resolved engines (``"ladder"``, ``"tetra"``, ``"rays"``, ``"shells"``; None for the node
    quadrature):

    * ``plan``: the plan of the last pass (ladder: :class:`~crosswind.solver.engine.ladder.Plan`;
      tetra: :class:`~crosswind.solver.engine.tetra.TetraPlan`, or
      :class:`~crosswind.solver.engine.tetra.TetraGroups` for a sweep split into μ groups; rays:
      ``(RayPlan, RayGrid)``, with 25 % more crossing slots than the call's own run kept, for
      other parameter values: ``rays.RayPlan.reusable``); pass ``plan=r.resolution.plan`` to
      ``response`` under ``jax.grad``/``jax.jit``;
    * ``attempts`` (int): passes at ``level`` (a run whose budget overflowed is repeated);
    * ``levels`` (int, ladder and tetra): temperature levels of the plan.
    """

    engine: str
    level: int
    k_points: int = 0
    converged: bool | None = None
    unconverged_fields: tuple = ()
    nodes_per_condition: int | None = None
    condition_block: int | None = None
    window_unresolved: int | None = None
    window_ratio: float | None = None
    plan: Any = None
    attempts: int | None = None
    levels: int | None = None


class Units(Mapping):
    """{field: SI unit} of a :class:`Response`: a read-only, hashable mapping (static metadata of
    the pytree); compares equal to a dict with the same items."""

    __slots__ = ("_items",)

    def __init__(self, items=()):
        self._items = dict(items)

    def __getitem__(self, key):
        return self._items[key]

    def __iter__(self):
        return iter(self._items)

    def __len__(self):
        return len(self._items)

    def __eq__(self, other):
        return isinstance(other, Mapping) and dict(self.items()) == dict(other.items())

    def __hash__(self):
        return hash(tuple(sorted(self._items.items())))

    def __repr__(self):
        return f"Units({self._items!r})"


@pytree_dataclass
class Response:
    """Transport coefficients on the broadcast shape of (mu, temperature, tau): every array field
    carries that shape in front of its tensor indices (d = model dimension).  SI units for a 2D
    sheet, 3D in brackets (``units`` names every field; formulas in ``help(response)``):

    * ``density`` [m⁻² (m⁻³)] relative to neutrality; ``dos`` [J⁻¹m⁻² (J⁻¹m⁻³)];
    * ``sigma`` = ``sigma_drude`` + ``sigma_anomalous`` (…, d, d) [S (S/m)], complex;
    * ``dipole`` (…, d) [m (1); 3D (…, d, 3)], the Berry-curvature dipole, and ``dipole_sea`` its
      Fermi-sea form (NaN unless ``dipole_route="both"``);
    * ``chi`` (2ω) and ``chi_dc`` (rectified) (…, d, d, d) [A·m/V² (A/V²)], complex, with their
      parts ``chi_parts`` and ``chi_dc_parts`` (:class:`ChiParts`: ``dipole``, ``drude``, ``intrinsic``);
    * ``chi_dc_full`` (…, d, d, d) [A·m/V² (A/V²)], complex: the rectified tensor *not* symmetrised in
      b, c (``chi_dc`` is its symmetric part), j⁽⁰⁾_a = Re[χ^full_abc E_b E_c*] for any polarisation;
      ``chi_circular`` (…, d) [A·m/V²; 3D (…, d, 3) A/V²], real: the helicity-odd (circular
      photogalvanic) current j_a = C_a S3 with S3 = −i(E × E*)_z (3D: j_a = C_ad s_d, s = −i E × E*);
      docs/theory.md §5.9;
    * ``sigma_lorentz`` (…, d, d) [S/T (S/(m·T))]; ``hall_coefficient`` [Ω/T (m³/C); NaN in 3D];
      ``seebeck`` (…, d, d) [V/K]; ``thermal_conductivity`` (…, d, d) [W/K (W/(K·m))];
      ``lorenz`` [W·Ω/K²]; ``nernst`` (…, d, d) [A/K (A/(K·m))].

    ``error``: a Response of the same structure holding the absolute error estimate of every
    field and every χ part (``r.error.sigma``, ``r.error.chi_parts.dipole``), real, in the same
    units: |fine − coarse| of two mesh levels, the returned (fine) level and a coarser one (the
    node quadrature: the next coarser level; the ladder: the nested sub-grid of the same pass;
    docs/theory.md §14, docs/error-estimates.md), plus for the energy-resolved engines the
    spread of their T² extrapolation, and with ``dipole_route="both"`` the disagreement of the
    two dipole routes in ``error.dipole``.  ``inf`` where a budget overflowed or a thermal window
    is unresolved; NaN where no estimate exists (``estimate_error=False``, the node quadrature at
    level 0, fields not computed).  Its own ``error`` and ``resolution`` are None.

    ``resolution``: :class:`Resolution`, how the values were integrated (engine, level,
    convergence, k-points, plan; static metadata).  ``units``: :class:`Units`, {field: SI unit}.
    """

    density: Any
    dos: Any
    sigma: Any
    sigma_drude: Any
    sigma_anomalous: Any
    dipole: Any
    dipole_sea: Any
    chi: Any
    chi_dc: Any
    chi_dc_full: Any
    chi_circular: Any
    chi_parts: ChiParts
    chi_dc_parts: ChiParts
    sigma_lorentz: Any
    hall_coefficient: Any
    seebeck: Any
    thermal_conductivity: Any
    lorenz: Any
    nernst: Any
    error: Response | None = None
    resolution: Resolution | None = static(None)
    units: Units = static(default_factory=Units)


UNITS_2D = units_of(2)     # SI units of every field (crosswind.solver.vocabulary)
UNITS_3D = units_of(3)


def mesh_levels(model):
    """The mesh levels of the node quadrature for this model (lattice grids or continuum rays)."""
    if isinstance(model.domain, Lattice):
        return _mesh.lattice_levels(model.dim)
    return _mesh.ray_levels()


def neutral_filling(model: BandModel) -> int:
    """Bands filled at charge neutrality (density is counted from there)."""
    opts = model.static_options()
    if "neutral_filling" in opts:
        return int(opts["neutral_filling"])
    if model.block_size == 1:
        return 0
    return model.blocks * (model.block_size // 2)


@partial(jax.jit, static_argnames=("level", "tau_eval", "filled", "sea", "chunk"))
def _moments_at(model, mu, kt, temp, tau_arr, omega, *, level, tau_eval, filled, sea, chunk):
    """Kernel sums of one block of conditions at one level, and per condition the node spacing on
    its Fermi contour over its thermal window (above 1: unresolved; continuum rays place their
    panels on the window itself and report their angular ratio, :func:`mesh._angular_ratio`)."""
    res = mesh_levels(model)[level]
    p = model.params
    tau_col = jax.tree_util.tree_map(lambda a: a[:, None], tau_arr)
    if isinstance(model.domain, Lattice):
        n, node_fn, window = _mesh.refined_lattice_rule(model, res, mu, kt)
        return moments_indexed(model, p, n, node_fn, mu, kt, temp, tau_eval, tau_col, omega, filled,
                               sea, min(chunk, n)), window

    def one(args):
        m, t, tt, ta = args
        k, w, ratio = _mesh.ray_rule(model, res, m, t, with_window=True)
        ta1 = jax.tree_util.tree_map(lambda a: a[None], ta)
        out = moments(model, p, k, w, m[None], t[None], tt[None], tau_eval, ta1, omega, filled, sea, chunk)
        return jax.tree_util.tree_map(lambda a: a[0], out), ratio

    return jax.vmap(one)((mu, kt, temp, tau_col))


def _eps(dim):
    if dim == 2:
        return jnp.array([[0.0, 1.0], [-1.0, 0.0]])
    e = np.zeros((3, 3, 3))
    for a, b, c in ((0, 1, 2), (1, 2, 0), (2, 0, 1)):
        e[a, b, c], e[b, a, c] = 1.0, -1.0
    return jnp.asarray(e)


def _sym(chi):
    return 0.5 * (chi + jnp.swapaxes(chi, -1, -2))


@partial(jax.jit, static_argnames=("intrinsic",))   # one program, not ~100 op-by-op dispatches
def _to_si(mom: Moments, model, temp, intrinsic) -> Response:
    """SI fields (a :class:`Response` without error and metadata) from the kernel sums."""
    d = model.dim
    L = ANGSTROM
    g = model.degeneracy
    m = jax.tree_util.tree_map(lambda v: v * g, mom)
    eps = _eps(d)
    out = {}
    out["density"] = m.density * L ** (-d)
    out["dos"] = m.dos / E * L ** (-d)
    sd = m.drude * (E ** 3 * FS * L ** (2 - d) / HB ** 2)
    if d == 2:
        sxy = -(E ** 2 / HB) * m.ahe
        z = jnp.zeros_like(sxy)
        sa = jnp.stack([jnp.stack([z, sxy], -1), jnp.stack([-sxy, z], -1)], -2)
        out["dipole"] = m.dipole * L
        bcd = (E ** 3 * FS * L / (2 * HB ** 2)) * jnp.einsum("ac,pb->pabc", eps.astype(jnp.complex128), m.dipole_tau)
        out["nernst"] = jnp.einsum("ab,p->pab", eps, m.nernst) * (E * KB_EVK * E / HB)
        if m.dipole_sea is not None:
            out["dipole_sea"] = m.dipole_sea * L
    else:
        sa = -(E ** 2 / HB) * jnp.einsum("abc,pc->pab", eps, m.ahe) / L
        out["dipole"] = m.dipole
        bcd = (E ** 3 * FS / (2 * HB ** 2)) * jnp.einsum("acd,pbd->pabc", eps.astype(jnp.complex128), m.dipole_tau)
        out["nernst"] = jnp.einsum("abc,pc->pab", eps, m.nernst) * (E * KB_EVK * E / HB) / L
        if m.dipole_sea is not None:
            out["dipole_sea"] = m.dipole_sea
    out["sigma_drude"] = sd
    out["sigma_anomalous"] = sa.astype(jnp.complex128)
    out["sigma"] = sd + sa.astype(jnp.complex128)
    nd_fac = -(E ** 4 * FS ** 2 * L ** (3 - d) / (2 * HB ** 3))
    nd2 = _sym(m.drude2_2w * nd_fac)
    nd0 = _sym(m.drude2_0 * nd_fac)
    bcd_full = bcd                     # unsymmetrised: its antisymmetric part is the circular term
    bcd = _sym(bcd)
    if intrinsic:
        cint = (-(E ** 2) * L ** (3 - d) / (2 * HB)) * m.bcp
    else:
        cint = jnp.zeros_like(m.bcp)
    cint = _sym(cint).astype(jnp.complex128)
    out["chi_parts"] = ChiParts(dipole=bcd, drude=nd2, intrinsic=cint)
    out["chi_dc_parts"] = ChiParts(dipole=bcd, drude=nd0, intrinsic=cint)
    out["chi"] = bcd + nd2 + cint
    out["chi_dc"] = bcd + nd0 + cint
    # full rectified tensor (docs/theory.md §5.9): only the dipole term has a part antisymmetric in
    # b, c (the nonlinear Drude and intrinsic kernels are symmetric before integration by parts),
    # so sym(chi_dc_full) = chi_dc; the circular coefficient is C_ae = −½ ε_bce Im χ^full_abc
    out["chi_dc_full"] = bcd_full + nd0 + cint
    if d == 2:
        out["chi_circular"] = -0.5 * jnp.einsum("bc,pabc->pa", eps, out["chi_dc_full"].imag)
    else:
        out["chi_circular"] = -0.5 * jnp.einsum("bce,pabc->pae", eps, out["chi_dc_full"].imag)
    # Lorentz Hall term and thermoelectric tensors (dc Drude part)
    out["sigma_lorentz"] = m.lorentz * (E ** 5 * FS ** 2 * L ** (4 - d) / HB ** 4)
    s0 = m.drude0 * (E ** 3 * FS * L ** (2 - d) / HB ** 2)
    l1 = m.thermo1 * (E ** 4 * FS * L ** (2 - d) / HB ** 2)
    l2 = m.thermo2 * (E ** 5 * FS * L ** (2 - d) / HB ** 2)
    T = jnp.maximum(temp, T_FLOOR)[:, None, None]
    s0inv = jnp.linalg.inv(s0)
    out["seebeck"] = -(s0inv @ l1) / (E * T)
    kappa = (l2 - l1 @ s0inv @ l1) / (E ** 2 * T)
    out["thermal_conductivity"] = kappa
    out["lorenz"] = kappa[:, 0, 0] / (s0[:, 0, 0] * T[:, 0, 0])
    if d == 2:
        out["hall_coefficient"] = -out["sigma_lorentz"][:, 1, 0] / (s0[:, 0, 0] * s0[:, 1, 1])
    else:
        out["hall_coefficient"] = jnp.full(temp.shape, jnp.nan)
    if "dipole_sea" not in out:
        out["dipole_sea"] = jnp.full(out["dipole"].shape, jnp.nan)
    return Response(**out)


def _is_traced(*xs):
    leaves = jax.tree_util.tree_leaves(xs)
    return any(isinstance(x, jax.core.Tracer) for x in leaves)


def _floors(mom, model, tau_max):
    """Integrand magnitudes in SI: the size a field would have without cancellations.  A field
    that vanishes by symmetry is judged against 1e-2 of this instead of its own (zero) size."""
    L, g, d = ANGSTROM, model.degeneracy, model.dim
    mx = lambda key: float(np.max(np.asarray(getattr(mom, key)))) * g
    dip = mx("scale_dipole")
    chi = (dip * E ** 3 * FS * tau_max * L ** (3 - d) / (2 * HB ** 2)
           + mx("scale_drude2") * E ** 4 * FS ** 2 * L ** (3 - d) / (2 * HB ** 3)
           + mx("scale_bcp") * E ** 2 * L ** (3 - d) / (2 * HB))
    return {"sigma_anomalous": mx("scale_ahe") * E ** 2 / HB * L ** (2 - d),
            "dipole": dip * L ** (3 - d), "chi": chi, "chi_dc": chi}


#: a Berry-curvature field whose error is below this fraction of its natural unit (:func:`_natural_units`)
#: times rtol is resolved to rounding level: e.g. σ_xy in a gap of graphene-like bands whose curvature
#: vanishes identically by PT symmetry, where the integrand magnitude itself is rounding noise
ROUNDING_ZERO = 1e-6


def _natural_units(model):
    """SI units that the Berry-curvature fields take on for curvature of the model's own size
    (Ω ~ 1/k_s², k_s the shortest reciprocal vector of a lattice or the mesh-placement wavevector
    of a continuum model): the anomalous Hall conductivity (e²/h)·k_s^(d−2), the dipole
    k_s^(d−3) (a length in 2D, a number in 3D)."""
    if isinstance(model.domain, Lattice):
        k_s = float(np.linalg.norm(np.asarray(model.reciprocal_vectors()), axis=1).min())
    else:
        k_s = float(model.domain.scale_for(model.params))
    k_si, d = k_s / ANGSTROM, model.dim
    return {"sigma_anomalous": E ** 2 / (2 * np.pi * HB) * k_si ** (d - 2), "dipole": k_si ** (d - 3)}


def _excess(part):
    """Error over allowance of an (error, allowed) pair, for ranking: NaN errors rank first."""
    diff, allowed = part
    if np.isnan(diff):
        return np.inf
    return diff / allowed if allowed > 0 else (np.inf if diff > 0 else 0.0)


def _field_status(fine, err, mom_fine, rtol, model, tau_max):
    """{field: (largest estimated error, allowed error, size)}: ``rtol`` times the field's size,
    or, for a field that vanishes by symmetry, times 1e-2 of its integrand magnitude; for the
    anomalous Hall conductivity and the dipole at least :data:`ROUNDING_ZERO` of their natural
    units (:func:`_natural_units`), because a curvature that vanishes pointwise by symmetry (PT:
    graphene, bilayer graphene at U = 0) leaves an integrand magnitude of rounding size too.  The
    off-diagonal components of σ take the floor of the anomalous Hall conductivity, whose valley
    or spin partners cancel there (μ in the gap of a time-reversal-invariant insulator: a
    Fermi-sea sum at rounding level); its diagonal, a Drude part that no symmetry cancels, is
    judged against the size of σ alone, and so is the off-diagonal Drude part (an anisotropic
    σ_xy^Drude, ``err.sigma_drude``), while σ_anomalous keeps its own check.  Of the parts the one
    with the larger error relative to its allowance is reported (a NaN error counts as the
    largest)."""
    out = {}
    floors = {name: 1e-2 * value for name, value in _floors(mom_fine, model, tau_max).items()}
    for name, unit in _natural_units(model).items():
        floors[name] = max(floors[name], ROUNDING_ZERO * unit)
    for name in ("density", "sigma", "sigma_anomalous", "dipole", "chi", "chi_dc"):
        a, e = np.asarray(getattr(fine, name)), np.asarray(getattr(err, name))
        size = float(np.max(np.abs(a))) if a.size else 0.0
        if name == "sigma" and e.size:
            off = ~np.eye(e.shape[-1], dtype=bool)
            drude = np.asarray(err.sigma_drude)
            parts = [(float(np.max(e[..., ~off])), rtol * size), (float(np.max(drude[..., off])), rtol * size),
                     (float(np.max(e[..., off])), rtol * max(size, floors["sigma_anomalous"]))]
            diff, allowed = max(parts, key=_excess)
            out[name] = (diff, allowed, size)
            continue
        floor = floors.get(name, 0.0)
        diff = float(np.max(e)) if e.size else 0.0
        out[name] = (diff, rtol * max(size, floor), size)
    return out


def _converged(fine, err, mom_fine, rtol, model, tau_max, status=None):
    """Fields whose estimated error ``err`` exceeds the allowed error of :func:`_field_status`
    (``status``, when already computed)."""
    status = _field_status(fine, err, mom_fine, rtol, model, tau_max) if status is None else status
    return [(name, diff, size) for name, (diff, allowed, size) in status.items()
            if not diff <= allowed and diff > 0]


#: smallest convergence order (error ∝ h^p between two levels) from which automatic refinement
#: predicts the level it needs instead of stepping one level
JUMP_MIN_ORDER = 0.5


def _predicted_level(prev, cur, lev, top, spacing):
    """The level automatic refinement tries after ``lev`` (> ``lev``, at most ``top``): for every
    unconverged field whose estimated error fell from level lev−1 (``prev``) to lev (``cur``,
    {field: (error, allowed, size)}) with order p = ln(e_{lev−1}/e_lev)/ln(h_{lev−1}/h_lev) ≥
    JUMP_MIN_ORDER (h = ``spacing`` per level), the first level whose spacing brings
    e_lev (h/h_lev)^p to the allowed error (the top level if none does); lev + 1 for any other
    unconverged field.  The slowest field decides.  Skipped levels save their whole cost; a level
    reached by prediction still reports its own nested estimate, and stepping resumes if it does
    not converge."""
    nxt = lev + 1
    for name, (e1, allowed, _size) in cur.items():
        if e1 <= allowed or not (np.isfinite(e1) and e1 > 0):
            continue
        e0 = prev.get(name, (np.nan,))[0]
        if not (np.isfinite(e0) and e0 > e1):
            continue
        p = np.log(e0 / e1) / np.log(spacing[lev - 1] / spacing[lev])
        if not p >= JUMP_MIN_ORDER:
            continue
        need = spacing[lev] * (allowed / e1) ** (1.0 / p)
        c = next((c for c in range(lev + 1, top + 1) if spacing[c] <= need * (1 + 1e-9)), top)
        nxt = max(nxt, c)
    return min(nxt, top)


@jax.jit
def _field_errors(a: Response, b: Response) -> Response:
    """|a − b| for every response field and every χ part (SI fields of :func:`_to_si`)."""
    return jax.tree_util.tree_map(lambda x, y: jnp.abs(x - y), a, b)


@partial(jax.jit, static_argnames=("plan", "tau_eval", "filled", "sea"))
def _ladder_at(model, mu, kt, temp, tau_arr, omega, groups=None, *, plan, tau_eval, filled, sea):
    tau_col = jax.tree_util.tree_map(lambda a: a[:, None], tau_arr)
    f, c, ex, info = _ladder.ladder_moments(model, model.params, plan, mu, kt, temp, tau_eval, tau_col,
                                            omega, filled, sea, groups=groups)
    return f, c, (ex, info["tail"]), info["overflow"], info["flagged"]


def _run_ladder(model, mu, kt, temp, tau_arr, omega, res, kw, plan, traced, groups=None):
    """One ladder evaluation; a run whose flagged cells overflowed a budget is repeated with
    budgets raised from the counts it reports (concrete calls only).  ``groups``: conditions that
    share their ladder-temperature sums (:func:`crosswind.solver.engine.ladder.sweep_groups`)."""
    if plan is None:
        plan = _ladder.make_plan(model, model.params, mu, temp, res)
    tried = []
    for _ in range(4):
        tried.append(plan)
        f, c, ex, over, flagged = _ladder_at(model, mu, kt, temp, tau_arr, omega, groups, plan=plan, **kw)
        if traced or not bool(over):
            break
        new = _ladder.make_plan(model, model.params, mu, temp, res, flagged=np.asarray(flagged), old=plan)
        if new == plan:
            break
        plan = new
    return f, c, ex, over, tried


def _nested_errors(fine_m, coarse_m, ex_m, over, model, temp, intrinsic, richardson=False, tail=None):
    """(moments returned, the same in SI, error, error less the window truncation) from the fine
    and the nested coarse sums of one run: the error is |fine − coarse| (SI) plus the T²
    extrapolation's spread, inf where a plan overflowed, plus the window truncation of
    :func:`_tail_errors` where ``tail`` (P,) is given (the ladder: ``ladder.window_tails``).  The
    ladder returns the fine sums (its trapezoid sums converge spectrally: the coarse sums are far
    worse).  ``richardson`` (tetrahedra): fine and coarse both carry the O(h²)
    error of linear interpolation, so the moments returned are R = fine + (fine − coarse)/3, in
    which the h² terms cancel (docs/theory.md §16.6), and the error stays |fine − coarse|: three
    times the correction applied.  For errors e(2h) = 2^p e(h) of one sign, |R − X| = |4 − 2^p| e/3,
    which is at most |fine − coarse| = (2^p − 1) e for every order p ≥ 0.81 and at most the fine
    sums' own error e for 0 ≤ p ≤ 2.8."""
    val = (jax.tree_util.tree_map(lambda a, b: a + (a - b) / 3.0, fine_m, coarse_m) if richardson
           else fine_m)
    out = _to_si(val, model, temp, intrinsic)
    shifted = _to_si(jax.tree_util.tree_map(lambda a, b: a + b.astype(a.dtype), val, ex_m), model, temp,
                     intrinsic)
    fine = _to_si(fine_m, model, temp, intrinsic) if richardson else out
    diff = _field_errors(fine, _to_si(coarse_m, model, temp, intrinsic))
    err = jax.tree_util.tree_map(lambda u, v: jnp.where(over, jnp.inf, u + v), diff, _field_errors(shifted, out))
    if tail is None:
        return val, out, err, err
    return val, out, jax.tree_util.tree_map(jnp.add, err, _tail_errors(out, tail, temp)), err


# fields integrated over the Fermi sea with the uniform rule; every other field lives in the
# thermal window around the Fermi contours (derived tensors included)
SEA_FIELDS = ("density", "sigma_anomalous", "dipole_sea")


def _window_errors(err: Response, unresolved) -> Response:
    """inf for the Fermi-window fields of the conditions whose thermal window the nodes miss."""
    def mark(path, e):
        if path[0].name in SEA_FIELDS:
            return e
        return jnp.where(unresolved.reshape(unresolved.shape + (1,) * (e.ndim - 1)), jnp.inf, e)
    return jax.tree_util.tree_map_with_path(mark, err)


def _mesh_path(model, muf, kt, Tf, tauf, omega, kw, rtol, resolution, max_level, intrinsic,
               estimate_error, tau_max, P, budget):
    """Node-based quadrature (:mod:`crosswind.solver.engine.mesh`): one mesh pass per level, conditions in
    blocks sized by the memory budget (:func:`condition_block`)."""
    levels = mesh_levels(model)
    top = len(levels) - 1 if max_level is None else min(max_level, len(levels) - 1)
    passes = []
    blocks = {}

    def run(lev):
        passes.append(lev)
        block = condition_block(model, levels[lev], P, kw["chunk"], kw["sea"], budget)
        blocks[lev] = block
        if block >= P:
            return _moments_at(model, muf, kt, Tf, tauf, omega, level=lev, **kw)
        outs = []
        for start in range(0, P, block):
            # one compiled program for every block: the last one is padded with its last condition
            idx = np.minimum(np.arange(start, start + block), P - 1)
            out = _moments_at(model, muf[idx], kt[idx], Tf[idx], jax.tree_util.tree_map(lambda a: a[idx], tauf),  # noqa: B023
                              omega, level=lev, **kw)
            if not _is_traced(out):
                out = jax.device_get(out)           # one block in memory at a time
            outs.append(out)
        if _is_traced(outs):
            return jax.tree_util.tree_map(lambda *xs: jnp.concatenate(xs)[:P], *outs)
        # host-side joining: no compiled concatenation per number of blocks
        return jax.tree_util.tree_map(lambda *xs: jnp.asarray(np.concatenate(xs)[:P]), *outs)

    def errors(fine, coarse, window):
        return _window_errors(_field_errors(fine, coarse), window > 1)

    bad = None
    if resolution is None:
        lev = 1
        coarse_m, _ = run(0)
        fine_m, window = run(1)
        while True:
            fine = _to_si(fine_m, model, Tf, intrinsic)
            coarse = _to_si(coarse_m, model, Tf, intrinsic)
            bad = _converged(fine, errors(fine, coarse, window), fine_m, rtol, model, tau_max)
            if not bad or lev >= top:
                break
            lev += 1
            coarse_m, (fine_m, window) = fine_m, run(lev)
        err = errors(fine, coarse, window)
    else:
        if not (0 <= resolution <= len(levels) - 1):
            raise ValueError(f"response: resolution must be a level 0..{len(levels) - 1}")
        lev = resolution
        fine_m, window = run(lev)
        compared = lev > 0 and estimate_error
        coarse_m = run(lev - 1)[0] if compared else fine_m
        fine = _to_si(fine_m, model, Tf, intrinsic)
        coarse = _to_si(coarse_m, model, Tf, intrinsic)
        err = _field_errors(fine, coarse)
        if not compared:
            # level 0 has no coarser level to compare with: the estimate is unavailable (NaN), never 0
            err = jax.tree_util.tree_map(lambda a: jnp.full(a.shape, jnp.nan), err)
        err = _window_errors(err, window > 1)
    # distinct k-points where the band geometry was evaluated: lattice meshes are shared by all
    # conditions of a block, continuum ray meshes are built per condition
    per_pass = lambda q: -(-P // blocks[q]) if isinstance(model.domain, Lattice) else P
    info = {"engine": "mesh", "level": lev, "nodes_per_condition": _mesh.node_count(model, levels[lev]),
            "k_points": int(sum(_mesh.node_count(model, levels[q]) * per_pass(q) for q in set(passes))),
            "condition_block": int(blocks[lev])}
    if not _is_traced(window):
        w = np.asarray(window)
        info["window_unresolved"] = int(np.sum(w > 1))
        if info["window_unresolved"]:
            info["window_ratio"] = float(np.max(w))
            # the window scales with k_BT: the temperature from which this level resolves every condition
            info["_warm_enough"] = float(np.max(np.asarray(kt)[w > 1] * w[w > 1])) / KB_EVK
    return fine, err, bad, info


def _resolution_loop(run, nres, resolution, max_level, plan, rtol, model, tau_max, spacing=None):
    """``run(level, plan)`` → (plans tried, fine moments, fine Response, error, the error less the
    window truncation) at the fixed ``resolution`` (with ``plan``), or from level 1 up until every
    field converges (or the top level, or only the window truncation, which no resolution reduces,
    is above the tolerance): one level at a time, or, with ``spacing`` (a length per level, finest
    first reached last), to the level :func:`_predicted_level` predicts from the last two levels'
    estimates.  Returns (level, plans tried, fine, err, unconverged fields or None, k-points of
    every run)."""
    bad = None
    if resolution is None:
        top = nres - 1 if max_level is None else min(max_level, nres - 1)
        lev, k_points, status = 1, 0, {}
        while True:
            tried, f, fine, err, resolvable = run(lev, None)
            k_points += sum(p.k_points(model.dim) for p in tried)
            status[lev] = _field_status(fine, resolvable, f, rtol, model, tau_max)
            bad = _converged(fine, err, f, rtol, model, tau_max)
            if not bad or lev >= top or not _converged(fine, resolvable, f, rtol, model, tau_max, status[lev]):
                break
            if spacing is not None and lev - 1 in status:
                lev = _predicted_level(status[lev - 1], status[lev], lev, top, spacing)
            else:
                lev += 1
    else:
        if not (0 <= resolution <= nres - 1):
            raise ValueError(f"response: resolution must be a level 0..{nres - 1}")
        lev = resolution
        tried, f, fine, err, _ = run(lev, plan)
        k_points = sum(p.k_points(model.dim) for p in tried)
    return lev, tried, fine, err, bad, k_points


def _sharing_keys(muf, Tf, tauf, free_of_t):
    """(P, n) per-condition keys of :func:`crosswind.solver.engine.ladder.sweep_groups`: μ, every τ
    parameter, and T unless τ is free of it (``free_of_t``: :func:`~crosswind.solver.engine.
    scattering.temperature_free`)."""
    cols = [np.asarray(muf)] + [np.asarray(a) for a in jax.tree_util.tree_leaves(tauf)]
    if not free_of_t:
        cols.append(np.asarray(Tf))
    return np.stack(cols, axis=1)


def _ladder_path(model, muf, kt, Tf, tauf, omega, kw, rtol, resolution, max_level, intrinsic, plan,
                 traced, tau_max, keys=None):
    """Energy-resolved ladder (:mod:`crosswind.solver.engine.ladder`): one program per resolution
    computes the fine and the nested coarse sums for every condition."""
    if not isinstance(model.domain, Lattice):
        raise ValueError("response: engine='ladder' integrates lattice models; use engine='mesh' "
                         "for continuum (k·p) models")
    nres = len(_ladder.RESOLUTIONS)
    if traced and plan is None:
        raise ValueError("response: with engine='ladder' under jax.grad/jit pass plan=..., the plan of "
                         "a concrete call: response(...).resolution.plan")

    groups = _ladder.sweep_groups(keys) if keys is not None else None

    def run(lev, given):
        f, c, (ex, tail), over, tried = _run_ladder(model, muf, kt, Tf, tauf, omega, lev, kw, given, traced, groups)
        return (tried,) + _nested_errors(f, c, ex, over, model, Tf, intrinsic, tail=tail)

    lev, tried, fine, err, bad, k_points = _resolution_loop(run, nres, resolution, max_level, plan, rtol,
                                                            model, tau_max)
    # every attempt counts: a run that overflowed a budget evaluated its points too
    info = {"engine": "ladder", "level": lev, "plan": tried[-1], "levels": tried[-1].levels,
            "attempts": len(tried),
            "k_points": int(k_points)}
    return fine, err, bad, info


@partial(jax.jit, static_argnames=("meta", "tau_eval", "filled", "sea"))
def _tetra_at(model, mu, kt, temp, tau_arr, omega, arrays, groups=None, *, meta, tau_eval, filled, sea):
    tau_col = jax.tree_util.tree_map(lambda a: a[:, None], tau_arr)
    f, c, ex, info = _tetra.tetra_moments(model, model.params, meta, arrays, mu, kt, temp, tau_eval, tau_col,
                                          omega, filled, sea, groups=groups)
    return f, c, ex, info["overflow"]


#: highest temperature (K) at which engine="auto" takes the tetrahedra for a 3D lattice model with
#: automatic resolution (measured on the Weyl lattice, docs/performance.md "3D lattices": at 100 K
#: their density estimate reaches 1e-3 where the node quadrature's top level estimates 2e-2; at
#: 300 K their refined window is wide and a point mesh resolves k_BT)
TETRA_AUTO_MAX_T = 150.0


def _tetra_path(model, muf, kt, Tf, tauf, omega, kw, rtol, resolution, max_level, intrinsic, plan,
                traced, tau_max, keys=None):
    """Linear tetrahedra on refined cells (:mod:`crosswind.solver.engine.tetra`, 3D lattices): one
    program per resolution computes the fine and the nested coarse sums for every condition.  A
    concrete sweep whose μ range does not fit one plan's energy tables (a few hundred k_BT at the
    lowest temperature) runs as μ groups, each with its own plan (:class:`~crosswind.solver.engine.
    tetra.TetraGroups`)."""
    if not (isinstance(model.domain, Lattice) and model.dim == 3):
        raise ValueError("response: engine='tetra' integrates 3D lattice models; use engine='ladder' for "
                         "2D lattices and 'rays' or 'shells' for continuum (k·p) models")
    if traced and plan is None:
        raise ValueError("response: with engine='tetra' under jax.grad/jit pass plan=..., the plan of "
                         "a concrete call: response(...).resolution.plan")
    if isinstance(plan, _tetra.TetraGroups):
        if _is_traced(muf):
            raise ValueError("response: this tetra plan splits the sweep into μ groups "
                             f"(cuts {plan.cuts} eV), which needs concrete μ values; differentiate with "
                             "respect to μ in a call whose μ range fits one group (its plan is a TetraPlan)")
        groups = plan
    elif plan is None:
        cuts = _tetra.mu_groups(np.asarray(muf), np.asarray(Tf))
        groups = _tetra.TetraGroups(cuts) if cuts else None
    else:
        groups = None
    args = (model, kt, Tf, tauf, omega, kw, rtol, resolution, max_level, intrinsic)
    if groups is None:
        return _tetra_group(muf, *args, plan, tau_max, keys)
    gid = groups.group_of(np.asarray(muf))
    idxs, parts = [], []
    for g in range(len(groups.cuts) + 1):
        idx = np.nonzero(gid == g)[0]
        idxs.append(idx)
        if idx.size == 0:           # a reused plan's group that this call leaves empty
            parts.append(None)
            continue
        sub = lambda a, idx=idx: a[idx]
        given = groups.plans[g] if groups.plans else None
        parts.append(_tetra_group(muf[idx], model, kt[idx], Tf[idx], jax.tree_util.tree_map(sub, tauf), omega,
                                  kw, rtol, resolution, max_level, intrinsic, given, tau_max,
                                  None if keys is None else keys[idx]))
    return _stitch_groups(parts, idxs, int(muf.shape[0]), groups)


def _stitch_groups(parts, idxs, P, groups):
    """One result from the μ groups' (fine, err, bad, info): fields scattered back to their
    conditions, the unconverged fields of every group (largest error), the k-points summed."""
    used = [(p, i) for p, i in zip(parts, idxs) if p is not None]

    def scatter(*leaves):
        out = jnp.zeros((P,) + leaves[0].shape[1:], dtype=leaves[0].dtype)
        for leaf, (_, i) in zip(leaves, used):
            out = out.at[i].set(leaf)
        return out

    fine = jax.tree_util.tree_map(scatter, *[p[0] for p, _ in used])
    err = jax.tree_util.tree_map(scatter, *[p[1] for p, _ in used])
    bads = [p[2] for p, _ in used]
    bad = None
    if any(b is not None for b in bads):
        worst = {}
        for name, diff, size in (x for b in bads if b for x in b):
            d0, s0 = worst.get(name, (0.0, 0.0))
            worst[name] = (max(d0, diff), max(s0, size))
        bad = [(name, d, s) for name, (d, s) in worst.items()]
    plan = _tetra.TetraGroups(groups.cuts, tuple(p[3]["plan"] if p is not None else None for p in parts))
    infos = [p[3] for p, _ in used]
    info = {"engine": "tetra", "level": max(x["level"] for x in infos), "plan": plan,
            "levels": plan.levels, "attempts": 1,
            "k_points": int(sum(x["k_points"] for x in infos))}
    return fine, err, bad, info


def _tetra_group(muf, model, kt, Tf, tauf, omega, kw, rtol, resolution, max_level, intrinsic, plan, tau_max,
                 keys=None):
    """:func:`_tetra_path` for conditions whose μ range fits one plan."""
    nres = len(_tetra.RESOLUTIONS)
    shared = _ladder.sweep_groups(keys) if keys is not None else None

    def run(lev, given):
        pl = given if given is not None else _tetra.make_plan(model, model.params, muf, Tf, lev)
        f, c, ex, over = _tetra_at(model, muf, kt, Tf, tauf, omega, pl.arrays(), shared, meta=pl.meta, **kw)
        return ([pl],) + _nested_errors(f, c, ex, over, model, Tf, intrinsic, richardson=True)

    lev, tried, fine, err, bad, k_points = _resolution_loop(run, nres, resolution, max_level, plan, rtol,
                                                            model, tau_max, _tetra.finest_spacings())
    pl = tried[-1]
    info = {"engine": "tetra", "level": lev, "plan": pl, "levels": pl.levels, "attempts": 1,
            "k_points": int(k_points)}
    return fine, err, bad, info


@partial(jax.jit, static_argnames=("plan", "tau_eval", "filled", "sea"))
def _rays_at(model, grid, mu, kt, temp, tau_arr, omega, *, plan, tau_eval, filled, sea):
    tau_col = jax.tree_util.tree_map(lambda a: a[:, None], tau_arr)
    return _rays.ray_moments(model, model.params, plan, grid, mu, kt, temp, tau_eval, tau_col, omega,
                             filled, sea)


@partial(jax.jit, static_argnames=("plan", "tau_eval", "filled", "sea"))
def _shells_at(model, grid, mu, kt, temp, tau_arr, omega, *, plan, tau_eval, filled, sea):
    tau_col = jax.tree_util.tree_map(lambda a: a[:, None], tau_arr)
    return _shells.shell_moments(model, model.params, plan, grid, mu, kt, temp, tau_eval, tau_col, omega,
                                 filled, sea)


def _tail_errors(fine: Response, tail, temp) -> Response:
    """The window-truncation part of the error (:func:`crosswind.solver.engine.rays.tail_fraction`
    or :func:`crosswind.solver.engine.ladder.window_tails` ``tail`` (P,) times each field): the
    anomalous Hall conductivity, a Fermi-sea sum of the filled bands, gets none (σ takes its Drude
    part's); the density, whose filled states below the window are counted exactly, only its
    thermally activated part, t·k_BT·|dos| (temperatures ``temp`` (P,), K; for a band edge
    x k_BT from μ both lose e^{−(W − x)} of sums ∝ e^{−x}, and n ≈ k_BT·dos there); the ratios
    (Hall coefficient, Seebeck, Lorenz) twice the fraction (both of their sums lose a tail);
    non-finite ratios none."""
    b = lambda x: tail.reshape(tail.shape + (1,) * (x.ndim - 1))
    part = lambda x: jnp.where(jnp.isfinite(x), b(x) * jnp.abs(x), 0.0)
    err = jax.tree_util.tree_map(part, fine)
    ratios = {k: 2.0 * getattr(err, k) for k in ("hall_coefficient", "seebeck", "lorenz")}
    kt_joule = KB_EVK * E_CHARGE * jnp.maximum(jnp.asarray(temp, jnp.float64), 0.0)
    density = jnp.where(jnp.isfinite(fine.dos), tail * kt_joule * jnp.abs(fine.dos), 0.0)
    return dataclasses.replace(err, sigma=part(fine.sigma_drude), density=density.reshape(fine.density.shape),
                               sigma_anomalous=jnp.zeros(fine.sigma_anomalous.shape), **ratios)


@partial(jax.jit, static_argnames=("intrinsic",))
def _energy_errors(f, ex, coarse, over, tail, model, temp, intrinsic):
    """SI fields of the sums ``f`` and their error: |fine − coarse| (NaN without a coarser run)
    plus the spread of the T² extrapolation ``ex`` and the window truncation (:func:`_tail_errors`
    of ``tail``); inf where a plan overflowed.  Returns ``(fine, error, error less the truncation)``."""
    fine = _to_si(f, model, temp, intrinsic)
    shifted = _to_si(jax.tree_util.tree_map(lambda a, b: a + b.astype(a.dtype), f, ex), model, temp, intrinsic)
    spread = _field_errors(shifted, fine)
    if coarse is None:
        diff = jax.tree_util.tree_map(lambda a: jnp.full(a.shape, jnp.nan), spread)
    else:
        diff = _field_errors(fine, _to_si(coarse, model, temp, intrinsic))
    resolvable = jax.tree_util.tree_map(lambda u, v: jnp.where(over, jnp.inf, u + v), diff, spread)
    return fine, jax.tree_util.tree_map(jnp.add, resolvable, _tail_errors(fine, tail, temp)), resolvable


def _run_rays(model, mu, kt, temp, tau_arr, omega, res, kw, plan, traced, eng=_rays, extra=None):
    """One evaluation of the shared ray rule; a concrete run whose rays had more crossings than
    the plan's slots (or whose windows left the knot tables) is repeated with a new plan.
    ``extra``: keyword arguments of ``make_plan`` (the call's satellites)."""
    extra = extra or {}
    if plan is None:
        # this run counts the crossings at its own parameters: no slot margin (the plan it reports
        # for reuse carries one, _rays_path)
        plan = eng.make_plan(model, model.params, np.asarray(mu), np.asarray(kt), res, margin=1.0, **extra)
    at = _shells_at if eng is _shells else _rays_at
    tried = []
    for _ in range(3):
        tried.append(plan)
        sums, ex, over, tail = at(model, plan[1], mu, kt, temp, tau_arr, omega, plan=plan[0], **kw)
        if traced or not bool(over):
            break
        counted = eng.make_plan(model, model.params, np.asarray(mu), np.asarray(kt), res, margin=1.0, **extra)
        plan = (counted if counted[0].slots > plan[0].slots else
                eng.make_plan(model, model.params, np.asarray(mu), np.asarray(kt), res,
                              slots=2 * plan[0].slots, **extra))
    return sums, (ex, tail), over, tried


def _rays_path(model, muf, kt, Tf, tauf, omega, kw, rtol, resolution, max_level, intrinsic, plan,
               traced, tau_max, estimate_error, eng=_rays):
    """Energy-resolved shared rays (:mod:`crosswind.solver.engine.rays`, 2D; ``eng=_shells``:
    :mod:`crosswind.solver.engine.shells`, 3D) for continuum models: one ray
    set per pass for every condition; the error is |fine − coarse| between consecutive
    resolutions plus the T² extrapolation spread."""
    name, dim = ("shells", 3) if eng is _shells else ("rays", 2)
    if isinstance(model.domain, Lattice) or model.dim != dim:
        raise ValueError(f"response: engine='{name}' integrates {dim}D continuum (k·p) models (2D: 'rays', "
                         "3D: 'shells'); use engine='ladder' or 'mesh' for lattice models")
    nres = len(eng.RESOLUTIONS)
    if traced and plan is None:
        raise ValueError(f"response: with engine='{name}' under jax.grad/jit pass plan=..., the plan of "
                         "a concrete call: response(...).resolution.plan")
    k_points = 0
    centres = len(model.domain.centers)
    runs, attempts = {}, {}
    # one satellite search per call (a given plan carries its own)
    extra = {} if eng is not _rays or traced else {"sats": _rays.plan_satellites(model, model.params,
                                                                                 np.asarray(muf), np.asarray(kt))}

    def run(lev, given=None):
        sums, ex, over, tried = _run_rays(model, muf, kt, Tf, tauf, omega, lev, kw, given, traced, eng, extra)
        nonlocal k_points
        k_points += sum(p[0].k_points(centres) for p in tried)
        used = tried[-1]
        # a plan made here is reported with the slot margin for reuse at other parameters
        runs[lev] = (sums, ex, over, used if used is given else (used[0].reusable(model.n_bands), used[1]))
        attempts[lev] = len(tried)
        return runs[lev]

    def errors(lev):
        f, (ex, tail), over, _ = runs[lev]
        c = None
        if lev - 1 in runs:
            c, _, over_c, _ = runs[lev - 1]
            over = over | over_c
        return _energy_errors(f, ex, c, over, tail, model, Tf, intrinsic)

    bad = None
    if resolution is None:
        top = nres - 1 if max_level is None else min(max_level, nres - 1)
        run(0)
        lev = 1
        run(1)
        while True:
            fine, err, resolvable = errors(lev)
            bad = _converged(fine, err, runs[lev][0], rtol, model, tau_max)
            # the window truncation (μ in a gap near a band edge) is the same at every resolution:
            # refine only while the rest of the error is above the tolerance
            if not bad or lev >= top or not _converged(fine, resolvable, runs[lev][0], rtol, model, tau_max):
                break
            lev += 1
            run(lev)
    else:
        if not (0 <= resolution <= nres - 1):
            raise ValueError(f"response: resolution must be a level 0..{nres - 1}")
        lev = resolution
        run(lev, plan)
        if lev > 0 and estimate_error and not traced:
            run(lev - 1)
        fine, err, _ = errors(lev)
    info = {"engine": name, "level": lev, "plan": runs[lev][3], "attempts": attempts[lev],
            "k_points": int(k_points)}
    return fine, err, bad, info


# fields whose integrals are finite for every finite model and finite conditions (the ratios
# seebeck, lorenz, hall_coefficient may be inf/NaN where σ vanishes, e.g. μ in a gap at T → 0)
FINITE_FIELDS = ("density", "dos", "sigma", "sigma_drude", "sigma_anomalous", "dipole", "chi", "chi_dc",
                 "chi_dc_full", "sigma_lorentz", "nernst")


def _refuse_non_finite(fine, info):
    """A non-finite kernel sum from finite inputs means the band geometry was NaN/inf somewhere on
    the mesh (a user Hamiltonian that divides by zero, takes a square root of a negative number, ...
    away from the build-time check points): refuse it rather than return NaN."""
    for name in FINITE_FIELDS:
        a = np.asarray(getattr(fine, name))
        bad = ~np.isfinite(a.reshape(a.shape[0], -1)).all(axis=1) if a.size else np.zeros(0, bool)
        if bad.any():
            raise ValueError(
                f"response: {name} is not finite (NaN/inf) for {int(bad.sum())} of {bad.size} conditions "
                f"(first at flat index {int(np.argmax(bad))}; engine {info.get('engine')}, level "
                f"{info.get('level')}) although every input was finite: the model's Hamiltonian is "
                "NaN/inf (or its derivative is) somewhere in the zone, between the points checked at "
                "build time. Check divisions (e.g. by |k|), square roots and logarithms of the "
                "Hamiltonian; evaluate it on a fine grid of k to find where.")


def response(model: BandModel, mu, temperature, tau, frequency=0.0, *, rtol: float = 1e-3,
             resolution: int | None = None, max_level: int | None = None, intrinsic: bool = True,
             dipole_route: str = "surface", chunk: int = 4096, estimate_error: bool = True,
             engine: str = "auto", plan=None, memory_gib: float | None = None) -> Response:
    """Transport coefficients of ``model`` at chemical potential(s) ``mu`` (eV), ``temperature`` (K)
    and relaxation time ``tau`` (fs, or a scattering object from :mod:`crosswind.solver.engine.scattering`),
    at drive ``frequency`` (Hz).  ``mu``, ``temperature`` and ``tau`` broadcast against each other;
    every field carries that shape in front.

    Formulas (q = −e, ∫[dk] = ∫dᵈk/(2π)ᵈ over bands × degeneracy, F = −∂f0/∂ε, v = ∇ₖε/ħ,
    τ̃_ω = τ/(1+iωτ); E(t) = Re[E e^{iωt}], j_a = σ_ab E_b; full list in the module docstring and
    docs/theory.md §5), units for a 2D sheet (3D in brackets; ``r.units`` names every field):

    * ``sigma`` = ``sigma_drude`` + ``sigma_anomalous`` [S (S/m)]: σ^D_ab = q²∫[dk] F τ̃_ω v_a v_b;
      σ^A_xy = −(e²/ħ)∫[dk] f0 Ω (a filled Chern band gives −C e²/h).
    * ``dipole`` D_b = ∫[dk] f0 ∂_bΩ [m (dimensionless)], the Berry-curvature dipole.
    * ``chi`` χ_abc [A·m/V² (A/V²)], the 2ω phasor j^{2ω}_a = χ_abc E_b E_c (Sodemann & Fu, PRL 115,
      216806 (2015) convention; symmetric in b, c) = dipole part χ_yxx = −e³τ̃_ω D_x/(2ħ²) (2D)
      + nonlinear Drude (∝ τ², ∫f0 ∂_a∂_b∂_c ε) + intrinsic (τ⁰, Berry-connection polarizability);
      the parts are in ``chi_parts``.  ``chi_dc`` is the rectified j⁽⁰⁾_a = χ^dc_abc E_b E_c*;
      a static field E gives j = 2 χ^dc E E.  ``chi_dc_full`` is the rectified tensor before
      symmetrisation, j⁽⁰⁾_a = Re[χ^full_abc E_b E_c*] for elliptical drive, and ``chi_circular``
      C_a its helicity-odd current per S3 = 2 Im(E_x E_y*): C = (e³/4ħ²) ωτ²/(1+ω²τ²) D for constant
      τ (Moore & Orenstein, PRL 105, 026805 (2010); docs/theory.md §5.9).
    * ``density`` [m⁻² (m⁻³)] relative to neutrality; ``dos`` [J⁻¹m⁻² (J⁻¹m⁻³)];
      ``sigma_lorentz`` = ∂σ/∂B_z [S/T]; ``hall_coefficient`` [Ω/T (m³/C)]; ``seebeck`` [V/K];
      ``thermal_conductivity`` [W/K (W/(K·m))]; ``lorenz`` [W·Ω/K²]; ``nernst`` [A/K (A/(K·m))].

    Contract: dc quantities are real (float64): ``density``, ``dos``, ``dipole``, ``dipole_sea``,
    ``sigma_lorentz``, ``hall_coefficient``, ``seebeck``, ``thermal_conductivity``, ``lorenz``,
    ``nernst``.  Phasor coefficients are complex (complex128) at every frequency: ``sigma``,
    ``sigma_drude``, ``sigma_anomalous``, ``chi``, ``chi_dc``, ``chi_dc_full`` (at ``frequency=0``
    their imaginary parts are exactly 0: use ``.real`` for a dc number); ``chi_circular`` is real.
    ``error`` holds |fine − coarse| per field in the same units (real).

    ``resolution`` fixes the refinement level (required under ``jax.grad``/``jit``); ``None``
    chooses it automatically for ``rtol``.  ``dipole_route="both"`` also evaluates the Fermi-sea
    integral ∫f0 ∂Ω (``dipole_sea``) and folds the disagreement of the two routes into
    ``error.dipole``.  With a fixed ``resolution``, ``estimate_error=False`` skips the coarser
    pass (half the cost, e.g. inside fits); ``error`` is then NaN.  The node quadrature at
    ``resolution=0`` has no coarser level to compare with: its ``error`` is NaN (unavailable), never 0.

    Unresolved thermal windows (node quadrature of lattice models, ``engine="mesh"``): the Fermi
    window of a condition is about W·k_BT/|∇ε| wide in k (W = 36); when it is narrower than the
    node spacing on its Fermi contour (the refined 4×4 sub-cells, or the plain grid when refinement
    is off), typically at a fixed ``resolution`` and T → 0, the Fermi-surface integrals miss the
    window (σ_xx of order 1e-254 S was once returned with an error of 1e-259 S).  Such conditions
    get ``error = inf`` for every field except ``density``, ``sigma_anomalous`` and ``dipole_sea``
    (Fermi-sea integrals); ``resolution`` metadata then says ``converged=False``,
    ``window_unresolved`` (the number of such conditions) and ``window_ratio`` (spacing / window,
    largest), and a ``RuntimeWarning`` names the fix: ``engine="ladder"`` (automatic for 2D
    lattices with ``resolution=None``), a finer level or a higher temperature; for 3D lattices
    the temperature from which the level resolves every window, ``engine="tetra"`` and the k·p
    models (``engine="shells"``) that integrate the same band touchings.  With
    ``resolution=None`` and ``engine="mesh"`` the level is raised until the window is resolved or
    the finest level is reached.

    Non-finite results: a concrete call whose integrated fields (density, dos, σ, D, χ, Lorentz,
    Nernst) come out NaN/inf although every input was finite raises ``ValueError`` naming the field:
    the model is NaN/inf somewhere in the zone.  (``seebeck``, ``lorenz`` and ``hall_coefficient``
    are ratios that may be inf/NaN where σ vanishes.)

    Memory: the node quadrature evaluates conditions in blocks so that its working memory stays
    within ``memory_gib`` GiB (default ``$CROSSWIND_MEMORY_GIB``, else 2 GiB;
    :mod:`crosswind.solver.engine.memory`) whatever the number of conditions (10 000 μ points once asked for
    87 GB); the energy engines (ladder, rays) take conditions 128 at a time.  ``resolution``
    metadata records ``condition_block``.  The budget holds for concrete calls; under
    ``jax.grad`` the reverse pass keeps what it needs of every block.

    ``engine="auto"`` (default) takes the shared shells of :mod:`crosswind.solver.engine.shells` for
    3D continuum (k·p) models at any resolution (docs/theory.md §16.3; a fixed ``resolution`` indexes
    ``shells.RESOLUTIONS``, under ``jax.grad`` pass ``plan=r.resolution.plan``; ``dipole_route="both"``
    is refused there: the Fermi-sea form misses the monopole at each node, §16.2), the ladder for
    2D lattice models with automatic resolution (``resolution=None``), the tetrahedra for 3D
    lattice models with automatic resolution when no temperature exceeds ``TETRA_AUTO_MAX_T``
    (150 K), the shared rays for 2D continuum models with automatic resolution, and the node
    quadrature ("mesh") otherwise.
    ``engine="ladder"`` (lattice models) uses the energy-resolved ladder of
    :mod:`crosswind.solver.engine.ladder`: the band geometry is evaluated once per call for all
    conditions (sweeps over μ, T, τ and ω cost energy sums, not k-points) on shells around the
    Fermi contours that narrow with temperature, and T below its deepest level is reached by T²
    extrapolation.  ``resolution`` then indexes ``ladder.RESOLUTIONS``; under ``jax.grad``/``jit``
    also pass ``plan=r.resolution.plan`` from a concrete call.  ``resolution`` metadata
    always includes ``k_points``, the distinct k-points where the band geometry was evaluated
    (all passes and conditions).

    ``engine="tetra"`` (3D lattice models) integrates linear tetrahedra on cells refined
    near the conditions' energy window and near band touchings
    (:mod:`crosswind.solver.engine.tetra`, docs/theory.md §16.6): the mesh resolves the bands, not
    k_BT, so it reaches 1–20 K and T = 0 (below 0.25 K by T² extrapolation from 0.25 and 0.5 K);
    a plan reused at a temperature above the one it was made for gives ``error = inf``; ``resolution`` indexes
    ``tetra.RESOLUTIONS``; the same ``plan`` rule applies under ``jax.grad``/``jit``.  Its nested
    estimate compares every cell with the interpolant of its parent (level-0 cells: the n0/2 grid);
    the values returned are the Richardson combination fine + (fine − coarse)/3 of the two (their
    h² errors cancel), with |fine − coarse| still the error.
    A concrete sweep whose μ range is wider than one plan's energy tables hold (``tetra.span_limit``:
    about 0.17 eV at 1 K, a few tens of meV when T = 0 is among the conditions) runs as the fewest
    contiguous μ groups that fit, each with its own plan and level (``resolution.plan`` is then a
    ``tetra.TetraGroups``, ``level`` the highest, ``k_points`` the sum).
    """
    if engine not in ("auto", "mesh", "ladder", "tetra", "rays", "shells"):
        raise ValueError("response: engine must be 'auto', 'mesh' (node quadrature, lattices and 2D "
                         "continuum models), 'ladder' (energy-resolved, 2D lattice models), 'tetra' (linear "
                         "tetrahedra, 3D lattice models), 'rays' (energy-resolved, 2D continuum models) or "
                         "'shells' (energy-resolved, 3D continuum models)")
    if not isinstance(model, BandModel):
        raise TypeError("response: the first argument must be a BandModel from crosswind.models.build(...)")
    if engine == "auto":
        # the ladder's shells are surfaces in 3D (budgets grow 4× per level): measured far too
        # costly for the Weyl model; 3D lattices take the tetrahedra up to TETRA_AUTO_MAX_T and the
        # node quadrature above (where a point mesh resolves k_BT and the refined window is wide)
        if plan is not None:
            # a plan from an earlier call selects its own engine
            engine = ("ladder" if isinstance(plan, _ladder.Plan) else
                      "tetra" if isinstance(plan, (_tetra.TetraPlan, _tetra.TetraGroups)) else
                      "shells" if isinstance(plan[0], _shells.ShellPlan) else "rays")
        elif model.dim == 3 and not isinstance(model.domain, Lattice):
            engine = "shells"           # 3D continuum: the only engine that integrates them
        elif (model.dim == 3 and resolution is None and not _is_traced(temperature)
              and float(np.max(np.asarray(temperature, dtype=float))) <= TETRA_AUTO_MAX_T):
            engine = "tetra"
        elif resolution is not None or model.dim != 2:
            engine = "mesh"
        else:
            engine = "ladder" if isinstance(model.domain, Lattice) else "rays"
    if dipole_route not in ("surface", "both"):
        raise ValueError("response: dipole_route must be 'surface' or 'both'")
    if not (0 < rtol < 1):
        raise ValueError("response: rtol must lie in (0, 1), e.g. 1e-3")
    budget = budget_bytes(memory_gib)
    scat = as_scattering(tau)
    tau_arr = scat.arrays()
    mu = jnp.asarray(mu, dtype=jnp.float64)
    temperature = jnp.asarray(temperature, dtype=jnp.float64)
    shapes = [mu.shape, temperature.shape] + [a.shape for a in tau_arr.values()]
    try:
        shape = np.broadcast_shapes(*shapes)
    except ValueError as exc:
        raise ValueError(f"response: mu {mu.shape}, temperature {temperature.shape} and tau shapes "
                         f"{[a.shape for a in tau_arr.values()]} do not broadcast; pass arrays of equal "
                         "shape or scalars") from exc
    # concrete NaN/inf/negative values and non-integer levels: a clear error (solver/engine/inputs.py)
    check_arguments(mu, temperature, tau_arr, type(scat).__name__, frequency, resolution, max_level)
    P = int(np.prod(shape)) if shape else 1
    flat = lambda x: jnp.broadcast_to(x, shape).reshape(P)
    muf, Tf = flat(mu), flat(temperature)
    tauf = jax.tree_util.tree_map(flat, tau_arr)
    kt = thermal_energy(Tf)
    omega = jnp.asarray(2 * jnp.pi * frequency * FS, dtype=jnp.float64)
    # a concrete static field takes the real-arithmetic path of the energy-resolved engines
    omega_sums = None if (not _is_traced(frequency) and np.all(np.asarray(frequency) == 0)) else omega
    kw = dict(tau_eval=type(scat).evaluate, filled=neutral_filling(model), sea=dipole_route == "both")
    traced = _is_traced(model.params, muf, Tf, tauf, omega)
    # concrete sweeps: conditions that differ in T alone (τ free of T) share the ladder's sums
    keys = None if traced else _sharing_keys(muf, Tf, tauf, temperature_free(scat))
    if resolution is None and traced:
        raise ValueError("response: pass a fixed mesh, e.g. resolution=2, when differentiating or "
                         "tracing (automatic refinement compares concrete values)")
    tau_max = None
    if resolution is None:
        tau_max = float(np.max(np.abs(np.asarray(jax.vmap(lambda a: type(scat).evaluate(
            a, jnp.zeros((1, 1)), jnp.zeros((1, 1)))[0])(jax.tree_util.tree_map(lambda x: x[:, None, None], tauf))))))
    if engine in ("rays", "shells"):
        fine, err, bad, info = _rays_path(model, muf, kt, Tf, tauf, omega_sums, kw, rtol, resolution,
                                          max_level, intrinsic, plan, traced, tau_max, estimate_error,
                                          _shells if engine == "shells" else _rays)
    elif engine == "tetra":
        fine, err, bad, info = _tetra_path(model, muf, kt, Tf, tauf, omega_sums, kw, rtol, resolution,
                                           max_level, intrinsic, plan, traced, tau_max, keys)
    elif engine == "ladder":
        fine, err, bad, info = _ladder_path(model, muf, kt, Tf, tauf, omega_sums, kw, rtol, resolution,
                                            max_level, intrinsic, plan, traced, tau_max, keys)
    else:
        fine, err, bad, info = _mesh_path(model, muf, kt, Tf, tauf, omega, dict(kw, chunk=chunk), rtol,
                                          resolution, max_level, intrinsic, estimate_error, tau_max, P,
                                          budget)
    if dipole_route == "both":
        err = dataclasses.replace(err, dipole=jnp.maximum(err.dipole, jnp.abs(fine.dipole - fine.dipole_sea)))
    if resolution is not None and not estimate_error:
        # no estimate was asked for: NaN, except where the engine knows the value is unresolved (inf)
        err = jax.tree_util.tree_map(lambda v: jnp.where(jnp.isposinf(v), v, jnp.nan), err)
    if not _is_traced(fine):
        _refuse_non_finite(fine, info)
    reshape = lambda x: x.reshape(shape + x.shape[1:])
    fine = jax.tree_util.tree_map(reshape, fine)
    err = jax.tree_util.tree_map(reshape, err)
    converged = (not bad) if bad is not None else None
    unconverged = tuple(b[0] for b in bad) if bad else ()
    if info.get("window_unresolved"):
        # the thermal window of some condition fell between the nodes: not converged, whatever the level
        converged = False
        unconverged = tuple(dict.fromkeys(unconverged + ("sigma", "dipole", "chi", "chi_dc")))
        head = (f"response: at level {info['level']} the node spacing on the Fermi contour is "
                f"{info['window_ratio']:.3g}x the thermal window (W k_BT/|grad e|) for {info['window_unresolved']} "
                "of the conditions (low temperature): their Fermi-surface fields are not resolved and carry "
                "error = inf. ")
        if model.dim == 3 and isinstance(model.domain, Lattice):
            # the ladder is no way out here: its refined shells around a 3D Fermi surface grow 4x per
            # level (docs/performance.md, 3D lattices)
            fix = (f"This level resolves the window from about {info['_warm_enough']:.3g} K; below that use "
                   "engine='tetra' (linear tetrahedra on refined cells, 3D lattices at any temperature, e.g. "
                   "resolution=1), or integrate a k·p model of the same band touchings (e.g. 'weyl-kp' or "
                   "'weyl-pair-kp': engine='shells'). engine='ladder' is not practical in 3D: a Weyl lattice "
                   "at 30 K ran 14 minutes into 8.6 GiB without finishing.")
        else:
            better, kind = (("ladder", "lattices") if isinstance(model.domain, Lattice) else
                            ("rays", "continuum models"))
            fix = (f"Use engine={better!r} (the default for 2D {kind} with resolution=None), a finer "
                   "resolution, or a higher temperature.")
        warnings.warn(head + fix, RuntimeWarning, stacklevel=2)
    info.pop("_warm_enough", None)
    info.update({"converged": converged, "unconverged_fields": unconverged})
    units = Units(UNITS_2D if model.dim == 2 else UNITS_3D)
    return dataclasses.replace(fine, error=dataclasses.replace(err, units=units), resolution=Resolution(**info),
                               units=units)
