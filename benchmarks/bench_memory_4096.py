"""Benchmark: a 4096² Brillouin-zone mesh of a multi-band lattice model in bounded memory.

Target (transport issue): under 2 GiB peak resident memory for a 4-band model on 4096² k-points.
Uses the six-band (two spin blocks of three) tmd-lattice model, which is heavier than the target.
Run:  python benchmarks/bench_memory_4096.py [N]
Prints wall time, peak RSS and the carrier density as a sanity value.
Measured on the 2-core development machine: 2048² (21 M nodes with refinement) 442 s, peak RSS
0.71 GiB; 4096² held 0.95 GiB resident for 40 min before a time limit stopped it.
"""
import resource
import sys
import time

import jax.numpy as jnp

from crosswind.models import build
from crosswind.solver.engine import mesh
from crosswind.solver.engine.kernels import moments_indexed
from crosswind.solver.engine.scattering import ConstantTau


def main(n=4096):
    m = build("tmd-lattice")
    import jax

    mu, kt = jnp.array([1.0]), jnp.array([2.5e-3])

    def run(model):
        # the rule response() uses: uniform grid plus refined Fermi-contour cells
        total, node_fn = mesh.refined_lattice_nodes(model, mesh.Resolution(n), mu, kt)
        return moments_indexed(model, model.params, total, node_fn, mu, kt, jnp.array([30.0]),
                               ConstantTau.evaluate, {"tau0": jnp.array([[100.0]])}, 0.0, 2, False, 16384)

    total = mesh.node_count(m, mesh.Resolution(n))
    f = jax.jit(run)
    t = time.time()
    out = f(m)
    jax.block_until_ready(out)
    dt = time.time() - t
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2 ** 20  # KiB -> GiB
    print(f"mesh {n}x{n} ({total} k-points), {m.n_bands} bands: {dt:.1f} s, peak RSS {peak:.2f} GiB, "
          f"density {float(out.density[0]):.4e} 1/Å², target < 2 GiB: {'met' if peak < 2 else 'MISSED'}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 4096)
