"""Three-band nearest-neighbour tight-binding model of a group-VI dichalcogenide monolayer
(Liu, Shan, Yao, Yao, Xiao, PRB 88, 085433, 2013; docs/theory.md §9.4), with spin–orbit
coupling and homogeneous strain through the bond geometry.

Basis (d_z², d_xy, d_{x²−y²}) of the metal atom; all three orbitals sit on the same site
(position 0), so the Bloch phases of convention I are those of the Bravais vectors.  Lattice
vectors a1 = (a, 0), a2 = (a/2, √3a/2); K = (4π/(3a), 0).  The Hamiltonian is written as the
explicit sum over the six nearest-neighbour M–M vectors R_j = a(cos jπ/3, sin jπ/3)::

    H(k) = diag(ε1, ε2, ε2) + Σ_j E(R_j) e^{i k·R_j} + (λ/2) s_z L_z

    E(R_0) = [[ t0,   t1,   t2 ],          E(R_2) = D E(R_0) Dᵀ,  E(R_4) = D E(R_2) Dᵀ,
              [ −t1,  t11,  t12],          E(R_{j+3}) = E(R_j)ᵀ  (= E(−R_j), Hermiticity),
              [ t2,  −t12,  t22]]

with D the C3 rotation (by 2π/3) of the orbitals: d_z² is invariant and (d_xy, d_{x²−y²})
rotates by 4π/3, D = [[1, 0, 0], [0, cos 4π/3, sin 4π/3], [0, −sin 4π/3, cos 4π/3]].  At zero
strain this equals the closed form of §9.4 (α = k_x a/2, β = √3 k_y a/2; checked in the tests).
L_z = [[0, 0, 0], [0, 0, 2i], [0, −2i, 0]]; s_z = ±1 gives the two 3×3 blocks (block 0: spin
up, block 1: spin down), each the time-reversed partner of the other, H_↓(k) = H_↑(−k)*.

Strain (``strain_xx``, ``strain_yy``, ``strain_xy``: tensor components, ε_xy half the
engineering shear; docs/theory.md §9.5 and models/strain.py): every bond is deformed,
R_j' = (1+ε)R_j, the deformed bonds enter the phases, and each hopping matrix is scaled by its
bond length, E(R_j') = E(R_j) exp[−β(|R_j'|/a − 1)].  This central-force rule ignores the change
of the orbital overlaps with the bond *angle*; ``beta`` = −d ln t/d ln d is an assumed value
(default 3.0, illustrative, not fitted to MoS2).  The reciprocal lattice follows the deformed
lattice vectors (``BandModel.deformation``), so the zone corner moves to (1+ε)^{−T}K.

Default parameters: MoS2, GGA, nearest-neighbour fit (Liu et al. 2013, Table; §9.4):
a = 3.190 Å, ε1 = 1.046, ε2 = 2.104, t0 = −0.184, t1 = 0.401, t2 = 0.507, t11 = 0.218,
t12 = 0.338, t22 = 0.057, λ = 0.073 (eV): gap at K 1.6628 eV, valence spin splitting at K 2λ.
"""
from __future__ import annotations

import jax.numpy as jnp
import numpy as np

from ..band_model import BandModel
from ..domain import Lattice
from ..params import ParamSpec, pop_lattice_length, real
from ..phases import bloch_phase
from ..registry import register
from ..strain import deform, deformation, scaled_hopping, strain_tensor
from ..twoband import bind_length

