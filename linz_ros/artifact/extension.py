"""The ``design.extension`` section of an artifact: the compensator of a dynamically extended law.

When static feedback cannot decouple the outputs, the law is that of the extended plant: the
artifact's ``plant.states`` are the plant's own states followed by the compensator states, and
its ``plant.inputs`` are the new inputs (``w``; an input without integrators keeps its name).
This section says how the plant itself is driven::

    design.extension:
      plant_states        the plant's own states, the first of plant.states (what messages carry)
      plant_inputs        the plant's inputs, in order (what commands carry)
      integrators         per plant input, how many integrators delay it (0: none)
      compensator_states  the rest of plant.states, input by input: <u>_i1 (the value of u),
                          <u>_i2 (its rate) ...
      start               per compensator state, its value when the compensator starts without a
                          measurement (the analysis's choice: the midpoint of the input's limits,
                          else the equilibrium input, else 0)
      plant_input_limits  {plant input: [lower, upper]}, the limits of the plant's own inputs

Public names
------------
Extension, extension_problem, read_extension
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

__all__ = ["Extension", "extension_problem", "read_extension"]

_KEYS = ("plant_states", "plant_inputs", "integrators", "compensator_states", "start", "plant_input_limits")


@dataclass(frozen=True)
class Extension:
    """The compensator of an extended law, as the runtime reads it.

    Attributes
    ----------
    plant_states, plant_inputs : tuple of str
    integrators : tuple of int
        Per plant input.
    compensator_states : tuple of str
    start : tuple of float
        Per compensator state.
    plant_input_limits : tuple of (float, float)
        Per plant input, ``(-inf, inf)`` where none.
    """

    plant_states: tuple[str, ...]
    plant_inputs: tuple[str, ...]
    integrators: tuple[int, ...]
    compensator_states: tuple[str, ...]
    start: tuple[float, ...]
    plant_input_limits: tuple[tuple[float, float], ...]

    @property
    def offsets(self) -> tuple[int | None, ...]:
        """Per plant input, where its compensator states start in the compensator (None: not delayed)."""
        result, at = [], 0
        for k in self.integrators:
            result.append(at if k else None)
            at += k
        return tuple(result)

    def to_json(self) -> dict[str, Any]:
        """The section as the artifact stores it.

        Returns
        -------
        dict
        """
        limits = {u: [lo, hi] for u, (lo, hi) in zip(self.plant_inputs, self.plant_input_limits)
                  if math.isfinite(lo) or math.isfinite(hi)}
        return {"plant_states": list(self.plant_states), "plant_inputs": list(self.plant_inputs),
                "integrators": list(self.integrators), "compensator_states": list(self.compensator_states),
                "start": list(self.start), "plant_input_limits": limits}


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def _names(value: Any, identifier) -> bool:
    return (isinstance(value, list) and bool(value) and all(isinstance(v, str) and identifier(v) for v in value)
            and len(set(value)) == len(value))


def extension_problem(section: Any, states: list[str], inputs: list[str], identifier) -> tuple[str, str] | None:
    """What is wrong with a ``design.extension`` section against the artifact's states and inputs.

    Parameters
    ----------
    section : Any
        The section as parsed.
    states, inputs : list of str
        The artifact's ``plant.states`` and ``plant.inputs`` (extended states, new inputs).
    identifier : callable
        str -> bool, the artifact's rule for names.

    Returns
    -------
    (field, problem) or None
        The key of the section that is wrong ("" for the section itself) and what is wrong with it;
        None when it is fine.
    """
    if not isinstance(section, dict) or sorted(section) != sorted(_KEYS):
        return "", f"expected a mapping with {', '.join(_KEYS)}"
    own, plant_inputs = section["plant_states"], section["plant_inputs"]
    if not _names(own, identifier) or states[:len(own)] != own:
        return "plant_states", "expected the first of plant.states"
    if not _names(plant_inputs, identifier) or len(plant_inputs) != len(inputs):
        return "plant_inputs", f"expected {len(inputs)} distinct names, one per input"
    counts = section["integrators"]
    if not (isinstance(counts, list) and len(counts) == len(inputs)
            and all(isinstance(k, int) and not isinstance(k, bool) and 0 <= k <= 8 for k in counts)
            and any(counts)):
        return "integrators", f"expected {len(inputs)} whole numbers from 0 to 8, not all 0"
    added = section["compensator_states"]
    if not _names(added, identifier) or own + added != states or len(added) != sum(counts):
        return "compensator_states", "expected the rest of plant.states, one per integrator"
    for u, w, k in zip(plant_inputs, inputs, counts):
        if k == 0 and u != w:
            return "plant_inputs", f"{u!r} has no integrator and must be the input {w!r} itself"
    if set(plant_inputs) & set(states):
        return "plant_inputs", "a plant input shares its name with a state"
    start = section["start"]
    if not (isinstance(start, list) and len(start) == len(added) and all(_is_number(v) for v in start)):
        return "start", f"expected {len(added)} finite numbers, one per compensator state"
    limits = section["plant_input_limits"]
    if not (isinstance(limits, dict) and all(k in plant_inputs and isinstance(v, list) and len(v) == 2
                                             and all(_is_number(b) for b in v) and v[0] < v[1]
                                             for k, v in limits.items())):
        return "plant_input_limits", "expected plant input: [lower, upper] with lower below upper"
    return None


def read_extension(section: dict[str, Any]) -> Extension:
    """The typed extension of a checked section.

    Parameters
    ----------
    section : dict
        Checked by :func:`extension_problem`.

    Returns
    -------
    Extension
    """
    limits = section["plant_input_limits"]
    return Extension(tuple(section["plant_states"]), tuple(section["plant_inputs"]),
                     tuple(int(k) for k in section["integrators"]), tuple(section["compensator_states"]),
                     tuple(float(v) for v in section["start"]),
                     tuple(tuple(float(b) for b in limits.get(u, (-math.inf, math.inf)))
                           for u in section["plant_inputs"]))
