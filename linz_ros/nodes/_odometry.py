"""``nav_msgs/msg/Odometry`` for the message adapters: its field paths and its codec.

REP 103/105: the pose is in the parent frame (``header.frame_id``), the twist in the child
(body) frame (``child_frame_id``). Besides the message's own fields (``pose.position.x|y|z``,
``pose.orientation.roll|pitch|yaw``, the ZYX Euler angles of the quaternion,
``twist.linear.x|y|z``, ``twist.angular.x|y|z``) two groups are derived, for models whose
states are parent-frame velocities and Euler-angle rates:

- ``twist.world.x|y|z``: the body linear velocity rotated into the parent frame by the
  pose's quaternion, ``v_world = R(q) v_body``;
- ``twist.euler.roll|pitch|yaw``: the ZYX Euler-angle rates of the body rates
  ``(p, q, r) = twist.angular`` (the Euler kinematic equations, e.g. Stevens and Lewis,
  *Aircraft Control and Simulation*): ``roll' = p + (q sin(roll) + r cos(roll)) tan(pitch)``,
  ``pitch' = q cos(roll) - r sin(roll)``, ``yaw' = (q sin(roll) + r cos(roll)) / cos(pitch)``.
  Where ``|cos(pitch)| < GIMBAL_LOCK_COS`` (gimbal lock) they are undefined and reading
  refuses the message (``bad_message``).

Reading a derived field uses the message's quaternion, whether or not the map holds the
pose angles, and refuses an unfilled or far from unit one as the angles do. Writing sets the
pose first, from the angles in the map (missing ones 0; with none, the identity quaternion,
written even on a reused message so that it is never stale), then the twist from that pose:
``twist.linear = R(q)^T v_world`` and ``twist.angular`` the body rates of the Euler rates
(missing components 0). The message is thus consistent with its own pose and reads back as
the vector. A map mixes neither ``twist.linear`` with ``twist.world`` nor ``twist.angular``
with ``twist.euler``: each pair would write the same vector of the message.
"""

from __future__ import annotations

import math
from operator import attrgetter
from typing import Any, Sequence

__all__ = ["AXES", "ANGLES", "PATHS", "GIMBAL_LOCK_COS", "OdometryCodec", "map_problem"]

AXES = ("x", "y", "z")
ANGLES = ("roll", "pitch", "yaw")
#: Below this |cos(pitch)| the Euler-angle rates are refused: the rounding of a quaternion
#: (1e-16) alone then moves 1/cos(pitch), the rates' gain, by more than 1e-4 of its size.
GIMBAL_LOCK_COS = 1e-6

_PLAIN, _ANGLE, _WORLD, _EULER = range(4)           # kinds of field
_DERIVED = {"pose.orientation": (_ANGLE, ANGLES), "twist.world": (_WORLD, AXES), "twist.euler": (_EULER, ANGLES)}
PATHS = frozenset({f"{group}.{name}" for group, (_, names) in _DERIVED.items() for name in names}
                  | {f"{group}.{a}" for group in ("pose.position", "twist.linear", "twist.angular") for a in AXES})
_EXCLUSIVE = (("twist.linear", "twist.world"), ("twist.angular", "twist.euler"))


def map_problem(paths: Sequence[str]) -> str | None:
    """Why Odometry field paths cannot share one map (a body twist group with its derived one).

    Parameters
    ----------
    paths : sequence of str
        Field paths without their signs, each one of :data:`PATHS`.

    Returns
    -------
    str or None
        One line naming both paths, or None.
    """
    for body, derived in _EXCLUSIVE:
        first = [next((p for p in paths if p.startswith(group + ".")), None) for group in (body, derived)]
        if None not in first:
            return (f"{first[0]!r} and {first[1]!r} cannot share a map: both stand for "
                    f"twist.{body} (use the body-frame or the derived paths, not both)")
    return None


def _bad_message(detail: str) -> ValueError:
    # the adapters module imports this one, so its error class is looked up when needed
    from linz_ros.nodes.adapters import MessageError
    return MessageError("bad_message", detail)


def _matrix(x: float, y: float, z: float, w: float) -> tuple[tuple[float, ...], ...]:
    """The rotation matrix (parent from body) of a unit quaternion."""
    return ((1.0 - 2.0 * (y * y + z * z), 2.0 * (x * y - w * z), 2.0 * (x * z + w * y)),
            (2.0 * (x * y + w * z), 1.0 - 2.0 * (x * x + z * z), 2.0 * (y * z - w * x)),
            (2.0 * (x * z - w * y), 2.0 * (y * z + w * x), 1.0 - 2.0 * (x * x + y * y)))


def _unit_rotation(q: Any) -> tuple[tuple[float, ...], ...]:
    # an unfilled (all-zero) or far from unit quaternion is refused, a nearly unit one normalised
    x, y, z, w = q.x, q.y, q.z, q.w
    norm = math.sqrt(x * x + y * y + z * z + w * w)
    if not (math.isfinite(norm) and abs(norm - 1.0) <= 0.05):
        raise _bad_message(f"orientation quaternion has norm {norm:.4g}, not 1")
    return _matrix(x / norm, y / norm, z / norm, w / norm)


def _angles(r: tuple[tuple[float, ...], ...]) -> tuple[float, float, float]:
    """ZYX (yaw-pitch-roll) angles of a rotation matrix R = Rz(yaw) Ry(pitch) Rx(roll)."""
    return (math.atan2(r[2][1], r[2][2]), math.asin(max(-1.0, min(1.0, -r[2][0]))), math.atan2(r[1][0], r[0][0]))


