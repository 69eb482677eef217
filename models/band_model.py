"""The ``BandModel``: a crystal as a pure JAX function H(k, params).

``hamiltonian(k, params)`` takes one wavevector ``k`` (shape ``(d,)``, 1/Å) and the parameter
pytree and returns a stack of Hermitian blocks, shape ``(S, m, m)`` in eV.  Blocks are sectors
that do not mix (valleys of a continuum model, conserved spin); each block's bands keep their own
Berry geometry, and ``band_geometry`` merges all ``S·m`` bands in ascending energy.

Two-band blocks may also supply ``dvector(k, params) -> (d0, d)`` with shapes ``(S,)`` and
``(S, 3)`` such that H = d0·1 + d·σ; band geometry then uses closed forms instead of ``eigh``.

``deformation(params)`` (optional) returns the d×d matrix (1 + ε) of a homogeneous strain: the
physical lattice vectors are a_i' = (1+ε) a_i and orbital positions τ' = (1+ε) τ.

The model is a pytree whose only leaves are the parameter values, so it can be passed through
``jax.jit``/``jax.grad``; everything else is static metadata.
"""
from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, replace

import jax
import jax.numpy as jnp
import numpy as np

from .domain import Continuum, Lattice
from .params import ParamSpec


@dataclass(frozen=True)
class BandModel:
    name: str
    dim: int
    hamiltonian: Callable
    params: dict
    spec: ParamSpec
    domain: Lattice | Continuum
    degeneracy: float = 1.0
    blocks: int = 1
    block_size: int = 2
    dvector: Callable | None = None
    deformation: Callable | None = None
    static: tuple = ()
    description: str = ""
    source: str = ""
    #: optional ``jet(k, params) -> (H, ∂H, ∂²H)`` with shapes (S, m, m), (S, m, m, d),
    #: (S, m, m, d, d): explicit Bloch sums where the hoppings are known (lattice models); without
    #: it the k-derivatives come from nested ``jax.jacfwd`` of ``hamiltonian``
    jet: Callable | None = None
    #: optional, two-band blocks with a ``dvector``: ``dvector_jet(k, params) -> ((d0, d), (∂d0, ∂d),
    #: (∂²d0, ∂²d))`` with shapes (S,), (S, 3); (S, d), (S, 3, d); (S, d, d), (S, 3, d, d), the
    #: d-vector's k-derivatives written out.  The closed two-band forms then read them directly
    #: instead of splitting the complex blocks of ``jet`` (about a fifth of a lattice point's cost)
    dvector_jet: Callable | None = None

    @property
    def n_bands(self) -> int:
        return self.blocks * self.block_size

    def with_params(self, **values) -> BandModel:
        """A copy with some real parameter values replaced (no range checks: may be traced)."""
        unknown = set(values) - set(self.params)
        if unknown:
            raise ValueError(
                f"{self.name}: cannot set {sorted(unknown)}; real parameters are {sorted(self.params)}."
            )
        new = dict(self.params)
        new.update({k: jnp.asarray(v, dtype=jnp.float64) for k, v in values.items()})
        return replace(self, params=new)

    def static_options(self) -> dict:
        return dict(self.static)

    # --- geometry of the lattice (deformed by strain where the model says so) ---------------
    def strain_matrix(self, params=None):
        p = self.params if params is None else params
        if self.deformation is None:
            return jnp.eye(self.dim)
        return self.deformation(p)

    def lattice_vectors(self, params=None):
        """Rows a_i' (Å) of the (possibly strained) lattice."""
        if not isinstance(self.domain, Lattice):
            raise ValueError(f"{self.name} is a continuum model; it has no lattice vectors.")
        a = jnp.asarray(self.domain.vectors_array())
        return a @ self.strain_matrix(params).T

    def reciprocal_vectors(self, params=None):
        """Rows b_j' (1/Å) with a_i'·b_j' = 2π δ_ij."""
        return 2 * jnp.pi * jnp.linalg.inv(self.lattice_vectors(params)).T

    def orbital_positions(self, params=None):
        if not isinstance(self.domain, Lattice):
            raise ValueError(f"{self.name} is a continuum model; it has no orbital positions.")
        tau = jnp.asarray(np.asarray(self.domain.positions, dtype=float))
        return tau @ self.strain_matrix(params).T

    def H(self, k):
        """Hamiltonian blocks at one k (convenience)."""
        return self.hamiltonian(jnp.asarray(k, dtype=jnp.float64), self.params)


def _flatten(m: BandModel):
    keys = tuple(sorted(m.params))
    children = (tuple(m.params[k] for k in keys),)
    aux = (keys, m.name, m.dim, m.hamiltonian, m.spec, m.domain, m.degeneracy, m.blocks,
           m.block_size, m.dvector, m.deformation, m.static, m.description, m.source, m.jet,
           m.dvector_jet)
    return children, aux


def _unflatten(aux, children):
    (keys, name, dim, ham, spec, domain, deg, blocks, bsize, dvec, deform, static, desc, src, jet, djet) = aux
    params = dict(zip(keys, children[0]))
    return BandModel(name=name, dim=dim, hamiltonian=ham, params=params, spec=spec, domain=domain,
                     degeneracy=deg, blocks=blocks, block_size=bsize, dvector=dvec,
                     deformation=deform, static=static, description=desc, source=src, jet=jet,
                     dvector_jet=djet)


jax.tree_util.register_pytree_node(BandModel, _flatten, _unflatten)
