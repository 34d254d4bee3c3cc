"""Messages of a dynamically extended law: measured compensator states and echoed inputs.

An extended artifact's state messages carry the plant's own states; its compensator states
(a cart's speed ``v_i1``) may be measured by other fields of the same message (the cart's
odometry ``twist.linear.x``): :class:`CompensatorFields` reads them for the controller
(``compensator_fields``) and the recorder. A simulated plant may echo the inputs it holds in
its state message (a wheeled cart's odometry reports its speed and turn rate in its twist):
:func:`echo_map` is the one map of the state fields and those input fields
(``input_fields``), written together.
"""

from __future__ import annotations

import math
from typing import Any, Sequence

from linz_ros.errors import ConfigError
from linz_ros.nodes.adapters import FieldMap

__all__ = ["CompensatorFields", "echo_map", "extension_text"]


def _path(text: str) -> str:
    """A field path without its sign (as the adapters read it)."""
    return text.strip().lstrip("-").strip()


class CompensatorFields:
    """The fields of a state message that measure an extended law's compensator states.

    Parameters
    ----------
    artifact : Artifact
    state_type : str
        The state message's type.
    fields : sequence of str
        One field path per compensator state, '' for one not measured; empty: none measured.

    Raises
    ------
    ConfigError
        Named ``compensator_fields``: fields for an artifact without a dynamic extension, the wrong
        count, or fields the state type does not have.
    """

    def __init__(self, artifact: Any, state_type: str, fields: Sequence[str]) -> None:
        extension = artifact.extension
        names = list(extension.compensator_states) if extension is not None else []
        fields = list(fields)
        if fields and extension is None:
            raise ConfigError("compensator_fields", f"the artifact {artifact.name} has no dynamic extension: "
                                                    "there are no compensator states to measure")
        if fields and len(fields) != len(names):
            raise ConfigError("compensator_fields", f"expected {len(names)} field paths, one per compensator "
                                                    f"state ({', '.join(names)}; '' for one not measured), "
                                                    f"got {len(fields)}")
        self.size = len(names)
        self.indices = [i for i, f in enumerate(fields) if f.strip()]
        self.map = (FieldMap(state_type, [fields[i] for i in self.indices], len(self.indices), "compensator_fields")
                    if self.indices else None)

    def read(self, message: Any) -> list[float]:
        """The measured compensator states.

        Parameters
        ----------
        message : ROS message of the state type

        Returns
        -------
        list of float
            One per compensator state, nan where not measured.

        Raises
        ------
        MessageError
            When the message does not carry a field.
        """
        values = [math.nan] * self.size
        if self.map is not None:
            for i, v in zip(self.indices, self.map.read(message)):
                values[i] = v
        return values


def echo_map(state_map: FieldMap, fields: Sequence[str], inputs: Sequence[str]) -> tuple[FieldMap | None, list[int]]:
    """The map of a simulated plant's state message: its state fields, then the inputs it echoes.

    Parameters
    ----------
    state_map : FieldMap
        The states' map.
    fields : sequence of str
        ``input_fields``: one field path per plant input ('' for one not echoed); empty: none.
    inputs : sequence of str
        The plant's inputs, for the error.

    Returns
    -------
    map : FieldMap or None
        Over the states followed by the echoed inputs; None when no input is echoed.
    echoed : list of int
        The echoed inputs, by index.

    Raises
    ------
    ConfigError
        Named ``input_fields``: the wrong count, a field that is also a state's, fields the type
        does not have or that cannot share the state message's map.
    """
    fields = list(fields)
    if fields and len(fields) != len(inputs):
        raise ConfigError("input_fields", f"expected {len(inputs)} field paths, one per input "
                                          f"({', '.join(inputs)}; '' for one not echoed), got {len(fields)}")
    echoed = [j for j, f in enumerate(fields) if f.strip()]
    if not echoed:
        return None, []
    states = [("-" if f.sign < 0 else "") + f.path for f in state_map.fields]
    taken = {f.path for f in state_map.fields}
    for j in echoed:
        if _path(fields[j]) in taken:
            raise ConfigError("input_fields", f"{_path(fields[j])!r} (input {inputs[j]}) is also a state field: "
                                              "a field carries one value")
    return FieldMap(state_map.type_name, states + [fields[j] for j in echoed], len(states) + len(echoed),
                    "input_fields"), echoed


def extension_text(artifact: Any) -> str:
    """The start-up log's words for a dynamic extension ('' without one).

    Parameters
    ----------
    artifact : Artifact

    Returns
    -------
    str
        E.g. ``, dynamic extension: compensator v_i1 (starts at 0.45 unless measured), law inputs v_d1, omega``.
    """
    extension = artifact.extension
    if extension is None:
        return ""
    start = ", ".join(f"{name}={value:g}" for name, value in zip(extension.compensator_states, extension.start))
    return (f", dynamic extension: compensator {', '.join(extension.compensator_states)} (start {start} unless "
            f"measured), law inputs {', '.join(artifact.inputs)} driving {', '.join(extension.plant_inputs)}")
