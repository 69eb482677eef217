"""3D continuum (k·p) Weyl models and the shared shell engine (solver/engine/shells.py;
docs/theory.md §16): the anomalous Hall conductivity of a node pair, the topological trace of the
Berry-curvature dipole, independent scipy quadratures of a single node, and the lattice ``weyl``
model near its nodes.  Each check names its source."""
from dataclasses import replace

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import integrate

from crosswind.models import band_geometry, build
from crosswind.models.builtin import weyl
from crosswind.models.domain import Continuum
from crosswind.models.twoband import bind_length, hamiltonian_of
from crosswind.models.units import ANGSTROM, E2_OVER_H, E_CHARGE, HBAR_EVS, KB_EVK
from crosswind.solver import response
from crosswind.solver.cli import main
from crosswind.solver.engine import device, shells
from crosswind.solver.study.chain import evaluate
from crosswind.solver.study.knobs import base_values
from crosswind.solver.study.scenario import ScenarioError, parse_scenario
from crosswind.solver.study.sweep import open_results

HV = HBAR_EVS / ANGSTROM                     # ħ·(1 m/s) in eV Å
TAU = 100.0                                  # fs
ANISO = dict(velocity_x=2e5, velocity_y=3e5, velocity_z=4.5e5)
TILT = dict(tilt_x=6e4, tilt_y=-4e4, tilt_z=9e4)        # type I: |t·n| < |V n| in every direction


def _fermi(e, mu, kt):
    return 0.5 * (1.0 - np.tanh((e - mu) / (2.0 * kt)))


# ---------------------------------------------------------------------------------------------
# (a) anomalous Hall conductivity of a separated pair

PAIR_MUS, PAIR_TEMPS = np.array([0.0, 0.01, 0.03]), np.array([1.0, 20.0, 20.0])


@pytest.fixture(scope="module")
def pair():
    """The regularised pair (k0 = 0.1/Å) at (PAIR_MUS, PAIR_TEMPS), resolution 1: untilted,
    untilted anisotropic with another regulariser b, and tilted along the separation."""
    m = build("weyl-pair-kp", node_k0=0.1)
    first = response(m, PAIR_MUS, PAIR_TEMPS, TAU, resolution=1)
    plan = first.resolution.plan
    return [first] + [response(m.with_params(**p), PAIR_MUS, PAIR_TEMPS, TAU, resolution=1, plan=plan)
                      for p in (dict(curvature=25.0, **ANISO), dict(tilt_x=1e5, **dict(ANISO, velocity_x=3e5)))]


def _hall(m, **params):
    r = response(m.with_params(**params), 0.0, 1.0, TAU, resolution=1)
    return np.asarray(r.sigma_anomalous.real), float(r.error.sigma_anomalous[1, 2])


def _bb(k0):
    return E2_OVER_H * 2 * k0 / ANGSTROM / (2 * np.pi)


def test_pair_hall_conductivity_is_e2_over_h_times_2k0_over_2pi(pair):
    # Burkov & Balents, PRL 107, 127205 (2011): a Weyl pair separated by 2k0 has
    # |σ_yz| = (e²/h)(2k0/2π) with the Fermi level at the nodes; in the regularised continuum pair
    # every plane |k_x| < k0 carries Chern number −χ (docs/theory.md §16.1, derived), so
    # σ_yz = −(e²/h)∫dk_x/(2π) C = +χ (e²/h)(2k0/2π) exactly from the Fermi sea.  It is
    # topological: the velocities and the regulariser b do not enter.
    for r in pair[:2]:
        sa, err = np.asarray(r.sigma_anomalous.real[0]), float(r.error.sigma_anomalous[0, 1, 2])
        # T = 1 K: the plane Chern numbers hold at T = 0; thermal corrections are O((k_BT/ħvk0)²)
        assert sa[1, 2] == pytest.approx(_bb(0.1), rel=2e-5)
        assert err < 1e-3 * _bb(0.1)
        assert abs(sa[0, 1]) < 1e-9 * _bb(0.1) and abs(sa[0, 2]) < 1e-9 * _bb(0.1)   # Ω_y, Ω_z odd
        assert sa[2, 1] == -sa[1, 2]


