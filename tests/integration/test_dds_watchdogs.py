"""Over real DDS: the singular set, malformed state messages and a killed simulator."""

import math
import time

import numpy as np

from dds_harness import ARM_TOPICS, CONFIG, Probe, wait_until

PARAMS = CONFIG / "pick_arm.yaml"
# states published by this test process are not real-time: allow them 0.25 s before they count as stale
PROBE_FED = {"stale_after": 0.25}
OK, WARN, ERROR = 0, 1, 2


def test_a_trajectory_through_the_singular_set_warns_then_errors_and_stays_finite(bringup, arm_artifact):
    path, artifact = arm_artifact
    bringup.start("linz_controller", PARAMS, {"artifact": str(path), "reference": "hold",
                                              "diagnostics_period": 0.2, **PROBE_FED})
    assert bringup.wait_for_log("linz_controller", "active: commanding", timeout=30)
    probe = Probe(artifact, ARM_TOPICS)
    w = artifact.watchdog
    try:
        wait_until(lambda: False, 1.0, node=probe)
        # the elbow straightens slowly through q2 = 0 (the stretched arm) and bends back
        for q2 in np.concatenate([np.linspace(0.8, -0.3, 900), np.linspace(-0.3, 0.8, 900)]):
            probe.publish_state([0.4, q2, 0.0, 0.0])
            wait_until(lambda: False, 0.002, node=probe)
        for _ in range(100):                                    # hold the bent arm a moment
            probe.publish_state([0.4, 0.8, 0.0, 0.0])
            wait_until(lambda: False, 0.004, node=probe)
        fed_until = time.monotonic()
        wait_until(lambda: False, 0.5, node=probe)
    finally:
        probe.destroy_node()
    steps = probe.steps()
    while steps and steps[-1]["reason"] == "stale":      # the states stopped at the end: stale, as it should
        steps.pop()
    assert len(steps) > 1500
    modes = [s["mode"] for s in steps]
    assert {"nominal", "damped", "safe"} <= set(modes)
    for s in steps:                                      # each mode where the levels say it belongs
        if s["mode"] == "safe":
            assert s["reason"] == "singular", s
            assert s["sigma_min"] < w["sigma_stop"] and s["u"] == [0.0, 0.0]
        elif s["mode"] == "damped":
            assert w["sigma_stop"] <= s["sigma_min"] < w["sigma_act"]
    assert probe.commands_finite()
    levels = [level for received, level, _, _ in probe.recording.diagnostics if received <= fed_until]
    first_warn = levels.index(WARN)
    first_error = levels.index(ERROR)
    last_error = len(levels) - 1 - levels[::-1].index(ERROR)
    assert first_warn < first_error                         # WARN on the way in, then ERROR at the singularity
    assert OK in levels[last_error + 1:]                    # and OK again once the arm is bent
    assert bringup.nodes["linz_controller"].alive()


def test_malformed_state_messages_give_the_safe_command_and_a_diagnostic(bringup, arm_artifact):
    path, artifact = arm_artifact
    bringup.start("linz_controller", PARAMS, {"artifact": str(path), "reference": "hold",
                                              "diagnostics_period": 0.2, **PROBE_FED})
    assert bringup.wait_for_log("linz_controller", "active: commanding", timeout=30)
    probe = Probe(artifact, ARM_TOPICS)
    try:
        wait_until(lambda: False, 1.0, node=probe)
        t0 = probe.now()
        cases = [
            ("wrong length", probe.joint_state([0.4], [0.0, 0.0], t0 + 0.01), "bad_message"),
            ("NaN", probe.joint_state([0.4, math.nan], [0.0, 0.0], t0 + 0.02), "non_finite_state"),
            ("unknown joint", probe.joint_state([0.4, 1.2], [0.0, 0.0], t0 + 0.03, names=["shoulder", "wrist"]),
             "bad_message"),
            ("stamp going backwards", probe.joint_state([0.4, 1.2], [0.0, 0.0], t0 - 5.0), "out_of_order"),
        ]
        good = probe.joint_state([0.4, 1.2], [0.0, 0.0], t0)
        probe.state_pub.publish(good)
        assert wait_until(lambda: len(probe.steps()) >= 1, timeout=5, node=probe)
        for label, message, reason in cases:
            before = len(probe.steps())
            probe.state_pub.publish(message)
            assert wait_until(lambda: len(probe.steps()) > before, timeout=5, node=probe), label
            step = probe.steps()[-1]
            assert step["mode"] == "safe" and step["u"] == [0.0, 0.0], label
            assert step["reason"] == reason, (label, step["reason"])
        before = len(probe.steps())
        probe.state_pub.publish(probe.joint_state([0.4, 1.2], [0.0, 0.0], probe.now()))
        assert wait_until(lambda: len(probe.steps()) > before, timeout=5, node=probe)
        assert probe.steps()[-1]["mode"] == "nominal"            # and it goes on
        assert wait_until(lambda: any(int(v.get("rejected_count", "0")) > 0 and lv == ERROR
                                      for _, lv, _, v in probe.recording.diagnostics), timeout=5, node=probe)
    finally:
        probe.destroy_node()
    assert bringup.nodes["linz_controller"].alive()
    assert "state message rejected" in bringup.nodes["linz_controller"].log_text()


def test_a_killed_simulator_makes_the_controller_go_stale_safe_within_its_timeout(bringup, arm_artifact):
    path, artifact = arm_artifact
    bringup.start("linz_plant_sim", PARAMS, {"artifact": str(path)})
    bringup.start("linz_controller", PARAMS, {"artifact": str(path), "reference": "hold"})
    assert bringup.wait_for_log("linz_controller", "active: commanding", timeout=30)
    probe = Probe(artifact, ARM_TOPICS)
    stale_after = artifact.watchdog["stale_after"]
    try:
        assert wait_until(lambda: len(probe.steps()) > 200, timeout=20, node=probe)
        assert probe.steps()[-1]["mode"] == "nominal"
        bringup.stop("linz_plant_sim", hard=True)               # kill -9
        killed = time.monotonic()
        assert wait_until(lambda: probe.steps()[-1]["reason"] == "stale", timeout=5, node=probe)
        first_safe = next(s for s in probe.steps() if s["reason"] == "stale")
        delay = first_safe["received"] - killed
        assert probe.steps()[-1]["u"] == [0.0, 0.0]
    finally:
        probe.destroy_node()
    # stale once no state for stale_after, noticed by a timer running every stale_after / 2
    assert delay < 1.5 * stale_after + 0.2, delay
    assert bringup.nodes["linz_controller"].alive()
