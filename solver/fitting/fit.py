"""Least-squares fits of model parameters to measurements, with Jacobians by automatic
differentiation, and the scaling-law fit of the nonlinear Hall ratio.

:func:`fit` minimises ½Σ rᵢ² for a residual vector r(p) = residual_fn(p) (divided by ``sigma``
when given) with ``scipy.optimize.least_squares`` (trust-region reflective, bounds allowed), the
Jacobian ∂r/∂p supplied by JAX forward mode.  Internally every free parameter is measured in units
of its own scale (|initial value|, or half the bounded range if the initial value is 0), so
parameters of very different sizes (a tilt of 5e4 m/s next to a mass of 0.1 eV) are treated alike.

At the optimum (common practice; e.g. Press et al., Numerical Recipes, §15.5):

* covariance C = (JᵀJ)⁻¹ · χ²_red with χ²_red = Σrᵢ²/(m − n) (m residuals, n free parameters);
  ``absolute_sigma=True`` drops the χ²_red factor (residuals already in units of known errors);
* standard errors √C_ii, correlations C_ij/√(C_ii C_jj);
* identifiability warnings when |correlation| > 0.99 for a pair of parameters (the data fix only a
  combination, e.g. τ and a tilt that both scale a dipole signal) or when JᵀJ is near-singular:
  condition number > 1e12 after scaling each column of J to unit length (so the number does not
  depend on the parameters' units);
* a Jacobian column that vanishes, or a rank-deficient J, makes the fit *not converged* (that
  parameter is not determined by the data).

A converged fit can still be *unreliable* (``FitResult.status``, with the reasons in ``problems``):
it ended where it started (no parameter moved by ``AT_BOUND_TOLERANCE`` of its scale, and no other
start reached the same cost); a parameter
ends at a bound (its standard error is then NaN: the optimum lies beyond the bound and the local
covariance means nothing); moving a parameter by its whole scale changes the residuals by less than
``SENSITIVITY_FLOOR`` of their size (the data cannot see it: e.g. data the model cannot produce); a
standard error exceeds ``RELATIVE_STDERR_LIMIT`` × |value|; or, with known errors
(``absolute_sigma=True``), χ² has a two-sided probability below ``CHI2_P_LIMIT`` for its degrees
of freedom (the model does not describe the data, or the errors are misstated).

Several starts (``starts > 1``) draw further starting points uniformly within the bounds (within
±50 % of the initial value for a parameter without two finite bounds) from ``seed``; the best
(lowest cost) is reported.  A fit that does not converge says why: the evaluation limit, a
singular Jacobian, or residuals/Jacobian that are NaN or infinite.

:func:`scaling_fit` fits E⊥/E∥² = C0 + C1 σ_xx + C2 σ_xx² by linear least squares.
"""
from __future__ import annotations

import inspect
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

import jax
import jax.numpy as jnp
import numpy as np
from scipy.optimize import least_squares
from scipy.special import chdtr, chdtrc  # χ² cdf and survival (scipy.stats costs 0.3 s to import)

from crosswind.solver.vocabulary import OUTPUTS

_RATIO = OUTPUTS["ratio"].unit_2d        # unit of E⊥/E∥² (m V^-1)

CORRELATION_LIMIT = 0.99
CONDITION_LIMIT = 1e12
RELATIVE_STDERR_LIMIT = 1.0     # a standard error above 100 % of the value: the value is not determined
SENSITIVITY_FLOOR = 1e-6        # |∂r/∂p|·scale below this fraction of |r|: the data do not see p
CHI2_P_LIMIT = 1e-3             # two-sided χ² probability below this (known errors): model or errors wrong
AT_BOUND_TOLERANCE = 1e-6       # within this fraction of the scale from a bound: "at the bound"
TANGENT_BLOCK = 4               # forward-mode Jacobian: free parameters whose tangents run in one program


