"""Chemical potential from a carrier density, and gate voltage → density.

``mu_from_density`` solves n(μ, T) = n_target for μ inside ``jax.lax.custom_root``: the forward
pass keeps a bracket and takes Newton–secant steps when they stay inside it, bisection steps
otherwise (robust when μ sits in a gap, where plain Newton diverges), in two phases: first on
band energies computed once on a μ-independent grid, then on n(μ) itself from there (3–6
evaluations of n instead of 10–12; docs/theory.md §11).  The derivative comes from the
implicit-function theorem, dμ/dθ = −(∂n/∂θ)/(∂n/∂μ), not from differentiating the iterations.
n(μ, T) is evaluated at the mesh level ``resolution`` (a lattice's uniform grid; a continuum
model's rays placed for each μ), and the root is that of this function.

``gate_density`` is the parallel-plate relation n = ε0 εr V_g/(e d) (no quantum capacitance;
common practice), positive V_g adding electrons.
"""
from __future__ import annotations

import warnings
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np
from scipy import constants as _c

from crosswind.models.band_model import BandModel
from crosswind.models.domain import Lattice
from crosswind.solver.engine import mesh as _mesh
from crosswind.solver.engine.mesh import energies_at
from crosswind.solver.engine.occupation import fermi, thermal_energy
from crosswind.solver.engine.response import mesh_levels, neutral_filling, response

#: eV: the solve stops when a Newton step or the bracket is below this; the step that meets it
#: is still applied, so a Newton root is quadratically closer (density residuals ~1e-11 of the
#: target measured on the strained MoS2 demo model at 10 K, as with 1e-12, at two-thirds of the cost)
MU_TOL = 1e-9
START_TOL = 1e-7  # eV: the same for the first phase (on energies computed once, _start_rule)


def parallel_plate_capacitance(thickness_nm, permittivity=3.9):
    """Gate capacitance per area (F/m²) of a dielectric of ``thickness_nm`` (nm) and relative
    permittivity ``permittivity``: ε0εr/d (no quantum capacitance; docs/theory.md §10)."""
    if np.any(np.asarray(thickness_nm) <= 0):
        raise ValueError("gate_density: the dielectric thickness must be positive (nm)")
    if np.any(np.asarray(permittivity) <= 0):
        raise ValueError("gate_density: the relative permittivity must be positive")
    return _c.epsilon_0 * jnp.asarray(permittivity) / (jnp.asarray(thickness_nm) * 1e-9)


def gate_density(voltage, thickness_nm, permittivity=3.9, offset_voltage=0.0):
    """Electron density (m⁻²) induced by a gate at ``voltage`` (V) across a dielectric of
    ``thickness_nm`` (nm) and relative permittivity ``permittivity``: ε0εr(V−V0)/(e d).
    Negative values are holes."""
    cap = parallel_plate_capacitance(thickness_nm, permittivity)   # F/m²
    return cap * (jnp.asarray(voltage) - offset_voltage) / _c.e


def _density_fn(model: BandModel, resolution: int):
    """n(μ, k_BT) in m^-d on a fixed mesh (continuum meshes are placed for the given μ)."""
    res = mesh_levels(model)[resolution]
    filled = neutral_filling(model)

    def n_of(params, mu, kt):
        m = model.with_params(**params) if params is not model.params else model
        if isinstance(model.domain, Lattice):
            k, w = _mesh.lattice_rule(m, res)
        else:
            k, w = _mesh.ray_rule(m, res, mu, kt)
        e = jax.vmap(lambda q: energies_at(m, q, m.params))(k)
        occ = fermi(e, mu, kt) - (jnp.arange(e.shape[1]) < filled).astype(e.dtype)[None, :]
        return model.degeneracy * jnp.sum(w[:, None] * occ) * 1e10 ** model.dim

    return n_of


