"""The controller node in-process (no DDS): clocks and stamps, staleness, references, parameter checks."""

import math
import time

import pytest

rclpy = pytest.importorskip("rclpy", reason="rclpy is not installed (pip install '.[ros]')")

from rclpy.time import Time  # noqa: E402
from sensor_msgs.msg import JointState  # noqa: E402
from std_msgs.msg import Float64MultiArray  # noqa: E402

from linz_ros.nodes.adapters import split_seconds  # noqa: E402
from linz_ros.runtime import MODES, REASONS  # noqa: E402
from support import BUNDLED, ROOT  # noqa: E402


@pytest.fixture
def make(tmp_path):
    from linz_ros.codegen import artifact_path, build_document, write_artifact
    from linz_ros.model import load_plant
    from linz_ros.nodes.controller import ControllerNode
    from linz_ros.synthesis import synthesise
    path = write_artifact(build_document(synthesise(load_plant(BUNDLED / "pick_arm.yaml")), points=8)[0],
                          artifact_path(tmp_path, "pick_arm"))
    made = []

    def _make(**parameters):
        context = rclpy.Context()
        args = ["--ros-args", "--params-file", str(ROOT / "config" / "pick_arm.yaml"), "-p", f"artifact:={path}",
                "-p", "autostart:=false", "-p", "stale_after:=0.2"]
        for key, value in parameters.items():
            args += ["-p", f"{key}:={value}"]
        rclpy.init(args=args, context=context)
        node = ControllerNode(context=context)
        made.append((node, context))
        return node

    yield _make
    for node, context in made:
        node.destroy_node()
        context.try_shutdown()


def _state(stamp):
    message = JointState(name=["shoulder", "elbow"], position=[0.4, 1.2], velocity=[0.0, 0.0])
    message.header.stamp.sec, message.header.stamp.nanosec = split_seconds(stamp)
    return message


def test_a_backward_jump_of_simulated_time_sends_the_safe_command_then_accepts_the_new_timeline(make):
    node = make(use_sim_time="true", reference="hold", reference_timeout=0.5)
    clock = node.get_clock()

    def set_time(seconds):
        clock.set_ros_time_override(Time(seconds=seconds, clock_type=clock.clock_type))
    set_time(10.0)
    node.trigger_configure()
    node.trigger_activate()
    records = []
    node._conditioning_pub.publish = lambda message: records.append(
        (REASONS[int(message.data[4])], MODES[int(message.data[3])], message.data[0], list(message.data[-2:])))
    for k in range(3):
        set_time(10.0 + 0.002 * k)
        node._on_state(_state(10.0 + 0.002 * k))
    assert [r[0] for r in records] == ["ok"] * 3
    node.reference.latest_at = 10.004 - 0.2               # as if a reference had come 0.2 s ago
    set_time(5.0)                                         # a simulation reset
    assert records[-1][:3] == ("stale", "safe", 5.0) and records[-1][3] == [0.0, 0.0]
    assert node.core.last_t is None
    assert node.reference.latest_at == pytest.approx(5.0 - 0.2)   # its age moved with the clock
    node._on_state(_state(5.002))                          # the new timeline: accepted, not out of order
    assert records[-1][0] == "ok" and records[-1][2] == pytest.approx(5.002)
    assert len(records) == 5


def test_in_wall_time_a_stamp_going_back_is_refused_and_the_history_kept(make):
    node = make(reference="hold")
    node.trigger_configure()
    node.trigger_activate()
    records = []
    node._conditioning_pub.publish = lambda message: records.append(
        (REASONS[int(message.data[4])], MODES[int(message.data[3])]))
    now = node.get_clock().now().nanoseconds * 1e-9
    node._on_state(_state(now))
    node._on_state(_state(now - 1.0))                     # a stamp going back is refused, no reset
    assert node.core.last_t == pytest.approx(now)
    assert records == [("ok", "nominal"), ("out_of_order", "safe")]


