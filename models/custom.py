"""User-defined band models from a plain JAX function: ``from_function``.

Wrap any Hamiltonian written with ``jax.numpy``,

    H(k, params) -> (m, m)  or  (S, m, m)  complex array in eV,

where ``k`` is one wavevector of shape ``(d,)`` in 1/Å and ``params`` the dict of float64
scalars named in the parameter spec, into a :class:`~crosswind.models.BandModel`.  A single
``(m, m)`` matrix is one block (S = 1); a stack of S blocks lists sectors that do not mix
(valleys, conserved spin).  Parameters are given as :class:`~crosswind.models.Parameter`
objects or as a mapping ``name -> (default, unit, meaning[, (lo, hi)])``; every one is a
differentiable real number.  ``values`` overrides defaults with the same checks as ``build``:
an unknown name is refused with the valid names, a value out of range is refused with its range.

The function is checked at build time with the resolved values: at one generic k-point it must
trace with ``jax.numpy`` (so ``band_geometry`` can differentiate it with respect to k) and return
a square ``(m, m)`` or ``(S, m, m)`` array; then, on a small set of points spread over the domain
(:func:`sample_points`: a 3^d grid of generic points of the Brillouin zone, or rays from every
continuum centre out to 10× its scale), H and ∂H/∂k must be finite and H Hermitian to 1e-10
relative, so a function that is wrong away from one point is refused with the k-point named.  A lattice
domain needs one orbital position per row of a block; the Hamiltonian must then use Bloch phases
that include those positions (docs/theory.md §2.5, convention I).

Two-band blocks may also pass ``dvector(k, params) -> (d0 (S,), d (S, 3))`` with H = d0 + d·σ:
band geometry then uses closed forms (much faster).  It is checked against ``hamiltonian``.

The returned model's Hamiltonian is a small wrapper (adds the block axis, casts to complex128)
that compares equal, and hashes, by the user function, and it is cached per function, so
building twice from the same function hits JAX's compilation cache.
"""
from __future__ import annotations

import math
import weakref
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from .band_model import BandModel
from .domain import Continuum, Lattice
from .params import Parameter, ParamSpec
from .twoband import from_dvector

HERMITIAN_RTOL = 1e-10


class _UserHamiltonian:
    """``k, params -> (S, m, m) complex128`` around a user function; equal (and hashed) by the
    wrapped function so that JAX's cache treats two wrappers of one function as the same."""

    __slots__ = ("fn", "add_axis", "__weakref__")

    def __init__(self, fn: Callable, add_axis: bool):
        self.fn = fn
        self.add_axis = add_axis

    def __call__(self, k, params):
        h = jnp.asarray(self.fn(k, params)).astype(jnp.complex128)
        return h[None] if self.add_axis else h

    def __eq__(self, other):
        return (isinstance(other, _UserHamiltonian) and self.add_axis == other.add_axis
                and self.fn == other.fn)

    def __hash__(self):
        return hash((self.fn, self.add_axis))

    def __repr__(self):
        return f"_UserHamiltonian({getattr(self.fn, '__name__', self.fn)!r})"


_WRAPPERS: weakref.WeakKeyDictionary[Callable, dict] = weakref.WeakKeyDictionary()


def _wrapper_for(fn: Callable, add_axis: bool) -> _UserHamiltonian:
    try:
        per_fn = _WRAPPERS.setdefault(fn, {})
    except TypeError:  # not weak-referenceable: equality still keeps the JIT cache warm
        return _UserHamiltonian(fn, add_axis)
    if add_axis not in per_fn:
        per_fn[add_axis] = _UserHamiltonian(fn, add_axis)
    return per_fn[add_axis]


