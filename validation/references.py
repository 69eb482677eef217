"""Independent reference values: closed forms (scipy.constants CODATA) and scipy quadrature.

Nothing here calls the Crosswind solver.
"""
from __future__ import annotations

import numpy as np
from scipy import constants as C
from scipy import constants as sc
from scipy import integrate

from crosswind.models import build

from .fermi_contour import (
    BandEvaluator,
    band_extremum,
    dipole_reference,
    uniform_grid_reference,
)

HBAR_EVS = C.hbar / C.e
KB = C.k / C.e


def _hv(v):
    return v * HBAR_EVS * 1e10  # eV Å


def dirac_gap_hall(params, cond):
    return -np.sign(params["mass"]) * C.e ** 2 / (2 * C.h)


def dirac_density(params, cond):
    mu, m = cond["mu"], params["mass"]
    return (mu ** 2 - m ** 2) / (4 * np.pi * _hv(params["velocity"]) ** 2) * 1e20


def tilted_dipole_first_order(params, cond):
    ht = _hv(params["tilt"])
    mu, d = cond["mu"], params["mass"]
    return -3 * ht * d * (mu ** 2 - d ** 2) / (8 * np.pi * mu ** 4) * 1e-10


def tilted_dipole_quadrature(params, cond):
    """D_x = ∫ d²k/(2π)² (−f0'(ε_c)) ∂_xε_c Ω_c for H = ħt k_x + ħv k·σ + Δσ_z (one valley),
    Ω_c = −(ħv)²Δ/(2E³); polar coordinates, scipy.integrate.quad in k and θ."""
    hv, ht, d, mu = _hv(params["velocity"]), _hv(params["tilt"]), params["mass"], cond["mu"]
    kt = KB * cond["temperature"]

    def integrand_k(k, th):
        kx = k * np.cos(th)
        e = np.sqrt((hv * k) ** 2 + d * d)
        ec = ht * kx + e
        x = (ec - mu) / kt
        mdf = 1.0 / (4 * kt * np.cosh(np.clip(x / 2, -300, 300)) ** 2)
        gx = ht + hv * hv * kx / e
        om = -(hv * hv) * d / (2 * e ** 3)
        return mdf * gx * om * k

    def radial(th):
        # Fermi radius along θ: ħt k cosθ + sqrt((ħv k)² + Δ²) = μ
        c = np.cos(th)
        a = hv * hv - (ht * c) ** 2
        b = 2 * mu * ht * c
        kf = (-b + np.sqrt(b * b + 4 * a * (mu * mu - d * d))) / (2 * a)
        w = 40 * kt / (hv)
        lo, hi = max(kf - w, 0.0), kf + w
        val, _ = integrate.quad(integrand_k, lo, hi, args=(th,), points=[kf], epsabs=0, epsrel=1e-11, limit=200)
        return val

    val, _ = integrate.quad(radial, 0, 2 * np.pi, epsabs=0, epsrel=1e-10, limit=200)
    return val / (2 * np.pi) ** 2 * 1e-10


def weyl_pair_hall(params, cond):
    """(e²/h)·2k0/(2π) in S/m for the `weyl` lattice, k0 = node_position·π/a (Burkov & Balents 2011)."""
    a = params.get("lattice_constant", 3.0) * 1e-10
    k0 = params.get("node_position", 0.5) * np.pi / a
    return C.e ** 2 / C.h * 2 * k0 / (2 * np.pi)


