"""The fitting layer: least-squares fits with error bars, measured data files, scenario fits and
the sensitivity tables written next to a sweep."""
from crosswind.solver.fitting.fit import FitResult, fit, scaling_fit
from crosswind.solver.fitting.measurements import load_measurements
from crosswind.solver.fitting.peak_sensitivity import (
           peak_sensitivities,
           write_sensitivities,
)
from crosswind.solver.fitting.scenario_fit import FitInputError, predictor, run_fit

__all__ = ["FitInputError", "FitResult", "fit", "load_measurements", "peak_sensitivities", "predictor", "run_fit",
           "scaling_fit", "write_sensitivities"]
