"""Message adapters: every supported type round-trips, field paths are checked, bad messages are named."""

import math

import pytest

pytest.importorskip("rclpy", reason="the ROS 2 message packages are not installed (pip install '.[ros]')")

from geometry_msgs.msg import Twist, Wrench  # noqa: E402
from nav_msgs.msg import Odometry  # noqa: E402
from sensor_msgs.msg import JointState  # noqa: E402
from std_msgs.msg import Float64MultiArray  # noqa: E402

from linz_ros.errors import ConfigError  # noqa: E402
from linz_ros.nodes.adapters import (FieldMap, MessageError, labelled_array, set_stamp, split_seconds,  # noqa: E402
                                     stamp_seconds)

CASES = [
    ("sensor_msgs/msg/JointState", ["position.a", "position.b", "velocity.a", "-velocity.b"]),
    ("nav_msgs/msg/Odometry", ["pose.position.x", "pose.position.y", "pose.orientation.yaw", "twist.linear.x",
                               "-twist.linear.y", "twist.angular.z"]),
    ("std_msgs/msg/Float64MultiArray", ["data.2", "data.0", "data.1"]),
    ("geometry_msgs/msg/Wrench", ["force.x", "torque.z"]),
    ("geometry_msgs/msg/Twist", ["linear.x", "angular.z", "linear.y"]),
]


@pytest.mark.parametrize("type_name, fields", CASES, ids=[c[0].split("/")[-1] for c in CASES])
def test_write_then_read_gives_the_vector_back(type_name, fields):
    values = [0.3, -1.25, 2.5, 0.0, -0.7, 1.1][:len(fields)]
    mapping = FieldMap(type_name, fields, len(fields), "fields")
    message = mapping.write(values)
    assert mapping.read(message) == pytest.approx(values, abs=1e-12)


def test_joint_state_is_read_by_name_in_any_order_and_signs_apply():
    mapping = FieldMap("sensor_msgs/msg/JointState", ["position.elbow", "velocity.shoulder", "-effort.elbow"], 3, "f")
    message = JointState(name=["wrist", "elbow", "shoulder"], position=[9.0, 1.0, 2.0], velocity=[9.0, 3.0, 4.0],
                         effort=[9.0, 5.0, 6.0])
    assert mapping.read(message) == [1.0, 4.0, -5.0]


def test_odometry_yaw_comes_from_the_quaternion():
    mapping = FieldMap("nav_msgs/msg/Odometry", ["pose.orientation.yaw"], 1, "f")
    message = Odometry()
    message.pose.pose.orientation.z = math.sin(0.6 / 2)
    message.pose.pose.orientation.w = math.cos(0.6 / 2)
    assert mapping.read(message) == pytest.approx([0.6])
    assert mapping.read(mapping.write([-2.9])) == pytest.approx([-2.9])      # through +-pi


def test_an_empty_field_list_means_data_in_order_and_nothing_more():
    mapping = FieldMap("std_msgs/msg/Float64MultiArray", [], 3, "f")
    assert mapping.read(Float64MultiArray(data=[1.0, 2.0, 3.0])) == [1.0, 2.0, 3.0]
    # a longer array is another layout: refused rather than read in part
    with pytest.raises(MessageError, match="data has 4 entries, exactly 3 needed") as info:
        mapping.read(Float64MultiArray(data=[1.0, 2.0, 3.0, 4.0]))
    assert info.value.reason == "wrong_length"


def test_named_entries_are_read_from_a_longer_array():
    mapping = FieldMap("std_msgs/msg/Float64MultiArray", ["data.0", "-data.3"], 2, "f")
    assert mapping.read(Float64MultiArray(data=[1.0, 2.0, 3.0, 4.0, 5.0])) == [1.0, -4.0]


@pytest.mark.parametrize("message, reason", [
    (JointState(name=["a"], position=[1.0], velocity=[0.0]), "unknown_joint"),
    (JointState(name=["a", "b"], position=[1.0], velocity=[0.0, 0.0]), "wrong_length"),
    (JointState(name=["a", "a"], position=[1.0, 1.0], velocity=[0.0, 0.0]), "bad_message"),
])
def test_joint_state_messages_that_do_not_fit_are_named(message, reason):
    mapping = FieldMap("sensor_msgs/msg/JointState", ["position.a", "velocity.b"], 2, "f")
    with pytest.raises(MessageError) as info:
        mapping.read(message)
    assert info.value.reason == reason


