"""Group-VI dichalcogenide monolayer (MoS2, WS2, MoSe2, WSe2): massive Dirac model with
spin–orbit coupling, continuum around K and K', with strain-induced tilt and warping.

Unstrained model (Xiao, Liu, Feng, Xu, Yao, PRL 108, 196802, 2012; docs/theory.md §9.3)::

    H_τs(k) = a t (τ k_x σ_x + k_y σ_y) + (Δ/2) σ_z − λ τ s_z (σ_z − 1)/2

τ = ±1 valley (K, K'), s_z = ±1 spin (conserved), σ acts on (d_z², d_{x²−y²} + iτ d_xy)
(conduction, valence).  Here Δ = ``gap`` is the gap *without* spin–orbit coupling (Δ is the
gap, not the mass: the Xiao et al. convention) and ``soc`` = 2λ is the valence-band spin
splitting at K.  Each (τ, s_z) block is H = d0 + d·σ with

    d0 = λτs_z/2,   d = (τ a t k_x, a t k_y, (Δ − λτs_z)/2),

so the conduction edge sits at +Δ/2 in every block and the valence edge at −Δ/2 + λτs_z: at K
(τ = +1) the spin-up valence band is the higher one (τs_z = +1), at K' spin down, and the
direct gaps are Δ − λ (τs_z = +1) and Δ + λ (τs_z = −1).  The block mass is (Δ − λτs_z)/2 and
the conduction-band curvature at the valley centre is Ω_c = −τ (at)²/(2 m_τs²) (§3).

Strain (derived here from symmetry; coefficients are parameters).  The strain tensor ε
(``strain_xx``, ``strain_yy``, ``strain_xy``, tensor components) enters through its traceless
part u = (u1, u2) = (ε_xx − ε_yy, 2ε_xy), w = u1 + i u2, which transforms under the C3 rotation
of the valley like k_− = k_x − i k_y.  The terms linear in k and ε allowed by C3, by the
combination of time reversal and the vertical mirror x → −x (which maps K onto itself and
forces real coefficients) and by time reversal between the valleys, H_K'(k) = H_K(−k)* with
s_z → −s_z, are:

* a valley-contrasting tilt, Re(w k_+) = u1 k_x − u2 k_y, separately for the two bands::

      H_tilt = τ (u1 k_x − u2 k_y) [c_c (1 + σ_z)/2 + c_v (1 − σ_z)/2]

  (c_c = ``tilt_conduction``, c_v = ``tilt_valence``, eV·Å per unit strain);
* an anisotropic velocity (warping of the cone), the term w̄ k_+ σ_+ + h.c.::

      H_warp = a t η [τ (u1 k_x + u2 k_y) σ_x + (u2 k_x − u1 k_y) σ_y]

  (η = ``velocity_anisotropy``, per unit strain): for strain along x the velocities become
  v_x = v(1 + ηu1), v_y = v(1 − ηu1).

At zero strain the model keeps its C3 symmetry, so its Berry-curvature dipole vanishes; the tilt
produces a dipole (as in the strained MoS2 analysis of Son, Kim, Ahn, Lee, Lee, PRL 123, 036806,
2019), the warping alone does not (it keeps Ω(−k) = Ω(k) within a valley).  Not included: the
valley shift (pseudo-gauge field, a constant σ_x/σ_y term that only moves the valley centre in a
continuum model) and the hydrostatic terms ∝ ε_xx + ε_yy (absorb them in ``gap`` and
``hopping``).  The default coefficients are illustrative, not fitted to any material: set them
for quantitative work.  ``crosswind.models.strain.uniaxial`` converts a uniaxial strain and its
angle into tensor components.

Material presets (Table I of Xiao et al. 2012, docs/theory.md §9.3): ``material`` picks
the defaults of ``lattice_constant``, ``hopping``, ``gap`` and ``soc``; any of them given
explicitly overrides the preset.
"""
from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import jax.numpy as jnp

from ..band_model import BandModel
from ..domain import Continuum
from ..params import ParamSpec, choice, real
from ..registry import register
from ..twoband import hamiltonian_of

# material: (lattice constant Å, hopping eV, gap Δ eV, valence spin splitting 2λ eV)
PRESETS = {
    "MoS2": (3.193, 1.10, 1.66, 0.15),
    "WS2": (3.197, 1.37, 1.79, 0.43),
    "MoSe2": (3.313, 0.94, 1.47, 0.18),
    "WSe2": (3.310, 1.19, 1.60, 0.46),
}
_PRESET_NAMES = ("lattice_constant", "hopping", "gap", "soc")


@dataclass(frozen=True)
class PresetSpec(ParamSpec):
    """A parameter spec whose defaults for some real parameters come from a material preset
    chosen by a static ``choice`` parameter; values given explicitly override the preset."""

    preset_key: str = "material"
    presets: tuple = ()          # ((preset name, ((param, value), ...)), ...)

    def preset_values(self, key) -> dict:
        for name, values in self.presets:
            if name == key:
                return dict(values)
        return {}

    def resolve(self, given: Mapping[str, Any]) -> tuple[dict, dict]:
        key = given.get(self.preset_key, self[self.preset_key].default)
        filled = dict(self.preset_values(key))
        filled.update(given)          # explicit values win; unknown material is reported below
        return super().resolve(filled)