SPEC = ParamSpec((
    real("lattice_constant", "Å", 3.190, "lattice constant a (M–M distance); sets the lattice, not traceable",
         0.1, 100.0),
    real("e1", "eV", 1.046, "on-site energy ε1 of d_z²", -50.0, 50.0),
    real("e2", "eV", 2.104, "on-site energy ε2 of d_xy and d_x²−y²", -50.0, 50.0),
    real("t0", "eV", -0.184, "NN hopping d_z²–d_z² along R_0 = (a, 0)", -20.0, 20.0),
    real("t1", "eV", 0.401, "NN hopping d_z²–d_xy along R_0", -20.0, 20.0),
    real("t2", "eV", 0.507, "NN hopping d_z²–d_x²−y² along R_0", -20.0, 20.0),
    real("t11", "eV", 0.218, "NN hopping d_xy–d_xy along R_0", -20.0, 20.0),
    real("t12", "eV", 0.338, "NN hopping d_xy–d_x²−y² along R_0", -20.0, 20.0),
    real("t22", "eV", 0.057, "NN hopping d_x²−y²–d_x²−y² along R_0", -20.0, 20.0),
    real("soc", "eV", 0.073, "spin–orbit coupling λ in (λ/2) s_z L_z (valence splitting at K ≈ 2λ)",
         -5.0, 5.0),
    real("strain_xx", "", 0.0, "strain tensor component ε_xx", -0.5, 0.5),
    real("strain_yy", "", 0.0, "strain tensor component ε_yy", -0.5, 0.5),
    real("strain_xy", "", 0.0, "strain tensor component ε_xy (half the engineering shear)", -0.5, 0.5),
    real("beta", "", 3.0, "hopping decay β: E(R') = E(R) exp[−β(|R'|/a − 1)] (assumed value)", -50.0, 50.0),
), owner="tmd-lattice")

_ANGLES = np.arange(6) * np.pi / 3
_UNIT_BONDS = np.stack([np.cos(_ANGLES), np.sin(_ANGLES)], axis=1)        # R_j / a
_C, _S = np.cos(4 * np.pi / 3), np.sin(4 * np.pi / 3)
_D = np.array([[1.0, 0.0, 0.0], [0.0, _C, _S], [0.0, -_S, _C]])              # C3 on the orbitals
_LZ = np.array([[0, 0, 0], [0, 0, 2j], [0, -2j, 0]], dtype=np.complex128)
SPINS = (1.0, -1.0)


def hopping_matrices(p):
    """E(R_j) for the six undeformed bonds, shape (6, 3, 3), real (eV)."""
    t0, t1, t2 = p["t0"], p["t1"], p["t2"]
    t11, t12, t22 = p["t11"], p["t12"], p["t22"]
    e0 = jnp.stack([jnp.stack([t0, t1, t2]),
                    jnp.stack([-t1, t11, t12]),
                    jnp.stack([t2, -t12, t22])])
    d = jnp.asarray(_D)
    e2 = d @ e0 @ d.T
    e4 = d @ e2 @ d.T
    return jnp.stack([e0, e4.T, e2, e0.T, e4, e2.T])


def strain_of(p):
    return strain_tensor(p["strain_xx"], p["strain_yy"], p["strain_xy"])


def deformation_of(p):
    """(1 + ε) for BandModel.deformation."""
    return deformation(strain_of(p))


def hamiltonian(k, p, a=3.190):
    """Blocks (2, 3, 3): spin up, spin down."""
    eps = strain_of(p)
    bonds = jnp.asarray(_UNIT_BONDS * a)
    new = deform(bonds, eps)                                             # (6, 2) Å
    scale = scaled_hopping(1.0, bonds, eps, p["beta"])                   # (6,)
    phase = bloch_phase(new @ k)                                        # (6,)
    e = (hopping_matrices(p) * scale[:, None, None]).astype(jnp.complex128)
    onsite = jnp.stack([p["e1"], p["e2"], p["e2"]])
    h0 = jnp.diag(onsite).astype(jnp.complex128) + jnp.sum(e * phase[:, None, None], axis=0)
    soc = (p["soc"] / 2).astype(jnp.complex128) * jnp.asarray(_LZ)
    return jnp.stack([h0 + s * soc for s in SPINS])


