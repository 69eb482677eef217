"""Bad inputs must never give a silent wrong answer (issue 10): every probe below once returned
NaN/zero results without complaint or ended in a raw traceback; each now gives a clear error
naming the argument (or file entry) and the fix.  Error paths only: nothing here integrates."""
import math
import os

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from crosswind.models import build
from crosswind.models.custom import from_function, sample_k, sample_points
from crosswind.models.domain import Continuum, Lattice
from crosswind.models.tightbinding import TightBindingFileError, parse_tight_binding
from crosswind.solver import ConstantTau, MatthiessenTau, PowerLawTau, response
from crosswind.solver.study import sweep as run_mod
from crosswind.solver.study.scenario import ScenarioError, parse_scenario
from crosswind.solver.study.sweep import RunError, run_scenario

DIRAC = {"velocity": 5e5, "mass": 0.1, "tilt": 5e4}
NAN, INF = math.nan, math.inf


@pytest.fixture(scope="module")
def dirac():
    return build("massive-dirac", **DIRAC)


# ------------------------------------------------------------------ response arguments -------
@pytest.mark.parametrize("kw, match", [
    ({"mu": NAN}, r"response: mu must be finite \(eV\); got nan\. Pass chemical potentials in eV"),
    ({"mu": [0.1, INF]}, r"response: mu must be finite \(eV\); got inf at index \(1,\)"),
    ({"temperature": NAN}, r"response: temperature must be finite \(K\); got nan\. Pass temperatures in K"),
    ({"temperature": INF}, r"response: temperature must be finite \(K\); got inf"),
    ({"temperature": [5.0, -1.0]}, r"response: temperature must be >= 0 K; got -1 at index \(1,\)"),
    ({"tau": NAN}, (r"response: tau must be positive \(fs\) and finite; ConstantTau has tau = nan\. "
                    r"Pass relaxation times in fs")),
    ({"tau": [100.0, INF]}, r"ConstantTau has tau = inf at index \(1,\)"),
    ({"tau": MatthiessenTau(tau_impurity=100.0, tau_phonon=NAN)}, r"MatthiessenTau has tau_phonon = nan"),
    ({"tau": PowerLawTau(tau0=INF)}, r"PowerLawTau has tau0 = inf"),
    ({"frequency": NAN}, r"response: frequency must be finite \(Hz\); got nan\. Pass the drive frequency in Hz"),
    ({"frequency": INF}, r"response: frequency must be finite \(Hz\); got inf"),
    ({"frequency": -5.0}, r"response: frequency must be >= 0 Hz"),
])
def test_non_finite_or_invalid_conditions_are_refused(dirac, kw, match):
    args = {"mu": 0.15, "temperature": 10.0, "tau": 100.0}
    args.update(kw)
    with pytest.raises(ValueError, match=match):
        response(dirac, **args)


@pytest.mark.parametrize("kw, match", [
    ({"resolution": 1.5}, r"response: resolution must be None or an integer level, e.g\. resolution=2; got 1\.5"),
    ({"resolution": True}, r"response: resolution must be None or an integer level"),
    ({"max_level": 2.5}, r"response: max_level must be None or an integer level, e.g\. max_level=3"),
])
def test_non_integer_levels_are_refused(dirac, kw, match):
    """resolution=1.5 used to end in a bare TypeError from indexing the level table."""
    with pytest.raises(TypeError, match=match):
        response(dirac, mu=0.15, temperature=10.0, tau=100.0, **kw)


def test_integer_levels_of_numpy_type_are_accepted(dirac):
    """The level check accepts any integer type (a sweep may hand over numpy integers)."""
    from crosswind.solver.engine.inputs import check_arguments
    check_arguments(0.1, 1.0, ConstantTau(1.0).arrays(), "ConstantTau", 0.0, np.int64(1), np.int32(2))
    with pytest.raises(TypeError, match="resolution must be None or an integer"):
        check_arguments(0.1, 1.0, ConstantTau(1.0).arrays(), "ConstantTau", 0.0, np.float64(1.0), None)


# ------------------------------------------------------------------ scattering objects -------
@pytest.mark.parametrize("make, match", [
    (lambda: MatthiessenTau(100.0, 100.0, reference_temperature=0.0),
     r"MatthiessenTau: reference_temperature must be positive and finite \(K\); got 0\.0\. Pass the temperature"),
    (lambda: MatthiessenTau(100.0, 100.0, reference_temperature=-300.0), r"reference_temperature.*got -300"),
    (lambda: MatthiessenTau(100.0, 100.0, reference_temperature=NAN), r"reference_temperature.*got nan"),
    (lambda: PowerLawTau(100.0, energy_scale=0.0),
     r"PowerLawTau: energy_scale must be positive and finite \(eV\); got 0\.0\. Pass the energy scale"),
    (lambda: PowerLawTau(100.0, energy_scale=np.array([0.1, -0.1])), r"energy_scale.*got -0\.1 at index \(1,\)"),
    (lambda: PowerLawTau(100.0, energy_scale=INF), r"energy_scale.*got inf"),
    (lambda: PowerLawTau(100.0, exponent=500.0),
     r"PowerLawTau: exponent must be finite with \|exponent\| <= 10; got 500\.0\. Physical exponents"),
    (lambda: PowerLawTau(100.0, exponent=NAN), r"exponent must be finite"),
    (lambda: PowerLawTau(100.0, reference_energy=INF), r"reference_energy must be finite \(eV\); got inf"),
    (lambda: PowerLawTau(100.0, smoothing=0.0), r"smoothing must be positive and finite \(eV\); got 0\.0"),
])
def test_scattering_shape_parameters_are_checked_at_construction(make, match):
    with pytest.raises(ValueError, match=match):
        make()


def test_reasonable_scattering_objects_still_build():
    PowerLawTau(100.0, exponent=-10.0, energy_scale=0.05, smoothing=1e-6)
    MatthiessenTau(np.array([100.0, 200.0]), 50.0, reference_temperature=np.array([77.0, 300.0]))


# ------------------------------------------------------------------ tight-binding files ------
TB = """
model = { name = "chain", dimension = 2 }
lattice = { vectors = [[2.0, 0.0], [0.0, 3.0]] }
orbital = [{ label = "s", position = [0.0, 0.0], onsite = 0.1 }]
hop = [{ from = "s", to = "s", cell = [1, 0], amplitude = -1.0 }]
"""


