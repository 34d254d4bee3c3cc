"""Over real DDS: a plant that leaves its envelope under model error is flagged by the controller
as it happens, in its diagnostics and its field log, and `linz logs` says so.

The plant is the flexible joint (Spong 1987, `tests/plants/flexible_joint.yaml`) with the
simulated shaft 20 % softer than the design assumes; the run is in simulated time, lockstep.
"""

import json

import numpy as np

from dds_harness import ROOT, Probe, field_log, wait_until
from linz_ros.nodes.recorder import TopicMap
from linz_ros.runtime import ALARMS, MODES, REASONS
from linz_ros.runtime.closed_loop import outside_envelope

PARAMS = """\
/linz_controller:
  ros__parameters:
    state_topic: /shaft/state
    command_topic: /shaft/command
    reference: "smooth:y=1.0,duration=1.0,at=0.5"
    stale_after: 1.0
    autostart: true
    diagnostics_period: 0.2
/linz_plant_sim:
  ros__parameters:
    rate: 200.0
    state_topic: /shaft/state
    command_topic: /shaft/command
    mismatch: ["k=-20"]
    publish_clock: true
    lockstep: true
"""


def _artifact(folder):
    from linz_ros.artifact import load_artifact
    from linz_ros.codegen import artifact_path, build_document, write_artifact
    from linz_ros.model import plant_from_text
    from linz_ros.synthesis import synthesise
    text = (ROOT / "tests" / "plants" / "flexible_joint.yaml").read_text()
    plant = plant_from_text(text + "design: {rate: 200, poles: {y: [-4, -5, -6, -7]}}\n")
    path = write_artifact(build_document(synthesise(plant), points=8)[0], artifact_path(folder, "flexible_joint"))
    return path, load_artifact(path, check_plant=False)


def test_a_softer_shaft_is_flagged_in_diagnostics_and_the_field_log(bringup, tmp_path, capsys):
    path, artifact = _artifact(tmp_path)
    params = tmp_path / "shaft.yaml"
    params.write_text(PARAMS)
    topics = TopicMap("/shaft/state", "std_msgs/msg/Float64MultiArray", [], "/shaft/command",
                      "std_msgs/msg/Float64MultiArray", [], "/shaft/reference")
    probe = Probe(artifact, topics, states=False)
    try:
        bringup.start("linz_plant_sim", params, {"artifact": str(path)})
        bringup.start("linz_controller", params, {"artifact": str(path), "use_sim_time": True,
                                                  "field_log_folder": str(tmp_path / "log")})
        assert bringup.wait_for_log("linz_controller", "active: commanding", timeout=60)
        # 3 s of simulated time; the wait is only a bound (lockstep slows down with the machine)
        assert wait_until(lambda: len(probe.recording.conditioning) > 600, timeout=180, node=probe)
        assert wait_until(lambda: any(level == 2 and "controlled stop: outside the envelope" in message
                                      for _, level, message, _ in probe.recording.diagnostics),
                          timeout=30, node=probe), probe.recording.diagnostics[-3:]
    finally:
        probe.destroy_node()
    bringup.stop("linz_controller")
    log = field_log(tmp_path / "log")
    alarms = log.column("alarms").astype(int)
    reasons = [REASONS[int(c)] for c in log.column("reason")]
    x = log.block("x")
    outside = outside_envelope(artifact, x, artifact.watchdog["envelope_margin"])
    assert outside.any(), "the softer shaft should swing the link out of its envelope"
    first_out = int(np.flatnonzero(outside)[0])
    # flagged at the very step the measured state left the widened envelope: a controlled stop from there on
    assert alarms[first_out] & 1 and reasons[first_out] == "outside_envelope"
    assert not (alarms[:first_out] & 1).any()
    modes = log.column("mode").astype(int)
    assert modes[first_out] == MODES.index("stopping") and np.all(np.isfinite(log.block("u")[first_out:]))
    # the stop lasts until the state is back inside the envelope itself (the margin is the hysteresis)
    inside = ~outside_envelope(artifact, x, 0.0)
    stopping = modes == MODES.index("stopping")
    for k in np.flatnonzero(stopping[1:] & ~stopping[:-1]) + 1:    # each stop's first step
        end = k + int(np.argmax(~stopping[k:])) if (~stopping[k:]).any() else len(modes)
        assert not inside[k:end - 1].all() or end - k <= 1
        if end < len(modes):
            assert inside[end], (k, end)
    from linz_ros.cli import main
    assert main(["logs", str(tmp_path / "log"), "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["verdict"]["word"] in ("left_envelope", "diverged")
    assert summary["watchdog_alarms"][ALARMS[0]]["acted"] > 0