def _weyl_lattice_uniform(params, cond, n=384):
    """Plain numpy uniform offset grid (n³ points over the cubic zone) of the two-band `weyl`
    lattice, H = d0 + d·σ with d_x = t(cos k0a − cos k_xa) + m(2 − cos k_ya − cos k_za),
    d_y = t sin k_ya, d_z = t sin k_za, d0 = w sin k_xa (written out here from the model's
    formula): returns (density relative to the filled lower band (m⁻³), σ_xx^Drude (S/m), the
    dimensionless dipole D_xx) with ε± = d0 ± |d|, ħv_x = w a cos k_xa ± (d_x/|d|) t a sin k_xa,
    σ_xx = e²τ Σ∫F v_x² d³k/(2π)³ (common practice), and D_xx = Σ∫F ∂_xε Ω^x d³k/(2π)³ (the 3D
    dipole of Moore & Orenstein, PRL 105, 026805, 2010; Sodemann & Fu, PRL 115, 216806, 2015)
    with the two-band curvature Ω^x_± = ∓ d·(∂_y d × ∂_z d)/(2|d|³) (the d-vector form of
    Berry's curvature, common practice), here ∓ t²a²[d_x cos k_ya cos k_za − m(sin²k_ya cos k_za
    + sin²k_za cos k_ya)]/(2|d|³).  The trapezoid rule on the periodic zone converges spectrally
    once h resolves k_BT/|∇ε|: at 100 K, μ = 0.1 eV (tilt 0.3, nodes at ±0.3π/a) n = 384 agrees
    with n = 512 to 3e-7 (density) and 1e-6 (σ_xx)."""
    t, m = params.get("hopping", 1.0), params.get("mass", 1.0)
    node, w = params.get("node_position", 0.5), params.get("tilt", 0.0)
    a = params.get("lattice_constant", 3.0)
    kt = KB * cond["temperature"]
    mu = cond["mu"]
    ka = (np.arange(n) + 0.5) / n * 2 * np.pi - np.pi
    c, s = np.cos(ka), np.sin(ka)
    dyz2 = (t * s[:, None]) ** 2 + (t * s[None, :]) ** 2
    myz = m * (2.0 - c[:, None] - c[None, :])
    cyz = c[:, None] * c[None, :]
    syz = s[:, None] ** 2 * c[None, :] + c[:, None] * s[None, :] ** 2
    dens = sxx = dxx = 0.0
    for i in range(n):
        dx = t * (np.cos(node * np.pi) - c[i]) + myz
        dn = np.sqrt(dx * dx + dyz2)
        triple = t * t * a * a * (dx * cyz - m * syz)                 # d·(∂_y d × ∂_z d) (eV³ Å²)
        for sign in (1.0, -1.0):
            x = (w * s[i] + sign * dn - mu) / kt
            f0 = 0.5 * (1.0 - np.tanh(0.5 * x))
            F = 1.0 / (4.0 * kt * np.cosh(0.5 * np.clip(x, -700.0, 700.0)) ** 2)
            vx = w * a * c[i] + sign * t * a * s[i] * dx / dn          # eV Å
            om_x = -sign * triple / (2.0 * dn ** 3)                    # Å²
            dens += np.sum(f0) - (n * n if sign < 0 else 0.0)
            sxx += np.sum(F * vx * vx)
            dxx += np.sum(F * vx * om_x)
    per_point = 1.0 / (a * 1e-10) ** 3 / n ** 3                      # ∫d³k/(2π)³ per point (m⁻³)
    v_si = 1e-10 * C.e / C.hbar                                         # m/s per eV Å
    tau = cond["tau"] * 1e-15
    return (dens * per_point, C.e ** 2 * tau * sxx * per_point * v_si ** 2 / C.e,
            dxx / (a ** 3 * n ** 3))


def weyl_lattice_uniform_density(params, cond):
    """Carrier density (m⁻³) of the `weyl` lattice from :func:`_weyl_lattice_uniform`."""
    return _weyl_lattice_uniform(params, cond)[0]


def weyl_lattice_uniform_sigma_xx(params, cond):
    """Drude σ_xx (S/m) of the `weyl` lattice from :func:`_weyl_lattice_uniform`."""
    return _weyl_lattice_uniform(params, cond)[1]


def weyl_lattice_uniform_dipole_xx(params, cond):
    """Berry-curvature dipole D_xx (dimensionless) of the `weyl` lattice from
    :func:`_weyl_lattice_uniform`."""
    return _weyl_lattice_uniform(params, cond)[2]


