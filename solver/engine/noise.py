"""Noise floor, measurability and measurement artefacts of a Hall-bar reading (docs/theory.md §15).

Everything is written with ``jax.numpy`` in SI units (ohm, volt, kelvin, metre, second, hertz) and
is differentiable, so the device design (:mod:`crosswind.solver.study.design`) can take gradients
of a signal-to-noise ratio through the whole chain.  No files, no printing.

Noise at a probe pair.  The open-circuit thermal noise between two terminals of a passive
resistor network is that of the two-terminal resistance R between them with every other terminal
floating (an ideal current source is an open circuit for noise): one-sided density
v_J = sqrt(4 k_B T R) (Nyquist, Phys. Rev. 32, 110 (1928)).  The resistances are estimates from
the sheet resistivity tensor ρ' = σ'⁻¹ in the bar frame (x' along the current):

* longitudinal pair (probes a distance L apart along a bar of width W): R_xx = Re ρ'_xx · L/W;
* transverse pair (probes on opposite edges): the current path runs across the bar, width W, through
  probe arms of width w: R_y ≈ Re ρ'_yy · W/w (common-practice estimate of the crossing and the
  arm ends; it neglects the arms' own length and the contacts, so the noise is a lower bound).

The preamplifier adds its input-referred voltage noise e_A (default 4 nV/√Hz, common practice for
a low-noise voltage preamplifier at lock-in frequencies); the two add in quadrature:
v_n = sqrt(4 k_B T R + e_A²).  T is the channel temperature (bath plus Joule rise, below).

Lock-in bandwidth.  A time constant τ with n cascaded first-order RC stages (slope 6n dB/oct)
has |H(f)|² = [1 + (2πfτ)²]⁻ⁿ and equivalent noise bandwidth
ENBW = ∫₀^∞ |H|² df = Γ(n − ½)/(4√π Γ(n) τ): 1/(4τ), 1/(8τ), 3/(32τ), 5/(64τ) for 6, 12, 18,
24 dB/oct (standard result; tests/test_noise.py checks it against a numerical integral).  The rms
noise on the lock-in output is v_n·sqrt(ENBW) (same rms calibration as the signal), so the
signal-to-noise ratio of the transverse 2ω reading is SNR = V_y,rms^2ω / (v_n sqrt(ENBW)).
Averaging the output for a time t ≫ τ has bandwidth 1/(2t) (boxcar), so SNR(t) = V_rms sqrt(2t)/v_n
(noise ∝ 1/sqrt(t)) and SNR = s is reached after t_s = (s v_n/V_rms)²/2.

Verdict (:data:`VERDICTS`): *measurable* if SNR ≥ 10 at the chosen time constant; *marginal* if
SNR ≥ 1 is reached within the averaging limit (default 1 h); otherwise *not measurable*.  The noise
is white: 1/f noise, contact noise and amplifier current noise only add to it (a lower bound).

Joule heating.  The time-averaged power per area is p = ½ Re(j·E*) (``power_density`` of the
reading).  The heat crosses the gate dielectric (thickness d, conductivity κ_d) and spreads into a
substrate (thickness t_s, conductivity κ_s) whose back face is at the bath temperature:

    ΔT = p d/κ_d + p/κ_s · min(t_s, 8 sqrt(π A)/(3π²)),

the second term being the smaller of the one-dimensional slab p t_s/κ_s and the mean temperature
rise 8P/(3π² κ_s a) of a disk of radius a = sqrt(A/π) heated uniformly with P = pA on a half-space
(derived by integrating the point-source solution ΔT = P/(2πκr) over the disk; the mean over the
disk is 8/(3π) of its centre value q a/κ).  A = W·L is the heated area between the longitudinal
probes.  Both branches overestimate their regime, so the minimum is an estimate, not a bound;
interface (Kapitza) resistances and the electron–phonon bottleneck at low temperature make the
electron temperature rise larger.  The rise is flagged when ΔT > 10 % of the bath temperature.

Artefacts at 2ω (both coherent with the signal, so averaging does not remove them):

* probe misalignment: transverse probes displaced by δ along the bar measure
  φ(x, 0) − φ(x + δ, W) = W E_y + δ E_x, so the longitudinal 2ω field mixes in as
  V_pick^2ω = δ E_x^2ω = (δ/L) V_xx^2ω (derived; δ = fraction × W);
* thermoelectric: the temperature follows p(t) ∝ sin²ωt, whose 2ω part has the amplitude of the
  mean rise ΔT (quasi-static at lock-in frequencies); a fraction a of it across the transverse
  probes gives V_th^2ω ≈ |S'_yy| a ΔT (S the Seebeck tensor; order-of-magnitude estimate, a is an
  assumption about the device's thermal asymmetry).

The ratios signal/artefact compare amplitudes.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from functools import partial
from typing import Any

import jax
import jax.numpy as jnp
from scipy import constants as _c

from crosswind.solver.pytrees import pytree_dataclass

K_B = _c.k
#: the verdicts, by code (the dataset stores the code)
VERDICTS = {2: "measurable", 1: "marginal", 0: "not measurable"}
SNR_TARGET = 10.0          # measurable: SNR ≥ 10 at the chosen time constant
SNR_FLOOR = 1.0            # marginal: SNR ≥ 1 within the averaging limit
HEATING_FRACTION = 0.1     # flag ΔT above 10 % of the bath temperature
SLOPES_DB_OCT = (6, 12, 18, 24)


@dataclass(frozen=True)
class NoiseSettings:
    """Measurement and thermal settings, in the units of their scenario keys ([device] table,
    :data:`crosswind.solver.vocabulary.KNOBS`).  ``probe_width_um`` None: a fifth of the bar width.
    Defaults: 4 nV/√Hz preamplifier, 1 s time constant at 24 dB/oct, 1 h averaging limit, probes
    misaligned by 2 % of W, 2 % thermal asymmetry (an assumption: the same order as the probes'
    geometric asymmetry), 500 μm Si substrate (κ = 150 W/m/K near room
    temperature) under a SiO2 dielectric (κ = 1.4 W/m/K) — common-practice values, to be replaced
    by the device's own; both conductivities fall steeply at cryogenic temperatures."""

    probe_width_um: float | None = None
    probe_misalignment: float = 0.02
    thermal_asymmetry: float = 0.02
    amplifier_noise_nV_rtHz: float = 4.0
    time_constant_ms: float = 1000.0
    filter_slope_dB_oct: int = 24
    averaging_limit_min: float = 60.0
    substrate_um: float = 500.0
    substrate_conductivity_W_mK: float = 150.0
    dielectric_conductivity_W_mK: float = 1.4

    def __post_init__(self):
        if self.filter_slope_dB_oct not in SLOPES_DB_OCT:
            raise ValueError(f"NoiseSettings: filter_slope_dB_oct must be one of {SLOPES_DB_OCT}, "
                             f"got {self.filter_slope_dB_oct!r}")
        for name in ("time_constant_ms", "averaging_limit_min", "substrate_um", "substrate_conductivity_W_mK",
                     "dielectric_conductivity_W_mK"):
            v = getattr(self, name)
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
                raise ValueError(f"NoiseSettings: {name} must be a positive number, got {v!r}")
        for name in ("probe_misalignment", "thermal_asymmetry", "amplifier_noise_nV_rtHz"):
            v = getattr(self, name)
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v >= 0):
                raise ValueError(f"NoiseSettings: {name} must be a number >= 0, got {v!r}")
        if self.probe_width_um is not None and not self.probe_width_um > 0:
            raise ValueError(f"NoiseSettings: probe_width_um must be positive, got {self.probe_width_um!r}")


