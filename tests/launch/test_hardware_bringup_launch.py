"""launch_testing: the hardware bringup (launch/hardware_bringup.launch.py) starts unconfigured and
commands only after configure and activate.

Runs where a ROS 2 distribution provides launch_testing, in a colcon workspace that has
built this package; elsewhere it is skipped with the reason, and
tests/integration/test_dds_lifecycle.py covers the same transitions over real DDS.
"""

import time
import unittest

import pytest

launch_testing = pytest.importorskip(
    "launch_testing", reason="launch_testing comes with a ROS 2 distribution and is not installed here; "
                             "tests/integration runs these scenarios over real DDS instead")

import launch  # noqa: E402
import launch_testing.actions  # noqa: E402
import rclpy  # noqa: E402
from launch.actions import IncludeLaunchDescription  # noqa: E402
from launch.launch_description_sources import PythonLaunchDescriptionSource  # noqa: E402
from lifecycle_msgs.msg import Transition  # noqa: E402
from lifecycle_msgs.srv import ChangeState, GetState  # noqa: E402
from launch_artifact import build_artifact, share  # noqa: E402
from sensor_msgs.msg import JointState  # noqa: E402


@pytest.mark.launch_test
def generate_test_description():
    include = IncludeLaunchDescription(
        PythonLaunchDescriptionSource(str(share() / "launch" / "hardware_bringup.launch.py")),
        launch_arguments={"artifact": str(build_artifact()), "state_topic": "/robot/joints",
                          "command_topic": "/robot/efforts"}.items())
    return launch.LaunchDescription([include, launch_testing.actions.ReadyToTest()])


class TestHardwareBringup(unittest.TestCase):

    @classmethod
    def setUpClass(cls):
        rclpy.init()

    @classmethod
    def tearDownClass(cls):
        rclpy.shutdown()

    def _call(self, node, client, request):
        self.assertTrue(client.wait_for_service(timeout_sec=20))
        future = client.call_async(request)
        rclpy.spin_until_future_complete(node, future, timeout_sec=20)
        return future.result()

    def test_commands_only_after_configure_and_activate_on_the_remapped_topics(self):
        node = rclpy.create_node("linz_launch_probe")
        commands = []
        node.create_subscription(JointState, "/robot/efforts", commands.append, 10)
        states = node.create_publisher(JointState, "/robot/joints", 10)
        get_state = node.create_client(GetState, "/linz_controller/get_state")
        change = node.create_client(ChangeState, "/linz_controller/change_state")

        def feed(seconds):
            end = time.time() + seconds
            while time.time() < end:
                message = JointState(name=["shoulder", "elbow"], position=[0.4, 1.2], velocity=[0.0, 0.0])
                message.header.stamp = node.get_clock().now().to_msg()
                states.publish(message)
                rclpy.spin_once(node, timeout_sec=0.01)

        self.assertEqual(self._call(node, get_state, GetState.Request()).current_state.label, "unconfigured")
        feed(0.5)
        self.assertEqual(commands, [])
        for transition in (Transition.TRANSITION_CONFIGURE, Transition.TRANSITION_ACTIVATE):
            request = ChangeState.Request()
            request.transition.id = transition
            self.assertTrue(self._call(node, change, request).success)
        feed(1.0)
        node.destroy_node()
        self.assertGreater(len(commands), 20)