@dataclass(frozen=True)
class FitResult:
    """Outcome of :func:`fit`.

    ``values``: all parameters (free and fixed) at the optimum; ``stderr``: standard errors (0 for
    fixed parameters, NaN if undetermined); ``covariance``/``correlation``: matrices over ``free``
    (in that order); ``cost`` = ½Σrᵢ² at the optimum; ``chi2_reduced`` = Σrᵢ²/(m − n);
    ``converged`` and ``message`` (why it stopped); ``nfev``: residual evaluations of the best start;
    ``starts_tried`` and ``start_costs`` (cost reached from each start, NaN where a start failed);
    ``identifiability_warnings``: plain-language notes naming parameters the data do not separate.
    """

    values: dict
    stderr: dict
    covariance: np.ndarray
    correlation: np.ndarray
    cost: float
    chi2_reduced: float
    converged: bool
    message: str
    nfev: int
    starts_tried: int
    identifiability_warnings: tuple
    free: tuple = ()
    fixed: tuple = ()
    dof: int = 0
    residuals: np.ndarray = field(default=None, repr=False)
    condition_number: float = math.nan
    start_costs: tuple = ()
    problems: tuple = ()
    at_bound: tuple = ()

    @property
    def status(self) -> str:
        """"failed" (not converged), "unreliable" (converged with ``problems``) or "ok"."""
        return "failed" if not self.converged else "unreliable" if self.problems else "ok"

    def summary(self) -> str:
        """Plain-text table: value ± standard error per parameter, then the fit quality."""
        lines = [f"{'parameter':<16} {'value':>14} {'std. error':>12}"]
        for k, v in self.values.items():
            if k in self.free:
                lines.append(f"{k:<16} {v:>14.6g} {self.stderr[k]:>12.3g}")
            else:
                lines.append(f"{k:<16} {v:>14.6g} {'(fixed)':>12}")
        lines.append(f"cost {self.cost:.6g}, reduced chi^2 {self.chi2_reduced:.4g} ({self.dof} dof), "
                     f"{'converged' if self.converged else 'NOT converged'}: {self.message}")
        lines.extend(f"warning: {w}" for w in self.identifiability_warnings)
        if self.converged and self.problems:
            lines.append("UNRELIABLE fit:")
        lines.extend(f"problem: {w}" for w in self.problems)
        return "\n".join(lines)


class _Stop(Exception):
    pass


def _check_inputs(initial, bounds, fixed):
    if not isinstance(initial, Mapping) or not initial:
        raise ValueError("fit: initial must be a non-empty dict {parameter: starting value}")
    init = {}
    for k, v in initial.items():
        try:
            x = float(v)
        except (TypeError, ValueError):
            raise ValueError(f"fit: initial value of '{k}' must be a real number, got {v!r}") from None
        if not math.isfinite(x):
            raise ValueError(f"fit: initial value of '{k}' is {x}; give a finite starting value")
        init[k] = x
    fixed = set() if fixed is None else set([fixed] if isinstance(fixed, str) else fixed)
    unknown = fixed - set(init)
    if unknown:
        raise ValueError(f"fit: fixed names {sorted(unknown)} are not in initial ({', '.join(init)}); "
                         "every fixed parameter needs a value in initial")
    bounds = {} if bounds is None else dict(bounds)
    unknown = set(bounds) - set(init)
    if unknown:
        raise ValueError(f"fit: bounds for {sorted(unknown)} which are not in initial ({', '.join(init)})")
    lo, hi = {}, {}
    for k in init:
        b = bounds.get(k, (-math.inf, math.inf))
        try:
            a, c = (float(b[0]) if b[0] is not None else -math.inf), (float(b[1]) if b[1] is not None else math.inf)
        except (TypeError, IndexError, ValueError):
            raise ValueError(f"fit: bounds['{k}'] must be a pair (low, high), got {b!r}") from None
        if not a < c:
            raise ValueError(f"fit: bounds['{k}'] = ({a:g}, {c:g}) is empty; need low < high")
        if not a <= init[k] <= c and k not in fixed:
            raise ValueError(f"fit: initial '{k}' = {init[k]:g} lies outside its bounds ({a:g}, {c:g}); "
                             "start inside the bounds")
        lo[k], hi[k] = a, c
    free = [k for k in init if k not in fixed]
    if not free:
        raise ValueError("fit: every parameter is fixed; leave at least one free")
    return init, fixed, free, lo, hi


def _scales(init, free, lo, hi):
    s = {}
    for k in free:
        if init[k] != 0.0:
            s[k] = abs(init[k])
        elif math.isfinite(lo[k]) and math.isfinite(hi[k]):
            s[k] = 0.5 * (hi[k] - lo[k])
        else:
            s[k] = 1.0
    return s


def _random_start(rng, init, free, lo, hi, scale):
    out = dict(init)
    for k in free:
        if math.isfinite(lo[k]) and math.isfinite(hi[k]):
            v = rng.uniform(lo[k], hi[k])
        else:
            v = init[k] + scale[k] * rng.uniform(-0.5, 0.5)
            v = min(max(v, lo[k]), hi[k])
        out[k] = v
    return out


def _bad_entries(r):
    idx = np.flatnonzero(~np.isfinite(r))
    shown = ", ".join(str(i) for i in idx[:10]) + (" …" if idx.size > 10 else "")
    return shown


