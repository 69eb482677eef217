"""Graphene-like honeycomb lattice, nearest-neighbour, spinless two-band block, with strain.

Geometry (undeformed, a_cc = a/√3, a = ``lattice_constant``).  Nearest-neighbour bond vectors
from an A site to its three B neighbours (the vectors of docs/theory.md §4)

    δ1 = a_cc (0, 1),   δ2 = a_cc (−√3/2, −1/2),   δ3 = a_cc (√3/2, −1/2);

lattice vectors a1 = δ1 − δ2, a2 = δ1 − δ3 (|a_i| = a), orbital positions τ_A = 0, τ_B = δ1.
The x axis is the zigzag direction (a1 − a2 = a x̂), y the armchair direction.  The valleys sit
at K = (4π/(3a), 0) and K' = −K.

Hamiltonian (Bloch phases include the orbital positions, docs/theory.md §2.5
"convention I"; the sign of the hopping follows common practice, H_AB = −Σ t_i e^{ik·δ_i}):

    H(k) = [[ Δ,            −Σ_i t_i e^{ik·δ_i'} ],
            [ −Σ_i t_i e^{−ik·δ_i'},   −Δ          ]]
    d(k) = ( −Σ_i t_i cos(k·δ_i'),  Σ_i t_i sin(k·δ_i'),  Δ ),   d0 = 0

with t = ``hopping`` > 0 and Δ = ``staggered`` (+Δ on A, −Δ on B: a substrate mass, gap 2|Δ|).
Near K, H ≈ ħv(q_x σ_x + q_y σ_y) + Δσ_z with ħv = 3 a_cc t/2 = √3 a t/2, i.e. the τ = +1 cone
of docs/theory.md §3 (K' gives τ = −1); Xiao, Yao, Niu, PRL 99, 236809 (2007).

Strain (Pereira, Castro Neto, Peres, PRB 80, 045401, 2009; ``crosswind.models.strain``): the
homogeneous strain tensor ε = [[ε_xx, ε_xy], [ε_xy, ε_yy]] (tensor components; ε_xy is half the
engineering shear) deforms the bonds δ_i' = (1+ε)δ_i, the lattice vectors and the orbital
positions (the model's ``deformation``), and each hopping follows its bond length,
t_i = t exp[−β(|δ_i'|/a_cc − 1)].  k is the physical (laboratory-frame) wavevector, so the
Brillouin zone is the deformed one, b_j' = (1+ε)^{−T} b_j.

First-order consequences (derived in the comments of tests/test_models_honeycomb.py and checked
there):
the Dirac point moves to k_D = (1 − ε)K + (β/a_cc)((ε_xx − ε_yy)/2, −ε_xy), and the Dirac
velocity tensor becomes v_ij = v[δ_ij + (1 − β)ε_ij], i.e. ∂d_i/∂k_j = ħv_ij (this agrees with Oliva-Leyva & Naumis,
PRB 88, 085430, 2013).  Stretching along x therefore lowers the velocity along x for β > 1.

``degeneracy`` counts spin (default 2: inert spin of graphene); both valleys are part of the
lattice band structure and are not a parameter.  ``build_strained_honeycomb`` builds the model
for uniaxial strain of a given magnitude and direction with a Poisson ratio (default 0.165).
"""
from __future__ import annotations

from functools import partial

import jax
import jax.numpy as jnp
import numpy as np

from ..band_model import BandModel
from ..domain import Lattice
from ..params import ParamSpec, choice, pop_lattice_length, real
from ..phases import sincos
from ..registry import build, register
from ..strain import deform, deformation, scaled_hopping, strain_tensor, uniaxial
from ..twoband import bind_length, hamiltonian_of, jet_of

S3 = np.sqrt(3.0)
#: bond vectors A -> B in units of a_cc (rows)
BONDS = np.array([[0.0, 1.0], [-S3 / 2, -0.5], [S3 / 2, -0.5]])

