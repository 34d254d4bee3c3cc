"""The plant simulator node in-process (no DDS): brake, delay, faults, clock."""

import math

import numpy as np
import pytest

rclpy = pytest.importorskip("rclpy", reason="rclpy is not installed (pip install '.[ros]')")

from sensor_msgs.msg import JointState  # noqa: E402

from linz_ros.errors import ConfigError  # noqa: E402
from support import BUNDLED  # noqa: E402

FIELDS = "['position.shoulder', 'position.elbow', 'velocity.shoulder', 'velocity.elbow']"


@pytest.fixture
def make(tmp_path):
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
    with pytest.raises(ConfigError, match="backend: expected one of native, python, got 'gpu'"):
        make(backend="gpu")


def test_the_backend_parameter_chooses_the_plant(make):
    assert make().plant.backend == "native" and make(backend="python").plant.backend == "python"


def _stamp(message):
    return message.header.stamp.sec + message.header.stamp.nanosec * 1e-9


def _clock_seconds(message):
    return message.clock.sec + message.clock.nanosec * 1e-9


def test_a_clock_jump_moves_simulated_time_clock_stamps_and_delayed_commands_once(make):
    sim = make(clock_jump_at=1.0, clock_jump_by=-0.5, delay=0.1)
    states, clocks = [], []
    sim.state_pub.publish = states.append
    sim.clock_pub.publish = clocks.append
    for _ in range(480):                               # to 0.96 s
        sim._tick()
    sim._on_command(_command([14.0, -0.09]))          # due at 1.06 s, before the jump
    for _ in range(20):                               # the jump at 1.0 s: to 0.5 s
        sim._tick()
    stamps = [_stamp(m) for m in states]
    assert stamps == [_clock_seconds(c) for c in clocks]
    steps = [round(b - a, 9) for a, b in zip(stamps, stamps[1:])]
    assert steps.count(0.002) == len(steps) - 1 and round(stamps[500 - 1] - stamps[500 - 2], 9) == -0.498
    assert sim.sim_time == pytest.approx(0.5) and sim.applied == 0
    for _ in range(29):                               # the command falls due 0.1 s after it came: 0.56 s
        sim._tick()
    assert sim.applied == 0
    sim._tick()
    sim._tick()
    assert sim.applied == 1
    for _ in range(600):                              # once only
        sim._tick()
    after = [_stamp(m) for m in states][499:]
    assert min(b - a for a, b in zip(after, after[1:])) > 0


def test_without_publish_clock_a_clock_jump_moves_the_state_stamps_only(make):
    import time

    sim = make(publish_clock="false", clock_jump_at=0.0, clock_jump_by=-5.0)
    states = []
    sim.state_pub.publish = states.append
    sim._tick()
    assert sim.clock_pub is None
    assert abs(_stamp(states[-1]) - (time.time() - 5.0)) < 0.5


def test_a_flood_samples_each_period_in_parts_and_the_plant_moves_the_same(make):
    plain, flooded = make(), make(flood_at=0.01, flood_duration=0.01, flood_factor=5)
    published = {id(plain): [], id(flooded): []}
    for sim in (plain, flooded):
        sim.state_pub.publish = published[id(sim)].append
        sim._on_command(_command([14.5, -0.2]))       # off the holding torque: the arm moves
        for _ in range(15):
            sim._tick()
    assert len(published[id(plain)]) == 15
    stamps = [_stamp(m) for m in published[id(flooded)]]
    assert len(stamps) == 10 + 5 * 5                  # five periods (0.010 to 0.018 s) in five parts each
    spacing = [round(b - a, 9) for a, b in zip(stamps, stamps[1:])]
    assert spacing.count(0.0004) == 25 and set(spacing) == {0.0004, 0.002}
    assert stamps[-1] == pytest.approx(15 * 0.002)
    assert flooded.x == pytest.approx(plain.x, abs=1e-10) and flooded.x != [0.4, 1.2, 0.0, 0.0]


def test_bad_jump_and_flood_parameters_are_one_line_config_errors(make):
    with pytest.raises(ConfigError, match="flood_factor: expected a whole number >= 1"):
        make(flood_factor=0)
    with pytest.raises(ConfigError, match="clock_jump_by: -2 s at 1 s would move simulated time to zero or before"):
        make(clock_jump_at=1.0, clock_jump_by=-2.0)


