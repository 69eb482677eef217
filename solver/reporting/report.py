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

import numpy as np

from crosswind.models import band_geometry, catalogue
from crosswind.models.domain import Lattice
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
from crosswind.solver.study.files import atomic_figure, atomic_text
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
    strain = float(ds["strain"].values[idx["strain"]]) if "strain" in idx else None
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
                    + " or a sublattice mass" + (" — `staggered`/`mass`/`gap`" if params & {"staggered", "mass", "gap"} else ""))
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
def _kpath(model, mu):
    if isinstance(model.domain, Lattice):
        b = np.asarray(model.reciprocal_vectors())
        b1, b2 = b[0], b[1]
        if np.dot(b1, b2) < 0:
            b2 = -b2
        # circumcentre of (0, b1, b2)
        A = 2 * np.array([b1, b2])
        corner = np.linalg.solve(A, np.array([b1 @ b1, b2 @ b2]))
        hexa = abs(abs(np.dot(b1, b2)) / (np.linalg.norm(b1) * np.linalg.norm(b2)) - 0.5) < 1e-6
        pts = [np.zeros(2), b1 / 2, corner, np.zeros(2)]
        labels = ["Γ", "M", "K" if hexa else "corner", "Γ"]
        ks, ticks, s0 = [], [0.0], 0.0
        for p, q in zip(pts[:-1], pts[1:]):
            t = np.linspace(0, 1, 120, endpoint=False)
            ks.append(p[None, :] + t[:, None] * (q - p)[None, :])
            s0 += float(np.linalg.norm(q - p))
            ticks.append(s0)
        ks.append(pts[-1][None, :])
        k = np.concatenate(ks)
        s = np.concatenate([[0.0], np.cumsum(np.linalg.norm(np.diff(k, axis=0), axis=1))])
        return k, s, ticks, labels
    c = np.asarray(model.domain.centers[0], dtype=float)
    kmax = _continuum_extent(model, mu)
    t = np.linspace(-kmax, kmax, 241)
    kx = np.stack([c[0] + t, np.full_like(t, c[1])], -1)
    ky = np.stack([np.full_like(t, c[0]), c[1] + t], -1)
    k = np.concatenate([kx, ky])
    s = np.concatenate([t + kmax, 2 * kmax + (t + kmax)])
    return k, s, [0.0, kmax, 2 * kmax, 3 * kmax, 4 * kmax], ["−k_x", "centre", "+k_x | −k_y", "centre", "+k_y"]


def _continuum_extent(model, mu):
    """Twice the largest Fermi wavevector along ±k_x, ±k_y (or twice the model's curvature scale
    when μ crosses no band), measured from the first valley centre."""
    dom = model.domain
    scale = float(dom.scale_for(model.params) if hasattr(dom, "scale_for") else dom.scale)
    t = np.linspace(0, 12 * scale, 1200)
    c = np.asarray(dom.centers[0], dtype=float)
    dirs = np.array([(1.0, 0.0), (0.0, 1.0), (-1.0, 0.0), (0.0, -1.0)])
    k = (c[None, None, :] + t[None, :, None] * dirs[:, None, :]).reshape(-1, 2)
    e = np.asarray(band_geometry(model, k).energies).reshape(4, len(t), -1)
    cross = np.any(np.diff(np.sign(e - mu), axis=1) != 0, axis=2)
    kmax = float(np.max(np.where(cross, t[None, 1:], 0.0)))
    return 2.0 * kmax if kmax > 0 else 2.0 * scale


def plot_bands(model, mu, path: Path):
    from matplotlib.colors import SymLogNorm
    plt = pyplot()
    k, s, ticks, labels = _kpath(model, mu)
    g = band_geometry(model, k)
    e, om = np.asarray(g.energies), np.asarray(g.berry_curvature)
    vmax = float(np.percentile(np.abs(om), 99)) or 1.0
    fig, ax = plt.subplots(figsize=(6, 4.5))
    norm = SymLogNorm(linthresh=vmax * 1e-3, vmin=-vmax, vmax=vmax)
    for n in range(e.shape[1]):
        sc = ax.scatter(s, e[:, n], c=om[:, n], s=3, cmap="coolwarm", norm=norm)
    ax.axhline(mu, color="k", lw=0.6, ls="--", label=f"μ = {mu:.4g} eV (peak point)")
    ax.set_xticks(ticks)
    ax.set_xticklabels(labels)
    ax.set_ylabel("energy [eV]")
    ax.set_title(f"{model.name}: bands coloured by Berry curvature")
    ax.legend(loc="best", fontsize=8)
    cb = fig.colorbar(sc, ax=ax, label="Berry curvature Ω [Å²] (symmetric-log scale)", ticks=[-vmax, -vmax * 1e-2, 0.0, vmax * 1e-2, vmax])
    cb.ax.set_yticklabels([f"{t:.2g}" for t in (-vmax, -vmax * 1e-2, 0.0, vmax * 1e-2, vmax)])
    lo, hi = mu - 0.5 * max(abs(mu), 0.2), mu + 0.5 * max(abs(mu), 0.2)
    filled = neutral_filling(model)
    if filled > 0:   # show the top of the filled bands too, so the gap is visible
        top = float(np.max(e[:, :filled]))
        lo = min(lo, top - 0.15 * (hi - min(lo, top)))
    if np.any((e > lo) & (e < hi)):
        ax.set_ylim(min(lo, float(np.min(e))) if model.domain.periodic else lo, hi)
    fig.tight_layout()
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
    k = np.stack([KX.ravel(), KY.ravel()], -1)
    g = band_geometry(model, k)
    e, om = np.asarray(g.energies), np.asarray(g.berry_curvature)
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
    ang = float(ds["current_angle_deg"].values[idx["current_angle_deg"]])
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
                unit = {"deg": "°", "1": ""}.get(ds[line_axis].attrs.get("units", ""), ds[line_axis].attrs.get("units", ""))
                label = f"{ds[line_axis].attrs.get('long_name', line_axis)} = {ds[line_axis].values[li]:g} {unit}".rstrip()
            amp = ds["v2w_y_amplitude"].isel(sel).values / fa
            sxx = ds["sigma_bar"].isel(sel).values[..., 0, 0] / fs
            chi = ds["chi_bar"].isel(sel).values[..., 1, 0, 0] / fc
            line, = axs[0, col].plot(x, amp, "-", lw=1, label=label)
            if info is not None:
                ok = np.asarray(info["amp_resolved"][tuple(sel.get(d, slice(None)) for d in ds["v2w_y_amplitude"].dims)])
                bd = np.asarray(info["amp_bound"][tuple(sel.get(d, slice(None)) for d in ds["v2w_y_amplitude"].dims)]) / fa
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


