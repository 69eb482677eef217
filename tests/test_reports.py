"""Reports a device physicist can trust (issue 11): numbers compared with their error estimates and
a symmetry-aware zero floor, symmetry-forbidden headlines, readable labels, full validation sources,
visible progress and help texts with formulas and units."""
import types

import jax
import numpy as np
import pytest

import crosswind.validation
from crosswind.solver.cli import main
from crosswind.solver.reporting.plotting import pyplot

BILAYER = """
[material]
model = "bilayer-graphene"

[material.parameters]
asymmetry = 0.05            # gapped by a displacement field, no strain

[device]
width_um = 5.0
length_um = 10.0
current_uA = 10.0
dielectric_nm = 285.0
permittivity = 3.9

[conditions]
gate_V = [5.0, 40.0]
temperature_K = 10.0
tau_fs = 100.0

[numerics]
resolution = 1
density_resolution = 1

[output]
folder = "out"
figures = false
"""


@pytest.fixture(scope="module")
def bilayer(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("blg")
    p = tmp / "blg.toml"
    p.write_text(BILAYER, encoding="utf-8")
    import contextlib
    import io
    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        assert main(["run", str(p), "--output", str(tmp / "out"), "--no-progress"]) == 0
    return (tmp / "out" / "summary.md").read_text(encoding="utf-8"), buf.getvalue(), tmp / "out"


def _demo_small():
    """The demo scenario (strained MoS2, automatic resolution) at one temperature and two gates."""
    from crosswind.solver.demo import SCENARIO
    text = SCENARIO.replace("gate_V = {start = 6.0, stop = 60.0, num = 12}", "gate_V = [6.0, 60.0]")
    text = text.replace("temperature_K = [10.0, 60.0, 150.0]", "temperature_K = 150.0")
    assert text != SCENARIO and "temperature_K = 150.0" in text
    return text.replace('folder = "crosswind-demo"', 'folder = "demo"\nfigures = false')


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("demo")
    p = tmp / "demo.toml"
    p.write_text(_demo_small(), encoding="utf-8")
    import contextlib
    import io
    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        assert main(["run", str(p), "--no-progress"]) == 0
    return (tmp / "demo" / "summary.md").read_text(encoding="utf-8"), buf.getvalue(), tmp / "demo"


def _section(summary, title):
    return summary.split(f"## {title}")[1].split("\n## ")[0]


# ------------------------------------------------------------------ item 1: noise is not a result --
def test_symmetry_check_on_catalogue_models():
    """Unstrained gapped bilayer graphene: T (valley pair) and C3; strain along x removes C3 from the
    TMD model; the Haldane model breaks T (Haldane, PRL 61, 2015 (1988))."""
    from crosswind.models import build
    from crosswind.solver.reporting.report import forbidden_parts, model_symmetries
    blg = model_symmetries(build("bilayer-graphene", asymmetry=0.05))
    assert blg["T"] and blg["C3"] and not blg["C2"]
    assert set(forbidden_parts(blg)) == {"dipole", "drude", "intrinsic"}
    strained = model_symmetries(build("tmd", material="MoS2", strain_xx=0.01, strain_yy=-0.0025))
    assert strained["T"] and not strained["C3"] and not strained["C2"]
    assert set(forbidden_parts(strained)) == {"drude", "intrinsic"}
    assert not model_symmetries(build("haldane"))["T"]


def test_symmetry_forbidden_bilayer_headline(bilayer):
    """Unstrained gapped bilayer graphene: the 2ω signal is forbidden (time reversal removes the
    Drude and intrinsic terms, C3 the dipole; Sodemann & Fu, PRL 115, 216806 (2015)).  The summary
    used to headline "8.8e-12 nV", call the Drude term dominant and name a largest-signal angle."""
    summary, stdout, _ = bilayer
    head = _section(summary, "Where the second-harmonic signal peaks")
    assert "**No 2ω transverse signal: it vanishes by symmetry.**" in head
    assert "time reversal" in head and "C3 rotation" in head and "Sodemann & Fu" in head
    assert "What would allow a signal:" in head and "strain" in head
    assert "zero within error (|V_y^2ω| <" in head
    assert "nV amplitude" not in head and "largest at" not in summary and "smallest at" not in summary
    mech = _section(summary, "Which mechanism dominates")
    assert "No mechanism can be named" in mech and "largest resolved part" not in mech
    assert "0 by C3 rotation" in mech and mech.count("0 by time reversal") == 2
    assert "share" in mech and "0.5" not in mech.split("|---|---|---|")[1]
    assert "no direction is singled out" in summary
    assert "χ'_yxx = zero within error" in head and "tan θ_H = zero within error" in head
    assert "Zero rule:" in summary and "1e-06" in summary
    assert "vanishes by symmetry" in stdout                # the CLI line says it too


def test_demo_noise_reads_zero_within_error(demo):
    """Demo scenario: the dipole signal is resolved; the minimum-angle line ("smallest at θ = 270°
    (5.42e-12 nV)") and "tan θ_H = −2.33e-16" were noise and must read as zero within error; the
    Drude and intrinsic parts vanish by time reversal (docs/theory.md §5.6)."""
    summary, stdout, _ = demo
    head = _section(summary, "Where the second-harmonic signal peaks")
    assert "nV amplitude" in head and "**" in head and "vanishes by symmetry" not in head
    assert "tan θ_H = zero within error (|σ'_xy| <" in head
    assert "smallest at θ" not in summary
    assert "falls to zero within error" in summary and "no direction of smallest signal" in summary
    assert "largest at θ = 0°" in summary
    mech = _section(summary, "Which mechanism dominates")
    assert "**Berry-curvature dipole (∝ τ)** term is the largest resolved part" in mech
    assert mech.count("0 by time reversal") == 2
    assert "2ω" in stdout and "nV" in stdout


def test_zero_rule_units():
    from crosswind.solver.reporting.report import fmt_volts, is_resolved, zero_bound
    assert zero_bound(np.nan, 2.0) == pytest.approx(2e-6)
    assert zero_bound(1e-3, 2.0) == pytest.approx(1e-3)
    assert not is_resolved(1e-7, np.nan, 1.0) and is_resolved(1e-5, np.nan, 1.0)
    assert not is_resolved(5e-4, 1e-3, 1.0)
    assert fmt_volts(23.47e-9) == "23.47 nV" and fmt_volts(4.0e-3) == "4 mV" and fmt_volts(2e-6) == "2 μV"
    # an infinite error estimate (unresolved thermal window) is never turned into a finite bound
    from crosswind.solver.reporting.report import _zero
    assert zero_bound(np.inf, 1.0) == np.inf and not is_resolved(1.0, np.inf, 1.0)
    assert _zero(np.inf, fmt_volts).startswith("not resolved")


# ------------------------------------------------------------------ item 6: validate shows sources in full --
def _fake_validation(monkeypatch, seen=None):
    """Rows with the real cases' sources (no k-space work); the fake calls the progress callback."""

    from crosswind.validation import load_cases
    rows = [{"case": c["name"], "source": c["source"], "expected": 1.0, "computed": 1.0, "tolerance": "rtol 0.001",
             "passed": True} for c in load_cases()]

    def run_cases(names=None, progress=None):
        for i, r in enumerate(rows, 1):
            if progress:
                progress(i, len(rows), r["case"], None)
                progress(i, len(rows), r["case"], 0.5)
        return rows
    monkeypatch.setattr(crosswind.validation, "run_cases", run_cases)
    return rows


def test_validate_prints_every_source_in_full(monkeypatch, capsys, tmp_path):
    """The source column used to be cut at 48 characters ("…(2007); physics-r"): wrapped at word
    boundaries to the terminal width instead; --wide keeps one line per case; --markdown writes a file."""
    rows = _fake_validation(monkeypatch)
    assert max(len(r["source"]) for r in rows) > 100
    monkeypatch.setenv("COLUMNS", "110")
    assert main(["validate", "--no-progress"]) == 0
    out = capsys.readouterr().out
    tokens = set(out.split())
    for r in rows:
        assert all(word in tokens for word in r["source"].split()), r["source"]
    assert max(len(line) for line in out.splitlines()) <= 110
    assert main(["validate", "--wide", "--no-progress", "--markdown", str(tmp_path / "v.md")]) == 0
    out = capsys.readouterr().out
    assert all(r["source"] in out for r in rows)
    md = (tmp_path / "v.md").read_text(encoding="utf-8")
    assert md.startswith("| case | source |") and all(r["source"].replace("|", "\\|") in md for r in rows)


# ------------------------------------------------------------------ item 5: visible progress --
def test_validate_reports_progress_per_case(monkeypatch, capsys):
    rows = _fake_validation(monkeypatch)
    assert main(["validate"]) == 0
    err = capsys.readouterr().err
    assert f"validation case 1/{len(rows)}: {rows[0]['case']}" in err
    assert f"validation case {len(rows)}/{len(rows)}: {rows[-1]['case']} done in 0.5 s" in err


def test_run_cases_calls_progress_around_each_case():
    from crosswind.validation import run_cases
    calls = []
    rows = run_cases(names=["dirac-density"], progress=lambda *a: calls.append(a))
    assert len(rows) == 1 and rows[0]["passed"]
    assert calls[0] == (1, 1, "dirac-density", None) and calls[1][:3] == (1, 1, "dirac-density")
    assert calls[1][3] >= 0.0


def test_run_shows_compile_phase_estimate_and_report_phase(tmp_path, monkeypatch, capsys):
    """The first batch used to sit silent while compiling, and figure writing was silent: a phase
    line names the model, the plain progress lines give an estimate after the first batch."""
    import sys

    from test_scenario import GOOD
    monkeypatch.setitem(sys.modules, "tqdm", None)          # the plain progress lines (no bar)
    p = tmp_path / "s.toml"
    p.write_text(GOOD.replace("resolution = 0", "resolution = 0\nbatch_points = 2"), encoding="utf-8")
    assert main(["run", str(p)]) == 0
    err = capsys.readouterr().err
    assert "crosswind: compiling the k-space kernels for massive-dirac (first run only" in err
    assert "crosswind: batch 1/2, at most about" in err and "s left (the first batch included compiling)" in err
    assert "crosswind: writing summary…" in err
    assert err.index("compiling") < err.index("batch 1/2") < err.index("writing summary")


def test_fit_reports_each_iteration_with_cost_and_values():
    """crosswind fit used to be silent for minutes: fit(progress=...) gets one line per iteration
    (or per evaluation with an old SciPy) naming the start, the cost and the parameter values."""
    import jax.numpy as jnp

    from crosswind.solver.fitting.fit import fit
    lines = []
    x = jnp.linspace(0.0, 1.0, 8)
    res = fit(lambda p: p["a"] * jnp.exp(p["b"] * x) - 2.0 * jnp.exp(-0.5 * x), {"a": 1.0, "b": 0.3},
              progress=lines.append, starts=2)
    assert res.converged and abs(res.values["a"] - 2.0) < 1e-6
    assert lines and lines[0].startswith("start 1/2, ") and any(s.startswith("start 2/2, ") for s in lines)
    assert all(": cost " in s and "a = " in s and "b = " in s for s in lines)
    assert ("iteration 1:" in lines[0]) or ("evaluation 1:" in lines[0])


def test_fit_command_prints_progress(tmp_path, monkeypatch, capsys):
    from test_fit_cli import FIT

    from crosswind.solver.fitting import scenario_fit

    def fake_run_fit(scn, data, folder, starts=None, progress=None, client=None):
        if progress is not None:
            progress("start 1/1, iteration 1: cost 3.2, tilt = 3.5e+04")
        return types.SimpleNamespace(status="ok", scaling=False)
    monkeypatch.setattr(scenario_fit, "run_fit", fake_run_fit)
    p = tmp_path / "f.toml"
    p.write_text(FIT, encoding="utf-8")
    (tmp_path / "d.csv").write_text("mu [eV], V2w [nV]\n0.1, 1\n", encoding="utf-8")
    assert main(["fit", str(p), "--data", str(tmp_path / "d.csv"), "--output", str(tmp_path / "o"), "--progress"]) == 0
    err = capsys.readouterr().err
    assert "crosswind: fit start 1/1, iteration 1: cost 3.2, tilt = 3.5e+04" in err


# ------------------------------------------------------------------ item 4: help() shows formulas and units --
def test_help_of_public_functions_shows_formulas_units_and_contract():
    """help(response) used to say "see the module docstring": the functions' own docstrings now
    carry the formulas, units and the real/complex contract, and the contract holds."""
    import pydoc

    import numpy as np

    from crosswind.models import band_geometry, build
    from crosswind.solver import response, sensitivities
    text = lambda f: pydoc.render_doc(f, renderer=pydoc.plaintext)
    r = text(response)
    assert "χ" in r and "A·m/V²" in r and "σ^D_ab = q²∫[dk] F τ̃_ω v_a v_b" in r and "Sodemann & Fu" in r
    assert "dc quantities are real" in r and "complex" in r
    g = text(band_geometry)
    assert "Ω_n = −2 Im" in g and "[Å²]" in g and "[eV/T]" in g and "[Å²/eV]" in g
    b = text(build)
    assert "eV" in b and "1/Å" in b and "H = " in b and "half the gap" in b
    s = text(sensitivities)
    assert "∂F/∂x" in s and "(field unit) / (input unit)" in s and "A·m/V²" in s
    # the stated contract: dc fields real, phasor coefficients complex with zero imaginary part at ω = 0
    res = response(build("massive-dirac", tilt=5e4), mu=0.15, temperature=20.0, tau=100.0, resolution=1)
    for f in ("density", "dos", "dipole", "dipole_sea", "sigma_lorentz", "hall_coefficient", "seebeck",
              "thermal_conductivity", "lorenz", "nernst"):
        assert not np.iscomplexobj(np.asarray(getattr(res, f))), f
    for f in ("sigma", "sigma_drude", "sigma_anomalous", "chi", "chi_dc"):
        v = np.asarray(getattr(res, f))
        assert np.iscomplexobj(v) and np.all(v.imag == 0.0), f
    assert all(not np.iscomplexobj(np.asarray(v)) for v in jax.tree_util.tree_leaves(res.error))


# ------------------------------------------------------------------ item 9: labels read like physics --
def test_figure_labels_are_typeset_with_units_and_prefixes(demo, monkeypatch):
    """Labels used to read "|V_y^2ω|", "gate_V (V)", "σ'_xx (e²/h)" with bare 1e-16 multipliers
    and unexplained primes: units in brackets, engineering prefixes, the bar frame explained."""
    from crosswind.solver.demo import SCENARIO
    from crosswind.solver.reporting import report
    from crosswind.solver.study.scenario import parse_scenario
    from crosswind.solver.study.sweep import open_results
    figs = {}
    monkeypatch.setattr(report, "atomic_figure", lambda fig, path, dpi=None: figs.__setitem__(path.name, fig))
    monkeypatch.setattr(pyplot(), "close", lambda fig: None)
    ds = open_results(demo[2])
    scn = parse_scenario(SCENARIO, source="<built-in demo>", base=demo[2])
    idx = report.peak_index(ds)
    info = report.resolution_info(ds, scn, idx)
    report.plot_responses(ds, idx, demo[2] / "responses.png", info)
    report.plot_angle(ds, idx, scn, demo[2] / "angle.png", info)
    fig = figs["responses.png"]
    labels = [a.get_ylabel() for a in fig.axes] + [a.get_xlabel() for a in fig.axes if a.get_xlabel()]
    assert "gate voltage [V]" in labels
    assert any(lab.endswith("amplitude [nV]") and "2\\omega" in lab for lab in labels)
    assert any(lab == "$\\sigma'_{xx}$ [μS]" for lab in labels)
    assert all("_" not in lab for lab in labels if "$" not in lab)      # no identifiers outside math text
    assert "gate_V" not in " ".join(labels) and all("(" not in lab for lab in labels)
    for a in fig.axes:            # no bare "1e-16" multiplier above an axis
        a.figure.canvas.draw()
        assert a.yaxis.get_offset_text().get_text() == ""
    assert "bar frame" in fig._suptitle.get_text()
    texts = " ".join(t.get_text() for t in figs["angle.png"].texts)
    assert "bar frame" in texts
    angle_titles = [a.get_title() for a in figs["angle.png"].axes]
    assert any("[nV]" in t for t in angle_titles) and any("sign" in t for t in angle_titles)
    assert len(figs["angle.png"].axes[0].get_yticks()) <= 5        # radial ticks do not crowd


# ------------------------------------------------------------------ band figure colours --
def _capture(monkeypatch):
    from crosswind.solver.reporting import report
    figs = {}
    monkeypatch.setattr(report, "atomic_figure", lambda fig, path, dpi=None: figs.__setitem__(path.name, fig))
    monkeypatch.setattr(pyplot(), "close", lambda fig: None)
    return figs


def _panels(fig):
    """(axes, offsets, colour values) of every panel holding the band scatter."""
    from matplotlib.collections import PathCollection
    out = []
    for ax in fig.axes:
        cols = [c for c in ax.collections if isinstance(c, PathCollection) and c.get_array() is not None]
        if cols:
            out.append((ax, np.asarray(cols[0].get_offsets()), np.asarray(cols[0].get_array())))
    return out


def test_merge_coincident_sums_curvature_of_degenerate_partners():
    from crosswind.solver.reporting.report import merge_coincident
    e = np.array([[-1.0, 0.5, 0.5 + 1e-9, 2.0], [-1.0, 0.4, 0.6, 2.0]])
    om = np.array([[1.0, 3.0, -3.0, 0.5], [1.0, 3.0, -3.0, 0.5]])
    k, en, s, n = merge_coincident(e, om, tol=1e-6)
    assert list(k) == [0, 0, 0, 1, 1, 1, 1] and list(n) == [1, 2, 1, 1, 1, 1, 1]
    assert s[1] == 0.0 and en[1] == pytest.approx(0.5) and list(s[3:]) == [1.0, 3.0, -3.0, 0.5]


def test_band_figure_two_valley_model_has_no_colour_flip(monkeypatch, tmp_path):
    """massive-dirac with valleys = 2: K and K' fold onto one k origin with opposite Ω (Xiao, Yao, Niu,
    PRL 99, 236809 (2007)); drawn on top of each other the colour flipped with the drawing order.  Now
    one panel per valley block, each with its own curvature (the single-valley model's Ω, and −Ω)."""
    from crosswind.models import band_geometry, build
    from crosswind.solver.reporting import report
    figs = _capture(monkeypatch)
    two, one = build("massive-dirac", valleys=2), build("massive-dirac", valleys=1)
    report.plot_bands(two, 0.15, tmp_path / "bands.png")
    panels = _panels(figs["bands.png"])
    assert len(panels) == 2
    k = report._band_path(two, 0.15)[0]
    om = np.asarray(band_geometry(one, k).berry_curvature).ravel()
    for (_, off, col), sign in zip(panels, (1.0, -1.0)):
        assert len(np.unique(off, axis=0)) == len(off)          # one colour per drawn point
        assert np.allclose(col, sign * om, rtol=1e-10, atol=1e-12 * np.max(np.abs(om)))
    fig = figs["bands.png"]
    cbar = fig.axes[-1].get_ylabel()
    assert "Berry curvature Ω [Å²]" in cbar and "symmetric log scale" in cbar
    labels = [t.get_text() for t in panels[0][0].get_xticklabels()]
    assert "[1/Å]" in panels[-1][0].get_xlabel() and any("(0, 0)" in t for t in labels)
    assert "One panel per block" in " ".join(t.get_text() for t in fig.texts)


def _qwz_pair(blocks):
    """Qi–Wu–Zhang square-lattice Chern model (Qi, Wu, Zhang, PRB 74, 085308 (2006)) and, with
    ``blocks = 2``, its time-reversed partner H(−k)*: identical bands, opposite curvature."""
    import jax.numpy as jnp

    from crosswind.models import from_function
    from crosswind.models.domain import Lattice
    sx = jnp.array([[0, 1], [1, 0]], dtype=jnp.complex128)
    sy = jnp.array([[0, -1j], [1j, 0]], dtype=jnp.complex128)
    sz = jnp.array([[1, 0], [0, -1]], dtype=jnp.complex128)

    def h(k, p):
        c = lambda x: jnp.asarray(x).astype(jnp.complex128)
        dz = c(p["m"] + jnp.cos(k[0]) + jnp.cos(k[1]))
        hk = c(jnp.sin(k[0])) * sx + c(jnp.sin(k[1])) * sy + dz * sz
        partner = -c(jnp.sin(k[0])) * sx + c(jnp.sin(k[1])) * sy + dz * sz
        return jnp.stack([hk, partner][:blocks])
    lat = Lattice(vectors=((1.0, 0.0), (0.0, 1.0)), positions=((0.0, 0.0), (0.0, 0.0)))
    return from_function(h, parameters={"m": (1.0, "eV", "mass")}, domain=lat)


def test_band_figure_draws_coincident_lattice_bands_once_with_summed_curvature(monkeypatch, tmp_path):
    from crosswind.models import band_geometry
    from crosswind.solver.reporting import report
    figs = _capture(monkeypatch)
    pair, single = _qwz_pair(2), _qwz_pair(1)
    k = report._band_path(single, 0.5)[0]
    om = np.asarray(band_geometry(single, k).berry_curvature)
    report.plot_bands(single, 0.5, tmp_path / "one.png")
    (_, off1, col1), = _panels(figs["one.png"])
    assert np.allclose(col1, om.ravel())                     # one block: its own curvature
    report.plot_bands(pair, 0.5, tmp_path / "bands.png")
    (ax, off, col), = _panels(figs["bands.png"])
    assert len(off) == len(off1) and len(np.unique(off, axis=0)) == len(off)   # each pair drawn once ...
    assert np.max(np.abs(col)) <= 1e-9 * np.max(np.abs(om))                     # ... with Ω + (−Ω) = 0
    labels = [t.get_text() for t in ax.get_xticklabels()]
    assert labels[0] == "Γ\n(0, 0)" and labels[1] == "M\n(3.14, 0)" and labels[2].startswith("corner\n(3.14, 3.14")
    assert ax.get_xlabel() == "distance along Γ–M–corner–Γ [1/Å]"
    text = " ".join(t.get_text() for t in figs["bands.png"].texts)
    assert "drawn once, coloured by their summed curvature" in text and "cancel" in text


# ------------------------------------------------------------------ scaling figure --
def _scaling_dataset(C=(1.0e-12, 4.0e-14, -1.5e-15), n_t=4):
    """A dataset of three densities whose E⊥/E∥² follows C0 + C1σ + C2σ² exactly (σ in e²/h) as the
    temperature changes σ; integration errors 1e-9 relative."""
    import xarray as xr

    from crosswind.solver.reporting.report import E2H
    T, mu = np.linspace(10, 160, n_t), np.array([0.12, 0.14, 0.16])
    s = (3.0 + 40 * (mu[None, :] - 0.1)) * (1.0 + 2.0 * (160 - T[:, None]) / 150)       # e²/h
    ratio = C[0] + C[1] * s + C[2] * s * s
    sig = np.zeros(s.shape + (2, 2))
    sig[..., 0, 0] = sig[..., 1, 1] = s * E2H
    chi = np.zeros(s.shape + (2, 2, 2))
    chi[..., 1, 0, 0] = ratio * s * E2H
    add = lambda a, n: a[:, None, :, None] if n == 0 else a[:, None, :, None, ...]
    ds = xr.Dataset({
        "v2w_y_amplitude": (("temperature_K", "tau_fs", "mu_eV", "current_angle_deg"),
                            add(1e-8 / s, 0)),
        "nonlinear_ratio": (("temperature_K", "tau_fs", "mu_eV", "current_angle_deg"), add(ratio, 0)),
        "sigma_bar": (("temperature_K", "tau_fs", "mu_eV", "current_angle_deg", "i", "j"), add(sig, 1)),
        "chi_bar": (("temperature_K", "tau_fs", "mu_eV", "current_angle_deg", "i", "j", "k"), add(chi, 1)),
        "error_sigma": (("temperature_K", "tau_fs", "mu_eV", "i", "j"), 1e-9 * sig[:, None]),
        "error_chi": (("temperature_K", "tau_fs", "mu_eV", "i", "j", "k"), 1e-9 * np.abs(chi[:, None])),
    }, coords={"temperature_K": ("temperature_K", T, {"units": "K", "long_name": "temperature"}),
               "tau_fs": ("tau_fs", [100.0], {"units": "fs", "long_name": "relaxation time"}),
               "mu_eV": ("mu_eV", mu, {"units": "eV", "long_name": "chemical potential"}),
               "current_angle_deg": ("current_angle_deg", [0.0], {"units": "deg"})})
    return ds, s, ratio


def test_scaling_coefficients_weighted_exact_and_degenerate():
    """E⊥/E∥² = C0 + C1σ + C2σ² (Du, Wang, Li, Lu, Xie, Nat. Commun. 10, 3047 (2019))."""
    from crosswind.solver.reporting.report import scaling_coefficients
    x = np.array([1.0, 2.0, 4.0, 7.0])
    y = 2.0 + 0.5 * x - 0.1 * x * x
    c, e, how = scaling_coefficients(x, y, np.full(4, 1e-3))
    assert how == "error estimates" and np.allclose(c, [2.0, 0.5, -0.1], rtol=1e-10)
    # absolute weights: the covariance is (AᵀWA)⁻¹ (independent of the residuals)
    A = np.stack([np.ones(4), x, x * x], 1) / 1e-3
    assert np.allclose(e, np.sqrt(np.diag(np.linalg.inv(A.T @ A))), rtol=1e-8)
    c3, e3, how3 = scaling_coefficients(x[:3], y[:3], np.full(3, np.nan))
    assert how3 is None and np.allclose(c3, [2.0, 0.5, -0.1]) and np.all(np.isnan(e3))
    assert scaling_coefficients(np.ones(4), y)[2] == "degenerate"


def test_scaling_figure_draws_the_fit_labels_every_series_and_starts_at_zero(monkeypatch, tmp_path):
    """The scaling figure used to promise C0 + C1σ + C2σ² without drawing a fit, label 5 of 12 series
    and zoom its y axis so that an 8 % drift looked like strong scaling."""
    import re as _re

    from crosswind.solver.reporting import report
    figs = _capture(monkeypatch)
    ds, s, ratio = _scaling_dataset()
    idx = report.peak_index(ds)
    assert report.plot_scaling(ds, idx, tmp_path / "scaling.png")
    fig = figs["scaling.png"]
    ax, cax = fig.axes
    fits = [ln for ln in ax.get_lines() if ln.get_gid() == "scaling-fit"]
    assert len(fits) == 3                                           # one fit per density
    assert cax.get_ylabel() == "chemical potential [eV]"            # every series labelled by the colour bar
    lo, hi = ax.get_ylim()
    assert lo <= 0.0 < hi                                           # a flat line looks flat
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    peak_mu = float(ds["mu_eV"].values[idx["mu_eV"]])
    assert legend[0].startswith(f"fit at chemical potential = {peak_mu:.3g} eV (peak")
    got = [float(_re.search(rf"C{j} = \(([-0-9.e+]+) ± ", legend[j + 1]).group(1)) for j in range(3)]
    assert got == pytest.approx([1.0, 0.04, -0.0015], rel=1e-3)     # pm/V, pm/V per e²/h, per (e²/h)²
    assert "pm/V per (e²/h)²" in legend[3]
    change = np.max(np.ptp(ratio, axis=0) / np.max(np.abs(ratio), axis=0))
    caption = " ".join(t.get_text() for t in fig.texts).replace("\n", " ")
    assert f"largest relative change of E⊥/E∥² within one chemical potential series: {change:.1%}" in caption
    assert "Du, Wang, Li, Lu, Xie, Nat. Commun. 10, 3047 (2019)" in caption
    assert "integration-error estimates" in caption


# ------------------------------------------------------------------ k·p validity in the summary --
def test_summary_states_results_outside_the_kp_validity_window():
    """μ beyond the energies a k·p model reaches within |k|a ≤ 1 (here massive-dirac, a = 3.2 Å by
    default: ±1.14 eV) is flagged, and the peak point outside the window gets a warning first."""
    import xarray as xr

    from crosswind.models import build
    from crosswind.solver.reporting.report import _validity_lines
    model = build("massive-dirac", velocity=5e5, tilt=5e4, mass=0.1, valleys=2)
    ds = xr.Dataset({"mu": (("mu_eV",), np.array([0.13, 1.5]))})
    top, assumed, cautions = _validity_lines(ds, {"mu_eV": 0}, model, "massive-dirac")
    assert top == [] and assumed == []
    assert cautions[0].startswith("- **Outside the model's validity window**: μ at 1 of 2 grid points "
                                  "(up to μ = 1.5 eV)")
    assert "results there extrapolate the k·p model beyond its validity" in cautions[0]
    top, _, _ = _validity_lines(ds, {"mu_eV": 1}, model, "massive-dirac")
    assert top[0].startswith("> **WARNING: the peak point lies outside the validity window of the k·p model**")
    inside = xr.Dataset({"mu": (("mu_eV",), np.array([0.13, 0.15]))})
    top, assumed, cautions = _validity_lines(inside, {"mu_eV": 0}, model, "massive-dirac")
    assert top == [] == cautions and assumed[0].startswith("- k·p validity: every μ of the sweep (0.13 … 0.15 eV)")


def test_demo_summary_says_the_kp_model_is_used_inside_its_window(demo):
    summary = demo[0]
    assert "- k·p validity: every μ of the sweep" in _section(summary, "Assumptions")
    assert "Outside the model's validity window" not in summary and "Scenario check" not in summary


def test_measurability_figure_shows_signal_noise_and_artefacts(tmp_path, monkeypatch):
    """measurability.png: the signal beside its noise floor, the SNR = 10 line and each artefact."""
    import xarray as xr

    from crosswind.solver.reporting import report as rep
    figs = {}
    monkeypatch.setattr(rep, "atomic_figure", lambda fig, path, dpi=None: figs.__setitem__(path.name, fig))
    monkeypatch.setattr(pyplot(), "close", lambda fig: None)
    gates = np.linspace(5.0, 50.0, 5)
    dims = ("gate_V", "current_angle_deg")
    sig = np.linspace(1e-9, 2e-8, 5)[:, None]
    ds = xr.Dataset({"v2w_y_amplitude": (dims, sig * np.sqrt(2)), "v2w_y_rms": (dims, sig),
                     "noise_y_rms": (dims, np.full((5, 1), 3e-9)), "pickup_v2w_y": (dims, np.full((5, 1), 1e-12)),
                     "thermoelectric_v2w_y": (dims, np.full((5, 1), np.nan))},
                    coords={"gate_V": ("gate_V", gates, {"units": "V", "long_name": "gate voltage"}),
                            "current_angle_deg": ("current_angle_deg", [0.0], {"units": "deg"})})
    assert rep.plot_measurability(ds, {"gate_V": 4, "current_angle_deg": 0}, tmp_path / "measurability.png")
    ax = figs["measurability.png"].axes[0]
    labels = [line.get_label() for line in ax.get_lines()]
    assert any("signal" in lab for lab in labels) and "SNR = 10" in labels
    assert any("noise" in lab for lab in labels) and any("pickup" in lab for lab in labels)
    assert not any("thermoelectric" in lab for lab in labels)      # NaN estimate: not drawn
    assert ax.get_yscale() == "log" and "gate voltage" in ax.get_xlabel()
    noise = next(line for line in ax.get_lines() if "noise" in line.get_label())
    np.testing.assert_allclose(noise.get_ydata(), 3e-9)
    assert not rep.plot_measurability(ds.drop_vars("noise_y_rms"), {"gate_V": 4, "current_angle_deg": 0},
                                      tmp_path / "m2.png")