def test_short_arrays_are_refused():
    with pytest.raises(MessageError, match="wrong_length"):
        FieldMap("std_msgs/msg/Float64MultiArray", [], 3, "f").read(Float64MultiArray(data=[1.0]))


@pytest.mark.parametrize("type_name, fields, words", [
    ("sensor_msgs/msg/JointState", ["angle.a"], "'angle.a' is not a field"),
    ("nav_msgs/msg/Odometry", ["pose.position.w"], "is not a field"),
    ("geometry_msgs/msg/Wrench", ["force.x", "force.x"], "appears twice"),
    ("geometry_msgs/msg/Twist", ["linear.x"], "expected 2 field paths"),
    ("sensor_msgs/msg/JointState", [], "needs one field per entry"),
])
def test_bad_field_maps_are_one_line(type_name, fields, words):
    size = 2 if "Twist" in type_name or not fields else len(fields)
    with pytest.raises(ConfigError, match=words):
        FieldMap(type_name, fields, size, "state_fields")


def test_stamps_and_labelled_arrays():
    message = JointState()
    assert stamp_seconds(message) is None                 # a zero stamp means none
    set_stamp(message, 12.25)
    assert stamp_seconds(message) == pytest.approx(12.25)
    assert stamp_seconds(Wrench()) is None
    assert split_seconds(2.9999999999) == (3, 0) and split_seconds(1.5) == (1, 500_000_000)
    array = labelled_array([1.0, 2.0], ["a", "b"])
    assert array.layout.dim[0].label == "a,b" and list(array.data) == [1.0, 2.0]
    assert isinstance(Twist(), Twist)


@pytest.mark.parametrize("scale, words", [(0.0, "norm 0"), (2.0, "norm 2")])
def test_an_unfilled_or_unnormalised_quaternion_is_refused(scale, words):
    mapping = FieldMap("nav_msgs/msg/Odometry", ["pose.orientation.yaw"], 1, "f")
    message = Odometry()
    q = message.pose.pose.orientation
    q.x, q.y, q.z, q.w = 0.0, 0.0, scale * math.sin(0.8), scale * math.cos(0.8)
    with pytest.raises(MessageError, match=words):
        mapping.read(message)
    q.z, q.w = 1.01 * math.sin(0.8), 1.01 * math.cos(0.8)          # nearly unit: normalised
    assert mapping.read(message) == pytest.approx([1.6])


def test_stamps_are_always_written_and_clamped_to_the_message_range():
    message = JointState()
    set_stamp(message, 5.0)
    set_stamp(message, -1.0)                                      # not left at 5 s on a reused message
    assert stamp_seconds(message) is None
    set_stamp(message, 1e12)
    assert message.header.stamp.sec == 2_147_483_647


def test_the_supported_types_are_the_rows_of_one_table():
    from linz_ros.nodes.adapters import ADAPTERS, COMMAND_TYPES, STATE_TYPES
    assert set(STATE_TYPES) == {"sensor_msgs/msg/JointState", "nav_msgs/msg/Odometry",
                                "std_msgs/msg/Float64MultiArray"}
    assert COMMAND_TYPES == ("std_msgs/msg/Float64MultiArray", "sensor_msgs/msg/JointState",
                             "geometry_msgs/msg/Wrench", "geometry_msgs/msg/Twist")
    for name, row in ADAPTERS.items():
        assert row.name == name and row.stamped == hasattr(row.cls(), "header")
        assert FieldMap(name, [f for t, f in CASES if t == name][0], len([f for t, f in CASES if t == name][0]),
                        "f").stamped == row.stamped


def test_a_new_message_type_is_one_new_row(monkeypatch):
    from geometry_msgs.msg import Accel

    from linz_ros.nodes import adapters
    row = adapters._vector3_row("geometry_msgs/msg/Accel", Accel, ("linear", "angular"))
    monkeypatch.setitem(adapters.ADAPTERS, row.name, row)
    mapping = FieldMap("geometry_msgs/msg/Accel", ["angular.z", "-linear.x"], 2, "command_fields")
    message = mapping.write([0.5, 2.0])
    assert isinstance(message, Accel) and message.angular.z == 0.5 and message.linear.x == -2.0
    assert mapping.read(message) == [0.5, 2.0]
    with pytest.raises(ConfigError, match="'force.x' is not a field of geometry_msgs/msg/Accel"):
        FieldMap("geometry_msgs/msg/Accel", ["force.x"], 1, "command_fields")


