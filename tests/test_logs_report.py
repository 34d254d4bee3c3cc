"""Reports of a field log of the pick arm reaching through its singular set (an offline run
written by the same writer as the node): text, CSV, plots over the singular set, HTML."""

import csv

import numpy as np
import pytest

from support import BUNDLED, built_artifact
from linz_ros.artifact import artifact_from_text
from linz_ros.logs import plot_log, read_logs, summarise, summary_text, write_csv, write_html
from linz_ros.logs.report import singular_plane
from linz_ros.runtime import SimSettings, WatchdogConfig, make_reference, simulate
from linz_ros.runtime.fieldlog import FieldLogSettings, open_field_log

REACH = {"tool_x": 0.12, "tool_y": 0.16}


@pytest.fixture(scope="module")
def reach_log(tmp_path_factory):
    artifact = built_artifact(BUNDLED / "pick_arm.yaml")
    folder = tmp_path_factory.mktemp("reach")
    # the envelope watchdog only warns: the run is to pass through the singular set (by default the arm
    # would stop under control as its elbow whips out of the envelope)
    config = WatchdogConfig.from_artifact(artifact, envelope_action="warn")
    writer = open_field_log(FieldLogSettings(folder, prefix="reach"), artifact, config)
    result = simulate(artifact, SimSettings(duration=3.0, reference=_reach(artifact), config=config), field_log=writer)
    status = writer.close()
    assert status.state == "closed"
    return artifact, result, read_logs([folder])


def _reach(artifact):
    from linz_ros.runtime import ControllerCore
    core = ControllerCore(artifact)
    operating = artifact.document["plant"]["operating_point"]
    base = core.output_values([operating[s] for s in artifact.states])
    return make_reference("smooth", artifact.relative_degree, base,
                          amplitude=[REACH[o] for o in artifact.outputs], duration=2.0, at=0.2)


def test_the_log_holds_what_the_run_did(reach_log):
    artifact, result, log = reach_log
    assert len(log) == len(result.t)
    np.testing.assert_allclose(log.column("sigma_min"), result.sigma_min, equal_nan=True)
    np.testing.assert_allclose(log.block("x"), result.x_measured)
    np.testing.assert_allclose(log.block("u"), result.u)
    assert [m for m in log.column("mode").astype(int)] == [("nominal", "damped", "held", "safe").index(m)
                                                          for m in result.mode]
    attached = artifact_from_text(log.artifact_text)
    assert attached.document["sha256"] == artifact.document["sha256"]


def test_the_summary_finds_the_passes_through_the_singular_set(reach_log):
    artifact, result, log = reach_log
    summary = summarise(log)
    act = summary["near_singular"]["under_act"]
    assert act["count"] >= 2
    # every pass below the act level is at the stretched-out arm: elbow angle near 0 (sin q2 = 0)
    for episode in act["episodes"]:
        assert abs(np.sin(episode["state_at_worst"]["q2"])) < 0.05
    assert summary["time_in_mode"]["damped"] == pytest.approx(result.summary()["time_in_mode"]["damped"], abs=0.01)
    text = summary_text(summary)
    assert "under the act level" in text and "min sigma" in text and "\n" in text


def test_the_plane_of_the_scatter_is_the_elbow_angle(reach_log):
    artifact, _, log = reach_log
    i, j, _ = singular_plane(artifact, log.block("x"))
    assert "q2" in (artifact.states[i], artifact.states[j])      # det A of the two-link arm depends on q2 only


def test_plots_csv_and_html(reach_log, tmp_path):
    artifact, _, log = reach_log
    images = plot_log(log, tmp_path / "plots", artifact)
    assert [p.name for p in images] == ["conditioning.png", "inputs.png", "singular_scatter.png"]
    assert all(p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" for p in images)
    rows = list(csv.reader(open(write_csv(log, tmp_path / "log.csv"))))
    assert rows[0][:3] == ["log_time", "sequence", "t"] and len(rows) == len(log) + 1
    assert {r[2 + log.labels.index("mode")] for r in rows[1:]} >= {"nominal", "damped"}
    summary = summarise(log)
    page = write_html(summary, summary_text(summary), images, tmp_path / "report.html").read_text()
    assert page.count("data:image/png;base64,") == 3 and "Episodes under the act level" in page
    assert "<script" not in page and "http" not in page.replace("http-equiv", "")     # self-contained


def test_plots_of_a_log_without_inputs_leave_out_the_inputs_panel(tmp_path):
    """A log whose records carry no ``u.*`` fields crashed matplotlib (a figure of zero rows)."""
    from linz_ros.runtime.fieldlog import FieldLogWriter

    labels = ["t", "sigma_min", "condition", "mode", "reason", "damping", "compute_time_us", "saturated_mask", "warn"]
    writer = FieldLogWriter(FieldLogSettings(tmp_path / "log"), labels, {})
    writer.put([0.0, 1.0, 1.0, 0.0, 0.0, 0.0, 5.0, 0.0, 0.0])
    writer.put([0.01, 1.0, 1.0, 0.0, 0.0, 0.0, 5.0, 0.0, 0.0])
    writer.close()
    images = plot_log(read_logs([tmp_path / "log"]), tmp_path / "plots")
    assert [p.name for p in images] == ["conditioning.png"]