def _start_rule(model: BandModel, resolution: int):
    """``(k, w)`` of the first phase of the solve, independent of μ so that its band energies are
    computed once: on a lattice the solve's own uniform grid (the first phase then finds the root
    itself); on a continuum model a polar midpoint grid around every centre (radii of the rays'
    probe, k = 4s·u/(1 − u)), which only has to land close to the root."""
    if isinstance(model.domain, Lattice):
        return _mesh.lattice_rule(model, mesh_levels(model)[resolution])
    if model.dim != 2:
        raise NotImplementedError(f"mu_from_density: no density mesh for the 3D continuum model '{model.name}'; "
                                  "give the chemical potential instead (mu_eV), or use a lattice model")
    p = jax.lax.stop_gradient(model.params)
    s = model.domain.scale_for(p)
    nth = mesh_levels(model)[resolution].n
    theta = (jnp.arange(nth, dtype=jnp.float64) + 0.5) * (2 * jnp.pi / nth)
    dirs = jnp.stack([jnp.cos(theta), jnp.sin(theta)], axis=-1)
    kr, dk = _mesh.probe_midpoints(s)
    wr = dk * kr * (2 * jnp.pi / nth) / (2 * jnp.pi) ** 2
    centers = jnp.asarray(np.asarray(model.domain.centers, dtype=float))
    pts = centers[:, None, None, :] + kr[None, None, :, None] * dirs[None, :, None, :]
    w = jnp.broadcast_to(wr, pts.shape[:-1])
    return jax.lax.stop_gradient(pts.reshape(-1, model.dim)), jax.lax.stop_gradient(w.reshape(-1))


def mu_from_density(model: BandModel, density, temperature, *, bracket=(-5.0, 5.0),
                    resolution: int = 2, iterations: int = 60):
    """μ (eV) with n(μ, T) = ``density`` (m^-d, relative to neutrality), for scalar or array
    ``density``/``temperature`` (broadcast).  Differentiable in density, temperature and the model
    parameters through the implicit function theorem.  Compiled once per model structure,
    resolution and array shape: new densities, temperatures or parameter values do not recompile.
    ``iterations`` bounds the number of density evaluations (each a Newton or bisection step)."""
    lo, hi = bracket
    if not lo < hi:
        raise ValueError("mu_from_density: bracket must be (low, high) in eV with low < high")
    dens = jnp.asarray(density, dtype=jnp.float64)
    temp = jnp.asarray(temperature, dtype=jnp.float64)
    shape = np.broadcast_shapes(dens.shape, temp.shape)
    flat_n = jnp.broadcast_to(dens, shape).reshape(-1)
    flat_t = jnp.broadcast_to(temp, shape).reshape(-1)
    mus = _solve(model, flat_n, flat_t, jnp.asarray(lo, dtype=jnp.float64), jnp.asarray(hi, dtype=jnp.float64),
                 resolution=resolution, iterations=iterations)
    return mus.reshape(shape)


def _newton(f, x0, lo, hi, tol, iterations):
    """Safeguarded Newton for an increasing f: the bracket [a, b] shrinks with every evaluation; a
    step is taken when it stays inside the bracket, a bisection otherwise (μ in a gap, far from the
    root).  The slope is ∂f/∂μ (by jvp: the density of states), or the secant through the last two
    evaluations where that lies within a factor 2 of it: a continuum mesh is placed for each μ, and
    its n(μ) can rise some per cent slower or faster than its density of states (Newton alone then
    converges only linearly; the secant does not stall on the convex tail of a band edge)."""
    def body(st):
        a, b, x, i, _, xp, fp = st
        fx, gx = jax.jvp(f, (x,), (jnp.ones_like(x),))
        a, b = jnp.where(fx > 0, a, x), jnp.where(fx > 0, x, b)
        sec = (fx - fp) / jnp.where(x != xp, x - xp, 1.0)
        slope = jnp.where((i > 0) & (x != xp) & (sec > 0.5 * gx) & (sec < 2.0 * gx), sec, gx)
        step = fx / jnp.where(slope > 0, slope, 1.0)
        # converged: the correction is below the tolerance (it may round to x itself, which sits
        # on the bracket's edge)
        conv = ((slope > 0) & (jnp.abs(step) < tol)) | (fx == 0)
        xn = x - step
        xn = jnp.where((slope > 0) & (xn > a) & (xn < b), xn, 0.5 * (a + b))
        # the converging step is applied, kept inside the bracket (a root never leaves a known bound)
        xn = jnp.where(conv, jnp.clip(x - jnp.where(slope > 0, step, 0.0), a, b), xn)
        return a, b, xn, i + 1, conv | (b - a < tol), x, fx

    def more(st):
        return (~st[4]) & (st[3] < iterations)

    return jax.lax.while_loop(more, body, (lo, hi, x0, 0, False, x0, jnp.zeros_like(x0)))[2]


