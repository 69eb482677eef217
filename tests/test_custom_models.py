"""User-defined band models: ``from_function`` and tight-binding definition files."""
from dataclasses import replace

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import crosswind.models.geometry as geometry_module
from crosswind.models import (
    Continuum,
    Lattice,
    Parameter,
    band_geometry,
    build,
    from_function,
    load_tight_binding,
    parse_tight_binding,
)
from crosswind.models.tightbinding import TightBindingFileError, data_file
from crosswind.models.units import ANGSTROM, HBAR_EVS

PAULI_X = jnp.array([[0, 1], [1, 0]], dtype=jnp.complex128)
PAULI_Y = jnp.array([[0, -1j], [1j, 0]], dtype=jnp.complex128)
PAULI_Z = jnp.array([[1, 0], [0, -1]], dtype=jnp.complex128)

DIRAC_PARAMS = {
    "velocity": (5e5, "m/s", "Dirac velocity v", (1.0, 1e8)),
    "mass": (0.1, "eV", "Dirac mass Δ (half the gap)", (-10.0, 10.0)),
}


def dirac_h(k, p):
    """ħv(k_x σ_x + k_y σ_y) + Δ σ_z, one valley (docs/theory.md §3)."""
    hv = (p["velocity"] * (HBAR_EVS / ANGSTROM)).astype(jnp.complex128)
    kx, ky = k.astype(jnp.complex128)
    return hv * (kx * PAULI_X + ky * PAULI_Y) + p["mass"].astype(jnp.complex128) * PAULI_Z


def dirac_model(**values):
    return from_function(dirac_h, parameters=DIRAC_PARAMS, values=values,
                         domain=Continuum(dim=2, scale=0.03), name="user-dirac")


def random_k(n, scale, seed=0):
    return jnp.asarray(np.random.default_rng(seed).normal(size=(n, 2)) * scale)


# ----------------------------------------------------------------------- from_function ------
def test_from_function_reproduces_catalogue_dirac():
    # common practice: the same Hamiltonian through the eigh path (no dvector) and through the
    # catalogue's closed two-band forms must agree (docs/theory.md §2.1 vs §2.3)
    user = dirac_model(mass=0.07, velocity=4e5)
    assert user.dvector is None
    ref = build("massive-dirac", mass=0.07, velocity=4e5)
    k = random_k(16, 0.03)
    g1, g2 = band_geometry(user, k), band_geometry(ref, k)
    np.testing.assert_allclose(g1.energies, g2.energies, rtol=1e-10, atol=1e-13)
    np.testing.assert_allclose(g1.berry_curvature, g2.berry_curvature, rtol=1e-10,
                               atol=1e-10 * float(jnp.max(jnp.abs(g2.berry_curvature))))
    np.testing.assert_allclose(g1.velocities, g2.velocities, rtol=1e-10, atol=1e-4)


def test_from_function_dirac_curvature_closed_form_at_k0():
    # Ω_c(0) = −τ(ħv)²/(2Δ²), τ = +1: Xiao, Yao, Niu, PRL 99, 236809 (2007); docs/theory.md §3
    # (check value 5: −541.554 Å² for v = 5e5 m/s, Δ = 0.1 eV)
    m = dirac_model()
    g = band_geometry(m, jnp.zeros((1, 2)))
    hv = 5e5 * HBAR_EVS / ANGSTROM
    closed = -(hv ** 2) / (2 * 0.1 ** 2)
    np.testing.assert_allclose(g.berry_curvature[0, 1], closed, rtol=1e-10)
    np.testing.assert_allclose(g.berry_curvature[0, 1], -541.554, rtol=1e-5)
    np.testing.assert_allclose(g.berry_curvature[0, 0], -closed, rtol=1e-10)


