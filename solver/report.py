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
from pathlib import Path

import numpy as np

from crosswind.models.units import E_CHARGE
from .files import atomic_figure, atomic_text

E2H = E_CHARGE ** 2 / 6.62607015e-34  # e²/h in S
PARTS = ("dipole", "drude", "intrinsic")
PART_NAMES = {"dipole": "Berry-curvature dipole (∝ τ)", "drude": "nonlinear Drude (∝ τ²)",
              "intrinsic": "intrinsic / connection polarizability (τ⁰)"}


def _plt():
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    return plt


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


# ----------------------------------------------------------------------------- figures --------
def _kpath(model, mu):
    from crosswind.models.domain import Lattice
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


_EXTENT: dict = {}


def _continuum_extent(model, mu):
    """Twice the largest Fermi wavevector along ±k_x, ±k_y (or twice the model's curvature scale
    when μ crosses no band), measured from the first valley centre."""
    from crosswind.models import band_geometry
    key = (id(model), float(mu))
    if key in _EXTENT:
        return _EXTENT[key]
    dom = model.domain
    scale = float(dom.scale_for(model.params) if hasattr(dom, "scale_for") else dom.scale)
    t = np.linspace(0, 12 * scale, 1200)
    c = np.asarray(dom.centers[0], dtype=float)
    dirs = np.array([(1.0, 0.0), (0.0, 1.0), (-1.0, 0.0), (0.0, -1.0)])
    k = (c[None, None, :] + t[None, :, None] * dirs[:, None, :]).reshape(-1, 2)
    e = np.asarray(band_geometry(model, k).energies).reshape(4, len(t), -1)
    cross = np.any(np.diff(np.sign(e - mu), axis=1) != 0, axis=2)
    kmax = float(np.max(np.where(cross, t[None, 1:], 0.0)))
    _EXTENT[key] = 2.0 * kmax if kmax > 0 else 2.0 * scale
    return _EXTENT[key]


def plot_bands(model, mu, path: Path):
    from crosswind.models import band_geometry
    from matplotlib.colors import SymLogNorm
    plt = _plt()
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
    ax.set_ylabel("energy (eV)")
    ax.set_title(f"{model.name}: bands coloured by Berry curvature")
    ax.legend(loc="best", fontsize=8)
    cb = fig.colorbar(sc, ax=ax, label="Ω (Å²)", ticks=[-vmax, -vmax * 1e-2, 0.0, vmax * 1e-2, vmax])
    cb.ax.set_yticklabels([f"{t:.2g}" for t in (-vmax, -vmax * 1e-2, 0.0, vmax * 1e-2, vmax)])
    from .response import neutral_filling
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
    from crosswind.models import band_geometry
    from crosswind.models.domain import Lattice
    from .occupation import fermi, thermal_energy
    from .response import neutral_filling
    plt = _plt()
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
    ax.set_xlabel("k_x (1/Å)")
    ax.set_ylabel("k_y (1/Å)")
    ax.set_title(f"curvature of added carriers, μ = {mu:.4g} eV, T = {temperature:g} K", fontsize=9)
    fig.colorbar(im, ax=ax, label="Σ_n (f − f_neutral) Ω_n (Å²)")
    fig.tight_layout()
    atomic_figure(fig, path, dpi=120)
    plt.close(fig)


def _bar_parts(ds, idx):
    from .device import rotate_chi
    ang = float(ds["current_angle"].values[idx["current_angle"]])
    out = {}
    for p in PARTS:
        chi = _point(ds, idx, f"chi_{p}")
        out[p] = complex(np.asarray(rotate_chi(chi, ang))[1, 0, 0])
    return out


def plot_responses(ds, idx, path: Path):
    plt = _plt()
    axes = [d for d in grid_axes(ds) if ds.sizes[d] > 1 and d != "current_angle"]
    if not axes:
        axes = [grid_axes(ds)[-2]]
    fig, axs = plt.subplots(3, len(axes), figsize=(4.2 * len(axes), 8), squeeze=False)
    for col, name in enumerate(axes):
        others = [d for d in grid_axes(ds) if d != name and ds.sizes[d] > 1 and d != "current_angle"]
        line_axis = others[0] if others and ds.sizes[others[0]] <= 6 else None
        line_vals = range(ds.sizes[line_axis]) if line_axis else [None]
        x = ds[name].values
        for li in line_vals:
            sel = {d: i for d, i in idx.items() if d != name}
            label = None
            if line_axis is not None:
                sel[line_axis] = li
                label = f"{line_axis} = {ds[line_axis].values[li]:g} {ds[line_axis].attrs.get('units', '')}"
            amp = ds["v2w_y_amplitude"].isel(sel).values * 1e9
            sxx = ds["sigma_bar"].isel(sel).values[..., 0, 0] / E2H
            chi = ds["chi_bar"].isel(sel).values[..., 1, 0, 0]
            axs[0, col].plot(x, amp, "o-", ms=3, label=label)
            axs[1, col].plot(x, sxx, "o-", ms=3, label=label)
            axs[2, col].plot(x, chi, "o-", ms=3, label=label)
        unit = ds[name].attrs.get("units", "")
        axs[2, col].set_xlabel(f"{name} ({unit})")
        axs[0, col].set_ylabel("|V_y^2ω| amplitude (nV)")
        axs[1, col].set_ylabel("σ'_xx (e²/h)")
        axs[2, col].set_ylabel("χ'_yxx (A m/V²)")
        if line_axis is not None:
            axs[0, col].legend(fontsize=7)
    fig.suptitle("responses at the peak conditions (other axes fixed there)", fontsize=10)
    fig.tight_layout()
    atomic_figure(fig, path, dpi=110)
    plt.close(fig)


