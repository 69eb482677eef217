"""Explicit Bloch-sum derivatives of lattice Hamiltonians (BandModel.jet) against automatic
differentiation of the same Hamiltonian (jax.jacfwd), and band geometry through either route."""
import importlib.resources as ir

import jax
import jax.numpy as jnp
import numpy as np

from crosswind.models import build, load_tight_binding
from crosswind.models.geometry import geometry_at

K = jnp.asarray([[0.31, -0.17], [1.12, 0.44], [-0.73, 0.95]])


def _check_jet(model):
    for k in K:
        h, dh, d2h = model.jet(k, model.params)
        np.testing.assert_allclose(h, model.hamiltonian(k, model.params), atol=1e-13)
        np.testing.assert_allclose(dh, jax.jacfwd(model.hamiltonian)(k, model.params), atol=1e-12)
        np.testing.assert_allclose(d2h, jax.jacfwd(jax.jacfwd(model.hamiltonian))(k, model.params),
                                   atol=1e-11)


def test_strained_tmd_lattice_jet_equals_autodiff():
    _check_jet(build("tmd-lattice", strain_xx=0.01, strain_xy=0.004))


def test_tight_binding_file_jet_equals_autodiff():
    path = ir.files("crosswind.models").joinpath("data/haldane.toml")
    _check_jet(load_tight_binding(str(path)))


def test_geometry_is_the_same_through_either_route():
    from dataclasses import replace
    model = build("tmd-lattice", strain_xx=0.01)
    plain = replace(model, jet=None)
    for k in K:
        for a, b in zip(geometry_at(model, k), geometry_at(plain, k)):
            np.testing.assert_allclose(a, b, rtol=1e-9, atol=1e-9)


def test_strained_honeycomb_jet_equals_autodiff():
    _check_jet(build("honeycomb", staggered=0.2, strain_xx=0.01, strain_xy=-0.004))


def test_haldane_jet_equals_autodiff():
    _check_jet(build("haldane", t2=0.12, phi=0.7, mass=0.1))


def test_two_band_geometry_is_the_same_with_the_jet_or_nested_autodiff():
    """Closed two-band forms fed by the explicit Bloch sums (d-vector from the blocks' jet) or by
    nested jax.jacfwd of the d-vector: the same band geometry."""
    from dataclasses import replace
    path = ir.files("crosswind.models").joinpath("data/haldane.toml")
    for model in (build("honeycomb", staggered=0.2, strain_xx=0.01),
                  build("haldane", t2=0.12, phi=0.7, mass=0.1), load_tight_binding(str(path))):
        assert model.dvector is not None and model.jet is not None
        plain = replace(model, jet=None, dvector_jet=None)
        for k in K:
            for a, b in zip(geometry_at(model, k), geometry_at(plain, k)):
                np.testing.assert_allclose(a, b, rtol=1e-10, atol=1e-12)


def test_two_band_touching_needs_no_group_average():
    """At an exact touching of a closed two-band block (gapless honeycomb at K) every quantity is
    already equal for both bands, so skipping the group average changes nothing."""
    from crosswind.models.builtin.honeycomb import dirac_point
    from crosswind.models.eigh import DEGENERACY_TOL
    from crosswind.models.geometry import _blocks_dvector, _group_mean
    model = build("honeycomb", staggered=0.0)
    k = dirac_point(model)
    w, *rest = _blocks_dvector(model, k, model.params, DEGENERACY_TOL)
    assert float(jnp.abs(w[0, 1] - w[0, 0])) <= DEGENERACY_TOL
    for x in rest:
        np.testing.assert_array_equal(np.asarray(_group_mean(w, x, DEGENERACY_TOL)), np.asarray(x))


def test_weyl_lattice_jet_equals_autodiff():
    # 3D: the tilted Weyl pair's written-out derivatives against nested jax.jacfwd, and the band
    # geometry through either route
    from dataclasses import replace
    model = build("weyl", tilt=0.3, node_position=0.3, mass=0.8)
    plain = replace(model, jet=None, dvector_jet=None)
    for k in jnp.asarray([[0.31, -0.17, 0.52], [1.12, 0.44, -0.9], [-0.73, 0.95, 0.05]]):
        h, dh, d2h = model.jet(k, model.params)
        np.testing.assert_allclose(h, model.hamiltonian(k, model.params), atol=1e-13)
        np.testing.assert_allclose(dh, jax.jacfwd(model.hamiltonian, holomorphic=False)(k, model.params),
                                   atol=1e-12)
        np.testing.assert_allclose(d2h, jax.jacfwd(jax.jacfwd(model.hamiltonian))(k, model.params),
                                   atol=1e-11)
        for a, b in zip(geometry_at(model, k), geometry_at(plain, k)):
            np.testing.assert_allclose(a, b, rtol=1e-10, atol=1e-12)


def test_written_out_dvector_jets_equal_autodiff_of_the_dvector():
    """BandModel.dvector_jet of the two-band lattice models against nested jax.jacfwd of their
    d-vector, and the band geometry with the d-vector jet, with the blocks' jet only, and with
    neither: the same."""
    from dataclasses import replace
    cases = ((build("honeycomb", staggered=0.2, strain_xx=0.01, strain_xy=-0.004), K),
             (build("haldane", t2=0.12, phi=0.7, mass=0.1), K),
             (build("weyl", tilt=0.3, node_position=0.3, mass=0.8),
              jnp.asarray([[0.31, -0.17, 0.52], [1.12, 0.44, -0.9], [-0.73, 0.95, 0.05]])))
    for model, ks in cases:
        assert model.dvector_jet is not None
        blocks_only = replace(model, dvector_jet=None)
        plain = replace(model, jet=None, dvector_jet=None)
        for k in ks:
            (d0, d), (jd0, jd), (hd0, hd) = model.dvector_jet(k, model.params)
            r0, r = model.dvector(k, model.params)
            j0, j = jax.jacfwd(model.dvector)(k, model.params)
            h0, h = jax.jacfwd(jax.jacfwd(model.dvector))(k, model.params)
            for a, b, tol in ((d0, r0, 1e-13), (d, r, 1e-13), (jd0, j0, 1e-12), (jd, j, 1e-12),
                              (hd0, h0, 1e-11), (hd, h, 1e-11)):
                assert a.shape == b.shape
                np.testing.assert_allclose(a, b, atol=tol)
            for a, b, c in zip(geometry_at(model, k), geometry_at(blocks_only, k), geometry_at(plain, k)):
                np.testing.assert_allclose(a, b, rtol=1e-10, atol=1e-12)
                np.testing.assert_allclose(a, c, rtol=1e-10, atol=1e-12)
