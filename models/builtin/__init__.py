"""Built-in models.  Importing this package registers every catalogue entry."""
from . import dirac, haldane, parabolic  # noqa: F401

# optional modules added by the catalogue work: imported when present
import importlib as _il

for _name in ("honeycomb", "bilayer", "tmd", "tmd_lattice", "weyl"):
    try:
        _il.import_module(f"{__name__}.{_name}")
    except ModuleNotFoundError as _e:  # pragma: no cover - only while a module is absent
        if _e.name != f"{__name__}.{_name}":
            raise