def test_a_publish_that_dds_refuses_is_counted_and_the_simulator_goes_on(make):
    from linz_ros.nodes._common import RCLError

    sim = make()
    published = []

    def refuse_every_other(message):
        if len(published) % 2:
            published.append(None)
            raise RCLError("Failed to publish: cannot publish data")
        published.append(message)
    sim.state_pub.publish = refuse_every_other
    for _ in range(6):
        sim._tick()
    assert len(published) == 6 and sim.publish_failures == 3 and sim.ticks == 6


def test_a_sensor_delay_publishes_each_state_late_with_its_own_stamp(make):
    from linz_ros.nodes.adapters import stamp_seconds

    sim = make(state_delay=0.01)                          # five periods at 500 Hz
    published = []
    sim.state_pub.publish = lambda message: published.append((sim._now(), message))
    for _ in range(20):
        sim._tick()
    assert len(published) == 20 - 5
    for sent_at, message in published:                   # the stamp is when it was measured
        assert sent_at - stamp_seconds(message) == pytest.approx(0.01, abs=1e-9)
    assert len(sim.delayed_states) == 5


def test_lockstep_holds_simulated_time_until_the_command_comes_back(make):
    sim = make(lockstep=True)
    states, clocks = [], []
    sim.state_pub.publish = states.append
    sim.clock_pub.publish = clocks.append
    sim._tick()
    for _ in range(5):                                   # no command: time stands still, nothing is sent
        sim._tick()
    assert sim.ticks == 1 and len(states) == 1 and len(clocks) == 1 and sim.owed_tick
    sim._on_command(_command([14.0, -0.09]))             # the answer runs the tick that was owed at once
    assert sim.ticks == 2 and len(states) == 2 and sim.applied == 1 and not sim.owed_tick
    assert _clock_seconds(clocks[-1]) == pytest.approx(2 * sim.period)
    sim._tick()                                           # waiting again for the answer to state 2
    assert sim.ticks == 2


def test_lockstep_advances_without_a_command_after_its_timeout(make):
    import time

    sim = make(lockstep=True, lockstep_timeout=0.01)
    sim.state_pub.publish = lambda message: None
    sim._tick()
    sim._tick()
    assert sim.ticks == 1
    time.sleep(0.02)
    sim._tick()
    assert sim.ticks == 2 and sim.lockstep_timeouts == 1
    assert "lockstep timeouts 1" in sim.summary()


def test_lockstep_needs_simulated_time(make):
    with pytest.raises(ConfigError, match="lockstep: needs publish_clock: true"):
        make(lockstep=True, publish_clock=False)


def test_the_summary_counts_states_sent_and_dropped(make):
    sim = make(drop_probability=0.5, seed=3)
    sim.state_pub.publish = lambda message: None
    for _ in range(200):
        sim._tick()
    assert sim.states_sent + sim.states_dropped == 200 and 60 < sim.states_dropped < 140
    assert sim.summary().startswith("run: 0.400 s simulated, ") and \
        f"states sent {sim.states_sent}, dropped {sim.states_dropped}," in sim.summary()


# -- a dynamically extended artifact: the delivery cart's plant (states x, y, th; inputs v, omega) -----------
@pytest.fixture(scope="module")
def cart_artifact(tmp_path_factory):
    from support import built_artifact_file
    return built_artifact_file(BUNDLED / "delivery_cart.yaml", tmp_path_factory.mktemp("cart"))


@pytest.fixture
def make_cart(cart_artifact):
    from linz_ros.nodes.simulator import PlantSimulatorNode
    from support import ROOT, node_factory
    with node_factory(PlantSimulatorNode, ROOT / "config" / "delivery_cart.yaml", cart_artifact,
                      publish_clock="true") as make:
        yield make


