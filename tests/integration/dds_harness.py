"""Helpers of the DDS tests: topic maps of the bundled bringups, a probe node, waiting."""

from __future__ import annotations

import math
import time
from pathlib import Path
from typing import Any, Callable

import numpy as np
import rclpy
from lifecycle_msgs.srv import ChangeState, GetState
from rcl_interfaces.srv import SetParameters
from rclpy.parameter import Parameter
from sensor_msgs.msg import JointState

from linz_ros.nodes._common import control_qos
from linz_ros.nodes.adapters import split_seconds
from linz_ros.nodes.recorder import BringupRecorder, TopicMap
from linz_ros.runtime import ALARMS, MODES, REASONS

ROOT = Path(__file__).resolve().parents[2]
CONFIG = ROOT / "config"
ARM_TOPICS = TopicMap(state_topic="/pick_arm/joint_states", state_type="sensor_msgs/msg/JointState",
                      state_fields=["position.shoulder", "position.elbow", "velocity.shoulder", "velocity.elbow"],
                      command_topic="/pick_arm/joint_efforts", command_type="sensor_msgs/msg/JointState",
                      command_fields=["effort.shoulder", "effort.elbow"], reference_topic="/pick_arm/reference")
JOINTS = ["shoulder", "elbow"]


def wait_until(predicate: Callable[[], bool], timeout: float, node: Any = None, step: float = 0.02) -> bool:
    """Spin ``node`` (when given) until ``predicate()`` holds or ``timeout`` seconds pass.

    The predicate is evaluated once every ``step`` seconds, not after every callback: a probe
    that spent its time re-reading its recording would fall behind a 500 Hz topic.
    """
    end = time.monotonic() + timeout
    while (left := end - time.monotonic()) > 0:
        slice_end = time.monotonic() + min(step, left)
        while (remaining := slice_end - time.monotonic()) > 0:
            if node is not None:
                node.spin_once(remaining)
            else:
                time.sleep(remaining)
        if predicate():
            return True
    return False