def test_from_function_gradient_matches_finite_differences():
    # common practice: jax.grad against a central finite difference
    m = dirac_model()
    k = jnp.array([[0.011, -0.007]])

    def curvature(mass):
        return band_geometry(m.with_params(mass=mass), k).berry_curvature[0, 1]

    x, h = 0.1, 1e-6
    g = jax.grad(curvature)(x)
    fd = (curvature(x + h) - curvature(x - h)) / (2 * h)
    assert np.isfinite(g)
    np.testing.assert_allclose(g, fd, rtol=1e-6)


def test_from_function_parameter_objects_and_lattice():
    # one-orbital square lattice, ε(k) = ε0 − 2t(cos k_x a + cos k_y a): common practice
    # (nearest-neighbour tight binding, Ashcroft & Mermin, Solid State Physics, 1976, ch. 10)
    a = 2.5

    def square(k, p):
        e = p["e0"] - 2 * p["t"] * (jnp.cos(k[0] * a) + jnp.cos(k[1] * a))
        return e.astype(jnp.complex128).reshape(1, 1)

    m = from_function(square, parameters=[Parameter("t", "eV", 1.0, "hopping"),
                                          Parameter("e0", "eV", 0.0, "onsite energy")],
                      domain=Lattice(vectors=((a, 0.0), (0.0, a)), positions=((0.0, 0.0),)),
                      values={"t": 0.5})
    k = random_k(8, 1.0, seed=3)
    g = band_geometry(m, k)
    expect = -2 * 0.5 * (np.cos(k[:, 0] * a) + np.cos(k[:, 1] * a))
    np.testing.assert_allclose(g.energies[:, 0], expect, rtol=1e-12, atol=1e-14)
    assert m.blocks == 1 and m.block_size == 1


def test_from_function_same_function_hits_jit_cache():
    def h(k, p):  # fresh function: its first use compiles
        return dirac_h(k, p)

    k = random_k(4, 0.02)
    m1 = from_function(h, parameters=DIRAC_PARAMS, domain=Continuum(dim=2), values={"mass": 0.1})
    band_geometry(m1, k)
    size = geometry_module._batched._cache_size()
    m2 = from_function(h, parameters=DIRAC_PARAMS, domain=Continuum(dim=2), values={"mass": 0.2})
    assert m2.hamiltonian is m1.hamiltonian
    band_geometry(m2, k)
    assert geometry_module._batched._cache_size() == size


def test_from_function_rejects_non_hermitian():
    def bad(k, p):
        return dirac_h(k, p) + jnp.array([[0, 0.3], [0, 0]], dtype=jnp.complex128)

    with pytest.raises(ValueError, match=r"not Hermitian.*H\[j, i\] = conj\(H\[i, j\]\)"):
        from_function(bad, parameters=DIRAC_PARAMS, domain=Continuum(dim=2))


@pytest.mark.parametrize("fn, match", [
    (lambda k, p: jnp.zeros((2, 3), dtype=jnp.complex128), r"square matrix \(m, m\).*got shape \(2, 3\)"),
    (lambda k, p: jnp.zeros((3,), dtype=jnp.complex128), r"got shape \(3,\)"),
    (lambda k, p: jnp.full((2, 2), jnp.nan, dtype=jnp.complex128), r"non-finite"),
    (lambda k, p: dirac_h(k, p) * p["gap"], r"params\['gap'\].*not declared.*mass, velocity"),
    (lambda k, p: jnp.asarray(np.cos(np.asarray(k))[0]).astype(jnp.complex128) * PAULI_Z,
     r"written with jax.numpy"),
])
def test_from_function_build_time_checks(fn, match):
    with pytest.raises(ValueError, match=match):
        from_function(fn, parameters=DIRAC_PARAMS, domain=Continuum(dim=2))


def test_from_function_parameter_validation_like_build():
    with pytest.raises(ValueError, match=r"unknown parameter 'mas'.*Did you mean 'mass'.*velocity, mass"):
        dirac_model(mas=0.1)
    with pytest.raises(ValueError, match=r"'mass' = 20 eV is outside the allowed range \[-10, 10\]"):
        dirac_model(mass=20.0)
    with pytest.raises(ValueError, match=r"\(default, unit, meaning\)"):
        from_function(dirac_h, parameters={"mass": (0.1, "eV")}, domain=Continuum(dim=2))
    with pytest.raises(ValueError, match=r"lists 1 orbital positions but each Hamiltonian block is 2x2"):
        from_function(dirac_h, parameters=DIRAC_PARAMS,
                      domain=Lattice(vectors=((1.0, 0.0), (0.0, 1.0)), positions=((0.0, 0.0),)))


