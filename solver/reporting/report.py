"""Figures (PNG, matplotlib Agg) and a Markdown summary of a finished sweep.

Figures, written next to the results:

* ``bands.png`` — bands along a path, coloured by Berry curvature: for continuum models cuts
  through the (first) valley centre along k_x and k_y, for lattices Γ–M–corner–Γ (the corner is
  the circumcentre of (0, b1, ±b2): K of a hexagonal zone, the zone corner of a square one);
* ``curvature_map.png`` — Σ_n [f0(ε_n) − f_neutral,n] Ω_n, the Berry curvature of the carriers
  added relative to neutrality, with the Fermi contours, at the conditions of the signal peak;
* ``responses.png`` — 2ω transverse voltage, σ'_xx and the parts of χ'_yxx against every sweep axis;
* ``angle.png`` — polar plot of |V_y^{2ω}| and |χ'_yxx| against the current angle, by rotating the
  peak point's tensors (no new k-space integration);
* ``measurability.png`` (when a carrier axis is swept) — signal, noise floor and artefacts;
* ``scaling.png`` (when temperature or a relaxation-time field is swept) — E⊥/E∥² against σ'_xx,
  the scaling plot used to separate τ⁰, τ¹ and τ² mechanisms (docs/theory.md §12.2).

``summary.md`` states where the 2ω signal peaks and its size at the drive, the dominant mechanism
(largest |χ'_yxx| part at the peak), conditions, units, assumptions, error estimates and cautions;
every number in it is computed from the dataset.
"""
from __future__ import annotations

import json
import textwrap
from pathlib import Path

import jax
import numpy as np

from crosswind.models import band_geometry, catalogue
from crosswind.models.domain import Lattice
from crosswind.models.geometry import block_band_geometry
from crosswind.models.units import E_CHARGE
from crosswind.solver.engine.device import (
    HallBar,
    hall_bar,
    rotate_chi,
    rotate_sigma,
    rotation,
)
from crosswind.solver.engine.occupation import fermi, thermal_energy
from crosswind.solver.engine.response import neutral_filling
from crosswind.solver.reporting.plotting import pyplot
from crosswind.solver.study.design import measurability_lines, value_at
from crosswind.solver.study.files import atomic_figure, atomic_text
from crosswind.solver.study.scenario import model_window
from crosswind.solver.vocabulary import CARRIERS, SCATTERING

E2H = E_CHARGE ** 2 / 6.62607015e-34  # e²/h in S
PARTS = ("dipole", "drude", "intrinsic")
PART_NAMES = {"dipole": "Berry-curvature dipole (∝ τ)", "drude": "nonlinear Drude (∝ τ²)",
              "intrinsic": "intrinsic / connection polarizability (τ⁰)"}


def grid_axes(ds):
    return [d for d in ds["v2w_y_amplitude"].dims]


def peak_index(ds) -> dict:
    """Grid indices (all axes incl. current angle) of the largest 2ω transverse amplitude."""
    a = ds["v2w_y_amplitude"]
    flat = int(np.nanargmax(a.values))
    idx = np.unravel_index(flat, a.shape)
    return dict(zip(a.dims, (int(i) for i in idx)))


def _point(ds, idx, name):
    var = ds[name]
    sel = {d: i for d, i in idx.items() if d in var.dims}
    v = var.isel(sel).values
    if name + "_imag" in ds:
        v = v + 1j * ds[name + "_imag"].isel(sel).values
    return v


def _model_at(scn, ds, idx):
    strain = value_at(ds, "strain", idx) if "strain" in ds.coords else None
    return scn.build_model(strain)


# ----------------------------------------------------------------------------- resolution -----
# A number is reported as a result only when it is resolved: |x| > max(its integration-error
# estimate, ZERO_FLOOR × the scale of the quantities it competes with), and no symmetry of the
# model forbids it.  Otherwise it reads "zero within error (|x| < bound)" and is never ranked,
# called dominant or used for a direction.
ZERO_FLOOR = 1e-6

SYMMETRY_SOURCES = ("Sodemann & Fu, PRL 115, 216806 (2015); Gao, Yang & Niu, PRL 112, 166601 (2014); "
                    "docs/theory.md §5.6")


def zero_bound(err, scale) -> float:
    """The bound below which a value is zero within error: max(error estimate, ZERO_FLOOR·scale);
    a NaN error (no coarser level compared) counts as unavailable."""
    err = float(np.nan_to_num(np.max(np.abs(err)), nan=0.0, posinf=np.inf)) if np.size(err) else 0.0
    return max(err, ZERO_FLOOR * abs(float(scale)))


def is_resolved(x, err, scale) -> bool:
    return bool(np.isfinite(x)) and abs(x) > zero_bound(err, scale)


def model_symmetries(model, n=48, seed=0) -> dict:
    """Which of time reversal T (ε_n(k) = ε_n(−k), Ω → −Ω), C2 rotation about z (2D inversion:
    ε and Ω even in k) and C3 rotation about z the model has, checked on its band energies and
    Berry curvature at ``n`` random wavevectors (about the valley centre of a k·p model, over the
    zone of a lattice).  Energy-smoothed sums Σ_n g_j(ε_n) and Σ_n g_j(ε_n) Ω_n are compared so
    that degenerate bands and valley blocks need no matching."""
    if model.dim != 2:
        return {"T": False, "C2": False, "C3": False}
    rng = np.random.default_rng(seed)
    if isinstance(model.domain, Lattice):
        b = np.asarray(model.reciprocal_vectors())[:2, :2]
        k = rng.uniform(-0.5, 0.5, (n, 2)) @ b
        c = np.zeros(2)
        kscale = float(np.linalg.norm(b[0]))
    else:
        dom = model.domain
        kscale = float(dom.scale_for(model.params) if hasattr(dom, "scale_for") else dom.scale)
        c = np.asarray(dom.centers[0], dtype=float)
        r, ph = kscale * rng.uniform(0.05, 3.0, n), rng.uniform(0, 2 * np.pi, n)
        k = c + np.stack([r * np.cos(ph), r * np.sin(ph)], -1)
    q = k - c
    r3 = np.array([[-0.5, -np.sqrt(3) / 2], [np.sqrt(3) / 2, -0.5]])
    g = band_geometry(model, np.concatenate([k, c - q, c + q @ r3.T]))
    e = np.asarray(g.energies).reshape(3, n, -1)
    om = np.asarray(g.berry_curvature).reshape(3, n, -1)
    lo, hi = np.percentile(e, 2), np.percentile(e, 98)
    width = (hi - lo) / 8 or 1.0
    w = np.exp(-((e[..., None] - np.linspace(lo, hi, 9)) / width) ** 2)
    E, W = w.sum(2), (w * om[..., None]).sum(2)
    tE = 1e-7 * float(np.max(np.abs(E)))
    tW = 1e-7 * max(float(np.max(np.abs(W))), 1.0 / kscale ** 2)
    same = lambda a, b, t: bool(np.max(np.abs(a - b)) <= t)
    even_e = same(E[0], E[1], tE)
    return {"T": even_e and same(W[0], -W[1], tW), "C2": even_e and same(W[0], W[1], tW),
            "C3": same(E[0], E[2], tE) and same(W[0], W[2], tW)}


def forbidden_parts(sym: dict) -> dict:
    """The χ parts a symmetry forces to zero, each with the symmetry's name (docs/theory.md §5.6)."""
    out = {}
    if sym.get("C2"):
        return {p: "C2 rotation about z (inversion of a 2D sheet)" for p in PARTS}
    if sym.get("C3"):
        out["dipole"] = "C3 rotation (the dipole is an in-plane vector)"
    if sym.get("T"):
        out["drude"] = out["intrinsic"] = "time reversal"
    return out


def _symmetry_names(model, sym) -> str:
    names = []
    if sym.get("T"):
        names.append("time reversal" + ("" if model.domain.periodic else " (its valleys form a time-reversed pair)"))
    if sym.get("C3"):
        names.append("C3 rotation about z (as in an unstrained honeycomb or TMD lattice)")
    if sym.get("C2"):
        names.append("C2 rotation about z (inversion of the sheet)")
    return " and ".join(names)


def _remedies(model, sym) -> str:
    params = set(getattr(model, "params", {}) or {})
    tips = []
    if sym.get("C2"):
        tips.append("break inversion: a displacement field (interlayer asymmetry)"
                    + (" — raise `asymmetry`" if "asymmetry" in params else "")
                    + " or a sublattice mass"
                    + (" — `staggered`/`mass`/`gap`" if params & {"staggered", "mass", "gap"} else ""))
    if sym.get("C3") or sym.get("C2"):
        if {"strain_xx", "strain_yy", "strain_xy"} & params:
            tips.append("break C3: uniaxial strain along a named crystal axis, e.g. `[material.strain] "
                        "magnitude = 0.01, angle_deg = 0` (strain along x gives a dipole along x; drive the "
                        "current along x)")
        else:
            tips.append("break C3: uniaxial strain along a crystal axis (this model has no strain "
                        "parameters; use one that does, e.g. `tmd` or `honeycomb`)")
        tilt = sorted(p for p in params if p.startswith("tilt"))
        if tilt:
            tips.append("or tilt the cones (" + ", ".join(f"`{t}`" for t in tilt) + ")")
    if sym.get("T"):
        tips.append("break time reversal (magnetic order or a field) to allow the nonlinear Drude (τ²) "
                    "and intrinsic (τ⁰) terms")
    return "; ".join(tips)


