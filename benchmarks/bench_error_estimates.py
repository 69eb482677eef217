"""How good is the reported integration error?  For the node quadrature (``engine="mesh"``) at a
fixed ``resolution=L`` the estimate is |v_L − v_{L−1}|; this script compares it with the "true"
error |v_L − v_top| against the finest level on hard cases (band edge at T = 0, T → 0 inside a
band, a small gap) and prints the ratio estimated / true for each level and field.  A ratio below
1 means the estimate is too optimistic; v_top is itself not exact, so ratios at L = top − 1 are
only indicative.  Results are recorded in docs/error-estimates.md.

Usage: ``python benchmarks/bench_error_estimates.py`` (about a minute on 2 cores; ``--lattice``
adds the honeycomb lattice cases, several minutes).
"""
from __future__ import annotations

import argparse
import time

import numpy as np

from crosswind.models import build
from crosswind.solver import response
from crosswind.solver.engine.response import mesh_levels

CONTINUUM = [("massive Dirac, band edge mu = mass, T = 0", "massive-dirac",
              {"velocity": 5e5, "mass": 0.1, "tilt": 5e4}, 0.1, 0.0),
             ("massive Dirac, in band mu = 0.15 eV, T = 0", "massive-dirac",
              {"velocity": 5e5, "mass": 0.1, "tilt": 5e4}, 0.15, 0.0),
             ("massive Dirac, small gap 2 x 5 meV, mu = 10 meV, T = 1 K", "massive-dirac",
              {"velocity": 5e5, "mass": 0.005, "tilt": 5e4}, 0.010, 1.0)]
LATTICE = [("honeycomb, band edge mu = staggered = 0.1 eV, T = 0", "honeycomb", {"staggered": 0.1}, 0.1, 0.0),
           ("honeycomb, in band mu = 0.3 eV, T = 0", "honeycomb", {"staggered": 0.1}, 0.3, 0.0)]
FIELDS = {"sigma_xx": lambda r: r.sigma[0, 0].real, "chi_yxx": lambda r: r.chi[1, 0, 0].real,
          "density": lambda r: r.density}


def levels_of(model, mu, temperature) -> list:
    """Every field at every mesh level (no error passes)."""
    out = []
    for level in range(len(mesh_levels(model))):
        r = response(model, mu=mu, temperature=temperature, tau=100.0, resolution=level, estimate_error=False)
        out.append({f: float(np.asarray(g(r))) for f, g in FIELDS.items()})
    return out


def report(name, vals) -> None:
    top = len(vals) - 1
    print(f"## {name} (levels 0..{top})")
    for f in FIELDS:
        cells = []
        for level in range(1, top):
            est = abs(vals[level][f] - vals[level - 1][f])
            true = abs(vals[level][f] - vals[top][f])
            ratio = est / true if true > 0 else float("inf")
            cells.append(f"L{level}: est {est:.2e} true {true:.2e} ratio {ratio:.2g}")
        print(f"  {f} (finest {vals[top][f]:.6g}): " + "; ".join(cells))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--lattice", action="store_true", help="also the honeycomb lattice cases")
    args = ap.parse_args()
    for name, model, params, mu, temperature in CONTINUUM + (LATTICE if args.lattice else []):
        t0 = time.time()
        vals = levels_of(build(model, **params), mu, temperature)
        report(f"{name}, {time.time() - t0:.0f} s", vals)


if __name__ == "__main__":
    main()
