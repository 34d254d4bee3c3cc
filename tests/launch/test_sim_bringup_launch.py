"""launch_testing: the simulation bringup (launch/sim_bringup.launch.py) comes up and tracks.

Runs where a ROS 2 distribution provides launch_testing, in a colcon workspace that has
built this package (``colcon test --packages-select linz_ros``, or ``launch_test`` on this
file). Elsewhere it is skipped with the reason; tests/integration/test_dds_closed_loop.py
covers the same scenario by starting the same executables with the same parameter files
as OS processes over real DDS.
"""

import time
import unittest

import pytest

launch_testing = pytest.importorskip(
    "launch_testing", reason="launch_testing comes with a ROS 2 distribution and is not installed here; "
                             "tests/integration runs these scenarios over real DDS instead")

import launch  # noqa: E402
import launch_testing.actions  # noqa: E402
import launch_testing.asserts  # noqa: E402
import rclpy  # noqa: E402
from launch.actions import IncludeLaunchDescription  # noqa: E402
from launch.launch_description_sources import PythonLaunchDescriptionSource  # noqa: E402
from launch_artifact import build_artifact, share  # noqa: E402
from std_msgs.msg import Float64MultiArray  # noqa: E402


@pytest.mark.launch_test
def generate_test_description():
    include = IncludeLaunchDescription(
        PythonLaunchDescriptionSource(str(share() / "launch" / "sim_bringup.launch.py")),
        launch_arguments={"plant": "pick_arm", "artifact": str(build_artifact())}.items())
    return launch.LaunchDescription([include, launch_testing.actions.ReadyToTest()])


class TestSimulationBringup(unittest.TestCase):

    @classmethod
    def setUpClass(cls):
        rclpy.init()

    @classmethod
    def tearDownClass(cls):
        rclpy.shutdown()

    def test_the_controller_commands_in_nominal_mode(self):
        node = rclpy.create_node("linz_launch_probe")
        rows = []
        node.create_subscription(Float64MultiArray, "/linz_controller/conditioning",
                                 lambda message: rows.append(list(message.data)), 100)
        end = time.time() + 30
        while time.time() < end and len(rows) < 1500:
            rclpy.spin_once(node, timeout_sec=0.1)
        node.destroy_node()
        self.assertGreaterEqual(len(rows), 1500, "too few control steps on ~/conditioning")
        self.assertEqual({int(row[3]) for row in rows[-1000:]}, {0}, "every step nominal (mode 0)")

    def test_the_safety_notice_is_logged(self, proc_output):
        proc_output.assertWaitFor("SAFETY:", timeout=10, stream="stderr")


@launch_testing.post_shutdown_test()
class TestShutdown(unittest.TestCase):

    def test_every_node_exits_cleanly(self, proc_info):
        launch_testing.asserts.assertExitCodes(proc_info)