def hamiltonian_jet(k, p, a=3.190):
    """``hamiltonian`` and its first and second k-derivatives as explicit Bloch sums:
    ∂_A H = Σ_j E_j (iR'_jA) e^{ik·R'_j}, ∂_A∂_B H = −Σ_j E_j R'_jA R'_jB e^{ik·R'_j}."""
    eps = strain_of(p)
    bonds = jnp.asarray(_UNIT_BONDS * a)
    new = deform(bonds, eps)                                             # (6, 2) Å
    scale = scaled_hopping(1.0, bonds, eps, p["beta"])                   # (6,)
    phase = bloch_phase(new @ k)                                        # (6,)
    e = (hopping_matrices(p) * scale[:, None, None]).astype(jnp.complex128) * phase[:, None, None]
    onsite = jnp.stack([p["e1"], p["e2"], p["e2"]])
    h0 = jnp.diag(onsite).astype(jnp.complex128) + jnp.sum(e, axis=0)
    r = new.astype(jnp.complex128)
    dh0 = jnp.einsum("jmn,jA->mnA", e, 1j * r)
    d2h0 = -jnp.einsum("jmn,jA,jB->mnAB", e, r, r)
    soc = (p["soc"] / 2).astype(jnp.complex128) * jnp.asarray(_LZ)
    return (jnp.stack([h0 + s * soc for s in SPINS]), jnp.stack([dh0] * len(SPINS)),
            jnp.stack([d2h0] * len(SPINS)))


def closed_form(k, p, a=3.190):
    """The unstrained, spinless 3×3 matrix of docs/theory.md §9.4 (for checks)."""
    al, be = k[0] * a / 2, np.sqrt(3.0) * k[1] * a / 2
    c, s = jnp.cos, jnp.sin
    s3 = np.sqrt(3.0)
    z = lambda x: jnp.asarray(x).astype(jnp.complex128)
    h0 = z(2 * p["t0"] * (c(2 * al) + 2 * c(al) * c(be)) + p["e1"])
    h1 = z(-2 * s3 * p["t2"] * s(al) * s(be)) + 2j * z(p["t1"] * (s(2 * al) + s(al) * c(be)))
    h2 = z(2 * p["t2"] * (c(2 * al) - c(al) * c(be))) + 2j * s3 * z(p["t1"] * c(al) * s(be))
    h11 = z(2 * p["t11"] * c(2 * al) + (p["t11"] + 3 * p["t22"]) * c(al) * c(be) + p["e2"])
    h22 = z(2 * p["t22"] * c(2 * al) + (3 * p["t11"] + p["t22"]) * c(al) * c(be) + p["e2"])
    h12 = z(s3 * (p["t22"] - p["t11"]) * s(al) * s(be)) + 4j * z(p["t12"] * s(al) * (c(al) - c(be)))
    cj = jnp.conj
    return jnp.stack([jnp.stack([h0, h1, h2]),
                      jnp.stack([cj(h1), h11, h12]),
                      jnp.stack([cj(h2), cj(h12), h22])])


@register("tmd-lattice", SPEC,
          summary="three-band (d_z², d_xy, d_x²−y²) nearest-neighbour TMD lattice with spin–orbit "
                  "coupling and bond-geometry strain (2D lattice)",
          hamiltonian="diag(ε1,ε2,ε2) + Σ_j E(R_j') e^{ik·R_j'} exp[−β(|R_j'|/a−1)] + (λ/2)s_z L_z, "
                      "R_j' = (1+ε)R_j",
          source="Liu, Shan, Yao, Yao, Xiao, PRB 88, 085433 (2013); strain: bond-length scaling as in "
                 "Pereira, Castro Neto, Peres, PRB 80, 045401 (2009)")
def build_tmd_lattice(p, s) -> BandModel:
    a = pop_lattice_length(p, "lattice_constant", "tmd-lattice")
    s3 = np.sqrt(3.0)
    lattice = Lattice(vectors=((a, 0.0), (a / 2, s3 * a / 2)),
                      positions=((0.0, 0.0), (0.0, 0.0), (0.0, 0.0)))
    return BandModel(name="tmd-lattice", dim=2, hamiltonian=bind_length(hamiltonian, a), params=p, spec=SPEC,
                     jet=bind_length(hamiltonian_jet, a),
                     domain=lattice, degeneracy=1.0, blocks=2, block_size=3,
                     deformation=deformation_of, static=(("lattice_constant", a),),
                     description="three-band NN TMD model, blocks spin up, spin down",
                     source="Liu et al., PRB 88, 085433 (2013)")
