"""Matplotlib without a display: every figure of the project is drawn through :func:`pyplot`."""
from __future__ import annotations


def pyplot():
    """``matplotlib.pyplot`` on the non-interactive Agg backend (imported on first use: matplotlib
    is only loaded when a figure is drawn)."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    return plt


__all__ = ["pyplot"]