def fit(residual_fn: Callable[[dict], object], initial: Mapping[str, float], *, bounds: Mapping | None = None,
        fixed=None, starts: int = 1, seed: int = 0, sigma=None, absolute_sigma: bool = False,
        jacobian: str = "forward", tolerance: float = 1e-10, max_evaluations: int | None = None,
        jit: bool = False, progress: Callable[[str], None] | None = None,
        run_starts: Callable[[list], list] | None = None) -> FitResult:
    """Least-squares fit of the parameters in ``initial``.

    ``residual_fn(params) -> residual vector``: ``params`` is a dict with every name of ``initial``
    (JAX float64 scalars; free ones are traced when the Jacobian is taken), the result any array
    (flattened).  With ``sigma`` (array broadcastable to the residuals) the residuals are divided by
    it, so pass model − data; otherwise return (model − data)/σ yourself.
    ``bounds``: {name: (low, high)} (None for an open end); ``fixed``: names held at their initial
    value.  ``starts``: number of starting points (the first is ``initial``), drawn with ``seed``.
    ``jacobian``: ``"forward"`` (``jax.jvp`` with the tangents of up to ``TANGENT_BLOCK`` free
    parameters mapped in one program, which evaluates the residual once for all of them; the program
    depends on min(number of free parameters, ``TANGENT_BLOCK``), not on which ones are free),
    ``"jacfwd"`` (batched ``jax.jacfwd``) or ``"2-point"``/``"3-point"`` (finite differences, for
    residual functions JAX cannot trace).  ``tolerance`` is used for the
    cost, step and gradient tests of ``least_squares``; ``max_evaluations`` caps residual
    evaluations per start (default 100 × (number of free parameters + 1)).  ``jit=True`` compiles
    the residual and its JVP once (worth it for cheap residuals evaluated many times; a residual
    that calls ``response`` already runs compiled code and gains little).  ``progress(line)``, when
    given, receives one line per iteration (start, iteration, cost ½Σr², parameter values; per
    residual evaluation with a SciPy older than 1.16, whose ``least_squares`` has no callback).
    ``run_starts(start points) -> outcomes``, when given, runs the starts elsewhere (in parallel on
    a cluster): one outcome per start point, in order, each what the function of
    :func:`start_runner` returns for it; the result is then the same as running them here.
    """
    init, fixed, free, lo, hi = _check_inputs(initial, bounds, fixed)
    if int(starts) < 1:
        raise ValueError("fit: starts must be >= 1")
    run, scale, s_vec, max_nfev = _prepare(residual_fn, init, free, lo, hi, sigma=sigma, jacobian=jacobian,
                                           tolerance=tolerance, max_evaluations=max_evaluations, jit=jit,
                                           progress=progress)
    n = len(free)
    rng = np.random.default_rng(seed)
    starts_list = [dict(init)] + [_random_start(rng, init, free, lo, hi, scale) for _ in range(int(starts) - 1)]
    if run_starts is None:
        outcomes = [run(st, f"start {i}/{len(starts_list)}") for i, st in enumerate(starts_list, 1)]
    else:
        outcomes = list(run_starts(starts_list))
        if len(outcomes) != len(starts_list):
            raise RuntimeError(f"fit: run_starts returned {len(outcomes)} outcomes for {len(starts_list)} starts")
    return _best_of(outcomes, starts_list, init, fixed, free, lo, hi, scale, s_vec, n, absolute_sigma, max_nfev)


def start_runner(residual_fn: Callable[[dict], object], initial: Mapping[str, float], *,
                 bounds: Mapping | None = None, fixed=None, sigma=None, jacobian: str = "forward",
                 tolerance: float = 1e-10, max_evaluations: int | None = None, jit: bool = False,
                 progress: Callable[[str], None] | None = None) -> Callable[[Mapping, str], tuple]:
    """``run(start, label) -> outcome``: one start of :func:`fit` (same options) from the point
    ``start`` (every name of ``initial``), the outcome ``fit(..., run_starts=...)`` expects
    (picklable).  For running starts on other processes; keep ``run`` for every start of a process,
    so the residual is compiled once there."""
    init, fixed, free, lo, hi = _check_inputs(initial, bounds, fixed)
    run = _prepare(residual_fn, init, free, lo, hi, sigma=sigma, jacobian=jacobian, tolerance=tolerance,
                   max_evaluations=max_evaluations, jit=jit, progress=progress)[0]
    return lambda start, label="": run({k: float(v) for k, v in start.items()}, label)