def test_gradient_through_from_function_and_file_loading():
    # jax.grad through the model constructors themselves (values traced); the lowest Dirac
    # energy at k is -sqrt((ħvk)² + Δ²), so d/dΔ = -Δ/E (docs/theory.md §3)
    k = jnp.array([0.004, 0.003])

    def lowest_dirac(mass):
        return jnp.linalg.eigvalsh(dirac_model(mass=mass).H(k)[0])[0]

    hv = 5e5 * HBAR_EVS / ANGSTROM
    e = np.sqrt((hv * 0.005) ** 2 + 0.1 ** 2)
    np.testing.assert_allclose(jax.grad(lowest_dirac)(0.1), -0.1 / e, rtol=1e-10)

    def lowest_file(t):
        return jnp.linalg.eigvalsh(parse_tight_binding(BASE, t=t).H(jnp.array([0.3, 0.0]))[0])[0]

    # two orbitals: onsite 0.1 on A, bond t at +a/2: ε_- = 0.05 - sqrt(0.05² + t²)  (common practice)
    np.testing.assert_allclose(jax.grad(lowest_file)(1.0), -1.0 / np.sqrt(0.05 ** 2 + 1.0), rtol=1e-10)


def test_from_function_dvector_checked_against_hamiltonian():
    def dv_wrong(k, p):
        hv = p["velocity"] * (HBAR_EVS / ANGSTROM)
        return jnp.zeros(1), jnp.stack([hv * k[0], hv * k[1], -p["mass"]])[None]

    with pytest.raises(ValueError, match=r"dvector disagrees with hamiltonian"):
        from_function(dirac_h, parameters=DIRAC_PARAMS, domain=Continuum(dim=2), dvector=dv_wrong)


# ----------------------------------------------------------------------- tight-binding files -
HALDANE_VALUES = dict(t1=1.1, t2=0.07, phi=0.6, mass=0.15)


def haldane_k(n=24, seed=1):
    b = build("haldane").reciprocal_vectors()
    frac = np.random.default_rng(seed).uniform(-1.0, 1.0, size=(n, 2))
    return jnp.asarray(frac @ np.asarray(b))


@pytest.mark.parametrize("closed_form", [True, False])
def test_toml_haldane_equals_catalogue(closed_form):
    # Haldane, PRL 61, 2015 (1988), in the conventions of docs/theory.md §4; the file and
    # the catalogue must give the same convention-I Bloch Hamiltonian (§2.5) point by point.
    tb = load_tight_binding(data_file("haldane.toml"), **HALDANE_VALUES)
    if not closed_form:
        tb = replace(tb, dvector=None)   # force the eigh / sum-over-states path
    ref = build("haldane", **HALDANE_VALUES)
    k = haldane_k()
    g1, g2 = band_geometry(tb, k), band_geometry(ref, k)
    np.testing.assert_allclose(g1.energies, g2.energies, rtol=1e-10, atol=1e-12)
    scale = float(jnp.max(jnp.abs(g2.berry_curvature)))
    np.testing.assert_allclose(g1.berry_curvature, g2.berry_curvature, rtol=1e-10, atol=1e-10 * scale)
    np.testing.assert_allclose(tb.orbital_positions(), ref.orbital_positions(), atol=1e-14)
    np.testing.assert_allclose(tb.lattice_vectors(), ref.lattice_vectors(), atol=1e-14)