def _rotation_abs(angle_deg):
    return np.abs(np.asarray(rotation(np.asarray(angle_deg, dtype=float))))


def v2w_error(sigma, err_sigma, err_chi, bar, angle_deg, amp):
    """Linear error bound (V) of a transverse second-order voltage amplitude ``amp`` from the error
    estimates of χ (crystal frame, rotated with |R|) and σ: W·Σ|ρ'_ya| err'_abc |E_b||E_c| +
    3|amp|·max err_σ / min(|σ'_xx|, |σ'_yy|).  NaN errors give NaN (unavailable)."""
    sigma = np.asarray(sigma, dtype=complex)
    sp = np.asarray(rotate_sigma(sigma, np.asarray(angle_deg, dtype=float)))
    rho = np.linalg.inv(sp)
    W = bar.width_um * 1e-6
    E = np.abs(rho[..., :, 0]) * bar.current_uA * 1e-6 / W
    R = _rotation_abs(angle_deg)
    errp = np.einsum("...ai,...bj,...ck,...ijk->...abc", R, R, R,
                     np.broadcast_to(np.asarray(err_chi, dtype=float), R.shape[:-2] + (2, 2, 2)))
    dv = W * np.einsum("...a,...abc,...b,...c->...", np.abs(rho[..., 1, :]), errp, E, E)
    ssize = np.minimum(np.abs(sp[..., 0, 0]), np.abs(sp[..., 1, 1]))
    es = np.max(np.asarray(err_sigma, dtype=float), axis=(-2, -1))
    return dv + 3 * np.abs(amp) * es / ssize


def _grid_v2w_error(ds, scn, field="chi", amp_name="v2w_y_amplitude"):
    """Error bound of ``amp_name`` at every grid point (same dims as the amplitude)."""
    dev = scn.device
    bar = HallBar(dev.width_um, dev.length_um, dev.current_uA, dev.frequency_Hz)
    amp = ds[amp_name]
    ang = ds["current_angle_deg"].values
    sig = ds["sigma"].values + 1j * ds["sigma_imag"].values if "sigma_imag" in ds else ds["sigma"].values
    # crystal-frame fields lack the current_angle dim: add it last, then move the tensor indices
    sig = np.moveaxis(np.broadcast_to(sig[..., None], sig.shape + (len(ang),)), -1, -3)
    ec = ds[f"error_{field}"].values
    ec = np.moveaxis(np.broadcast_to(ec[..., None], ec.shape + (len(ang),)), -1, -4)
    es = ds["error_sigma"].values
    es = np.moveaxis(np.broadcast_to(es[..., None], es.shape + (len(ang),)), -1, -3)
    return v2w_error(sig, es, ec, bar, np.broadcast_to(ang, amp.shape), amp.values)


def resolution_info(ds, scn, idx, model=None) -> dict:
    """Everything the summary needs to decide what is resolved (see the rule above ZERO_FLOOR)."""
    model = model if model is not None else _model_at(scn, ds, idx)
    sym = model_symmetries(model)
    forb = forbidden_parts(sym)
    amp = ds["v2w_y_amplitude"].values
    err_amp = _grid_v2w_error(ds, scn)
    all_forbidden = all(p in forb for p in PARTS)
    bound = np.maximum(np.nan_to_num(err_amp, nan=0.0, posinf=np.inf), ZERO_FLOOR * np.nanmax(amp))
    resolved = (amp > bound) & (not all_forbidden)
    return {"symmetries": sym, "forbidden": forb, "all_forbidden": all_forbidden, "amp_error": err_amp,
            "amp_resolved": resolved, "any_resolved": bool(np.any(resolved)), "model": model,
            "amp_bound": bound}


def fmt_eng(v, unit: str) -> str:
    """A number with an engineering prefix (33.05 μS); plain scientific notation below femto."""
    v = float(np.real(v))
    f, u = eng_scale(v, unit)
    return f"{v:.4g} {unit}" if u.startswith("$") else f"{v / f:.4g} {u}"


def fmt_volts(v) -> str:
    """A voltage with an engineering prefix (pV … V)."""
    a = abs(v)
    if not np.isfinite(a):
        return f"{v} V"
    for f, u in ((1.0, "V"), (1e-3, "mV"), (1e-6, "μV"), (1e-9, "nV"), (1e-12, "pV")):
        if a >= f:
            return f"{v / f:.4g} {u}"
    return f"{v:.2g} V" if a > 0 else "0 V"


# ----------------------------------------------------------------------------- figures --------
def _fmt_k(p) -> str:
    return "(" + ", ".join(f"{float(x):.3g}" if abs(float(x)) > 1e-12 else "0" for x in p[:2]) + ")"


def _in_plane(model, k2, centre=None):
    """Points (n, 2) of the k_x–k_y plane as wavevectors of ``model``: a 3D model gets the k_z of
    ``centre`` (its first node or valley centre; 0 for a lattice), so figures cut through it."""
    k2 = np.asarray(k2, dtype=float)
    if model.dim == 2:
        return k2
    kz = 0.0 if centre is None or len(centre) < 3 else float(centre[2])
    return np.concatenate([k2, np.full((len(k2), 1), kz)], axis=1)


def _omega_z(om):
    """Ω (Å²) of a 2D model, Ω_z of a 3D one ((nk, nb, 3) → (nk, nb))."""
    om = np.asarray(om)
    return om[..., 2] if om.ndim == 3 else om


def _band_path(model, mu):
    """The k path of ``bands.png`` (1/Å): Γ–M–corner–Γ for a lattice, for a continuum model cuts along
    k_x then k_y through the first valley centre c.  Returns (k points (n, 2), distance along the path
    x, x label, tick positions, tick labels naming each point with its (k_x, k_y))."""
    if isinstance(model.domain, Lattice):
        b = np.asarray(model.reciprocal_vectors())
        b1, b2 = b[0], b[1]
        if np.dot(b1, b2) < 0:
            b2 = -b2
        # circumcentre of (0, b1, b2)
        A = 2 * np.array([b1, b2])
        corner = np.linalg.solve(A, np.array([b1 @ b1, b2 @ b2]))
        hexa = abs(abs(np.dot(b1, b2)) / (np.linalg.norm(b1) * np.linalg.norm(b2)) - 0.5) < 1e-6
        pts = [np.zeros(2), b1[:2] / 2, corner[:2], np.zeros(2)]
        names = ["Γ", "M", "K" if hexa else "corner", "Γ"]
        segments = [(p, q) for p, q in zip(pts[:-1], pts[1:])]
        tick_pts = [[p] for p in pts]
        xlabel = "distance along Γ–M–K–Γ [1/Å]" if hexa else "distance along Γ–M–corner–Γ [1/Å]"
    else:
        centre = np.asarray(model.domain.centers[0], dtype=float)
        c = centre[:2]
        kmax = _continuum_extent(model, mu)
        ex, ey = np.array([kmax, 0.0]), np.array([0.0, kmax])
        segments = [(c - ex, c), (c, c + ex), (c - ey, c), (c, c + ey)]
        names = ["", "c", "", "c", ""]
        tick_pts = [[c - ex], [c], [c + ex, c - ey], [c], [c + ey]]
        xlabel = "k along the cuts [1/Å]: $k_x$ through the valley centre c, then $k_y$"
    ks, x, ticks, s0 = [], [], [0.0], 0.0
    for p, q in segments:              # each point once: a segment's end is the next one's start
        t = np.linspace(0, 1, 120, endpoint=False)
        ks.append(p[None, :] + t[:, None] * (q - p)[None, :])
        x.append(s0 + t * float(np.linalg.norm(q - p)))
        s0 += float(np.linalg.norm(q - p))
        ticks.append(s0)
    ks.append(segments[-1][1][None, :])
    x.append(np.array([s0]))
    labels = [(f"{n}\n" if n else "") + " | ".join(_fmt_k(p) for p in tp) for n, tp in zip(names, tick_pts)]
    centre = None if isinstance(model.domain, Lattice) else np.asarray(model.domain.centers[0], dtype=float)
    return _in_plane(model, np.concatenate(ks), centre), np.concatenate(x), xlabel, ticks, labels


#: a continuum model with 2 … MAX_SECTOR_PANELS blocks gets one band panel per block
MAX_SECTOR_PANELS = 4


def _sector_geometry(model, k) -> list:
    """Band geometry of each panel: each block of a k·p model with several blocks (valleys and
    spins all measured from one k origin, so time-reversed partners fold onto each other; one
    compiled program for all blocks), else the model itself."""
    if isinstance(model.domain, Lattice) or not 1 < model.blocks <= MAX_SECTOR_PANELS:
        return [band_geometry(model, k)]
    g = block_band_geometry(model, k)
    return [jax.tree_util.tree_map(lambda x, b=b: x[:, b], g) for b in range(model.blocks)]