def plot_scaling(ds, idx, path: Path):
    plt = pyplot()
    axes = scaling_axes(ds)
    if not axes:
        return False
    name = axes[0]
    carrier = [d for d in grid_axes(ds) if d in CARRIERS][0]
    fig, ax = plt.subplots(figsize=(5.5, 4.2))
    n = ds.sizes[carrier]
    picks = sorted(set(np.linspace(0, n - 1, min(n, 5)).round().astype(int)))
    fr, ur = eng_scale(ds["nonlinear_ratio"].values, "m/V")
    for ci in picks:
        sel = {d: i for d, i in idx.items() if d not in (name, carrier)}
        sel[carrier] = ci
        sxx = ds["sigma_bar"].isel(sel).values[..., 0, 0]
        ratio = ds["nonlinear_ratio"].isel(sel).values
        ax.plot(sxx / E2H, ratio / fr, "o-", ms=3,
                label=f"{ds[carrier].attrs.get('long_name', carrier)} = {ds[carrier].values[ci]:.3g} "
                      f"{ds[carrier].attrs.get('units', '')}")
    ax.set_xlabel(f"$\\sigma'_{{xx}}$ [$e^2/h$], varied through {ds[name].attrs.get('long_name', name)}")
    ax.set_ylabel(f"$E_\\perp/E_\\parallel^2 = \\chi'_{{yxx}}/\\sigma'_{{yy}}$ [{ur}]")
    ax.ticklabel_format(axis="y", style="plain", useOffset=False)
    ax.set_title("scaling: E⊥/E∥² = C0 + C1 σ + C2 σ² separates mechanisms", fontsize=9)
    ax.legend(fontsize=7)
    fig.tight_layout()
    atomic_figure(fig, path, dpi=110)
    plt.close(fig)
    return True


# ----------------------------------------------------------------------------- summary --------
def _fmt_point(ds, idx):
    parts = []
    for d in grid_axes(ds):
        v = float(ds[d].values[idx[d]])
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
    ang = float(ds["current_angle_deg"].values[idx["current_angle_deg"]])
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
    lines = [
        "# Crosswind summary",
        "",
        f"Scenario: `{Path(str(scn.path)).name}` — model `{scn.material.model or scn.material.tight_binding.name}`, "
        f"crosswind {ds.attrs.get('crosswind_version', '?')}.",
        "",
        *_non_finite_warning(ds),
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
            lines.append(f"- gate capacitance {dev.capacitance_nF_cm2:g} nF/cm² (parallel plate, no quantum capacitance)")
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
    ]
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
        T = float(ds["temperature_K"].values[idx["temperature_K"]])
        plot_bands(model, mu, folder / "bands.png")
        plot_curvature_map(model, mu, max(T, 0.0), folder / "curvature_map.png")
        plot_responses(ds, idx, folder / "responses.png", info)
        angle_info = plot_angle(ds, idx, scn, folder / "angle.png", info)
        written += [folder / n for n in ("bands.png", "curvature_map.png", "responses.png", "angle.png")]
        if plot_scaling(ds, idx, folder / "scaling.png"):
            written.append(folder / "scaling.png")
    else:
        th = np.linspace(0, 360, 181)
        angle_info = (th, angle_scan(ds, idx, scn, th)[0])
    text = summary_markdown(ds, scn, idx, angle_info, info, sections)
    atomic_text(folder / "summary.md", text)
    written.append(folder / "summary.md")
    return written


__all__ = ["write_report", "summary_markdown", "peak_index", "angle_scan"]
