"""Crosswind band models: what the crystal is.

Importing this package switches JAX to 64-bit floats (``jax_enable_x64``) once, for the whole
process: every array Crosswind creates is float64/complex128, and a user's own JAX code in the
same process also gets 64-bit defaults.  It also turns on JAX's persistent compilation cache
(``models/runtime.py``: ``~/.cache/crosswind`` or ``$XDG_CACHE_HOME/crosswind``; switch off with
``CROSSWIND_CACHE=off``).
"""
from .runtime import configure as _configure

_configure()

from . import builtin  # noqa: E402,F401  (its modules register the catalogue entries)
from .band_model import BandModel  # noqa: E402
from .custom import from_function  # noqa: E402
from .domain import Continuum, Lattice  # noqa: E402
from .geometry import BandGeometry, band_geometry, geometry_at  # noqa: E402
from .params import Parameter, ParamSpec  # noqa: E402
from .registry import build, catalogue, describe_catalogue  # noqa: E402
from .tightbinding import load_tight_binding, parse_tight_binding  # noqa: E402

__all__ = ["BandModel", "BandGeometry", "Continuum", "Lattice", "Parameter", "ParamSpec",
           "band_geometry", "build", "catalogue", "describe_catalogue", "geometry_at",
           "from_function", "load_tight_binding", "parse_tight_binding"]
