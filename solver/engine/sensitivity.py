"""Sensitivities: derivatives of every transport coefficient with respect to model parameters,
chemical potential, temperature and a constant relaxation time.

``sensitivities(model, wrt, mu=..., temperature=..., tau=...)`` returns ``{name: Response}`` where
each field of the :class:`~crosswind.solver.engine.response.Response` holds ∂field/∂name (same shapes,
including ``chi_parts`` and ``chi_dc_parts``).  Names are real model parameters (``"mass"``,
``"tilt"``, ``"strain_xx"``, … — see ``model.params``) or the conditions ``"mu"`` (eV),
``"temperature"`` (K) and ``"tau"`` (fs, constant relaxation time only).

How it is computed (docs/theory.md §A3, §A6):

* Forward mode, one Jacobian-vector product per name (``jax.jvp``): few inputs, many outputs.
  Every model parameter and every condition is always a differentiated input and only the
  tangent direction changes, so a single compiled program serves any choice of ``wrt``.
  ``mode="jacfwd"`` batches the tangents instead (``jax.jacfwd``; faster for many names, but one
  compilation per number of names).
* :func:`gradient` gives the derivative of a *scalar* target (a function of the Response) with
  respect to all names in one reverse-mode pass (``jax.grad``) or, with ``mode="forward"``, by
  forward mode; the two agree to rounding (tested).
* Derivatives are taken at fixed k-space nodes (the mesh placement is a numerical choice wrapped
  in ``stop_gradient``; :mod:`crosswind.solver.engine.mesh`), so ``resolution`` must be given.  At a
  converged level they agree with central differences of ``response`` itself.  Derivative
  integrands are sharper than the fields (∂f0/∂μ peaks harder than f0): a level converged for
  the values may not be for their derivatives — for the tilted Dirac cone at 20 K level 2 agrees
  with central differences to ~1e-8, level 1 only to ~3e-4 for ∂/∂velocity.
* Array conditions: a derivative with respect to ``mu`` (or ``temperature``, ``tau``) given as an
  array is the derivative of each sweep point with respect to its own value (sweep points are
  independent).
* Units: ``units[field]`` of each returned Response reads ``"(field unit) / (input unit)"``.
  ``error.<field>`` (``error.sigma``, ``error.chi_parts.dipole``, …) is |∂(error estimate)/∂name|:
  for real fields this is exactly the difference of the derivative between the two mesh levels,
  for complex fields a lower estimate of it.
  Fields the solver did not compute (NaN, e.g. ``dipole_sea`` without ``dipole_route="both"``)
  have NaN derivatives.

:func:`sensitivity_table` turns derivatives of one scalar target into the change per step of
each knob (per 0.1 % strain, per kelvin, per femtosecond, …) for reports.
"""
from __future__ import annotations

import dataclasses
import difflib
from collections.abc import Callable, Iterable, Mapping
from typing import NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from crosswind.models.band_model import BandModel
from crosswind.solver.engine.response import Response, Units, response
from crosswind.solver.engine.scattering import ConstantTau, as_scattering
from crosswind.solver.vocabulary import KNOBS

# the conditions one may differentiate by, with their units (those of the scenario knobs)
CONDITIONS = {"mu": KNOBS["mu_eV"].unit, "temperature": KNOBS["temperature_K"].unit, "tau": KNOBS["tau_fs"].unit}


# --------------------------------------------------------------------------------------------
# inputs: every real model parameter and every condition, as one pytree
# --------------------------------------------------------------------------------------------

def _names(wrt) -> list[str]:
    if isinstance(wrt, str):
        return [wrt]
    names = list(wrt)
    if not names:
        raise ValueError("sensitivities: wrt is empty; name at least one input, e.g. wrt=['mass', 'mu']")
    for n in names:
        if not isinstance(n, str):
            raise ValueError(f"sensitivities: wrt entries must be names (str), got {n!r}")
    return names


