"""The built-in demonstration scenario run by ``crosswind demo``.

A uniaxially strained MoS2 monolayer (the ``tmd`` catalogue model: massive Dirac with spin–orbit
coupling, strain-induced valley tilt; its strain coefficients are illustrative defaults, not a
fit) in a Hall bar of our own invention on a 285 nm SiO2 back gate.  Strain of 1 % along the
crystal x axis lowers the C3 symmetry and gives a Berry-curvature dipole along x; the current runs
along x, where the nonlinear Hall voltage is largest.  Scattering: impurities plus phonons
(Matthiessen's rule), so the temperature sweep also changes τ and feeds the scaling plot.  The
sweep (12 gate voltages × 3 temperatures, one batch of 36 points) runs with automatic resolution
(the shared-ray engine of docs/theory.md §14.3: one ray set for all conditions, converged to rtol
1e-3) and μ from the gate density as the root of that engine's own n(μ) (started on mesh level 1;
docs/theory.md §11).
"""
from pathlib import Path

import numpy as np

from crosswind.solver.fitting.scenario_fit import run_fit
from crosswind.solver.study.chain import evaluate
from crosswind.solver.study.files import atomic_text, make_folder
from crosswind.solver.study.knobs import base_values
from crosswind.solver.study.scenario import parse_scenario

SCENARIO = """\
# Crosswind demo: strained MoS2 monolayer Hall bar (illustrative device)
[material]
model = "tmd"

[material.parameters]
material = "MoS2"          # Xiao et al. 2012 two-band parameters

[material.strain]
magnitude = 0.01           # 1 % uniaxial strain ...
angle_deg = 0.0            # ... along the crystal x axis
poisson = 0.25             # transverse contraction (illustrative)

[device]
width_um = 5.0
length_um = 10.0
current_uA = 10.0          # amplitude of I(t) = I0 sin(wt)
frequency_Hz = 17.0
current_angle_deg = 0.0    # current along the strain axis
dielectric_nm = 285.0      # SiO2 back gate
permittivity = 3.9

[conditions]
gate_V = {start = 6.0, stop = 60.0, num = 12}
temperature_K = [10.0, 60.0, 150.0]

[conditions.scattering]
kind = "matthiessen"
tau_impurity_fs = 400.0
tau_phonon_fs = 100.0      # phonon-limited tau at the reference temperature
reference_temperature_K = 300.0

[numerics]
resolution = "auto"          # refine to rtol (shared rays for this k·p model); or a fixed level
density_resolution = 1

[output]
folder = "crosswind-demo"
"""


# ----------------------------------------------------------------------------- demo fit -------
# Invented measurements: generated from the demo's own model at known "true" values plus Gaussian
# noise with a fixed seed, then fitted back.  Nothing here is a real measurement.
FIT_TRUTH = {"tilt_conduction": 1.0, "gate_offset_V": 2.0}
FIT_GATES = (10.0, 18.0, 26.0, 34.0, 42.0, 50.0, 58.0)
FIT_NOISE = 0.03           # relative standard error of each invented point
FIT_SEED = 2024

FIT_SCENARIO = SCENARIO.split("[conditions]")[0].replace(
    "# Crosswind demo:", "# Crosswind demo fit (INVENTED measurements):") + """\
[conditions]
gate_V = 30.0              # replaced by the data's gate voltages
temperature_K = 10.0

[conditions.scattering]
kind = "matthiessen"
tau_impurity_fs = 400.0
tau_phonon_fs = 100.0
reference_temperature_K = 300.0

[numerics]
resolution = 1
density_resolution = 1

[output]
folder = "crosswind-demo-fit"

[fit]
quantity = "V2w"           # transverse 2w amplitude ...
axis = "gate_V"            # ... against gate voltage
data = "invented_measurements.csv"
[fit.parameters]
tilt_conduction = {initial = 0.6, bounds = [0.1, 3.0]}
gate_offset_V = {initial = 0.0, bounds = [-10.0, 10.0]}
"""


def invented_measurements(scn, path):
    """Write the invented V2w-vs-gate data set (clearly labelled) and return (gates, V2w, err) in V."""
    vals = base_values(scn, who="demo fit")
    vals.update(FIT_TRUTH)
    vals["gate_V"] = np.asarray(FIT_GATES)
    v = np.asarray(evaluate(scn, vals, resolution=scn.fit.resolution).V2w)
    rng = np.random.default_rng(FIT_SEED)
    err = FIT_NOISE * v
    y = v + err * rng.standard_normal(v.shape)
    lines = ["# INVENTED MEASUREMENTS for the crosswind demo - not real data.",
             "# Generated from the demo model (tmd, MoS2, 1 % strain, 10 K) at the 'true' values "
             + ", ".join(f"{k} = {x:g}" for k, x in FIT_TRUTH.items()),
             f"# plus Gaussian noise of {FIT_NOISE:.0%} (numpy default_rng seed {FIT_SEED}).",
             "gate [V], V2w [nV], V2w_err [nV]"]
    lines += [f"{g:g}, {a * 1e9:.6g}, {e * 1e9:.6g}" for g, a, e in zip(FIT_GATES, y, err)]
    atomic_text(path, "\n".join(lines) + "\n")
    return np.asarray(FIT_GATES), y, err


def run_demo_fit(folder):
    """Invent data, fit them back, write ``<folder>/fit/`` and a section in ``summary.md``."""
    folder = Path(folder)
    fdir = folder / "fit"
    make_folder(fdir)
    scn = parse_scenario(FIT_SCENARIO, source="<built-in demo fit>", base=fdir)
    data = fdir / "invented_measurements.csv"
    invented_measurements(scn, data)
    out = run_fit(scn, data, fdir)
    atomic_text(fdir / "fit_scenario.toml", FIT_SCENARIO)
    lines = ["", "## Demo fit to invented measurements", "",
             "**The measurements are invented**: V_y^2ω against gate voltage at 10 K generated from this demo's own "
             f"model at known true values plus {FIT_NOISE:.0%} Gaussian noise (seed {FIT_SEED}); "
             f"{len(FIT_GATES)} points in `fit/invented_measurements.csv`. `crosswind fit` recovers:", "",
             "| parameter | true | fitted ± standard error | unit |", "|---|---|---|---|"]
    for k in out.free:
        lines.append(f"| `{k}` | {FIT_TRUTH[k]:g} | {out.values[k]:.4g} ± {out.stderr[k]:.2g} | {out.units[k]} |")
    lines += ["", f"χ²_red = {out.chi2_reduced:.3g}, {'converged' if out.converged else 'NOT converged'} "
              f"({out.message}). Details: `fit/fit_summary.md`, `fit/fit_curve.png`, `fit/fit_residuals.png`, "
              "`fit/fitted_scenario.toml`.", ""]
    summ = folder / "summary.md"
    text = summ.read_text(encoding="utf-8") if summ.exists() else ""
    atomic_text(summ, text + "\n".join(lines))
    return out
