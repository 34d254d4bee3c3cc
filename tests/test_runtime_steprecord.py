"""The per-step record's one home: encode and decode by label, older and newer layouts, one CSV for every run."""

import csv
import math

import numpy as np
import pytest

from support import BUNDLED, built_artifact
from linz_ros.logs import read_logs, write_csv
from linz_ros.logs.analysis import as_sim_result
from linz_ros.runtime import ALARMS, MODES, REASONS, SimSettings, StepRecord, WatchdogConfig, make_reference, simulate
from linz_ros.runtime.fieldlog import FieldLogSettings, open_field_log
from linz_ros.runtime.steprecord import FIELDS, csv_header, decode, encode, record_labels

LABELS = list(FIELDS) + ["y.a", "y.b", "ref.a", "ref.b", "u.f", "u.g", "x.q"]


def _record(**changes):
    values = dict(t=0.25, command=(1.5, -2.0), mode="damped", reason="near_singular", sigma_min=0.05,
                  condition=40.0, warn=True, damping=0.3, saturated=(False, True), compute_time=7.5e-6,
                  outputs=(0.1, 0.2), alarms=2)
    values.update(changes)
    return StepRecord(**values)


def test_a_record_encodes_and_decodes_back_by_label():
    rows = [encode(_record(), [0.4, 0.5], [1.5, -2.0], x=[3.0]),
            encode(_record(t=0.5, mode="safe", reason="stale", outputs=(), saturated=(True, True), warn=False,
                           alarms=3, damping=0.0), [math.nan, math.nan], [0.0, 0.0], x=[math.nan])]
    steps = decode(rows, LABELS)
    assert steps.t.tolist() == [0.25, 0.5] and steps.sigma_min[0] == 0.05 and steps.condition[0] == 40.0
    assert steps.mode == ["damped", "safe"] and steps.reason == ["near_singular", "stale"]
    assert steps.saturated.tolist() == [[False, True], [True, True]] and steps.warn.tolist() == [True, False]
    assert steps.alarms.tolist() == [2, 3] and steps.damping.tolist() == [0.3, 0.0]
    assert steps.compute_time[0] == pytest.approx(7.5e-6, rel=1e-12)
    assert steps.y[0].tolist() == [0.1, 0.2] and np.isnan(steps.y[1]).all()       # a refused step has no outputs
    assert steps.ref[0].tolist() == [0.4, 0.5] and steps.u[0].tolist() == [1.5, -2.0] and steps.x[0, 0] == 3.0
    assert (steps.outputs, steps.inputs, steps.states) == (["a", "b"], ["f", "g"], ["q"])
    # one record decodes as one row; without x labels there is no state
    one = decode(rows[0][:-1], LABELS[:-1])
    assert len(one) == 1 and one.x is None and one.mode == ["damped"]


def test_labels_of_an_artifact_open_with_the_fixed_fields_then_the_vectors():
    artifact = built_artifact(BUNDLED / "mast_camera.yaml")
    labels = record_labels(artifact, states=True)
    assert labels[:len(FIELDS)] == list(FIELDS) and labels[len(FIELDS)] == f"y.{artifact.outputs[0]}"
    assert labels[-len(artifact.states):] == [f"x.{s}" for s in artifact.states]
    assert record_labels(artifact) == labels[:-len(artifact.states)]


def test_an_older_log_without_the_alarms_field_decodes_them_from_the_reasons():
    old = ["t", "sigma_min", "condition", "mode", "reason", "damping", "compute_time_us", "saturated_mask", "warn",
           "y.a", "ref.a", "u.f"]
    reasons = [REASONS.index(r) for r in ("ok", "outside_envelope", "diverging")]
    rows = [[0.01 * k, 1.0, 1.0, MODES.index("safe" if k else "nominal"), r, 0.0, 5.0, 1.0, 0.0, 0.1, 0.0, 2.0]
            for k, r in enumerate(reasons)]
    steps = decode(rows, old)
    assert steps.alarms.tolist() == [0, 1 << ALARMS.index("outside_envelope"), 1 << ALARMS.index("diverging")]
    assert steps.saturated.tolist() == [[True]] * 3 and steps.mode == ["nominal", "safe", "safe"]


def test_fields_missing_or_appended_later_are_found_by_label():
    # the oldest head only: the rest reads as nan (zero for the saturation mask and warn)
    steps = decode([[1.0, 0.5, 2.0, 0.0, 0.0]], ["t", "sigma_min", "condition", "mode", "reason"])
    assert math.isnan(steps.damping[0]) and math.isnan(steps.compute_time[0])
    assert steps.warn.tolist() == [False] and steps.saturated.shape == (1, 0) and steps.alarms.tolist() == [0]
    # a newer writer appended a field this reader does not know: everything else is where its label says
    newer = list(FIELDS) + ["jitter_us", "y.a", "ref.a", "u.f"]
    row = encode(_record(command=(1.0,), saturated=(True,), outputs=(0.3,)), [0.7], [1.0])
    steps = decode([row[:len(FIELDS)] + [99.0] + row[len(FIELDS):]], newer)
    assert steps.y.tolist() == [[0.3]] and steps.ref.tolist() == [[0.7]] and steps.u.tolist() == [[1.0]]
    assert steps.mode == ["damped"] and steps.saturated.tolist() == [[True]]