def _prepare(residual_fn, init, free, lo, hi, *, sigma, jacobian, tolerance, max_evaluations, jit, progress):
    """The function running one start of :func:`fit` (and the parameter scales)."""
    if jacobian not in ("forward", "jacfwd", "2-point", "3-point"):
        raise ValueError(f"fit: jacobian must be 'forward', 'jacfwd', '2-point' or '3-point', got {jacobian!r}")
    if not 0 < tolerance < 1:
        raise ValueError("fit: tolerance must lie in (0, 1), e.g. 1e-10")
    n = len(free)
    scale = _scales(init, free, lo, hi)
    s_vec = np.array([scale[k] for k in free])
    if sigma is not None:
        sig = np.asarray(sigma, dtype=np.float64)
        if not np.all(np.isfinite(sig)) or np.any(sig <= 0):
            raise ValueError("fit: sigma must be positive and finite (the data's standard errors)")
        sig_j = jnp.asarray(sig)
    else:
        sig_j = None
    max_nfev = max_evaluations if max_evaluations is not None else 100 * (n + 1)

    def full(values_free, base):
        p = {k: jnp.asarray(base[k], dtype=jnp.float64) for k in init}
        for k, v in zip(free, values_free):
            p[k] = v
        return p

    def residual_of(p):
        r = jnp.asarray(residual_fn(p))
        if jnp.iscomplexobj(r):
            raise ValueError("fit: residual_fn returned complex values; return real residuals "
                             "(e.g. stack .real and .imag)")
        r = jnp.ravel(r).astype(jnp.float64)
        if sig_j is not None:
            r = r / jnp.broadcast_to(sig_j, r.shape) if sig_j.ndim else r / sig_j
        return r

    residual_eval = jax.jit(residual_of) if jit else residual_of
    # forward-mode Jacobian columns in blocks of up to TANGENT_BLOCK tangents mapped together: one
    # program evaluates the residual once and carries the block's tangents alongside (for two free
    # parameters about 0.65× the time of two separate jvp calls)
    block = min(n, TANGENT_BLOCK)
    tangents_of = lambda p, ts: jax.vmap(lambda t: jax.jvp(residual_of, (p,), (t,))[1])(ts)
    tangents_eval = jax.jit(tangents_of) if jit else tangents_of

    per_iteration = "callback" in inspect.signature(least_squares).parameters

    def report(label, what, cost, z, ref):
        if progress is not None:
            vals = ", ".join(f"{k} = {v:.6g}" for k, v in zip(free, ref + s_vec * np.asarray(z)))
            progress(f"{label}, {what}: cost {cost:.4g}, {vals}")

    def run(start, label=""):
        base = dict(start)
        p0 = np.array([start[k] for k in free])
        ref = np.array([init[k] for k in free])
        z0 = (p0 - ref) / s_vec
        zlo = np.array([(lo[k] - init[k]) / scale[k] for k in free])
        zhi = np.array([(hi[k] - init[k]) / scale[k] for k in free])
        to_p = lambda z: [jnp.asarray(ref[i] + s_vec[i] * z[i], dtype=jnp.float64) for i in range(n)]
        counter = {"nfev": 0}

        def fun(z):
            counter["nfev"] += 1
            r = np.asarray(residual_eval(full(to_p(z), base)), dtype=np.float64)
            if not per_iteration:
                report(label, f"evaluation {counter['nfev']}", 0.5 * float(r @ r), z, ref)
            return r

        def jac(z):
            p = full(to_p(z), base)
            if jacobian == "forward":
                cols = []
                for b0 in range(0, n, block):
                    # unit tangents of free parameters b0 .. b0+block−1 (zero rows pad the last block,
                    # so every block has the same shape: one compiled program)
                    ts = {kk: np.zeros(block) for kk in init}
                    for j, k in enumerate(free[b0:b0 + block]):
                        ts[k][j] = 1.0
                    out = np.asarray(tangents_eval(p, {kk: jnp.asarray(v) for kk, v in ts.items()}))
                    cols += [out[j] * s_vec[b0 + j] for j in range(min(block, n - b0))]
                J = np.stack(cols, axis=1)
            else:
                pf = [p[k] for k in free]
                cols = jax.jacfwd(lambda v: residual_of(full(v, base)))(pf)
                J = np.stack([np.asarray(c) * s_vec[i] for i, c in enumerate(cols)], axis=1)
            if not np.all(np.isfinite(J)):
                bad = [free[j] for j in range(n) if not np.all(np.isfinite(J[:, j]))]
                raise _Stop(f"the Jacobian is not finite (NaN/inf) in the column(s) of {', '.join(bad)} at "
                            f"{_fmt(dict(zip(free, ref + s_vec * z)))}; the residual function has no "
                            "derivative there — bound the parameters away from that region")
            return J

        try:
            r0 = fun(z0)
        except (jax.errors.TracerArrayConversionError, jax.errors.ConcretizationTypeError) as exc:
            raise ValueError("fit: residual_fn is not JAX-traceable; write it with jax.numpy or pass "
                             "jacobian='2-point'") from exc
        if r0.size < n:
            raise ValueError(f"fit: {r0.size} residual(s) (data points) but {n} free parameter(s) "
                             f"({', '.join(free)}); add data or fix parameters with fixed={{...}}")
        if not np.all(np.isfinite(r0)):
            return None, (f"the residuals are not finite (NaN/inf) at the starting point "
                          f"{_fmt({k: start[k] for k in free})} (entries {_bad_entries(r0)}); start elsewhere "
                          "or bound the parameters away from the invalid region"), counter["nfev"]
        jac_arg = jac if jacobian in ("forward", "jacfwd") else jacobian
        try:
            it = {"n": 0}

            def step(intermediate_result):
                it["n"] += 1
                report(label, f"iteration {it['n']}", float(intermediate_result.cost), intermediate_result.x, ref)
            extra = {"callback": step} if per_iteration and progress is not None else {}
            res = least_squares(fun, z0, jac=jac_arg, bounds=(zlo, zhi), method="trf", x_scale=1.0,
                                ftol=tolerance, xtol=tolerance, gtol=tolerance, max_nfev=max_nfev, **extra)
        except _Stop as exc:
            return None, str(exc), counter["nfev"]
        except (jax.errors.TracerArrayConversionError, jax.errors.ConcretizationTypeError) as exc:
            raise ValueError("fit: residual_fn is not JAX-traceable; write it with jax.numpy or pass "
                             "jacobian='2-point'") from exc
        return (res, ref + s_vec * res.x, base), None, counter["nfev"]

    return run, scale, s_vec, max_nfev


