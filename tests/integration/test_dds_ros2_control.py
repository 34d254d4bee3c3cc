"""Over real DDS, the ros2_control layout (config/loader_arm_ros2_control.yaml): the simulator stands in for
the hardware, a joint_state_broadcaster (JointState on /joint_states, joints in its own order) and an effort
forward_command_controller (Float64MultiArray on /effort_controller/commands); the reference is a
trajectory_msgs/JointTrajectory naming the joints. The loop closes and tracks as the offline loop does."""

import numpy as np
import pytest

from dds_harness import CONFIG, Probe, field_log, wait_until
from linz_ros.bringup import node_parameters
from linz_ros.nodes.recorder import TopicMap
from linz_ros.runtime import REASONS

PARAMS = CONFIG / "loader_arm_ros2_control.yaml"
#: The trajectory, in the broadcaster's order (not the outputs'): two points, 0.6 s and 1.2 s from receipt.
NAMES = ["wrist_3", "elbow", "turret", "shoulder", "wrist_1", "wrist_2"]
MOVE = {"turret": 0.3, "shoulder": -0.2, "elbow": 0.2, "wrist_1": -0.3, "wrist_2": 0.2, "wrist_3": 0.4}
TIMES = [0.6, 1.2]


class _Planned:
    """The trajectory as the offline loop's reference (from the operating point at time 0)."""

    def __init__(self, core, base, orders):
        from linz_ros.runtime.trajectory import Trajectory, TrajectoryPoints, check_points
        joints = node_parameters(PARAMS, "linz_controller")["reference_joints"]
        points = TrajectoryPoints(NAMES, TIMES, _positions(base, joints), [[], []], [[], []])
        self.trajectory = Trajectory(check_points(points, joints), (base, [0.0] * len(base), [0.0] * len(base)))
        self.orders = orders
        self.size = sum(r + 1 for r in orders)
        self.kind, self.at = "trajectory", 0.0

    def sample(self, t):
        return self.trajectory.sample(t, self.orders)


def _positions(base, joints):
    """Halfway at the first point, the whole move at the second; columns in NAMES' order."""
    start = dict(zip(joints, base))
    return [[start[j] + f * MOVE[j] for j in NAMES] for f in (0.5, 1.0)]


def _offline_error(artifact) -> float:
    """Largest |y - y_ref| of `linz sim`'s loop (500 Hz, 2 RK4 substeps, as the bringup) on the same trajectory."""
    from linz_ros.runtime import ControllerCore, SimSettings, simulate
    core = ControllerCore(artifact)
    base = core.output_values(artifact.operating_point)
    simulator = node_parameters(PARAMS, "linz_plant_sim")
    reference = _Planned(core, base, artifact.relative_degree)
    result = simulate(artifact, SimSettings(duration=2.0, reference=reference, substeps=int(simulator["substeps"])))
    return float(np.abs(result.y - result.ref[:, [sum(r + 1 for r in artifact.relative_degree[:i])
                                                  for i in range(len(base))]]).max())


@pytest.fixture(scope="module")
def loader_arm(tmp_path_factory):
    from linz_ros.artifact import load_artifact
    from linz_ros.codegen import artifact_path, build_document, write_artifact
    from linz_ros.model import load_plant
    from linz_ros.synthesis import synthesise
    design = synthesise(load_plant(CONFIG / "plants" / "loader_arm.yaml"))
    path = write_artifact(build_document(design, points=8)[0],
                          artifact_path(tmp_path_factory.mktemp("ros2_control"), "loader_arm"))
    return path, load_artifact(path)


def test_the_ros2_control_layout_closes_the_loop_on_a_joint_trajectory(bringup, loader_arm, tmp_path):
    from trajectory_msgs.msg import JointTrajectory, JointTrajectoryPoint
    from builtin_interfaces.msg import Duration
    from linz_ros.nodes._common import control_qos

    path, artifact = loader_arm
    c = node_parameters(PARAMS, "linz_controller")
    assert c["reference"] == "trajectory" and c["command_fields"] == [] and c["state_topic"] == "/joint_states"
    assert node_parameters(PARAMS, "linz_plant_sim")["joint_order"] != [f.split(".")[1] for f in c["state_fields"][:6]]
    topics = TopicMap(c["state_topic"], c["state_type"], c["state_fields"], c["command_topic"], c["command_type"],
                      c["command_fields"], "/unused_reference")
    probe = Probe(artifact, topics)
    planner = probe.create_publisher(JointTrajectory, c["reference_topic"], control_qos())
    listed = []
    probe.callbacks.append(lambda kind, message: listed.append(list(message.name)) if kind == "state" else None)
    try:
        bringup.start("linz_plant_sim", PARAMS, {"artifact": str(path), "publish_clock": True, "lockstep": True})
        bringup.start("linz_controller", PARAMS, {"artifact": str(path), "use_sim_time": True, "stale_after": 1.0,
                                                  "field_log_folder": str(tmp_path / "log")})
        assert bringup.wait_for_log("linz_controller", "active: commanding", timeout=60)
        assert wait_until(lambda: len(probe.recording.conditioning) > 100 and planner.get_subscription_count() > 0,
                          timeout=60, node=probe)
        # the states the broadcaster stand-in sent list the joints in its order, not the kinematic one
        assert probe.recording.states and np.all(np.isfinite(probe.recording.states[-1][2]))
        assert listed[-1] == node_parameters(PARAMS, "linz_plant_sim")["joint_order"]
        joints = c["reference_joints"]
        base = probe.steps(last=1)[0]["ref"]          # the outputs held where they were: the move starts there
        message = JointTrajectory(joint_names=NAMES)          # stamp zero: from when it is received
        for t, row in zip(TIMES, _positions(base, joints)):
            message.points.append(JointTrajectoryPoint(positions=row, time_from_start=Duration(
                sec=int(t), nanosec=int(round((t - int(t)) * 1e9)))))
        sent_at = probe.recording.conditioning[-1][1][0]
        planner.publish(message)
        assert bringup.wait_for_log("linz_controller", "trajectory of 2 points accepted", timeout=30)
        assert wait_until(lambda: probe.recording.conditioning[-1][1][0] > sent_at + 2.0, timeout=120, node=probe)
    finally:
        probe.destroy_node()
    bringup.stop("linz_controller")
    log = field_log(tmp_path / "log")
    reasons = [REASONS[int(code)] for code in log.column("reason")]
    first_ok = reasons.index("ok")
    assert first_ok < 10 and set(reasons[first_ok:]) == {"ok"}, set(reasons[first_ok:])
    y, ref = log.block("y")[first_ok:], log.block("ref")[first_ok:]
    # the whole move, joint by joint, in the outputs' order
    np.testing.assert_allclose(y[-1] - y[0], [MOVE[j] for j in joints], atol=2e-3)
    offline = _offline_error(artifact)
    worst = float(np.abs(y - ref).max())
    print(f"loader_arm over ros2_control topics: worst tracking error {worst:.3g}, offline {offline:.3g}")
    # lockstep: the loop closes every period as offline; the trajectory starts at the state after its receipt
    # (one period later than offline) from the outputs held there
    assert worst < 1.5 * offline + 1e-4, (worst, offline)
