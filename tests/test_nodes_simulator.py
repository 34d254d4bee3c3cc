"""The plant simulator node in-process (no DDS): brake, delay, faults, clock."""

import math

import pytest

rclpy = pytest.importorskip("rclpy", reason="rclpy is not installed (pip install '.[ros]')")

from sensor_msgs.msg import JointState  # noqa: E402

from linz_ros.errors import ConfigError  # noqa: E402
from support import BUNDLED, built_artifact  # noqa: E402

FIELDS = "['position.shoulder', 'position.elbow', 'velocity.shoulder', 'velocity.elbow']"


@pytest.fixture
def make(tmp_path):
    from linz_ros.artifact import seal  # noqa: F401
    from linz_ros.codegen import artifact_path, build_document, write_artifact
    from linz_ros.model import load_plant
    from linz_ros.nodes.simulator import PlantSimulatorNode
    from linz_ros.synthesis import synthesise
    path = write_artifact(build_document(synthesise(load_plant(BUNDLED / "pick_arm.yaml")), points=8)[0],
                          artifact_path(tmp_path, "pick_arm"))
    made = []

    def _make(**parameters):
        context = rclpy.Context()
        args = ["--ros-args", "-p", f"artifact:={path}", "-p", "state_type:=sensor_msgs/msg/JointState",
                "-p", f"state_fields:={FIELDS}", "-p", "command_type:=sensor_msgs/msg/JointState",
                "-p", "command_fields:=['effort.shoulder', 'effort.elbow']", "-p", "publish_clock:=true"]
        for key, value in parameters.items():
            args += ["-p", f"{key}:={value}"]
        rclpy.init(args=args, context=context)
        node = PlantSimulatorNode(context=context)
        made.append((node, context))
        return node

    yield _make
    for node, context in made:
        node.destroy_node()
        context.try_shutdown()


def _command(tau):
    return JointState(name=["shoulder", "elbow"], effort=list(tau))


def test_the_plant_stays_braked_until_the_first_command_is_applied_even_with_a_delay(make):
    sim = make(delay=0.1)
    start = list(sim.x)
    sim._on_command(_command([14.0, -0.09]))         # about the holding torque, received at t = 0
    for _ in range(40):                               # 0.08 s: received but not yet applied
        sim._tick()
    assert sim.x == start and sim.applied == 0
    for _ in range(20):                               # applied from 0.1 s on: the plant moves
        sim._tick()
    assert sim.applied == 1 and sim.x != start


def test_a_nan_burst_and_noise_reach_the_published_state(make):
    sim = make(nan_burst_at=0.01, nan_burst_duration=0.01, noise="[0.001]")
    published = []
    sim.state_pub.publish = published.append
    for _ in range(15):
        sim._tick()
    positions = [list(m.position) for m in published]
    assert any(all(math.isnan(v) for v in p) for p in positions)
    assert positions[0] != [0.4, 1.2]                  # noise on the sensor
    assert all(math.isfinite(v) for v in sim.x)        # never on the plant itself


def test_bad_commands_are_counted_and_ignored(make):
    sim = make()
    sim._on_command(JointState(name=["shoulder"], effort=[1.0]))
    sim._on_command(_command([math.nan, 0.0]))
    assert sim.rejected == 2 and sim.u == [0.0, 0.0]


def test_bad_parameters_are_one_line_config_errors(make):
    with pytest.raises(ConfigError, match="initial_state: expected 4 values"):
        make(initial_state="[1.0]")
    with pytest.raises(ConfigError, match="mismatch: 'mass' is not a parameter"):
        make(mismatch="['mass=5']")
    with pytest.raises(ConfigError, match="noise"):
        make(noise="[1.0, 2.0]")