def angle_scan(ds, idx, scn, angles_deg):
    from .device import HallBar, hall_bar
    sig, chi, chid = (_point(ds, idx, n) for n in ("sigma", "chi", "chi_dc"))
    A = len(angles_deg)
    bar = HallBar(scn.device.width_um, scn.device.length_um, scn.device.current_uA, scn.device.frequency_Hz)
    out = hall_bar(np.broadcast_to(sig, (A, 2, 2)), np.broadcast_to(chi, (A, 2, 2, 2)),
                   np.broadcast_to(chid, (A, 2, 2, 2)), bar, np.asarray(angles_deg, dtype=float))
    from .device import rotate_chi
    chib = np.asarray(rotate_chi(np.broadcast_to(chi, (A, 2, 2, 2)), np.asarray(angles_deg, dtype=float)))
    return np.asarray(out["v2w_y_amplitude"]), chib[:, 1, 0, 0].real


def plot_angle(ds, idx, scn, path: Path):
    plt = _plt()
    th = np.linspace(0, 360, 181)
    amp, chi = angle_scan(ds, idx, scn, th)
    fig, axs = plt.subplots(1, 2, subplot_kw={"projection": "polar"}, figsize=(9, 4.2))
    axs[0].plot(np.deg2rad(th), amp * 1e9)
    axs[0].set_title("|V_y^2ω| amplitude (nV) vs current angle", fontsize=9)
    axs[1].plot(np.deg2rad(th), np.abs(chi))
    axs[1].set_title("|χ'_yxx| (A m/V²) vs current angle", fontsize=9)
    fig.tight_layout()
    atomic_figure(fig, path, dpi=110)
    plt.close(fig)
    return th, amp


def scaling_axes(ds):
    cand = ["temperature"] + [d for d in grid_axes(ds) if d.startswith("tau")]
    return [d for d in cand if d in ds.dims and ds.sizes[d] > 1]


def plot_scaling(ds, idx, path: Path):
    plt = _plt()
    axes = scaling_axes(ds)
    if not axes:
        return False
    name = axes[0]
    carrier = [d for d in grid_axes(ds) if d in ("gate_voltage", "density_target", "chemical_potential")][0]
    fig, ax = plt.subplots(figsize=(5.5, 4.2))
    n = ds.sizes[carrier]
    picks = sorted(set(np.linspace(0, n - 1, min(n, 5)).round().astype(int)))
    for ci in picks:
        sel = {d: i for d, i in idx.items() if d not in (name, carrier)}
        sel[carrier] = ci
        sxx = ds["sigma_bar"].isel(sel).values[..., 0, 0]
        ratio = ds["nonlinear_ratio"].isel(sel).values
        ax.plot(sxx / E2H, ratio, "o-", ms=3,
                label=f"{carrier} = {ds[carrier].values[ci]:.3g} {ds[carrier].attrs.get('units', '')}")
    ax.set_xlabel(f"σ'_xx (e²/h), varied through {name}")
    ax.set_ylabel("E⊥/E∥² = χ'_yxx/σ'_yy (m/V)")
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
        if ds.sizes[d] > 1 or d == "current_angle":
            unit = ds[d].attrs.get("units", "")
            parts.append(f"{d} = {v:.4g} {unit if unit != '1' else ''}".rstrip())
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


