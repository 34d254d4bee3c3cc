"""Units of the signals: the plant file's ``units:`` section (state, input and output name ->
unit text) over the defaults a form defines.

A serial arm's joints define their own units: a revolute joint's angle in rad, its rate in
rad/s and (with one input per joint, no ``input_map``) its torque in N m; a prismatic
joint's m, m/s and N. A tool point (``tip_x``, ...) is in m (the DH lengths are SI). An
output that is one state as written takes that state's unit. What the file says wins.
"""

from __future__ import annotations

import difflib
from typing import Any, Mapping, Sequence

import sympy as sp

from linz_ros.artifact.document import MAX_UNIT_TEXT
from linz_ros.model._mechanics import TOOL_NAMES
from linz_ros.model._plant import Mechanics

__all__ = ["read_signal_units", "JOINT_UNITS", "TOOL_UNIT"]

#: Units of a joint's coordinate, rate and generalized force, by joint type.
JOINT_UNITS = {"revolute": ("rad", "rad/s", "N m"), "prismatic": ("m", "m/s", "N")}
#: Unit of a serial arm's tool-point coordinates.
TOOL_UNIT = "m"


def read_signal_units(reader: Any, doc: Mapping, states: Sequence[str], inputs: Sequence[str],
                      outputs: Sequence[str], h: sp.Matrix, mechanics: Mechanics | None) -> dict[str, str]:
    """The unit of every signal that has one: the form's defaults, then the ``units`` section.

    Parameters
    ----------
    reader : the plant-file reader
        Its ``fail(field, problem)`` builds the one-line ``PlantFileError``; ``table`` holds
        the tool-point expressions of a serial arm.
    doc : mapping
        The plant document.
    states, inputs, outputs : sequence of str
        The signal names, in order.
    h : sympy.Matrix
        The outputs' expressions (one per name in ``outputs``).
    mechanics : Mechanics or None

    Returns
    -------
    dict of str to str
        Signal name -> unit text, in the order states, inputs, outputs.
    """
    given = _given_units(reader, doc, states, inputs, outputs)
    units = _joint_units(mechanics, inputs, doc.get("input_map") is None)
    units.update({k: v for k, v in given.items() if k in states or k in inputs})
    units.update(_output_units(reader, outputs, h, units))
    units.update(given)
    order = list(states) + list(inputs) + list(outputs)
    return {name: units[name] for name in order if name in units}


def _given_units(reader: Any, doc: Mapping, states: Sequence[str], inputs: Sequence[str],
                 outputs: Sequence[str]) -> dict[str, str]:
    section = doc.get("units")
    if section is None:
        return {}
    if not isinstance(section, dict):
        raise reader.fail("units", "expected a mapping of state, input or output name: unit text")
    signals = list(states) + list(inputs) + list(outputs)
    units = {}
    for name, unit in section.items():
        field = f"units.{name}"
        if name not in signals:
            raise reader.fail(field, _unknown_name_problem(reader, name, signals))
        if not isinstance(unit, str):
            raise reader.fail(field, f"expected unit text (such as rad/s or N m), got {_kind(unit)}")
        text = unit.strip()
        if not text:
            raise reader.fail(field, f"empty unit; leave {name} out when its unit is not stated")
        if len(text) > MAX_UNIT_TEXT or not text.isprintable():
            raise reader.fail(field, f"expected unit text of at most {MAX_UNIT_TEXT} printable characters "
                                     "on one line")
        units[name] = text
    return units


def _unknown_name_problem(reader: Any, name: Any, signals: list[str]) -> str:
    if not isinstance(name, str):
        return f"{_kind(name)} is not a signal name"
    if getattr(reader, "names", {}).get(name) == "parameter":
        return f"{name!r} is a parameter; its unit goes in parameters.{name}.unit"
    close = difflib.get_close_matches(name, signals, n=1, cutoff=0.5)
    hint = f" (did you mean {close[0]!r}?)" if close else ""
    return f"{name[:40]!r} is not a state, input or output{hint}"


def _kind(value: Any) -> str:
    if isinstance(value, bool):
        return "true/false"
    if isinstance(value, (int, float)):
        return f"the number {value!r} (quote it to make it text)"
    return {dict: "a mapping", list: "a list", type(None): "nothing"}.get(type(value), type(value).__name__)


def _joint_units(mechanics: Mechanics | None, inputs: Sequence[str], one_input_per_joint: bool) -> dict[str, str]:
    """A serial arm's joint units (the other forms do not say what their coordinates are)."""
    if mechanics is None or not mechanics.links:
        return {}
    units = {}
    for i, link in enumerate(mechanics.links):
        angle, rate, force = JOINT_UNITS[link.kind]
        units[mechanics.coordinates[i].name] = angle
        units[mechanics.velocities[i].name] = rate
        if mechanics.elastic is not None:     # the motor behind an elastic joint turns like the joint
            units[mechanics.elastic.motor_angles[i].name] = angle
            units[mechanics.elastic.motor_rates[i].name] = rate
        if one_input_per_joint and i < len(inputs):
            units[inputs[i]] = force
    return units


def _output_units(reader: Any, outputs: Sequence[str], h: sp.Matrix, state_units: dict[str, str]
                  ) -> dict[str, str]:
    """Outputs that are one state as written, or a serial arm's tool-point coordinate."""
    table = getattr(reader, "table", {})
    tool = [table[name] for name in TOOL_NAMES if name in table]
    units = {}
    for name, expr in zip(outputs, list(h)):
        if isinstance(expr, sp.Symbol) and expr.name in state_units:
            units[name] = state_units[expr.name]
        elif any(expr == point for point in tool):
            units[name] = TOOL_UNIT
    return units
