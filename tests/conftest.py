"""Strict numerics for the whole test session, set once: float64, rank promotion raises,
strict dtype promotion (no silent float→complex or int→float promotion of arrays)."""
import gc
import os

import jax
import pytest

# The test process compiles a few hundred programs; with JAX's persistent compilation cache on,
# a long session crashed (segmentation fault inside the cache write, jax 0.10.2 on CPU) although
# every file passes alone.  The in-memory caches serve one process anyway, so the session itself
# runs without the persistent cache; the variable is restored so that subprocesses (CLI tests)
# still share the on-disk cache (tests/test_runtime.py checks the setting itself).
_previous = os.environ.get("CROSSWIND_CACHE")
os.environ["CROSSWIND_CACHE"] = "off"
import crosswind.models  # noqa: E402,F401  (configures the runtime once, cache off)

if _previous is None:
    del os.environ["CROSSWIND_CACHE"]
else:
    os.environ["CROSSWIND_CACHE"] = _previous

jax.config.update("jax_enable_x64", True)
jax.config.update("jax_numpy_rank_promotion", "raise")
jax.config.update("jax_numpy_dtype_promotion", "strict")


@pytest.fixture(autouse=True, scope="module")
def _release_compiled_programs():
    """Free the compiled programs of a test module when it ends: a full session otherwise holds
    several hundred executables, and late compilations crashed (segmentation fault inside XLA's
    CPU compiler) although every file passes alone."""
    yield
    jax.clear_caches()
    gc.collect()