def test_the_carts_odometry_carries_its_own_states_and_echoes_the_inputs_it_holds(make_cart):
    from geometry_msgs.msg import Twist

    sim = make_cart()
    assert sim.x == pytest.approx([0.0, 0.0, 0.7854]) and sim.u == [0.0, 0.0]   # the plant's own, not v_i1
    published = []
    sim.state_pub.publish = published.append
    sim._tick()                                        # braked: standing, and its odometry says so
    assert (published[-1].twist.twist.linear.x, published[-1].twist.twist.angular.z) == (0.0, 0.0)
    speed, turn, ticks = 0.5, 0.2, 50
    sim._on_command(Twist(linear=type(Twist().linear)(x=speed), angular=type(Twist().angular)(z=turn)))
    for _ in range(ticks):
        sim._tick()
    odometry = published[-1]
    assert (odometry.twist.twist.linear.x, odometry.twist.twist.angular.z) == (speed, turn)
    assert (odometry.twist.twist.linear.y, odometry.twist.twist.angular.x) == (0.0, 0.0)
    assert (odometry.header.frame_id, odometry.child_frame_id) == ("odom", "base_link")    # REP 105
    # a unicycle at constant speed and turn rate runs on a circle of radius v / omega (from memory)
    t, th0 = ticks / sim.p["rate"], 0.7854
    x = speed / turn * (math.sin(th0 + turn * t) - math.sin(th0))
    y = speed / turn * (math.cos(th0) - math.cos(th0 + turn * t))
    assert sim.x == pytest.approx([x, y, th0 + turn * t], abs=1e-9)
    assert sim.state_map.read(odometry) == pytest.approx(sim.x, abs=1e-9)


def test_input_fields_that_are_state_fields_or_of_the_wrong_number_are_one_line_config_errors(make_cart):
    with pytest.raises(ConfigError, match=r"input_fields: 'pose.position.x' \(input v\) is also a state field"):
        make_cart(input_fields="['-pose.position.x', '']")
    with pytest.raises(ConfigError, match=r"input_fields: expected 2 field paths, one per input \(v, omega; '' "
                                          r"for one not echoed\), got 1"):
        make_cart(input_fields="['twist.linear.x']")
    with pytest.raises(ConfigError, match="input_fields: 'twist.linear.q' is not a field of nav_msgs/msg/Odometry"):
        make_cart(input_fields="['twist.linear.q', '']")
    # the echoed inputs share the state message's map: a body twist beside its derived world one is refused
    with pytest.raises(ConfigError, match="input_fields: 'twist.linear.x' and 'twist.world.x' cannot share a map"):
        make_cart(state_fields="['pose.position.x', 'pose.position.y', 'twist.world.x']")
    with pytest.raises(ConfigError, match=r"initial_state: expected 3 values \(x, y, th\) or none"):
        make_cart(initial_state="[0.0, 0.0, 0.0, 0.45]")          # the compensator is not the plant's
    echo_speed_only = make_cart(input_fields="['twist.linear.x', '']")
    assert echo_speed_only.echoed == [0]


def test_the_physics_parameter_runs_mujoco_on_a_urdf_arm_and_refuses_it_elsewhere(make, tmp_path):
    from std_msgs.msg import Float64MultiArray
    from test_runtime_physics import _sorting_artifact

    with pytest.raises(ConfigError, match=r"physics: mujoco needs an arm described by a URDF; pick_arm has none"):
        make(physics="mujoco")
    with pytest.raises(ConfigError, match=r"physics: expected one of model, mujoco, got 'bullet'"):
        make(physics="bullet")
    artifact = _sorting_artifact(tmp_path, friction=False)
    flat = {"state_type": "std_msgs/msg/Float64MultiArray", "state_fields": "['']",
            "command_type": "std_msgs/msg/Float64MultiArray", "command_fields": "['']"}
    with pytest.raises(ConfigError, match=r"mismatch: applies to physics model only"):
        make(artifact=artifact.source, physics="mujoco", mismatch="['all=5']", **flat)
    engine, ours = (make(artifact=artifact.source, physics=p, **flat) for p in ("mujoco", "model"))
    assert engine.plant.backend == "mujoco"
    for sim in (engine, ours):
        sim._on_command(Float64MultiArray(data=[1.0, -2.0, 0.5, 0.01]))
        for _ in range(50):                              # 0.1 s of simulated time
            sim._tick()
    np.testing.assert_allclose(engine.x, ours.x, atol=1e-9)      # no friction: the same rigid body
    assert engine.x != artifact.operating_point