@pytest.mark.slow
def test_pair_hall_conductivity_reverses_with_chirality_and_scales_with_the_separation():
    # Burkov & Balents 2011: σ_yz ∝ 2k0, sign ∝ χ (docs/theory.md §16.1)
    for k0, chi in ((0.05, 1), (0.1, -1)):
        sa, err = _hall(build("weyl-pair-kp", node_k0=k0, chirality=chi))
        assert sa[1, 2] == pytest.approx(chi * _bb(k0), rel=1e-4), (k0, chi)
        assert err < 1e-3 * _bb(k0)


# ---------------------------------------------------------------------------------------------
# (b) the trace of the dipole is topological

# one node: every condition in one call per parameter set (one compiled program for the module)
MUS = np.array([0.03, -0.02, 0.005, 0.0, 0.03, 0.02, 0.05, -0.03, 0.0])
TEMPS = np.array([5.0, 40.0, 300.0, 30.0, 150.0, 60.0, 10.0, 100.0, 50.0])
ISO = dict(velocity_x=3e5, velocity_y=3e5, velocity_z=3e5)


@pytest.fixture(scope="module")
def node():
    """(tilted anisotropic node, isotropic untilted node) at every (MUS, TEMPS), resolution 1."""
    m = build("weyl-kp", nodes=1, cutoff=0.5)
    tilted = response(m.with_params(**ANISO, **TILT), MUS, TEMPS, TAU, resolution=1, estimate_error=False)
    iso = response(m.with_params(**ISO), MUS, TEMPS, TAU, resolution=1, estimate_error=False,
                   plan=tilted.resolution.plan)
    return tilted, iso


def _trace(r):
    return np.trace(np.asarray(r.dipole), axis1=-2, axis2=-1)


def test_trace_of_the_dipole_of_one_type_one_node_is_minus_chi_over_4pi2(node):
    # de Juan, Grushin, Morimoto, Moore, Nat. Commun. 8, 15995 (2017): the trace is the Berry
    # flux through the Fermi surface, 2π × its Chern number; with Ω = ∇×i⟨u|∇u⟩ and
    # χ = sign det(∂d_a/∂q_b) the flux is −2πχ for either band, so Tr D = Σ∫[dk] F ∂ε·Ω = −χ/(4π²)
    # at every μ, T, tilt and anisotropy of a type-I node (docs/theory.md §16.2, derived)
    for r in node:
        assert _trace(r) * 4 * np.pi ** 2 == pytest.approx(np.full(MUS.size, -1.0), abs=1e-6)
    # the individual components are not quantised: a tilted anisotropic node has D_xx ≠ D_yy
    d = np.asarray(node[0].dipole[0])
    assert abs(d[0, 0] - d[1, 1]) > 1e-3 / (4 * np.pi ** 2)


@pytest.mark.slow
def test_trace_reverses_with_chirality():
    # docs/theory.md §16.2: Tr D = −χ/(4π²); χ = −1 at automatic resolution.  The intrinsic χ
    # part is off: the connection polarizability G ~ 1/q³ makes it diverge logarithmically when the
    # thermal window reaches the node (μ = 0 at 30 K here), so it never converges (§16.2)
    m = build("weyl-kp", nodes=1, chirality=-1, cutoff=0.5, **ANISO, **TILT)
    r = response(m, MUS[:4], TEMPS[:4], TAU, rtol=1e-5, intrinsic=False)
    assert r.resolution.converged, r.resolution.unconverged_fields
    assert _trace(r) * 4 * np.pi ** 2 == pytest.approx(np.ones(4), abs=1e-6)


def test_trace_of_the_pair_vanishes_while_its_diagonal_components_do_not(pair):
    # Nielsen–Ninomiya pairs: the Fermi-surface Chern numbers of a pair cancel, so Tr D = 0
    # (docs/theory.md §16.2); a tilt along the separation leaves D_xx = −(D_yy + D_zz) ≠ 0
    # (the nodes sit at E_0 ± ħt_x k0 and the bands are not linear; the 3D dipole tensor:
    # Sodemann & Fu, PRL 115, 216806, 2015)
    for r in pair:
        assert np.all(np.abs(_trace(r)) < 1e-6 / (4 * np.pi ** 2))
    d, err = np.asarray(pair[2].dipole), np.asarray(pair[2].error.dipole)
    assert np.all(np.abs(d[1:, 0, 0]) > 1e-3 / (4 * np.pi ** 2)), d[:, 0, 0]
    assert np.all(err[1:, 0, 0] < 1e-2 * np.abs(d[1:, 0, 0]))