@pytest.mark.parametrize("old, new, match", [
    ("amplitude = -1.0", "amplitude = nan", (r"\[\[hop\]\] #1, key 'amplitude': must be finite, got nan\. "
                                             r"Replace nan/inf by the energy in eV")),
    ("amplitude = -1.0", "amplitude = [-1.0, inf]", r"\[\[hop\]\] #1, key 'amplitude': must be finite"),
    ("amplitude = -1.0", "amplitude = { scale = -inf }", r"\[\[hop\]\] #1, key 'amplitude\.scale': must be finite, got -inf"),
    ("onsite = 0.1", "onsite = inf", r"\[\[orbital\]\] #1, key 'onsite': must be finite, got inf"),
    ("position = [0.0, 0.0]", "position = [nan, 0.0]",
     r"\[\[orbital\]\] #1, key 'position': must hold finite numbers, got \[nan, 0\.0\]\. Replace nan/inf"),
    ("vectors = [[2.0, 0.0], [0.0, 3.0]]", "vectors = [[2.0, 0.0], [0.0, inf]]",
     r"\[lattice\], key 'vectors\[1\]': must hold finite numbers"),
])
def test_tight_binding_file_with_non_finite_entry_is_refused(old, new, match):
    assert old in TB
    with pytest.raises(TightBindingFileError, match=r"^t\.toml: table " + match):
        parse_tight_binding(TB.replace(old, new, 1), source="t.toml")


def test_domains_refuse_non_finite_geometry():
    with pytest.raises(ValueError, match=r"Lattice: vectors must be finite numbers in Å"):
        Lattice(vectors=((1.0, 0.0), (0.0, NAN)), positions=((0.0, 0.0),))
    with pytest.raises(ValueError, match=r"Lattice: orbital positions must be finite numbers in Å"):
        Lattice(vectors=((1.0, 0.0), (0.0, 1.0)), positions=((INF, 0.0),))
    with pytest.raises(ValueError, match=r"Continuum: centers must be finite wavevectors"):
        Continuum(dim=2, centers=((NAN, 0.0),))
    with pytest.raises(ValueError, match=r"Continuum: scale must be a positive finite wavevector"):
        Continuum(dim=2, scale=INF)


# ------------------------------------------------------------------ scenarios and sweeps ----
SCN = """
[material]
model = "massive-dirac"
[material.parameters]
velocity = 5e5
mass = 0.1

[device]
width_um = 4
length_um = 8
current_uA = 1

[conditions]
mu_eV = [0.13, 0.15]
temperature_K = 5
[conditions.scattering]
kind = "power-law"
tau0_fs = 100
exponent = 1.0

[numerics]
resolution = 0
batch_points = 2           # one batch per temperature: the checkpoint tests count batches

[output]
figures = false
"""


def test_scenario_refuses_an_absurd_power_law_exponent():
    with pytest.raises(ScenarioError, match=r"\[conditions\.scattering\] key 'exponent': \|exponent\| must be "
                                            r"<= 10, got 500"):
        parse_scenario(SCN.replace("exponent = 1.0", "exponent = 500.0"), source="s.toml")


def test_sweep_refuses_to_write_a_non_finite_batch(tmp_path, monkeypatch):
    """A result that is NaN at one point (e.g. a traced NaN, an overflow) stops the run with the
    point named; no checkpoint and no dataset is written for it."""
    scn = parse_scenario(SCN, source="s.toml", base=tmp_path)

    def fake(scn, values):
        P = len(values["mu_eV"])
        sigma = np.ones((P, 2, 2), dtype=complex)
        sigma[1, 0, 0] = np.nan
        return {"mu": values["mu_eV"], "sigma": sigma}

    monkeypatch.setattr(run_mod, "compute_batch", fake)
    with pytest.raises(RunError, match=r"batch 0, point temperature_K = 5 K, .*mu_eV = 0\.15 eV: "
                                       r"sigma is not finite \(1 of 2 points\); nothing was written"):
        run_scenario(scn, tmp_path / "out", progress=False)
    assert not list((tmp_path / "out" / "batches").iterdir())
    assert not (tmp_path / "out" / "results.nc").exists()


# ------------------------------------------------------------------ user Hamiltonians --------
SX = jnp.array([[0, 1], [1, 0]], dtype=jnp.complex128)
SY = jnp.array([[0, -1j], [1j, 0]], dtype=jnp.complex128)
SZ = jnp.array([[1, 0], [0, -1]], dtype=jnp.complex128)
GAPPED = {"m": (0.1, "eV", "half gap")}


def gapped_dirac(k, p):
    """H = ħv(k_x σ_x + k_y σ_y) + m σ_z with ħv = 3 eV·Å (common practice, massive Dirac)."""
    kx, ky, m = (jnp.asarray(x).astype(jnp.complex128) for x in (k[0], k[1], p["m"]))
    return 3.0 * (kx * SX + ky * SY) + m * SZ


def _wrong_away_from(k0, kind):
    """A Dirac Hamiltonian that is correct at ``k0`` (the old single check point) only: a
    non-Hermitian term, or NaN, proportional to / beyond k_x − k0_x."""
    x0 = float(k0[0])

    def h(k, p):
        off = (k[0] - x0).astype(jnp.complex128)
        if kind == "hermitian":
            return gapped_dirac(k, p) + 0.5 * off * jnp.array([[0, 1], [0, 0]], dtype=jnp.complex128)
        return gapped_dirac(k, p) + jnp.where(k[0] > x0 + 1e-9, jnp.nan, 0.0).astype(jnp.complex128) * SZ
    return h


@pytest.mark.parametrize("domain", [Continuum(dim=2, scale=0.05),
                                    Lattice(vectors=((3.0, 0.0), (0.0, 3.0)), positions=((0.0, 0.0),) * 2)],
                         ids=["continuum", "lattice"])
@pytest.mark.parametrize("kind, match", [
    ("hermitian", (r"hamiltonian\(k, params\) is not Hermitian: max \|H - H\^†\| = .* eV at k = \(.*\) 1/Å "
                   r"\(one of \d+ check points spread over the domain\).*Give H\[j, i\] = conj\(H\[i, j\]\)")),
    ("nan", r"returned non-finite entries \(nan/inf\) at k = \(.*\) 1/Å \(one of \d+ check points.*check divisions"),
])
def test_user_hamiltonian_wrong_away_from_one_point_is_refused(domain, kind, match):
    h = _wrong_away_from(sample_k(domain), kind)
    np.testing.assert_allclose(np.asarray(h(jnp.asarray(sample_k(domain)), {"m": 0.1})),
                               np.asarray(gapped_dirac(jnp.asarray(sample_k(domain)), {"m": 0.1})))
    with pytest.raises(ValueError, match=match):
        from_function(h, parameters=GAPPED, domain=domain)


