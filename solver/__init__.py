"""Crosswind solver: what the field does to the crystal."""
import jax as _jax

_jax.config.update("jax_enable_x64", True)
