"""Strict numerics for the whole test session, set once: float64, rank promotion raises,
strict dtype promotion (no silent float→complex or int→float promotion of arrays)."""
import jax

jax.config.update("jax_enable_x64", True)
jax.config.update("jax_numpy_rank_promotion", "raise")
jax.config.update("jax_numpy_dtype_promotion", "strict")