def _as_spec(parameters, owner: str) -> ParamSpec:
    if isinstance(parameters, ParamSpec):
        params = parameters.parameters
    elif isinstance(parameters, Mapping):
        params = []
        for name, entry in parameters.items():
            if not isinstance(entry, (tuple, list)) or len(entry) not in (3, 4):
                raise ValueError(
                    f"{owner}: parameter '{name}' must be (default, unit, meaning) or "
                    f"(default, unit, meaning, (lo, hi)), got {entry!r}.")
            default, unit, meaning = entry[:3]
            bounds = (-math.inf, math.inf)
            if len(entry) == 4:
                rng = entry[3]
                if (not isinstance(rng, (tuple, list)) or len(rng) != 2
                        or not all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in rng)
                        or not rng[0] <= rng[1]):
                    raise ValueError(
                        f"{owner}: parameter '{name}' range must be a pair (lo, hi) of numbers with "
                        f"lo <= hi (math.inf for an open end), got {rng!r}.")
                bounds = (float(rng[0]), float(rng[1]))
            params.append(Parameter(name=str(name), unit=str(unit), default=default,
                                    meaning=str(meaning), bounds=bounds))
    elif isinstance(parameters, Sequence) and all(isinstance(p, Parameter) for p in parameters):
        params = list(parameters)
    else:
        raise ValueError(
            f"{owner}: parameters must be a list of Parameter objects or a mapping "
            f"name -> (default, unit, meaning[, (lo, hi)]), got {type(parameters).__name__}.")
    names = [p.name for p in params]
    for p in params:
        if not p.name.isidentifier():
            raise ValueError(f"{owner}: parameter name {p.name!r} must be a Python identifier.")
        if p.kind != "real":
            raise ValueError(
                f"{owner}: parameter '{p.name}' is of kind '{p.kind}'; user models take only real "
                f"(differentiable) parameters. For a structural choice, build one model per choice "
                f"from separate functions.")
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise ValueError(f"{owner}: parameter names must be unique; repeated: {', '.join(dup)}.")
    return ParamSpec(tuple(params), owner=owner)


def sample_k(domain) -> np.ndarray:
    """A generic k-point (1/Å) away from high-symmetry points, for build-time checks."""
    frac = np.array([0.1234, 0.2711, 0.0917])
    if isinstance(domain, Lattice):
        return frac[: domain.dim] @ domain.reciprocal()
    centers = np.asarray(domain.centers, dtype=float)
    return centers[0] + domain.scale * np.array([0.731, -0.412, 0.287])[: domain.dim]


def sample_points(domain, params) -> np.ndarray:
    """Build-time check points (n, d) in 1/Å, :func:`sample_k` first.  Lattice: a 3^d grid of
    generic fractional coordinates (none on a high-symmetry point) over the Brillouin zone.
    Continuum: around every centre, radii 0.03 to 10 × ``scale`` along ± a generic frame."""
    d = domain.dim
    first = sample_k(domain)[None]
    if isinstance(domain, Lattice):
        steps = np.stack(np.meshgrid(*[np.arange(3)] * d, indexing="ij"), -1).reshape(-1, d)
        frac = (np.array([0.1234, 0.2711, 0.0917])[:d] + steps / 3.0 + 0.5) % 1.0 - 0.5
        return np.concatenate([first, frac @ domain.reciprocal()])
    q = np.linalg.qr(np.array([[0.83, -0.29, 0.47], [0.31, 0.91, -0.22], [-0.45, 0.18, 0.88]])[:d, :d])[0]
    dirs = np.concatenate([q, -q])      # ± a generic orthonormal frame: both signs of every axis
    radii = float(domain.scale_for(params)) * np.array([0.03, 0.3, 1.0, 3.0, 10.0])
    shifts = (radii[:, None, None] * dirs[None]).reshape(-1, d)
    centers = np.asarray(domain.centers, dtype=float)
    return np.concatenate([first] + [c + shifts for c in centers])