def test_toml_parameter_is_differentiable():
    # common practice: jax.grad against a central finite difference (lowest band energy at a
    # generic k, from the file's Hamiltonian; every declared parameter enters model.params)
    tb = load_tight_binding(data_file("haldane.toml"))
    k = haldane_k(1, seed=5)[0]

    @jax.jit
    def lowest(params):
        return jnp.linalg.eigvalsh(tb.hamiltonian(k, params)[0])[0]

    point = {"t1": 1.0, "t2": 0.1, "phi": 0.7, "mass": 0.05}
    params = {n: jnp.float64(v) for n, v in point.items()}
    grad = jax.grad(lowest)(params)
    assert set(grad) == set(tb.params)
    h = 1e-6
    for name in point:
        up = lowest({**params, name: params[name] + h})
        down = lowest({**params, name: params[name] - h})
        assert np.isfinite(grad[name]) and abs(grad[name]) > 1e-3
        np.testing.assert_allclose(grad[name], (up - down) / (2 * h), rtol=1e-7)


@pytest.mark.slow
def test_toml_parameter_gradient_through_band_geometry():
    # common practice: jax.grad against a central finite difference, through both geometry paths
    tb = load_tight_binding(data_file("haldane.toml"))
    k = haldane_k(1, seed=5)
    for model in (tb, replace(tb, dvector=None)):
        def f(t2, model=model):
            g = band_geometry(model.with_params(t2=t2), k)
            return g.energies[0, 0] + 1e-2 * g.berry_curvature[0, 0]

        x, h = 0.1, 1e-6
        grad = jax.grad(f)(x)
        fd = (f(x + h) - f(x - h)) / (2 * h)
        assert np.isfinite(grad)
        np.testing.assert_allclose(grad, fd, rtol=1e-6)


def test_toml_same_definition_shares_hamiltonian_and_cache():
    m1 = load_tight_binding(data_file("haldane.toml"))
    m2 = load_tight_binding(data_file("haldane.toml"), mass=0.3)
    assert m1.hamiltonian is m2.hamiltonian and m1.dvector is m2.dvector
    k = haldane_k()
    band_geometry(m1, k)
    size = geometry_module._batched._cache_size()
    band_geometry(m2, k)
    assert geometry_module._batched._cache_size() == size


CUBIC = """
[model]
name = "cubic"
dimension = 3

[lattice]
vectors = [[2.0, 0.0, 0.0], [0.0, 2.0, 0.0], [0.0, 0.0, 2.0]]

[parameters.t]
default = 0.5
unit = "eV"
meaning = "nearest-neighbour hopping"

[parameters.theta]
default = 0.3
unit = "rad"
meaning = "phase of the z hop"

[[orbital]]
label = "s"
position = [0.0, 0.0, 0.0]
onsite = 0.25

[[hop]]
from = "s"
to = "s"
cell = [1, 0, 0]
amplitude = { scale = -1.0, parameter = "t" }

[[hop]]
from = "s"
to = "s"
cell = [0, 1, 0]
amplitude = [-0.2, 0.1]

[[hop]]
from = "s"
to = "s"
cell = [0, 0, 1]
amplitude = { scale = [0.0, 2.0], parameter = "t", phase = "theta", phase_scale = -2.0 }
"""


def test_toml_amplitude_forms_3d():
    # one orbital: ε(k) = ε0 + Σ_h 2 Re[A_h e^{i k·R_h}] (common practice, Bloch sum with the
    # Hermitian conjugate hop); checks every amplitude form of the schema
    m = parse_tight_binding(CUBIC, source="cubic.toml")
    assert m.dim == 3 and m.n_bands == 1
    k = jnp.asarray(np.random.default_rng(2).normal(size=(6, 3)))
    e = band_geometry(m, k).energies[:, 0]
    kn = np.asarray(k) * 2.0
    amps = [-0.5, -0.2 + 0.1j, 2j * 0.5 * np.exp(-2j * 0.3)]
    expect = 0.25 + sum(2 * np.real(A * np.exp(1j * kn[:, i])) for i, A in enumerate(amps))
    np.testing.assert_allclose(e, expect, rtol=1e-12, atol=1e-14)


