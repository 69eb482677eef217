"""Process-wide JAX settings applied once when ``crosswind.models`` is imported.

* float64 everywhere (``jax_enable_x64``).
* Persistent compilation cache: compiled programs are stored on disk and reused by later
  processes, so a second ``crosswind demo`` (or any repeated script) skips most compilation.
  Location: ``$CROSSWIND_CACHE_DIR`` if set, else ``$XDG_CACHE_HOME/crosswind`` (default
  ``~/.cache/crosswind``).  JAX writes each entry to a temporary file and renames it into place,
  so concurrent processes can share the folder.  Switch it off with ``CROSSWIND_CACHE=off``
  (or delete the folder to empty it).  A folder that cannot be created disables the cache with
  no error: caching only ever saves time.
"""
from __future__ import annotations

import os

import jax


def cache_dir() -> str | None:
    """The compilation-cache folder in use, or None when switched off."""
    if os.environ.get("CROSSWIND_CACHE", "").strip().lower() in ("off", "0", "no", "false"):
        return None
    path = os.environ.get("CROSSWIND_CACHE_DIR")
    if not path:
        base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
        path = os.path.join(base, "crosswind")
    return path


def configure() -> str | None:
    jax.config.update("jax_enable_x64", True)
    path = cache_dir()
    if path is None:
        return None
    try:
        os.makedirs(path, exist_ok=True)
    except OSError:
        return None
    jax.config.update("jax_compilation_cache_dir", path)
    # CPU programs compile in seconds; cache every one of them, however small
    jax.config.update("jax_persistent_cache_min_compile_time_secs", 0.0)
    jax.config.update("jax_persistent_cache_min_entry_size_bytes", 0)
    return path
