"""Parameter specifications: names, units, defaults, allowed ranges and meanings.

A model's numeric parameters travel as one pytree (a ``dict`` of float64 scalars) that the
solver never inspects but differentiates through.  Structural options (number of valleys, a
material preset) are *static*: they choose the Hamiltonian function and are not differentiable.
"""
from __future__ import annotations

import difflib
import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np


@dataclass(frozen=True)
class Parameter:
    """One model parameter.

    ``kind`` is ``"real"`` (differentiable float64 scalar), ``"int"`` or ``"choice"``
    (static, selects the Hamiltonian).  ``bounds`` is a closed interval ``(lo, hi)``; use
    ``math.inf`` for an open end.  ``choices`` lists allowed values of a static parameter.
    """

    name: str
    unit: str
    default: Any
    meaning: str
    bounds: tuple[float, float] = (-math.inf, math.inf)
    kind: str = "real"
    choices: tuple = ()

    def describe(self) -> str:
        lo, hi = self.bounds
        if self.kind == "real":
            rng = f"[{lo:g}, {hi:g}]"
        else:
            rng = "{" + ", ".join(str(c) for c in self.choices) + "}"
        unit = self.unit or "-"
        return f"{self.name:<14} {unit:<10} default {self.default!s:<10} range {rng:<18} {self.meaning}"


def _is_concrete(x) -> bool:
    return not isinstance(x, jax.core.Tracer)


@dataclass(frozen=True)
class ParamSpec:
    """The ordered set of parameters a model accepts."""

    parameters: tuple[Parameter, ...]
    owner: str = "model"

    def names(self) -> tuple[str, ...]:
        return tuple(p.name for p in self.parameters)

    def __getitem__(self, name: str) -> Parameter:
        for p in self.parameters:
            if p.name == name:
                return p
        raise KeyError(name)

    def resolve(self, given: Mapping[str, Any]) -> tuple[dict, dict]:
        """Check ``given`` against the spec and return ``(real_params, static_params)``.

        Unknown names raise ``ValueError`` listing the valid ones (and the closest match);
        concrete values outside the allowed range raise ``ValueError`` giving the range.
        Traced JAX values are accepted without range checks so that gradients flow.
        """
        valid = self.names()
        for key in given:
            if key not in valid:
                close = difflib.get_close_matches(key, valid, n=1)
                hint = f" Did you mean '{close[0]}'?" if close else ""
                raise ValueError(
                    f"{self.owner}: unknown parameter '{key}'.{hint} "
                    f"Valid parameters: {', '.join(valid)}."
                )
        real: dict[str, jax.Array] = {}
        static: dict[str, Any] = {}
        for p in self.parameters:
            value = given.get(p.name, p.default)
            if p.kind == "real":
                if _is_concrete(value):
                    arr = np.asarray(value)
                    if arr.shape != () or not np.issubdtype(arr.dtype, np.number) or np.iscomplexobj(arr):
                        raise ValueError(
                            f"{self.owner}: parameter '{p.name}' must be a real scalar in {p.unit or 'no unit'}, "
                            f"got {value!r}."
                        )
                    v = float(arr)
                    lo, hi = p.bounds
                    if not (lo <= v <= hi) or not math.isfinite(v):
                        raise ValueError(
                            f"{self.owner}: parameter '{p.name}' = {v:g} {p.unit} is outside the allowed "
                            f"range [{lo:g}, {hi:g}] {p.unit} ({p.meaning})."
                        )
                # concrete inputs stay concrete (numpy) so builders may read them with float()
                # even inside jax.jit; traced inputs pass through untouched so gradients flow
                real[p.name] = np.float64(value) if _is_concrete(value) else jnp.asarray(value, dtype=jnp.float64)
            else:
                if not _is_concrete(value):
                    raise ValueError(
                        f"{self.owner}: parameter '{p.name}' is structural and cannot be traced; "
                        f"pass a plain value from {list(p.choices)}."
                    )
                if p.choices and value not in p.choices:
                    raise ValueError(
                        f"{self.owner}: parameter '{p.name}' = {value!r} is not allowed; "
                        f"choose one of {list(p.choices)}."
                    )
                static[p.name] = value
        return real, static

    def table(self) -> str:
        return "\n".join("  " + p.describe() for p in self.parameters)


def real(name, unit, default, meaning, lo=-math.inf, hi=math.inf) -> Parameter:
    """Shorthand for a differentiable real parameter."""
    return Parameter(name=name, unit=unit, default=default, meaning=meaning, bounds=(lo, hi))


def choice(name, default, choices, meaning, unit="") -> Parameter:
    """Shorthand for a static (structural) parameter."""
    return Parameter(name=name, unit=unit, default=default, meaning=meaning, kind="choice",
                     choices=tuple(choices))


def pop_lattice_length(params: dict, key: str, owner: str) -> float:
    """Remove a lattice-setting length (Å) from the real parameters and return it as a float.
    Lattice vectors are static metadata, so such a length cannot be traced; strain is the
    differentiable way to deform the lattice."""
    value = params.pop(key)
    try:
        return float(value)
    except Exception as exc:
        raise ValueError(f"{owner}: '{key}' sets the lattice and cannot be traced; pass a number in Å "
                         "(differentiate with respect to strain instead).") from exc
