"""k-space integration benchmarks (issue goals as ratios measured in one process).

Prints, for a lattice model:

* sweep   — one ``response(..., engine="ladder")`` call over N_mu × N_T conditions against a call
            with one condition (both warm, same resolution): the cost of a sweep in units of one
            point; the same ratio for the node engine (``engine="mesh"``) for comparison;
* eigh    — the ladder call (one condition, warm) against a bare batched ``jnp.linalg.eigh`` of
            the model's Hamiltonian on as many k-points as the ladder evaluated;
* memory  — peak resident memory of the process after the largest sweep (MiB);

and for a continuum (k·p) model (strained MoS2, ``tmd``): the automatic ``response`` call (shared
rays, rtol 1e-3) over N_mu × N_T conditions against one condition, and the node rule's cost of 8
conditions against one; for a 3D lattice (tilted ``weyl``, tetrahedra at resolution 1): the sweep
against one condition and one condition against a bare batched ``eigh`` on the plan's k-points.

Default case: honeycomb (staggered 0.2, strain_xx 0.01), μ in [0.28, 0.32] eV, T in [10, 40] K.

Usage: ``python benchmarks/bench_integration.py`` (full: 200 μ × 20 T; several minutes on 2
cores) or ``--quick`` (Haldane model, 8 × 2 conditions).
"""
from __future__ import annotations

import argparse
import resource
import time

import jax
import jax.numpy as jnp
import numpy as np

from crosswind.models import build
from crosswind.solver import response


def _warm(fn, repeat=4):
    """Best of ``repeat`` warm calls (the shared 2-core machine's load moves single calls by up to
    a third; both sides of every ratio are measured the same way)."""
    fn()                                   # compile (and fill the budgets)
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def _block(r):
    jax.block_until_ready(r.sigma)
    return r


def _table(title, rows):
    print(title)
    print(f"{'benchmark':<14} {'ratio of':<42} {'value':>10}  detail")
    for name, what, val, det in rows:
        print(f"{name:<14} {what:<42} {val:>10.3g}  {det}")


HARD = dict(name="honeycomb", params=dict(staggered=0.2, strain_xx=0.01))


