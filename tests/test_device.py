"""Hall-bar relations of crosswind.solver.engine.device (docs/theory.md §10, derived there)."""
import numpy as np
import pytest

from crosswind.models import build
from crosswind.solver import response
from crosswind.solver.engine.device import HallBar, hall_bar, lockin_reading, rotate_chi, rotate_sigma

EPS = np.array([[0.0, -1.0], [1.0, 0.0]])   # (ẑ × E)_a = EPS_ab E_b


def bcd_chi(K, D):
    """j = K (D·E) ẑ×E as a symmetrised χ_abc (the 2D dipole form, docs/theory.md §5.5a)."""
    chi = K * np.einsum("ac,b->abc", EPS, np.asarray(D, dtype=float))
    return 0.5 * (chi + np.swapaxes(chi, -1, -2))


SIG = np.array([[4.9e-4, 0.0], [0.0, 5.0e-4]], dtype=complex)
CHI = bcd_chi(3.5e-13, (1.0, 0.0))


@pytest.fixture(scope="module")
def tilted_pair():
    """The §6 tilted Dirac pair at μ = 0.15 eV, τ = 100 fs, low T (check #36 conditions)."""
    m = build("massive-dirac", velocity=5e5, tilt=5e4, mass=0.1, valleys=2)
    return response(m, mu=0.15, temperature=1.0, tau=100.0)


def test_check_36_hall_bar_voltage(tilted_pair):
    # docs/theory.md check #36 (derived §10): W = 5 μm, I0 = 10 μA → 58.9 nV amplitude, 41.6 nV rms
    r = tilted_pair
    out = hall_bar(r.sigma, r.chi, r.chi_dc, HallBar(width_um=5.0, length_um=10.0, current_uA=10.0))
    assert float(out.v2w_y_amplitude) == pytest.approx(58.9e-9, rel=2e-3)
    assert float(out.v2w_y_rms) == pytest.approx(41.6e-9, rel=2e-3)
    # E⊥/E∥² = χ_yxx/σ_yy, check #22
    assert float(out.nonlinear_ratio) == pytest.approx(7.186e-10, rel=2e-3)


def test_second_harmonic_scales_as_current_squared_and_inverse_width():
    # derived in docs/theory.md §10: V_y = −χ_yxx I²/(W σ_xx² σ_yy)
    v = lambda current, W: complex(hall_bar(SIG, CHI, CHI, HallBar(W, 10.0, current)).v2w_y)
    assert v(20.0, 5.0) / v(10.0, 5.0) == pytest.approx(4.0, rel=1e-12)
    assert v(10.0, 10.0) / v(10.0, 5.0) == pytest.approx(0.5, rel=1e-12)
    expected = -CHI[1, 0, 0] * (10e-6) ** 2 / (5e-6 * SIG[0, 0] ** 2 * SIG[1, 1])
    assert v(10.0, 5.0) == pytest.approx(expected, rel=1e-12)


def test_open_circuit_first_order_uses_the_full_inverse():
    # j = σ'E with j = (I/W, 0): the transverse current vanishes even with a Hall σ_xy (§10)
    sig = np.array([[4e-4, 1e-4], [-1e-4, 3e-4]], dtype=complex)
    bar = HallBar(4.0, 8.0, 2.0)
    out = hall_bar(sig, CHI, CHI, bar)
    E = np.array([complex(out.field_x), complex(out.field_y)])
    j = sig @ E
    assert j[0] == pytest.approx(2e-6 / 4e-6, rel=1e-12)
    assert abs(j[1]) < 1e-12 * abs(j[0])
    assert float(out.hall_angle) == pytest.approx(0.25, rel=1e-12)
    # second order: the total 2ω current vanishes in both directions (ideal current source)
    E2 = np.array([complex(out.v2w_x) / 8e-6, complex(out.v2w_y) / 4e-6])
    j2 = sig @ E2 + np.einsum("abc,b,c->a", CHI, E, E)
    assert np.max(np.abs(j2)) < 1e-12 * np.max(np.abs(np.einsum("abc,b,c->a", CHI, E, E)))