def summary_markdown(ds, scn, idx, angle_info=None) -> str:
    num = json.loads(ds.attrs["numerics"])
    sel_pt = {d: i for d, i in idx.items() if d != "current_angle"}
    g = lambda name: ds[name].isel({d: i for d, i in idx.items() if d in ds[name].dims}).values
    amp, rms, phase = float(g("v2w_y_amplitude")), float(g("v2w_y_rms")), float(g("v2w_y_phase_deg"))
    mu = float(ds["mu"].isel(sel_pt).values)
    dens = float(ds["density"].isel(sel_pt).values) * 1e-4
    sbar = g("sigma_bar")
    parts = _bar_parts(ds, idx)
    total = sum(abs(v) for v in parts.values()) or 1.0
    dom = max(parts, key=lambda p: abs(parts[p]))
    chi = complex(g("chi_bar")[1, 0, 0])
    err_chi = float(np.max(ds["error_chi"].isel(sel_pt).values))
    chi_size = float(np.max(np.abs(_point(ds, idx, "chi")))) or 1.0
    err_sig = float(np.max(ds["error_sigma"].isel(sel_pt).values))
    sig_size = float(np.max(np.abs(_point(ds, idx, "sigma")))) or 1.0
    all_amp = ds["v2w_y_amplitude"].values
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
        f"The transverse 2ω voltage is largest at {_fmt_point(ds, idx)}: "
        f"**{amp * 1e9:.4g} nV amplitude ({rms * 1e9:.4g} nV rms on a lock-in)** for a drive "
        f"I(t) = {dev.current_uA:g} μA · sin ωt at {dev.frequency_Hz:g} Hz in a bar {dev.width_um:g} μm wide. "
        f"The lock-in phase relative to sin 2ωt is {phase:.1f}°. "
        f"There μ = {mu:.5g} eV and the carrier density is {dens:.4g} cm⁻² (relative to neutrality).",
        "",
        f"Over the whole sweep the amplitude ranges from {np.nanmin(all_amp) * 1e9:.4g} nV to "
        f"{np.nanmax(all_amp) * 1e9:.4g} nV ({all_amp.size} grid points).",
        "",
        f"At the peak: σ'_xx = {sbar[0, 0]:.4g} S ({sbar[0, 0] / E2H:.4g} e²/h), σ'_yy = {sbar[1, 1]:.4g} S, "
        f"Hall angle tan θ_H = {float(g('hall_angle')):.3g}, χ'_yxx = {chi.real:.4g} A·m/V², "
        f"E⊥/E∥² = {float(g('nonlinear_ratio')):.4g} m/V, longitudinal voltage |V_xx| = {vxx * 1e3:.4g} mV "
        f"over L = {dev.length_um:g} μm, rectified transverse voltage {float(g('vdc_y')) * 1e9:.4g} nV.",
        "",
        "## Which mechanism dominates",
        "",
        f"At the peak the **{PART_NAMES[dom]}** term is the largest part of χ'_yxx:",
        "",
        "| part | χ'_yxx (A·m/V²) | share of Σ|parts| |",
        "|---|---|---|",
    ]
    for p in PARTS:
        lines.append(f"| {PART_NAMES[p]} | {parts[p].real:.4g} | {abs(parts[p]) / total:.3f} |")
    if angle_info is not None:
        th, a = angle_info
        lines += ["", f"Rotating the current (no new k-space work), |V_y^2ω| is largest at θ = "
                      f"{th[int(np.argmax(a))]:.0f}° ({np.max(a) * 1e9:.4g} nV) and smallest at θ = "
                      f"{th[int(np.argmin(a))]:.0f}° ({np.min(a) * 1e9:.3g} nV) from the crystal x axis."]
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
        "",
        "## Cautions",
        "",
        f"- Current heating: the drive is {jd:.3g} A/m of sheet current and dissipates {pd:.3g} W/m² "
        f"(time average) at the peak point; at low temperature this can heat the electrons above the bath — "
        "check that V_2ω scales as I² before trusting a number.",
    ]
    if scn.carrier == "gate_V":
        vmax = float(np.max(np.abs(np.asarray(scn.axis("gate_voltage").values) - dev.gate_offset_V)))
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
        from crosswind.models import catalogue
        e = catalogue()[scn.material.model]
        return f"{e.summary}; source: {e.source}."
    return f"tight-binding model from {scn.material.tight_binding.name}."


def write_report(ds, scn, folder) -> list:
    """Write the figures and ``summary.md`` to ``folder``; returns the written paths."""
    folder = Path(folder)
    idx = peak_index(ds)
    written = []
    angle_info = None
    if scn.figures:
        model = _model_at(scn, ds, idx)
        sel = {d: i for d, i in idx.items() if d != "current_angle"}
        mu = float(ds["mu"].isel(sel).values)
        T = float(ds["temperature"].values[idx["temperature"]])
        plot_bands(model, mu, folder / "bands.png")
        plot_curvature_map(model, mu, max(T, 0.0), folder / "curvature_map.png")
        plot_responses(ds, idx, folder / "responses.png")
        angle_info = plot_angle(ds, idx, scn, folder / "angle.png")
        written += [folder / n for n in ("bands.png", "curvature_map.png", "responses.png", "angle.png")]
        if plot_scaling(ds, idx, folder / "scaling.png"):
            written.append(folder / "scaling.png")
    else:
        th = np.linspace(0, 360, 181)
        angle_info = (th, angle_scan(ds, idx, scn, th)[0])
    text = summary_markdown(ds, scn, idx, angle_info)
    atomic_text(folder / "summary.md", text)
    written.append(folder / "summary.md")
    return written


__all__ = ["write_report", "summary_markdown", "peak_index", "angle_scan"]