def test_a_refused_publish_is_counted_and_never_fatal():
    from linz_ros.nodes.controller import ControllerNode
    from linz_ros.runtime.diagnostics import ERROR, DiagnosticWindow

    class Refusing:
        def publish(self, message):
            raise RuntimeError("cannot publish data")

    class Logger:
        def __init__(self):
            self.errors = []

        def error(self, text, **_):
            self.errors.append(text)

    node = ControllerNode.__new__(ControllerNode)          # only _send and the window are exercised
    node.window = DiagnosticWindow(0.0)
    logger = Logger()
    node.get_logger = lambda: logger
    node._send(Refusing(), object(), "command")
    assert node.window.publish_failures == 1 and "command not published" in logger.errors[0]
    assert node.window.level()[0] == ERROR and "refused by the middleware" in node.window.level()[1]


@pytest.mark.parametrize("extrapolate", [True, False])
def test_the_reference_source_takes_the_nodes_reference_parameters(make, extrapolate):
    # how the source carries a topic reference forward: tests/test_runtime_reference_source.py
    node = make(reference_extrapolate=str(extrapolate).lower(), reference_timeout=0.25)
    assert node.params["reference_extrapolate"] is extrapolate
    node.trigger_configure()
    assert node.core is not None
    source = node.reference
    assert source.spec == "topic" and source.extrapolate is extrapolate and source.timeout == 0.25
    node._on_reference(Float64MultiArray(data=[0.1, 0.2, 1.0, 0.3, 0.0, 0.0]))
    assert source.latest == [0.1, 0.2, 1.0, 0.3, 0.0, 0.0]


def test_in_simulated_time_a_slow_simulator_is_not_stale_until_the_no_state_timeout(make):
    node = make(use_sim_time="true", reference="hold")
    clock = node.get_clock()
    clock.set_ros_time_override(Time(seconds=1.0, clock_type=clock.clock_type))
    node.trigger_configure()
    node.trigger_activate()
    assert node.no_state_timeout() == pytest.approx(0.5)      # the larger of stale_after (0.2) and 0.5 s
    records = []
    node._conditioning_pub.publish = lambda message: records.append(REASONS[int(message.data[4])])
    node._on_state(_state(1.0))
    steady = {"now": node._steady_now()}
    node._steady_now = lambda: steady["now"]
    steady["now"] += 0.3               # simulated time stands still: 0.3 s of wall time, no state
    node._check_stale()
    node._check_stale()
    assert records == ["ok"]
    steady["now"] += 0.3               # 0.6 s: the simulator is gone, confirmed on the second check
    node._check_stale()
    node._check_stale()
    assert records == ["ok", "stale"]


def test_the_no_state_timeout_is_stale_after_on_the_wall_clock_unless_set(make):
    node = make(reference="hold")
    node.trigger_configure()
    assert node.no_state_timeout() == pytest.approx(0.2)
    assert make(reference="hold", no_state_timeout=2.0).no_state_timeout() == 2.0


def test_without_simulated_time_the_loop_reads_the_system_clock_the_node_clock_gives(make):
    node = make(reference="hold")
    assert not node._system_time
    node.trigger_configure()
    assert node._system_time
    assert abs(node._now() - node.get_clock().now().nanoseconds * 1e-9) < 0.01
    node.trigger_cleanup()
    assert not node._system_time
    sim = make(use_sim_time="true", reference="hold")
    sim.trigger_configure()
    assert not sim._system_time and sim._now() == 0.0          # simulated time before the first /clock


def test_a_zero_header_stamp_is_taken_as_now_and_counted(make):
    node = make(reference="hold")
    node.trigger_configure()
    node.trigger_activate()
    records = []
    node._conditioning_pub.publish = lambda message: records.append(REASONS[int(message.data[4])])
    message = JointState(name=["shoulder", "elbow"], position=[0.4, 1.2], velocity=[0.0, 0.0])   # stamp 0
    node._on_state(message)
    assert records == ["ok"] and node.core.last_t == pytest.approx(time.time(), abs=1.0)
    values = dict(node.window.values(node._now()))
    assert values["unstamped_count"] == "1"