class Probe(BringupRecorder):
    """A recorder that can also publish states and call the controller's services."""

    def __init__(self, artifact, topics: TopicMap = ARM_TOPICS, controller: str = "linz_controller",
                 states: bool = True) -> None:
        # a DDS participant of its own for every test: nothing discovered by an earlier test lingers
        self._context = rclpy.Context()
        rclpy.init(args=[], context=self._context)
        super().__init__(artifact, topics, node_name="linz_probe", context=self._context, states=states)
        self.state_pub = self.create_publisher(self.state_map.cls, topics.state_topic, control_qos())
        self.controller = controller
        self.change_client = self.create_client(ChangeState, f"/{controller}/change_state")
        self.get_client = self.create_client(GetState, f"/{controller}/get_state")
        self.parameter_client = self.create_client(SetParameters, f"/{controller}/set_parameters")

    def destroy_node(self) -> None:
        super().destroy_node()
        self.executor_.shutdown()
        self._context.try_shutdown()

    def joint_state(self, positions, velocities, stamp: float | None = None, names=JOINTS) -> JointState:
        message = JointState(name=list(names), position=[float(v) for v in positions],
                             velocity=[float(v) for v in velocities])
        if stamp is not None:
            message.header.stamp.sec, message.header.stamp.nanosec = split_seconds(stamp)
        return message

    def now(self) -> float:
        return self.get_clock().now().nanoseconds * 1e-9

    def publish_state(self, x, stamp: float | None = None) -> None:
        self.state_pub.publish(self.joint_state(x[:2], x[2:], self.now() if stamp is None else stamp))

    def call(self, client, request, timeout: float = 10.0, attempts: int = 1):
        """One service call; ``attempts`` > 1 only for requests that change nothing (a query)."""
        if not client.wait_for_service(timeout_sec=timeout):
            raise AssertionError(f"service {client.srv_name} not available")
        for _ in range(attempts):
            future = client.call_async(request)
            self.executor_.spin_until_future_complete(future, timeout_sec=timeout / attempts)
            if future.done():
                return future.result()
        raise AssertionError(f"service {client.srv_name} did not answer ({attempts} attempt(s))")

    def lifecycle_state(self) -> str:
        # the service can be found before it has found this client's reply reader: the server then
        # drops its first reply ("failed to send response"); asking again is harmless for a query
        return self.call(self.get_client, GetState.Request(), attempts=3).current_state.label

    def transition(self, transition_id: int) -> bool:
        request = ChangeState.Request()
        request.transition.id = transition_id
        return self.call(self.change_client, request).success

    def set_parameter(self, name: str, value) -> tuple[bool, str]:
        request = SetParameters.Request(parameters=[Parameter(name, value=value).to_parameter_msg()])
        result = self.call(self.parameter_client, request).results[0]
        return result.successful, result.reason

    # -- views of the recording ------------------------------------------------------------
    def steps(self, last: int | None = None) -> list[dict]:
        """Conditioning records as dicts (mode and reason as words); only the ``last`` ones when given.

        Fields are found by the labels of the message layout, as received over DDS.
        """
        if not self.recording.conditioning:
            return []
        labels = self.recording.conditioning_labels
        assert labels, "the conditioning records carry no labelled layout"
        index = {name: i for i, name in enumerate(labels)}
        outputs = [index[f"y.{y}"] for y in self.artifact.outputs]
        refs = [index[f"ref.{y}"] for y in self.artifact.outputs]
        inputs = [index[f"u.{u}"] for u in self.artifact.plant_inputs]     # the command's: the plant's own
        rows = []
        records = self.recording.conditioning
        for received, data in (records if last is None else records[-last:]):
            rows.append({"received": received, "t": data[index["t"]], "sigma_min": data[index["sigma_min"]],
                         "condition": data[index["condition"]], "mode": MODES[int(data[index["mode"]])],
                         "reason": REASONS[int(data[index["reason"]])], "y": [data[i] for i in outputs],
                         "ref": [data[i] for i in refs], "u": [data[i] for i in inputs]})
        return rows

    def commands_finite(self) -> bool:
        return all(all(math.isfinite(v) for v in u) for _, _, u in self.recording.commands)

    def diagnostic_levels(self) -> list[int]:
        return [level for _, level, _, _ in self.recording.diagnostics]


# -- the controller's own field log ---------------------------------------------------------------
def field_log(folder: Path):
    """Every control step the controller recorded (stop it first, so its file is closed)."""
    from linz_ros.logs import read_logs

    return read_logs([folder])


def tracking_outside_gaps(log, settle: float = 0.05, after_gap: float = 0.25) -> tuple[float, dict]:
    """Largest |y - y_ref| over accepted steps, leaving out the start and each control-loop gap.

    The first ``settle`` fraction of the steps is left out, and ``after_gap`` seconds after
    each gap (no state for over five periods: the two cores are shared with the test run, and
    the command is held meanwhile; give about five time constants of the slowest designed
    pole, the recovery), which are judged on their own by the caller. At least 100 steps
    must remain.

    Returns
    -------
    (float, dict)
        The largest error, and :func:`linz_ros.logs.analysis.control_gaps` of the log.
    """
    from linz_ros.logs.analysis import control_gaps, gap_ends

    gaps = control_gaps(log)
    t = log.column("t")
    error = np.abs(log.block("y") - log.block("ref")).max(axis=1)
    keep = np.arange(len(t)) >= int(settle * len(t))
    settled = keep.copy()
    for end in gap_ends(t):
        keep &= ~((t >= end) & (t < end + after_gap))
    assert keep.sum() >= min(100, settled.sum()), ("gap recoveries cover nearly the whole run", gaps)
    gaps["judged_steps"] = int(keep.sum())          # how much of the run the verdict covers
    return float(np.nanmax(error[keep])), gaps



