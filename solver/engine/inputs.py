"""Checks of the numeric arguments of :func:`~crosswind.solver.engine.response.response` at the API
boundary: a bad value is refused with a ``ValueError`` that names the argument, the offending entry
and the fix, before any k-space work.

* ``mu`` (eV) must be finite; ``temperature`` (K) finite and >= 0 (0 is the T → 0 limit);
* every relaxation time of the scattering model (``tau``, ``tau0``, ``tau_impurity``,
  ``tau_phonon``; fs) positive and finite (the shape parameters of the scattering objects are
  checked when the object is built, :mod:`crosswind.solver.engine.scattering`);
* ``frequency`` (Hz) finite and >= 0 (E(t) = Re[E e^{iωt}] with ω >= 0);
* ``resolution`` ``None`` or an integer level, ``max_level`` ``None`` or an integer (else
  ``TypeError``).

Only concrete values are checked.  Values traced by ``jax.grad``/``jit`` cannot be inspected: a
NaN or inf among them propagates into the result (every field NaN), and the sweep runner
(:mod:`crosswind.solver.study.sweep`) refuses to write such a result, naming the point.
"""
from __future__ import annotations

import numbers

import jax
import numpy as np

# relaxation-time entries of ``scattering.arrays()`` per scattering class, by their argument names
_TAU_NAMES = {"ConstantTau": {"tau0": "tau"}, "PowerLawTau": {"tau0": "tau0"},
              "MatthiessenTau": {"timp": "tau_impurity", "tph": "tau_phonon"}}


def is_traced(*xs) -> bool:
    """True if any leaf of ``xs`` is a JAX tracer (inside ``grad``/``jit``/``vmap``)."""
    return any(isinstance(x, jax.core.Tracer) for x in jax.tree_util.tree_leaves(xs))


def first_bad(values, ok) -> tuple | None:
    """``(index, value)`` of the first entry of ``values`` where ``ok`` is False, else ``None``."""
    arr = np.asarray(values, dtype=float)
    bad = ~np.asarray(ok(arr), dtype=bool)
    if not bad.any():
        return None
    idx = tuple(int(i) for i in np.unravel_index(int(np.argmax(bad)), arr.shape))
    return idx, float(arr[idx])


def _where(idx: tuple) -> str:
    return f" at index {idx}" if idx else ""


def check_finite(owner: str, name: str, values, unit: str, fix: str) -> None:
    """Refuse NaN/inf in a concrete ``values`` (any shape) with a message naming ``name``."""
    if is_traced(values):
        return
    hit = first_bad(values, np.isfinite)
    if hit is not None:
        idx, v = hit
        raise ValueError(f"{owner}: {name} must be finite ({unit}); got {v!r}{_where(idx)}. {fix}")


def _check_temperature(temperature) -> None:
    check_finite("response", "temperature", temperature, "K",
                 "Pass temperatures in K, e.g. temperature=10.0 (0 gives the T -> 0 limit).")
    if is_traced(temperature):
        return
    hit = first_bad(temperature, lambda a: a >= 0)
    if hit is not None:
        idx, v = hit
        raise ValueError(f"response: temperature must be >= 0 K; got {v:g}{_where(idx)}. "
                         "Pass absolute temperatures in K (0 gives the T -> 0 limit).")


def _check_tau(tau_arr: dict, kind: str) -> None:
    if is_traced(tau_arr):
        return
    for key, name in _TAU_NAMES[kind].items():
        hit = first_bad(tau_arr[key], lambda a: np.isfinite(a) & (a > 0))
        if hit is not None:
            idx, v = hit
            raise ValueError(f"response: tau must be positive (fs) and finite; {kind} has {name} = {v!r}"
                             f"{_where(idx)}. Pass relaxation times in fs, e.g. tau=100.0.")


def _check_frequency(frequency) -> None:
    check_finite("response", "frequency", frequency, "Hz", "Pass the drive frequency in Hz, e.g. 17.0 "
                 "(0 for a static field).")
    if is_traced(frequency):
        return
    hit = first_bad(frequency, lambda a: a >= 0)
    if hit is not None:
        raise ValueError(f"response: frequency must be >= 0 Hz (E(t) = Re[E exp(i omega t)] with "
                         f"omega >= 0); got {hit[1]:g}. Pass the magnitude of the drive frequency.")


def _check_level(name: str, value, example: str) -> None:
    if value is None:
        return
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise TypeError(f"response: {name} must be None or an integer level, e.g. {name}={example}; "
                         f"got {value!r} ({type(value).__name__}).")


def check_arguments(mu, temperature, tau_arr: dict, kind: str, frequency, resolution, max_level) -> None:
    """Every check of the module docstring, in argument order; the first failure raises."""
    _check_level("resolution", resolution, "2")
    _check_level("max_level", max_level, "3")
    check_finite("response", "mu", mu, "eV", "Pass chemical potentials in eV, e.g. mu=0.1.")
    _check_temperature(temperature)
    _check_tau(tau_arr, kind)
    _check_frequency(frequency)