def _start_density(model, resolution):
    """n(μ, k_BT) on the band energies of :func:`_start_rule`, computed once (no derivative)."""
    k1, w1 = _start_rule(model, resolution)
    e1 = jax.lax.stop_gradient(jax.vmap(lambda q: energies_at(model, q, model.params))(k1))
    below = (jnp.arange(e1.shape[1]) < neutral_filling(model)).astype(e1.dtype)[None, :]

    def occupied(mu, kt):
        return model.degeneracy * jnp.sum(w1[:, None] * (fermi(e1, mu, kt) - below)) * 1e10 ** model.dim

    return occupied


@partial(jax.jit, static_argnames=("resolution", "iterations"))
def _solve(model, flat_n, flat_t, lo, hi, *, resolution, iterations):
    n_of = _density_fn(model, resolution)
    occupied = _start_density(model, resolution)

    def solve_one(params, n_target, t):
        kt = thermal_energy(t)

        def residual(mu):
            return n_of(params, mu, kt) - n_target

        def solve(f, x0):
            # first phase on energies computed once (_start_rule): on a lattice the root itself,
            # on a continuum model a root within about a meV of it (its fixed grid makes n(μ) a
            # fine staircase at low T); the second phase polishes with the residual f itself from
            # there, inside the full bracket (a few evaluations of f instead of 10–12)
            x1 = _newton(lambda mu: occupied(mu, kt) - n_target, x0, lo, hi, START_TOL, iterations)
            return _newton(f, x1, lo, hi, MU_TOL, iterations)

        def tangent_solve(g, y):
            return y / g(1.0)

        return jax.lax.custom_root(residual, 0.5 * (lo + hi), solve, tangent_solve)

    return jax.vmap(lambda n, t: solve_one(model.params, n, t))(flat_n, flat_t)


@partial(jax.jit, static_argnames=("resolution", "iterations"))
def _start_mu(model, flat_n, flat_t, lo, hi, *, resolution, iterations):
    """The first phase of :func:`mu_from_density` alone (no derivative): the root of n(μ) on the
    band energies of :func:`_start_rule`, computed once."""
    occupied = _start_density(model, resolution)

    def one(n_target, t):
        kt = thermal_energy(t)
        return _newton(lambda mu: occupied(mu, kt) - n_target, 0.5 * (lo + hi), lo, hi, START_TOL, iterations)

    return jax.vmap(one)(flat_n, flat_t)


#: a density root of the response engine is accepted when |n(μ) − n_target| is at most twice the
#: engine's own density error estimate, or the change of n over ROOT_TOL (eV) of μ; the Newton
#: steps first call the engine at its coarsest resolution (COARSE_CALLS at most, until the density
#: is within COARSE_RTOL of the target), then at the automatic one (ROOT_CALLS at most)
ROOT_TOL = 1e-9
#: the root is accepted as it stands when its uncertainty δμ is at most MU_SHARE·rtol·max(k_BT,
#: MU_FLOOR eV): a field varying on the scale k_BT then moves by at most half of rtol
MU_SHARE = 0.5
MU_FLOOR = 1e-5
COARSE_RTOL = 1e-4
#: the lowest mesh level of a lattice's start grid (energies only; see response_at_density)
START_LATTICE = 4
COARSE_CALLS = 8
ROOT_CALLS = 4