SPEC = ParamSpec((
    real("hopping", "eV", 2.8, "nearest-neighbour hopping t (H_AB = −Σ t_i e^{ik·δ_i})", 0.0, 20.0),
    real("staggered", "eV", 0.0, "sublattice potential Δ (+Δ on A, −Δ on B); gap 2|Δ|", -10.0, 10.0),
    real("strain_xx", "-", 0.0, "strain tensor component ε_xx (x = zigzag)", -0.3, 0.3),
    real("strain_yy", "-", 0.0, "strain tensor component ε_yy (y = armchair)", -0.3, 0.3),
    real("strain_xy", "-", 0.0, "strain tensor component ε_xy (half the engineering shear)", -0.3, 0.3),
    real("beta", "-", 3.37, "hopping decay β = −d ln t / d ln a_cc", 0.0, 20.0),
    real("lattice_constant", "Å", 2.46, "lattice constant a = √3 a_cc (static: sets the lattice)", 0.1, 100.0),
    choice("degeneracy", 2, (1, 2), "extra degeneracy factor: 2 = spin (graphene), 1 = spinless"),
), owner="honeycomb")


def strain_of(p):
    """The strain tensor ε (2×2) from the parameter pytree."""
    return strain_tensor(p["strain_xx"], p["strain_yy"], p["strain_xy"])


def deformation_of(p):
    """(1 + ε): maps undeformed lattice vectors and orbital positions to deformed ones."""
    return deformation(strain_of(p))


def dvector(k, p, acc):
    """(d0 (1,), d (1, 3)) of the honeycomb block at one k (1/Å); ``acc`` = a_cc in Å."""
    bonds = jnp.asarray(BONDS * acc)
    eps = strain_of(p)
    new = deform(bonds, eps)                                  # δ_i' (3, 2)
    t = scaled_hopping(p["hopping"], bonds, eps, p["beta"])   # t_i (3,)
    sn, cs = sincos(new @ k)
    d = jnp.stack([-jnp.sum(t * cs), jnp.sum(t * sn), p["staggered"]])
    return jnp.zeros((1,)), d[None]


def dvector_jet(k, p, acc):
    """The d-vector and its first and second k-derivatives as explicit Bloch sums (c_i, s_i =
    t_i cos, t_i sin of k·δ_i'): d = (−Σc_i, Σs_i, Δ), ∂_a d = (Σ s_i δ'_ia, Σ c_i δ'_ia, 0),
    ∂_a∂_b d = (Σ c_i δ'_ia δ'_ib, −Σ s_i δ'_ia δ'_ib, 0); d0 = 0.  Shapes as ``BandModel.dvector_jet``."""
    bonds = jnp.asarray(BONDS * acc)
    eps = strain_of(p)
    new = deform(bonds, eps)                                  # δ_i' (3, 2)
    t = scaled_hopping(p["hopping"], bonds, eps, p["beta"])   # t_i (3,)
    sn, cs = sincos(new @ k)
    c, s = t * cs, t * sn
    nn = new[:, :, None] * new[:, None, :]
    d = jnp.stack([-jnp.sum(c), jnp.sum(s), jnp.asarray(p["staggered"], dtype=jnp.float64)])
    jd = jnp.stack([s @ new, c @ new, jnp.zeros(2)])
    hd = jnp.stack([jnp.einsum("i,iab->ab", c, nn), -jnp.einsum("i,iab->ab", s, nn), jnp.zeros((2, 2))])
    return (jnp.zeros((1,)), d[None]), (jnp.zeros((1, 2)), jd[None]), (jnp.zeros((1, 2, 2)), hd[None])


def valley_point(lattice_constant: float = 2.46, valley: int = 1) -> np.ndarray:
    """Undeformed Dirac point K = (4π/(3a), 0) (valley=+1) or K' = −K (valley=−1), 1/Å."""
    if valley not in (1, -1):
        raise ValueError("valley_point: valley must be +1 (K) or -1 (K').")
    return np.array([valley * 4 * np.pi / (3 * lattice_constant), 0.0])