# ---------------------------------------------------------------------------------------------
# independent references: scipy quadratures of one node

@pytest.mark.slow
def test_type_two_node_with_a_sharp_cutoff_is_reported_unconverged():
    # docs/theory.md §16.3 (limitation): an overtilted node (|t_z| > v; Soluyanov et al., Nature 527,
    # 495, 2015) has open pockets that end on the cutoff sphere; where the radial slope of a band
    # changes sign the occupied volume jumps from direction to direction, the product rule converges
    # slowly, and response must say so instead of returning a converged number.  The trace of D is
    # not quantised: about −0.65/(4π²) here, against −1/(4π²) for any type-I node.
    m = build("weyl-kp", nodes=1, cutoff=0.2, velocity_x=3e5, velocity_y=3e5, velocity_z=3e5, tilt_z=4.5e5)
    r = response(m, 0.02, 20.0, TAU, rtol=1e-3, max_level=1)
    assert r.resolution.converged is False and "density" in r.resolution.unconverged_fields
    assert float(r.error.density) > 0.1 * abs(float(r.density))
    assert abs(float(_trace(r)) * 4 * np.pi ** 2 + 1.0) > 0.2


def _node_dipole_reference(v, t, chi, mu, kt, cutoff):
    """D_bc = Σ_± ∫d³q/(2π)³ F ∂_bε Ω_c of H = ħt·q + χħ(v_x q_xσ_x + v_y q_yσ_y + v_z q_zσ_z),
    |q| < Λ, by scipy.integrate.dblquad over directions: on each ray ε_± = ±r s_±(n) with
    s_± = |An| ± ħt·n, ∂ε_± = ħt ± A²n/|An| and Ω_± = ∓χħ³v_xv_yv_z n/(2r²|An|³) (the two-band
    forms of docs/theory.md §2.1 with A = ħ diag(v)), so the radial integral is
    (1/s_±)∫F dε = [f0(0) − f0(±Λ s_±)]/s_± in closed form; directions by nested
    scipy.integrate.quad_vec (all nine components at once)."""
    a = np.asarray(v) * HV
    ht = np.asarray(t) * HV
    det = np.prod(a)

    def integrand(phi, ct):
        st = np.sqrt(1.0 - ct * ct)
        n = np.array([st * np.cos(phi), st * np.sin(phi), ct])
        an = np.linalg.norm(a * n)
        om = -chi * det * n / (2.0 * an ** 3)                  # r² Ω_+
        total = np.zeros((3, 3))
        for sign in (1.0, -1.0):
            s = an + sign * (ht @ n)
            g = ht + sign * a * a * n / an
            occ = (_fermi(0.0, mu, kt) - _fermi(sign * cutoff * s, mu, kt)) * sign
            total += np.outer(g, sign * om) * occ / s
        return total

    inner = lambda ct: integrate.quad_vec(integrand, 0.0, 2 * np.pi, args=(ct,), epsabs=1e-13, epsrel=1e-11)[0]
    out = integrate.quad_vec(inner, -1.0, 1.0, epsabs=1e-13, epsrel=1e-11)[0]
    return out / (2 * np.pi) ** 3


def test_tilted_anisotropic_node_dipole_matches_a_scipy_quadrature(node):
    # independent reference: the closed radial integral of a linear node (derived, docstring of
    # _node_dipole_reference) integrated over directions by scipy.integrate.dblquad
    v, t = [ANISO[f"velocity_{a}"] for a in "xyz"], [TILT[f"tilt_{a}"] for a in "xyz"]
    for i in (5, 1):
        ref = _node_dipole_reference(v, t, 1, MUS[i], KB_EVK * TEMPS[i], 0.5)
        d = np.asarray(node[0].dipole[i])
        # resolution 1 (10 × 20 directions); resolution 2 agrees to 1e-8 (docs/performance.md)
        assert np.abs(d - ref).max() < 1e-5 * np.abs(ref).max(), (i, d, ref)