# ------------------------------------------------------------------------------ pieces --------
def _f(x):
    return jnp.asarray(x, dtype=jnp.float64)


def enbw_factor(slope_db_oct: int) -> float:
    """ENBW·τ of n = slope/6 cascaded RC stages: Γ(n − ½)/(4√π Γ(n)) (1/4, 1/8, 3/32, 5/64)."""
    if slope_db_oct not in SLOPES_DB_OCT:
        raise ValueError(f"enbw: the filter slope must be one of {SLOPES_DB_OCT} dB/oct, got {slope_db_oct!r}")
    n = slope_db_oct // 6
    return math.gamma(n - 0.5) / (4.0 * math.sqrt(math.pi) * math.gamma(n))


def enbw(time_constant_s, slope_db_oct: int = 24):
    """Equivalent noise bandwidth (Hz) of a lock-in low-pass filter: time constant (s), slope (dB/oct)."""
    return enbw_factor(slope_db_oct) / _f(time_constant_s)


def johnson_density(resistance_ohm, temperature_K):
    """One-sided thermal voltage noise density sqrt(4 k_B T R) (V/√Hz; Nyquist 1928)."""
    return jnp.sqrt(4.0 * K_B * jnp.maximum(_f(temperature_K), 0.0) * jnp.maximum(_f(resistance_ohm), 0.0))


