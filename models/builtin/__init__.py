"""The built-in catalogue.  Importing this package registers every entry with
:mod:`crosswind.models.registry`; ``crosswind.models`` imports it once.  An import error in any
model module propagates (a model that fails to register is never silently missing)."""
from . import bilayer, dirac, haldane, honeycomb, parabolic, tmd, tmd_lattice, weyl, weyl_kp  # noqa: F401  (they register)

__all__ = ["bilayer", "dirac", "haldane", "honeycomb", "parabolic", "tmd", "tmd_lattice", "weyl", "weyl_kp"]