def _check_names(model: BandModel, names, tau_is_constant: bool, who: str):
    real = set(model.params)
    static = set(model.static_options())
    valid = sorted(real) + list(CONDITIONS)
    for n in names:
        if n in real and n in CONDITIONS:
            raise ValueError(f"{who}: '{n}' is both a parameter of {model.name} and a condition; "
                             "rename the model parameter")
        if n in static:
            raise ValueError(f"{who}: '{n}' is a structural (static) option of {model.name} and has "
                             f"no derivative; differentiate with respect to one of {', '.join(valid)}")
        if n not in real and n not in CONDITIONS:
            close = difflib.get_close_matches(n, valid, n=1)
            hint = f" Did you mean '{close[0]}'?" if close else ""
            raise ValueError(f"{who}: cannot differentiate with respect to '{n}'.{hint} "
                             f"Valid names: {', '.join(valid)}.")
        if n == "tau" and not tau_is_constant:
            raise ValueError(f"{who}: 'tau' derivatives need a constant relaxation time (a number, "
                             "array or ConstantTau); for an energy- or temperature-dependent scattering "
                             "model differentiate a model built from its parameters instead")


def _setup(model, mu, temperature, tau, resolution, who):
    if not isinstance(model, BandModel):
        raise TypeError(f"{who}: the first argument must be a BandModel from crosswind.models.build(...)")
    if resolution is None:
        raise ValueError(f"{who}: pass a fixed mesh level, e.g. resolution=2 (derivatives are taken "
                         "at fixed k-space nodes; automatic refinement cannot be differentiated)")
    scat = as_scattering(tau)
    const = isinstance(scat, ConstantTau)
    x = {"params": {k: jnp.asarray(v, dtype=jnp.float64) for k, v in model.params.items()},
         "mu": jnp.asarray(mu, dtype=jnp.float64),
         "temperature": jnp.asarray(temperature, dtype=jnp.float64)}
    if const:
        x["tau"] = jnp.asarray(scat.tau, dtype=jnp.float64)
    return x, scat, const


def _evaluator(model, scat, const, frequency, resolution, kw):
    def evaluate(x):
        m = model.with_params(**x["params"])
        tau = x["tau"] if const else scat
        return response(m, x["mu"], x["temperature"], tau, frequency, resolution=resolution, **kw)
    return evaluate


def _direction(x, name):
    """Tangent pytree: ones in the slot of ``name``, zeros elsewhere (explicit zeros, so the
    compiled program does not depend on which name is chosen)."""
    t = jax.tree_util.tree_map(jnp.zeros_like, x)
    if name in CONDITIONS:
        t[name] = jnp.ones_like(x[name])
    else:
        t["params"] = dict(t["params"], **{name: jnp.ones_like(x["params"][name])})
    return t


def _unit_of(model, name):
    if name in CONDITIONS:
        return CONDITIONS[name]
    u = model.spec[name].unit if name in model.spec.names() else ""
    return u if u not in ("", "-") else "1"


def _tidy(primal: Response, tangent: Response, model, name) -> Response:
    """NaN where the primal field is NaN (not computed), |·| for error estimates, derivative units."""
    def fix(p, t):
        return jnp.where(jnp.isnan(p), jnp.nan, t)

    bare = lambda r: dataclasses.replace(r, error=None)
    values = jax.tree_util.tree_map(fix, bare(primal), bare(tangent))
    err = jax.tree_util.tree_map(lambda p, t: jnp.where(p == 0, 0.0, jnp.abs(t)), primal.error, tangent.error)
    u = _unit_of(model, name)
    units = Units({k: f"({v}) / ({u})" for k, v in primal.units.items()})
    return dataclasses.replace(values, error=dataclasses.replace(err, units=units), units=units)


# --------------------------------------------------------------------------------------------
# public API
# --------------------------------------------------------------------------------------------

