"""The built-in demonstration scenario run by ``crosswind demo``.

A uniaxially strained MoS2 monolayer (the ``tmd`` catalogue model: massive Dirac with spin–orbit
coupling, strain-induced valley tilt; its strain coefficients are illustrative defaults, not a
fit) in a Hall bar of our own invention on a 285 nm SiO2 back gate.  Strain of 1 % along the
crystal x axis lowers the C3 symmetry and gives a Berry-curvature dipole along x; the current runs
along x, where the nonlinear Hall voltage is largest.  Scattering: impurities plus phonons
(Matthiessen's rule), so the temperature sweep also changes τ and feeds the scaling plot.  The
sweep (12 gate voltages × 3 temperatures) and the fixed mesh level 1 keep the run to about a
minute on two cores.
"""

SCENARIO = """\
# Crosswind demo: strained MoS2 monolayer Hall bar (illustrative device)
[material]
model = "tmd"

[material.parameters]
material = "MoS2"          # Xiao et al. 2012 two-band parameters

[material.strain]
magnitude = 0.01           # 1 % uniaxial strain ...
angle_deg = 0.0            # ... along the crystal x axis
poisson = 0.25             # transverse contraction (illustrative)

[device]
width_um = 5.0
length_um = 10.0
current_uA = 10.0          # amplitude of I(t) = I0 sin(wt)
frequency_Hz = 17.0
current_angle_deg = 0.0    # current along the strain axis
dielectric_nm = 285.0      # SiO2 back gate
permittivity = 3.9

[conditions]
gate_V = {start = 6.0, stop = 60.0, num = 12}
temperature_K = [10.0, 60.0, 150.0]

[conditions.scattering]
kind = "matthiessen"
tau_impurity_fs = 400.0
tau_phonon_fs = 100.0      # phonon-limited tau at the reference temperature
reference_temperature_K = 300.0

[numerics]
resolution = 1             # fixed k-mesh level (fast); "auto" refines to rtol
density_resolution = 1

[output]
folder = "crosswind-demo"
"""
