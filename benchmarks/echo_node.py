"""A bare rclpy echo node: every JointState on ``state_topic`` goes straight back out on
``command_topic``. The reference of ``benchmarks/node_latency.py``: the same message type,
QoS and executor as the controller, and no work."""

from __future__ import annotations

import sys

from rclpy.node import Node
from sensor_msgs.msg import JointState

from linz_ros.nodes._common import EXECUTORS, control_qos, declare, spin_node


class EchoNode(Node):
    def __init__(self) -> None:
        super().__init__("linz_echo")
        state_topic = declare(self, "state_topic", "/pick_arm/joint_states", "input", True)
        command_topic = declare(self, "command_topic", "/pick_arm/joint_efforts", "output", True)
        declare(self, "executor", "single_threaded", f"one of {', '.join(EXECUTORS)}", True)
        qos = control_qos()
        self.publisher = self.create_publisher(JointState, command_topic, qos)
        self.create_subscription(JointState, state_topic, self.publisher.publish, qos)


if __name__ == "__main__":
    sys.exit(spin_node(EchoNode, sys.argv))
