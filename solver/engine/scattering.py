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
term gains ∂τ/∂ε (see :mod:`crosswind.solver.engine.kernels`).  E⊥/E∥² is then τ-independent only on
average.

The shape parameters (exponent, reference and scale energies, smoothing, reference temperature)
are checked when an object is built, for concrete values: NaN/inf, a scale or reference
temperature <= 0, a smoothing <= 0 and an exponent beyond ±``MAX_EXPONENT`` are refused with a
``ValueError`` naming the field.  The relaxation times themselves are checked by ``response``.
"""
from __future__ import annotations

from dataclasses import dataclass

import jax.numpy as jnp
import numpy as np

from crosswind.solver.engine.inputs import first_bad, is_traced
from crosswind.solver.vocabulary import KNOBS

MAX_EXPONENT = KNOBS["exponent"].high   # |r| beyond this overflows τ over a band width (0.1 eV scale: 100^r)


def _require(owner: str, name: str, value, ok, rule: str, fix: str) -> None:
    """Refuse a concrete ``value`` with an entry where ``ok`` fails (NaN fails every rule)."""
    if is_traced(value):
        return
    hit = first_bad(value, lambda a: np.isfinite(a) & ok(a))
    if hit is not None:
        idx, v = hit
        where = f" at index {idx}" if idx else ""
        raise ValueError(f"{owner}: {name} must be {rule}; got {v!r}{where}. {fix}")


@dataclass(frozen=True)
class ConstantTau:
    tau: object  # fs, scalar or array
    #: τ does not depend on T: conditions of a sweep that differ in T alone share their sums at the
    #: ladder temperatures (crosswind.solver.engine.ladder.sweep_groups)
    temperature_free = True

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
    temperature_free = True        # τ(ε) only (see ConstantTau)

    def __post_init__(self):
        own = "PowerLawTau"
        _require(own, "exponent", self.exponent, lambda a: np.abs(a) <= MAX_EXPONENT,
                 f"finite with |exponent| <= {MAX_EXPONENT:g}",
                 "Physical exponents are of order 1 (e.g. -0.5 acoustic phonons, +1 charged impurities).")
        _require(own, "reference_energy", self.reference_energy, np.isfinite, "finite (eV)",
                 "Pass the reference energy in eV, e.g. 0.0.")
        _require(own, "energy_scale", self.energy_scale, lambda a: a > 0, "positive and finite (eV)",
                 "Pass the energy scale in eV, e.g. energy_scale=0.1.")
        _require(own, "smoothing", self.smoothing, lambda a: a > 0, "positive and finite (eV)",
                 "Keep the default 1e-4 eV (it regularises |eps - eps_ref|^r at eps_ref).")

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
    temperature_free = False              # τ depends on T (see ConstantTau)

    def __post_init__(self):
        _require("MatthiessenTau", "reference_temperature", self.reference_temperature, lambda a: a > 0,
                 "positive and finite (K)", "Pass the temperature at which tau_phonon is quoted, "
                 "e.g. reference_temperature=300.0.")

    def arrays(self):
        f = lambda x: jnp.asarray(x, dtype=jnp.float64)
        return {"timp": f(self.tau_impurity), "tph": f(self.tau_phonon), "tref": f(self.reference_temperature)}

    @staticmethod
    def evaluate(arr, energy, temperature):
        rate = 1.0 / arr["timp"] + jnp.asarray(temperature) / (arr["tph"] * arr["tref"])
        t = 1.0 / rate + 0.0 * energy
        return t, jnp.zeros_like(t)


def temperature_free(scat) -> bool:
    """Whether ``scat``'s τ is free of T, as its own class declares (``temperature_free`` in the
    class body itself: a subclass that inherits the flag with an ``evaluate`` of its own might depend
    on T, and counts as depending on it).  Sweeps share sums across temperatures only when true."""
    return bool(type(scat).__dict__.get("temperature_free", False))


def energy_free(evaluate) -> bool:
    """Whether the τ function ``evaluate`` (a class's ``evaluate``) is free of the band energy:
    τ is then one number per condition and ∂τ/∂ε = 0, so the energy-resolved engines take τ out of
    their knot sums (``ladder._kernel_sums_free``).  Decided by the function itself, so a subclass
    with an ``evaluate`` of its own is never taken for energy-free."""
    return evaluate in _ENERGY_FREE


_ENERGY_FREE = (ConstantTau.evaluate, MatthiessenTau.evaluate)


def as_scattering(tau):
    """Accept a number/array (constant τ in fs) or one of the scattering objects."""
    if isinstance(tau, (ConstantTau, PowerLawTau, MatthiessenTau)):
        return tau
    return ConstantTau(tau)