BASE = """
[model]
name = "pair"
dimension = 2

[lattice]
vectors = [[1.0, 0.0], [0.0, 1.0]]

[parameters.t]
default = 1.0
unit = "eV"
meaning = "hopping"
range = [-5.0, 5.0]

[[orbital]]
label = "A"
position = [0.0, 0.0]
onsite = 0.1

[[orbital]]
label = "B"
position = [0.5, 0.0]

[[hop]]
from = "A"
to = "B"
cell = [0, 0]
amplitude = "t"
"""


def test_base_file_is_valid():
    m = parse_tight_binding(BASE)
    assert m.n_bands == 2 and set(m.params) == {"t"}


BAD_FILES = [
    # (replace this, with this, expected message after "<file>: ")
    ('amplitude = "t"', 'amplitud = "t"',
     r"table \[\[hop\]\] #1, key 'amplitud': unknown key\. Did you mean 'amplitude'\?.*Allowed keys: from, to, cell, amplitude"),
    ('unit = "eV"\n', '',
     r"table \[parameters\.t\], key 'unit': missing required key\. Required keys: default, unit, meaning"),
    ('dimension = 2', 'dimension = "2"',
     r"table \[model\], key 'dimension': must be the integer 2 or 3, got '2'"),
    ('to = "B"', 'to = "C"',
     r"table \[\[hop\]\] #1, key 'to': orbital 'C' does not exist\..*Orbital labels: A, B"),
    ('amplitude = "t"', 'amplitude = "tt"',
     r"table \[\[hop\]\] #1, key 'amplitude': parameter 'tt' is not declared\. Did you mean 't'\?.*\[parameters\.tt\]"),
    ('cell = [0, 0]', 'cell = [0.5, 0]',
     r"table \[\[hop\]\] #1, key 'cell': must be an array of 2 integers"),
    ('position = [0.5, 0.0]', 'position = [0.5, 0.0, 0.0]',
     r"table \[\[orbital\]\] #2, key 'position': must be an array of 2 numbers in Å"),
    ('vectors = [[1.0, 0.0], [0.0, 1.0]]', 'vectors = [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0]]',
     r"table \[lattice\], key 'vectors\[0\]': must be an array of 2 numbers"),
    ('[[hop]]', '[[hops]]',
     r"table \(top level\), key 'hops': unknown table\. Did you mean 'hop'\?"),
    ('onsite = 0.1', 'onsite = { parameter = "t", phase = "t" }',
     r"table \[\[orbital\]\] #1, key 'onsite\.phase': unknown key\..*onsite energy is real"),
    ('amplitude = "t"', 'amplitude = { scal = 2.0, parameter = "t" }',
     r"table \[\[hop\]\] #1, key 'amplitude\.scal': unknown key\. Did you mean 'scale'\?"),
    ('range = [-5.0, 5.0]', 'range = [2.0, 5.0]',
     r"table \[parameters\.t\], key 'default': 1 is outside range \[2, 5\]"),
    ('name = "pair"', 'name = "pair"\nlabel = "x"',
     r"table \[model\], key 'label': unknown key\."),
    ('amplitude = "t"', 'amplitude = true',
     r"table \[\[hop\]\] #1, key 'amplitude': invalid value True\. Allowed: a number, \[re, im\]"),
    ('to = "B"', 'to = "A"',
     r"table \[\[hop\]\] #1, key 'cell': a hop from 'A' to itself in its own cell is an onsite energy"),
    ('label = "B"', 'label = "A"',
     r"table \[\[orbital\]\] #2, key 'label': 'A' is already used by orbital #1"),
]


@pytest.mark.parametrize("old, new, match", BAD_FILES)
def test_bad_files_name_file_table_and_key(tmp_path, old, new, match):
    assert old in BASE
    path = tmp_path / "bad.toml"
    path.write_text(BASE.replace(old, new, 1), encoding="utf-8")
    with pytest.raises(TightBindingFileError, match="^" + __import__("re").escape(str(path)) + ": " + match):
        load_tight_binding(path)