def _isotropic_reference(v, mu, kt, cutoff):
    """Density (1/Å³), DOS (1/(eV Å³)) and ∫F v_x² g(ε)… of one isotropic untilted node with cutoff,
    by scipy.integrate.quad of g(ε) = ε²/(2π²(ħv)³) (|ε| < ħvΛ; closed form from memory: the
    shell 4πq²dq/(2π)³ with ε = ħvq)."""
    hv = v * HV
    g = lambda e: e * e / (2 * np.pi ** 2 * hv ** 3)
    # −∂f/∂ε = sech²(x/2)/(4k_BT) = e^{−|x|}/(k_BT (1 + e^{−|x|})²): no cosh overflow in the tails
    F = lambda e: np.exp(-abs(e - mu) / kt) / (kt * (1 + np.exp(-abs(e - mu) / kt)) ** 2)
    top = hv * cutoff
    pts = [mu - 40 * kt, mu, mu + 40 * kt]
    pts = [p for p in pts if -top < p < top]
    up = integrate.quad(lambda e: g(e) * _fermi(e, mu, kt), 0.0, top, points=[p for p in pts if p > 0],
                        epsabs=0, epsrel=1e-12, limit=200)[0]
    down = integrate.quad(lambda e: g(e) * (1 - _fermi(e, mu, kt)), -top, 0.0, points=[p for p in pts if p < 0],
                          epsabs=0, epsrel=1e-12, limit=200)[0]
    dos = integrate.quad(lambda e: g(e) * F(e), -top, top, points=pts, epsabs=0, epsrel=1e-12, limit=200)[0]
    return up - down, dos, up + down


def test_isotropic_node_density_dos_and_drude_match_scipy(node):
    # n = μ³/(6π²(ħv)³) per node at T = 0 (closed form from memory: the Fermi ball
    # (4π/3)k_F³/(2π)³), checked here at T > 0 against scipy.integrate.quad of the DOS
    # g(ε) = ε²/(2π²(ħv)³); Drude σ_xx = e²τ v² g(μ)/3 (isotropic: ⟨v_x²⟩ = v²/3; common practice)
    v, r = 3e5, node[1]
    for i in (6, 7, 8):
        mu, T = MUS[i], TEMPS[i]
        n_ref, dos_ref, carriers = _isotropic_reference(v, mu, KB_EVK * T, 0.5)
        assert float(r.density[i]) == pytest.approx(n_ref / ANGSTROM ** 3, rel=1e-6, abs=1e-6 * carriers / ANGSTROM ** 3)
        assert float(r.dos[i]) == pytest.approx(dos_ref / (E_CHARGE * ANGSTROM ** 3), rel=1e-6)
        sxx = E_CHARGE ** 2 * TAU * 1e-15 * v ** 2 / 3 * dos_ref / (E_CHARGE * ANGSTROM ** 3)
        assert float(r.sigma.real[i, 0, 0]) == pytest.approx(sxx, rel=1e-6)
        assert float(r.sigma.real[i, 0, 1]) == pytest.approx(0.0, abs=1e-9 * sxx)
    # Sommerfeld (common practice): n(T) = n(0)[1 + π²(k_BT/μ)²] for the ε² DOS
    mu, kt = MUS[6], KB_EVK * TEMPS[6]
    n0 = (mu / (v * HV)) ** 3 / (6 * np.pi ** 2) / ANGSTROM ** 3
    assert float(r.density[6]) == pytest.approx(n0 * (1 + np.pi ** 2 * (kt / mu) ** 2), rel=1e-6)