def probe_resistances(sigma_bar, width_m, length_m, probe_width_m):
    """(R_xx, R_y) in ohm seen by the longitudinal and transverse probe pairs, from the bar-frame
    sheet conductivity ``sigma_bar`` (..., 2, 2): Re ρ'_xx L/W and Re ρ'_yy W/w (module docstring)."""
    rho = jnp.linalg.inv(jnp.asarray(sigma_bar).astype(jnp.complex128)).real
    return rho[..., 0, 0] * _f(length_m) / _f(width_m), rho[..., 1, 1] * _f(width_m) / _f(probe_width_m)


def noise_density(resistance_ohm, temperature_K, amplifier_V_rtHz):
    """Total input noise density sqrt(4 k_B T R + e_A²) (V/√Hz; differentiable at T = 0 when e_A > 0)."""
    thermal = 4.0 * K_B * jnp.maximum(_f(temperature_K), 0.0) * jnp.maximum(_f(resistance_ohm), 0.0)
    return jnp.sqrt(thermal + _f(amplifier_V_rtHz) ** 2)


def averaging_time(signal_rms, density, target: float = SNR_TARGET):
    """Averaging time (s) for SNR = ``target``: (target v_n/V_rms)²/2 (boxcar bandwidth 1/(2t))."""
    return 0.5 * (target * _f(density) / _f(signal_rms)) ** 2


def snr_after(signal_rms, density, seconds):
    """SNR after averaging for ``seconds``: V_rms sqrt(2t)/v_n."""
    return _f(signal_rms) * jnp.sqrt(2.0 * _f(seconds)) / _f(density)


def verdict(snr_time_constant, snr_limit):
    """2 measurable (SNR ≥ 10 at the time constant), 1 marginal (SNR ≥ 1 within the averaging
    limit), 0 not measurable."""
    return jnp.where(snr_time_constant >= SNR_TARGET, 2, jnp.where(snr_limit >= SNR_FLOOR, 1, 0))


def temperature_rise(power_density, width_m, length_m, dielectric_m, dielectric_k, substrate_m, substrate_k):
    """Channel temperature rise (K) for power per area ``power_density`` (W/m²): the dielectric
    p d/κ_d plus the substrate p/κ_s·min(t_s, 8 sqrt(πA)/(3π²)), A = W·L (module docstring)."""
    p = _f(power_density)
    area = _f(width_m) * _f(length_m)
    spread = 8.0 * jnp.sqrt(math.pi * area) / (3.0 * math.pi ** 2)
    return p * _f(dielectric_m) / _f(dielectric_k) + p * jnp.minimum(_f(substrate_m), spread) / _f(substrate_k)


def misalignment_pickup(v2w_x, misalignment_m, length_m):
    """2ω voltage mixed into the transverse pair by probes displaced ``misalignment_m`` along the
    bar: (δ/L) V_xx^2ω (phasor, same convention as ``v2w_x``)."""
    return jnp.asarray(v2w_x, dtype=jnp.complex128) * (_f(misalignment_m) / _f(length_m)).astype(jnp.complex128)


def thermoelectric_2w(seebeck_yy, delta_T, asymmetry):
    """Amplitude (V) of the thermoelectric 2ω voltage |S'_yy| a ΔT across the transverse probes."""
    s = jnp.abs(jnp.asarray(seebeck_yy))
    return jnp.where(jnp.isfinite(s), s, 0.0) * _f(asymmetry) * _f(delta_T)