def test_a_watchdog_change_that_cannot_hold_is_refused_and_changes_nothing(make):
    from rclpy.parameter import Parameter

    node = make(reference="hold")
    result = node.set_parameters([Parameter("sigma_warn", value=-0.5)])[0]      # unconfigured: checked too
    assert not result.successful and "sigma_warn must be -1" in result.reason
    node.trigger_configure()
    node.trigger_activate()
    timers, config = list(node._owned_timers), node.core.config
    for value in (1e12, 3601.0):                  # a stale_after past an hour: refused, the node goes on
        result = node.set_parameters([Parameter("stale_after", value=value)])[0]
        assert not result.successful
    assert node.core.config is config and node._owned_timers == timers
    result = node.set_parameters([Parameter("stale_after", value=0.5)])[0]
    assert result.successful and node.core.config.stale_after == 0.5 and node._owned_timers != timers
    assert node._owned_timers[0].timer_period_ns == 125_000_000


def test_whole_number_parameters_keep_their_range():
    from linz_ros.errors import ConfigError
    from linz_ros.nodes._common import declare
    from rclpy.node import Node

    context = rclpy.Context()
    rclpy.init(args=["--ros-args", "-p", "depth:=-5"], context=context)
    node = Node("ranged", context=context)
    try:
        with pytest.raises(ConfigError, match="depth"):
            declare(node, "depth", 20000, "queue depth", True, minimum=1)
    finally:
        node.destroy_node()
        context.try_shutdown()


def test_an_unknown_executor_is_one_line_and_exit_code_2(capsys):
    from linz_ros.nodes._common import declare, spin_node
    from rclpy.node import Node

    class Minimal(Node):
        def __init__(self):
            super().__init__("minimal_executor_check")
            declare(self, "executor", "single_threaded", "executor", True)

    assert spin_node(Minimal, ["--ros-args", "-p", "executor:=bogus"]) == 2
    assert capsys.readouterr().err.strip().endswith(
        "executor: expected one of single_threaded, events, got 'bogus'")


def test_a_bad_first_state_does_not_fix_the_built_in_reference_to_nan(make):
    node = make(reference="smooth:tool_x=0.05,duration=1")
    node.trigger_configure()
    node.trigger_activate()
    records = []
    node._conditioning_pub.publish = lambda message: records.append(REASONS[int(message.data[4])])
    now = time.time()
    bad = JointState(name=["shoulder", "elbow"], position=[math.nan, math.nan], velocity=[0.0, 0.0])
    bad.header.stamp.sec, bad.header.stamp.nanosec = split_seconds(now)
    node._on_state(bad)                                # a sensor starting up
    for k in range(1, 4):
        node._on_state(_state(now + 0.002 * k))
    assert records == ["non_finite_state", "ok", "ok", "ok"]
    assert node.reference.generator.base == pytest.approx(node.core.output_values([0.4, 1.2, 0.0, 0.0]))


def test_trusted_keys_refuse_an_unsigned_artifact_at_configure_and_accept_a_signed_one(make, tmp_path):
    pytest.importorskip("cryptography", reason="signing needs cryptography (pip install cryptography)")
    from lifecycle_msgs.msg import State
    from linz_ros.artifact.signing import generate_keys, load_private_key, sign_artifact_file
    private, public = generate_keys(tmp_path / "keys")
    node = make(trusted_keys=f"['{public}']")
    node.trigger_configure()
    assert node._state_machine.current_state[0] == State.PRIMARY_STATE_UNCONFIGURED
    assert "not signed, and only artifacts signed with a trusted key are accepted" in node.configure_error
    sign_artifact_file(tmp_path / "pick_arm.artifact.json", load_private_key(private))
    signed = make(trusted_keys=f"['{public}']")
    signed.trigger_configure()
    assert signed.configure_error == "" and signed.core.artifact.signature_check.startswith("signed by trusted key")