@pytest.mark.slow
def test_automatic_resolution_converges_and_reports_the_shell_engine():
    # response(..., resolution=None) raises the level until rtol (docs/theory.md §16.3); the error
    # estimate bounds the true error of the density (closed form above, T → 0 extrapolated)
    m = build("weyl-kp", nodes=1, cutoff=0.5)
    r = response(m, 0.05, 0.0, TAU, rtol=1e-4)
    info = r.resolution
    assert info.engine == "shells" and info.converged and isinstance(info.plan[0], shells.ShellPlan)
    exact = (0.05 / (3e5 * HV)) ** 3 / (6 * np.pi ** 2) / ANGSTROM ** 3
    assert abs(float(r.density) - exact) <= max(float(r.error.density), 1e-4 * exact)
    assert abs(float(r.density) - exact) < 1e-4 * exact


def test_fermi_sea_dipole_route_is_refused_in_3d():
    # docs/theory.md §16.2: ∫f0 ∂_bΩ_c misses the monopole δ-function at each node
    with pytest.raises(ValueError, match="monopole"):
        response(build("weyl-kp", nodes=1), 0.05, 10.0, TAU, resolution=0, dipole_route="both")


def test_cell_radius_is_the_voronoi_face_and_the_cutoff():
    # geometry of the cells (docs/theory.md §16.3): from (k0,0,0) towards −x the face is the plane
    # k_x = 0 at distance k0/|cos θ|; towards +x the cell is open (∞) unless a cutoff caps it
    centers = ((0.1, 0.0, 0.0), (-0.1, 0.0, 0.0))
    dirs = jnp.asarray([[-1.0, 0.0, 0.0], [-0.6, 0.8, 0.0], [1.0, 0.0, 0.0], [0.0, 0.0, 1.0]])
    R = np.asarray(shells.cell_radius(centers, 0, dirs, np.inf))
    assert R[:2] == pytest.approx([0.1, 0.1 / 0.6], rel=1e-14)
    assert np.all(np.isinf(R[2:]))
    assert np.asarray(shells.cell_radius(centers, 0, dirs, 0.12)) == pytest.approx([0.1, 0.12, 0.12, 0.12])


def test_direction_rule_integrates_the_sphere():
    # product Gauss–Legendre × trapezoid rule (common practice): Σw = 4π, Σw n_a n_b = 4π/3 δ_ab
    m = build("weyl-pair-kp")
    d, w = shells.directions(m, 4, 8)
    assert float(jnp.sum(w)) == pytest.approx(4 * np.pi, rel=1e-14)
    second = np.einsum("n,na,nb->ab", np.asarray(w), np.asarray(d), np.asarray(d))
    assert second == pytest.approx(4 * np.pi / 3 * np.eye(3), abs=1e-13)


# ---------------------------------------------------------------------------------------------
# (c) the lattice model near its nodes

LATTICE = dict(hopping=1.0, mass=1.0, node_position=0.4, tilt=0.02, lattice_constant=3.0)


def _lattice_near_node(cutoff):
    """The catalogue ``weyl`` lattice Hamiltonian (its own d-vector) integrated over the ball
    |k − K_+| < Λ around its node K_+ = (k0, 0, 0) by the shell engine."""
    lat = build("weyl", **LATTICE)
    a = LATTICE["lattice_constant"]
    k0 = LATTICE["node_position"] * np.pi / a
    dv = bind_length(weyl.dvector, a)
    return replace(lat, hamiltonian=hamiltonian_of(dv), dvector=dv,
                   domain=Continuum(dim=3, centers=((k0, 0.0, 0.0),), scale=cutoff / 8),
                   static=((shells.CUTOFF_KEY, cutoff),))


def _linearised_node():
    """``weyl-kp`` with the node of the lattice model at K_+ linearised (docs/theory.md §16.4):
    v_x = ta sin k0a/ħ, v_y = v_z = ta/ħ, tilt w a cos k0a/ħ along x, energy w sin k0a, χ = +1."""
    t, w, a = LATTICE["hopping"], LATTICE["tilt"], LATTICE["lattice_constant"]
    k0a = LATTICE["node_position"] * np.pi
    return build("weyl-kp", nodes=1, cutoff=0.3, velocity_x=t * a * np.sin(k0a) / HV,
                 velocity_y=t * a / HV, velocity_z=t * a / HV, tilt_x=w * a * np.cos(k0a) / HV,
                 node_energy=w * np.sin(k0a))


