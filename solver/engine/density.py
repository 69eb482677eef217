"""Chemical potential from a carrier density, and gate voltage → density.

``mu_from_density`` solves n(μ, T) = n_target for μ inside ``jax.lax.custom_root``: the forward
pass keeps a bracket and takes Newton steps with ∂n/∂μ (the density of states on the same mesh)
when they stay inside it, bisection steps otherwise (robust when μ sits in a gap, where plain
Newton diverges; typically 6–10 evaluations instead of 44 bisections), and
the derivative comes from the implicit-function theorem, dμ/dθ = −(∂n/∂θ)/(∂n/∂μ), not from
differentiating the iterations.  n(μ, T) is evaluated on one fixed k-mesh (``resolution``) for
all bisection steps, so the root is that of a smooth function of μ.

``gate_density`` is the parallel-plate relation n = ε0 εr V_g/(e d) (no quantum capacitance;
common practice), positive V_g adding electrons.
"""
from __future__ import annotations

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
from crosswind.solver.engine.response import mesh_levels, neutral_filling

MU_TOL = 1e-12    # eV: the solve stops when a step or the bracket is below this


def parallel_plate_capacitance(thickness_nm, permittivity=3.9):
    """Gate capacitance per area (F/m²) of a dielectric of ``thickness_nm`` (nm) and relative
    permittivity ``permittivity``: ε0εr/d (no quantum capacitance; docs/theory.md §9)."""
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


@partial(jax.jit, static_argnames=("resolution", "iterations"))
def _solve(model, flat_n, flat_t, lo, hi, *, resolution, iterations):
    n_of = _density_fn(model, resolution)

    def solve_one(params, n_target, t):
        kt = thermal_energy(t)

        def residual(mu):
            return n_of(params, mu, kt) - n_target

        def solve(f, x0):
            # safeguarded Newton: the bracket [a, b] shrinks with every evaluation; a Newton step
            # (∂n/∂μ at the same mesh, by jvp: the density of states) is taken when it stays
            # inside the bracket, a bisection otherwise (μ in a gap, far from the root)
            def body(st):
                a, b, x, i, _ = st
                fx, gx = jax.jvp(f, (x,), (jnp.ones_like(x),))
                a, b = jnp.where(fx > 0, a, x), jnp.where(fx > 0, x, b)
                step = fx / jnp.where(gx > 0, gx, 1.0)
                # converged: the Newton correction is below the tolerance (it may round to x
                # itself, which sits on the bracket's edge)
                conv = ((gx > 0) & (jnp.abs(step) < MU_TOL)) | (fx == 0)
                xn = x - step
                xn = jnp.where((gx > 0) & (xn > a) & (xn < b), xn, 0.5 * (a + b))
                xn = jnp.where(conv, x - jnp.where(gx > 0, step, 0.0), xn)
                return a, b, xn, i + 1, conv | (b - a < MU_TOL)

            def more(st):
                return (~st[4]) & (st[3] < iterations)

            return jax.lax.while_loop(more, body, (lo, hi, x0, 0, False))[2]

        def tangent_solve(g, y):
            return y / g(1.0)

        return jax.lax.custom_root(residual, 0.5 * (lo + hi), solve, tangent_solve)

    return jax.vmap(lambda n, t: solve_one(model.params, n, t))(flat_n, flat_t)