def test_a_field_map_of_an_unknown_type_is_one_line():
    with pytest.raises(ConfigError, match="state_fields: unsupported message type 'std_msgs/msg/String'; expected "
                                          "one of std_msgs/msg/Float64MultiArray, "):
        FieldMap("std_msgs/msg/String", ["data"], 1, "state_fields")


# -- Odometry's derived fields: parent-frame velocity and Euler-angle rates (REP 103/105) ---
VEHICLE = ["pose.position.x", "pose.position.y", "pose.position.z", "pose.orientation.roll", "pose.orientation.pitch",
           "pose.orientation.yaw", "twist.world.x", "twist.world.y", "-twist.world.z", "twist.euler.roll",
           "twist.euler.pitch", "twist.euler.yaw"]


def _zyx(roll, pitch, yaw):
    """R = Rz(yaw) Ry(pitch) Rx(roll), built with numpy (not the adapters' quaternion route)."""
    import numpy as np
    cr, sr, cp, sp, cy, sy = np.cos(roll), np.sin(roll), np.cos(pitch), np.sin(pitch), np.cos(yaw), np.sin(yaw)
    rx = np.array([[1, 0, 0], [0, cr, -sr], [0, sr, cr]])
    ry = np.array([[cp, 0, sp], [0, 1, 0], [-sp, 0, cp]])
    rz = np.array([[cy, -sy, 0], [sy, cy, 0], [0, 0, 1]])
    return rz @ ry @ rx


def _odometry(roll=0.0, pitch=0.0, yaw=0.0, linear=(0.0, 0.0, 0.0), angular=(0.0, 0.0, 0.0)):
    message = FieldMap("nav_msgs/msg/Odometry", ["pose.orientation.roll", "pose.orientation.pitch",
                                                 "pose.orientation.yaw"], 3, "f").write([roll, pitch, yaw])
    twist = message.twist.twist
    (twist.linear.x, twist.linear.y, twist.linear.z), (twist.angular.x, twist.angular.y, twist.angular.z) = \
        linear, angular
    return message


def test_a_vehicle_state_in_world_velocities_and_euler_rates_round_trips():
    import numpy as np
    rng = np.random.default_rng(20240615)
    mapping = FieldMap("nav_msgs/msg/Odometry", VEHICLE, 12, "state_fields")
    for _ in range(20):
        state = list(rng.uniform(-5.0, 5.0, 12))
        state[3:6] = rng.uniform(-1.0, 1.0, 3)
        message = mapping.write(state)
        assert mapping.read(message) == pytest.approx(state, abs=1e-12, rel=0)
        # the twist is in the body frame: |v_body| = |v_world|
        linear = message.twist.twist.linear
        assert math.hypot(linear.x, linear.y, linear.z) == pytest.approx(math.hypot(*state[6:9]), rel=1e-12)


def test_world_velocity_at_yaw_90_degrees_is_body_forward_speed_along_y():
    # hand-computed: heading +y (yaw = 90 deg), moving forward at 1 m/s -> parent-frame (0, 1, 0)
    mapping = FieldMap("nav_msgs/msg/Odometry", ["twist.world.x", "twist.world.y", "twist.world.z"], 3, "f")
    assert mapping.read(_odometry(yaw=math.pi / 2, linear=(1.0, 0.0, 0.0))) == pytest.approx([0.0, 1.0, 0.0],
                                                                                             abs=1e-15)
    # and writing that state gives the body forward speed
    written = FieldMap("nav_msgs/msg/Odometry", ["pose.orientation.yaw", "twist.world.y"], 2, "f").write(
        [math.pi / 2, 1.0])
    linear = written.twist.twist.linear
    assert (linear.x, linear.y, linear.z) == pytest.approx((1.0, 0.0, 0.0), abs=1e-15)


def test_euler_rates_are_the_body_rates_when_level():
    mapping = FieldMap("nav_msgs/msg/Odometry", ["twist.euler.roll", "twist.euler.pitch", "-twist.euler.yaw"], 3, "f")
    assert mapping.read(_odometry(yaw=2.2, angular=(0.3, -0.4, 0.5))) == pytest.approx([0.3, -0.4, -0.5],
                                                                                       abs=1e-15)