def merge_coincident(energies, curvature, tol):
    """Bands that coincide in energy at one k-point (sorted energies closer than ``tol`` eV, chained)
    as one point: returns (k index, group mean energy, summed curvature, multiplicity), flattened over
    all groups.  Degenerate partners (valleys K and K', spin) have opposite curvature: drawn one on
    top of the other their colour depended on the drawing order; summed they show the net curvature
    of the states at that energy (what the Fermi-surface kernels integrate)."""
    e = np.asarray(energies, dtype=float)
    om = np.asarray(curvature, dtype=float)
    order = np.argsort(e, axis=1)
    e = np.take_along_axis(e, order, axis=1)
    om = np.take_along_axis(om, order, axis=1)
    start = np.concatenate([np.ones((e.shape[0], 1), dtype=bool), np.diff(e, axis=1) > tol], axis=1)
    group = np.cumsum(start, axis=1) - 1
    n_groups = group[:, -1] + 1
    flat = (group + np.concatenate([[0], np.cumsum(n_groups)[:-1]])[:, None]).ravel()
    size = int(n_groups.sum())
    count = np.bincount(flat, minlength=size)
    return (np.repeat(np.arange(e.shape[0]), n_groups), np.bincount(flat, e.ravel(), size) / count,
            np.bincount(flat, om.ravel(), size), count)


#: bands closer than this fraction of the plotted energy range coincide on the figure (a marker's size)
COINCIDE_FRACTION = 0.005


def _continuum_extent(model, mu):
    """Twice the largest Fermi wavevector along ±k_x, ±k_y (or twice the model's curvature scale
    when μ crosses no band), measured from the first valley centre."""
    dom = model.domain
    scale = float(dom.scale_for(model.params) if hasattr(dom, "scale_for") else dom.scale)
    t = np.linspace(0, 12 * scale, 1200)
    c = np.asarray(dom.centers[0], dtype=float)
    dirs = np.array([(1.0, 0.0), (0.0, 1.0), (-1.0, 0.0), (0.0, -1.0)])
    dirs = np.concatenate([dirs, np.zeros((4, len(c) - 2))], axis=1)        # in the k_x–k_y plane
    k = (c[None, None, :] + t[None, :, None] * dirs[:, None, :]).reshape(-1, len(c))
    e = np.asarray(band_geometry(model, k).energies).reshape(4, len(t), -1)
    cross = np.any(np.diff(np.sign(e - mu), axis=1) != 0, axis=2)
    kmax = float(np.max(np.where(cross, t[None, 1:], 0.0)))
    return 2.0 * kmax if kmax > 0 else 2.0 * scale


def plot_bands(model, mu, path: Path):
    """Bands along :func:`_band_path` coloured by Berry curvature.  A k·p model with several blocks
    gets one panel per block (valley/spin sector); within a panel, bands that coincide on the figure
    (closer than COINCIDE_FRACTION of the energy range) are drawn once with their summed curvature."""
    from matplotlib.colors import SymLogNorm
    plt = pyplot()
    k, x, xlabel, ticks, labels = _band_path(model, mu)
    geo = _sector_geometry(model, k)
    e_all = np.concatenate([np.asarray(g.energies) for g in geo], axis=1)
    lo, hi = mu - 0.5 * max(abs(mu), 0.2), mu + 0.5 * max(abs(mu), 0.2)
    filled = neutral_filling(model)
    if filled > 0:   # show the top of the filled bands too, so the gap is visible
        top = float(np.max(np.sort(e_all, axis=1)[:, :filled]))
        lo = min(lo, top - 0.15 * (hi - min(lo, top)))
    if not np.any((e_all > lo) & (e_all < hi)):
        lo, hi = float(np.min(e_all)), float(np.max(e_all))
    elif model.domain.periodic:
        lo = min(lo, float(np.min(e_all)))
    tol = COINCIDE_FRACTION * (hi - lo)
    merged = [merge_coincident(g.energies, _omega_z(g.berry_curvature), tol) for g in geo]
    shown = np.concatenate([m[2][(m[1] >= lo) & (m[1] <= hi)] for m in merged])
    single = np.abs(np.concatenate([np.asarray(g.berry_curvature).ravel() for g in geo]))
    scale_single = float(np.percentile(single, 99)) if single.size else 0.0
    vmax = float(np.percentile(np.abs(shown), 99)) if shown.size else 0.0
    cancel = scale_single > 0 and vmax <= 1e-6 * scale_single     # coincident partners cancel everywhere
    vmax = vmax if vmax > 0 and not cancel else (scale_single or 1.0)
    norm = SymLogNorm(linthresh=vmax * 1e-3, vmin=-vmax, vmax=vmax)
    win = None if model.domain.periodic else model_window(model)
    beyond = (np.linalg.norm(k - np.asarray(model.domain.centers[0], dtype=float)[None, :2], axis=1) > win.k_valid
              if win is not None else np.zeros(len(k), dtype=bool))
    n = len(geo)
    rows, cols = (2, 2) if n > 2 else (1, n)
    height = 1.7 + 3.2 * rows
    fig, axs = plt.subplots(rows, cols, figsize=(3.2 + 3.4 * cols, height), sharey=True, squeeze=False)
    for b, (ax, (ki, e, om, _)) in enumerate(zip(axs.ravel(), merged)):
        sc = ax.scatter(x[ki], e, c=om, s=3, cmap="coolwarm", norm=norm, rasterized=True)
        ax.axhline(mu, color="k", lw=0.6, ls="--", label=f"μ = {mu:.4g} eV (peak point)")
        for t in ticks:
            ax.axvline(t, color="0.8", lw=0.5, zorder=0)
        if beyond.any():
            ax.fill_between(x, 0, 1, where=beyond, transform=ax.get_xaxis_transform(), color="0.92", lw=0, zorder=0)
        ax.set_xticks(ticks)
        ax.set_xticklabels(labels, fontsize=7)
        tl = ax.get_xticklabels()
        tl[0].set_horizontalalignment("left")       # the end labels stay inside their panel
        tl[-1].set_horizontalalignment("right")
        ax.set_xlim(float(x[0]), float(x[-1]))
        ax.set_ylim(lo, hi)
        if n > 1:
            ax.set_title(f"block {b + 1} of {n}", fontsize=9)
        if ax in axs[-1]:
            ax.set_xlabel(xlabel, fontsize=8)
        if ax in axs[:, 0]:
            ax.set_ylabel("energy [eV]")
    for ax in axs.ravel()[n:]:
        ax.set_visible(False)
    axs[0, 0].legend(loc="best", fontsize=7)
    fig.suptitle(f"{model.name}: bands coloured by Berry curvature"
                 + (f"\n{model.description}" if n > 1 and model.description else ""), fontsize=10)
    cticks = [-vmax, -vmax * 1e-2, 0.0, vmax * 1e-2, vmax]
    left, bottom, top = 0.08 + 0.04 / cols, 1.25 / height, 1 - 0.75 / height
    fig.subplots_adjust(left=left, right=0.8, bottom=bottom, top=top, wspace=0.08, hspace=0.45)
    cb = fig.colorbar(sc, cax=fig.add_axes((0.82, bottom, 0.022, top - bottom)), ticks=cticks)
    cb.set_label("Berry curvature Ω [Å²]" + (", summed over coincident bands" if n == 1 else "")
                 + f"\nsymmetric log scale (linear within ±{vmax * 1e-3:.2g} Å²)", fontsize=8)
    cb.ax.set_yticklabels([f"{t:.3g}" for t in cticks])
    note = ("One panel per block (valley/spin sector) of this k·p model: its valleys are all measured from the "
            "same k origin, so drawn together time-reversed partners would overlap with opposite curvature. "
            if n > 1 else "")
    note += (f"Bands that coincide on the figure (closer than {COINCIDE_FRACTION:.1%} of the energy range"
             + (", e.g. valley or spin partners" if n == 1 else "") + ") are drawn once, coloured by their "
             "summed curvature.")
    if beyond.any():
        note += (f" Grey: |k − c| > {win.k_valid:.3g} 1/Å, beyond the k·p model's validity (|k|a ≤ 1).")
    if cancel:
        note += " Here coincident partners cancel everywhere (white): time-reversed partners carry opposite Ω."
    elif scale_single == 0:
        note += " Ω vanishes along this path."
    fig.text(0.01, 0.01, textwrap.fill(note, 45 + 40 * cols), fontsize=7, va="bottom")
    atomic_figure(fig, path, dpi=120)
    plt.close(fig)


def plot_curvature_map(model, mu, temperature, path: Path, n=161):
    plt = pyplot()
    if isinstance(model.domain, Lattice):
        b = np.asarray(model.reciprocal_vectors())
        ext = 0.75 * float(max(np.linalg.norm(b[0]), np.linalg.norm(b[1])))
        c = np.zeros(2)
    else:
        ext = _continuum_extent(model, mu) * 0.75
        c = np.asarray(model.domain.centers[0], dtype=float)
    t = np.linspace(-ext, ext, n)
    KX, KY = np.meshgrid(c[0] + t, c[1] + t, indexing="xy")
    k = _in_plane(model, np.stack([KX.ravel(), KY.ravel()], -1), c)
    g = band_geometry(model, k)
    e, om = np.asarray(g.energies), _omega_z(g.berry_curvature)
    kt = float(thermal_energy(np.asarray(temperature)))
    f = np.asarray(fermi(e, mu, kt)) - (np.arange(e.shape[1]) < neutral_filling(model))[None, :]
    w = np.sum(f * om, axis=1).reshape(KX.shape)
    vmax = float(np.max(np.abs(w))) or 1.0
    fig, ax = plt.subplots(figsize=(5.5, 4.6))
    im = ax.pcolormesh(KX, KY, w, cmap="coolwarm", vmin=-vmax, vmax=vmax, shading="auto")
    for nb in range(e.shape[1]):
        en = e[:, nb].reshape(KX.shape)
        if en.min() < mu < en.max():
            ax.contour(KX, KY, en, levels=[mu], colors="k", linewidths=0.8)
    ax.set_aspect("equal")
    ax.set_xlabel("$k_x$ [1/Å]")
    ax.set_ylabel("$k_y$ [1/Å]")
    ax.set_title(f"curvature of added carriers, μ = {mu:.4g} eV, T = {temperature:g} K", fontsize=9)
    fig.colorbar(im, ax=ax, label="$\\sum_n (f - f_{\\rm neutral})\\,\\Omega_n$ [Å²]")
    fig.tight_layout()
    atomic_figure(fig, path, dpi=120)
    plt.close(fig)


