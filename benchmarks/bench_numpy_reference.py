"""The project against a careful, vectorised plain-numpy uniform-grid script at equal accuracy.

Case: strained gapped honeycomb (staggered 0.2 eV, strain_xx 0.01, β 3.37, t 2.8 eV, a 2.46 Å),
μ = 0.3 eV, T = 10 K; quantities D_x (Berry-curvature dipole) and σ_xx's Fermi-surface integral
∫(−f0')g_x².  The numpy script writes the model from its closed form (two-band d-vector,
Ω_± = ∓ d·(∂_x d × ∂_y d)/(2|d|³), g_± = ±(d·∂d)/|d|; docs/theory.md §2, §4), sums on the uniform
offset grid of the deformed zone in row chunks (float64), and doubles N until D_x is within 1e-3
of the independent contour reference (validation/fermi_contour.py, D_x = 1.442341113e-3 Å, both
valleys, degeneracy not applied).  It is then timed at that N; the project is timed with
``response(model, mu, T, tau)`` at rtol 1e-3 (automatic engine: the temperature ladder), first call
(compilation included) and warm, and, selected like the numpy grid, at the coarsest fixed ladder
resolution whose D_x is within 1e-3 of the reference (warm).

Usage: ``python benchmarks/bench_numpy_reference.py`` (a few minutes on 2 cores).
"""
from __future__ import annotations

import time

import numpy as np

KB = 8.617333262e-5
S3 = np.sqrt(3.0)
REFERENCE_DX = 1.442341113e-3     # Å, validation/fermi_contour.py at 10 K


def _setup(t=2.8, staggered=0.2, exx=0.01, beta=3.37, a=2.46):
    acc = a / S3
    bonds = np.array([[0.0, 1.0], [-S3 / 2, -0.5], [S3 / 2, -0.5]]) * acc
    eps = np.array([[exx, 0.0], [0.0, 0.0]])
    new = bonds @ (np.eye(2) + eps).T
    hop = t * np.exp(-beta * (np.linalg.norm(new, axis=1) / acc - 1.0))
    avec = np.array([bonds[0] - bonds[1], bonds[0] - bonds[2]]) @ (np.eye(2) + eps).T
    b = 2 * np.pi * np.linalg.inv(avec).T
    return new, hop, staggered, b


def numpy_sums(n, mu=0.3, temperature=10.0, rows=64):
    """(D_x, ∫(−f0') g_x²) on the n×n uniform offset grid, both bands, degeneracy not applied."""
    new, hop, delta, b = _setup()
    kt = KB * temperature
    area = abs(np.linalg.det(b)) / (2 * np.pi) ** 2 / n ** 2
    ax = (np.arange(n) + 0.5) / n
    dx_sum, sxx_sum = 0.0, 0.0
    for r0 in range(0, n, rows):
        u = ax[r0:r0 + rows, None]
        k = u[..., None] * b[0] + ax[None, :, None] * b[1]                  # (r, n, 2)
        ph = k @ new.T                                                     # (r, n, 3)
        c, s = np.cos(ph), np.sin(ph)
        d1, d2 = -(c @ hop), s @ hop
        # ∂d/∂k_j: ∂d1 = Σ t sin(ph) δ_j, ∂d2 = Σ t cos(ph) δ_j
        g1 = (s * hop) @ new                                               # (r, n, 2)
        g2 = (c * hop) @ new
        e = np.sqrt(d1 * d1 + d2 * d2 + delta * delta)
        cross = delta * (g1[..., 0] * g2[..., 1] - g1[..., 1] * g2[..., 0])  # d·(∂x d × ∂y d), d3 const
        om_up = -cross / (2 * e ** 3)
        gx_up = (d1 * g1[..., 0] + d2 * g2[..., 0]) / e
        for sign in (1.0, -1.0):
            x = np.abs((sign * e - mu) / kt)
            ex = np.exp(-x)
            mdf = ex / (kt * (1.0 + ex) ** 2)
            gx, om = sign * gx_up, sign * om_up
            dx_sum += np.sum(mdf * gx * om)
            sxx_sum += np.sum(mdf * gx * gx)
    return dx_sum * area, sxx_sum * area


def run(max_n=16384):
    n, rows = 1024, []
    while True:
        dx, _ = numpy_sums(n)
        err = abs(dx / REFERENCE_DX - 1)
        rows.append((n, err))
        if err < 1e-3 or n >= max_n:
            break
        n *= 2
    # equal accuracy: the smallest power-of-two grid that reaches 1e-3; bisect between n/2 and n
    lo, hi = n // 2, n
    while hi - lo > hi // 16:
        mid = (lo + hi) // 2
        if abs(numpy_sums(mid)[0] / REFERENCE_DX - 1) < 1e-3:
            hi = mid
        else:
            lo = mid
    n = hi
    t0 = time.perf_counter()
    dx, sxx = numpy_sums(n)
    t_np = time.perf_counter() - t0
    err_np = abs(dx / REFERENCE_DX - 1)

    import jax

    from crosswind.models import build
    from crosswind.solver import response
    model = build("honeycomb", staggered=0.2, strain_xx=0.01)
    t0 = time.perf_counter()
    r = response(model, mu=0.3, temperature=10.0, tau=100.0)
    jax.block_until_ready(r.dipole)
    t_first = time.perf_counter() - t0
    t0 = time.perf_counter()
    r = response(model, mu=0.3, temperature=10.0, tau=100.0)
    jax.block_until_ready(r.dipole)
    t_warm = time.perf_counter() - t0
    info = r.resolution
    err_cw = abs(float(r.dipole[0]) / (REFERENCE_DX * 1e-10 * model.degeneracy) - 1)
    # the same selection as the numpy grid's: the coarsest fixed ladder resolution within 1e-3
    # (its plan made once, as a fit or sweep reuses it; warm call timed)
    for lev in range(int(info.level) + 1):
        rf = response(model, mu=0.3, temperature=10.0, tau=100.0, engine="ladder", resolution=lev)
        err_f = abs(float(rf.dipole[0]) / (REFERENCE_DX * 1e-10 * model.degeneracy) - 1)
        if err_f < 1e-3:
            break
    t0 = time.perf_counter()
    rf = response(model, mu=0.3, temperature=10.0, tau=100.0, engine="ladder", resolution=lev)
    jax.block_until_ready(rf.dipole)
    t_fixed = time.perf_counter() - t0
    print("numpy doubling:", ", ".join(f"n={a}: {e:.1e}" for a, e in rows))
    print(f"numpy uniform grid  n = {n} ({n * n:.2e} k-points): D_x error {err_np:.1e}, {t_np:.1f} s")
    print(f"crosswind response  engine {info.engine}, {info.k_points:.2e} k-points: D_x error "
          f"{err_cw:.1e}, first call {t_first:.1f} s, warm {t_warm:.1f} s")
    print(f"crosswind fixed     ladder resolution {lev} (coarsest within 1e-3), {rf.resolution.k_points:.2e} "
          f"k-points: D_x error {err_f:.1e}, warm {t_fixed:.2f} s")
    print(f"ratio numpy / crosswind: {t_np / t_first:.1f} (first call), {t_np / t_warm:.1f} (warm), "
          f"{t_np / t_fixed:.1f} (fixed resolution {lev}, warm)")
    return t_np, t_first, t_warm, n, err_np, err_cw


if __name__ == "__main__":
    run()
