"""Message adapters: ROS 2 messages to and from the artifact's state and input vectors.

Each state or input is bound to one field of the message by a *field path*, optionally
negated with a leading ``-`` (for frame conventions such as ENU against NED):

- ``sensor_msgs/msg/JointState``: ``position.<joint>``, ``velocity.<joint>``,
  ``effort.<joint>`` (joints by name, in any order in the message);
- ``nav_msgs/msg/Odometry``: ``pose.position.x|y|z``, ``pose.orientation.roll|pitch|yaw``
  (from the quaternion), ``twist.linear.x|y|z``, ``twist.angular.x|y|z``;
- ``geometry_msgs/msg/Wrench``: ``force.x|y|z``, ``torque.x|y|z``;
- ``geometry_msgs/msg/Twist``: ``linear.x|y|z``, ``angular.x|y|z``;
- ``std_msgs/msg/Float64MultiArray``: ``data.<index>`` (an empty field list means
  ``data.0, data.1, ...`` in the artifact's order).

A message that does not fit (missing joint, arrays of the wrong length, a value that is
not a number) raises :class:`MessageError` with a short reason; the controller then sends
the safe command and counts the message as rejected.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Callable, Sequence

from geometry_msgs.msg import Twist, Wrench
from nav_msgs.msg import Odometry
from sensor_msgs.msg import JointState
from std_msgs.msg import Float64MultiArray, MultiArrayDimension

from linz_ros.errors import ConfigError

__all__ = ["MessageError", "FieldMap", "STATE_TYPES", "COMMAND_TYPES", "message_class", "stamp_seconds",
           "set_stamp", "split_seconds", "labelled_array"]

STATE_TYPES = ("sensor_msgs/msg/JointState", "nav_msgs/msg/Odometry", "std_msgs/msg/Float64MultiArray")
COMMAND_TYPES = ("std_msgs/msg/Float64MultiArray", "sensor_msgs/msg/JointState", "geometry_msgs/msg/Wrench",
                 "geometry_msgs/msg/Twist")
_CLASSES = {"sensor_msgs/msg/JointState": JointState, "nav_msgs/msg/Odometry": Odometry,
            "std_msgs/msg/Float64MultiArray": Float64MultiArray, "geometry_msgs/msg/Wrench": Wrench,
            "geometry_msgs/msg/Twist": Twist}
_JOINT_ARRAYS = ("position", "velocity", "effort")
_AXES = ("x", "y", "z")
_ODOMETRY = {f"pose.position.{a}" for a in _AXES} | {f"pose.orientation.{a}" for a in ("roll", "pitch", "yaw")} \
    | {f"twist.{k}.{a}" for k in ("linear", "angular") for a in _AXES}
_LAST_STAMP = 2_147_483_647.0       # builtin_interfaces/Time.sec is an int32
_MAX_ENTRIES = 100_000              # data.<index> of a Float64MultiArray: index below this
_VECTOR3 = {"geometry_msgs/msg/Wrench": ("force", "torque"), "geometry_msgs/msg/Twist": ("linear", "angular")}


class MessageError(ValueError):
    """A message that does not fit the declared field map; ``reason`` is short and fixed."""

    def __init__(self, reason: str, detail: str) -> None:
        self.reason = reason
        self.detail = detail
        super().__init__(f"{reason}: {detail}")


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
    return _CLASSES[type_name]


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


@dataclass(frozen=True)
class _Field:
    path: str
    sign: float


def _quaternion_to_rpy(q) -> tuple[float, float, float]:
    # ZYX (yaw-pitch-roll) angles of a unit quaternion (common practice, e.g. REP 103 frames);
    # an unfilled (all-zero) or far from unit quaternion is refused, a nearly unit one normalised
    x, y, z, w = q.x, q.y, q.z, q.w
    norm = math.sqrt(x * x + y * y + z * z + w * w)
    if not (math.isfinite(norm) and abs(norm - 1.0) <= 0.05):
        raise MessageError("bad_message", f"orientation quaternion has norm {norm:.4g}, not 1")
    x, y, z, w = x / norm, y / norm, z / norm, w / norm
    roll = math.atan2(2.0 * (w * x + y * z), 1.0 - 2.0 * (x * x + y * y))
    sine = max(-1.0, min(1.0, 2.0 * (w * y - z * x)))
    pitch = math.asin(sine)
    yaw = math.atan2(2.0 * (w * z + x * y), 1.0 - 2.0 * (y * y + z * z))
    return roll, pitch, yaw


def _rpy_to_quaternion(roll: float, pitch: float, yaw: float) -> tuple[float, float, float, float]:
    if not (math.isfinite(roll) and math.isfinite(pitch) and math.isfinite(yaw)):
        return (math.nan,) * 4           # written as is, like any other non-finite value
    cr, sr = math.cos(roll / 2), math.sin(roll / 2)
    cp, sp = math.cos(pitch / 2), math.sin(pitch / 2)
    cy, sy = math.cos(yaw / 2), math.sin(yaw / 2)
    return (sr * cp * cy - cr * sp * sy, cr * sp * cy + sr * cp * sy, cr * cp * sy - sr * sp * cy,
            cr * cp * cy + sr * sp * sy)


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
        For an unknown field, a repeated one, or the wrong number of fields.
    """

    def __init__(self, type_name: str, fields: Sequence[str], size: int, option: str) -> None:
        self.type_name = type_name
        self.cls = _CLASSES[type_name]
        if size < 1:
            raise ConfigError(option, f"expected at least one entry, got {size}")
        self.exact = not fields              # the default layout: the array is the vector, no more
        if not fields:
            if type_name != "std_msgs/msg/Float64MultiArray":
                raise ConfigError(option, f"{type_name} needs one field per entry ({size} expected)")
            fields = [f"data.{i}" for i in range(size)]
        if len(fields) != size:
            raise ConfigError(option, f"expected {size} field paths, one per entry, got {len(fields)}")
        parsed = []
        for text in fields:
            if not isinstance(text, str) or not text.strip():
                raise ConfigError(option, f"expected field paths as text, got {text!r}")
            text = text.strip()
            sign = -1.0 if text.startswith("-") else 1.0
            parsed.append(_Field(text.lstrip("-").strip(), sign))
        paths = [f.path for f in parsed]
        if len(set(paths)) != len(paths):
            raise ConfigError(option, "a field path appears twice")
        for f in parsed:
            self._check_path(f.path, option)
        self.fields = parsed
        self.size = size
        self.joints = list(dict.fromkeys(f.path.split(".", 1)[1] for f in parsed)) \
            if type_name == "sensor_msgs/msg/JointState" else []
        self._signs = [f.sign for f in parsed]
        if type_name == "sensor_msgs/msg/JointState":
            self._write_slots = [(f.path.split(".", 1)[0], self.joints.index(f.path.split(".", 1)[1])) for f in parsed]
            self._write_heads = sorted({head for head, _ in self._write_slots})
        self._names_seen: tuple[str, ...] | None = None
        self._slots: list[tuple[int, int]] = []
        self._read = self._reader()

    def _check_path(self, path: str, option: str) -> None:
        t = self.type_name
        ok = False
        if t == "sensor_msgs/msg/JointState":
            head, _, joint = path.partition(".")
            ok = head in _JOINT_ARRAYS and bool(joint)
        elif t == "nav_msgs/msg/Odometry":
            ok = path in _ODOMETRY
        elif t == "std_msgs/msg/Float64MultiArray":
            head, _, index = path.partition(".")
            ok = head == "data" and index.isascii() and index.isdigit()
            if ok and (len(index) > 6 or int(index) >= _MAX_ENTRIES):
                raise ConfigError(option, f"{path[:20]!r}: the index must be below {_MAX_ENTRIES}")
        else:
            head, _, axis = path.partition(".")
            ok = head in _VECTOR3[t] and axis in _AXES
        if not ok:
            raise ConfigError(option, f"{path!r} is not a field of {t} (see the adapters' field paths)")

    # -- reading -------------------------------------------------------------------------
    def _reader(self) -> Callable[[Any], list[float]]:
        t = self.type_name
        if t == "sensor_msgs/msg/JointState":
            return self._read_joint_state
        if t == "std_msgs/msg/Float64MultiArray":
            indices = [int(f.path.split(".")[1]) for f in self.fields]
            signs = [f.sign for f in self.fields]
            need = max(indices) + 1
            exact = self.exact

            def read_array(message) -> list[float]:
                data = message.data
                if len(data) < need or (exact and len(data) != need):
                    raise MessageError("wrong_length", f"data has {len(data)} entries, "
                                                       f"{'exactly ' if exact else ''}{need} needed")
                return [s * data[i] for i, s in zip(indices, signs)]

            return read_array
        return self._read_attributes

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

    def _read_joint_state(self, message: JointState) -> list[float]:
        names = message.name
        key = tuple(names)
        if key != self._names_seen:
            self._locate_joints(key)          # once per new name list; then plain indexing
        count = len(key)
        arrays = (message.position, message.velocity, message.effort)
        out = []
        for (array, index), sign in zip(self._slots, self._signs):
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
        slots = []
        for f in self.fields:
            head, joint = f.path.split(".", 1)
            slots.append((_JOINT_ARRAYS.index(head), index[joint]))
        self._slots = slots
        self._names_seen = names

    def _read_attributes(self, message: Any) -> list[float]:
        out = []
        rpy = None
        for f in self.fields:
            if f.path.startswith("pose.orientation."):
                if rpy is None:
                    rpy = _quaternion_to_rpy(message.pose.pose.orientation)
                value = rpy[("roll", "pitch", "yaw").index(f.path.rsplit(".", 1)[1])]
            elif f.path.startswith(("pose.", "twist.")) and self.type_name == "nav_msgs/msg/Odometry":
                head, rest = f.path.split(".", 1)
                value = _attribute(getattr(message, head), head + "." + rest)
            else:
                value = _attribute(message, f.path)
            out.append(f.sign * value)
        return out

    # -- writing -------------------------------------------------------------------------
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
        t = self.type_name
        if t == "sensor_msgs/msg/JointState":
            if list(message.name) != self.joints:
                message.name = list(self.joints)
            arrays = {head: [0.0] * len(self.joints) for head in self._write_heads}
            for (head, slot), sign, v in zip(self._write_slots, self._signs, values):
                arrays[head][slot] = sign * float(v)
            for head in _JOINT_ARRAYS:
                setattr(message, head, arrays.get(head, ()))
            return message
        if t == "std_msgs/msg/Float64MultiArray":
            size = max(int(f.path.split(".")[1]) for f in self.fields) + 1
            data = [0.0] * size
            for f, v in zip(self.fields, values):
                data[int(f.path.split(".")[1])] = f.sign * float(v)
            message.data = data
            return message
        rpy = [0.0, 0.0, 0.0]
        orientation = False
        for f, v in zip(self.fields, values):
            if f.path.startswith("pose.orientation."):
                rpy[("roll", "pitch", "yaw").index(f.path.rsplit(".", 1)[1])] = f.sign * float(v)
                orientation = True
            elif t == "nav_msgs/msg/Odometry":
                head, rest = f.path.split(".", 1)
                _set_attribute(getattr(message, head), head + "." + rest, f.sign * float(v))
            else:
                _set_attribute(message, f.path, f.sign * float(v))
        if orientation:
            q = message.pose.pose.orientation
            q.x, q.y, q.z, q.w = _rpy_to_quaternion(*rpy)
        return message


def _listed(names: Sequence[str], most: int = 8) -> str:
    """Names for a message: quoted (a name may hold a line break), at most ``most`` of them."""
    shown = ", ".join(repr(n) for n in names[:most])
    return shown + (f", ... ({len(names)} in all)" if len(names) > most else "")


def _attribute(message: Any, path: str) -> float:
    """``pose.position.x`` of an Odometry is ``message.pose.pose.position.x`` (PoseWithCovariance)."""
    parts = path.split(".")
    obj = message
    if parts[0] in ("pose", "twist") and hasattr(obj, parts[0]):
        obj = getattr(obj, parts[0])
        parts = parts[1:]
    for part in parts:
        obj = getattr(obj, part)
    return float(obj)


def _set_attribute(message: Any, path: str, value: float) -> None:
    parts = path.split(".")
    obj = message
    if parts[0] in ("pose", "twist") and hasattr(obj, parts[0]):
        obj = getattr(obj, parts[0])
        parts = parts[1:]
    for part in parts[:-1]:
        obj = getattr(obj, part)
    setattr(obj, parts[-1], value)
