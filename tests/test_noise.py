"""Noise floor, lock-in bandwidth, heating and pickup estimates of crosswind.solver.engine.noise.

Sources: Johnson–Nyquist density sqrt(4 k_B T R) (Nyquist, Phys. Rev. 32, 110 (1928)); the
equivalent noise bandwidth of n cascaded RC stages (standard result, checked here against a
numerical integral of |H(f)|²); the temperature of a uniformly heated disk on a half-space
(derived from the point-source solution ΔT = P/(2πκr), checked here by direct integration);
the misalignment pickup (δ/L) V_xx^2ω (derived in docs/theory.md §15, checked on a uniform field).
"""
import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import constants
from scipy.integrate import quad

from crosswind.solver.engine import noise


@pytest.mark.parametrize("slope, factor", [(6, 1 / 4), (12, 1 / 8), (18, 3 / 32), (24, 5 / 64)])
def test_the_lockin_bandwidth_is_the_integral_of_the_filter_power_response(slope, factor):
    tau = 0.3
    n = slope // 6
    integral, _ = quad(lambda f: (1.0 + (2 * math.pi * f * tau) ** 2) ** (-n), 0.0, np.inf, epsabs=0, epsrel=1e-12)
    assert float(noise.enbw(tau, slope)) == pytest.approx(integral, rel=1e-9)
    assert noise.enbw_factor(slope) == pytest.approx(factor, rel=1e-14)
    with pytest.raises(ValueError, match="filter slope must be one of"):
        noise.enbw(tau, 30)


def test_johnson_noise_of_a_kilohm_at_room_temperature():
    # sqrt(4 k_B T R) = 4.0704 nV/sqrt(Hz) for 1 kΩ at 300 K (Nyquist 1928; k_B exact in SI)
    v = float(noise.johnson_density(1e3, 300.0))
    assert v == pytest.approx(math.sqrt(4 * constants.k * 300.0 * 1e3), rel=1e-14)
    assert v == pytest.approx(4.0704e-9, rel=1e-4)
    # with the amplifier in quadrature, and differentiable at T = 0
    total = noise.noise_density(1e3, 300.0, 4e-9)
    assert float(total) == pytest.approx(math.hypot(v, 4e-9), rel=1e-14)
    g = jax.grad(lambda t: noise.noise_density(1e3, t, 4e-9))(0.0)
    assert np.isfinite(float(g))


def test_probe_resistances_come_from_the_inverted_sheet_tensor():
    sxx, sxy = 2e-3, 5e-4
    sigma = jnp.array([[sxx, sxy], [-sxy, sxx]])
    W, L, w = 5e-6, 10e-6, 1e-6
    r_xx, r_y = noise.probe_resistances(sigma, W, L, w)
    rho = sxx / (sxx ** 2 + sxy ** 2)
    assert float(r_xx) == pytest.approx(rho * L / W, rel=1e-13)
    assert float(r_y) == pytest.approx(rho * W / w, rel=1e-13)


def test_averaging_time_and_snr_are_consistent():
    v_rms, density = 2e-9, 5e-9
    t10 = float(noise.averaging_time(v_rms, density))
    assert float(noise.snr_after(v_rms, density, t10)) == pytest.approx(10.0, rel=1e-12)
    # boxcar averaging over t has bandwidth 1/(2t): equal to a lock-in reading of the same bandwidth
    bw = float(noise.enbw(1.0, 24))
    assert float(noise.snr_after(v_rms, density, 1 / (2 * bw))) == pytest.approx(v_rms / (density * math.sqrt(bw)))
    # SNR ∝ sqrt(t)
    assert float(noise.snr_after(v_rms, density, 4 * t10)) == pytest.approx(20.0, rel=1e-12)
    assert [int(noise.verdict(s, lim)) for s, lim in ((12.0, 1e3), (3.0, 50.0), (0.01, 0.5))] == [2, 1, 0]