def test_reverse_hop_rejected():
    text = BASE + '\n[[hop]]\nfrom = "B"\nto = "A"\ncell = [0, 0]\namplitude = "t"\n'
    with pytest.raises(TightBindingFileError,
                       match=r"^x\.toml: table \[\[hop\]\] #2, key 'cell': this hop is the reverse of hop #1; "
                             r"the Hermitian conjugate is added automatically"):
        parse_tight_binding(text, source="x.toml")
    # a different cell is a different bond and is allowed
    ok = BASE + '\n[[hop]]\nfrom = "B"\nto = "A"\ncell = [1, 0]\namplitude = "t"\n'
    m = parse_tight_binding(ok)
    # two bonds of strength t at ±a/2: ε = ±|2t cos(k_x a/2)| + onsite shifts (common practice)
    h = np.asarray(m.H(jnp.array([0.3, 0.0])))[0]
    np.testing.assert_allclose(h[0, 1], 2 * np.cos(0.15), rtol=1e-13)


def test_bad_toml_syntax_and_values():
    with pytest.raises(TightBindingFileError, match=r"^s\.toml: not valid TOML"):
        parse_tight_binding("[model\nname = 1", source="s.toml")
    with pytest.raises(ValueError, match=r"unknown parameter 'tt'.*Did you mean 't'.*Valid parameters: t"):
        parse_tight_binding(BASE, tt=1.0)
    with pytest.raises(ValueError, match=r"'t' = 9 eV is outside the allowed range \[-5, 5\]"):
        parse_tight_binding(BASE, t=9.0)
    with pytest.raises(TightBindingFileError, match=r"missing\.toml: tight-binding file not found"):
        load_tight_binding("missing.toml")


def _docs_example() -> str:
    import re
    from pathlib import Path
    text = (Path(__file__).resolve().parents[1] / "docs" / "tight-binding-files.md").read_text(encoding="utf-8")
    return re.search(r"```toml\n(.*?)```", text, re.S).group(1)


def test_docs_example_is_the_square_chern_model():
    # Qi, Wu, Zhang, PRB 74, 085308 (2006): H = A sin(k_x a)σ_x + A sin(k_y a)σ_y
    # + [m + 2B(cos k_x a + cos k_y a)]σ_z; the documented file must equal this Bloch Hamiltonian
    # (energies and Berry curvature, the file's closed two-band path against the eigh path)
    doc = parse_tight_binding(_docs_example(), source="docs example", m=1.3, B=-0.4)
    shipped = load_tight_binding(data_file("square_chern.toml"))
    assert shipped.hamiltonian is doc.hamiltonian    # same definition, same cached function
    a = 3.0

    def qwz(k, p):
        sx, sy = jnp.sin(k[0] * a), jnp.sin(k[1] * a)
        dz = p["m"] + 2 * p["B"] * (jnp.cos(k[0] * a) + jnp.cos(k[1] * a))
        c = lambda x: x.astype(jnp.complex128)
        return c(p["A"] * sx) * PAULI_X + c(p["A"] * sy) * PAULI_Y + c(dz) * PAULI_Z

    ref = from_function(qwz, parameters=[Parameter("A", "eV", 1.0, "sin hopping"),
                                         Parameter("B", "eV", -0.5, "cos hopping"),
                                         Parameter("m", "eV", 1.0, "mass")],
                        values={"m": 1.3, "B": -0.4}, domain=doc.domain)
    k = jnp.asarray(np.random.default_rng(4).uniform(-np.pi / a, np.pi / a, size=(12, 2)))
    g1, g2 = band_geometry(doc, k), band_geometry(ref, k)
    np.testing.assert_allclose(g1.energies, g2.energies, rtol=1e-10, atol=1e-12)
    scale = float(jnp.max(jnp.abs(g2.berry_curvature)))
    np.testing.assert_allclose(g1.berry_curvature, g2.berry_curvature, rtol=1e-10, atol=1e-10 * scale)