def sensitivities(model: BandModel, wrt, *, mu, temperature, tau, frequency=0.0, resolution: int = 2,
                  mode: str = "forward", with_value: bool = False, **kw):
    """Derivatives of every Response field with respect to each name in ``wrt``.

    ``wrt``: a name or a list of names — real parameters of ``model`` or ``"mu"`` (eV),
    ``"temperature"`` (K), ``"tau"`` (fs, constant τ).  ``mu``, ``temperature``, ``tau``,
    ``frequency`` (Hz) and further keywords (``intrinsic``, ``dipole_route``, ``chunk``) are those
    of :func:`~crosswind.solver.engine.response.response`; ``resolution`` (a fixed mesh level) is required.

    Returns ``{name: Response}`` of derivatives (each field ∂field/∂name, units
    ``"(field unit) / (input unit)"``); with ``with_value=True`` returns ``(value, {name: ...})``
    where ``value`` is the Response itself.  ``mode``: ``"forward"`` (one ``jax.jvp`` per name,
    one compiled program for every choice of names) or ``"jacfwd"`` (batched tangents).  For
    reverse mode use :func:`gradient` with a scalar target.

    Formula and units: for each name x, ∂F/∂x of every field F of ``response`` (σ [S], D [m],
    χ [A·m/V²], density [m⁻²], … for a 2D sheet; see ``help(response)`` for the formulas), taken
    by automatic differentiation at fixed k-space nodes (mesh placement is ``stop_gradient``ed),
    so ``units[field]`` reads ``"(field unit) / (input unit)"``, e.g. ∂χ/∂mu in A·m/V² per eV,
    ∂σ/∂temperature in S/K, ∂χ/∂tau in A·m/V² per fs.  Contract as in ``response``: derivatives of
    dc quantities are real, of phasor coefficients (σ, χ, χ^dc) complex.  At a converged
    ``resolution`` they agree with central differences of ``response``; derivative integrands are
    sharper than the fields, so check a second level.
    """
    names = _names(wrt)
    if mode not in ("forward", "jacfwd"):
        if mode == "reverse":
            raise ValueError("sensitivities: mode='reverse' needs a scalar target; use "
                             "gradient(model, target, wrt, ...) for reverse mode")
        raise ValueError(f"sensitivities: mode must be 'forward' or 'jacfwd', got {mode!r}")
    x, scat, const = _setup(model, mu, temperature, tau, resolution, "sensitivities")
    _check_names(model, names, const, "sensitivities")
    f = _evaluator(model, scat, const, frequency, resolution, kw)
    out = {}
    if mode == "forward":
        value = None
        for n in names:
            value, tan = jax.jvp(f, (x,), (_direction(x, n),))
            out[n] = _tidy(value, tan, model, n)
    else:
        tangents = [_direction(x, n) for n in names]
        stacked = jax.tree_util.tree_map(lambda *a: jnp.stack(a), *tangents)
        value = f(x)
        tans = jax.vmap(lambda t: jax.jvp(f, (x,), (t,))[1])(stacked)
        for i, n in enumerate(names):
            out[n] = _tidy(value, jax.tree_util.tree_map(lambda a: a[i], tans), model, n)  # noqa: B023
    return (value, out) if with_value else out


def _scalar(v, who):
    v = jnp.asarray(v)
    if jnp.iscomplexobj(v):
        raise ValueError(f"{who}: the target must be real; take .real, .imag or abs(...) of the field")
    return v