def bilayer_box_grid(params, cond, half_width=0.04, n=1000):
    """Density relative to neutrality (m⁻²) and density of states (J⁻¹ m⁻²) of Bernal bilayer
    graphene, valley K only, spin degeneracy 2, from a plain numpy midpoint grid of n² points over
    the square |k_x|, |k_y| < ``half_width`` (1/Å) around K.  The four-band Hamiltonian is written
    out here from McCann & Koshino, Rep. Prog. Phys. 76, 056503 (2013), eq. (30): ħv_i = √3aγ_i/2,
    π = k_x + ik_y, on-site energies (−U + δ)/2, (−U + 2Δ' − δ)/2, (U + 2Δ' + δ)/2, (U − δ)/2
    (``params`` keys as the model's: gamma0, gamma1, gamma3, gamma4, dimer_shift, asymmetry,
    sublattice_asymmetry, lattice_constant; missing keys take the model's defaults).  The two
    lowest bands are filled at neutrality: n = 2 Σ∫ [f0(ε_upper) − (1 − f0(ε_lower))] d²k/(2π)².
    On the box's edge every band must lie at least 40 k_BT from μ (checked; else ValueError): for
    U = 0 and μ of a few meV they lie about 0.1 eV away (580 k_BT at 2 K), but at U = 0.2 eV and
    μ = 0.12 eV, 10 K, 0.04 Å⁻¹ cut 1.7e-4 of the density of states; the midpoint
    rule converges spectrally once h resolves k_BT/|∇ε| (μ = 0.5 meV, 2 K, U = 0: n = 1000 and
    2000 agree to 1e-9 in the density and 4e-8 in the density of states)."""
    if params.get("valleys") != 1 or params.get("degeneracy", 2) != 2:
        raise ValueError("bilayer_box_grid: pass valleys=1 (the grid covers valley K only, spin degeneracy 2)")
    defaults = {"gamma0": 3.16, "gamma1": 0.381, "gamma3": 0.38, "gamma4": 0.14, "dimer_shift": 0.022,
                "asymmetry": 0.05, "sublattice_asymmetry": 0.0, "lattice_constant": 2.46}
    p = {**defaults, **{k: v for k, v in params.items() if k in defaults}}
    s = np.sqrt(3.0) * p["lattice_constant"] / 2
    v0, v3, v4 = s * p["gamma0"], s * p["gamma3"], s * p["gamma4"]
    u, dp, dl, g1 = p["asymmetry"], p["dimer_shift"], p["sublattice_asymmetry"], p["gamma1"]
    diag = ((-u + dl) / 2, (-u + 2 * dp - dl) / 2, (u + 2 * dp + dl) / 2, (u - dl) / 2)
    kt, mu = KB * cond["temperature"], cond["mu"]

    def energies(kx, ky):
        pi = (kx + 1j * ky).ravel()
        pc = np.conj(pi)
        h = np.zeros((pi.size, 4, 4), complex)
        for i in range(4):
            h[:, i, i] = diag[i]
        h[:, 0, 1], h[:, 0, 2], h[:, 0, 3] = v0 * pc, -v4 * pc, v3 * pi
        h[:, 1, 2], h[:, 1, 3], h[:, 2, 3] = g1, -v4 * pc, v0 * pc
        h = h + np.conj(np.transpose(np.triu(h, 1), (0, 2, 1)))
        return np.linalg.eigvalsh(h)

    # the box must hold every state within 40 k_BT of μ (the occupations' tails beyond are e^{−40})
    t = np.linspace(-half_width, half_width, 4 * n)
    edge = np.concatenate([np.stack([t, np.full_like(t, c)], 1) for c in (-half_width, half_width)]
                          + [np.stack([np.full_like(t, c), t], 1) for c in (-half_width, half_width)])
    gap = float(np.min(np.abs(energies(edge[:, 0], edge[:, 1]) - mu)))
    if gap < 40.0 * kt:
        raise ValueError(f"bilayer_box_grid: a band comes within {gap / kt:.1f} k_BT of μ on the box's edge; "
                         "raise half_width")
    x = ((np.arange(n) + 0.5) / n * 2.0 - 1.0) * half_width
    dens = dos = 0.0
    for row in range(0, n, 64):
        kx, ky = np.meshgrid(x[row:row + 64], x, indexing="ij")
        z = (energies(kx, ky) - mu) / kt
        f0 = 0.5 * (1.0 - np.tanh(0.5 * z))
        dens += np.sum(f0[:, 2:]) - np.sum(1.0 - f0[:, :2])
        dos += np.sum(0.25 / np.cosh(0.5 * np.clip(z, -700.0, 700.0)) ** 2) / kt
    per_point = 2.0 * (2.0 * half_width / n) ** 2 / (2 * np.pi) ** 2 * 1e20     # spin × d²k/(2π)², m⁻²
    return dens * per_point, dos * per_point / C.e