def _check_blocks(h, owner: str, what: str = "hamiltonian", where: str = "at the test point") -> np.ndarray:
    arr = np.asarray(h)
    if arr.ndim not in (2, 3) or arr.shape[-1] != arr.shape[-2] or arr.shape[-1] == 0:
        raise ValueError(
            f"{owner}: {what}(k, params) must return one square matrix (m, m) or a stack of blocks "
            f"(S, m, m), got shape {arr.shape}. Return e.g. jnp.array([[h11, h12], [h21, h22]]).")
    if not np.issubdtype(arr.dtype, np.number):
        raise ValueError(f"{owner}: {what}(k, params) returned non-numeric dtype {arr.dtype}.")
    if not np.all(np.isfinite(arr)):
        raise ValueError(
            f"{owner}: {what}(k, params) returned non-finite entries (nan/inf) {where}; "
            f"check divisions and parameter values.")
    blocks = arr if arr.ndim == 3 else arr[None]
    dev = np.max(np.abs(blocks - np.conj(np.swapaxes(blocks, -1, -2))))
    scale = max(1.0, float(np.max(np.abs(blocks))))
    if dev > HERMITIAN_RTOL * scale:
        raise ValueError(
            f"{owner}: {what}(k, params) is not Hermitian: max |H - H^†| = {dev:.3g} eV {where} "
            f"(tolerance {HERMITIAN_RTOL:g} x max(1, max|H|)). Give H[j, i] = conj(H[i, j]); "
            f"for a hopping list add the Hermitian-conjugate terms.")
    return arr


def _call_checked(fn, k, params, owner: str, what: str):
    try:
        return fn(k, params)
    except KeyError as exc:
        raise ValueError(
            f"{owner}: {what}(k, params) asked for params[{exc.args[0]!r}], which is not declared. "
            f"Declared parameters: {', '.join(sorted(params)) or '(none)'}. Add it to `parameters`.") from exc
    except jax.errors.TracerArrayConversionError as exc:
        raise ValueError(
            f"{owner}: {what}(k, params) must be written with jax.numpy (not numpy/math on k or "
            f"params) so it can be differentiated with respect to k: {exc}") from exc
    except jax.errors.ConcretizationTypeError as exc:
        raise ValueError(
            f"{owner}: {what}(k, params) uses a traced value in Python control flow (if/float()); "
            f"use jnp.where instead: {exc}") from exc


def _check_across_domain(wrapped, hamiltonian, domain, probe, owner: str) -> None:
    """H finite and Hermitian and ∂H/∂k finite at every :func:`sample_points` point (one
    vectorised call each); the message names the first bad k-point."""
    ks = jnp.asarray(sample_points(domain, probe), dtype=jnp.float64)
    hs = np.asarray(_call_checked(jax.vmap(hamiltonian, in_axes=(0, None)), ks, probe, owner, "hamiltonian"))
    dhs = np.asarray(jax.vmap(jax.jacfwd(wrapped), in_axes=(0, None))(ks, probe))
    for k, h, dh in zip(np.asarray(ks), hs, dhs):
        where = (f"at k = ({', '.join(f'{x:.4g}' for x in k)}) 1/Å (one of {len(ks)} check points "
                 "spread over the domain)")
        _check_blocks(h, owner, where=where)
        if not np.all(np.isfinite(dh)):
            raise ValueError(f"{owner}: the k-derivative of hamiltonian(k, params) is not finite {where}; "
                             "check divisions (e.g. by |k|) and square roots.")


