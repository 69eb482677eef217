"""Frozen dataclasses that are JAX pytrees: one helper instead of hand-written flatten/unflatten.

``@pytree_dataclass`` makes a class a frozen dataclass and registers it with
``jax.tree_util.register_dataclass``: fields are children (arrays, or further pytrees) unless
declared with :func:`static` (hashable metadata: names, levels, flags), which JAX treats as part
of the tree structure.  Instances therefore pass through ``jax.jit``, ``jax.vmap``, ``jax.jvp`` and
``jax.tree.map`` and come back as the same typed object.
"""
from __future__ import annotations

import dataclasses

import jax


def static(default=dataclasses.MISSING, **kw):
    """A dataclass field that is metadata of the tree (not traced, compared by value)."""
    return dataclasses.field(default=default, metadata={"static": True}, **kw)


def pytree_dataclass(cls):
    """Decorator: a frozen dataclass registered as a JAX pytree (fields marked :func:`static` are metadata)."""
    cls = dataclasses.dataclass(frozen=True)(cls)
    fields = dataclasses.fields(cls)
    data = [f.name for f in fields if not f.metadata.get("static", False)]
    meta = [f.name for f in fields if f.metadata.get("static", False)]
    return jax.tree_util.register_dataclass(cls, data_fields=data, meta_fields=meta)


def as_dict(obj) -> dict:
    """{field: value} of a pytree dataclass, one level deep (for tables and files)."""
    return {f.name: getattr(obj, f.name) for f in dataclasses.fields(obj)}


__all__ = ["as_dict", "pytree_dataclass", "static"]
