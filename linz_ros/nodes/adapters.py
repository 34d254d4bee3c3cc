"""Message adapters: ROS 2 messages to and from the artifact's state and input vectors.

Each state or input is bound to one field of the message by a *field path*, optionally
negated with a leading ``-`` (for frame conventions such as ENU against NED):

- ``sensor_msgs/msg/JointState``: ``position.<joint>``, ``velocity.<joint>``,
  ``effort.<joint>`` (joints by name, in any order in the message);
- ``nav_msgs/msg/Odometry``: ``pose.position.x|y|z``, ``pose.orientation.roll|pitch|yaw``
  (from the quaternion), ``twist.linear.x|y|z``, ``twist.angular.x|y|z`` (body frame), and
  derived from them through the pose: ``twist.world.x|y|z`` (parent-frame velocity) and
  ``twist.euler.roll|pitch|yaw`` (Euler-angle rates); see :mod:`linz_ros.nodes._odometry`;
- ``geometry_msgs/msg/Wrench``: ``force.x|y|z``, ``torque.x|y|z``;
- ``geometry_msgs/msg/Twist``: ``linear.x|y|z``, ``angular.x|y|z``;
- ``std_msgs/msg/Float64MultiArray``: ``data.<index>`` (an empty field list means
  ``data.0, data.1, ...`` in the artifact's order).

Every supported type is one row of :data:`ADAPTERS` (a :class:`MessageType`): its class,
the direction(s) it may carry, whether it has a header stamp, which field paths it has
(and which may not share a map), and the codec that reads and writes a list of field paths;
:class:`FieldMap` dispatches through the row and knows no type by name.

A planned trajectory (``trajectory_msgs/msg/JointTrajectory``, a reference) is converted as a
whole in :mod:`linz_ros.nodes._ros2_control` and checked by :mod:`linz_ros.runtime.trajectory`.

A message that does not fit (missing joint, arrays of the wrong length, a value that is
not a number) raises :class:`MessageError` with a short reason; the controller then sends
the safe command and counts the message as rejected.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from operator import attrgetter
from typing import Any, Callable, Protocol, Sequence

from geometry_msgs.msg import Twist, Wrench
from nav_msgs.msg import Odometry
from sensor_msgs.msg import JointState
from std_msgs.msg import Float64MultiArray, MultiArrayDimension

from linz_ros.errors import ConfigError
from linz_ros.nodes._odometry import AXES, PATHS, OdometryCodec, map_problem

__all__ = ["MessageError", "FieldMap", "MessageType", "ADAPTERS", "STATE_TYPES", "COMMAND_TYPES", "message_class",
           "stamp_seconds", "set_stamp", "split_seconds", "labelled_array"]

_JOINT_ARRAYS = ("position", "velocity", "effort")
_LAST_STAMP = 2_147_483_647.0       # builtin_interfaces/Time.sec is an int32
_MAX_ENTRIES = 100_000              # data.<index> of a Float64MultiArray: index below this


class MessageError(ValueError):
    """A message that does not fit the declared field map; ``reason`` is short and fixed."""

    def __init__(self, reason: str, detail: str) -> None:
        self.reason = reason
        self.detail = detail
        super().__init__(f"{reason}: {detail}")


@dataclass(frozen=True)
class _Field:
    path: str
    sign: float


class _Codec(Protocol):
    """Reads and writes one list of field paths of one message type (built by a row's ``bind``)."""

    def read(self, message: Any) -> list[float]: ...

    def write(self, values: Sequence[float], message: Any) -> None: ...


@dataclass(frozen=True)
class MessageType:
    """One supported message type: a row of :data:`ADAPTERS`.

    Attributes
    ----------
    name : str
        The ROS type name, e.g. ``sensor_msgs/msg/JointState``.
    cls : type
        The message class.
    directions : tuple of str
        ``"state"``, ``"command"`` or both: what the nodes may carry in it.
    stamped : bool
        The message has a ``header`` whose stamp :func:`stamp_seconds` and :func:`set_stamp`
        read and write.
    path_problem : callable
        ``path_problem(path)``: why ``path`` (without its sign) is not a field of the type,
        as one line, or None when it is one.
    bind : callable
        ``bind(fields, exact)``: the codec (``read(message)``, ``write(values, message)``)
        of a checked list of fields; ``exact`` when the fields are the default layout.
    default_fields : callable or None
        ``default_fields(size)``: the field paths an empty field list stands for; None when
        the type needs one field per entry.
    map_problem : callable
        ``map_problem(paths)``: why fields of the type (each passing ``path_problem``) cannot
        share one map, as one line, or None.
    """

    name: str
    cls: type
    directions: tuple[str, ...]
    stamped: bool
    path_problem: Callable[[str], str | None]
    bind: Callable[[list[_Field], bool], _Codec]
    default_fields: Callable[[int], list[str]] | None = None
    map_problem: Callable[[Sequence[str]], str | None] = lambda paths: None


def message_class(type_name: str, allowed: Sequence[str], option: str) -> type:
    """The message class of a ROS type name such as ``sensor_msgs/msg/JointState``.

    Parameters
    ----------
    type_name : str
    allowed : sequence of str
        The type names accepted here.
    option : str
        Named in the error.

    Returns
    -------
    type

    Raises
    ------
    ConfigError
    """
    if type_name not in allowed:
        raise ConfigError(option, f"unsupported message type {type_name!r}; expected one of {', '.join(allowed)}")
    return ADAPTERS[type_name].cls


def stamp_seconds(message: Any) -> float | None:
    """The header stamp in seconds, or None for messages without a header (or a zero stamp).

    Parameters
    ----------
    message : ROS message

    Returns
    -------
    float or None
    """
    header = getattr(message, "header", None)
    if header is None:
        return None
    stamp = header.stamp
    if stamp.sec == 0 and stamp.nanosec == 0:
        return None
    return stamp.sec + stamp.nanosec * 1e-9


def set_stamp(message: Any, seconds: float) -> None:
    """Write a time in seconds into the message's header stamp, when it has one.

    Parameters
    ----------
    message : ROS message
    seconds : float
    """
    header = getattr(message, "header", None)
    if header is None:
        return
    if not math.isfinite(seconds) or seconds < 0:
        seconds = 0.0                    # never leave an old stamp on a reused message
    header.stamp.sec, header.stamp.nanosec = split_seconds(min(seconds, _LAST_STAMP))


def split_seconds(seconds: float) -> tuple[int, int]:
    """Whole seconds and nanoseconds of a time, rounded to the nearest nanosecond.

    Parameters
    ----------
    seconds : float
        Finite and >= 0.

    Returns
    -------
    (int, int)

    Examples
    --------
    >>> split_seconds(2.9999999999)
    (3, 0)
    """
    total = int(round(seconds * 1e9))
    return total // 1_000_000_000, total % 1_000_000_000


def labelled_array(values: Sequence[float], labels: Sequence[str]) -> Float64MultiArray:
    """A Float64MultiArray whose one dimension is labelled with the comma-joined field names.

    Parameters
    ----------
    values : sequence of float
    labels : sequence of str

    Returns
    -------
    std_msgs.msg.Float64MultiArray
    """
    message = Float64MultiArray()
    message.layout.dim = [MultiArrayDimension(label=",".join(labels), size=len(values), stride=len(values))]
    message.data = [float(v) for v in values]
    return message


def _listed(names: Sequence[str], most: int = 8) -> str:
    """Names for a message: quoted (a name may hold a line break), at most ``most`` of them."""
    shown = ", ".join(repr(n) for n in names[:most])
    return shown + (f", ... ({len(names)} in all)" if len(names) > most else "")


def _not_a_field(path: str, type_name: str) -> str:
    return f"{path!r} is not a field of {type_name} (see the adapters' field paths)"


# -- JointState: joints by name ------------------------------------------------------------
def _joint_state_problem(path: str) -> str | None:
    head, _, joint = path.partition(".")
    return None if head in _JOINT_ARRAYS and joint else _not_a_field(path, "sensor_msgs/msg/JointState")


class _JointStateCodec:
    """``position|velocity|effort.<joint>``; the joints are located once per new name list."""

    def __init__(self, fields: list[_Field], exact: bool) -> None:
        self.signs = [f.sign for f in fields]
        self.heads_joints = [tuple(f.path.split(".", 1)) for f in fields]
        self.joints = list(dict.fromkeys(joint for _, joint in self.heads_joints))
        self.write_slots = [(head, self.joints.index(joint)) for head, joint in self.heads_joints]
        self.write_heads = sorted({head for head, _ in self.write_slots})
        self.names_seen: tuple[str, ...] | None = None
        self.slots: list[tuple[int, int]] = []

    def read(self, message: JointState) -> list[float]:
        key = tuple(message.name)
        if key != self.names_seen:
            self._locate_joints(key)          # once per new name list; then plain indexing
        count = len(key)
        arrays = (message.position, message.velocity, message.effort)
        out = []
        for (array, index), sign in zip(self.slots, self.signs):
            values = arrays[array]
            if len(values) != count:
                raise MessageError("wrong_length", f"{_JOINT_ARRAYS[array]} has {len(values)} entries for "
                                                   f"{count} joints")
            out.append(sign * values[index])
        return out

    def _locate_joints(self, names: tuple[str, ...]) -> None:
        index = {name: i for i, name in enumerate(names)}
        if len(index) != len(names):
            raise MessageError("bad_message", "a joint name appears twice")
        missing = [j for j in self.joints if j not in index]
        if missing:
            raise MessageError("unknown_joint", f"joint(s) {_listed(missing)} not in the message "
                                                f"(it has {_listed(names) or 'none'})")
        self.slots = [(_JOINT_ARRAYS.index(head), index[joint]) for head, joint in self.heads_joints]
        self.names_seen = names

    def write(self, values: Sequence[float], message: JointState) -> None:
        if list(message.name) != self.joints:
            message.name = list(self.joints)
        arrays = {head: [0.0] * len(self.joints) for head in self.write_heads}
        for (head, slot), sign, v in zip(self.write_slots, self.signs, values):
            arrays[head][slot] = sign * float(v)
        for head in _JOINT_ARRAYS:
            setattr(message, head, arrays.get(head, ()))


# -- Float64MultiArray: entries by index ---------------------------------------------------
def _array_problem(path: str) -> str | None:
    head, _, index = path.partition(".")
    if not (head == "data" and index.isascii() and index.isdigit()):
        return _not_a_field(path, "std_msgs/msg/Float64MultiArray")
    if len(index) > 6 or int(index) >= _MAX_ENTRIES:
        return f"{path[:20]!r}: the index must be below {_MAX_ENTRIES}"
    return None


class _ArrayCodec:
    """``data.<index>``; with the default layout (``exact``) the array must be the vector, no more."""

    def __init__(self, fields: list[_Field], exact: bool) -> None:
        self.indices = [int(f.path.split(".")[1]) for f in fields]
        self.signs = [f.sign for f in fields]
        self.need = max(self.indices) + 1
        self.exact = exact

    def read(self, message: Float64MultiArray) -> list[float]:
        data = message.data
        if len(data) < self.need or (self.exact and len(data) != self.need):
            raise MessageError("wrong_length", f"data has {len(data)} entries, "
                                               f"{'exactly ' if self.exact else ''}{self.need} needed")
        return [s * data[i] for i, s in zip(self.indices, self.signs)]

    def write(self, values: Sequence[float], message: Float64MultiArray) -> None:
        data = [0.0] * self.need
        for i, s, v in zip(self.indices, self.signs, values):
            data[i] = s * float(v)
        message.data = data


# -- Odometry (in _odometry.py), Wrench, Twist: attributes --------------------------------
class _AttributeCodec:
    """Fields whose paths are dotted attribute chains (``group.axis``, never a bare name)."""

    def __init__(self, fields: list[_Field], exact: bool = False) -> None:
        self.slots = []                       # (read, parent, name, sign)
        for f in fields:
            parent, _, name = f.path.rpartition(".")
            self.slots.append((attrgetter(f.path), attrgetter(parent), name, f.sign))

    def read(self, message: Any) -> list[float]:
        return [sign * float(get(message)) for get, _, _, sign in self.slots]

    def write(self, values: Sequence[float], message: Any) -> None:
        for (_, parent, name, sign), v in zip(self.slots, values):
            setattr(parent(message), name, sign * float(v))


def _odometry_problem(path: str) -> str | None:
    return None if path in PATHS else _not_a_field(path, "nav_msgs/msg/Odometry")


def _vector3_row(name: str, cls: type, groups: tuple[str, str]) -> MessageType:
    """A command type made of two Vector3 groups (``force``/``torque``, ``linear``/``angular``)."""

    def problem(path: str) -> str | None:
        head, _, axis = path.partition(".")
        return None if head in groups and axis in AXES else _not_a_field(path, name)

    return MessageType(name, cls, ("command",), False, problem, _AttributeCodec)


#: The supported message types, one row each; a new type is a new row (DEVELOPERS.md).
ADAPTERS: dict[str, MessageType] = {row.name: row for row in (
    MessageType("std_msgs/msg/Float64MultiArray", Float64MultiArray, ("state", "command"), False, _array_problem,
                _ArrayCodec, lambda size: [f"data.{i}" for i in range(size)]),
    MessageType("sensor_msgs/msg/JointState", JointState, ("state", "command"), True, _joint_state_problem,
                _JointStateCodec),
    MessageType("nav_msgs/msg/Odometry", Odometry, ("state",), True, _odometry_problem,
                lambda fields, exact: OdometryCodec(fields), map_problem=map_problem),
    _vector3_row("geometry_msgs/msg/Wrench", Wrench, ("force", "torque")),
    _vector3_row("geometry_msgs/msg/Twist", Twist, ("linear", "angular")),
)}
STATE_TYPES = tuple(name for name, row in ADAPTERS.items() if "state" in row.directions)
COMMAND_TYPES = tuple(name for name, row in ADAPTERS.items() if "command" in row.directions)


class FieldMap:
    """How one vector (states or inputs) sits in one message type.

    Parameters
    ----------
    type_name : str
        A ROS message type name (see the module docstring).
    fields : sequence of str
        One field path per entry of the vector, in the vector's order; empty for
        ``data.0, data.1, ...`` of a Float64MultiArray, whose messages must then hold
        exactly ``size`` entries (with fields named, longer arrays are read in part).
    size : int
        Length of the vector.
    option : str
        Parameter name, for errors (e.g. ``state_fields``).

    Raises
    ------
    ConfigError
        For an unknown type or field, a repeated field, the wrong number of fields, or
        fields that cannot share a map (the type's ``map_problem``).
    """

    def __init__(self, type_name: str, fields: Sequence[str], size: int, option: str) -> None:
        row = ADAPTERS.get(type_name)
        if row is None:
            message_class(type_name, tuple(ADAPTERS), option)
        self.type_name = type_name
        self.cls = row.cls
        self.stamped = row.stamped
        if size < 1:
            raise ConfigError(option, f"expected at least one entry, got {size}")
        self.exact = not fields              # the default layout: the array is the vector, no more
        if not fields:
            if row.default_fields is None:
                raise ConfigError(option, f"{type_name} needs one field per entry ({size} expected)")
            fields = row.default_fields(size)
        if len(fields) != size:
            raise ConfigError(option, f"expected {size} field paths, one per entry, got {len(fields)}")
        parsed = [_parse_field(text, option) for text in fields]
        paths = [f.path for f in parsed]
        if len(set(paths)) != len(paths):
            raise ConfigError(option, "a field path appears twice")
        for problem in [row.path_problem(path) for path in paths] + [row.map_problem(paths)]:
            if problem is not None:
                raise ConfigError(option, problem)
        self.fields = parsed
        self.size = size
        codec = row.bind(parsed, self.exact)
        self._read, self._write = codec.read, codec.write

    def read(self, message: Any) -> list[float]:
        """The vector carried by a message.

        Parameters
        ----------
        message : ROS message of this map's type

        Returns
        -------
        list of float

        Raises
        ------
        MessageError
        """
        return self._read(message)

    def write(self, values: Sequence[float], message: Any | None = None) -> Any:
        """A message carrying the vector (fields not in the map are left at their defaults).

        Parameters
        ----------
        values : sequence of float
        message : ROS message, optional
            Filled in place when given.

        Returns
        -------
        ROS message
        """
        message = message if message is not None else self.cls()
        self._write(values, message)
        return message


def _parse_field(text: Any, option: str) -> _Field:
    """A field path with its sign (a leading ``-`` negates)."""
    if not isinstance(text, str) or not text.strip():
        raise ConfigError(option, f"expected field paths as text, got {text!r}")
    text = text.strip()
    return _Field(text.lstrip("-").strip(), -1.0 if text.startswith("-") else 1.0)