def _best_of(outcomes, starts_list, init, fixed, free, lo, hi, scale, s_vec, n, absolute_sigma, max_nfev):
    """The :class:`FitResult` of the best start (lowest cost) among ``outcomes``."""
    good = [(i, o) for i, o in enumerate(outcomes) if o[0] is not None and np.isfinite(o[0][0].cost)]
    start_costs = tuple(float(o[0][0].cost) if o[0] is not None else math.nan for o in outcomes)
    if not good:
        msg = outcomes[0][1] if len(outcomes) == 1 else \
            f"no start succeeded; first start: {outcomes[0][1]}"
        nanmat = np.full((n, n), np.nan)
        return FitResult(values=dict(init), stderr={k: (math.nan if k in free else 0.0) for k in init},
                         covariance=nanmat, correlation=nanmat, cost=math.nan, chi2_reduced=math.nan,
                         converged=False, message=msg, nfev=outcomes[0][2], starts_tried=len(starts_list),
                         identifiability_warnings=(), free=tuple(free), fixed=tuple(sorted(fixed)),
                         start_costs=start_costs)
    best, ((res, p_best, base), _, nfev) = min(good, key=lambda io: (io[1][0][0].cost, io[1][0][0].status <= 0))
    start = {k: base[k] for k in free}
    values = dict(init)
    values.update({k: float(v) for k, v in zip(free, p_best)})
    r = np.asarray(res.fun)
    m = r.size
    Jz = np.asarray(res.jac)
    stats = _covariance(Jz, r, s_vec, free, absolute_sigma)
    cov, corr, cond, warnings, singular = stats
    stderr = {k: 0.0 for k in init}
    stderr.update({k: float(math.sqrt(cov[i, i])) if cov[i, i] >= 0 else math.nan for i, k in enumerate(free)})
    converged = res.status > 0 and not singular
    if singular:
        message = singular
    elif res.status == 0:
        message = (f"stopped after {res.nfev} residual evaluations (max_evaluations={max_nfev}) before "
                   "meeting the tolerances; raise max_evaluations or start closer to the optimum")
    else:
        message = {1: "gradient below tolerance", 2: "relative change of the cost below tolerance",
                   3: "relative step below tolerance",
                   4: "cost change and step below tolerance"}.get(res.status, res.message)
    if len(starts_list) > 1:
        message += f" (best of {len(starts_list)} starts)"
    dof = m - n
    chi2 = float(np.sum(r * r))
    bounds_hit = _at_bounds(values, free, lo, hi, scale)
    for k, _ in bounds_hit:
        stderr[k] = math.nan
    others = [c for i, (o, c) in enumerate(zip(outcomes, start_costs)) if o[0] is not None and i != best]
    confirmed = any(abs(c - res.cost) <= 1e-8 * max(res.cost, 1e-300) for c in others)
    problems = _problems(values, None if confirmed else start, stderr, free, scale, Jz, r, dof, absolute_sigma,
                         bounds_hit)
    return FitResult(values=values, stderr=stderr, covariance=cov, correlation=corr, cost=float(res.cost),
                     chi2_reduced=chi2 / dof if dof > 0 else math.nan, converged=bool(converged),
                     message=message, nfev=int(res.nfev), starts_tried=len(starts_list),
                     identifiability_warnings=tuple(warnings), free=tuple(free), fixed=tuple(sorted(fixed)),
                     dof=dof, residuals=r, condition_number=cond, start_costs=start_costs,
                     problems=tuple(problems), at_bound=tuple(k for k, _ in bounds_hit))