def bilayer_box_grid_density(params, cond):
    """Density relative to neutrality (m⁻²) of one valley of bilayer graphene from
    :func:`bilayer_box_grid`."""
    return bilayer_box_grid(params, cond)[0]


def minus_e2_over_h(params, cond):
    return -C.e ** 2 / C.h


def sommerfeld_lorenz(params, cond):
    """Lorenz number of a 2D parabolic band with constant τ, whose transport function Σ(ε) ∝ ε is
    linear: the Sommerfeld moments are then exact, ∫(ε−μ)^α ε(−f0') = μ, (π²/3)(k_BT)², μ(π²/3)(k_BT)²
    for α = 0, 1, 2, giving L = L0 [1 − (π²/3)(k_BT/μ)²] with L0 = π²k_B²/(3e²) (Wiedemann–Franz,
    Ashcroft & Mermin 1976), up to terms of order e^{−μ/k_BT}."""
    x = KB * cond["temperature"] / cond["mu"]
    return np.pi ** 2 / 3 * (C.k / C.e) ** 2 * (1 - np.pi ** 2 / 3 * x * x)


def parabolic_fermi_energy(params):
    """E_F (eV) of a spin-degenerate 2D band with n = 1e12 cm⁻²: n = m E_F/(πħ²)."""
    n = 1e16
    m = params["effective_mass"] * C.m_e
    return np.pi * C.hbar ** 2 * n / m / C.e


def honeycomb_dipole_contour(params, cond):
    """Berry-curvature dipole D_x (m, SI, degeneracy applied) of the strained gapped honeycomb
    model from the independent contour-following quadrature of ``fermi_contour.py`` (plain
    numpy/scipy; polar Gauss panels across the thermal window of each K/K′ pocket, trapezoid in
    angle).  Pocket centres: the conduction-band minima found from ±(b1 − b2)/3."""


    model = build("honeycomb", **params)
    ev = BandEvaluator(model)
    b = np.asarray(model.reciprocal_vectors())
    k = (b[0] - b[1]) / 3.0
    centres = np.array([band_extremum(model, s * k, 1, "min", ev) for s in (1, -1)])
    r = dipole_reference(model, cond["mu"], cond["temperature"], centres, 0.15, n_theta=128, evaluator=ev)
    return r["dipole"][0] * model.degeneracy * 1e-10


def tmd_lattice_uniform_dos(params, cond):
    """Density of states (J⁻¹ m⁻², SI, degeneracy applied) of the three-orbital TMD lattice model
    from the plain numpy uniform offset grid of ``fermi_contour.py`` (n = 900 per reciprocal
    vector: converged to 1e-12 at 100 K, checked against n = 1200)."""


    model = build("tmd-lattice", **params)
    u = uniform_grid_reference(model, cond["mu"], cond["temperature"], 900)
    return u["dos"] * model.degeneracy / sc.e * 1e20