def test_check_points_cover_the_domain():
    """The points span the zone (lattice) or reach 10 × scale around every centre (continuum)."""
    lat = Lattice(vectors=((3.0, 0.0), (0.0, 3.0)), positions=((0.0, 0.0),))
    frac = sample_points(lat, {}) @ lat.vectors_array().T / (2 * np.pi)
    assert len(frac) == 10 and frac.min() < -0.3 and frac.max() > 0.3
    cont = Continuum(dim=2, centers=((0.0, 0.0), (1.0, 0.0)), scale=0.05)
    pts = sample_points(cont, {})
    dist = np.linalg.norm(pts[1:, None] - np.asarray(cont.centers)[None], axis=-1).min(axis=1)
    assert len(pts) == 41 and dist.max() == pytest.approx(0.5) and dist.min() == pytest.approx(0.0015)
    from_function(gapped_dirac, parameters=GAPPED, domain=cont)    # a correct model still builds


def test_model_nan_between_the_check_points_raises_instead_of_returning_nan():
    """A user Hamiltonian that is NaN only in a small disc of the zone passes the build-time check
    points; the kernel sums then came back NaN without complaint.  Now ``response`` refuses the
    non-finite field, naming it and the likely cause."""
    lat = Lattice(vectors=((3.0, 0.0), (0.0, 3.0)), positions=((0.0, 0.0),) * 2)
    hole = np.array([1.2, 1.5])                           # 1/Å, inside the mesh cell [0, 2π/3]²

    def h(k, p):
        inside = jnp.sum((k - hole) ** 2) < 0.08 ** 2
        c = lambda x: jnp.asarray(x).astype(jnp.complex128)
        return c(jnp.cos(3.0 * k[0])) * SX + c(jnp.sin(3.0 * k[1])) * SY + c(p["m"] + jnp.where(inside, jnp.nan, 0.0)) * SZ

    checked = sample_points(lat, {"m": 0.1})
    assert np.min(np.linalg.norm(checked - hole, axis=1)) > 0.2       # the disc misses every check point
    model = from_function(h, parameters=GAPPED, domain=lat)           # builds
    with pytest.raises(ValueError, match=(r"response: density is not finite \(NaN/inf\) for 1 of 1 conditions.*"
                                          r"although every input was finite: the model's Hamiltonian is NaN/inf")):
        response(model, mu=0.5, temperature=300.0, tau=100.0, resolution=1)


# ------------------------------------------------------------------ command-line crashes -----
def _fake_batch(calls):
    """A stand-in for ``compute_batch`` (no k-space work): the arrays ``assemble`` needs."""
    def fake(scn, values):
        calls.append(float(values["temperature_K"][0]))
        P, A = len(values["mu_eV"]), len(scn.axes[-1])
        return {"mu": values["mu_eV"], "sigma": np.ones((P, 2, 2), dtype=complex),
                "resolution_level": np.zeros(P, dtype=int), "converged": np.full(P, -1),
                **fake_device_fields(P, A)}
    return fake


def fake_device_fields(P, A):
    """Hall-bar arrays of a stand-in batch (what the runner's measurability step reads)."""
    sigma = np.broadcast_to(np.diag([1e-3, 1e-3]).astype(complex), (P, A, 2, 2)).copy()
    return {"dev_v_xx": np.ones((P, A), dtype=complex), "dev_v2w_y": np.full((P, A), 1e-8 + 0j),
            "dev_v2w_x": np.full((P, A), 1e-9 + 0j), "dev_v2w_y_amplitude": np.full((P, A), 1e-8),
            "dev_power_density": np.full((P, A), 1e-3), "dev_sigma_bar": sigma}


def _scenario_file(tmp_path):
    p = tmp_path / "s.toml"
    p.write_text(SCN.replace("temperature_K = 5", "temperature_K = [5, 20]"), encoding="utf-8")
    return p