def _bar_parts(ds, idx):
    ang = value_at(ds, "current_angle_deg", idx)
    out = {}
    for p in PARTS:
        chi = _point(ds, idx, f"chi_{p}")
        out[p] = complex(np.asarray(rotate_chi(chi, ang))[1, 0, 0])
    return out


PREFIXES = ((1.0, ""), (1e-3, "m"), (1e-6, "μ"), (1e-9, "n"), (1e-12, "p"), (1e-15, "f"))


def eng_scale(values, unit: str):
    """(factor, label unit) with an engineering prefix chosen from the largest |value|: plot
    ``values / factor`` against ``label unit`` (2.3e-8 V → nV); below femto a power of ten
    (4e-17 A·m/V² → 10⁻¹⁸ A·m/V²)."""
    a = float(np.nanmax(np.abs(np.asarray(values, dtype=float)))) if np.size(values) else 0.0
    if a == 0 or not np.isfinite(a):
        return 1.0, unit
    for f, pre in PREFIXES:
        if a >= f:
            return f, pre + unit
    e = 3 * int(np.floor(np.log10(a) / 3))
    return 10.0 ** e, f"$10^{{{e}}}$ {unit}"


def axis_label(ds, name) -> str:
    """"gate voltage [V]" from the coordinate's long_name and units."""
    unit = ds[name].attrs.get("units", "")
    unit = {"deg": "°", "1": ""}.get(unit, unit)
    text = ds[name].attrs.get("long_name", name.replace("_", " "))
    return f"{text} [{unit}]" if unit else text


BAR_FRAME_NOTE = "primes: bar frame (x′ along the current, y′ across the bar)"


def plot_responses(ds, idx, path: Path, info=None):
    """2ω amplitude, σ'_xx and χ'_yxx against every sweep axis; points whose amplitude is zero
    within error are drawn hollow over a grey band up to the error bound."""
    plt = pyplot()
    axes = [d for d in grid_axes(ds) if ds.sizes[d] > 1 and d != "current_angle_deg"]
    if not axes:
        axes = [grid_axes(ds)[-2]]
    fa, ua = eng_scale(ds["v2w_y_amplitude"].values, "V")
    fs, us = eng_scale(ds["sigma_bar"].values[..., 0, 0], "S")
    fc, uc = eng_scale(ds["chi_bar"].values[..., 1, 0, 0], "A·m/V²")
    fig, axs = plt.subplots(3, len(axes), figsize=(4.2 * len(axes), 8), squeeze=False)
    for col, name in enumerate(axes):
        others = [d for d in grid_axes(ds) if d != name and ds.sizes[d] > 1 and d != "current_angle_deg"]
        line_axis = others[0] if others and ds.sizes[others[0]] <= 6 else None
        line_vals = range(ds.sizes[line_axis]) if line_axis else [None]
        x = ds[name].values
        for li in line_vals:
            sel = {d: i for d, i in idx.items() if d != name}
            label = None
            if line_axis is not None:
                sel[line_axis] = li
                raw = ds[line_axis].attrs.get("units", "")
                unit = {"deg": "°", "1": ""}.get(raw, raw)
                long_name = ds[line_axis].attrs.get("long_name", line_axis)
                label = f"{long_name} = {ds[line_axis].values[li]:g} {unit}".rstrip()
            amp = ds["v2w_y_amplitude"].isel(sel).values / fa
            sxx = ds["sigma_bar"].isel(sel).values[..., 0, 0] / fs
            chi = ds["chi_bar"].isel(sel).values[..., 1, 0, 0] / fc
            line, = axs[0, col].plot(x, amp, "-", lw=1, label=label)
            if info is not None:
                at = tuple(sel.get(d, slice(None)) for d in ds["v2w_y_amplitude"].dims)
                ok = np.asarray(info["amp_resolved"][at])
                bd = np.asarray(info["amp_bound"][at]) / fa
                axs[0, col].plot(x[ok], amp[ok], "o", ms=3, color=line.get_color())
                axs[0, col].plot(x[~ok], amp[~ok], "o", ms=4, mfc="none", color=line.get_color())
                axs[0, col].fill_between(x, 0, bd, color="0.85", lw=0, zorder=0)
            else:
                axs[0, col].plot(x, amp, "o", ms=3, color=line.get_color())
            axs[1, col].plot(x, sxx, "o-", ms=3, label=label)
            axs[2, col].plot(x, chi, "o-", ms=3, label=label)
        axs[2, col].set_xlabel(axis_label(ds, name))
        axs[0, col].set_ylabel(f"$|V_{{y'}}^{{2\\omega}}|$ amplitude [{ua}]")
        axs[1, col].set_ylabel(f"$\\sigma'_{{xx}}$ [{us}]")
        axs[2, col].set_ylabel(f"$\\chi'_{{yxx}}$ [{uc}]")
        for r in range(3):
            axs[r, col].ticklabel_format(axis="y", style="plain", useOffset=False)
        a0 = ds["v2w_y_amplitude"].values
        pos = a0[np.isfinite(a0) & (a0 > 0)]
        if pos.size and info is not None and info["any_resolved"] and pos.max() > 100 * pos.min():
            axs[0, col].set_yscale("log")        # the signal spans decades
        if info is not None and info["all_forbidden"]:
            axs[0, col].set_title("vanishes by symmetry: values are integration residue", fontsize=8)
        elif info is not None and not info["any_resolved"]:
            axs[0, col].set_title("zero within error everywhere (grey: error bound)", fontsize=8)
        if line_axis is not None:
            axs[0, col].legend(fontsize=7)
    cap = "responses at the peak conditions (other axes fixed there); " + BAR_FRAME_NOTE
    if info is not None:
        cap += "\nhollow points and grey band: zero within error (|V| below its error bound)"
    fig.suptitle("\n".join(textwrap.fill(c, 58 * len(axes)) for c in cap.split("\n")), fontsize=9)
    fig.tight_layout()
    atomic_figure(fig, path, dpi=110)
    plt.close(fig)


def angle_scan(ds, idx, scn, angles_deg):
    sig, chi, chid = (_point(ds, idx, n) for n in ("sigma", "chi", "chi_dc"))
    A = len(angles_deg)
    bar = HallBar(scn.device.width_um, scn.device.length_um, scn.device.current_uA, scn.device.frequency_Hz)
    out = hall_bar(np.broadcast_to(sig, (A, 2, 2)), np.broadcast_to(chi, (A, 2, 2, 2)),
                   np.broadcast_to(chid, (A, 2, 2, 2)), bar, np.asarray(angles_deg, dtype=float))
    chib = np.asarray(rotate_chi(np.broadcast_to(chi, (A, 2, 2, 2)), np.asarray(angles_deg, dtype=float)))
    return np.asarray(out.v2w_y_amplitude), chib[:, 1, 0, 0].real


def plot_angle(ds, idx, scn, path: Path, info=None):
    plt = pyplot()
    from matplotlib.ticker import MaxNLocator
    th = np.linspace(0, 360, 181)
    amp, chi = angle_scan(ds, idx, scn, th)
    fa, ua = eng_scale(amp, "V")
    fc, uc = eng_scale(chi, "A·m/V²")
    fig, axs = plt.subplots(1, 2, subplot_kw={"projection": "polar"}, figsize=(9, 5.0))
    axs[0].plot(np.deg2rad(th), amp / fa)
    axs[0].set_title(f"$|V_{{y'}}^{{2\\omega}}|$ amplitude [{ua}] against current angle θ", fontsize=9, pad=16)
    pos, neg = np.where(chi >= 0, np.abs(chi), np.nan), np.where(chi < 0, np.abs(chi), np.nan)
    axs[1].plot(np.deg2rad(th), pos / fc, "-", color="C3", label="χ′ > 0")
    axs[1].plot(np.deg2rad(th), neg / fc, "--", color="C0", label="χ′ < 0")
    axs[1].legend(loc="upper left", bbox_to_anchor=(0.92, 1.08), fontsize=7)
    axs[1].set_title(f"$|\\chi'_{{yxx}}|$ [{uc}] against θ (line style: sign)", fontsize=9, pad=16)
    for ax in axs:
        ax.yaxis.set_major_locator(MaxNLocator(3))
        ax.set_rlabel_position(112.5)
        ax.tick_params(axis="y", labelsize=7)
    if info is not None and (info["all_forbidden"] or not info["any_resolved"]):
        fig.text(0.5, 0.02, "the 2ω signal is zero within error here: the curves are integration residue",
                 ha="center", fontsize=8, color="C3")
    else:
        fig.text(0.5, 0.02, "θ from the crystal x axis; " + BAR_FRAME_NOTE, ha="center", fontsize=8)
    fig.tight_layout(rect=(0, 0.05, 1, 0.96))
    atomic_figure(fig, path, dpi=110)
    plt.close(fig)
    return th, amp