def settled_errors(steps: list[dict], after: float = 0.25, gap_periods: float = 5.0) -> np.ndarray:
    """max |y - ref| of each accepted step in ``steps`` (:meth:`Probe.steps`), leaving out the
    recovery from each refused step or gap in the stamps.

    A step refused (the safe command: a state late on the shared cores) or a gap of more than
    ``gap_periods`` median periods between stamps costs the arm a dip; the ``after`` seconds of
    stamps that follow are its recovery, judged on their own by the caller. This keeps a
    wall-clock run's tracking verdict about the controller, not about the machine's load.

    Returns
    -------
    numpy.ndarray
        One error per accepted step kept, in order.
    """
    t = np.array([s["t"] for s in steps])
    ok = np.array([s["reason"] == "ok" for s in steps])
    error = np.array([np.max(np.abs(np.subtract(s["y"], s["ref"]))) if s["reason"] == "ok" else np.nan
                      for s in steps])
    period = np.median(np.diff(t[ok])) if ok.sum() > 1 else 0.0
    upsets = t[~ok].tolist()
    if ok.sum() > 1:
        accepted_t = t[ok]
        upsets += accepted_t[1:][np.diff(accepted_t) > gap_periods * period].tolist()
    keep = ok.copy()
    for when in upsets:
        keep &= ~((t >= when) & (t < when + after))
    return error[keep]


def assert_no_alarms(log, what: str, after_refusals: bool = False) -> None:
    """No envelope or divergence alarm in ``log``; else say which run, state and when, and what came before.

    Bundled plants must not trip these watchdogs in nominal runs; a test that sees one reports
    the numbers rather than allowing it. ``after_refusals`` (runs on the wall clock of a shared
    machine): a state late past ``stale_after`` gets the safe command, zero torque, and the arm
    falls for as long as it lasts (59 ms take the pick arm's elbow past its 2.4 rad/s); an
    envelope alarm is then allowed if it follows a refused step by at most 0.5 s, is a controlled
    stop, and ends in nominal control within 0.5 s. Divergence is never allowed.
    """
    if "alarms" not in log.labels:                  # a log written before the alarms field
        return
    alarms = log.column("alarms")
    raised = np.flatnonzero(np.isfinite(alarms) & (alarms != 0))
    if not len(raised):
        return
    if after_refusals and _alarms_follow_refusals(log, raised):
        return
    i, t = int(raised[0]), log.column("t")
    names = [a for bit, a in enumerate(ALARMS) if int(alarms[i]) >> bit & 1]
    state = dict(zip(log.names("x"), np.round(log.block("x")[i], 4).tolist()))
    reasons = [REASONS[int(c)] for c in log.column("reason")]
    before = [j for j in range(max(i - 2000, 0), i) if reasons[j] != "ok" and t[i] - t[j] < 2.0]
    earlier = (f"; before it, {len(before)} refused steps in 2 s, the first {reasons[before[0]]} "
               f"{t[i] - t[before[0]]:.3f} s earlier" if before else "; no refused step in the 2 s before")
    raise AssertionError(f"{what}: {len(raised)} steps with alarms, the first {names} (reason {reasons[i]}) at "
                         f"t = {t[i] - t[0]:.3f} s into the log (step {i} of {len(t)}), state {state}{earlier}")


def _alarms_follow_refusals(log, raised: np.ndarray) -> bool:
    """Whether every alarm episode is an envelope stop right after a refused step, and ends in nominal steps."""
    t = log.column("t")
    alarms = log.column("alarms").astype(int)
    reasons = [REASONS[int(c)] for c in log.column("reason")]
    modes = [MODES[int(c)] for c in log.column("mode")]
    if np.any(alarms[raised] & 2):
        return False
    start = 0
    while start < len(raised):
        end = start
        while end + 1 < len(raised) and t[raised[end + 1]] - t[raised[end]] < 0.1:
            end += 1
        first, last = int(raised[start]), int(raised[end])
        refused = [j for j in range(max(first - 1000, 0), first) if reasons[j] not in ("ok",) and
                   modes[j] in ("safe", "held") and t[first] - t[j] <= 0.5]
        after = [j for j in range(last + 1, len(t)) if t[j] - t[last] <= 0.5]
        if not refused or not any(reasons[j] == "ok" for j in after):
            return False
        if any(modes[j] not in ("stopping", "safe", "held") for j in range(first, last + 1) if alarms[j] & 1):
            return False
        start = end + 1
    return True
