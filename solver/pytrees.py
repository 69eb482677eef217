"""The frozen-pytree dataclass helper, re-exported for the solver (defined in ``crosswind.models.pytrees``,
the lowest layer, so band models use it too)."""
from crosswind.models.pytrees import as_dict, pytree_dataclass, static

__all__ = ["as_dict", "pytree_dataclass", "static"]