def test_euler_rates_agree_with_the_rotation_matrix_differentiated_numerically():
    # Euler kinematic equations (Stevens and Lewis, Aircraft Control and Simulation; from memory),
    # checked by another route: R(t) from ZYX angles moving at the rates, body rates from the skew
    # matrix R^T dR/dt (central differences)
    import numpy as np
    rng = np.random.default_rng(7)
    angles, rates = rng.uniform(-1.0, 1.0, 3), rng.uniform(-2.0, 2.0, 3)
    h = 1e-6
    derivative = (_zyx(*(angles + h * rates)) - _zyx(*(angles - h * rates))) / (2 * h)
    omega = _zyx(*angles).T @ derivative
    body = (omega[2, 1], omega[0, 2], omega[1, 0])
    mapping = FieldMap("nav_msgs/msg/Odometry", ["twist.euler.roll", "twist.euler.pitch", "twist.euler.yaw"], 3, "f")
    assert mapping.read(_odometry(*angles, angular=body)) == pytest.approx(list(rates), abs=1e-8)


def test_euler_rates_at_gimbal_lock_are_refused_but_world_velocity_is_read():
    message = _odometry(roll=0.2, pitch=math.pi / 2, yaw=0.1, linear=(1.0, 0.0, 0.0), angular=(0.0, 0.0, 0.1))
    with pytest.raises(MessageError, match=r"bad_message: pitch 90 deg is at gimbal lock: the Euler-angle rates "
                                           r"are undefined \(\|cos\(pitch\)\| < 1e-06\)") as info:
        FieldMap("nav_msgs/msg/Odometry", ["twist.euler.yaw"], 1, "f").read(message)
    assert info.value.reason == "bad_message"
    world = FieldMap("nav_msgs/msg/Odometry", ["twist.world.z"], 1, "f").read(message)
    assert world == pytest.approx([-1.0], abs=1e-15)             # nose straight up in ZYX: forward is -z


def test_derived_fields_need_a_filled_quaternion_when_read():
    message = _odometry(linear=(1.0, 0.0, 0.0))
    message.pose.pose.orientation.w = 0.0
    with pytest.raises(MessageError, match="norm 0"):
        FieldMap("nav_msgs/msg/Odometry", ["twist.world.x"], 1, "f").read(message)


def test_without_pose_angles_the_derived_twist_is_written_with_the_identity_pose():
    mapping = FieldMap("nav_msgs/msg/Odometry", ["twist.world.x", "twist.euler.yaw"], 2, "f")
    message = _odometry(roll=0.5, pitch=0.2, yaw=1.0)                # a reused message: its pose is not kept
    mapping.write([2.0, 0.3], message)
    q = message.pose.pose.orientation
    assert (q.x, q.y, q.z, q.w) == (0.0, 0.0, 0.0, 1.0)
    assert message.twist.twist.linear.x == 2.0 and message.twist.twist.angular.z == 0.3
    assert mapping.read(message) == [2.0, 0.3]


@pytest.mark.parametrize("fields, words", [
    (["twist.world.x", "-twist.linear.y"], "'twist.linear.y' and 'twist.world.x' cannot share a map: both stand "
                                           "for twist.twist.linear"),
    (["twist.euler.yaw", "twist.angular.z"], "'twist.angular.z' and 'twist.euler.yaw' cannot share a map: both "
                                             "stand for twist.twist.angular"),
])
def test_body_and_derived_twist_fields_cannot_share_a_map(fields, words):
    with pytest.raises(ConfigError, match=f"^state_fields: {words} \\(use the body-frame or the derived paths, "
                                          f"not both\\)$"):
        FieldMap("nav_msgs/msg/Odometry", fields, 2, "state_fields")
    # body-frame velocity with Euler rates, or parent-frame velocity with body rates, is one map
    for allowed in (["twist.linear.x", "twist.euler.yaw"], ["twist.world.x", "twist.angular.z"]):
        mapping = FieldMap("nav_msgs/msg/Odometry", allowed, 2, "state_fields")
        assert mapping.read(mapping.write([0.5, -0.25])) == pytest.approx([0.5, -0.25], abs=1e-15)