def dirac_point(model: BandModel, valley: int = 1, steps: int = 30) -> jax.Array:
    """The k (1/Å) where the in-plane d-vector vanishes (band touching for Δ = 0, gap minimum
    2|Δ| otherwise) in the given valley (+1: K, −1: K') of a (possibly strained) honeycomb
    model, by ``steps`` Newton iterations started at the first-order estimate
    (1−ε)K + valley·(β/a_cc)((ε_xx−ε_yy)/2, −ε_xy).  Differentiable in the model parameters."""
    if model.name != "honeycomb":
        raise ValueError(f"dirac_point: needs a 'honeycomb' model, got '{model.name}'.")
    if valley not in (1, -1):
        raise ValueError("dirac_point: valley must be +1 (K) or -1 (K').")
    return _newton_dirac(model, valley, int(steps))


@partial(jax.jit, static_argnums=(1, 2))
def _newton_dirac(model, valley, steps):
    p = model.params
    a = dict(model.static)["lattice_constant"]
    acc = a / S3
    eps = strain_of(p)
    k0 = jnp.asarray(valley_point(a, valley))
    shift = (p["beta"] / acc) * jnp.stack([(p["strain_xx"] - p["strain_yy"]) / 2, -p["strain_xy"]])
    start = k0 - eps @ k0 + valley * shift

    def inplane(q):
        return model.dvector(q, p)[1][0, :2]

    def step(_, k):
        return k - jnp.linalg.solve(jax.jacfwd(inplane)(k), inplane(k))

    return jax.lax.fori_loop(0, steps, step, start)


@register("honeycomb", SPEC,
          summary="graphene-like honeycomb lattice, NN hopping, sublattice mass, strain (2D lattice)",
          hamiltonian="[[Δ, −Σ t_i e^{ik·δ_i'}], [h.c., −Δ]], δ_i' = (1+ε)δ_i, t_i = t exp[−β(|δ_i'|/a_cc − 1)]",
          source="common practice (Castro Neto et al., RMP 81, 109, 2009); strain: Pereira, Castro Neto, "
                 "Peres, PRB 80, 045401 (2009)")
def build_honeycomb(p, s) -> BandModel:
    a = pop_lattice_length(p, "lattice_constant", "honeycomb")
    acc = a / S3
    dv = bind_length(dvector, acc)
    h = hamiltonian_of(dv)
    djet = bind_length(dvector_jet, acc)
    bonds = BONDS * acc
    lattice = Lattice(vectors=(tuple(bonds[0] - bonds[1]), tuple(bonds[0] - bonds[2])),
                      positions=((0.0, 0.0), tuple(bonds[0])))
    static = (("degeneracy", s["degeneracy"]), ("lattice_constant", a))
    return BandModel(name="honeycomb", dim=2, hamiltonian=h, params=p, spec=SPEC, domain=lattice,
                     degeneracy=float(s["degeneracy"]), blocks=1, block_size=2, dvector=dv,
                     jet=jet_of(djet), dvector_jet=djet, deformation=deformation_of, static=static,
                     description="honeycomb lattice (graphene-like)", source=SPEC.owner)


def build_strained_honeycomb(magnitude, angle, poisson=0.165, **params) -> BandModel:
    """Honeycomb model under uniaxial strain ``magnitude`` along ``angle`` (rad from x, the zigzag
    direction) with transverse contraction −``poisson``·magnitude (graphite in-plane ν = 0.165,
    Pereira et al. 2009).  The components come from ``crosswind.models.strain.uniaxial``; other
    honeycomb parameters pass through.  Differentiable in ``magnitude``, ``angle``, ``poisson``."""
    given = sorted(set(params) & {"strain_xx", "strain_yy", "strain_xy"})
    if given:
        raise ValueError(f"build_strained_honeycomb: {given} are set from magnitude/angle/poisson; "
                         "use build('honeycomb', strain_xx=..., ...) to give components directly.")
    xx, yy, xy = uniaxial(magnitude, angle, poisson)
    return build("honeycomb", strain_xx=xx, strain_yy=yy, strain_xy=xy, **params)
