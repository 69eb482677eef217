"""The scenario layer: scenario files, the vocabulary of knobs and axes, the one evaluation chain
(gate → density → μ → scattering → response → Hall bar) and the sweep runner with its checkpoints.

Imports the engine below it; never the reporting or fitting layers above.
"""
from crosswind.solver.study.chain import ChainResult, evaluate, gate_capacitance
from crosswind.solver.study.knobs import (
           KnobError,
           base_values,
           check_knob,
           knob_units,
           scenario_knobs,
)
from crosswind.solver.study.scenario import (
           Scenario,
           ScenarioError,
           load_scenario,
           parse_scenario,
)
from crosswind.solver.study.sweep import (
           RunError,
           compute_batch,
           open_results,
           run_scenario,
)

__all__ = ["ChainResult", "KnobError", "RunError", "Scenario", "ScenarioError", "base_values", "check_knob",
           "compute_batch", "evaluate", "gate_capacitance", "knob_units", "load_scenario", "open_results",
           "parse_scenario", "run_scenario", "scenario_knobs"]