# ------------------------------------------------------------------------------ all at once ---
@pytree_dataclass
class Measurability:
    """Noise floor, verdict and artefacts of the transverse 2ω reading, per point (SI units; names
    and units in :data:`crosswind.solver.vocabulary.DEVICE_FIELDS`)."""

    resistance_xx: Any
    resistance_y: Any
    noise_density_x: Any
    noise_density_y: Any
    noise_bandwidth: Any
    noise_y_rms: Any
    snr_v2w_y: Any
    averaging_time_snr10: Any
    measurability: Any
    temperature_rise: Any
    heating_flag: Any
    pickup_v2w_y: Any
    thermoelectric_v2w_y: Any
    signal_to_pickup: Any
    signal_to_thermoelectric: Any


@partial(jax.jit, static_argnames=("settings",))    # one program instead of ~40 small ones
def assess(sigma_bar, v2w_y, v2w_x, power_density, temperature_K, *, width_m, length_m, dielectric_m,
           settings: NoiseSettings | None = None, seebeck_bar=None) -> Measurability:
    """Measurability of a transverse 2ω reading.  ``sigma_bar`` (..., 2, 2) S in the bar frame,
    ``v2w_y``/``v2w_x`` the 2ω phasors (V; amplitude = |phasor|), ``power_density`` W/m², bath
    ``temperature_K``; geometry in metres (traceable); ``seebeck_bar`` (..., 2, 2) V/K or None (no
    thermoelectric estimate: NaN).  Returns a :class:`Measurability` of the leading shape."""
    s = settings if settings is not None else NoiseSettings()
    W, L = _f(width_m), _f(length_m)
    w_probe = W / 5.0 if s.probe_width_um is None else _f(s.probe_width_um * 1e-6)
    dT = temperature_rise(power_density, W, L, dielectric_m, s.dielectric_conductivity_W_mK,
                          s.substrate_um * 1e-6, s.substrate_conductivity_W_mK)
    T_bath = _f(temperature_K)
    T = T_bath + dT
    r_xx, r_y = probe_resistances(sigma_bar, W, L, w_probe)
    e_amp = s.amplifier_noise_nV_rtHz * 1e-9
    n_x, n_y = noise_density(r_xx, T, e_amp), noise_density(r_y, T, e_amp)
    bw = enbw(s.time_constant_ms * 1e-3, s.filter_slope_dB_oct)
    amp = jnp.abs(jnp.asarray(v2w_y))
    rms = amp / jnp.sqrt(2.0)
    noise_rms = n_y * jnp.sqrt(bw)
    snr = rms / noise_rms
    snr_limit = snr_after(rms, n_y, s.averaging_limit_min * 60.0)
    pick = jnp.abs(misalignment_pickup(v2w_x, s.probe_misalignment * W, L))
    if seebeck_bar is None:
        thermo = jnp.full(jnp.shape(amp), jnp.nan)
    else:
        thermo = thermoelectric_2w(jnp.asarray(seebeck_bar)[..., 1, 1].real, dT, s.thermal_asymmetry)
    return Measurability(
        resistance_xx=r_xx, resistance_y=r_y, noise_density_x=n_x, noise_density_y=n_y,
        noise_bandwidth=jnp.broadcast_to(bw, jnp.shape(amp)), noise_y_rms=noise_rms, snr_v2w_y=snr,
        averaging_time_snr10=averaging_time(rms, n_y), measurability=verdict(snr, snr_limit),
        temperature_rise=dT, heating_flag=(dT > HEATING_FRACTION * T_bath).astype(jnp.int32),
        pickup_v2w_y=pick, thermoelectric_v2w_y=thermo,
        signal_to_pickup=amp / pick, signal_to_thermoelectric=amp / thermo)


__all__ = ["HEATING_FRACTION", "K_B", "Measurability", "NoiseSettings", "SLOPES_DB_OCT", "SNR_FLOOR", "SNR_TARGET",
           "VERDICTS", "assess", "averaging_time", "enbw", "enbw_factor", "johnson_density", "misalignment_pickup",
           "noise_density", "probe_resistances", "snr_after", "temperature_rise", "thermoelectric_2w", "verdict"]