def test_the_watchdog_parameters_come_from_the_table_and_are_checked_by_it(make):
    from rclpy.parameter import Parameter

    from linz_ros.artifact.watchdog import WATCHDOG_SETTINGS

    node = make(reference="hold")
    for row in WATCHDOG_SETTINGS:
        assert node.has_parameter(row.name), row.name
        descriptor = node.describe_parameter(row.name)
        assert row.help in descriptor.description
        assert descriptor.read_only == (not row.runtime)
    node.trigger_configure()
    node.trigger_activate()
    config = node.core.config
    result = node.set_parameters([Parameter("envelope_action", value="halt")])[0]
    assert not result.successful and result.reason == "envelope_action: expected one of warn, stop, safe, got 'halt'"
    result = node.set_parameters([Parameter("divergence_error", value=[0.1])])[0]      # one per output: two
    assert not result.successful and "divergence_error" in result.reason and node.core.config is config
    result = node.set_parameters([Parameter("envelope_action", value="warn"),
                                  Parameter("divergence_error", value=[0.1, 0.0])])[0]
    assert result.successful
    assert node.core.config.envelope_action == "warn" and node.core.config.divergence_error == (0.1, math.inf)


def test_diagnostics_carry_the_windows_level_summary_and_key_values_as_ros_messages(make, tmp_path):
    # the window's counting and wording: tests/test_runtime_diagnostics.py
    from diagnostic_msgs.msg import DiagnosticStatus

    (tmp_path / "plain").write_text("a file, not a folder")
    node = make(reference="hold", field_log_folder=str(tmp_path / "plain" / "logs"))
    node.trigger_configure()
    node.trigger_activate()
    published = []
    node._diagnostics_pub.publish = published.append
    node._publish_diagnostics()                                  # active, no state yet
    node._on_state(_state(node.get_clock().now().nanoseconds * 1e-9))
    node._publish_diagnostics()
    first, second = (array.status[0] for array in published)
    assert first.level == DiagnosticStatus.ERROR                  # the field log could not be opened
    assert first.message.startswith("active, but no state received; field log not recording: ")
    assert second.message.startswith("nominal; field log not recording: ")
    values = {kv.key: kv.value for kv in second.values}
    assert values["mode_nominal"] == "1" and values["field_log"] == "not recording"
    assert node.window.steps == 0                                 # a new window after each message


def test_the_backend_parameter_chooses_the_step_and_a_wrong_one_is_refused_at_configure(make):
    from lifecycle_msgs.msg import State

    native = make()
    native.trigger_configure()
    assert native.configure_error == "" and native.core.backend == "native"
    python = make(backend="python")
    python.trigger_configure()
    assert python.configure_error == "" and python.core.backend == "python"
    wrong = make(backend="gpu")
    wrong.trigger_configure()
    assert wrong._state_machine.current_state[0] == State.PRIMARY_STATE_UNCONFIGURED
    assert wrong.configure_error == "backend: expected one of native, python, got 'gpu'"


# -- a dynamically extended artifact: the delivery cart (states x, y, th; compensator v_i1; inputs v, omega) --
@pytest.fixture(scope="module")
def cart_artifact(tmp_path_factory):
    from support import built_artifact_file
    return built_artifact_file(BUNDLED / "delivery_cart.yaml", tmp_path_factory.mktemp("cart"))


@pytest.fixture
def make_cart(cart_artifact):
    from linz_ros.nodes.controller import ControllerNode
    from support import node_factory
    with node_factory(ControllerNode, ROOT / "config" / "delivery_cart.yaml", cart_artifact,
                      autostart="false") as make:
        yield make


def _odometry(stamp, x=0.0, y=0.0, th=0.7854, speed=0.0, turn=0.0):
    from nav_msgs.msg import Odometry
    message = Odometry()
    message.header.stamp.sec, message.header.stamp.nanosec = split_seconds(stamp)
    message.pose.pose.position.x, message.pose.pose.position.y = x, y
    message.pose.pose.orientation.z, message.pose.pose.orientation.w = math.sin(th / 2), math.cos(th / 2)
    message.twist.twist.linear.x, message.twist.twist.angular.z = speed, turn
    return message


class _FieldLog:
    """Stands in for the field-log writer: keeps what the loop puts."""

    def __init__(self):
        self.records = []

    def put(self, values):
        self.records.append(list(values))

    def close(self):
        from types import SimpleNamespace
        return SimpleNamespace(state="closed", files=[], written=len(self.records), dropped=0, lost=0, error="")