def run(n_mu=200, n_t=20, resolution=1, model=HARD, mu_range=(0.28, 0.32), t_range=(10.0, 40.0)):
    model_name = model["name"]
    model = build(model_name, **model.get("params", {}))
    mus = np.linspace(*mu_range, n_mu)
    temps = np.geomspace(*t_range, n_t)
    mu_grid, t_grid = np.meshgrid(mus, temps, indexing="ij")
    one = dict(mu=float(mus[n_mu // 2]), temperature=float(temps[0]), tau=50.0, resolution=resolution)
    sweep = dict(mu=mu_grid, temperature=t_grid, tau=50.0, resolution=resolution)
    rows = []
    r1 = _block(response(model, engine="ladder", **one))
    plan = r1.resolution.plan
    t_one = _warm(lambda: _block(response(model, engine="ladder", plan=plan, **one)))
    rs = _block(response(model, engine="ladder", **sweep))
    t_sweep = _warm(lambda: _block(response(model, engine="ladder", plan=rs.resolution.plan, **sweep)))
    rows.append(("sweep ladder", f"{n_mu * n_t} conditions / 1", t_sweep / t_one, f"{t_sweep:.2f} s / {t_one:.2f} s"))
    m_one = dict(one, resolution=min(resolution + 1, 5))
    m_sweep = dict(mu=mus[:8], temperature=float(temps[0]), tau=50.0, resolution=m_one["resolution"])
    tm1 = _warm(lambda: _block(response(model, **m_one)))
    tm8 = _warm(lambda: _block(response(model, **m_sweep)))
    rows.append(("sweep mesh", "8 conditions / 1", tm8 / tm1, f"{tm8:.2f} s / {tm1:.2f} s"))
    # bare eigensolver on as many k-points as the ladder evaluated
    rows += _eigh_and_memory(model, plan.k_points(model.dim), t_one, "ladder", n_mu * n_t)
    _table(f"model {model_name}, resolution {resolution}, plan of one condition {plan}", rows)
    return rows


def _eigh_and_memory(model, nk, t_one, engine, n_cond):
    """Rows: one condition against a bare batched ``jnp.linalg.eigh`` on ``nk`` random k-points,
    and the peak resident memory after the sweep."""
    b = np.asarray(model.reciprocal_vectors())
    ks = jnp.asarray(np.random.default_rng(0).random((nk, model.dim)) @ b)
    eig = jax.jit(lambda k: jnp.linalg.eigh(jax.vmap(lambda q: model.hamiltonian(q, model.params))(k)))
    t_eig = _warm(lambda: jax.block_until_ready(eig(ks)))
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return [("eigh", f"{engine} 1 condition / eigh on {nk} k", t_one / t_eig, f"{t_one:.2f} s / {t_eig:.3f} s"),
            ("memory", "peak RSS (MiB)", peak, f"after {n_cond} conditions")]


TMD = dict(name="tmd", params=dict(material="MoS2", strain_xx=0.01))


def run_continuum(n_mu=200, n_t=20, model=TMD, mu_range=(0.84, 0.88), t_range=(10.0, 40.0), rtol=1e-3):
    """Continuum (k·p) model: one automatic ``response`` call (shared rays, rtol) over
    N_mu × N_T conditions against one condition at the same rtol; the node quadrature's cost per
    extra condition for comparison."""
    model_name = model["name"]
    model = build(model_name, **model.get("params", {}))
    mus = np.linspace(*mu_range, n_mu)
    temps = np.geomspace(*t_range, n_t)
    mu_grid, t_grid = np.meshgrid(mus, temps, indexing="ij")
    one = dict(mu=float(mus[n_mu // 2]), temperature=float(temps[0]), tau=50.0, rtol=rtol)
    sweep = dict(mu=mu_grid, temperature=t_grid, tau=50.0, rtol=rtol)
    rows = []
    r1 = _block(response(model, **one))
    t_one = _warm(lambda: _block(response(model, **one)))
    rs = _block(response(model, **sweep))
    t_sweep = _warm(lambda: _block(response(model, **sweep)))
    i1, i_s = r1.resolution, rs.resolution
    rows.append(("sweep rays", f"{n_mu * n_t} conditions / 1 (rtol {rtol:g})", t_sweep / t_one,
                 f"{t_sweep:.2f} s / {t_one:.2f} s; levels {i_s.level} / {i1.level}; "
                 f"k-points {i_s.k_points} / {i1.k_points}"))
    lev = 2
    m_one = dict(mu=one["mu"], temperature=one["temperature"], tau=50.0, resolution=lev)
    m_sweep = dict(mu=mus[:8], temperature=float(temps[0]), tau=50.0, resolution=lev)
    tm1 = _warm(lambda: _block(response(model, engine="mesh", **m_one)))
    tm8 = _warm(lambda: _block(response(model, engine="mesh", **m_sweep)))
    rows.append(("sweep mesh", f"8 conditions / 1 (node rule level {lev})", tm8 / tm1,
                 f"{tm8:.2f} s / {tm1:.2f} s"))
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    rows.append(("memory", "peak RSS (MiB)", peak, f"after {n_mu * n_t} conditions"))
    _table(f"model {model_name} (continuum)", rows)
    return rows


WEYL = dict(name="weyl", params=dict(tilt=0.3, node_position=0.3))


def run_lattice3d(n_mu=200, n_t=20, resolution=1, model=WEYL, mu_range=(0.08, 0.12), t_range=(10.0, 40.0)):
    """3D lattice (tetrahedra, ``engine="tetra"`` at a fixed resolution, plans made once as a fit
    or a repeated sweep reuses them): N_mu × N_T conditions against one condition, and one
    condition against a bare batched ``jnp.linalg.eigh`` on as many k-points as the plan holds."""
    model_name = model["name"]
    model = build(model_name, **model.get("params", {}))
    mus = np.linspace(*mu_range, n_mu)
    temps = np.geomspace(*t_range, n_t)
    mu_grid, t_grid = np.meshgrid(mus, temps, indexing="ij")
    one = dict(mu=float(mus[n_mu // 2]), temperature=float(temps[0]), tau=50.0, resolution=resolution,
               engine="tetra")
    sweep = dict(mu=mu_grid, temperature=t_grid, tau=50.0, resolution=resolution, engine="tetra")
    rows = []
    r1 = _block(response(model, **one))
    plan = r1.resolution.plan
    t_one = _warm(lambda: _block(response(model, plan=plan, **one)))
    rs = _block(response(model, **sweep))
    t_sweep = _warm(lambda: _block(response(model, plan=rs.resolution.plan, **sweep)))
    rows.append(("sweep tetra", f"{n_mu * n_t} conditions / 1", t_sweep / t_one,
                 f"{t_sweep:.2f} s / {t_one:.2f} s; k-points {rs.resolution.k_points} / {r1.resolution.k_points}"))
    rows += _eigh_and_memory(model, plan.k_points(model.dim), t_one, "tetra", n_mu * n_t)
    _table(f"model {model_name} (3D lattice), resolution {resolution}", rows)
    return rows


if __name__ == "__main__":
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    a = ap.parse_args()
    if a.quick:
        run(n_mu=8, n_t=2, resolution=0, model=dict(name="haldane"), mu_range=(1.1, 1.4),
            t_range=(150.0, 300.0))
        run_continuum(n_mu=8, n_t=2)
        run_lattice3d(n_mu=4, n_t=2, resolution=0)
    else:
        run()
        run_continuum()
        run_lattice3d()