def _at_bounds(values, free, lo, hi, scale) -> list:
    """``(name, "lower"/"upper")`` for every free parameter within ``AT_BOUND_TOLERANCE`` of its
    scale from a finite bound."""
    out = []
    for k in free:
        tol = AT_BOUND_TOLERANCE * scale[k]
        if math.isfinite(lo[k]) and values[k] - lo[k] <= tol:
            out.append((k, f"lower bound {lo[k]:g}"))
        elif math.isfinite(hi[k]) and hi[k] - values[k] <= tol:
            out.append((k, f"upper bound {hi[k]:g}"))
    return out


def _problems(values, start, stderr, free, scale, Jz, r, dof, absolute_sigma, bounds_hit) -> list:
    """Plain-language reasons why a converged fit is not to be trusted (module docstring);
    ``start`` is None when another start reached the same cost (ending at the start is then fine)."""
    out = [f"{k} ended at its {where}: the best fit lies beyond it, so its standard error is not "
           "meaningful (reported as NaN); widen the bound if that is physical, else the model or the data "
           "are inconsistent" for k, where in bounds_hit]
    if start is not None and all(abs(values[k] - start[k]) <= AT_BOUND_TOLERANCE * scale[k] for k in free):
        out.append("the fit ended at its starting point " + _fmt(start) + ": the optimiser found no "
                   "direction that lowers the cost (a flat or unreachable misfit); check the data units, or "
                   "confirm with starts > 1 if the start was already the optimum")
    rnorm = float(np.linalg.norm(r))
    for j, k in enumerate(free):
        sens = float(np.linalg.norm(Jz[:, j]))
        if rnorm > 0 and sens < SENSITIVITY_FLOOR * rnorm:
            out.append(f"the residuals hardly depend on {k}: changing it by its scale {scale[k]:g} changes them "
                       f"by {sens / rnorm:.1e} of their size; the model cannot produce these data (units, "
                       "offsets, wrong quantity?)")
    for k in free:
        e, v = stderr[k], values[k]
        if math.isfinite(e) and e > RELATIVE_STDERR_LIMIT * abs(v):
            out.append(f"the standard error of {k} ({e:.3g}) exceeds {RELATIVE_STDERR_LIMIT:.0%} of its value "
                       f"({v:.6g}): the data do not determine it")
    if absolute_sigma and dof > 0:
        chi2 = float(np.sum(r * r))
        p = 2.0 * min(chdtrc(dof, chi2), chdtr(dof, chi2))
        if p < CHI2_P_LIMIT:
            out.append(f"χ²_red = {chi2 / dof:.3g} with {dof} degrees of freedom is improbable for the stated "
                       f"errors (two-sided p = {p:.1e} < {CHI2_P_LIMIT:g}): the model does not describe the "
                       "data or the errors are misstated")
    return out


def _fmt(d):
    return "{" + ", ".join(f"{k}={v:.6g}" for k, v in d.items()) + "}"


