"""The one vocabulary: every knob, axis and result field, its name, unit, meaning and valid range.

A *knob* is a number of a scenario that a sweep may step through, a sensitivity may differentiate
by and a fit may adjust.  Each knob has exactly one user-visible name — the key in the scenario
file, the dimension of the results dataset, the column of ``results.csv`` and of a measured-data
file, the name in ``[sensitivities]`` and ``[fit]`` — and the name carries its unit
(``temperature_K``, ``gate_V``).  :data:`KNOBS` lists them with the scenario table that holds them,
the keyword of the engine API that receives them (``response(mu=…, temperature=…, tau=…)``), the
unit, a long name (dataset ``long_name`` attribute, figure labels, summary) and the valid range
checked when a scenario is loaded.

Result fields (:data:`FIELDS`) are the arrays a sweep writes: response tensors in SI units
(docs/theory.md §0.1 lists the conventions), Hall-bar readings and bookkeeping.  Model parameters
are knobs too; their units come from the model's own parameter table
(:class:`crosswind.models.params.ParamSpec`), so they are not repeated here.

Every other module reads units and names from here: nothing else defines them
(tests/test_vocabulary.py checks the dataset, the CSV, the knob checks and the fit columns).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

INF = math.inf


@dataclass(frozen=True)
class Knob:
    """One knob: ``name`` (scenario key = dataset dimension = fit and CSV column), the scenario
    ``table`` it lives in, ``unit``, ``long_name``, the engine keyword ``api`` that takes it (None if
    it only enters the application layer) and its valid closed range [``low``, ``high``] (``positive``
    excludes 0)."""

    name: str
    table: str
    unit: str
    long_name: str
    api: str | None = None
    low: float = -INF
    high: float = INF
    positive: bool = False
    key: str | None = None
    #: plausibility, checked when a scenario loads (inside the valid range): a value outside
    #: [refuse_low, refuse_high] is refused as physically impossible, one outside [warn_low,
    #: warn_high] loads with a warning; ``why`` says where the numbers come from (with a source)
    refuse_low: float = -INF
    refuse_high: float = INF
    warn_low: float = -INF
    warn_high: float = INF
    why: str = ""
    #: likely unit slips: ((factor, unit typed), ...) — the value was typed in ``unit typed`` and
    #: means value × factor in this knob's unit (110 typed for meV in ``mu_eV``: 0.110 eV)
    slips: tuple = ()

    @property
    def scenario_key(self) -> str:
        """Dotted path in the scenario file, e.g. ``conditions.temperature_K`` (``key`` when the
        file's key differs from the knob name: the strain magnitude)."""
        return f"{self.table}.{self.key or self.name}"

    def check(self, value: float) -> str | None:
        """None if ``value`` is allowed, else what is wrong with it (for the caller's error)."""
        if not math.isfinite(value):
            return f"must be a finite number, got {value!r}"
        if self.positive and value <= 0:
            return f"must be > 0, got {value:g}"
        if not self.low <= value <= self.high:
            return f"must lie in [{self.low:g}, {self.high:g}] {self.unit}, got {value:g}"
        return None

    def slip_hint(self, value: float, low: float | None = None, high: float | None = None) -> str:
        """" Did you mean 0.11 eV (110 meV)?" when ``value`` read in one of the knob's likely wrong
        units lands in the plausible range [``low``, ``high``] (default: the warning range), else ""."""
        low = self.warn_low if low is None else low
        high = self.warn_high if high is None else high
        for factor, typed in self.slips:
            v = value * factor
            if low <= v <= high and v != value:
                return f" Did you mean {v:.4g} {self.unit} ({value:g} {typed})?"
        return ""


def _k(*args, **kw) -> Knob:
    return Knob(*args, **kw)


# ----------------------------------------------------------------------------- plausibility ---
# Ranges a scenario's conditions are checked against when it loads (study/scenario.py): outside the
# refuse range a value is physically impossible (most often a unit slip) and the scenario is refused
# naming the likely slip; outside the warning range it loads with a warning.

#: relaxation times (fs): refuse outside [1, 1e6], warn outside [10, 1e5]
_TAU = dict(refuse_low=1.0, refuse_high=1e6, warn_low=10.0, warn_high=1e5, slips=((1e3, "ps"), (1e15, "s")), why=(
    "the level broadening ħ/τ is 0.66 eV at 1 fs and 66 meV at 10 fs, beyond the Boltzmann picture that needs it "
    "well below the Fermi energy (Ashcroft & Mermin, Solid State Physics (1976), ch. 16), and beyond 1e5 fs the "
    "mean free path passes 10 μm at 1e5 m/s: ballistic, not diffusive, in a micrometre Hall bar (common practice)"))

#: sheet densities (cm^-2): refuse |n| > 1e15, warn |n| > 1e14
_DENSITY = dict(refuse_low=-1e15, refuse_high=1e15, warn_low=-1e14, warn_high=1e14, slips=((1e-4, "m^-2"),), why=(
    "1e15 cm^-2 is about one carrier per unit cell of a 2D crystal (1.1e15 cells/cm^2 in MoS2, 1.9e15 in "
    "graphene); solid gate dielectrics reach about 2e13 cm^-2 at breakdown and ionic-liquid gating about "
    "4e14 cm^-2 (Efetov & Kim, PRL 105, 256805 (2010))"))

#: temperatures (K): refuse above 4000, warn above 1000
_TEMPERATURE = dict(refuse_high=4000.0, warn_high=1000.0, why=(
    "no 2D crystal survives above about 3900 K, where graphite sublimes (CRC Handbook of Chemistry and "
    "Physics), and transport devices are measured from millikelvin to a few hundred kelvin (common practice)"))

#: gate field |V − V0|/d across the dielectric (V/nm): refuse above, warn above; SiO2 breaks down near
#: 1 V/nm (Sze & Ng, Physics of Semiconductor Devices, 3rd ed. (2007)), hBN near 1.2 V/nm (Hattori et
#: al., ACS Nano 9, 916 (2015))
GATE_FIELD_REFUSE_V_PER_NM = 2.0
GATE_FIELD_WARN_V_PER_NM = 0.5
GATE_FIELD_UNIT = "V/nm"
GATE_FIELD_SOURCE = ("SiO2 breaks down near 1 V/nm (Sze & Ng, Physics of Semiconductor Devices, 3rd ed. "
                     "(2007)), hBN near 1.2 V/nm (Hattori et al., ACS Nano 9, 916 (2015))")

#: validity window of a continuum (k·p) model: the energies its bands reach within |k| ≤ 1/a of the
#: valley centre (|k|a ≤ 1; a = the model's lattice_constant, else KP_DEFAULT_LATTICE_A; never less
#: than the model's own curvature scale), and beyond any Brillouin zone: |k| > KP_K_MAX, the
#: zone-corner distance 4π/(3a) of graphene (a = 2.46 Å, the smallest lattice constant of the
#: common 2D crystals; Castro Neto et al., RMP 81, 109 (2009))
KP_DEFAULT_LATTICE_A = 3.2
KP_K_MAX = 4 * math.pi / (3 * 2.46)
K_UNIT = "1/Å"
#: chemical-potential slips: meV typed into an eV key
MU_SLIPS = ((1e-3, "meV"),)


#: every knob of the scenario schema, by name (model parameters come from the model)
KNOBS: dict[str, Knob] = {k.name: k for k in (
    _k("strain", "material.strain", "1", "uniaxial strain magnitude", None, key="magnitude"),
    _k("temperature_K", "conditions", "K", "temperature", "temperature", 0.0, **_TEMPERATURE),
    _k("tau_fs", "conditions", "fs", "relaxation time", "tau", positive=True, **_TAU),
    _k("tau0_fs", "conditions.scattering", "fs", "relaxation time prefactor τ0", "tau", positive=True, **_TAU),
    _k("exponent", "conditions.scattering", "1", "power r of τ = τ0(|ε−ε_ref|/ε_s)^r", "tau", -10.0, 10.0),
    _k("reference_energy_eV", "conditions.scattering", "eV", "reference energy ε_ref", "tau"),
    _k("energy_scale_eV", "conditions.scattering", "eV", "energy scale ε_s", "tau", positive=True),
    _k("tau_impurity_fs", "conditions.scattering", "fs", "impurity relaxation time", "tau", positive=True, **_TAU),
    _k("tau_phonon_fs", "conditions.scattering", "fs", "phonon relaxation time at the reference T", "tau",
       positive=True, **_TAU),
    _k("reference_temperature_K", "conditions.scattering", "K", "reference temperature of the phonon rate",
       "tau", positive=True),
    _k("gate_V", "conditions", "V", "gate voltage", None),
    _k("density_cm2", "conditions", "cm^-2", "carrier density (electrons > 0)", "density", **_DENSITY),
    _k("mu_eV", "conditions", "eV", "chemical potential", "mu", slips=MU_SLIPS),
    _k("current_angle_deg", "conditions", "deg", "current direction from the crystal x axis", "angle"),
    _k("gate_offset_V", "device", "V", "gate voltage of charge neutrality", None),
    _k("current_uA", "device", "uA", "drive current amplitude I0", None, positive=True),
    # device design (crosswind design; docs/design.md): knobs outside the k-space chain
    _k("width_um", "device", "um", "bar width W", None, positive=True),
    _k("strain_angle_deg", "material.strain", "deg", "uniaxial strain axis from the crystal x axis", None,
       key="angle_deg"),
    # measurement and thermal settings of [device] (engine/noise.py, docs/theory.md §15)
    _k("probe_width_um", "device", "um", "width of the transverse probe arms", None, positive=True),
    _k("probe_misalignment", "device", "1", "offset of the transverse probes along the bar, fraction of W", None,
       0.0, 1.0),
    _k("thermal_asymmetry", "device", "1", "fraction of the temperature rise across the transverse probes", None,
       0.0, 1.0),
    _k("amplifier_noise_nV_rtHz", "device", "nV Hz^-1/2", "preamplifier input voltage noise density", None, 0.0),
    _k("time_constant_ms", "device", "ms", "lock-in time constant", None, positive=True),
    _k("filter_slope_dB_oct", "device", "dB/oct", "lock-in filter slope (6, 12, 18 or 24)", None, 6.0, 24.0),
    _k("averaging_limit_min", "device", "min", "longest averaging time considered (marginal verdict)", None,
       positive=True),
    _k("thickness_nm", "device", "nm", "film thickness of a 3D model (sheet = bulk × thickness, docs/theory.md "
       "§16.5)", None, positive=True),
    _k("substrate_um", "device", "um", "substrate thickness (back face at the bath temperature)", None,
       positive=True),
    _k("substrate_conductivity_W_mK", "device", "W m^-1 K^-1", "substrate thermal conductivity", None,
       positive=True),
    _k("dielectric_conductivity_W_mK", "device", "W m^-1 K^-1", "gate dielectric thermal conductivity", None,
       positive=True),
    # limits of [design.limits] (constraints of the device design)
    _k("max_current_density_A_m", "design.limits", "A m^-1", "largest sheet current density I0/W", None,
       positive=True, key="current_density_A_m"),
    _k("max_power_density_W_m2", "design.limits", "W m^-2", "largest Joule power per area", None,
       positive=True, key="power_density_W_m2"),
    _k("max_temperature_rise_K", "design.limits", "K", "largest channel temperature rise", None,
       positive=True, key="temperature_rise_K"),
    _k("max_gate_field_V_nm", "design.limits", "V nm^-1", "largest field in the gate dielectric", None,
       positive=True, key="gate_field_V_nm"),
    _k("max_strain", "design.limits", "1", "largest uniaxial strain magnitude", None, positive=True,
       key="strain"),
)}

#: the carrier knobs: a scenario gives exactly one
CARRIERS = ("gate_V", "density_cm2", "mu_eV")

#: relaxation-time knobs of each scattering kind (docs/scenario-files.md, [conditions.scattering]; the
#: classes in solver/engine/scattering.py), in the order of the constructor
SCATTERING = {"constant": ("tau_fs",),
              "power-law": ("tau0_fs", "exponent", "reference_energy_eV", "energy_scale_eV"),
              "matthiessen": ("tau_impurity_fs", "tau_phonon_fs", "reference_temperature_K")}
SCATTERING_DEFAULTS = {"power-law": {"exponent": 0.0, "reference_energy_eV": 0.0, "energy_scale_eV": 0.1},
                       "matthiessen": {"reference_temperature_K": 300.0}}


@dataclass(frozen=True)
class Field:
    """One result field: unit in 2D and 3D (SI) and its long name."""

    name: str
    unit_2d: str
    unit_3d: str
    long_name: str

    def unit(self, dim: int = 2) -> str:
        return self.unit_2d if dim == 2 else self.unit_3d


def _f(name, unit_2d, unit_3d, long_name) -> Field:
    return Field(name, unit_2d, unit_3d, long_name)


_CHI2, _CHI3 = "A m V^-2", "A V^-2"
#: response fields of the engine (SI, sheet quantities in 2D, bulk in 3D)
RESPONSE_FIELDS: dict[str, Field] = {f.name: f for f in (
    _f("density", "m^-2", "m^-3", "carrier density relative to neutrality"),
    _f("dos", "J^-1 m^-2", "J^-1 m^-3", "density of states at μ"),
    _f("mu", "eV", "eV", "chemical potential"),
    _f("sigma", "S", "S m^-1", "sheet conductivity (crystal frame)"),
    _f("sigma_drude", "S", "S m^-1", "Drude part of sigma"),
    _f("sigma_anomalous", "S", "S m^-1", "intrinsic anomalous (Berry-curvature) part of sigma"),
    _f("dipole", "m", "1", "Berry-curvature dipole (z curvature)"),
    _f("dipole_sea", "m", "1", "Berry-curvature dipole, Fermi-sea form"),
    _f("chi", _CHI2, _CHI3, "second-harmonic coefficient (crystal frame)"),
    _f("chi_dc", _CHI2, _CHI3, "rectified coefficient (crystal frame)"),
    _f("chi_dc_full", _CHI2, _CHI3, "rectified coefficient, not symmetrised in its field indices (crystal frame)"),
    _f("chi_circular", _CHI2, _CHI3, "helicity-odd rectified current per Stokes S3 (circular photogalvanic)"),
    _f("chi_dipole", _CHI2, _CHI3, "dipole part of chi"),
    _f("chi_drude", _CHI2, _CHI3, "nonlinear Drude part of chi"),
    _f("chi_intrinsic", _CHI2, _CHI3, "intrinsic (connection polarizability) part of chi"),
    _f("sigma_lorentz", "S T^-1", "S m^-1 T^-1", "Lorentz-force (ordinary Hall) conductivity per tesla"),
    _f("hall_coefficient", "Ohm T^-1", "m^3 C^-1", "ordinary Hall coefficient"),
    _f("seebeck", "V K^-1", "V K^-1", "Seebeck tensor"),
    _f("thermal_conductivity", "W K^-1", "W K^-1 m^-1", "electronic thermal conductivity"),
    _f("lorenz", "W Ohm K^-2", "W Ohm K^-2", "Lorenz ratio"),
    _f("nernst", "A K^-1", "A K^-1 m^-1", "thermoelectric (Nernst) conductivity"),
)}

#: Hall-bar readings (docs/theory.md §10; 2D devices)
DEVICE_FIELDS: dict[str, Field] = {f.name: f for f in (
    _f("field_x", "V m^-1", "V m^-1", "longitudinal field phasor at omega (cosine drive)"),
    _f("field_y", "V m^-1", "V m^-1", "transverse field phasor at omega"),
    _f("v_xx", "V", "V", "longitudinal voltage phasor at omega over length L"),
    _f("v_hall", "V", "V", "transverse voltage phasor at omega"),
    _f("v2w_x", "V", "V", "longitudinal 2omega voltage phasor (cosine drive)"),
    _f("v2w_y", "V", "V", "transverse 2omega voltage phasor (cosine drive)"),
    _f("v2w_y_amplitude", "V", "V", "transverse 2omega voltage amplitude"),
    _f("v2w_y_rms", "V", "V", "transverse 2omega voltage, lock-in rms"),
    _f("v2w_y_phase_deg", "deg", "deg", "lock-in phase of the transverse 2omega voltage vs sin(2 omega t), sine drive"),
    _f("v2w_y_lockin_x_rms", "V", "V", "lock-in X (in phase with sin 2 omega t), rms"),
    _f("v2w_y_lockin_y_rms", "V", "V", "lock-in Y (quadrature), rms"),
    _f("v2w_x_amplitude", "V", "V", "longitudinal 2omega voltage amplitude"),
    _f("v2w_x_rms", "V", "V", "longitudinal 2omega voltage rms"),
    _f("vdc_x", "V", "V", "rectified longitudinal voltage"),
    _f("vdc_y", "V", "V", "rectified transverse voltage"),
    # polarised field drive ([drive]; docs/theory.md §5.9): rectified current and open-circuit voltages
    _f("photo_current_x", "A m^-1", "A m^-1", "rectified sheet current along the bar under the [drive] field"),
    _f("photo_current_y", "A m^-1", "A m^-1", "rectified sheet current across the bar under the [drive] field"),
    _f("photo_vdc_x", "V", "V", "rectified longitudinal voltage under the [drive] field"),
    _f("photo_vdc_y", "V", "V", "rectified transverse voltage under the [drive] field"),
    _f("photo_vdc_helicity_x", "V", "V", "helicity-odd part of photo_vdc_x, (V(E) - V(E*))/2"),
    _f("photo_vdc_helicity_y", "V", "V", "helicity-odd part of photo_vdc_y, (V(E) - V(E*))/2"),
    _f("hall_angle", "1", "1", "Hall angle tangent Re sigma'_xy / Re sigma'_xx"),
    _f("nonlinear_ratio", "m V^-1", "m V^-1", "E_perp / E_par^2 = Re chi'_yxx / Re sigma'_yy"),
    _f("current_density", "A m^-1", "A m^-1", "sheet current density amplitude I0/W"),
    _f("power_density", "W m^-2", "W m^-2", "time-averaged Joule power per area"),
    _f("sigma_bar", "S", "S", "sheet conductivity in the bar frame (x' along the current)"),
    _f("chi_bar", _CHI2, _CHI2, "second-harmonic coefficient in the bar frame"),
    # measurability (engine/noise.py, docs/theory.md §15)
    _f("resistance_xx", "Ohm", "Ohm", "resistance seen by the longitudinal probe pair, Re rho'_xx L/W"),
    _f("resistance_y", "Ohm", "Ohm", "resistance seen by the transverse probe pair, Re rho'_yy W/w_probe"),
    _f("noise_density_x", "V Hz^-1/2", "V Hz^-1/2", "noise density at the longitudinal pair (Johnson + amplifier)"),
    _f("noise_density_y", "V Hz^-1/2", "V Hz^-1/2", "noise density at the transverse pair (Johnson + amplifier)"),
    _f("noise_bandwidth", "Hz", "Hz", "equivalent noise bandwidth of the lock-in filter"),
    _f("noise_y_rms", "V", "V", "rms noise of the transverse lock-in reading at the time constant"),
    _f("snr_v2w_y", "1", "1", "signal-to-noise ratio of |V_y^2omega| (rms) at the time constant"),
    _f("averaging_time_snr10", "s", "s", "averaging time for a signal-to-noise ratio of 10"),
    _f("measurability", "1", "1", "2 measurable, 1 marginal, 0 not measurable"),
    _f("temperature_rise", "K", "K", "Joule temperature rise of the channel (thermal estimate)"),
    _f("heating_flag", "1", "1", "1 where the temperature rise exceeds 10 % of the bath temperature"),
    _f("pickup_v2w_y", "V", "V", "2omega pickup amplitude from transverse probe misalignment, (delta/L) V_xx^2omega"),
    _f("thermoelectric_v2w_y", "V", "V", "thermoelectric 2omega amplitude |S'_yy| a Delta T (estimate)"),
    _f("signal_to_pickup", "1", "1", "|V_y^2omega| / misalignment pickup"),
    _f("signal_to_thermoelectric", "1", "1", "|V_y^2omega| / thermoelectric 2omega estimate"),
    _f("gate_field", "V m^-1", "V m^-1", "field in the gate dielectric |V_g|/d (applied voltage over the thickness)"),
)}

#: bookkeeping fields of a sweep
RUN_FIELDS: dict[str, Field] = {f.name: f for f in (
    _f("resolution_level", "1", "1", "k-mesh refinement level used"),
    _f("converged", "1", "1",
       "automatic refinement reached rtol (1) or not (0); -1 where a fixed level was asked for (no refinement)"),
    _f("has_error_estimate", "1", "1",
       "error_* holds a comparison of two levels (1) or is unavailable, NaN (0)"),
    _f("nodes_per_condition", "1", "1", "k-points per condition of the node rule (-1: energy-resolved engines)"),
)}

#: the four device numbers a fit or a sensitivity compares with measurements
OUTPUTS: dict[str, Field] = {f.name: f for f in (
    _f("V2w", "V", "V", "transverse 2ω voltage amplitude |V_y^2ω|"),
    _f("Vxx", "V", "V", "longitudinal voltage amplitude |V_xx|"),
    _f("sigma_xx", "S", "S", "sheet conductivity σ'_xx along the current"),
    _f("ratio", "m V^-1", "m V^-1", "nonlinear Hall ratio E⊥^2ω/(E∥^ω)²"),
)}


def field(name: str) -> Field:
    """The :class:`Field` of a result name (``error_<field>`` gets its field's unit)."""
    base = name[6:] if name.startswith("error_") else name
    for table in (RESPONSE_FIELDS, DEVICE_FIELDS, RUN_FIELDS, OUTPUTS):
        if base in table:
            f = table[base]
            if base != name:
                return Field(name, f.unit_2d, f.unit_3d,
                             f"estimated absolute integration error of {base} (|fine - coarse| mesh)")
            return f
    raise KeyError(f"'{name}' is not a result field; known: {', '.join(sorted(all_field_names()))}")


def all_field_names() -> list[str]:
    return [*RESPONSE_FIELDS, *DEVICE_FIELDS, *RUN_FIELDS, *OUTPUTS]


def units_of(dim: int = 2) -> dict[str, str]:
    """{response field: SI unit} for a ``dim``-dimensional model (what ``Response.units`` holds)."""
    return {k: f.unit(dim) for k, f in RESPONSE_FIELDS.items() if k not in ("mu", "chi_dipole", "chi_drude",
                                                                           "chi_intrinsic")}



#: why an axis is not in SI units (the ``comment`` attribute of its dataset coordinate, as the CF
#: conventions allow; result fields are SI).  Interface units are those the trade quotes.
NON_SI_UNITS = {
    "eV": "eV, not J: band energies and the chemical potential are quoted in eV (1 eV = 1.602176634e-19 J exactly)",
    "fs": "fs, not s: relaxation times are quoted in fs (1 fs = 1e-15 s)",
    "deg": "degree, not rad: angles from the crystal x axis are quoted in degrees",
    "cm^-2": "cm^-2, not m^-2: sheet densities are quoted per cm^2 (1 cm^-2 = 1e4 m^-2)",
    "uA": "uA, not A: drive currents are quoted in microampere (1 uA = 1e-6 A)",
    "um": "um, not m: bar dimensions are quoted in micrometre (1 um = 1e-6 m)",
    "nm": "nm, not m: dielectric thicknesses are quoted in nanometre (1 nm = 1e-9 m)",
    "1/Å": "1/Å, not 1/m: wave vectors are quoted per ångström (1 1/Å = 1e10 1/m)",
}

#: dataset attribute ``Conventions`` (CF: units and long_name on every variable; no CF standard
#: name exists for Berry-curvature transport quantities, so none is set)
CF_CONVENTIONS = "CF-1.10"

__all__ = ["CARRIERS", "CF_CONVENTIONS", "DEVICE_FIELDS", "Field", "GATE_FIELD_REFUSE_V_PER_NM", "GATE_FIELD_SOURCE",
           "GATE_FIELD_UNIT", "GATE_FIELD_WARN_V_PER_NM", "KNOBS", "KP_DEFAULT_LATTICE_A", "KP_K_MAX", "K_UNIT",
           "Knob", "MU_SLIPS", "NON_SI_UNITS", "OUTPUTS", "RESPONSE_FIELDS", "RUN_FIELDS", "SCATTERING",
           "SCATTERING_DEFAULTS", "all_field_names", "field", "units_of"]
