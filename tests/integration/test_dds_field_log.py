"""Over real DDS: the controller's field log survives kill -9, closes cleanly on shutdown,
and an unwritable log folder stops the recording, not the controller."""

import numpy as np

from dds_harness import ARM_TOPICS, CONFIG, Probe, wait_until
from linz_ros.logs import read_logs, summarise

PARAMS = CONFIG / "pick_arm.yaml"
ERROR = 2


def _run_until(bringup, path, artifact, overrides, steps):
    probe = Probe(artifact, ARM_TOPICS, states=False)
    try:
        bringup.start("linz_plant_sim", PARAMS, {"artifact": str(path)})
        bringup.start("linz_controller", PARAMS, {"artifact": str(path), "reference": "hold", "stale_after": 0.2,
                                                  **overrides})
        assert bringup.wait_for_log("linz_controller", "active: commanding", timeout=60)
        assert wait_until(lambda: len(probe.recording.conditioning) > steps, timeout=90, node=probe, step=0.05)
    finally:
        probe.destroy_node()
    return probe


def test_after_kill_9_the_field_log_reads_back_to_its_last_flush(bringup, arm_artifact, tmp_path):
    path, artifact = arm_artifact
    folder = tmp_path / "field_log"
    probe = _run_until(bringup, path, artifact, {"field_log_folder": str(folder), "field_log_flush_period": 0.2},
                       1000)
    bringup.stop("linz_controller", hard=True)            # kill -9: no chance to close the file
    seen = [data[0] for _, data in probe.recording.conditioning]
    log = read_logs([folder])
    assert list(log.clean_close.values()) == [False]
    # everything up to the last flush (0.2 s, 100 steps at 500 Hz) is there, with no gap
    assert len(log) >= len(seen) - 100 - 50, (len(log), len(seen))
    np.testing.assert_array_equal(log.sequence, np.arange(len(log)))
    common = np.intersect1d(log.column("t"), seen)
    assert len(common) >= 0.9 * min(len(log), len(seen))        # the same steps the topic carried
    summary = summarise(log)
    assert summary["cut_files"] and summary["missing_records"] == 0
    assert summary["time_in_mode"]["nominal"] > 1.5


def test_a_clean_shutdown_closes_the_log_with_its_counts(bringup, arm_artifact, tmp_path):
    path, artifact = arm_artifact
    folder = tmp_path / "field_log"
    _run_until(bringup, path, artifact, {"field_log_folder": str(folder)}, 500)
    assert bringup.stop("linz_controller") == 0
    log = read_logs([folder])
    assert list(log.clean_close.values()) == [True]
    recording = log.metadata["linz_recording"]
    assert int(recording["written_total"]) == len(log) and recording["dropped_total"] == "0"
    parameters = summarise(log)["parameters"]
    assert parameters["artifact"] == str(path) and parameters["field_log_folder"] == str(folder)
    assert "field log closed" in bringup.nodes["linz_controller"].log_text()
    assert np.isfinite(log.block("x")[log.column("reason") == 0]).all()


def test_an_unwritable_log_folder_is_an_error_diagnostic_and_control_goes_on(bringup, arm_artifact, tmp_path):
    path, artifact = arm_artifact
    blocker = tmp_path / "a_file"
    blocker.write_text("")
    probe = _run_until(bringup, path, artifact, {"field_log_folder": str(blocker / "logs"),
                                                 "diagnostics_period": 0.2}, 600)
    reasons = {step["reason"] for step in probe.steps(last=500)}
    assert reasons == {"ok"}
    errors = [message for _, level, message, _ in probe.recording.diagnostics if level == ERROR]
    assert errors and all("field log" in m for m in errors), probe.recording.diagnostics[-3:]
    assert "field log not recording" in bringup.nodes["linz_controller"].log_text()