def test_an_unknown_reason_or_mode_code_decodes_to_a_word_not_a_crash(tmp_path):
    row = [0.0, 1.0, 1.0, 42.0, len(REASONS) + 3.0, 0.0, 1.0, 0.0, 0.0, math.nan, 0.0, 0.0, 0.0]
    damaged = list(row)
    damaged[3], damaged[4] = math.nan, 1.5
    steps = decode([row, damaged], list(FIELDS) + ["y.a", "ref.a", "u.f"])
    assert steps.reason == ["unknown", "unknown"] and steps.mode == ["unknown", "unknown"]
    assert steps.reason_code.tolist() == [-1, -1] and steps.alarms.tolist() == [0, 0]


@pytest.fixture(scope="module")
def reach_run(tmp_path_factory):
    """The pick arm reaching through its singular set (damped and saturated steps), with its field log."""
    artifact = built_artifact(BUNDLED / "pick_arm.yaml")
    folder = tmp_path_factory.mktemp("reach")
    config = WatchdogConfig.from_artifact(artifact, envelope_action="warn")
    from linz_ros.runtime import ControllerCore
    operating = artifact.document["plant"]["operating_point"]
    base = ControllerCore(artifact).output_values([operating[s] for s in artifact.states])
    reference = make_reference("smooth", artifact.relative_degree, base, amplitude=[0.12, 0.16], duration=1.0,
                               at=0.1)
    writer = open_field_log(FieldLogSettings(folder, prefix="reach"), artifact, config)
    result = simulate(artifact, SimSettings(duration=1.5, reference=reference, config=config), field_log=writer)
    assert writer.close().state == "closed"
    return artifact, result, read_logs([folder])


def _rows(path):
    with open(path, newline="") as stream:
        return list(csv.reader(stream))


def test_every_kind_of_run_writes_the_same_csv_columns(reach_run, tmp_path):
    artifact, result, log = reach_run
    sim = _rows(result.write_csv(tmp_path / "run.csv"))
    logged = _rows(write_csv(log, tmp_path / "log.csv"))
    demo = _rows(as_sim_result(log, artifact).write_csv(tmp_path / "demo.csv"))     # linz demo: run.csv from the log
    header = csv_header(artifact.states, artifact.outputs, artifact.inputs, artifact.relative_degree)
    assert sim[0] == header and demo[0] == header and logged[0] == ["log_time", "sequence"] + header
    assert len(sim) == len(logged) == len(demo) == len(result.t) + 1
    modes = {r[header.index("mode")] for r in sim[1:]}
    assert {"nominal", "damped"} <= modes and {r[2 + header.index("mode")] for r in logged[1:]} == modes
    # the same step reads the same in all three, but what a log does not record (y_ref's derivatives)
    recorded = [i for i, name in enumerate(header) if not (name.startswith("ref_") and "_d" in name)]
    for k in (1, len(sim) // 2, len(sim) - 1):
        assert [sim[k][i] for i in recorded] == [logged[k][2 + i] for i in recorded]
        assert [sim[k][i] for i in recorded if header[i] != "t"] == [demo[k][i] for i in recorded if header[i] != "t"]
    derivative = header.index(f"ref_{artifact.outputs[0]}_d1")
    assert logged[1][2 + derivative] == "nan" and sim[1][derivative] != "nan"
    assert {r[header.index("warn")] for r in sim[1:]} == {"0", "1"}
    assert all(r[header.index("alarms")] in ("", *ALARMS, "+".join(ALARMS)) for r in sim[1:])


def test_the_recorder_decodes_the_topic_by_its_labels_into_the_same_csv(reach_run, tmp_path):
    pytest.importorskip("rclpy", reason="rclpy is not installed (pip install '.[ros]')")
    from linz_ros.nodes.recorder import BringupRecorder, Recording

    artifact, result, log = reach_run
    n = len(artifact.states)
    recorder = object.__new__(BringupRecorder)          # its decoding only: no node, no DDS
    recorder.artifact = artifact
    # the conditioning topic carries the record without the state; the state comes on its own topic
    recorder.recording = Recording(conditioning=[(float(k), list(row[:-n])) for k, row in enumerate(log.values)],
                                   conditioning_labels=log.labels[:-n],
                                   states=[(float(k), float(row[0]), list(row[-n:])) for k, row in
                                           enumerate(log.values)])
    recorded = recorder.to_result()
    rows = _rows(recorded.write_csv(tmp_path / "recorded.csv"))
    demo = _rows(as_sim_result(log, artifact).write_csv(tmp_path / "demo.csv"))
    assert rows == demo
    assert recorded.mode == result.mode and recorded.reason == result.reason
    np.testing.assert_array_equal(recorded.alarm_mask(), result.alarm_mask())