def response_at_density(model: BandModel, density, temperature, tau, frequency=0.0, *, bracket=(-5.0, 5.0),
                        start_resolution: int = 1, **options):
    """``(mu, r)``: the chemical potential (eV) at which the automatic ``response`` of a 2D model
    (lattices: the ladder; continuum models: the shared rays) gives the carrier ``density``
    (m^-2, relative to neutrality) at ``temperature`` (K), and that response ``r``.  Concrete values
    only (the automatic resolution compares numbers); under ``jax.grad``/``jit``, and for 3D models,
    use :func:`mu_from_density` at a fixed mesh level.

    The root is that of the engine's own n(μ), resolved to its rtol at any temperature, whereas the
    uniform mesh of :func:`mu_from_density` resolves a Fermi pocket only to its node spacing (at
    2 K and 10¹² cm⁻² in gapped graphene its level-1 root gave 3.4× the target density).  Steps: a
    start on band energies computed once (the first phase of :func:`mu_from_density` at
    ``start_resolution``, for a lattice at least ``START_LATTICE``); safeguarded Newton steps
    μ ← μ − (n(μ) − n_target)/(∂n/∂μ), with n and ∂n/∂μ = ``r.dos`` from each call (bisection of
    the bracket the signs of n − n_target have left where a step would leave it), first with the
    engine at its coarsest resolution until n is within ``COARSE_RTOL`` of the target (and one step
    more), then with the automatic response until |n − n_target| is below twice that call's own
    density error estimate (its n(μ) is known to that estimate only: the plan follows μ) or the
    change of n over ``ROOT_TOL`` of μ (docs/theory.md §11).  The last call is returned: its density is the target.

    The root is then known to δμ = (|n − n_target| + error estimate)/(∂n/∂μ).  Where δμ exceeds
    ``MU_SHARE``·rtol·max(k_BT, ``MU_FLOOR``) (a pocket a few k_BT deep near T → 0, where the
    engine's density may carry a per-cent error), a continuum model takes μ from
    :func:`mu_from_density` (its node rays are placed at each μ and resolve such pockets) and the
    response is called once more; a lattice keeps the root and a ``RuntimeWarning`` names δμ.
    ``options`` go to ``response`` (``rtol``, ``intrinsic``, ...; not ``resolution`` or
    ``engine``)."""
    if options.get("resolution") is not None or "engine" in options:
        raise ValueError("response_at_density: the root follows the automatic engine and resolution; for a "
                         "fixed mesh use mu_from_density(model, density, temperature, resolution=...) and "
                         "response(..., resolution=...)")
    if model.dim != 2:
        raise ValueError(f"response_at_density: 2D models only ('{model.name}' is {model.dim}D); use "
                         "mu_from_density(model, density, temperature, resolution=...) and response(...)")
    lo, hi = bracket
    if not lo < hi:
        raise ValueError("response_at_density: bracket must be (low, high) in eV with low < high")
    engine = "ladder" if isinstance(model.domain, Lattice) else "rays"
    shape = np.broadcast_shapes(np.shape(density), np.shape(temperature))
    n_t = np.broadcast_to(np.asarray(density, dtype=float), shape).reshape(-1)
    t_f = np.broadcast_to(np.asarray(temperature, dtype=float), shape).reshape(-1)
    # a lattice's uniform start grid must see small pockets: level 1 (48² points on the honeycomb
    # zone) holds 0.3 points of a 10¹² cm⁻² pocket around K on average, level START_LATTICE (384²) 20
    start = start_resolution if engine == "rays" else max(start_resolution, START_LATTICE)
    mu = np.asarray(_start_mu(model, jnp.asarray(n_t), jnp.asarray(t_f), jnp.asarray(float(lo)),
                              jnp.asarray(float(hi)), resolution=start, iterations=60))
    flat = lambda x: np.asarray(x).reshape(-1)

    def call(fixed):
        kw = dict(options, engine=engine, resolution=0, estimate_error=False) if fixed else options
        return response(model, mu=jnp.asarray(mu.reshape(shape)), temperature=jnp.asarray(t_f.reshape(shape)),
                        tau=tau, frequency=frequency, **kw)

    def newton(fixed, calls, floor, polish):
        """Up to ``calls`` calls; returns the last call, its residual and the converged mask.  μ
        stays that of the last call, or (``polish``) takes one more Newton step from it, for every
        condition.  The bracket starts afresh: the coarse and the automatic n(μ) differ by their
        errors, so signs from one need not bracket the root of the other."""
        nonlocal mu
        a, b = np.full(mu.shape, float(lo)), np.full(mu.shape, float(hi))
        for i in range(calls):
            r = call(fixed)
            dn = flat(r.density) - n_t
            dos = flat(r.dos) * _c.e                              # ∂n/∂μ in m^-2 per eV
            done = (np.abs(dn) <= np.maximum(floor(r), dos * ROOT_TOL)) | (dn == 0)
            last = done.all() or i == calls - 1
            if last and not polish:
                return r, dn, done
            a = np.where(dn < 0, np.maximum(a, mu), a)
            b = np.where(dn > 0, np.minimum(b, mu), b)
            new = mu - dn / np.where(dos > 0, dos, np.inf)
            ok = (dos > 0) & (new > a) & (new < b)
            new = np.where(ok, new, np.where(done, mu, 0.5 * (a + b)))
            mu = np.where(done & ~last, mu, new)
            if last:
                return r, dn, done

    # coarse steps until n is within COARSE_RTOL, then one more step: the automatic call starts
    # within the difference of the two resolutions' n(μ) of its root (for the rays: its estimate)
    newton(True, COARSE_CALLS, lambda r: COARSE_RTOL * np.abs(n_t), True)
    r, dn, done = newton(False, ROOT_CALLS, lambda r: 2 * np.nan_to_num(flat(r.error.density), nan=0.0), False)
    # the root is known to δμ = (|n − n_target| + error estimate)/(∂n/∂μ); where that is not small
    # against k_BT (a pocket a few k_BT deep at T -> 0, where the engine's density carries a
    # relative error of a per cent), a continuum model takes μ from the node mesh placed at each
    # μ (mu_from_density, accurate there), a lattice keeps the root with a warning
    dos = flat(r.dos) * _c.e
    err = np.nan_to_num(flat(r.error.density), nan=0.0)
    dmu = (np.abs(dn) + err) / np.where(dos > 0, dos, np.nan)
    rtol = options.get("rtol", 1e-3)
    loose = ~(dmu <= MU_SHARE * rtol * np.maximum(np.asarray(thermal_energy(t_f)), MU_FLOOR)) | ~done
    if loose.any() and engine == "rays":
        mu = mu.copy()
        mu[loose] = np.asarray(mu_from_density(model, n_t[loose], t_f[loose], bracket=bracket,
                                               resolution=start_resolution))
        r = call(False)
    elif loose.any():
        worst = int(np.nanargmax(np.where(loose, np.nan_to_num(dmu, nan=np.inf), -1.0)))
        warnings.warn(f"response_at_density: for {int(loose.sum())} of {loose.size} conditions the root is "
                      f"uncertain by more than {MU_SHARE:g} rtol k_BT (worst: n = {n_t[worst]:.4g} m^-2 at "
                      f"{t_f[worst]:g} K, mu uncertain by {dmu[worst]:.3g} eV, density off by "
                      f"{dn[worst]:.3g} m^-2): the response there may err by more than its estimate. A "
                      "smaller rtol resolves the density better; a gap at T -> 0 has no dn/dmu (give mu).",
                      RuntimeWarning, stacklevel=2)
    return mu.reshape(shape), r
