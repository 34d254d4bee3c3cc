"""The ros2_control layout's messages: a JointTrajectory as plain values, joints in a broadcaster's order."""

import pytest

pytest.importorskip("rclpy", reason="rclpy is not installed (pip install '.[ros]')")

from builtin_interfaces.msg import Duration  # noqa: E402
from sensor_msgs.msg import JointState  # noqa: E402
from trajectory_msgs.msg import JointTrajectory, JointTrajectoryPoint  # noqa: E402

from linz_ros.nodes._ros2_control import joint_order_problem, order_joints, trajectory_points  # noqa: E402
from linz_ros.nodes.adapters import FieldMap  # noqa: E402

JOINTS = ["turret", "shoulder", "elbow", "wrist_1", "wrist_2", "wrist_3"]
FIELDS = [f"position.{j}" for j in JOINTS] + [f"velocity.{j}" for j in JOINTS]


def test_a_joint_trajectory_becomes_names_times_and_rows_with_its_stamp():
    message = JointTrajectory(joint_names=["a", "b"], points=[
        JointTrajectoryPoint(positions=[1.0, 2.0], time_from_start=Duration(sec=1, nanosec=500_000_000)),
        JointTrajectoryPoint(positions=[3.0, 4.0], velocities=[0.1, 0.2], time_from_start=Duration(sec=2))])
    points, stamp = trajectory_points(message)
    assert stamp is None                                              # a zero stamp: from receipt
    assert points.names == ["a", "b"] and points.times == [1.5, 2.0]
    assert points.positions == [[1.0, 2.0], [3.0, 4.0]] and points.velocities == [[], [0.1, 0.2]]
    message.header.stamp.sec = 7
    assert trajectory_points(message)[1] == 7.0


def test_joints_written_in_a_broadcasters_order_read_back_the_same_vector():
    mapping = FieldMap("sensor_msgs/msg/JointState", FIELDS, 12, "state_fields")
    x = [0.1 * k for k in range(12)]
    scrambled = sorted(JOINTS)                                        # alphabetical, as a broadcaster may list them
    assert joint_order_problem(mapping, scrambled) is None
    message = order_joints(mapping.write(x), scrambled)
    assert list(message.name) == scrambled and list(message.name) != JOINTS
    assert list(message.position)[scrambled.index("turret")] == 0.0 and list(message.effort) == []
    assert mapping.read(message) == pytest.approx(x)


@pytest.mark.parametrize("order, words", [(JOINTS[:5], "expected each of the joints 'turret', 'shoulder'"),
                                          (JOINTS[:5] + ["wrist_2"], "expected each of the joints"),
                                          (JOINTS[:5] + ["gripper"], "got 'turret'")])
def test_a_joint_order_that_is_not_the_maps_joints_is_named(order, words):
    mapping = FieldMap("sensor_msgs/msg/JointState", FIELDS, 12, "state_fields")
    assert words in joint_order_problem(mapping, order)
    assert "JointState" in joint_order_problem(FieldMap("std_msgs/msg/Float64MultiArray", [], 2, "f"), ["a"])


def test_a_state_missing_a_joint_is_refused_in_one_line_naming_it():
    from linz_ros.nodes.adapters import MessageError
    mapping = FieldMap("sensor_msgs/msg/JointState", FIELDS, 12, "state_fields")
    message = JointState(name=JOINTS[1:], position=[0.0] * 5, velocity=[0.0] * 5)
    with pytest.raises(MessageError, match=r"^unknown_joint: joint\(s\) 'turret' not in the message \(it has "
                                           r"'shoulder'") as err:
        mapping.read(message)
    assert "\n" not in str(err.value)