def from_function(hamiltonian: Callable, *, parameters, domain: Lattice | Continuum,
                  values: Mapping[str, Any] | None = None, degeneracy: float = 1.0,
                  dvector: Callable | None = None, name: str = "custom",
                  description: str = "", source: str = "") -> BandModel:
    """Wrap ``hamiltonian(k, params)`` into a :class:`BandModel` (see the module docstring).

    ``parameters``: list of ``Parameter`` or mapping ``name -> (default, unit, meaning[, (lo, hi)])``.
    ``domain``: ``Lattice`` (periodic, orbital positions) or ``Continuum`` (k·p window).
    ``values``: parameter values overriding the defaults (checked like ``build``).
    ``degeneracy``: extra degeneracy factor (spin, valleys not listed as blocks).
    ``dvector``: optional closed two-band form ``(d0 (S,), d (S, 3))``.
    """
    owner = name
    if not callable(hamiltonian):
        raise ValueError(f"{owner}: hamiltonian must be a function H(k, params), got {type(hamiltonian).__name__}.")
    if not isinstance(domain, (Lattice, Continuum)):
        raise ValueError(
            f"{owner}: domain must be Lattice(vectors=..., positions=...) or Continuum(dim=...), "
            f"got {type(domain).__name__}.")
    if not (isinstance(degeneracy, (int, float)) and not isinstance(degeneracy, bool) and degeneracy > 0):
        raise ValueError(f"{owner}: degeneracy must be a positive number, got {degeneracy!r}.")
    spec = _as_spec(parameters, owner)
    real, _ = spec.resolve(dict(values or {}))
    dim = domain.dim
    k0 = jnp.asarray(sample_k(domain), dtype=jnp.float64)
    # check with concrete numbers; traced values (jax.grad through from_function) use defaults
    probe = {n: (v if not isinstance(v, jax.core.Tracer) else jnp.asarray(spec[n].default, dtype=jnp.float64))
             for n, v in real.items()}

    h0 = _check_blocks(_call_checked(hamiltonian, k0, probe, owner, "hamiltonian"), owner)
    wrapped = _wrapper_for(hamiltonian, h0.ndim == 2)
    # must also trace and differentiate with respect to k (band_geometry uses jacfwd)
    dh = _call_checked(jax.jacfwd(wrapped, argnums=0), k0, probe, owner, "hamiltonian")
    if not np.all(np.isfinite(np.asarray(dh))):
        raise ValueError(f"{owner}: the k-derivative of hamiltonian(k, params) is not finite at the test point.")
    _check_across_domain(wrapped, hamiltonian, domain, probe, owner)
    blocks, m = (1, h0.shape[0]) if h0.ndim == 2 else (h0.shape[0], h0.shape[1])

    if isinstance(domain, Lattice) and len(domain.positions) != m:
        raise ValueError(
            f"{owner}: the lattice lists {len(domain.positions)} orbital positions but each Hamiltonian "
            f"block is {m}x{m}; give one position (Å) per orbital of a block.")

    if dvector is not None:
        if m != 2:
            raise ValueError(f"{owner}: dvector is only for two-band blocks; blocks here are {m}x{m}. "
                             "Pass dvector=None.")
        out = _call_checked(dvector, k0, probe, owner, "dvector")
        if not (isinstance(out, (tuple, list)) and len(out) == 2):
            raise ValueError(f"{owner}: dvector(k, params) must return (d0, d) with shapes (S,) and (S, 3).")
        d0, d = (np.asarray(x) for x in out)
        if d0.shape != (blocks,) or d.shape != (blocks, 3):
            raise ValueError(
                f"{owner}: dvector(k, params) must return d0 of shape ({blocks},) and d of shape "
                f"({blocks}, 3) to match the {blocks} Hamiltonian block(s); got {d0.shape} and {d.shape}.")
        hd = np.asarray(from_dvector(jnp.asarray(d0), jnp.asarray(d)))
        hb = h0 if h0.ndim == 3 else h0[None]
        dev = float(np.max(np.abs(hd - hb)))
        if dev > HERMITIAN_RTOL * max(1.0, float(np.max(np.abs(hb)))):
            raise ValueError(
                f"{owner}: dvector disagrees with hamiltonian at the test point (max |Δ H| = {dev:.3g} eV); "
                f"H must equal d0·1 + d_x σ_x + d_y σ_y + d_z σ_z.")

    return BandModel(name=name, dim=dim, hamiltonian=wrapped, params=real, spec=spec, domain=domain,
                     degeneracy=float(degeneracy), blocks=blocks, block_size=m, dvector=dvector,
                     description=description or f"user model '{name}'", source=source or "user function")
