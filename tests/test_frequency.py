"""Frequency dependence of the relaxation-time responses for an energy-independent τ.

With E(t) = Re[E e^{iωt}] the first-order distribution carries 1/(1+iωτ) and the 2ω part of the
second-order one 1/((1+iωτ)(1+2iωτ)), the rectified part 1/(1+iωτ) (derived in
docs/theory.md §5.1–5.5 and §5.7; the phasor convention is that of Sodemann & Fu,
PRL 115, 216806, 2015).  Hence, at a fixed mesh, exactly:

* Drude σ(ω) = σ(0)/(1+iωτ); the intrinsic anomalous Hall σ is frequency independent;
* Berry-curvature dipole χ(ω) = χ(0)/(1+iωτ), at 2ω and in the dc part;
* nonlinear Drude χ^2ω(ω) = χ(0)/((1+iωτ)(1+2iωτ)), χ^dc(ω) = χ(0)/(1+iωτ);
* the intrinsic (τ⁰) term does not depend on ω (ω ≪ gap/ħ).

A single tilted massive Dirac valley breaks time reversal and inversion, so all four terms are
nonzero (docs/theory.md §5.6, §6).  The exact time-domain oracle in
tests/test_chambers_oracle.py checks the same factors independently of the solver's kernels.
"""
from __future__ import annotations

import functools

import numpy as np
import pytest

from crosswind.models import build
from crosswind.solver import response
from crosswind.solver.pytrees import as_dict

TAU = 100.0                     # fs
MU, TEMPERATURE = 0.15, 20.0    # eV, K
LEVEL = 0                       # the ratios are exact on any fixed mesh
RTOL = 1e-10


@functools.cache
def solved(omega_tau):
    model = build("massive-dirac", velocity=5e5, mass=0.1, tilt=5e4, valleys=1)
    frequency = omega_tau / TAU * 1e15 / (2 * np.pi)           # Hz
    r = response(model, MU, TEMPERATURE, TAU, frequency, resolution=LEVEL)
    return {"sigma_drude": np.asarray(r.sigma_drude), "sigma_anomalous": np.asarray(r.sigma_anomalous),
            **{f"chi_{k}": np.asarray(v) for k, v in as_dict(r.chi_parts).items()},
            **{f"chi_dc_{k}": np.asarray(v) for k, v in as_dict(r.chi_dc_parts).items()}}


def factor(kind, wt):
    one = 1.0 / (1.0 + 1j * wt)
    return {"const": 1.0, "one": one, "two": one / (1.0 + 2j * wt)}[kind]


EXPECTED = {
    "sigma_drude": "one",
    "sigma_anomalous": "const",
    "chi_dipole": "one",
    "chi_dc_dipole": "one",
    "chi_drude": "two",
    "chi_dc_drude": "one",
    "chi_intrinsic": "const",
    "chi_dc_intrinsic": "const",
}


@pytest.mark.parametrize("wt", [0.7, 2.5])
@pytest.mark.parametrize("name", list(EXPECTED))
def test_frequency_factor(name, wt):
    """Ratio of the response at ωτ to the response at ω = 0 (docs/theory.md §5)."""
    static, driven = solved(0.0)[name], solved(wt)[name]
    scale = np.max(np.abs(static))
    assert scale > 0, f"{name} vanishes; the test model must break T and P"
    expected = factor(EXPECTED[name], wt) * static
    err = np.max(np.abs(driven - expected)) / scale
    assert err < RTOL, f"{name} at ωτ = {wt}: deviation {err:.3g} from the {EXPECTED[name]} factor"


def test_all_mechanisms_present():
    """Guard: every term compared above stands far above rounding noise for the chosen model, so
    the ratio tests are not comparisons of noise (the τ⁰ term is ~1e-3 of the τ² one at 100 fs)."""
    r = solved(0.0)
    chi_scale = max(np.max(np.abs(r[f"chi_{k}"])) for k in ("dipole", "drude", "intrinsic"))
    for k in ("dipole", "drude", "intrinsic"):
        assert np.max(np.abs(r[f"chi_{k}"])) > 1e-6 * chi_scale, k
    assert np.max(np.abs(r["sigma_anomalous"])) > 1e-3 * np.max(np.abs(r["sigma_drude"]))
