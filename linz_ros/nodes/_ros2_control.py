"""The ros2_control layout's messages: planned trajectories in, joints in a broadcaster's order.

A ``trajectory_msgs/msg/JointTrajectory`` reference is turned into plain values here
(:func:`trajectory_points`; :mod:`linz_ros.runtime.trajectory` checks and samples it). A
joint_state_broadcaster lists the joints in an order of its own (the hardware interfaces'
order), not the controller's: the simulator can stand in for it (:func:`order_joints`, its
``joint_order`` parameter), and the controller reads joints by name in any order.
"""

from __future__ import annotations

from typing import Any, Sequence

from sensor_msgs.msg import JointState

from linz_ros.nodes.adapters import _JOINT_ARRAYS, FieldMap, _listed, stamp_seconds
from linz_ros.runtime.trajectory import TrajectoryPoints

__all__ = ["trajectory_points", "joint_order_problem", "order_joints"]


def trajectory_points(message: Any) -> tuple[TrajectoryPoints, float | None]:
    """A ``trajectory_msgs/msg/JointTrajectory`` as plain values, and its start (header stamp).

    Parameters
    ----------
    message : trajectory_msgs.msg.JointTrajectory

    Returns
    -------
    (TrajectoryPoints, float or None)
        The names and points (``time_from_start`` in seconds); the stamp in seconds, None when
        zero (the trajectory then starts when it is received).
    """
    points = message.points
    return TrajectoryPoints(
        names=list(message.joint_names),
        times=[p.time_from_start.sec + p.time_from_start.nanosec * 1e-9 for p in points],
        positions=[list(p.positions) for p in points], velocities=[list(p.velocities) for p in points],
        accelerations=[list(p.accelerations) for p in points]), stamp_seconds(message)


def joint_order_problem(field_map: FieldMap, order: Sequence[str]) -> str | None:
    """Why ``order`` cannot be the order a JointState map's joints are written in, or None.

    Parameters
    ----------
    field_map : FieldMap
        A ``sensor_msgs/msg/JointState`` map.
    order : sequence of str
        Every joint of the map, once.

    Returns
    -------
    str or None
    """
    if field_map.type_name != "sensor_msgs/msg/JointState":
        return f"orders the joints of a JointState; the message is {field_map.type_name}"
    joints = list(dict.fromkeys(f.path.split(".", 1)[1] for f in field_map.fields))
    if sorted(order) != sorted(joints) or len(set(order)) != len(order):
        return f"expected each of the joints {_listed(joints)} once, got {_listed(list(order))}"
    return None


def order_joints(message: JointState, order: Sequence[str]) -> JointState:
    """The JointState's joints put in ``order`` (its arrays with them), in place.

    Parameters
    ----------
    message : sensor_msgs.msg.JointState
        Written by a :class:`FieldMap` whose joints are those of ``order``
        (:func:`joint_order_problem`).
    order : sequence of str

    Returns
    -------
    sensor_msgs.msg.JointState
        The same message.
    """
    index = {name: i for i, name in enumerate(message.name)}
    slots = [index[name] for name in order]
    for head in _JOINT_ARRAYS:
        values = getattr(message, head)
        if len(values):
            setattr(message, head, [values[i] for i in slots])
    message.name = list(order)
    return message
