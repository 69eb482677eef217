"""Crosswind solver: what the field does to the crystal.

Importing this package (like ``crosswind.models``) switches JAX to 64-bit floats process-wide.
"""
import jax as _jax

_jax.config.update("jax_enable_x64", True)

from .density import gate_density, mu_from_density  # noqa: E402
from .response import Response, response  # noqa: E402
from .scattering import ConstantTau, MatthiessenTau, PowerLawTau  # noqa: E402
from .topology import chern_number  # noqa: E402

__all__ = ["ConstantTau", "MatthiessenTau", "PowerLawTau", "Response", "chern_number",
           "gate_density", "mu_from_density", "response"]