def test_rotation_of_a_dipole_response_follows_cos_theta():
    # 2D dipole current j ∝ (D·E) ẑ×E (docs/theory.md §5.5a): χ'_yxx(θ) = χ_yxx(0) cos θ,
    # maximal for a current along D, zero across it
    th = np.linspace(0.0, 360.0, 13)
    chib = np.asarray(rotate_chi(np.broadcast_to(CHI, (13, 2, 2, 2)), th))
    assert np.allclose(chib[:, 1, 0, 0], CHI[1, 0, 0] * np.cos(np.deg2rad(th)), atol=1e-12 * abs(CHI[1, 0, 0]))
    # an odd-rank tensor flips under a 180° rotation; σ is unchanged; rotations compose
    assert np.allclose(np.asarray(rotate_chi(CHI, 180.0)), -CHI, atol=1e-25)
    s = np.array([[3.0, 0.4], [0.1, 2.0]])
    assert np.allclose(np.asarray(rotate_sigma(s, 180.0)), s, atol=1e-14)
    assert np.allclose(np.asarray(rotate_sigma(rotate_sigma(s, 30.0), 45.0)), np.asarray(rotate_sigma(s, 75.0)),
                       atol=1e-14)


def test_device_angle_matches_rotated_tensors():
    sig = np.array([[4e-4, 2e-5], [-2e-5, 3e-4]], dtype=complex)
    chi = bcd_chi(2e-13, (0.6, 0.8))
    bar = HallBar(5.0, 10.0, 10.0)
    a = hall_bar(sig, chi, chi, bar, 37.0)
    b = hall_bar(np.asarray(rotate_sigma(sig, 37.0)), np.asarray(rotate_chi(chi, 37.0)),
                 np.asarray(rotate_chi(chi, 37.0)), bar, 0.0)
    for key in ("v2w_y", "v2w_x", "v_xx", "v_hall", "vdc_y"):
        assert complex(getattr(a, key)) == pytest.approx(complex(getattr(b, key)), rel=1e-12, abs=1e-30)


def test_lockin_conventions_check_35():
    # docs/theory.md check #35: V = K I², I = I0 sin ωt → 2ω amplitude K I0²/2, rms K I0²/(2√2),
    # −90° relative to sin 2ωt.  The cosine-drive 2ω phasor of K I² is +K I0²/2.
    K, I0 = 3.0, 0.5
    amp, rms, ph = lockin_reading(K * I0 ** 2 / 2, harmonic=2)
    assert float(amp) == pytest.approx(K * I0 ** 2 / 2)
    assert float(rms) == pytest.approx(K * I0 ** 2 / (2 * np.sqrt(2)))
    assert float(ph) == pytest.approx(-90.0)
    # a resistor at the first harmonic is in phase with the drive
    assert float(lockin_reading(100.0, harmonic=1)[2]) == pytest.approx(0.0, abs=1e-12)
    # in the bar: a dipole response with χ_yxx < 0 gives V_y = +|K| I² → −90°; χ_yxx > 0 → +90°
    assert float(hall_bar(SIG, -CHI, -CHI, HallBar(5.0, 10.0, 10.0)).v2w_y_phase_deg) == pytest.approx(-90.0)
    assert float(hall_bar(SIG, CHI, CHI, HallBar(5.0, 10.0, 10.0)).v2w_y_phase_deg) == pytest.approx(90.0)


def test_rectified_voltage_matches_second_harmonic_at_low_frequency():
    # §10: with Sodemann–Fu χ and ωτ → 0 the dc part has the same magnitude as the 2ω amplitude
    out = hall_bar(SIG, CHI, CHI, HallBar(5.0, 10.0, 10.0))
    assert abs(float(out.vdc_y)) == pytest.approx(float(out.v2w_y_amplitude), rel=1e-12)


def test_bad_device_input_is_refused():
    with pytest.raises(ValueError, match="width_um must be a positive number"):
        HallBar(width_um=-1.0, length_um=1.0, current_uA=1.0)
    with pytest.raises(ValueError, match="2D sheets only"):
        hall_bar(np.eye(3), np.zeros((3, 3, 3)), np.zeros((3, 3, 3)), HallBar(1.0, 1.0, 1.0))
