"""Crosswind: Berry-curvature transport in real devices.

The installed package is ``crosswind`` with three subpackages: ``crosswind.models`` (band models,
from ``models/``), ``crosswind.solver`` (engine, scenarios, reports and fits, from ``solver/``) and
``crosswind.validation`` (the published check values, from ``validation/``).  This file (kept in
``solver/root_package/``) only carries the version.
"""
from importlib import metadata as _metadata

try:
    __version__ = _metadata.version("crosswind")
except _metadata.PackageNotFoundError:  # running from a source tree that was never installed
    __version__ = "0+unknown"

__all__ = ["__version__"]
