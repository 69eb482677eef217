"""Crosswind solver: what the field does to the crystal.

Importing this package (like ``crosswind.models``) switches JAX to 64-bit floats process-wide.
"""
import crosswind.models  # noqa: F401  (float64 and the compilation cache, models/runtime.py)
from crosswind.solver.engine.density import gate_density, mu_from_density  # noqa: E402
from crosswind.solver.engine.response import Response, response  # noqa: E402
from crosswind.solver.engine.scattering import ConstantTau, MatthiessenTau, PowerLawTau  # noqa: E402
from crosswind.solver.engine.topology import chern_number  # noqa: E402

__all__ = ["ConstantTau", "MatthiessenTau", "PowerLawTau", "Response", "chern_number",
           "gate_density", "mu_from_density", "response"]
from crosswind.solver.engine.sensitivity import sensitivities, sensitivity_table  # noqa: E402
from crosswind.solver.fitting.fit import FitResult, fit, scaling_fit  # noqa: E402
from crosswind.solver.fitting.measurements import load_measurements  # noqa: E402

__all__ += ["FitResult", "fit", "load_measurements", "scaling_fit", "sensitivities", "sensitivity_table"]
