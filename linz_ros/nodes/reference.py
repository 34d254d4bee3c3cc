"""The reference node: publishes y_ref and its derivatives for the controller's chains.

Publishes a labelled ``std_msgs/msg/Float64MultiArray`` ``[y1, y1', ..., y1^(r1), y2, ...]``
at ``rate`` Hz from a reference spec in the grammar of ``linz sim --reference``; the
move's times count from the first tick with a subscriber (DDS discovery may take a few
seconds, and a move that ran before anyone listened would arrive as a jump). The base value of each output is its value
at the artifact's operating point unless ``base`` is given. When simulated time jumps back
(a simulation reset, a restarted simulator) the move goes on where it was: its origin moves
with the clock.
"""

from __future__ import annotations

from typing import Any, Sequence

from rclpy.clock import JumpThreshold, TimeJump
from rclpy.duration import Duration
from rclpy.node import Node

from linz_ros.artifact import load_artifact
from linz_ros.errors import ConfigError
from linz_ros.nodes._common import control_qos, declare, entry_point
from linz_ros.nodes.adapters import labelled_array
from linz_ros.runtime import ControllerCore, parse_reference

__all__ = ["ReferenceNode", "main", "reference_labels", "CLOCK_JUMP_BACK"]

#: A backward jump of the node's clock larger than this (s) moves the move's origin with it.
CLOCK_JUMP_BACK = 1e-3


def reference_labels(outputs: Sequence[str], orders: Sequence[int]) -> list[str]:
    """Labels of the reference vector: ``tool_x, tool_x', tool_x'', tool_y, ...``.

    Parameters
    ----------
    outputs : sequence of str
    orders : sequence of int

    Returns
    -------
    list of str
    """
    return [name + "'" * k for name, r in zip(outputs, orders) for k in range(r + 1)]


class ReferenceNode(Node):
    """Publishes a reference generated from a spec.

    Parameters
    ----------
    node_name : str
    **kwargs
        Passed to :class:`rclpy.node.Node`.
    """

    def __init__(self, node_name: str = "linz_reference", **kwargs: Any) -> None:
        super().__init__(node_name, **kwargs)
        artifact_path = declare(self, "artifact", "", "controller artifact (names and relative degrees)", True)
        spec = declare(self, "reference", "hold", "reference spec, e.g. 'smooth:tool_x=0.05,duration=2,at=1'",
                       True)
        rate = declare(self, "rate", 100.0, "publishing rate (Hz)", True, 0.1, 10000.0)
        topic = declare(self, "topic", "reference", "reference topic", True)
        base = declare(self, "base", [], "output values before the move (empty: at the operating point)",
                       True, array_of=float)
        if not artifact_path:
            raise ConfigError("artifact", "parameter is empty: pass -p artifact:=PATH (from linz build)")
        artifact = load_artifact(artifact_path, check_plant=False)
        core = ControllerCore(artifact)
        orders = artifact.relative_degree
        if not base:
            base = core.output_values(artifact.operating_point)
        if len(base) != len(orders):
            raise ConfigError("base", f"expected {len(orders)} values, one per output ({', '.join(artifact.outputs)})")
        self.reference = parse_reference(spec, orders, list(base), artifact.outputs)
        self.labels = reference_labels(artifact.outputs, orders)
        self.publisher = self.create_publisher(type(labelled_array([], [])), topic, control_qos())
        self.start: float | None = None           # latched at the first tick that has a subscriber
        self.create_timer(1.0 / rate, self._tick)
        self._jump_handle = self.get_clock().create_jump_callback(
            JumpThreshold(min_forward=None, min_backward=Duration(nanoseconds=-int(CLOCK_JUMP_BACK * 1e9)),
                          on_clock_change=False), post_callback=self._on_clock_jump)
        self.get_logger().info(f"reference {spec!r} for {', '.join(artifact.outputs)} at {rate:g} Hz")

    def _now(self) -> float:
        return self.get_clock().now().nanoseconds * 1e-9

    def _on_clock_jump(self, jump: TimeJump) -> None:
        # called by rcl inside the /clock callback; an exception would skip later jump callbacks
        try:
            delta = jump.delta.nanoseconds * 1e-9
            if self.start is not None:
                self.start += delta
            self.get_logger().warning(f"time jumped back by {-delta:.3f} s: the reference goes on where it was")
        except Exception as err:  # noqa: BLE001
            self.get_logger().error(f"clock jump not handled: {type(err).__name__}: {err}")

    def _tick(self) -> None:
        now = self._now()
        if self.start is None:
            # the move's times count from when someone listens (discovery can take seconds) and,
            # in simulated time, from the first /clock; until then the base value is published
            if now == 0.0:
                return
            if self.publisher.get_subscription_count() == 0:
                self.publisher.publish(labelled_array(self.reference.sample(-1.0), self.labels))
                return
            self.start = now
        self.publisher.publish(labelled_array(self.reference.sample(now - self.start), self.labels))


#: Console entry point ``linz_reference``.
main = entry_point(ReferenceNode, "linz_reference")


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