@pytest.mark.parametrize("damage", ["empty", "truncated", "garbage"])
def test_corrupt_checkpoint_is_recomputed_with_a_warning(tmp_path, monkeypatch, capsys, damage):
    calls = []
    monkeypatch.setattr(run_mod, "compute_batch", _fake_batch(calls))
    scn = parse_scenario(_scenario_file(tmp_path).read_text(encoding="utf-8"), source="s.toml", base=tmp_path)
    run_scenario(scn, tmp_path / "out", progress=False)
    assert calls == [5.0, 20.0]
    ck = tmp_path / "out" / "batches" / "batch_00001.npz"
    data = ck.read_bytes()
    ck.write_bytes({"empty": b"", "truncated": data[: len(data) // 2], "garbage": b"\x00not a checkpoint" * 9}[damage])
    ds = run_scenario(scn, tmp_path / "out", progress=False)
    assert calls == [5.0, 20.0, 20.0]                       # only the damaged batch again
    err = capsys.readouterr().err
    assert f"crosswind: warning: checkpoint {ck} is unreadable" in err and "recomputing that batch" in err
    assert np.all(ds["sigma"].values == 1.0)
    with np.load(ck) as z:                                   # rewritten whole
        assert set(z.files) >= {"mu", "sigma"}


def test_ctrl_c_says_how_to_resume_and_exits_130(tmp_path, monkeypatch, capsys):
    from crosswind.solver.cli import main

    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt
    monkeypatch.setattr(run_mod, "run_scenario", interrupted)
    assert main(["run", str(_scenario_file(tmp_path)), "--output", str(tmp_path / "o"), "--no-progress"]) == 130
    lines = [ln for ln in capsys.readouterr().err.splitlines() if ln.strip()]
    expect = (f"crosswind: interrupted; finished batches are checkpointed in {tmp_path / 'o'}: run the "
              "same command again to resume")
    assert lines == [expect]


@pytest.mark.parametrize("where", ["under_a_file", "is_a_file"])
def test_output_folder_that_cannot_be_created_exits_2_with_one_line(tmp_path, capsys, where):
    from crosswind.solver.cli import main
    blocker = tmp_path / "blocker"
    blocker.write_text("x", encoding="utf-8")
    out = blocker / "out" if where == "under_a_file" else blocker
    assert main(["run", str(_scenario_file(tmp_path)), "--output", str(out), "--no-progress"]) == 2
    lines = capsys.readouterr().err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"crosswind: error: cannot create or write the output folder {out} (")
    assert lines[0].endswith("choose another --output folder or fix its permissions")


def test_non_utf8_files_are_refused_with_the_fix(tmp_path, capsys):
    from crosswind.models import load_tight_binding
    from crosswind.solver.cli import main
    p = tmp_path / "latin1.toml"
    p.write_bytes(SCN.replace('model = "massive-dirac"', 'model = "massive-dirac"  # \xb5m').encode("latin-1"))
    assert main(["run", str(p)]) == 2
    err = capsys.readouterr().err.strip()
    assert err == (f"crosswind: error: {p}: not UTF-8 text (byte 0xb5 at position "
                   f"{SCN.index('massive-dirac') + 18}); save the scenario file as UTF-8.")
    t = tmp_path / "tb.toml"
    t.write_bytes(b"\xff\xfe" + TB.encode("utf-16-le"))
    with pytest.raises(TightBindingFileError, match=r"tb\.toml: not UTF-8 text \(byte 0xff at position 0\); save "
                                                    r"the tight-binding file as UTF-8"):
        load_tight_binding(t)


# ------------------------------------------------------------------ error estimates ----------
def test_level_0_reports_the_error_as_unavailable_not_zero(tmp_path, capsys):
    """At resolution 0 nothing coarser is compared: error_* used to be exactly 0, the summary said
    "0 (0 relative)" and the numerics attribute said "auto".  Now NaN, flagged, and recorded as 0."""
    import json

    from crosswind.solver.cli import main
    from crosswind.solver.study.sweep import open_results
    p = tmp_path / "s.toml"
    p.write_text(SCN, encoding="utf-8")
    assert main(["run", str(p), "--no-progress"]) == 0
    ds = open_results(tmp_path / "results")
    num = json.loads(ds.attrs["numerics"])
    assert num["resolution"] == 0 and num["levels_used"] == [0]
    assert num["error_estimate"].startswith("unavailable (NaN)")
    assert np.all(ds["has_error_estimate"].values == 0)
    for name in ("error_sigma", "error_chi", "error_density"):
        assert np.all(np.isnan(ds[name].values)), name
    assert np.all(np.isfinite(ds["sigma"].values)) and np.all(ds["sigma"].values[..., 0, 0] > 0)
    summary = (tmp_path / "results" / "summary.md").read_text(encoding="utf-8")
    assert "Estimated integration error at the peak: **unavailable**" in summary
    assert "fixed level 0: nothing coarser to compare." in summary and "0 relative" not in summary
    assert "non-finite values" not in summary              # NaN error estimates are not a warning


def test_api_level_0_error_is_unavailable_not_zero(dirac):
    """``response(..., resolution=0).error`` of the node quadrature was exactly 0 (nothing coarser was
    compared); it is NaN (unavailable) now, and level 1 still gives a finite comparison."""
    r0 = response(dirac, mu=0.15, temperature=10.0, tau=100.0, resolution=0)
    r1 = response(dirac, mu=0.15, temperature=10.0, tau=100.0, resolution=1)
    for path, e in jax.tree_util.tree_flatten_with_path(r0.error)[0]:
        assert np.all(np.isnan(np.asarray(e))), jax.tree_util.keystr(path)
    assert np.all(np.isfinite(np.asarray(r0.sigma))) and float(r0.sigma[0, 0].real) > 0
    assert float(r1.error.sigma[0, 0]) > 0 and np.isfinite(float(r1.error.sigma[0, 0]))


# ------------------------------------------------------------------ fingerprints -------------
def _tb_scenario(tmp_path):
    (tmp_path / "tb.toml").write_text(TB, encoding="utf-8")
    text = SCN.replace('model = "massive-dirac"', 'tight_binding = "tb.toml"').replace(
        "[material.parameters]\nvelocity = 5e5\nmass = 0.1\n", "").replace("temperature_K = 5", "temperature_K = [5, 20]")
    p = tmp_path / "s.toml"
    p.write_text(text, encoding="utf-8")
    return p


def test_resume_refuses_checkpoints_of_an_edited_tight_binding_file(tmp_path, monkeypatch):
    """Editing the tight-binding file, deleting one checkpoint and rerunning used to mix two
    models in one dataset; the run now names the file that changed."""
    from crosswind.solver.study.scenario import load_scenario
    calls = []
    monkeypatch.setattr(run_mod, "compute_batch", _fake_batch(calls))
    p = _tb_scenario(tmp_path)
    run_scenario(load_scenario(p), tmp_path / "out", progress=False)
    (tmp_path / "tb.toml").write_text(TB.replace("amplitude = -1.0", "amplitude = -1.2"), encoding="utf-8")
    (tmp_path / "out" / "batches" / "batch_00001.npz").unlink()
    expect = (r"holds results of a different scenario, model file or package version \(tight-binding file "
              r".*tb\.toml changed since these results were computed\); rerun into another --output folder")
    with pytest.raises(RunError, match=expect):
        run_scenario(load_scenario(p), tmp_path / "out", progress=False)
    assert calls == [5.0, 20.0]


def test_comment_or_output_edits_do_not_block_a_resume(tmp_path, monkeypatch):
    from crosswind.solver.study.scenario import load_scenario
    calls = []
    monkeypatch.setattr(run_mod, "compute_batch", _fake_batch(calls))
    p = _tb_scenario(tmp_path)
    run_scenario(load_scenario(p), tmp_path / "out", progress=False)
    p.write_text("# a note\n" + p.read_text(encoding="utf-8").replace("figures = false", "figures = false  # later"),
                 encoding="utf-8")
    run_scenario(load_scenario(p), tmp_path / "out", progress=False)
    assert calls == [5.0, 20.0]                              # nothing recomputed
    p.write_text(p.read_text(encoding="utf-8").replace("tau0_fs = 100", "tau0_fs = 120"), encoding="utf-8")
    with pytest.raises(RunError, match=r"version \(scenario changed since these results were computed\)"):
        run_scenario(load_scenario(p), tmp_path / "out", progress=False)


def test_checkpoint_of_other_inputs_is_recomputed(tmp_path, monkeypatch, capsys):
    from crosswind.solver.study.scenario import load_scenario
    calls = []
    monkeypatch.setattr(run_mod, "compute_batch", _fake_batch(calls))
    p = _tb_scenario(tmp_path)
    run_scenario(load_scenario(p), tmp_path / "a", progress=False)
    other = p.read_text(encoding="utf-8").replace("tau0_fs = 100", "tau0_fs = 120")
    (tmp_path / "t.toml").write_text(other, encoding="utf-8")
    run_scenario(load_scenario(tmp_path / "t.toml"), tmp_path / "b", progress=False)
    stray = tmp_path / "a" / "batches" / "batch_00001.npz"
    stray.write_bytes((tmp_path / "b" / "batches" / "batch_00001.npz").read_bytes())
    run_scenario(load_scenario(p), tmp_path / "a", progress=False)
    assert calls == [5.0, 20.0, 5.0, 20.0, 20.0]
    assert f"checkpoint {stray} was computed from other inputs" in capsys.readouterr().err


# ------------------------------------------------------------------ failed fits --------------
FX = jnp.linspace(0.1, 1.0, 8)
FY = 2.0 * np.asarray(FX) + 0.01 * np.random.default_rng(0).normal(size=8)   # slope 2, noise 0.01


def test_fit_to_data_the_model_cannot_produce_is_unreliable():
    """Model ~1e-17 against data 1e-7 (all data shifted): this used to report "converged: gradient
    below tolerance" with a standard error of 1e9 relative and no warning."""
    from crosswind.solver.fitting.fit import fit
    r = fit(lambda p: (p["a"] * 1e-17 * FX - 1e-7) / 1e-7, {"a": 1.0})
    assert r.converged and r.status == "unreliable"
    assert any(p.startswith("the residuals hardly depend on a: changing it by its scale 1 changes them by 1.3e-10")
               for p in r.problems), r.problems
    assert "UNRELIABLE fit:" in r.summary()


def test_fit_pinned_at_a_bound_is_flagged_and_its_stderr_not_meaningful():
    from crosswind.solver.fitting.fit import fit
    r = fit(lambda p: p["a"] * FX - FY, {"a": 1.0}, bounds={"a": (0.0, 1.5)})
    assert r.values["a"] == pytest.approx(1.5) and r.at_bound == ("a",) and math.isnan(r.stderr["a"])
    assert r.status == "unreliable"
    assert r.problems[0].startswith("a ended at its upper bound 1.5: the best fit lies beyond it, so its standard "
                                    "error is not meaningful (reported as NaN)")


def test_fit_with_improbable_chi2_for_known_errors_is_unreliable():
    from crosswind.solver.fitting.fit import fit
    good = fit(lambda p: p["a"] * FX - FY, {"a": 1.0}, sigma=0.01, absolute_sigma=True)
    assert good.status == "ok" and good.problems == ()
    bad = fit(lambda p: p["a"] * FX - FY, {"a": 1.0}, sigma=0.0005, absolute_sigma=True)   # errors 20× too small
    assert bad.status == "unreliable"
    expect = (f"χ²_red = {bad.chi2_reduced:.3g} with 7 degrees of freedom is improbable for the stated errors "
              "(two-sided p = 2.8e-150 < 0.001): the model does not describe the data or the errors are misstated")
    assert bad.problems == (expect,)


def test_fit_ending_at_its_start_is_flagged_unless_another_start_confirms_it():
    from crosswind.solver.fitting.fit import fit
    best = fit(lambda p: p["a"] * FX - FY, {"a": 1.0}).values["a"]
    again = fit(lambda p: p["a"] * FX - FY, {"a": best})
    assert again.status == "unreliable" and again.problems[0].startswith("the fit ended at its starting point")
    confirmed = fit(lambda p: p["a"] * FX - FY, {"a": best}, bounds={"a": (0.0, 5.0)}, starts=3)
    assert confirmed.status == "ok"


def test_fit_with_a_huge_relative_standard_error_is_unreliable():
    from crosswind.solver.fitting.fit import fit
    r = fit(lambda p: p["a"] * FX + p["b"] - FY, {"a": 1.0, "b": 0.5})
    assert r.status == "unreliable" and abs(r.values["b"]) < r.stderr["b"]
    assert any(p.startswith("the standard error of b (") and "exceeds 100% of its value" in p for p in r.problems)


FIT_TABLE = """
[fit]
quantity = "V2w"
axis = "mu_eV"
parameters = {mass = {initial = 0.1, bounds = [0.01, 1.0]}}
"""


def test_fit_with_repeated_abscissae_is_refused(tmp_path, capsys):
    """Listing every row twice used to shrink the standard error by √2 without a word."""
    from crosswind.solver.cli import main
    sp = tmp_path / "s.toml"
    sp.write_text(SCN + FIT_TABLE, encoding="utf-8")
    data = tmp_path / "d.csv"
    data.write_text("mu [eV], V2w [nV]\n0.12, 1\n0.13, 2\n0.12, 1\n0.14, 3\n", encoding="utf-8")
    assert main(["fit", str(sp), "--data", str(data), "--output", str(tmp_path / "f")]) == 2
    assert capsys.readouterr().err.strip() == (
        f"crosswind: error: {data}: column 'mu_eV [eV]' repeats the value(s) 0.12; merge repeated measurements into one "
        "row (their mean, with the standard error of the mean in the error column) or remove the extra rows")
    assert not (tmp_path / "f").exists()


def test_unreliable_fit_sets_exit_status_summary_and_json(tmp_path, monkeypatch, capsys):
    """A model that cannot produce the data (here ~1e-20 V against ~100 nV) exits 1 and says why
    in the summary and fit.json (the model is a stand-in: no k-space work)."""
    import json

    from crosswind.solver.cli import main
    from crosswind.solver.fitting import scenario_fit
    monkeypatch.setattr(scenario_fit, "predictor",
                        lambda scn: ((lambda params, x: params["mass"] * 1e-20 * jnp.asarray(x)), {}))
    sp = tmp_path / "s.toml"
    sp.write_text(SCN + FIT_TABLE, encoding="utf-8")
    data = tmp_path / "d.csv"
    data.write_text("mu [eV], V2w [nV]\n0.12, 100\n0.13, 110\n0.14, 120\n0.15, 125\n", encoding="utf-8")
    out = tmp_path / "f"
    assert main(["fit", str(sp), "--data", str(data), "--output", str(out)]) == 1
    err = capsys.readouterr().err
    assert err.startswith("crosswind: error: the fit is unreliable: ") and "residuals hardly depend on mass" in err
    res = json.loads((out / "fit.json").read_text(encoding="utf-8"))
    assert res["converged"] and res["status"] == "unreliable"
    assert any("residuals hardly depend on mass" in p for p in res["problems"])
    summary = (out / "fit_summary.md").read_text(encoding="utf-8")
    assert "**FIT UNRELIABLE**: do not quote these values" in summary and "- **problem**: " in summary


# ------------------------------------------------------------------ full disk ----------------
def _disk_full(*args):
    raise OSError(28, "No space left on device")


def test_atomic_write_on_a_full_disk_keeps_the_old_file_and_no_temporary(tmp_path):
    from crosswind.solver.study.files import OutputError, atomic_text, atomic_write
    target = tmp_path / "summary.md"
    atomic_text(target, "old summary\n")

    def half_then_full(tmp):
        with open(tmp, "w", encoding="utf-8") as f:
            f.write("new but trunc")
        _disk_full()
    with pytest.raises(OutputError, match=rf"cannot write {target} \(No space left on device\); free disk space or "
                                          r"choose another output folder, then rerun the same command"):
        atomic_write(target, half_then_full)
    assert target.read_text(encoding="utf-8") == "old summary\n"
    assert [p.name for p in tmp_path.iterdir()] == ["summary.md"]


def test_full_disk_before_the_dataset_keeps_checkpoints_and_resumes(tmp_path, monkeypatch):
    from collections import namedtuple

    from crosswind.solver.study import files
    from crosswind.solver.study.files import OutputError
    calls = []
    monkeypatch.setattr(run_mod, "compute_batch", _fake_batch(calls))
    scn = parse_scenario(_scenario_file(tmp_path).read_text(encoding="utf-8"), source="s.toml", base=tmp_path)
    usage = namedtuple("usage", "total used free")
    monkeypatch.setattr(files.shutil, "disk_usage", lambda p: usage(10 ** 9, 10 ** 9 - 4096, 4096))
    with pytest.raises(OutputError, match=r"not enough free space in .*out for results\.nc and results\.csv \(about "
                                          r"0 MiB needed, 0 MiB free\)"):
        run_scenario(scn, tmp_path / "out", progress=False)
    assert sorted(p.name for p in (tmp_path / "out" / "batches").iterdir()) == ["batch_00000.npz", "batch_00001.npz"]
    assert not (tmp_path / "out" / "results.nc").exists()
    monkeypatch.undo()
    monkeypatch.setattr(run_mod, "compute_batch", _fake_batch(calls))
    run_scenario(scn, tmp_path / "out", progress=False)
    assert calls == [5.0, 20.0] and (tmp_path / "out" / "results.nc").exists()


def test_full_disk_during_a_run_exits_2_with_one_line_and_no_partial_file(tmp_path, monkeypatch, capsys):
    from crosswind.solver.cli import main
    from crosswind.solver.study import files
    monkeypatch.setattr(run_mod, "compute_batch", _fake_batch([]))
    monkeypatch.setattr(files.os, "fsync", _disk_full)
    out = tmp_path / "o"
    assert main(["run", str(_scenario_file(tmp_path)), "--output", str(out), "--no-progress"]) == 2
    lines = capsys.readouterr().err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"crosswind: error: cannot write {out}/run.json (No space left")
    assert sorted(p.name for p in out.iterdir()) == [".crosswind.lock"]     # the run's lock, nothing else


def test_summary_warns_first_when_the_dataset_holds_non_finite_values():
    import xarray as xr

    from crosswind.solver.reporting.report import _non_finite_warning
    ds = xr.Dataset({"v_xx": (("g",), np.array([1.0, np.inf, np.nan])), "error_sigma": (("g",), np.full(3, np.nan)),
                     "hall_angle": (("g",), np.array([np.nan, 0.1, 0.2])), "sigma": (("g",), np.ones(3))})
    expect = ("> **WARNING: the dataset holds non-finite values (NaN/inf)** in `v_xx` (2); numbers derived from "
              "them below are not results. Check the model and the conditions at those grid points.")
    assert _non_finite_warning(ds) == [expect, ""]
    assert _non_finite_warning(ds.drop_vars("v_xx")) == []


# ------------------------------------------------------------------ error estimates vs truth --
def _levels_of(model, mu, temperature, levels):
    out = []
    for level in levels:
        r = response(model, mu=mu, temperature=temperature, tau=100.0, resolution=level, estimate_error=False)
        out.append((float(r.sigma[0, 0].real), float(r.chi[1, 0, 0].real)))
    return np.array(out)


@pytest.mark.parametrize("mass, mu, T", [(0.1, 0.15, 0.0), (0.005, 0.010, 1.0)], ids=["T0_in_band", "small_gap"])
def test_level_2_error_estimate_bounds_the_true_error(mass, mu, T):
    """|v_2 − v_1| against |v_2 − v_4| (level 4 as truth; benchmarks/bench_error_estimates.py):
    measured ratios 3.4e3–8.6e3 (σ_xx, χ_yxx), i.e. conservative, on T → 0 and small-gap cases."""
    v = _levels_of(build("massive-dirac", velocity=5e5, mass=mass, tilt=5e4), mu, T, (1, 2, 4))
    est, true = np.abs(v[1] - v[0]), np.abs(v[1] - v[2])
    assert np.all(est >= true), (est, true)


@pytest.mark.parametrize("mu", [0.1, 0.0999], ids=["contour_through_centre", "pocket_beside_centre"])
def test_node_rule_at_a_band_edge_at_zero_temperature_is_right_or_says_so(mu):
    """μ at the band edge of a tilted massive Dirac cone at T = 0: the Fermi contour passes through
    the ray centre (μ = mass) or is a small pocket beside it (the tilted band bottom is at
    mass·sqrt(1 − (tilt/v)²) = 0.0995 eV), tangent to the rays.  Levels 1..4 of the node rule scatter
    by 2–25 % there, and |v1 − v0| used to be 75× below the true error.  Now the rays' angular
    resolution of such contours is checked: the Fermi-window fields carry error = inf, with a
    warning naming the fix.  Truth: the shared-ray engine at rtol 1e-6 (its own estimate < 1e-5)."""
    m = build("massive-dirac", **DIRAC)
    truth = response(m, mu=mu, temperature=0.0, tau=100.0, rtol=1e-6)
    assert truth.resolution.engine == "rays" and float(truth.error.sigma[0, 0]) < 1e-5 * abs(float(truth.sigma[0, 0].real))
    with pytest.warns(RuntimeWarning, match=r"thermal window .* error = inf\. Use engine='rays'"):
        r = response(m, mu=mu, temperature=0.0, tau=100.0, resolution=1)
    true_err = abs(float(r.sigma[0, 0].real) - float(truth.sigma[0, 0].real))
    assert true_err > 1e-4 * abs(float(truth.sigma[0, 0].real))         # the node rule is really off here
    assert float(r.error.sigma[0, 0]) >= true_err and np.isposinf(float(r.error.chi[1, 0, 0]))
    assert r.resolution.window_unresolved == 1 and r.resolution.converged is False
    # 1 K smooths the contour over more than the ray spacing: resolved, and the estimate bounds the error
    warm_truth = response(m, mu=mu, temperature=1.0, tau=100.0, rtol=1e-5)       # its estimate: 1.5e-7 relative
    warm = response(m, mu=mu, temperature=1.0, tau=100.0, resolution=1)
    assert warm.resolution.window_unresolved == 0
    assert float(warm.error.sigma[0, 0]) >= abs(float(warm.sigma[0, 0].real) - float(warm_truth.sigma[0, 0].real))


def test_lattice_node_quadrature_at_zero_temperature_is_right_or_says_so():
    """The node quadrature of a lattice at a fixed level and T -> 0 found no node in the Fermi window:
    sigma_xx ~ 1e-254 S with an error estimate ~ 5e-259 S (the ladder gives 3.139e-3 S).  Now the
    Fermi-window fields say they are unresolved (error inf, not converged, a warning naming the fix);
    the Fermi-sea fields keep their estimate."""
    m = build("honeycomb", staggered=0.1)
    with pytest.warns(RuntimeWarning, match=r"thermal window .* error = inf\. Use engine='ladder'"):
        r = response(m, mu=0.3, temperature=0.0, tau=100.0, resolution=2)
    ladder = 3.139053e-3      # engine="ladder" (automatic resolution), error estimate 1e-7 S
    assert abs(float(r.sigma[0, 0].real) - ladder) <= max(float(r.error.sigma[0, 0]), 1e-2 * ladder)
    info = r.resolution
    assert info.converged is False and info.window_unresolved == 1 and info.window_ratio > 1e3
    assert {"sigma", "chi"} <= set(info.unconverged_fields)
    e = r.error
    for name, v in (("sigma", e.sigma), ("sigma_drude", e.sigma_drude), ("dipole", e.dipole), ("chi", e.chi),
                    ("chi_dc", e.chi_dc), ("dos", e.dos), ("chi_parts.dipole", e.chi_parts.dipole),
                    ("chi_dc_parts.drude", e.chi_dc_parts.drude)):
        assert np.all(np.isposinf(np.asarray(v))), name
    for name in ("density", "sigma_anomalous"):
        assert np.all(np.isfinite(np.asarray(getattr(r.error, name)))), name
    # a window the nodes resolve (100 K) is not flagged
    warm = response(m, mu=0.3, temperature=100.0, tau=100.0, resolution=2)
    assert warm.resolution.window_unresolved == 0 and warm.resolution.window_ratio is None
    assert np.isfinite(float(warm.error.sigma[0, 0]))


def test_3d_lattice_at_low_temperature_names_a_temperature_and_a_model_that_work():
    """The node quadrature of a 3D lattice at low temperature: the warning must not send the user
    to the ladder (impractical in 3D) but name the temperature from which the level resolves the
    window (checked: just above it no condition is flagged), engine='tetra' and the k·p models
    that integrate the nodes."""
    import re
    m = build("weyl", tilt=0.3)
    with pytest.warns(RuntimeWarning, match=r"below that use engine='tetra'") as rec:
        r = response(m, mu=0.1, temperature=2.0, tau=100.0, resolution=1)
    msg = str(rec[0].message)
    assert "weyl-kp" in msg and "engine='shells'" in msg and "Use engine='ladder'" not in msg
    assert r.resolution.window_unresolved == 1 and np.isposinf(float(r.error.sigma[0, 0]))
    t_ok = float(re.search(r"from about ([0-9.eE+-]+) K", msg).group(1))
    assert t_ok > 2.0
    warm = response(m, mu=0.1, temperature=1.05 * t_ok, tau=100.0, resolution=1)
    assert warm.resolution.window_unresolved == 0
    with pytest.warns(RuntimeWarning, match=r"below that use engine='tetra'"):
        cool = response(m, mu=0.1, temperature=0.9 * t_ok, tau=100.0, resolution=1)
    assert cool.resolution.window_unresolved == 1


# ------------------------------------------------------------------ bounded memory -----------
_MEMORY_PROBE = """
import json, os, resource, sys
import numpy as np
from crosswind.models import build
from crosswind.solver import response
rss = lambda: resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2 ** 20      # KiB -> GiB
name, P, gib, T = sys.argv[1], int(sys.argv[2]), float(sys.argv[3]), float(sys.argv[4])
m = build(name, velocity=5e5, mass=0.1, tilt=5e4) if name == "massive-dirac" else build(name)
mu = lambda n: np.linspace(0.12, 0.4, n)
base = rss()
response(m, mu=mu(300), temperature=T, tau=100.0, resolution=0, memory_gib=gib)    # compiles the block
warm = rss()
r = response(m, mu=mu(P), temperature=T, tau=100.0, resolution=0, memory_gib=gib)
ok = bool(np.all(np.isfinite(np.asarray(r.sigma))))
print(json.dumps(dict(base=base, warm=warm, peak=rss(), block=r.resolution.condition_block, ok=ok)))
"""


def _peak_memory(name, P, gib, T):
    import json
    import subprocess
    import sys
    env = dict(os.environ, JAX_PLATFORMS="cpu")
    out = subprocess.run([sys.executable, "-c", _MEMORY_PROBE, name, str(P), str(gib), str(T)], env=env,
                         capture_output=True, text=True, timeout=600)
    assert out.returncode == 0, out.stderr[-2000:]
    return json.loads(out.stdout.strip().splitlines()[-1])


@pytest.mark.parametrize("name, P, gib, T", [("honeycomb", 10_000, 1.0, 300.0), ("massive-dirac", 600, 1.0, 10.0)],
                         ids=["lattice_10000", "continuum_600"])
def test_memory_stays_within_the_budget_whatever_the_number_of_conditions(name, P, gib, T):
    """10 000 μ points of the node quadrature once asked for 87.5 GB (1000 took 8.8 GiB): about 5 MB
    per condition at level 0.  Conditions are now evaluated in blocks sized from ``memory_gib``: the
    peak resident memory of the call (compilation included) stays under the budget, and going from 300
    conditions to P adds less than half of it (measured: 0.1 GiB for 10 000 on the lattice, results
    included; unblocked, the two calls would need ~37 GB and ~3 GB)."""
    r = _peak_memory(name, P, gib, T)
    assert r["ok"] and r["block"] < 300
    assert r["peak"] - r["base"] < gib, r
    assert r["peak"] - r["warm"] < 0.5 * gib, r


def test_memory_budget_setting_is_checked(dirac, monkeypatch):
    from crosswind.solver.engine.memory import budget_bytes
    assert budget_bytes() == 2 * 2 ** 30
    monkeypatch.setenv("CROSSWIND_MEMORY_GIB", "0.5")
    assert budget_bytes() == 2 ** 29 and budget_bytes(3) == 3 * 2 ** 30
    monkeypatch.setenv("CROSSWIND_MEMORY_GIB", "lots")
    with pytest.raises(ValueError, match=r"environment variable CROSSWIND_MEMORY_GIB must be a number of GiB, "
                                         r"e\.g\. CROSSWIND_MEMORY_GIB=2; got 'lots'"):
        response(dirac, mu=0.15, temperature=10.0, tau=100.0, resolution=0)
    monkeypatch.delenv("CROSSWIND_MEMORY_GIB")
    for bad in (0, -1.0, NAN, "2"):
        with pytest.raises(ValueError, match=r"response: memory_gib must be a positive number of GiB"):
            response(dirac, mu=0.15, temperature=10.0, tau=100.0, resolution=0, memory_gib=bad)
    # blocks give the same numbers as one pass
    mus = np.linspace(0.12, 0.3, 7)
    one = response(dirac, mu=mus, temperature=10.0, tau=100.0, resolution=0)
    tiny = response(dirac, mu=mus, temperature=10.0, tau=100.0, resolution=0, memory_gib=0.01)
    assert one.resolution.condition_block == 7 and tiny.resolution.condition_block == 1
    np.testing.assert_allclose(np.asarray(tiny.chi), np.asarray(one.chi), rtol=1e-12, atol=0)


# ------------------------------------------------------------------ concurrent writers -------
def test_second_writer_into_a_locked_folder_is_refused(tmp_path, monkeypatch):
    """Two runs into one fresh folder were guarded only by timing; the second is now refused with
    the owner's pid, and the folder is usable again once the first ends."""
    calls = []
    monkeypatch.setattr(run_mod, "compute_batch", _fake_batch(calls))
    scn = parse_scenario(_scenario_file(tmp_path).read_text(encoding="utf-8"), source="s.toml", base=tmp_path)
    out = tmp_path / "out"
    seen = []

    def second_writer(b):
        if b == 0:
            with pytest.raises(RunError, match=rf"{out} is being written by another crosswind run \(pid "
                                               rf"{os.getpid()}\); wait for it to finish"):
                run_scenario(scn, out, progress=False)
            seen.append(b)
    run_scenario(scn, out, progress=False, after_batch=second_writer)
    assert seen == [0] and calls == [5.0, 20.0]
    run_scenario(scn, out, progress=False)          # lock released: resumes, nothing recomputed
    assert calls == [5.0, 20.0]


def test_output_outside_the_scenario_folder_is_announced_first(tmp_path, monkeypatch, capsys):
    from crosswind.solver.cli import main

    def stop(*args, **kwargs):
        raise RunError("stopped by the test")
    monkeypatch.setattr(run_mod, "run_scenario", stop)
    home = tmp_path / "a" / "b"
    home.mkdir(parents=True)
    p = home / "s.toml"
    p.write_text(SCN.replace("[output]\n", '[output]\nfolder = "../../x"\n'), encoding="utf-8")
    assert main(["run", str(p), "--no-progress"]) == 2
    first = capsys.readouterr().out.splitlines()[0]
    assert first == f"crosswind: writing results to {tmp_path / 'x'} (outside the scenario's folder {home})"
    p.write_text(SCN, encoding="utf-8")                  # default folder "results" next to it: no line
    assert main(["run", str(p), "--no-progress"]) == 2
    assert capsys.readouterr().out == ""


def test_existing_folder_that_is_not_a_results_folder_is_refused_unless_empty(tmp_path, monkeypatch):
    calls = []
    monkeypatch.setattr(run_mod, "compute_batch", _fake_batch(calls))
    scn = parse_scenario(_scenario_file(tmp_path).read_text(encoding="utf-8"), source="s.toml", base=tmp_path)
    thesis = tmp_path / "thesis"
    thesis.mkdir()
    (thesis / "chapter1.tex").write_text("precious", encoding="utf-8")
    with pytest.raises(RunError, match=rf"{thesis} exists and is not empty; choose another --output folder"):
        run_scenario(scn, thesis, progress=False)
    assert [p.name for p in thesis.iterdir()] == ["chapter1.tex"] and calls == []
    empty = tmp_path / "empty"
    empty.mkdir()
    run_scenario(scn, empty, progress=False)
    assert calls == [5.0, 20.0]


def test_model_nan_somewhere_gives_a_clear_error_with_the_ladder_engine():
    """The same NaN-in-a-disc model with the energy-resolved ladder (automatic for 2D lattices):
    a clear ValueError naming the model's non-finite values, never a raw conversion error."""
    lat = Lattice(vectors=((3.0, 0.0), (0.0, 3.0)), positions=((0.0, 0.0),) * 2)
    hole = np.array([1.2, 1.5])

    def h(k, p):
        inside = jnp.sum((k - hole) ** 2) < 0.3 ** 2
        c = lambda x: jnp.asarray(x).astype(jnp.complex128)
        return c(jnp.cos(3.0 * k[0])) * SX + c(jnp.sin(3.0 * k[1])) * SY + c(p["m"] + jnp.where(inside, jnp.nan, 0.0)) * SZ

    model = from_function(h, parameters=GAPPED, domain=lat)
    with pytest.raises(ValueError, match=r"NaN or infinite somewhere in the Brillouin zone.*check the Hamiltonian"):
        response(model, mu=0.5, temperature=300.0, tau=100.0)


def test_results_are_written_readable_by_colleagues_as_umask_allows(tmp_path, monkeypatch):
    """Results used to be written 0600 (mkstemp's mode) while figures were 0644: a shared machine's
    colleagues could not read the data.  Every written file now gets 0666 less the umask."""
    import os
    import stat

    calls = []
    monkeypatch.setattr(run_mod, "compute_batch", _fake_batch(calls))
    scn = parse_scenario(_scenario_file(tmp_path).read_text(encoding="utf-8"), source="s.toml", base=tmp_path)
    run_scenario(scn, tmp_path / "out", progress=False)
    mask = os.umask(0)
    os.umask(mask)
    for name in ("results.nc", "results.csv", "run.json", "scenario.toml"):
        mode = stat.S_IMODE((tmp_path / "out" / name).stat().st_mode)
        assert mode == 0o666 & ~mask, (name, oct(mode))
    ds = run_mod.open_results(tmp_path / "out")
    assert ds["i"].attrs["long_name"].startswith("first Cartesian index")
    assert "-1 where a fixed level" in ds["converged"].attrs["long_name"]
