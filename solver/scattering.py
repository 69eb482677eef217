"""Relaxation-time models (relaxation-time approximation, band-independent τ).

All return τ in fs as a function of band energy ε (eV) and temperature T (K), together with
∂τ/∂ε (fs/eV), which the second-order (nonlinear Drude) and thermoelectric kernels need when τ
depends on energy.

* :class:`ConstantTau` — τ independent of ε and T.
* :class:`PowerLawTau` — τ(ε) = τ0 (|ε − ε_ref| / ε_s)^r, e.g. r = −1/2 for acoustic phonons in
  a 3D parabolic band, r = +1 for charged impurities in graphene (common practice).  The power is
  regularised at ε = ε_ref by |ε − ε_ref| → sqrt((ε−ε_ref)² + η²) with η = ``smoothing`` (eV) so that
  gradients stay finite.
* :class:`MatthiessenTau` — 1/τ(T) = 1/τ_imp + T/(τ_ph·T_ref): impurity plus a phonon rate linear in
  T (the high-temperature equipartition regime; Matthiessen's rule, common practice).

When τ depends on energy the closed forms change: σ is no longer τ × (a τ-free integral); the
Berry-curvature dipole term uses the τ-weighted dipole ∫(−f0')τ(ε)ħv_bΩ_d, and the nonlinear Drude
term gains ∂τ/∂ε (see :mod:`crosswind.solver.kernels`).  E⊥/E∥² is then τ-independent only on
average.
"""
from __future__ import annotations

from dataclasses import dataclass

import jax.numpy as jnp


@dataclass(frozen=True)
class ConstantTau:
    tau: object  # fs, scalar or array

    def arrays(self):
        return {"tau0": jnp.asarray(self.tau, dtype=jnp.float64)}

    @staticmethod
    def evaluate(arr, energy, temperature):
        t = arr["tau0"] + 0.0 * energy
        return t, jnp.zeros_like(t)


@dataclass(frozen=True)
class PowerLawTau:
    tau0: object                 # fs
    exponent: float = 0.0
    reference_energy: float = 0.0  # eV
    energy_scale: float = 0.1      # eV
    smoothing: float = 1e-4        # eV

    def arrays(self):
        f = lambda x: jnp.asarray(x, dtype=jnp.float64)
        return {"tau0": f(self.tau0), "exponent": f(self.exponent), "eref": f(self.reference_energy),
                "escale": f(self.energy_scale), "eta": f(self.smoothing)}

    @staticmethod
    def evaluate(arr, energy, temperature):
        x = energy - arr["eref"]
        r2 = x * x + arr["eta"] * arr["eta"]
        ratio = jnp.sqrt(r2) / arr["escale"]
        t = arr["tau0"] * ratio ** arr["exponent"]
        dt = t * arr["exponent"] * x / r2
        return t, dt


@dataclass(frozen=True)
class MatthiessenTau:
    tau_impurity: object            # fs
    tau_phonon: object              # fs, phonon-limited τ at T_ref
    reference_temperature: float = 300.0  # K

    def arrays(self):
        f = lambda x: jnp.asarray(x, dtype=jnp.float64)
        return {"timp": f(self.tau_impurity), "tph": f(self.tau_phonon), "tref": f(self.reference_temperature)}

    @staticmethod
    def evaluate(arr, energy, temperature):
        rate = 1.0 / arr["timp"] + jnp.asarray(temperature) / (arr["tph"] * arr["tref"])
        t = 1.0 / rate + 0.0 * energy
        return t, jnp.zeros_like(t)


def as_scattering(tau):
    """Accept a number/array (constant τ in fs) or one of the scattering objects."""
    if isinstance(tau, (ConstantTau, PowerLawTau, MatthiessenTau)):
        return tau
    return ConstantTau(tau)
