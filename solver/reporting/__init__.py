"""The reporting layer: figures and the human-readable summary of a finished sweep."""
from crosswind.solver.reporting.plotting import pyplot
from crosswind.solver.reporting.report import peak_index, summary_markdown, write_report

__all__ = ["peak_index", "pyplot", "summary_markdown", "write_report"]