def gradient(model: BandModel, target: Callable[[Response], object], wrt, *, mu, temperature, tau,
             frequency=0.0, resolution: int = 2, mode: str = "reverse", **kw) -> dict:
    """Derivatives of a real scalar ``target(response)`` with respect to each name in ``wrt``
    (names as for :func:`sensitivities`).  ``mode="reverse"``: one ``jax.grad`` pass for all names
    (the target must return one number); ``mode="forward"``: one ``jax.jvp`` per name (the target
    may return an array, differentiated elementwise).  Returns ``{name: value}``."""
    names = _names(wrt)
    if mode not in ("reverse", "forward"):
        raise ValueError(f"gradient: mode must be 'reverse' or 'forward', got {mode!r}")
    x, scat, const = _setup(model, mu, temperature, tau, resolution, "gradient")
    _check_names(model, names, const, "gradient")
    f = _evaluator(model, scat, const, frequency, resolution, kw)
    g = lambda xx: _scalar(target(f(xx)), "gradient")
    if mode == "forward":
        return {n: jax.jvp(g, (x,), (_direction(x, n),))[1] for n in names}
    probe = jax.eval_shape(g, x)
    if probe.shape != ():
        raise ValueError(f"gradient: reverse mode needs a scalar target, got shape {probe.shape}; "
                         "reduce it (e.g. index one sweep point), use mode='forward', or jax.vmap over "
                         "the sweep")
    grads = jax.grad(g)(x)
    return {n: (grads[n] if n in CONDITIONS else grads["params"][n]) for n in names}


class SensitivityRow(NamedTuple):
    """One knob of a :func:`sensitivity_table`: the change of the target for a step of the knob
    (linear estimate ``derivative × step``), the knob's unit, and the change relative to the
    target's value."""
    knob: str
    step: float
    change: float
    unit: str
    derivative: float
    relative: float


def sensitivity_table(model: BandModel, target_fn: Callable[[Response], object], steps: Mapping[str, float],
                      *, mu, temperature, tau, frequency=0.0, resolution: int = 2, **kw) -> list[SensitivityRow]:
    """Change of a scalar target per step of each knob, largest first.

    ``target_fn`` maps a Response to a real scalar, e.g. ``lambda r: r.chi[1, 0, 0].real``.
    ``steps`` maps knob names (as for :func:`sensitivities`) to step sizes in the knob's unit,
    e.g. ``{"strain_xx": 1e-3, "temperature": 1.0, "tau": 1.0}`` for the change per 0.1 % strain,
    per kelvin and per femtosecond.  Rows are sorted by |change| (descending); ``relative`` is
    change / target value (NaN if the target is 0).  Linear estimates: for a step comparable to
    the knob's own scale the true change differs at second order.
    """
    if not isinstance(steps, Mapping) or not steps:
        raise ValueError("sensitivity_table: steps must be a non-empty dict {knob: step}, e.g. "
                         "{'tau': 1.0, 'temperature': 1.0}")
    for k, s in steps.items():
        if not np.isfinite(float(s)) or float(s) == 0.0:
            raise ValueError(f"sensitivity_table: step for '{k}' must be a finite non-zero number, got {s!r}")
    names = list(steps)
    x, scat, const = _setup(model, mu, temperature, tau, resolution, "sensitivity_table")
    _check_names(model, names, const, "sensitivity_table")
    f = _evaluator(model, scat, const, frequency, resolution, kw)
    g = lambda xx: _scalar(target_fn(f(xx)), "sensitivity_table")
    rows = []
    for n in names:
        value, d = jax.jvp(g, (x,), (_direction(x, n),))
        if np.shape(value) != ():
            raise ValueError(f"sensitivity_table: target_fn must return one number, got shape "
                             f"{np.shape(value)}; index a single sweep point")
        d, value, step = float(d), float(value), float(steps[n])
        change = d * step
        rel = change / value if value != 0 else float("nan")
        rows.append(SensitivityRow(n, step, change, _unit_of(model, n), d, rel))
    rows.sort(key=lambda r: -abs(r.change) if np.isfinite(r.change) else 0.0)
    return rows


def format_sensitivity_table(rows: Iterable[SensitivityRow], target: str = "target", unit: str = "") -> str:
    """Plain-text table of :func:`sensitivity_table` rows for a report."""
    lines = [f"{'knob':<16} {'step':>14} {'change of ' + target:>24} {'relative':>10}"]
    for r in rows:
        step = f"{r.step:g} {r.unit}"
        lines.append(f"{r.knob:<16} {step:>14} {r.change:>+20.4e} {unit:<3} {r.relative:>+10.2e}")
    return "\n".join(lines)
