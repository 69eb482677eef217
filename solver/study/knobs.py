"""Knobs of a scenario: which names a sweep, a sensitivity or a fit may vary, their units and values.

Names and units come from :mod:`crosswind.solver.vocabulary` (scenario knobs) and from the model's
parameter table (model parameters).  :func:`check_knob` explains a wrong name; :func:`base_values`
fills in every knob a chain evaluation needs (:func:`crosswind.solver.study.chain.evaluate`).
"""
from __future__ import annotations

import difflib
from typing import Any

import numpy as np

from crosswind.solver.vocabulary import KNOBS, SCATTERING

_STRAIN_COMPONENTS = ("strain_xx", "strain_yy", "strain_xy")


def knob_units(model, strain_kind, carrier, scattering) -> dict:
    """{knob name: unit} for a scenario with this model, strain form, carrier and scattering kind:
    the model's real parameters (units from its parameter table), ``strain`` (uniaxial strain
    replaces the tensor components), ``temperature_K``, the scattering kind's knobs, the carrier,
    ``gate_offset_V`` (gate scenarios) and ``current_angle_deg``."""
    out = {}
    for name in model.params:
        if strain_kind == "uniaxial" and name in _STRAIN_COMPONENTS:
            continue
        u = model.spec[name].unit if name in model.spec.names() else ""
        out[name] = u if u not in ("", "-") else "1"
    if strain_kind == "uniaxial":
        out["strain"] = KNOBS["strain"].unit
    for k in ("temperature_K", *SCATTERING[scattering], carrier):
        out[k] = KNOBS[k].unit
    if carrier == "gate_V":
        out["gate_offset_V"] = KNOBS["gate_offset_V"].unit
    out["current_angle_deg"] = KNOBS["current_angle_deg"].unit
    return out


class KnobError(ValueError):
    """A name that is not a knob of the scenario; ``problem`` says why and names the valid ones."""

    def __init__(self, who: str, problem: str):
        super().__init__(f"{who}: {problem}")
        self.problem = problem


def check_knob(name, units: dict, model, who: str, strain_kind) -> None:
    """Raise :class:`KnobError` unless ``name`` is a knob (``units`` from :func:`knob_units`)."""
    if name in units:
        return
    if name in model.static_options():
        raise KnobError(who, f"'{name}' is a structural option of {model.name} (no derivative); "
                             f"use one of {', '.join(units)}")
    if strain_kind == "uniaxial" and name in _STRAIN_COMPONENTS:
        raise KnobError(who, f"'{name}' is derived from the uniaxial [material.strain]; use the knob 'strain' "
                             "(the magnitude) instead")
    close = difflib.get_close_matches(name, list(units), n=1)
    hint = f" Did you mean '{close[0]}'?" if close else ""
    raise KnobError(who, f"unknown knob '{name}'.{hint}")


def base_model(scn):
    """The scenario's model at the first value of its strain axis (if it has one)."""
    return scn.build_model(scn.axis("strain").values[0] if _has_axis(scn, "strain") else None)


def scenario_knobs(scn) -> dict:
    """{knob name: unit} of a loaded scenario."""
    kind = scn.material.strain.kind if scn.material.strain is not None else None
    return knob_units(base_model(scn), kind, scn.carrier, scn.scattering)


def _has_axis(scn, name):
    return any(a.name == name for a in scn.axes)


def base_values(scn, at: dict | None = None, *, who: str = "scenario") -> dict:
    """Values of every knob: from ``at`` ({knob: value or array}) where given, else single-valued
    axes from the scenario (a swept axis not in ``at`` is ``None``: the caller must give it), model
    parameters from the model, ``gate_offset_V`` from [device].  Unknown names raise ``ValueError``."""
    at = dict(at or {})
    units = scenario_knobs(scn)
    out: dict[str, Any] = {}
    for a in scn.axes:
        if a.name in at:
            out[a.name] = at.pop(a.name)
        else:
            out[a.name] = float(a.values[0]) if len(a.values) == 1 else None
    model = scn.build_model(out["strain"] if out.get("strain") is not None and np.ndim(out["strain"]) == 0
                            else (scn.axis("strain").values[0] if _has_axis(scn, "strain") else None))
    for k in units:
        if k in model.params:
            out[k] = at.pop(k) if k in at else float(model.params[k])
    if "gate_offset_V" in units:
        out["gate_offset_V"] = at.pop("gate_offset_V", scn.device.gate_offset_V)
    if "current_uA" in at:
        out["current_uA"] = at.pop("current_uA")
    if at:
        raise ValueError(f"{who}: unknown knob(s) {sorted(at)}; valid: {', '.join(units)}")
    return out


__all__ = ["KnobError", "base_model", "base_values", "check_knob", "knob_units", "scenario_knobs"]