def test_an_extended_cart_reads_its_own_states_and_speed_and_commands_its_own_inputs(make_cart):
    from geometry_msgs.msg import Twist
    from linz_ros.runtime.steprecord import record_labels

    node = make_cart(reference="hold")
    node.trigger_configure()
    assert node.configure_error == ""
    artifact = node.core.artifact
    assert artifact.states == ["x", "y", "th", "v_i1"] and artifact.inputs == ["v_d1", "omega"]
    # messages in the plant's own states and inputs; the compensator's speed read from the twist
    assert node.state_map.size == 3 and node.command_map.size == 2 and node.command_map.cls is Twist
    assert [f.path for f in node.compensator_fields.map.fields] == ["twist.linear.x"]
    assert node._conditioning_labels[-2:] == ["u.v", "u.omega"]
    node.trigger_activate()
    commands, records, log = [], [], _FieldLog()
    node._command_pub.publish = commands.append
    node._conditioning_pub.publish = lambda message: records.append(
        (REASONS[int(message.data[4])], MODES[int(message.data[3])]))
    node.field_log = log
    now, T = time.time(), 1.0 / artifact.rate
    labels = record_labels(artifact, states=True)
    # the first state since activation: the compensator starts at the speed it measures (0.3 m/s), not the
    # artifact's start value (0.45). With one integrator the plant gets the mean over the period,
    # u = v0 + w T / 2
    node._on_state(_odometry(now, speed=0.3))
    v = commands[-1].linear.x
    assert node.core.compensator[0] == 0.3 and v != 0.3
    assert (commands[-1].angular.z, commands[-1].linear.y, commands[-1].angular.x) == (
        pytest.approx(node.core.last_command[1]), 0.0, 0.0)
    # the field log's x: the plant's state and the compensator this step used
    assert len(log.records[-1]) == len(labels)
    assert log.records[-1][-4:] == pytest.approx([0.0, 0.0, 0.7854, 0.3])
    node._on_state(_odometry(now + T, speed=v))
    assert records == [("ok", "nominal")] * 2
    # a bad state: the safe command (zero: the cart stops), and the next accepted state restarts the
    # compensator from the measured speed, 0, lifted to compensator_floor (0.1 m/s) off the singular set
    node._on_state(_odometry(now + 2 * T, x=math.nan, speed=v))
    assert records[-1] == ("non_finite_state", "safe") and (commands[-1].linear.x, commands[-1].angular.z) == (0, 0)
    # (lifted towards the floor no faster than v's rate limit, 0.8 m/s^2: one period's step, 0.016 m/s,
    # where the law works damped near its singular set)
    node._on_state(_odometry(now + 3 * T, speed=0.0))
    assert records[-1] == ("near_singular", "damped")
    assert node.core.compensator[0] == pytest.approx(0.8 * T, abs=1e-12)


def test_compensator_fields_are_refused_without_an_extension_or_in_the_wrong_number(make, make_cart):
    from lifecycle_msgs.msg import State

    arm = make(compensator_fields="['velocity.shoulder']")
    arm.trigger_configure()
    assert arm._state_machine.current_state[0] == State.PRIMARY_STATE_UNCONFIGURED
    assert arm.configure_error == ("compensator_fields: the artifact pick_arm has no dynamic extension: there are "
                                   "no compensator states to measure")
    cart = make_cart(compensator_fields="['twist.linear.x', 'twist.angular.z']")
    cart.trigger_configure()
    assert cart._state_machine.current_state[0] == State.PRIMARY_STATE_UNCONFIGURED
    assert cart.configure_error == ("compensator_fields: expected 1 field paths, one per compensator state (v_i1; "
                                    "'' for one not measured), got 2")
    unmeasured = make_cart(compensator_fields="['']")                # none measured: the start value
    unmeasured.trigger_configure()
    assert unmeasured.configure_error == "" and unmeasured.compensator_fields.map is None


