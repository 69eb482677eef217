"""Benchmarks must not rot: the quick integration benchmark runs end to end (slow: it compiles
several ladder and mesh programs); the continuum part runs on a small case in the fast suite."""
import importlib.util
import pathlib

import pytest


@pytest.mark.slow
def test_integration_benchmark_quick_run():
    path = pathlib.Path(__file__).resolve().parents[1] / "benchmarks" / "bench_integration.py"
    spec = importlib.util.spec_from_file_location("bench_integration", path)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    rows = mod.run(n_mu=4, n_t=2, resolution=0, model=dict(name="haldane"), mu_range=(1.1, 1.4),
                   t_range=(150.0, 300.0))
    names = [r[0] for r in rows]
    assert names == ["sweep ladder", "sweep mesh", "eigh", "memory"]
    assert all(r[2] > 0 for r in rows)


def test_continuum_integration_benchmark_quick_run():
    """The continuum part on a single tilted Dirac cone and 4 × 2 conditions (fast)."""
    path = pathlib.Path(__file__).resolve().parents[1] / "benchmarks" / "bench_integration.py"
    spec = importlib.util.spec_from_file_location("bench_integration", path)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    rows = mod.run_continuum(n_mu=4, n_t=2, model=dict(name="massive-dirac", params=dict(mass=0.1, tilt=5e4)),
                             mu_range=(0.14, 0.16), t_range=(10.0, 20.0))
    assert [r[0] for r in rows] == ["sweep rays", "sweep mesh", "memory"]
    assert all(r[2] > 0 for r in rows)


@pytest.mark.slow
def test_numpy_reference_benchmark_runs_end_to_end():
    """The plain-numpy comparison on a small top grid (its D_x is far from 1e-3 there: only the
    code path is checked, with the project's automatic and fixed-resolution calls)."""
    path = pathlib.Path(__file__).resolve().parents[1] / "benchmarks" / "bench_numpy_reference.py"
    spec = importlib.util.spec_from_file_location("bench_numpy_reference", path)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    t_np, t_first, t_warm, n, err_np, err_cw = mod.run(max_n=1024)
    assert n <= 1024 and t_np > 0 and t_first > 0 and t_warm > 0
    assert err_cw < 1e-3            # the project's automatic call at rtol 1e-3 (measured 1.2e-4)


def test_lattice3d_integration_benchmark_quick_run():
    """The 3D-lattice part (tetrahedra) at resolution 0 and 2 × 2 conditions (fast)."""
    path = pathlib.Path(__file__).resolve().parents[1] / "benchmarks" / "bench_integration.py"
    spec = importlib.util.spec_from_file_location("bench_integration", path)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    rows = mod.run_lattice3d(n_mu=2, n_t=2, resolution=0, t_range=(20.0, 40.0))
    assert [r[0] for r in rows] == ["sweep tetra", "eigh", "memory"]
    assert all(r[2] > 0 for r in rows)