def scaling_axes(ds):
    scattering = {k for knobs in SCATTERING.values() for k in knobs}
    cand = ["temperature_K"] + [d for d in grid_axes(ds) if d in scattering]
    return [d for d in cand if d in ds.dims and ds.sizes[d] > 1]


SCALING_SOURCE = "Du, Wang, Li, Lu, Xie, Nat. Commun. 10, 3047 (2019)"


def scaling_coefficients(sigma, ratio, ratio_err=None):
    """Weighted least squares of E⊥/E∥² = C0 + C1 σ + C2 σ² (the scaling form of Du et al., Nat.
    Commun. 10, 3047 (2019); docs/theory.md §12.2).  Returns (C0, C1, C2), their standard errors and
    where the errors come from: the ``ratio_err`` estimates (absolute weights) when they are all
    positive and finite, else the scatter about the fit (more than 3 points), else ``None`` (NaN errors:
    three points fix three coefficients exactly); ``"degenerate"`` (NaN coefficients) when fewer than
    three distinct conductivities (or a singular design) cannot fix them."""
    x = np.asarray(sigma, dtype=float)
    y = np.asarray(ratio, dtype=float)
    err = None if ratio_err is None else np.asarray(ratio_err, dtype=float)
    weighted = err is not None and bool(np.all(np.isfinite(err)) and np.all(err > 0))
    w = 1.0 / err if weighted else np.ones_like(y)
    design = np.stack([np.ones_like(x), x, x * x], axis=1) * w[:, None]
    u, sv, vt = np.linalg.svd(design, full_matrices=False)
    if x.size < 3 or np.unique(x).size < 3 or sv[-1] <= 1e-12 * sv[0]:
        return np.full(3, np.nan), np.full(3, np.nan), "degenerate"
    coef = vt.T @ ((u.T @ (y * w)) / sv)
    cov = (vt.T / sv ** 2) @ vt
    if weighted:
        how = "error estimates"
    elif x.size > 3:
        resid = y * w - design @ coef
        cov = cov * float(resid @ resid) / (x.size - 3)
        how = "scatter"
    else:
        cov, how = np.full((3, 3), np.nan), None
    return coef, np.sqrt(np.abs(np.diag(cov))), how


def _fmt_pm(v, e, unit):
    if not np.isfinite(e):
        return f"{v:.3g} {unit}".rstrip()
    return f"({v:.4g} ± {e:.2g}) {unit}".rstrip()


def plot_measurability(ds, idx, path: Path) -> bool:
    """``measurability.png``: the transverse 2ω signal (lock-in rms) against the carrier axis at the
    peak's other coordinates, beside the noise of the transverse lock-in reading at its time
    constant (Johnson–Nyquist + amplifier: a lower bound), the 10× noise line (SNR 10) and the
    estimated artefacts — misalignment pickup and the thermoelectric 2ω estimate, both as rms
    (docs/theory.md §15).  False when the dataset has no measurability fields or no swept carrier."""
    need = ("v2w_y_rms", "noise_y_rms", "pickup_v2w_y")
    carrier = [d for d in grid_axes(ds) if d in CARRIERS]
    if not all(n in ds for n in need) or not carrier:
        return False
    name = carrier[0]
    plt = pyplot()
    sel = {d: i for d, i in idx.items() if d != name and d in ds["v2w_y_rms"].dims}
    x = ds[name].values
    curves = [("v2w_y_rms", "2ω Hall signal $V_{y'}^{2\\omega}$ (rms)", "-", "C0"),
              ("noise_y_rms", "noise at the lock-in time constant", "--", "0.4"),
              ("pickup_v2w_y", "misalignment pickup (rms)", ":", "C1"),
              ("thermoelectric_v2w_y", "thermoelectric 2ω estimate (rms)", "-.", "C3")]
    fig, ax = plt.subplots(figsize=(6.0, 4.4))
    scale = 1.0 / np.sqrt(2.0)           # amplitudes of the artefacts → lock-in rms
    for field_name, label, style, colour in curves:
        if field_name not in ds:
            continue
        y = np.abs(np.asarray(ds[field_name].isel(sel).values, dtype=float))
        y = y * (scale if field_name in ("pickup_v2w_y", "thermoelectric_v2w_y") else 1.0)
        if not np.any(np.isfinite(y) & (y > 0)):
            continue
        ax.plot(x, np.where(y > 0, y, np.nan), style, color=colour, label=label)
        if field_name == "noise_y_rms":
            ax.plot(x, 10 * y, ":", color="0.6", lw=0.8, label="SNR = 10")
    ax.set_yscale("log")
    ax.set_xlabel(axis_label(ds, name))
    ax.set_ylabel("voltage (rms) [V]")
    ax.legend(fontsize=7, loc="best")
    where = ", ".join(f"{ds[d].attrs.get('long_name', d)} = {ds[d].values[i]:g} "
                      f"{ds[d].attrs.get('units', '')}".rstrip() for d, i in sel.items() if ds.sizes[d] > 1)
    ax.set_title("Signal, noise floor (a lower bound) and artefacts" + (f"\nat {where}" if where else ""),
                 fontsize=9)
    fig.tight_layout()
    atomic_figure(fig, path, dpi=110)
    plt.close(fig)
    return True