def _covariance(Jz, r, s_vec, free, absolute_sigma):
    """Covariance in physical units from the Jacobian in scaled variables, plus diagnostics.
    Parameters with a vanishing Jacobian column get NaN rows; the others are estimated from the
    remaining columns."""
    n = len(free)
    m = r.size
    dof = m - n
    warnings = []
    singular = ""
    norms = np.sqrt(np.sum(Jz * Jz, axis=0))
    keep = np.flatnonzero(norms > 0)
    zero = [free[j] for j in range(n) if not norms[j] > 0]
    if zero:
        which = "it" if len(zero) == 1 else "them"
        singular = (f"singular Jacobian: the residuals do not change with {', '.join(zero)}; fix {which} "
                    f"(fixed={{...}}) or add data that depends on {which}")
    cov = np.full((n, n), np.nan)
    corr = np.full((n, n), np.nan)
    cond = math.inf
    if keep.size:
        Jn = Jz[:, keep] / norms[keep][None, :]
        _, sv, vt = np.linalg.svd(Jn, full_matrices=False)
        cond = float((sv[0] / sv[-1]) ** 2) if sv[-1] > 0 else math.inf
        names = [free[j] for j in keep]
        weakest = [names[j] for j in np.flatnonzero(np.abs(vt[-1]) > 0.2)]
        if not singular and sv[-1] <= sv[0] * n * np.finfo(float).eps:
            singular = (f"singular Jacobian: {', '.join(weakest)} enter the residuals only in a fixed "
                        "combination; fix one of them or add data that separates them")
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            inv_s2 = np.where(sv > 0, 1.0 / (sv * sv), np.inf)
            cov_n = (vt.T * inv_s2[None, :]) @ vt
            sub = cov_n / (norms[keep][:, None] * norms[keep][None, :])
            sub = sub * (s_vec[keep][:, None] * s_vec[keep][None, :])
            if not absolute_sigma:
                sub = sub * (float(np.sum(r * r)) / dof if dof > 0 else math.nan)
            d = np.sqrt(np.diag(sub))
            sub_corr = sub / (d[:, None] * d[None, :])
        cov[np.ix_(keep, keep)] = sub
        corr[np.ix_(keep, keep)] = sub_corr
        if cond > CONDITION_LIMIT:
            warnings.append(f"JᵀJ is near-singular (condition number {cond:.2e} > {CONDITION_LIMIT:.0e} with "
                            f"each parameter scaled): the combination of {', '.join(weakest)} along the "
                            "weakest direction is undetermined by the data")
    if dof <= 0 and not absolute_sigma:
        warnings.append(f"{m} residuals for {n} free parameters leave no degrees of freedom: the "
                        "standard errors cannot be estimated from the scatter; add data or pass sigma "
                        "with absolute_sigma=True")
    for i in range(n):
        for j in range(i + 1, n):
            c = corr[i, j]
            if np.isfinite(c) and abs(c) > CORRELATION_LIMIT:
                warnings.insert(0, f"{free[i]} and {free[j]} are correlated ({c:+.4f}): the data fix only a "
                                "combination of them (for example both scale the signal); fix one of them "
                                "or add data that separates them")
    return cov, corr, cond, warnings, singular


# --------------------------------------------------------------------------------------------
# scaling law of the nonlinear Hall ratio
# --------------------------------------------------------------------------------------------

SCALING_MEANING = {
    "c0": "τ-independent mechanisms: Berry-curvature dipole, side jump and Gaussian-disorder "
          "('intrinsic') skew scattering (χ ∝ τ like σ, so χ/σ ∝ τ⁰)",
    "c1": "contributions ∝ σ_xx: non-Gaussian skew scattering from one impurity species "
          "(χ ∝ τ²) — and the nonlinear Drude term where time reversal is broken",
    "c2": "contributions ∝ σ_xx²: skew scattering on static impurities while τ is set by phonons "
          "(temperature sweep, χ ∝ τ³/τ_sk)",
}


@dataclass(frozen=True)
class ScalingFit:
    """E⊥/E∥² = c0 + c1 σ_xx + c2 σ_xx² (units: m/V, m/(V·S), m/(V·S²) for 2D sheets).
    Meaning of each coefficient: :data:`SCALING_MEANING` (docs/theory.md §12.2)."""

    c0: float
    c1: float
    c2: float
    stderr: tuple
    covariance: np.ndarray
    correlation: np.ndarray
    chi2_reduced: float
    dof: int
    residuals: np.ndarray = field(repr=False)
    units: dict = field(default_factory=lambda: {"c0": _RATIO, "c1": f"{_RATIO} S^-1", "c2": f"{_RATIO} S^-2"})
    meaning: dict = field(default_factory=lambda: dict(SCALING_MEANING), repr=False)

    @property
    def coefficients(self) -> tuple:
        return (self.c0, self.c1, self.c2)

    def predict(self, sigma_xx):
        s = np.asarray(sigma_xx, dtype=np.float64)
        return self.c0 + self.c1 * s + self.c2 * s * s

    def summary(self) -> str:
        lines = []
        for name, v, e in zip(("c0", "c1", "c2"), self.coefficients, self.stderr):
            lines.append(f"{name} = {v:+.4e} ± {e:.2e} {self.units[name]}   {self.meaning[name]}")
        lines.append(f"reduced chi^2 {self.chi2_reduced:.4g} ({self.dof} dof)")
        return "\n".join(lines)