def test_uniformly_heated_disk_on_a_half_space_has_mean_rise_8_over_3pi_of_the_centre():
    # ΔT(r) = q/(2πκ) ∫ dφ sqrt(a² − r² sin²φ) from the point source P/(2πκ|r − r'|), averaged over the disk
    q, a, k = 1.0, 1.0, 1.0
    rise = lambda r: q / (2 * math.pi * k) * quad(lambda p: math.sqrt(a * a - (r * math.sin(p)) ** 2), 0, 2 * math.pi,
                                                  epsrel=1e-12)[0]
    mean = 2 / a ** 2 * quad(lambda r: rise(r) * r, 0, a, epsrel=1e-11)[0]
    assert rise(0.0) == pytest.approx(q * a / k, rel=1e-12)
    assert mean == pytest.approx(8 / (3 * math.pi) * q * a / k, rel=1e-9)
    # the module's substrate term for a thick substrate: p/κ · 8 sqrt(πA)/(3π²) = 8P/(3π²κa), a = sqrt(A/π)
    p, W, L = 1e4, 5e-6, 10e-6
    A = W * L
    got = float(noise.temperature_rise(p, W, L, 1e-12, 1e30, 1.0, 150.0))
    assert got == pytest.approx(8 * p * A / (3 * math.pi ** 2 * 150.0 * math.sqrt(A / math.pi)), rel=1e-12)


def test_temperature_rise_limits():
    p = 2e3
    # a thin substrate conducts as a one-dimensional slab; the dielectric adds p d/κ
    got = float(noise.temperature_rise(p, 1e-3, 1e-3, 285e-9, 1.4, 1e-6, 150.0))
    assert got == pytest.approx(p * 285e-9 / 1.4 + p * 1e-6 / 150.0, rel=1e-12)
    # linear in the power density
    two = float(noise.temperature_rise(2 * p, 1e-3, 1e-3, 285e-9, 1.4, 1e-6, 150.0))
    assert two == pytest.approx(2 * got, rel=1e-13)


def test_misalignment_pickup_is_the_longitudinal_field_over_the_offset():
    # uniform 2ω field E: potential φ = −E·r; probes at (x0, 0) and (x0 + δ, W) read W E_y + δ E_x
    Ex, Ey, W, L, d = 3.0 - 1.0j, 0.5 + 0.2j, 5e-6, 10e-6, 0.02 * 5e-6
    phi = lambda x, y: -(Ex * x + Ey * y)
    reading = phi(1e-6, 0.0) - phi(1e-6 + d, W)
    pick = complex(noise.misalignment_pickup(L * Ex, d, L))
    assert pick == pytest.approx(reading - W * Ey, rel=1e-12)


def test_assess_returns_the_verdict_and_artefacts_and_is_differentiable():
    sigma = jnp.array([[2e-3, 0.0], [0.0, 2e-3]], dtype=jnp.complex128)
    settings = noise.NoiseSettings(probe_width_um=1.0)
    common = dict(width_m=5e-6, length_m=10e-6, dielectric_m=285e-9, settings=settings)
    seebeck = jnp.array([[1e-6, 0.0], [0.0, 1e-6]])
    m = noise.assess(sigma, 50e-9 + 0j, 1e-6 + 0j, 1e3, 10.0, seebeck_bar=seebeck, **common)
    r_y = 500.0 * 5.0
    T = 10.0 + float(m.temperature_rise)
    n_y = math.sqrt(4 * constants.k * T * r_y + 16e-18)
    assert float(m.resistance_y) == pytest.approx(r_y, rel=1e-12)
    assert float(m.noise_density_y) == pytest.approx(n_y, rel=1e-12)
    snr = 50e-9 / math.sqrt(2) / (n_y * math.sqrt(5 / 64))
    assert float(m.snr_v2w_y) == pytest.approx(snr, rel=1e-12) and int(m.measurability) == 2
    assert float(m.pickup_v2w_y) == pytest.approx(0.02 * 5e-6 / 10e-6 * 1e-6, rel=1e-12)
    assert float(m.signal_to_pickup) == pytest.approx(50e-9 / float(m.pickup_v2w_y), rel=1e-12)
    assert float(m.thermoelectric_v2w_y) == pytest.approx(1e-6 * 0.02 * float(m.temperature_rise), rel=1e-12)
    assert int(m.heating_flag) == 0
    hot = noise.assess(sigma, 50e-9 + 0j, 1e-6 + 0j, 1e7, 10.0, **common)
    assert int(hot.heating_flag) == 1 and np.isnan(float(hot.thermoelectric_v2w_y))
    grad = jax.grad(lambda w: noise.assess(sigma, 50e-9 + 0j, 1e-6 + 0j, 1e3, 10.0, width_m=w, length_m=10e-6,
                                           dielectric_m=285e-9, settings=settings).snr_v2w_y)(5e-6)
    assert np.isfinite(float(grad)) and float(grad) < 0       # a wider bar: more Johnson noise at fixed signal
    with pytest.raises(ValueError, match="filter_slope_dB_oct must be one of"):
        noise.NoiseSettings(filter_slope_dB_oct=9)