def plot_scaling(ds, idx, path: Path):
    """E⊥/E∥² against σ'_xx as temperature (or τ) varies, one series per carrier value (colour bar),
    each with its fit C0 + C1σ + C2σ² (Du et al. 2019); the coefficients of the peak's series with
    their uncertainties in the legend; the y axis starts at zero and the largest relative change of a
    series is printed, so a flat line looks flat."""
    plt = pyplot()
    from matplotlib import cm
    from matplotlib.colors import Normalize
    axes = scaling_axes(ds)
    if not axes:
        return False
    name = axes[0]
    carrier = [d for d in grid_axes(ds) if d in CARRIERS][0]
    fr, ur = eng_scale(ds["nonlinear_ratio"].values, "m/V")
    cvals = ds[carrier].values
    norm = Normalize(float(np.min(cvals)), float(np.max(cvals)) if len(cvals) > 1 else float(cvals[0]) + 1)
    cmap = plt.get_cmap("viridis")
    fig, ax = plt.subplots(figsize=(6.4, 5.4))
    ang = value_at(ds, "current_angle_deg", idx)
    spans, sig_spans, fits = [], [], {}
    for ci in range(len(cvals)):
        sel = {d: i for d, i in idx.items() if d not in (name, carrier)}
        sel[carrier] = ci
        sxx = ds["sigma_bar"].isel(sel).values[..., 0, 0] / E2H
        syy = ds["sigma_bar"].isel(sel).values[..., 1, 1]
        chi = ds["chi_bar"].isel(sel).values[..., 1, 0, 0]
        ratio = ds["nonlinear_ratio"].isel(sel).values / fr
        ok = np.isfinite(sxx) & np.isfinite(ratio)
        if ok.sum() < 2:
            continue
        sel_pt = {d: i for d, i in sel.items() if d != "current_angle_deg"}
        e_chi = np.array([_rotated_error(ds["error_chi"].isel({**sel_pt, name: t}).values, ang)[1, 0, 0]
                          for t in range(ds.sizes[name])])
        e_sig = ds["error_sigma"].isel(sel_pt).values.reshape(ds.sizes[name], -1).max(axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            err = np.abs(ratio) * (e_chi / np.abs(chi) + e_sig / np.abs(syy))
        colour = cmap(norm(float(cvals[ci])))
        peak = ci == idx[carrier]
        ax.plot(sxx[ok], ratio[ok], "o", ms=5 if peak else 3.5, color=colour, mec="k" if peak else colour,
                zorder=3)
        spans.append(float(np.ptp(ratio[ok]) / np.max(np.abs(ratio[ok]))))
        sig_spans.append(float(np.max(sxx[ok]) / np.min(sxx[ok])))
        c, e, how = scaling_coefficients(sxx[ok], ratio[ok], err[ok])
        if how != "degenerate":
            xs = np.linspace(0.0, 1.05 * float(np.max(sxx[ok])), 100)
            ax.plot(xs, c[0] + c[1] * xs + c[2] * xs * xs, "--", lw=1.4 if peak else 0.7, color=colour, zorder=2,
                    gid="scaling-fit")
            fits[ci] = (c, e, how)
    ax.set_xlim(left=0.0)
    lo, hi = ax.get_ylim()
    ax.set_ylim(min(lo * 1.05, 0.0), max(hi * 1.05, 0.0))        # from zero: a flat line looks flat
    unit = {"deg": "°", "1": ""}.get(ds[carrier].attrs.get("units", ""), ds[carrier].attrs.get("units", ""))
    cname = ds[carrier].attrs.get("long_name", carrier)
    cb = fig.colorbar(cm.ScalarMappable(norm=norm, cmap=cmap), ax=ax, pad=0.02)
    cb.set_label(f"{cname} [{unit}]" if unit else cname)
    if fits:
        shown = idx[carrier] if idx[carrier] in fits else min(fits)
        c, e, how = fits[shown]
        which = "peak, black edge" if shown == idx[carrier] else "the peak's series has no fit"
        ax.plot([], [], "o--", color="k", mfc="none",
                label=f"fit at {cname} = {float(cvals[shown]):.3g} {unit} ({which}):".replace("  ", " "))
        for j, txt in enumerate((_fmt_pm(c[0], e[0], f"{ur}"), _fmt_pm(c[1], e[1], f"{ur} per e²/h"),
                                 _fmt_pm(c[2], e[2], f"{ur} per (e²/h)²"))):
            ax.plot([], [], " ", label=f"C{j} = {txt}")
        ax.legend(fontsize=7, loc="lower right", handlelength=2.5)
        errs = {"error estimates": "uncertainties from the integration-error estimates",
                "scatter": "uncertainties from the scatter about the fit",
                None: "3 points fix the 3 coefficients exactly: no uncertainty"}[how]
    else:
        errs = "no fit: a series needs 3 distinct values of σ'_xx"
    ax.set_xlabel(f"$\\sigma'_{{xx}}$ [$e^2/h$], varied through {ds[name].attrs.get('long_name', name)}")
    ax.set_ylabel(f"$E_\\perp/E_\\parallel^2 = \\chi'_{{yxx}}/\\sigma'_{{yy}}$ [{ur}]")
    ax.ticklabel_format(axis="y", style="plain", useOffset=False)
    ax.set_title(f"scaling: E⊥/E∥² = C0 + C1 σ + C2 σ² ({SCALING_SOURCE.split(',')[0]} et al. 2019)",
                 fontsize=9)
    change = (f"largest relative change of E⊥/E∥² within one {cname} series: {max(spans):.1%} while σ'_xx "
              f"changes up to ×{max(sig_spans):.2g}" if spans else "")
    cap = (f"{change}. Colour: {cname}; dashed: fit per series ({errs}; form of {SCALING_SOURCE}). "
           "C0: τ-independent (Berry-curvature dipole, side jump); C1, C2: ∝ σ, σ² (nonlinear Drude, skew "
           "scattering; docs/theory.md §12.2).")
    fig.text(0.01, 0.01, textwrap.fill(cap, 110), fontsize=7, va="bottom")
    fig.subplots_adjust(left=0.13, right=0.95, bottom=0.25, top=0.93)
    atomic_figure(fig, path, dpi=110)
    plt.close(fig)
    return True


# ----------------------------------------------------------------------------- summary --------
def _fmt_point(ds, idx):
    parts = []
    for d in grid_axes(ds):
        v = value_at(ds, d, idx)
        if ds.sizes[d] > 1 or d == "current_angle_deg":
            unit = {"deg": "°", "1": ""}.get(ds[d].attrs.get("units", ""), ds[d].attrs.get("units", ""))
            name = ds[d].attrs.get("long_name", d.replace("_", " "))
            parts.append(f"{name} = {v:.4g}{unit}" if unit == "°" else f"{name} = {v:.4g} {unit}".rstrip())
    return ", ".join(parts)


# fields that may legitimately hold NaN: error estimates (unavailable at level 0), ratios at σ = 0
_MAY_BE_NAN = ("error_", "has_error_estimate", "hall_angle", "nonlinear_ratio")


def _non_finite_warning(ds) -> list:
    """Lines warning, before anything else, that the dataset holds NaN/inf outside the fields that
    may legitimately do so; no lines when every value is finite."""
    bad = {}
    for name, var in ds.data_vars.items():
        if name.startswith(_MAY_BE_NAN) or not np.issubdtype(var.dtype, np.number):
            continue
        n = int(np.count_nonzero(~np.isfinite(var.values)))
        if n:
            bad[name] = n
    if not bad:
        return []
    listed = ", ".join(f"`{k}` ({n})" for k, n in sorted(bad.items()))
    return [f"> **WARNING: the dataset holds non-finite values (NaN/inf)** in {listed}; numbers derived from "
            "them below are not results. Check the model and the conditions at those grid points.", ""]


def _error_line(err_chi, chi_size, err_sig, sig_size) -> str:
    """The error-estimate bullet; NaN (no coarser level was compared) is reported as unavailable,
    never as 0."""
    if not (np.isfinite(err_chi) and np.isfinite(err_sig)):
        return ("- Estimated integration error at the peak: **unavailable** — no coarser k-mesh level was "
                "compared (level 0 has none); use resolution >= 1 or \"auto\" for an error estimate.")
    return (f"- Estimated integration error at the peak (|fine − coarse| mesh): χ {err_chi:.2g} A·m/V² "
            f"({err_chi / chi_size:.2g} relative), σ {err_sig:.2g} S ({err_sig / sig_size:.2g} relative).")


def _zero(bound, unit_fmt, symbol="x") -> str:
    if not np.isfinite(bound):
        return "not resolved (its error estimate is infinite: see the Numerical accuracy section)"
    return f"zero within error (|{symbol}| < {unit_fmt(bound)})"


def _rotated_error(err, angle):
    R = _rotation_abs(angle)
    err = np.nan_to_num(np.asarray(err, dtype=float), nan=0.0, posinf=np.inf)
    return np.einsum("ai,bj,ck,ijk->abc", R, R, R, err) if np.all(np.isfinite(err)) else np.full((2, 2, 2), np.inf)


def _headline(ds, scn, idx, info, amp, rms, phase, mu, dens) -> list:
    dev = scn.device
    drive = (f"for a drive I(t) = {dev.current_uA:g} μA · sin ωt at {dev.frequency_Hz:g} Hz in a bar "
             f"{dev.width_um:g} μm wide")
    all_amp = ds["v2w_y_amplitude"].values
    bound = float(np.nanmax(info["amp_bound"]))
    name = scn.material.model or scn.material.tight_binding.name
    if info["all_forbidden"]:
        sym, model = info["symmetries"], info["model"]
        why = []
        if sym.get("C2"):
            why.append("C2 rotation (inversion of the sheet) forbids every second-order current")
        else:
            if sym.get("T"):
                why.append("time reversal removes the nonlinear Drude (τ²) and intrinsic (τ⁰) terms")
            if sym.get("C3"):
                why.append("C3 rotation forces the Berry-curvature dipole to zero")
        return [
            f"**No 2ω transverse signal: it vanishes by symmetry.** The model `{name}` at these parameters has "
            f"{_symmetry_names(model, sym)}: {'; '.join(why)} ({SYMMETRY_SOURCES}). The computed amplitudes "
            f"are integration residue, zero within error (|V_y^2ω| < {fmt_volts(bound)} everywhere; "
            f"largest residue {fmt_volts(float(np.nanmax(all_amp)))}) {drive}.",
            "",
            f"What would allow a signal: {_remedies(model, sym)}.",
            ""]
    if not info["any_resolved"]:
        forb = info["forbidden"]
        extra = ("" if not forb else " By symmetry " + ", ".join(
            f"the {PART_NAMES[p]} part vanishes ({why})" for p, why in forb.items()) + ".")
        return [f"**No 2ω transverse signal is resolved: zero within error (|V_y^2ω| < {fmt_volts(bound)}) at "
                f"every grid point** {drive}.{extra} A finer k mesh (resolution, rtol) lowers the error bound.",
                ""]
    lo_i = int(np.nanargmin(np.where(info["amp_resolved"], all_amp, np.inf)))
    unresolved_min = not bool(np.all(info["amp_resolved"]))
    low = (_zero(float(np.max(np.where(info["amp_resolved"], 0.0, info["amp_bound"]))), fmt_volts, "V")
           if unresolved_min else fmt_volts(float(all_amp.ravel()[lo_i])))
    return [
        f"The transverse 2ω voltage is largest at {_fmt_point(ds, idx)}: "
        f"**{fmt_volts(amp)} amplitude ({fmt_volts(rms)} rms on a lock-in)** {drive}. "
        f"The lock-in phase relative to sin 2ωt is {phase:.1f}°. "
        f"There μ = {mu:.5g} eV and the carrier density is {dens:.4g} cm⁻² (relative to neutrality).",
        "",
        f"Over the whole sweep the amplitude ranges from {low} to {fmt_volts(float(np.nanmax(all_amp)))} "
        f"({all_amp.size} grid points).",
        ""]


def helicity_lines(ds, scn, idx) -> list:
    """Markdown lines on the rectified signal of the scenario's polarised ``[drive]`` field
    (docs/theory.md §5.9): its helicity-odd part at the shown grid point and over the sweep; no lines
    when the scenario has no ``[drive]`` (the dataset then has no ``photo_*`` fields)."""
    drv = getattr(scn, "drive", None)
    if drv is None or "photo_vdc_helicity_y" not in ds:
        return []
    g = lambda name: float(ds[name].isel({d: i for d, i in idx.items() if d in ds[name].dims}).values)
    odd_y, odd_x = g("photo_vdc_helicity_y"), g("photo_vdc_helicity_x")
    tot_y, tot_x = g("photo_vdc_y"), g("photo_vdc_x")
    sweep = np.abs(ds["photo_vdc_helicity_y"].values)
    if drv.ellipticity_deg == 0.0:
        state = f"linearly polarised along {drv.angle_deg:g}° from crystal x"
    else:
        sense = "counterclockwise" if drv.ellipticity_deg > 0 else "clockwise"
        shape = ("circularly polarised" if abs(drv.ellipticity_deg) == 45.0 else
                 f"elliptically polarised (ellipticity angle {abs(drv.ellipticity_deg):g}°, major axis at "
                 f"{drv.angle_deg:g}° from crystal x)")
        state = f"{shape}, turning {sense} seen from +z"
    s3 = float(np.sin(np.deg2rad(2 * drv.ellipticity_deg)))
    wt = ""
    if "tau_fs" in ds.coords:          # constant τ: a swept axis, or one value
        taus = np.asarray(ds["tau_fs"].values).reshape(-1)
        w_tau = 2 * np.pi * drv.frequency_Hz * float(taus[idx.get("tau_fs", 0)]) * 1e-15
        wt = f" (ωτ = {w_tau:.3g}; the helicity-odd current goes as ωτ/(1 + ω²τ²) at fixed τ)"
    lines = [
        "## Helicity-odd rectified signal of the polarised drive",
        "",
        f"Drive: an in-plane field of amplitude {drv.field_V_m:.4g} V/m at {drv.frequency_Hz:.4g} Hz{wt}, "
        f"{state}; degree of circular polarisation S3/S0 = {s3:.3g}.",
        "",
        f"At the grid point shown ({_fmt_point(ds, idx)}) the open-circuit dc voltages are "
        f"V_y = {fmt_volts(tot_y)} across and V_x = {fmt_volts(tot_x)} along the bar; their helicity-odd "
        f"parts, which reverse sign with the handedness, are **V_y = {fmt_volts(odd_y)}** and "
        f"V_x = {fmt_volts(odd_x)}. Over the sweep |V_y| of the helicity-odd part reaches "
        f"{fmt_volts(float(np.nanmax(sweep)))}.",
        "",
        "The helicity-odd part is the Berry-curvature-dipole circular photogalvanic current "
        "(docs/theory.md §5.9); it vanishes for linear polarisation and at lock-in frequencies. It is "
        "computed with the sweep's numerics; no error estimate of it is stored.",
        "",
    ]
    return lines


def summary_markdown(ds, scn, idx, angle_info=None, info=None, sections=()) -> str:
    """``summary.md``: the peak, the mechanism, then ``sections`` (Markdown text of later analyses,
    e.g. the sensitivity table), then conditions, assumptions, accuracy and cautions."""
    num = json.loads(ds.attrs["numerics"])
    sel_pt = {d: i for d, i in idx.items() if d != "current_angle_deg"}
    g = lambda name: ds[name].isel({d: i for d, i in idx.items() if d in ds[name].dims}).values
    info = info if info is not None else resolution_info(ds, scn, idx)
    amp, rms, phase = float(g("v2w_y_amplitude")), float(g("v2w_y_rms")), float(g("v2w_y_phase_deg"))
    mu = float(ds["mu"].isel(sel_pt).values)
    dens = float(ds["density"].isel(sel_pt).values) * 1e-4
    sbar = g("sigma_bar")
    ang = value_at(ds, "current_angle_deg", idx)
    parts = _bar_parts(ds, idx)
    chi = complex(g("chi_bar")[1, 0, 0])
    err_chi = float(np.max(ds["error_chi"].isel(sel_pt).values))
    chi_size = float(np.max(np.abs(_point(ds, idx, "chi")))) or 1.0
    err_sig = float(np.max(ds["error_sigma"].isel(sel_pt).values))
    sig_size = float(np.max(np.abs(_point(ds, idx, "sigma")))) or 1.0
    # resolution of each number at the peak (rule above ZERO_FLOOR)
    chi_scale = float(np.nanmax(np.abs(ds["chi"].values)))
    chi_bound = zero_bound(_rotated_error(ds["error_chi"].isel(sel_pt).values, ang)[1, 0, 0], chi_scale)
    chi_ok = not info["all_forbidden"] and abs(chi) > chi_bound
    part_ok, part_bound = {}, {}
    total = sum(abs(v) for v in parts.values()) or 1.0
    for p in PARTS:
        part_bound[p] = zero_bound(_rotated_error(ds[f"error_chi_{p}"].isel(sel_pt).values, ang)[1, 0, 0], total)
        part_ok[p] = chi_ok and p not in info["forbidden"] and abs(parts[p]) > part_bound[p]
    sxy_bound = zero_bound(err_sig, abs(sbar[0, 0]))
    hall_txt = (f"{float(g('hall_angle')):.3g}" if abs(sbar[0, 1]) > sxy_bound else
                f"zero within error (|σ'_xy| < {sxy_bound:.2g} S)")
    A = lambda v: f"{v:.4g} A·m/V²"
    chi_txt = f"{chi.real:.4g} A·m/V²" if chi_ok else _zero(chi_bound, A, "χ'_yxx")
    ratio_txt = (f"{float(g('nonlinear_ratio')):.4g} m/V" if chi_ok else "zero within error")
    vdc = float(g("vdc_y"))
    vdc_err = float(np.max(np.nan_to_num(_grid_v2w_error(ds, scn, "chi_dc", "vdc_y")
                                         [tuple(idx[d] for d in ds["vdc_y"].dims)], nan=0.0, posinf=np.inf)))
    vdc_bound = max(vdc_err, ZERO_FLOOR * float(np.nanmax(np.abs(ds["vdc_y"].values))))
    vdc_txt = (fmt_volts(vdc) if not info["all_forbidden"] and abs(vdc) > vdc_bound
               else _zero(vdc_bound, fmt_volts, "V_dc"))
    dev = scn.device
    vxx = abs(complex(g("v_xx")))
    jd, pd = float(g("current_density")), float(g("power_density"))
    name = scn.material.model or scn.material.tight_binding.name
    validity_top, validity_assumed, validity_cautions = _validity_lines(ds, idx, info["model"], name)
    lines = [
        "# Crosswind summary",
        "",
        f"Scenario: `{Path(str(scn.path)).name}` — model `{scn.material.model or scn.material.tight_binding.name}`, "
        f"crosswind {ds.attrs.get('crosswind_version', '?')}.",
        "",
        "## Measurability",      # leads the summary: verdict, SNR and averaging time at the peak (docs/design.md)
        "",
        *measurability_lines(ds, scn, idx),
        *_non_finite_warning(ds),
        *validity_top,
        "## Where the second-harmonic signal peaks",
        "",
        *_headline(ds, scn, idx, info, amp, rms, phase, mu, dens),
        f"At the {'peak' if info['any_resolved'] else 'grid point shown in the figures'}: "
        f"σ'_xx = {fmt_eng(sbar[0, 0], 'S')} ({sbar[0, 0] / E2H:.4g} e²/h), σ'_yy = {fmt_eng(sbar[1, 1], 'S')}, "
        f"Hall angle tan θ_H = {hall_txt}, χ'_yxx = {chi_txt}, "
        f"E⊥/E∥² = {ratio_txt}, longitudinal voltage |V_xx| = {fmt_volts(vxx)} "
        f"over L = {dev.length_um:g} μm, rectified transverse voltage {vdc_txt}. Primes (σ', χ') denote the "
        "bar frame: x' along the current, y' across the bar.",
        "",
        *helicity_lines(ds, scn, idx),
        "## Which mechanism dominates",
        "",
    ]
    ok = [p for p in PARTS if part_ok[p]]
    if ok:
        dom = max(ok, key=lambda p: abs(parts[p]))
        lines.append(f"At the peak the **{PART_NAMES[dom]}** term is the largest resolved part of χ'_yxx:")
    else:
        lines.append("No mechanism can be named: no part of χ'_yxx is resolved at this point.")
    lines += ["", "| part | χ'_yxx (A·m/V²) | share of Σ|parts| |", "|---|---|---|"]
    for p in PARTS:
        if part_ok[p]:
            lines.append(f"| {PART_NAMES[p]} | {parts[p].real:.4g} | {abs(parts[p]) / total:.3f} |")
        elif p in info["forbidden"]:
            lines.append(f"| {PART_NAMES[p]} | 0 by {info['forbidden'][p]} (residue |χ| < "
                         f"{max(part_bound[p], abs(parts[p])):.2g}) | — |")
        else:
            lines.append(f"| {PART_NAMES[p]} | {_zero(part_bound[p], lambda v: f'{v:.2g}', 'χ')} | — |")
    if angle_info is not None:
        th, a = angle_info
        sig_pt, esig = _point(ds, idx, "sigma"), ds["error_sigma"].isel(sel_pt).values
        echi = ds["error_chi"].isel(sel_pt).values
        bar = HallBar(dev.width_um, dev.length_um, dev.current_uA, dev.frequency_Hz)
        ea = np.nan_to_num(v2w_error(np.broadcast_to(sig_pt, (len(th), 2, 2)), esig, echi, bar, th, a), nan=0.0,
                           posinf=np.inf)
        bd = np.maximum(ea, ZERO_FLOOR * float(np.max(a)))
        ok_a = (a > bd) & (not info["all_forbidden"])
        if not np.any(ok_a):
            lines += ["", f"Rotating the current (no new k-space work), |V_y^2ω| stays zero within error at every "
                          f"angle (|V| < {fmt_volts(float(np.max(bd)))}); no direction is singled out."]
        else:
            hi = int(np.argmax(a))
            txt = (f"Rotating the current (no new k-space work), |V_y^2ω| is largest at θ = {th[hi]:.0f}° "
                   f"({fmt_volts(float(a[hi]))}) from the crystal x axis")
            if np.all(ok_a):
                lo = int(np.argmin(a))
                txt += f" and smallest at θ = {th[lo]:.0f}° ({fmt_volts(float(a[lo]))})."
            else:
                txt += (f"; at some angles it falls to zero within error (|V| < "
                        f"{fmt_volts(float(np.max(bd[~ok_a])))}), so no direction of smallest signal is given.")
            lines += ["", txt]
    for sec in sections:
        lines += ["", sec.rstrip("\n")]
    lines += [
        "",
        "## Conditions and units",
        "",
    ]
    for a in scn.axes:
        vals = np.asarray(a.values)
        rng = f"{vals[0]:g}" if len(vals) == 1 else f"{vals.min():g} … {vals.max():g} ({len(vals)} values)"
        lines.append(f"- {a.long_name or a.name} (`{a.key}`): {rng} {a.unit if a.unit != '1' else ''}".rstrip())
    if scn.carrier == "gate_V":
        if dev.capacitance_nF_cm2 is not None:
            lines.append(f"- gate capacitance {dev.capacitance_nF_cm2:g} nF/cm² "
                         "(parallel plate, no quantum capacitance)")
        else:
            lines.append(f"- gate: {dev.dielectric_nm:g} nm dielectric, εr = {dev.permittivity:g}, offset "
                         f"{dev.gate_offset_V:g} V (parallel plate, no quantum capacitance)")
    lines += [
        f"- scattering model: {scn.scattering}",
        "- results in SI: sheet conductivity S, χ A·m/V² (Sodemann–Fu phasor convention), voltages V, "
        "density m⁻² in the dataset (cm⁻² here).",
        "",
        "## Assumptions",
        "",
        "- Semiclassical Boltzmann transport in the relaxation-time approximation with a band-independent τ, "
        "expanded to second order in the field; disorder corrections (side jump, skew scattering) are not included.",
        "- The intrinsic (τ⁰) term uses one published form of a disputed sector"
        + (" (switched off in this run)." if not num.get("intrinsic", True) else "."),
        "- Uniform fields in an ideal Hall bar driven by an ideal current source (no 2ω or dc current), "
        "contacts and probe geometry ignored.",
        f"- Model limits: {_model_limits(scn)}",
        *validity_assumed,
        "",
        "## Numerical accuracy",
        "",
        f"- k-mesh levels used: {num['levels_used']} (requested: {num['resolution']}, rtol {num['rtol']:g}); "
        + ("automatic refinement converged everywhere." if num["all_converged"] is True else
           "automatic refinement did NOT reach rtol everywhere (see the `converged` variable)."
           if num["all_converged"] is False else "fixed level: the error estimate below compares it with "
           "the next coarser level." if num["levels_used"] != [0] else "fixed level 0: nothing coarser to compare."),
        _error_line(err_chi, chi_size, err_sig, sig_size),
        f"- Zero rule: a number is reported only when |x| exceeds both its error estimate (propagated linearly "
        f"to the voltages) and {ZERO_FLOOR:g} of the scale it competes with (σ'_xx for the Hall angle, the largest "
        "value over the sweep or over current angles for a voltage, Σ|parts| for a part of χ'), and no symmetry of "
        "the model forbids it; otherwise it reads \"zero within error (|x| < bound)\" and is never ranked or used "
        "for a direction. Symmetries found in the model's bands at the peak point (energies and Berry curvature at "
        f"48 random wavevectors): {_symmetry_names(info['model'], info['symmetries']) or 'none of T, C2, C3'}.",
        "",
        "## Cautions",
        "",
        f"- Current heating: the drive is {jd:.3g} A/m of sheet current and dissipates {pd:.3g} W/m² "
        f"(time average) at the peak point; at low temperature this can heat the electrons above the bath — "
        "check that V_2ω scales as I² before trusting a number.",
        *validity_cautions,
        *(f"- Scenario check: {c}" for c in getattr(scn, "cautions", ())),
    ]
    if dev.thickness_nm is not None:
        lines.append(f"- Film of a 3D model: sheet quantities are the bulk ones times the thickness "
                     f"{dev.thickness_nm:g} nm (in-plane components). An approximation: no confinement subbands, no "
                     "surface (Fermi-arc) states, no surface scattering (docs/theory.md §16.5).")
    if scn.carrier == "gate_V":
        vmax = float(np.max(np.abs(np.asarray(scn.axis("gate_V").values) - dev.gate_offset_V)))
        if dev.dielectric_nm is not None:
            lines.append(f"- Gate dielectric: the largest gate voltage puts {vmax / dev.dielectric_nm:.3g} V/nm "
                         "across the dielectric; compare with its breakdown field and ramp slowly.")
        else:
            lines.append(f"- Gate dielectric: the sweep reaches {vmax:g} V; compare with the breakdown voltage "
                         "of your dielectric and ramp slowly.")
    lines += [
        "- Cryogens and high-voltage sources: follow your laboratory's local safety rules; this report "
        "does not replace them.",
        "",
    ]
    return "\n".join(lines)


def model_validity(ds, idx, model) -> dict:
    """Where the sweep's chemical potentials lie against the model's window
    (:func:`crosswind.solver.study.scenario.model_window`): ``outside`` (how many of ``total`` grid
    points lie outside it), ``peak_outside``, the μ range and the window's description; empty when
    the model's bands are not finite."""
    win = model_window(model)
    if win is None:
        return {}
    mu = np.asarray(ds["mu"].values, dtype=float)
    lo, hi = win.valid
    out = ~((mu >= lo) & (mu <= hi))
    sel = {d: i for d, i in idx.items() if d in ds["mu"].dims}
    mu_peak = float(ds["mu"].isel(sel).values)
    return {"window": win, "outside": int(np.count_nonzero(out)), "total": int(mu.size),
            "peak_outside": not lo <= mu_peak <= hi, "mu_range": (float(np.nanmin(mu)), float(np.nanmax(mu))),
            "worst": float(mu.ravel()[np.argmax(np.where(out, np.maximum(lo - mu, mu - hi), -np.inf))])
            if out.any() else None}


def _validity_lines(ds, idx, model, name) -> tuple:
    """(warning block before the headline, bullets for Assumptions, bullets for Cautions)."""
    v = model_validity(ds, idx, model)
    if not v:
        return [], [], []
    win, (a, b) = v["window"], v["mu_range"]
    kp = win.kind == "k·p"
    if not v["outside"]:
        return [], ([f"- k·p validity: every μ of the sweep ({a:.4g} … {b:.4g} eV) lies inside {win.describe()}."]
                    if kp else []), []
    what = ("results there extrapolate the k·p model beyond its validity" if kp else
            "every band is full or empty there, so nothing but thermal tails carries the response")
    bullet = (f"- **Outside the model's {'validity window' if kp else 'band range'}**: μ at {v['outside']} of "
              f"{v['total']} grid points (up to μ = {v['worst']:.4g} eV) lies outside {win.describe()} of `{name}`; "
              f"{what}.")
    top = []
    if v["peak_outside"]:
        region = "validity window of the k·p model" if kp else "band range of the model"
        top = [f"> **WARNING: the peak point lies outside the {region}** `{name}` (μ there outside "
               f"{win.valid[0]:.4g} … {win.valid[1]:.4g} eV): {what}. See Cautions.", ""]
    return top, [], [bullet]


def _model_limits(scn) -> str:
    if scn.material.model is not None:
        e = catalogue()[scn.material.model]
        return f"{e.summary}; source: {e.source}."
    return f"tight-binding model from {scn.material.tight_binding.name}."


def write_report(ds, scn, folder, sections=()) -> list:
    """Write the figures and ``summary.md`` to ``folder`` (with the Markdown ``sections`` of later
    analyses placed before the conditions); returns the written paths."""
    folder = Path(folder)
    idx = peak_index(ds)
    written = []
    angle_info = None
    model = _model_at(scn, ds, idx)
    info = resolution_info(ds, scn, idx, model)
    if scn.figures:
        sel = {d: i for d, i in idx.items() if d != "current_angle_deg"}
        mu = float(ds["mu"].isel(sel).values)
        T = value_at(ds, "temperature_K", idx)
        plot_bands(model, mu, folder / "bands.png")
        plot_curvature_map(model, mu, max(T, 0.0), folder / "curvature_map.png")
        plot_responses(ds, idx, folder / "responses.png", info)
        angle_info = plot_angle(ds, idx, scn, folder / "angle.png", info)
        written += [folder / n for n in ("bands.png", "curvature_map.png", "responses.png", "angle.png")]
        if plot_scaling(ds, idx, folder / "scaling.png"):
            written.append(folder / "scaling.png")
        if plot_measurability(ds, idx, folder / "measurability.png"):
            written.append(folder / "measurability.png")
    else:
        th = np.linspace(0, 360, 181)
        angle_info = (th, angle_scan(ds, idx, scn, th)[0])
    text = summary_markdown(ds, scn, idx, angle_info, info, sections)
    atomic_text(folder / "summary.md", text)
    written.append(folder / "summary.md")
    return written


__all__ = ["write_report", "summary_markdown", "peak_index", "angle_scan"]
