"""Crosswind solver: what the field does to the crystal.

Subpackages, lowest layer first (imports point downward only; tests/test_layout.py):

* :mod:`crosswind.solver.engine` — the physics engine (pure JAX, no I/O): k-space integration,
  occupations, relaxation times, the response tensors, densities, topology, sensitivities and the
  Hall-bar relations;
* :mod:`crosswind.solver.study` — scenario files, the knobs, the one evaluation chain and the sweep
  runner with its checkpoints;
* :mod:`crosswind.solver.reporting` — figures and the summary of a finished sweep;
* :mod:`crosswind.solver.fitting` — least-squares fits, measured data and the sensitivity table;
* :mod:`crosswind.solver.cli` and :mod:`crosswind.solver.demo` — the ``crosswind`` command.

Names and units of every knob and field: :mod:`crosswind.solver.vocabulary`.  Importing this
package (like ``crosswind.models``) switches JAX to 64-bit floats process-wide.
"""
import crosswind.models  # noqa: F401  (float64 and the compilation cache, models/runtime.py)
from crosswind.solver.engine.density import gate_density, mu_from_density, response_at_density
from crosswind.solver.engine.response import Response, response
from crosswind.solver.engine.scattering import ConstantTau, MatthiessenTau, PowerLawTau
from crosswind.solver.engine.sensitivity import sensitivities, sensitivity_table
from crosswind.solver.engine.topology import chern_number
from crosswind.solver.fitting.fit import FitResult, fit, scaling_fit
from crosswind.solver.fitting.measurements import load_measurements

__all__ = ["ConstantTau", "FitResult", "MatthiessenTau", "PowerLawTau", "Response", "chern_number", "fit",
           "gate_density", "load_measurements", "mu_from_density", "response", "response_at_density",
           "scaling_fit", "sensitivities", "sensitivity_table"]