def test_the_compensator_floor_is_a_per_input_watchdog_parameter_that_changes_the_running_law(make_cart):
    from rclpy.parameter import Parameter

    node = make_cart(reference="hold")
    assert node.describe_parameter("compensator_floor").read_only is False
    node.trigger_configure()
    node.trigger_activate()
    assert node.core.config.compensator_floor == (0.1, math.inf)          # from config/delivery_cart.yaml
    for value, reason in (([0.2], "expected 2 entries, one per input, got 1"), ([-0.1, 0.0], "must be >= 0")):
        result = node.set_parameters([Parameter("compensator_floor", value=value)])[0]
        assert not result.successful and "compensator_floor" in result.reason and reason in result.reason, result
    result = node.set_parameters([Parameter("compensator_floor", value=[0.25, 0.0])])[0]
    assert result.successful and node.core.config.compensator_floor == (0.25, math.inf)
    commands = []
    node._command_pub.publish = commands.append
    node._on_state(_odometry(time.time(), speed=0.0))        # a standing cart restarts at the new floor
    assert 2 * commands[-1].linear.x - node.core.compensator[0] == pytest.approx(0.25, abs=1e-12)


def test_the_start_up_line_names_the_extension_and_nothing_without_one():
    from linz_ros.nodes._extension import extension_text
    from support import built_artifact

    text = extension_text(built_artifact(BUNDLED / "delivery_cart.yaml"))
    assert text == (", dynamic extension: compensator v_i1 (start v_i1=0.45 unless measured), law inputs v_d1, "
                    "omega driving v, omega")
    assert extension_text(built_artifact(BUNDLED / "pick_arm.yaml")) == ""


def _planned(names, times, positions, stamp=0.0):
    from builtin_interfaces.msg import Duration
    from trajectory_msgs.msg import JointTrajectory, JointTrajectoryPoint
    message = JointTrajectory(joint_names=list(names))
    message.header.stamp.sec, message.header.stamp.nanosec = split_seconds(stamp)
    for t, p in zip(times, positions):
        seconds, nanoseconds = split_seconds(t) if t >= 0 else (-1, 0)
        message.points.append(JointTrajectoryPoint(positions=list(p), time_from_start=Duration(sec=seconds,
                                                                                               nanosec=nanoseconds)))
    return message


def test_a_trajectory_reference_is_followed_by_name_and_bad_ones_are_refused_counted_and_harmless(make):
    node = make(use_sim_time="true", reference="trajectory", reference_joints="['x', 'y']")
    clock = node.get_clock()

    def at(seconds):
        clock.set_ros_time_override(Time(seconds=seconds, clock_type=clock.clock_type))
    at(10.0)
    node.trigger_configure()
    assert node.core is not None, node.configure_error
    node.trigger_activate()
    assert node.reference.spec == "trajectory"
    records = []
    node._conditioning_pub.publish = lambda message: records.append(list(message.data))
    warnings = []
    node.get_logger().warning = lambda text, **_: warnings.append(text)
    node._on_state(_state(10.0))
    held = node.core.hold_reference([0.4, 1.2, 0.0, 0.0])
    for bad in (_planned(["x", "elbow"], [1.0], [[0.0, 0.0]]), _planned(["x", "y"], [1.0, 0.5], [[0, 0], [1, 1]]),
                _planned(["x", "y"], [1.0], [[math.nan, 0.0]]), _planned(["x", "y"], [1.0], [[0.0]]),
                _planned(["x", "y"], [-1.0], [[0.0, 0.0]])):
        node._on_trajectory(bad)
    assert node.reference.refused == 5 and node.reference.trajectory is None
    assert all(w.startswith("trajectory refused (") and "\n" not in w for w in warnings), warnings
    assert "'elbow' are not among the expected names ('x', 'y')" in warnings[0]
    # stamped 10.0 s: from the held outputs to (tool_x, tool_y) = (held + 0.01, held - 0.02) at 11.0 s
    node._on_trajectory(_planned(["y", "x"], [1.0], [[held[3] - 0.02, held[0] + 0.01]], stamp=10.0))
    at(12.0)
    node._on_state(_state(12.0))
    labels = node._conditioning_labels
    ref = [records[-1][labels.index(f"ref.{name}")] for name in ("tool_x", "tool_y")]
    assert ref == pytest.approx([held[0] + 0.01, held[3] - 0.02])
    assert REASONS[int(records[-1][4])] == "ok"
    sent = []
    node._diagnostics_pub.publish = sent.append
    node._publish_diagnostics()
    assert {kv.key: kv.value for kv in sent[0].status[0].values}["trajectories_refused"] == "5"