def scaling_fit(sigma_xx, ratio, ratio_err=None, *, absolute_sigma: bool | None = None) -> ScalingFit:
    """Fit E⊥^{2ω}/(E∥^ω)² = C0 + C1 σ_xx + C2 σ_xx² (linear least squares with covariance).

    The scaling form of Du, Wang, Li, Lu, Xie, Nat. Commun. 10, 3047 (2019) and Kang, Li, Sohn,
    Shan, Mak, Nat. Mater. 18, 324 (2019); its coefficients separate mechanisms by their power of
    τ (docs/theory.md §12.2): C0 — τ-independent mechanisms (Berry-curvature dipole, side
    jump, Gaussian skew scattering); C1, C2 — skew-scattering contributions scaling with σ and σ².

    ``sigma_xx`` (S, or S/m in 3D), ``ratio`` (m/V) and optional ``ratio_err`` (standard errors of
    the ratio, same unit).  With ``ratio_err`` the fit is weighted and, by default, the covariance
    is absolute (``absolute_sigma=True``); without, the covariance is scaled by the residual
    variance (needs more than 3 points).
    """
    s = np.asarray(sigma_xx, dtype=np.float64).ravel()
    y = np.asarray(ratio, dtype=np.float64).ravel()
    if s.size != y.size:
        raise ValueError(f"scaling_fit: sigma_xx has {s.size} values but ratio has {y.size}; give one "
                         "ratio per conductivity")
    for name, arr in (("sigma_xx", s), ("ratio", y)):
        bad = np.flatnonzero(~np.isfinite(arr))
        if bad.size:
            raise ValueError(f"scaling_fit: {name} is NaN/inf at index {', '.join(map(str, bad[:10]))}; "
                             "remove those points")
    if ratio_err is not None:
        e = np.broadcast_to(np.asarray(ratio_err, dtype=np.float64), y.shape).ravel()
        if not np.all(np.isfinite(e)) or np.any(e <= 0):
            raise ValueError("scaling_fit: ratio_err must be positive and finite (standard errors of the ratio)")
    else:
        e = np.ones_like(y)
    if absolute_sigma is None:
        absolute_sigma = ratio_err is not None
    if absolute_sigma and ratio_err is None:
        raise ValueError("scaling_fit: absolute_sigma=True needs ratio_err")
    if np.unique(s).size < 3:
        raise ValueError(f"scaling_fit: sigma_xx takes {np.unique(s).size} distinct value(s); three "
                         "coefficients need at least 3 distinct conductivities")
    if not absolute_sigma and s.size <= 3:
        raise ValueError(f"scaling_fit: {s.size} points determine C0, C1, C2 exactly and leave nothing to "
                         "estimate their errors; add points or give ratio_err")
    s_ref = float(np.max(np.abs(s)))
    y_ref = float(np.max(np.abs(y))) or 1.0
    x = s / s_ref
    # scaled unknowns b_k = C_k s_ref^k / y_ref; rows weighted so that b - A·coef = (y - model)/err
    A = np.stack([np.ones_like(x), x, x * x], axis=1) * (y_ref / e)[:, None]
    rhs = y / e
    u, sv, vt = np.linalg.svd(A, full_matrices=False)
    if sv[-1] <= sv[0] * 1e-13:
        raise ValueError("scaling_fit: the design matrix is singular; spread sigma_xx over a wider range")
    coef = vt.T @ ((u.T @ rhs) / sv)
    cov = (vt.T / (sv * sv)[None, :]) @ vt
    dof = s.size - 3
    chi2 = float(np.sum((rhs - A @ coef) ** 2))
    chi2_red = chi2 / dof if dof > 0 else math.nan
    powers = np.array([1.0, s_ref, s_ref ** 2])
    c = coef * y_ref / powers
    cov = cov * (y_ref ** 2) / (powers[:, None] * powers[None, :])
    if not absolute_sigma:
        cov = cov * chi2_red
    d = np.sqrt(np.diag(cov))
    corr = cov / (d[:, None] * d[None, :])
    resid = y - (c[0] + c[1] * s + c[2] * s * s)
    return ScalingFit(c0=float(c[0]), c1=float(c[1]), c2=float(c[2]), stderr=tuple(float(v) for v in d),
                      covariance=cov, correlation=corr, chi2_reduced=chi2_red, dof=dof, residuals=resid)
