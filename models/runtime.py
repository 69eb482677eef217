"""Process-wide JAX settings applied once when ``crosswind.models`` is imported.

* float64 everywhere (``jax_enable_x64``).
* Persistent compilation cache: compiled programs are stored on disk and reused by later
  processes, so a second ``crosswind demo`` (or any repeated script) skips most compilation.
  Location: ``$CROSSWIND_CACHE_DIR`` if set, else ``$XDG_CACHE_HOME/crosswind`` (default
  ``~/.cache/crosswind``).  JAX writes each entry to a temporary file and renames it into place,
  so concurrent processes can share the folder.  Switch it off with ``CROSSWIND_CACHE=off``
  (or delete the folder to empty it).  A folder that cannot be created disables the cache with
  no error: caching only ever saves time.
* CPU code generation: XLA's CPU backend hands small reductions and contractions to a library
  (YNNPACK) as separate calls, which breaks the elementwise fusions that the per-k-point band
  geometry consists of.  Switching those library fusions off (``--xla_cpu_experimental_ynn_fusion_type=``
  appended to ``XLA_FLAGS``) made a lattice response call about a fifth faster
  (docs/performance.md).  It is applied only for the jaxlib versions it was measured with
  (``_YNN_OFF_VERSIONS``: XLA aborts on a flag it does not know), only before JAX has started its
  backends, never over a user's own setting of that flag, and not with ``CROSSWIND_XLA_TUNING=off``.
"""
from __future__ import annotations

import os

import jax
import jaxlib

try:        # a private JAX function: where it moves, setting the flag late is merely ineffective
    from jax._src.xla_bridge import backends_are_initialized as _backends_started
except ImportError:                     # pragma: no cover
    def _backends_started() -> bool:
        return False

#: jaxlib versions [lo, hi) whose XLA knows the YNNPACK fusion flag and was measured with it off
#: (0.10.2, docs/performance.md); widen only after measuring a newer jaxlib
_YNN_OFF_VERSIONS = ((0, 10), (0, 11))
_YNN_FLAG = "--xla_cpu_experimental_ynn_fusion_type"


def cache_dir() -> str | None:
    """The compilation-cache folder in use, or None when switched off."""
    if os.environ.get("CROSSWIND_CACHE", "").strip().lower() in ("off", "0", "no", "false"):
        return None
    path = os.environ.get("CROSSWIND_CACHE_DIR")
    if not path:
        base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
        path = os.path.join(base, "crosswind")
    return path


def _jaxlib_version() -> tuple:
    parts = []
    for p in str(getattr(jaxlib, "__version__", "0")).split(".")[:2]:
        digits = "".join(ch for ch in p if ch.isdigit())
        parts.append(int(digits) if digits else 0)
    return tuple(parts)


def xla_tuning(environ=None, version=None, started=None) -> bool:
    """Append the CPU code-generation flag to ``XLA_FLAGS`` in ``environ`` (default ``os.environ``)
    where it is safe (see the module docstring); True if it was added."""
    env = os.environ if environ is None else environ
    if env.get("CROSSWIND_XLA_TUNING", "").strip().lower() in ("off", "0", "no", "false"):
        return False
    lo, hi = _YNN_OFF_VERSIONS
    if not (lo <= (_jaxlib_version() if version is None else version) < hi):
        return False
    if started is None:
        started = _backends_started()
    flags = env.get("XLA_FLAGS", "")
    if started or _YNN_FLAG in flags:
        return False
    env["XLA_FLAGS"] = (flags + " " + _YNN_FLAG + "=").strip()
    return True


def configure() -> str | None:
    jax.config.update("jax_enable_x64", True)
    xla_tuning()
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