def test_linearised_node_agrees_with_the_lattice_model_at_low_filling():
    # common practice (k·p expansion): near its node the lattice ``weyl`` model is the linear node
    # of _linearised_node; density, Drude σ and the dipole agree, the more closely the lower the
    # filling: the corrections are at least linear in k_F a (the tilt term w sin k_xa and the
    # curvature of d_x are not symmetric about the node; docs/theory.md §16.4)
    lat, kp = _lattice_near_node(0.3), _linearised_node()
    e_node = LATTICE["tilt"] * np.sin(LATTICE["node_position"] * np.pi)
    mus = e_node + np.array([0.04, 0.02, 0.01])
    rl = response(lat, mus, 10.0, TAU, resolution=1, estimate_error=False)
    rk = response(kp, mus, 10.0, TAU, resolution=1, estimate_error=False)
    dev = {}
    for name in ("density", "sigma_drude", "dipole"):
        a, b = np.asarray(getattr(rl, name)).real, np.asarray(getattr(rk, name)).real
        a, b = a.reshape(3, -1), b.reshape(3, -1)
        dev[name] = np.abs(a - b).max(axis=1) / np.abs(b).max(axis=1)
    assert dev["density"][-1] < 1e-3 and dev["sigma_drude"][-1] < 1e-3 and dev["dipole"][-1] < 1e-3, dev
    for name in dev:
        assert np.all(dev[name][1:] * 1.7 < dev[name][:-1]), (name, dev[name])
    # the trace stays quantised on the lattice node too (closed Fermi surface around one node)
    tr = np.trace(np.asarray(rl.dipole), axis1=-2, axis2=-1)
    assert tr * 4 * np.pi ** 2 == pytest.approx(np.full(3, -1.0), abs=1e-5)


def test_lattice_node_chirality_and_velocities_match_the_linearisation():
    # the Berry curvature of the lattice model near K_+ is the monopole of the linearised node
    # (Ω_+ = −χħ³v_xv_yv_z q/(2|Aq|³), docs/theory.md §16.2) to O(qa)
    kp = _linearised_node()
    k0 = LATTICE["node_position"] * np.pi / LATTICE["lattice_constant"]
    q = np.array([[1e-4, 2e-4, -1.5e-4], [-3e-4, 1e-4, 2e-4]])
    gl = band_geometry(build("weyl", **LATTICE), jnp.asarray(q + np.array([k0, 0.0, 0.0])))
    gk = band_geometry(kp, jnp.asarray(q))
    assert np.asarray(gl.berry_curvature) == pytest.approx(np.asarray(gk.berry_curvature), rel=2e-3)
    assert np.asarray(gl.energy_gradient) == pytest.approx(np.asarray(gk.energy_gradient), rel=2e-3, abs=1e-4)


# ---------------------------------------------------------------------------------------------
# films of a 3D model (docs/theory.md §16.5)

FILM = """
[material]
model = "weyl-kp"
[material.parameters]
tilt_x = 5e4
energy_split = 0.02
[device]
width_um = 5
length_um = 20
current_uA = 10
thickness_nm = {thickness}
[conditions]
mu_eV = 0.05
temperature_K = 20
tau_fs = 100
"""


def test_film_sheet_is_bulk_times_thickness_in_plane():
    # docs/theory.md §16.5 (an approximation): σ_sheet = σ_bulk d, χ_sheet = χ_bulk d, in-plane
    rng = np.random.default_rng(3)
    sigma = rng.normal(size=(2, 3, 3)) + 1j * rng.normal(size=(2, 3, 3))
    chi = rng.normal(size=(2, 3, 3, 3)).astype(np.complex128)
    s, c, cd = device.film_sheet(sigma, chi, 2 * chi, 40.0)
    assert np.asarray(s) == pytest.approx(sigma[:, :2, :2] * 40e-9, rel=1e-15)
    assert np.asarray(c) == pytest.approx(chi[:, :2, :2, :2] * 40e-9, rel=1e-15)
    bar = device.HallBar(5.0, 20.0, 10.0)
    a = device.hall_bar(sigma + 1e6, chi, chi, device.HallBar(5.0, 20.0, 10.0, thickness_nm=40.0))
    b = device.hall_bar(*device.film_sheet(sigma + 1e6, chi, chi, 40.0), bar)
    assert np.asarray(a.v2w_y) == pytest.approx(np.asarray(b.v2w_y), rel=1e-14)