_MOS2 = PRESETS["MoS2"]
SPEC = PresetSpec((
    choice("material", "MoS2", tuple(PRESETS),
           "material preset (Xiao et al. 2012, Table I) for lattice_constant, hopping, gap, soc"),
    real("lattice_constant", "Å", _MOS2[0], "lattice constant a (default: from material)", 0.1, 100.0),
    real("hopping", "eV", _MOS2[1], "effective hopping t, ħv = a t (default: from material)", 1e-6, 100.0),
    real("gap", "eV", _MOS2[2], "gap Δ without spin–orbit coupling, +(Δ/2)σ_z (default: from material)",
         -20.0, 20.0),
    real("soc", "eV", _MOS2[3], "valence-band spin splitting 2λ at K (default: from material)", -5.0, 5.0),
    real("strain_xx", "", 0.0, "strain tensor component ε_xx", -0.5, 0.5),
    real("strain_yy", "", 0.0, "strain tensor component ε_yy", -0.5, 0.5),
    real("strain_xy", "", 0.0, "strain tensor component ε_xy (half the engineering shear)", -0.5, 0.5),
    real("tilt_conduction", "eV Å", 1.0,
         "conduction-band tilt per unit traceless strain, τ c_c (u1 k_x − u2 k_y) (illustrative default)",
         -1e3, 1e3),
    real("tilt_valence", "eV Å", 1.0,
         "valence-band tilt per unit traceless strain, τ c_v (u1 k_x − u2 k_y) (illustrative default)",
         -1e3, 1e3),
    real("velocity_anisotropy", "", 1.0,
         "velocity anisotropy η per unit traceless strain, v_x,y = v(1 ± η u1) (illustrative default)",
         -1e3, 1e3),
), owner="tmd", preset_key="material",
    presets=tuple((m, tuple(zip(_PRESET_NAMES, v))) for m, v in PRESETS.items()))

# block order: (K, up), (K, down), (K', up), (K', down)
TAU = (1.0, 1.0, -1.0, -1.0)
SPIN = (1.0, -1.0, 1.0, -1.0)


def dvector(k, p):
    """d0 (4,) and d (4, 3) of the four (valley, spin) blocks; k measured from each valley."""
    tau = jnp.asarray(TAU)
    ts = tau * jnp.asarray(SPIN)
    hv = p["lattice_constant"] * p["hopping"]                       # eV Å
    lam = p["soc"] / 2
    u1 = p["strain_xx"] - p["strain_yy"]
    u2 = 2 * p["strain_xy"]
    eta = p["velocity_anisotropy"]
    kx, ky = k[0], k[1]
    tilt = u1 * kx - u2 * ky
    cc, cv = p["tilt_conduction"], p["tilt_valence"]
    dx = tau * (hv * (kx + eta * (u1 * kx + u2 * ky)))
    dy = jnp.ones(4) * (hv * (ky + eta * (u2 * kx - u1 * ky)))
    dz = (p["gap"] - lam * ts) / 2 + tau * (tilt * (cc - cv) / 2)
    d0 = lam * ts / 2 + tau * (tilt * (cc + cv) / 2)
    return d0, jnp.stack([dx, dy, dz], axis=-1)


HAMILTONIAN = hamiltonian_of(dvector)


def _scale(p):
    """Curvature scale (Δ/2)/(a t) (1/Å) for mesh placement (at least 1e-4)."""
    return jnp.maximum(jnp.abs(p["gap"]) / 2 / (p["lattice_constant"] * p["hopping"]), 1e-4)


@register("tmd", SPEC,
          summary="group-VI dichalcogenide monolayer: massive Dirac with spin–orbit, K and K', "
                  "strain tilt and warping (continuum, 2D)",
          hamiltonian="a t (τ k_x σ_x + k_y σ_y) + (Δ/2)σ_z − λτs_z(σ_z − 1)/2 + strain tilt "
                      "τ(u1k_x − u2k_y)[c_c(1+σ_z)/2 + c_v(1−σ_z)/2] + warping "
                      "atη[τ(u1k_x + u2k_y)σ_x + (u2k_x − u1k_y)σ_y], u = (ε_xx−ε_yy, 2ε_xy)",
          source="Xiao, Liu, Feng, Xu, Yao, PRL 108, 196802 (2012); strain terms derived by symmetry "
                 "(cf. Son, Kim, Ahn, Lee, Lee, PRL 123, 036806 (2019))")
def build_tmd(p, s) -> BandModel:
    return BandModel(
        name="tmd", dim=2, hamiltonian=HAMILTONIAN, params=p, spec=SPEC,
        domain=Continuum(dim=2, centers=((0.0, 0.0),), scale=_scale),
        degeneracy=1.0, blocks=4, block_size=2, dvector=dvector,
        static=tuple(sorted(s.items())),
        description=f"{s['material']} monolayer, blocks (K,↑), (K,↓), (K',↑), (K',↓)",
        source="Xiao et al., PRL 108, 196802 (2012)")