def _rpy_to_quaternion(roll: float, pitch: float, yaw: float) -> tuple[float, float, float, float]:
    if not (math.isfinite(roll) and math.isfinite(pitch) and math.isfinite(yaw)):
        return (math.nan,) * 4           # written as is, like any other non-finite value
    cr, sr = math.cos(roll / 2), math.sin(roll / 2)
    cp, sp = math.cos(pitch / 2), math.sin(pitch / 2)
    cy, sy = math.cos(yaw / 2), math.sin(yaw / 2)
    return (sr * cp * cy - cr * sp * sy, cr * sp * cy + sr * cp * sy, cr * cp * sy - sr * sp * cy,
            cr * cp * cy + sr * sp * sy)


def _euler_rates(rpy: Sequence[float], body: Sequence[float]) -> tuple[float, float, float]:
    """ZYX Euler-angle rates of body rates (p, q, r) at the angles ``rpy``."""
    roll, pitch, _ = rpy
    cos_pitch = math.cos(pitch)
    if not abs(cos_pitch) >= GIMBAL_LOCK_COS:
        raise _bad_message(f"pitch {math.degrees(pitch):.6g} deg is at gimbal lock: the Euler-angle rates "
                           f"are undefined (|cos(pitch)| < {GIMBAL_LOCK_COS:g})")
    p, q, r = body
    s, c = math.sin(roll), math.cos(roll)
    turn = q * s + r * c
    return p + turn * math.tan(pitch), q * c - r * s, turn / cos_pitch


def _body_rates(rpy: Sequence[float], euler: Sequence[float]) -> tuple[float, float, float]:
    """Body rates (p, q, r) of ZYX Euler-angle rates: the inverse of :func:`_euler_rates`, defined everywhere."""
    roll, pitch, _ = rpy
    droll, dpitch, dyaw = euler
    s, c = math.sin(roll), math.cos(roll)
    sp, cp = math.sin(pitch), math.cos(pitch)
    return droll - dyaw * sp, dpitch * c + dyaw * s * cp, dyaw * c * cp - dpitch * s


class OdometryCodec:
    """Reads and writes a checked list of Odometry fields (see the module docstring).

    Parameters
    ----------
    fields : list of adapters' fields
        Each with ``path`` (one of :data:`PATHS`) and ``sign``; no pair refused by :func:`map_problem`.
    """

    def __init__(self, fields: Sequence[Any]) -> None:
        self.slots = []                        # (kind, component index or getter, parent getter, name, sign)
        for f in fields:
            group, _, name = f.path.rpartition(".")
            if group in _DERIVED:
                kind, names = _DERIVED[group]
                self.slots.append((kind, names.index(name), None, "", f.sign))
                continue
            chain = f"{f.path.split('.', 1)[0]}.{f.path}"     # pose.position.x is pose.pose.position.x
            parent, _, name = chain.rpartition(".")
            self.slots.append((_PLAIN, attrgetter(chain), attrgetter(parent), name, f.sign))
        self.kinds = {slot[0] for slot in self.slots}
        self.derived = self.kinds != {_PLAIN}

    def read(self, message: Any) -> list[float]:
        """The fields' values, signs applied.

        Parameters
        ----------
        message : nav_msgs.msg.Odometry

        Returns
        -------
        list of float
        """
        derived = self._derived(message) if self.derived else {}
        return [sign * (float(get(message)) if kind == _PLAIN else derived[kind][get])
                for kind, get, _, _, sign in self.slots]

    def _derived(self, message: Any) -> dict[int, Sequence[float]]:
        rotation = _unit_rotation(message.pose.pose.orientation)
        out: dict[int, Sequence[float]] = {_ANGLE: _angles(rotation)}
        twist = message.twist.twist
        if _WORLD in self.kinds:
            v = (twist.linear.x, twist.linear.y, twist.linear.z)
            out[_WORLD] = tuple(sum(row[j] * v[j] for j in range(3)) for row in rotation)
        if _EULER in self.kinds:
            out[_EULER] = _euler_rates(out[_ANGLE], (twist.angular.x, twist.angular.y, twist.angular.z))
        return out

    def write(self, values: Sequence[float], message: Any) -> None:
        """Set the fields from ``values`` (signs applied): the pose first, then the twist derived from it.

        Parameters
        ----------
        values : sequence of float
        message : nav_msgs.msg.Odometry
            Filled in place.
        """
        given = {_ANGLE: [0.0] * 3, _WORLD: [0.0] * 3, _EULER: [0.0] * 3}
        for (kind, slot, parent, name, sign), v in zip(self.slots, values):
            if kind == _PLAIN:
                setattr(parent(message), name, sign * float(v))
            else:
                given[kind][slot] = sign * float(v)
        if not self.derived:
            return
        q = message.pose.pose.orientation
        quaternion = _rpy_to_quaternion(*given[_ANGLE])
        q.x, q.y, q.z, q.w = quaternion
        twist = message.twist.twist
        if _WORLD in self.kinds:
            rotation, v = _matrix(*quaternion), given[_WORLD]
            twist.linear.x, twist.linear.y, twist.linear.z = (sum(rotation[i][j] * v[i] for i in range(3))
                                                              for j in range(3))
        if _EULER in self.kinds:
            twist.angular.x, twist.angular.y, twist.angular.z = _body_rates(given[_ANGLE], given[_EULER])
