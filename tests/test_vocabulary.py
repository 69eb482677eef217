"""One vocabulary: every knob and field is named and given its unit in crosswind.solver.vocabulary only.

The dataset, the CSV, the knob checks, the fit columns and the engine's ``Response.units`` read it;
no other module of the solver writes a unit string of its own (checked on the source).
"""
import ast
from pathlib import Path

import numpy as np
import pytest

from crosswind.solver import response
from crosswind.solver.fitting.scenario_fit import AXIS_COLUMNS, QUANTITY_UNITS
from crosswind.solver.study.knobs import scenario_knobs
from crosswind.solver.study.scenario import parse_scenario
from crosswind.solver.study.sweep import flat_table, run_scenario
from crosswind.solver.vocabulary import KNOBS, OUTPUTS, RESPONSE_FIELDS, SCATTERING, field, units_of

SOLVER = Path(__file__).resolve().parents[1] / "solver"

SCN = """
[material]
model = "massive-dirac"
[material.parameters]
tilt = 5e4
mass = 0.1
[material.strain]
magnitude = 0.0
[device]
width_um = 5
length_um = 10
current_uA = 10
dielectric_nm = 90
permittivity = 3.9
[conditions]
gate_V = [10.0, 20.0]
temperature_K = 10
current_angle_deg = [0, 45]
[conditions.scattering]
kind = "power-law"
tau0_fs = 100
exponent = 0.5
[numerics]
resolution = 0
density_resolution = 0
[output]
folder = "out"
figures = false
"""


def test_the_strain_needs_a_model_with_strain_parameters(tmp_path):
    from crosswind.solver.study.scenario import ScenarioError
    with pytest.raises(ScenarioError, match=r"\[material.strain\].*this model has no strain parameters"):
        parse_scenario(SCN, source="s.toml", base=tmp_path)


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("vocab")
    scn = parse_scenario(SCN.replace('model = "massive-dirac"', 'model = "tmd"').replace("tilt = 5e4\nmass = 0.1\n", ""),
                         source="s.toml", base=folder)
    return scn, run_scenario(scn, folder / "out", progress=False)


def test_axes_are_named_after_their_knobs_with_the_vocabulary_units(run):
    scn, ds = run
    names = [a.name for a in scn.axes]
    assert names == ["strain", "temperature_K", "tau0_fs", "exponent", "reference_energy_eV", "energy_scale_eV",
                     "gate_V", "current_angle_deg"]
    for a in scn.axes:
        k = KNOBS[a.name]
        assert (a.unit, a.long_name) == (k.unit, k.long_name)
        assert ds[a.name].attrs["units"] == k.unit and ds[a.name].attrs["long_name"] == k.long_name
    assert scn.axis("strain").key == "material.strain.magnitude"
    assert scn.axis("tau0_fs").key == "conditions.scattering.tau0_fs"


def test_every_dataset_field_and_csv_column_takes_its_unit_from_the_vocabulary(run):
    _, ds = run
    for name, var in ds.data_vars.items():
        base = name[:-5] if name.endswith("_imag") else name
        assert var.attrs["units"] == field(base).unit(2), name
    frame = flat_table(ds)
    assert "v2w_y_amplitude [V]" in frame.columns and "chi_yxx [A m V^-2]" in frame.columns
    assert "error_sigma_xx [S]" in frame.columns
    assert frame.index.names[:2] == ["strain [1]", "temperature_K [K]"]


def test_knob_checks_and_fit_columns_read_the_same_units(run):
    scn, _ = run
    units = scenario_knobs(scn)
    for knob in ("strain", "temperature_K", "gate_V", "gate_offset_V", "current_angle_deg", *SCATTERING["power-law"]):
        assert units[knob] == KNOBS[knob].unit
    for col, unit in AXIS_COLUMNS.items():
        assert unit == (KNOBS[col].unit if col in KNOBS else OUTPUTS[col].unit_2d)
    assert QUANTITY_UNITS == {k: f.unit_2d for k, f in OUTPUTS.items()}


def test_the_engine_reports_the_vocabulary_units():
    from crosswind.models import build
    r = response(build("massive-dirac"), mu=0.15, temperature=10.0, tau=100.0, resolution=0)
    assert r.units == units_of(2)
    assert RESPONSE_FIELDS["chi"].unit(3) == "A V^-2" and RESPONSE_FIELDS["sigma"].unit(3) == "S m^-1"


def test_knob_ranges_name_the_problem():
    assert KNOBS["temperature_K"].check(-1.0) == "must lie in [0, inf] K, got -1"
    assert KNOBS["tau_fs"].check(0.0) == "must be > 0, got 0"
    assert KNOBS["exponent"].check(np.inf) == "must be a finite number, got inf"
    assert KNOBS["mu_eV"].check(0.2) is None
    with pytest.raises(KeyError, match="'sigma_zz' is not a result field"):
        field("sigma_zz")


UNIT_WORDS = {u for k in KNOBS.values() for u in [k.unit]} | {f.unit(d) for f in RESPONSE_FIELDS.values() for d in (2, 3)}
UNIT_WORDS -= {"1", "K", "V", "S", "eV", "deg", "m"}      # too short to tell a unit from a word


def test_no_other_solver_module_writes_a_unit_string():
    hits = []
    for path in SOLVER.rglob("*.py"):
        if path.name == "vocabulary.py":
            continue
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Constant) and isinstance(node.value, str) and node.value in UNIT_WORDS:
                hits.append(f"{path.relative_to(SOLVER)}:{node.lineno} {node.value!r}")
    assert not hits, "units belong in solver/vocabulary.py:\n" + "\n".join(hits)
