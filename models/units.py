"""Physical constants (CODATA 2018 exact SI values via ``scipy.constants``) and unit factors.

Interface units: energy eV, length Å, time fs, temperature K, velocity m/s.
"""
from scipy import constants as _c

E_CHARGE = _c.e                      # C (exact)
HBAR_JS = _c.hbar                    # J s
HBAR_EVS = _c.hbar / _c.e            # eV s
HBAR_EVFS = HBAR_EVS * 1e15          # eV fs  (0.6582119569)
KB_EVK = _c.k / _c.e                 # eV/K
M_E = _c.m_e                         # kg
ANGSTROM = 1e-10                     # m
E2_OVER_H = _c.e ** 2 / _c.h         # S
MU_B_EVT = _c.physical_constants["Bohr magneton in eV/T"][0]
# ħ²/m_e in eV Å²  (7.61996...): converts ∂²ε/∂k² (eV Å²) to inverse mass in units of 1/m_e
HBAR2_OVER_ME_EVA2 = _c.hbar ** 2 / _c.m_e / _c.e / ANGSTROM ** 2
# energy gradient (eV Å) -> velocity (m/s)
GRAD_TO_VELOCITY = ANGSTROM / HBAR_EVS