def test_film_scenario_needs_a_thickness_and_refuses_it_for_2d_models():
    # docs/scenario-files.md: a 3D model is a film of thickness thickness_nm, swept in μ
    scn = parse_scenario(FILM.format(thickness=40))
    assert scn.device.thickness_nm == 40.0
    with pytest.raises(ScenarioError, match="thickness_nm"):
        parse_scenario(FILM.replace("thickness_nm = {thickness}\n", ""))
    with pytest.raises(ScenarioError, match="μ only"):
        parse_scenario(FILM.format(thickness=40).replace("mu_eV = 0.05", "density_cm2 = 1e12"))
    with pytest.raises(ScenarioError, match="2D"):
        parse_scenario(FILM.format(thickness=40).replace('"weyl-kp"', '"massive-dirac"')
                       .replace("tilt_x = 5e4\nenergy_split = 0.02", "tilt = 5e4"))


@pytest.mark.slow
def test_film_chain_reads_bulk_times_thickness():
    # docs/theory.md §16.5: the chain's bar-frame σ of a film is the bulk σ × thickness
    scn = parse_scenario(FILM.format(thickness=40))
    out = evaluate(scn, base_values(scn), resolution=1)
    bulk = np.asarray(out.response.sigma)[..., :2, :2]
    assert np.asarray(out.sigma_bar).reshape(bulk.shape) == pytest.approx(bulk * 40e-9, rel=1e-12)
    assert np.all(np.isfinite(np.asarray(out.V2w)))


@pytest.mark.slow
def test_gradient_through_the_shell_engine_at_a_fixed_plan():
    # n ∝ 1/(v_x v_y v_z) for a linear node (closed form above), so ∂n/∂v_x = −n/v_x; jax.grad at a
    # fixed plan differentiates the integrand at fixed nodes (placement is stop_gradient'ed,
    # docs/theory.md §14.3, §16.3), exact only as the rule converges: 7.6e-5 relative at resolution 0
    m = build("weyl-kp", nodes=1, cutoff=0.5)
    r = response(m, 0.05, 20.0, TAU, resolution=0)
    plan = r.resolution.plan
    grad = jax.grad(lambda v: response(m.with_params(velocity_x=v), 0.05, 20.0, TAU, resolution=0,
                                       plan=plan).density)(3e5)
    assert np.isfinite(float(grad))
    assert float(grad) == pytest.approx(-float(r.density) / 3e5, rel=1e-3)


def test_film_run_writes_the_film_approximation_into_the_summary(tmp_path):
    # issue item: sheet quantities of a 3D film are stated as an approximation in the report
    scn_file = tmp_path / "film.toml"
    scn_file.write_text(FILM.format(thickness=40).replace("mu_eV = 0.05", "mu_eV = [0.04, 0.05]")
                        + "[numerics]\nresolution = 0\n", encoding="utf-8")
    assert main(["run", str(scn_file), "--output", str(tmp_path / "out"), "--no-progress"]) == 0
    text = (tmp_path / "out" / "summary.md").read_text(encoding="utf-8")
    assert "Film of a 3D model" in text and "40 nm" in text and "approximation" in text
    ds = open_results(tmp_path / "out")
    # the dataset holds sheet quantities of the film: bulk × thickness, in-plane components
    assert ds["sigma"].attrs["units"] == "S" and ds.sizes["i"] == 2 and "40 nm" in ds.attrs["film"]
    m = parse_scenario(FILM.format(thickness=40)).build_model(None)
    bulk = response(m, mu=np.array([0.04, 0.05]), temperature=20.0, tau=100.0, resolution=0)
    sheet = ds["sigma"].transpose("mu_eV", "i", "j").values
    assert sheet == pytest.approx(np.asarray(bulk.sigma).real[:, :2, :2] * 40e-9, rel=1e-12)
    assert ds["dipole"].transpose("mu_eV", "i").values == pytest.approx(np.asarray(bulk.dipole)[:, :2, 2] * 40e-9,
                                                                        rel=1e-12)
