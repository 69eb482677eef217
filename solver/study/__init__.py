"""The scenario layer: scenario files, the vocabulary of knobs and axes, the one evaluation chain
(gate → density → μ → scattering → response → Hall bar) and the sweep runner with its checkpoints.

Imports the engine below it; never the reporting or fitting layers above.
"""
