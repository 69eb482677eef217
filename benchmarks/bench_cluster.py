"""A sweep run serially and on a local Dask cluster (``crosswind run --cluster local:2``).

For each batch size P (points of the inner μ axis per batch) the same scenario of B batches
(one per temperature) is run

* serially, warm (the kernels compiled by an earlier run in this process), and
* on a ``local:2`` cluster, warm (each worker compiled by an earlier run of the same scenario),

both writing their checkpoints and results as ``crosswind run`` does.  Printed per P: both wall
times and the speed-up; one batch's time serially and inside its task on a worker (more than
serially when the workers compete for cores: JAX already uses every core of a serial run); and
the per-batch overhead of the cluster

    overhead = W · T_cluster / B − (time inside the batch tasks) / B      (W workers)

— scheduling, transfers, the client's checkpoint writing and workers idle at the end of the run —
as a time and as a fraction of a batch's time on a worker.  Then the batch size above which the
overhead stays under 10 % (a straight line through the measured batch times against the median
overhead), the cluster's start-up time, the first (compiling) cluster run, and the peak memory of
each worker.

Usage: ``python benchmarks/bench_cluster.py`` (P = 4, 16, 64; B = 16) or ``--quick``
(P = 2, 8; B = 8).  Numbers are recorded in docs/performance.md and docs/cluster.md.
"""
from __future__ import annotations

import argparse
import json
import resource
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np

from crosswind.solver.study import cluster
from crosswind.solver.study.scenario import parse_scenario
from crosswind.solver.study.sweep import run_scenario

SCENARIO = """
[material]
model = "{model}"
[material.parameters]
{params}

[device]
width_um = 5
length_um = 10
current_uA = 10

[conditions]
mu_eV = {{start = {mu0}, stop = {mu1}, num = {points}}}
temperature_K = {{start = 5, stop = 50, num = {batches}}}
tau_fs = 100
current_angle_deg = [0, 90]

[numerics]
resolution = {resolution}
batch_points = {points}        # one run of the μ axis per batch: B batches of P points

[output]
folder = "out"
figures = false
"""
MODELS = {"massive-dirac": ("velocity = 5e5\ntilt = 5e4\nmass = 0.1\nvalleys = 2", 0.12, 0.16),
          "tmd": ('material = "MoS2"', 0.84, 0.88)}


def scenario(model, points, batches, resolution):
    params, mu0, mu1 = MODELS[model]
    text = SCENARIO.format(model=model, params=params, mu0=mu0, mu1=mu1, points=points, batches=batches,
                           resolution=resolution)
    return parse_scenario(text, source=f"<bench {model} P={points}>", base=Path.cwd())


def timed_run(scn, client=None):
    """(wall time, seconds the workers spent inside the batch tasks: 0 for a serial run)."""
    folder = Path(tempfile.mkdtemp(prefix="crosswind-bench-"))
    try:
        t0 = time.perf_counter()
        ds = run_scenario(scn, folder / "out", progress=False, client=client)
        wall = time.perf_counter() - t0
        who = json.loads(ds.attrs.get("cluster_workers_this_run", "{}"))
        return wall, sum(sum(w["seconds"]) for w in who.values())
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def peak_mib(dask_worker=None) -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def run(sizes, batches, model="massive-dirac", resolution=1, workers=2):
    rows = []
    t0 = time.perf_counter()
    with cluster.open_client(f"local:{workers}") as client:
        startup = time.perf_counter() - t0
        first = None
        for P in sizes:
            scn = scenario(model, P, batches, resolution)
            timed_run(scn)                               # compile here
            cold = timed_run(scn, client)[0]             # compile on the workers
            first = cold if first is None else first
            serial = timed_run(scn)[0]
            clustered, inside = timed_run(scn, client)
            on_worker = inside / batches
            overhead = workers * clustered / batches - on_worker
            rows.append({"P": P, "serial_s": serial, "cluster_s": clustered, "speedup": serial / clustered,
                         "batch_s": serial / batches, "worker_batch_s": on_worker, "overhead_s": overhead,
                         "overhead": overhead / on_worker})
        memory = client.run(peak_mib)
    # one batch's work is about a + c·P; the overhead is about constant: < 10 % once a + c·P > 10·overhead
    P = np.array([r["P"] for r in rows], dtype=float)
    c, a = np.polyfit(P, [r["worker_batch_s"] for r in rows], 1) if len(rows) > 1 else (rows[0]["worker_batch_s"], 0.0)
    o = float(np.median([max(r["overhead_s"], 0.0) for r in rows]))
    p10 = max(1.0, (10 * o - a) / c) if c > 0 else float("nan")
    return rows, {"workers": workers, "batches": batches, "model": model, "resolution": resolution,
                  "cluster_startup_s": startup, "first_cluster_run_s": first, "overhead_s_median": o,
                  "batch_s_fit": {"a": float(a), "c_per_point": float(c)}, "points_for_10_percent": p10,
                  "worker_peak_mib": sorted(memory.values()),
                  "client_peak_mib": peak_mib()}


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="P = 2, 8 and 8 batches")
    ap.add_argument("--model", default="massive-dirac", choices=sorted(MODELS))
    ap.add_argument("--resolution", type=int, default=1)
    ap.add_argument("--json", metavar="FILE", help="also write the numbers as JSON")
    a = ap.parse_args()
    sizes, batches = ((2, 8), 8) if a.quick else ((4, 16, 64), 16)
    rows, info = run(sizes, batches, model=a.model, resolution=a.resolution)
    print(f"{info['model']}, mesh level {info['resolution']}, {info['batches']} batches, "
          f"local:{info['workers']} (single-threaded workers)")
    print(f"{'P':>4} {'serial s':>9} {'cluster s':>9} {'speed-up':>8} {'batch s':>8} {'on worker s':>11} "
          f"{'overhead s':>10} {'overhead':>8}")
    for r in rows:
        print(f"{r['P']:>4} {r['serial_s']:>9.2f} {r['cluster_s']:>9.2f} {r['speedup']:>8.2f} {r['batch_s']:>8.3f} "
              f"{r['worker_batch_s']:>11.3f} {r['overhead_s']:>10.3f} {r['overhead']:>8.1%}")
    print(f"cluster start-up {info['cluster_startup_s']:.1f} s; first cluster run (workers compile) "
          f"{info['first_cluster_run_s']:.1f} s")
    print(f"per-batch overhead (median) {info['overhead_s_median']:.3f} s; one batch on a worker ≈ "
          f"{info['batch_s_fit']['a']:.3f} s + {info['batch_s_fit']['c_per_point']:.4f} s × P: overhead < 10 % "
          f"from about P = {info['points_for_10_percent']:.0f} points per batch")
    print(f"peak memory per worker {', '.join(f'{m:.0f}' for m in info['worker_peak_mib'])} MiB; "
          f"client {info['client_peak_mib']:.0f} MiB")
    if a.json:
        Path(a.json).write_text(json.dumps({"rows": rows, **info}, indent=1), encoding="utf-8")


if __name__ == "__main__":
    main()
