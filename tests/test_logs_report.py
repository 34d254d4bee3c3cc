"""Reports of a field log of the pick arm reaching through its singular set (an offline run
written by the same writer as the node): text, CSV, plots over the singular set, HTML."""

import csv

import numpy as np
import pytest

from support import BUNDLED, built_artifact
from linz_ros.artifact import artifact_from_text
from linz_ros.logs import plot_log, read_logs, summarise, summary_text, write_csv, write_html
from linz_ros.logs.report import log_view, singular_plane, singular_scatter_figure, singular_slice
from linz_ros.plotting import conditioning_figure, pyplot, run_view, tracking_error_figure
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
    assert [p.name for p in images] == ["outputs.png", "tracking_error.png", "states.png", "inputs.png",
                                        "conditioning.png", "singular_scatter.png"]
    assert all(p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" for p in images)
    rows = list(csv.reader(open(write_csv(log, tmp_path / "log.csv"))))
    assert rows[0][:3] == ["log_time", "sequence", "t"] and len(rows) == len(log) + 1
    assert {r[rows[0].index("mode")] for r in rows[1:]} >= {"nominal", "damped"}     # the columns of every run's CSV
    summary = summarise(log)
    page = write_html(summary, summary_text(summary), images, tmp_path / "report.html").read_text()
    assert page.count("data:image/png;base64,") == 6 and "Episodes under the act level" in page
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


def _near(log, artifact):
    sigma = log.column("sigma_min")
    return (sigma < artifact.watchdog["sigma_warn"]) & np.isfinite(sigma)


def test_the_singular_set_is_drawn_in_the_slice_where_the_run_was(reach_log):
    """The other states are held at their recorded median over the near-singular steps, not at a
    point the run never visited; the plane is the elbow angle's."""
    artifact, _, log = reach_log
    x, near = log.block("x"), _near(log, artifact)
    assert near.sum() > 10
    where = singular_slice(artifact, x, near)
    assert "q2" in (artifact.states[where.i], artifact.states[where.j])
    np.testing.assert_allclose(where.base, np.median(x[near], axis=0))
    assert where.basis == "the near-singular steps"
    fig = singular_scatter_figure(log_view(log, artifact), artifact, near)
    title = fig._suptitle.get_text()
    held = [k for k in range(len(artifact.states)) if k not in (where.i, where.j)]
    assert "the singular set s(x) = 0 where the run was" in title
    assert ", ".join(f"{artifact.states[k]}={np.median(x[near, k]):.4g}" for k in held) in title
    ax = fig.axes[0]
    assert ax.get_xlabel() == f"{artifact.states[where.i]} [rad]"            # units from the plant file
    (trajectory,) = [line for line in ax.get_lines() if line.get_label() == "recorded trajectory"]
    np.testing.assert_allclose(trajectory.get_xdata(), x[:, where.i])       # the run drawn on its own slice
    assert fig.axes[1].get_ylabel() == "sigma_min of A(x) [m/s^2 per N m]"     # the colour bar
    pyplot().close(fig)


def test_without_near_singular_steps_the_slice_is_the_median_of_all_accepted_steps(reach_log):
    artifact, _, log = reach_log
    x = log.block("x").copy()
    x[:5] = np.nan                                                          # refused states are left out
    where = singular_slice(artifact, x, np.zeros(len(x), dtype=bool))
    np.testing.assert_allclose(where.base, np.median(x[5:], axis=0))
    assert where.basis == "all accepted steps"
    nothing = singular_slice(artifact, np.full_like(x, np.nan), np.ones(len(x), dtype=bool))
    np.testing.assert_allclose(nothing.base, artifact.operating_point)


def test_the_scatter_of_an_artifact_without_a_singular_set_names_why(tmp_path):
    """An artifact was passed but carries no singular set: the title says so (it said "pass --artifact")."""
    artifact = built_artifact(BUNDLED / "mast_camera.yaml")
    assert not artifact.has_program("singular_set")
    view = run_view(simulate(artifact, SimSettings(duration=0.2)))
    fig = singular_scatter_figure(view, artifact, np.zeros(len(view.t), dtype=bool))
    assert "the artifact carries no singular-set expression" in fig._suptitle.get_text()
    assert fig.axes[0].get_xlabel() == "pan [rad]"
    pyplot().close(fig)


def test_the_plots_of_a_log_carry_units_the_verdict_and_the_shared_conditioning_style(reach_log):
    artifact, result, log = reach_log
    view = log_view(log, artifact)
    verdict = result.summary()
    assert view.verdict.word == verdict["verdict"] != "tracked"
    fig = tracking_error_figure(view)
    assert [ax.get_yscale() for ax in fig.axes] == ["log", "log"]
    assert [ax.get_ylabel() for ax in fig.axes] == ["|tool_x - ref| [m]", "|tool_y - ref| [m]"]
    assert f"verdict: {verdict['verdict']}" in fig._suptitle.get_text()
    pyplot().close(fig)
    # one conditioning figure for a run and its log: the same axes, labels and levels
    from_log, from_run = conditioning_figure(view), conditioning_figure(run_view(result))
    for a, b in zip(from_log.axes, from_run.axes):
        assert a.get_ylabel() == b.get_ylabel() and a.get_yscale() == b.get_yscale()
        assert sorted(line.get_label() for line in a.get_lines()) == sorted(line.get_label() for line in b.get_lines())
    pyplot().close(from_log)
    pyplot().close(from_run)


def test_the_summary_reports_tracking_as_the_run_does(reach_log):
    artifact, result, log = reach_log
    summary = summarise(log, artifact)
    errors = result.errors()
    # a step that ends singular records no outputs (nan): the log's error leaves it out
    recorded = np.isfinite(log.block("y")).all(axis=1)
    assert {result.reason[k] for k in np.flatnonzero(~recorded)} <= {"singular"}
    for i, name in enumerate(artifact.outputs):
        e = errors[recorded, i]
        tracked = summary["tracking"][name]
        assert tracked == {"rms_error": pytest.approx(np.sqrt(np.mean(e ** 2)), rel=1e-12),
                           "final_error": pytest.approx(abs(e[-1]), rel=1e-12),
                           "max_error": pytest.approx(np.max(np.abs(e)), rel=1e-12), "unit": "m"}
        assert tracked["max_error"] == pytest.approx(result.summary()["outputs"][name]["max_error"], rel=1e-12)
    text = summary_text(summary)
    o = summary["tracking"]["tool_x"]
    assert f"tracking error of tool_x (y - ref): rms {o['rms_error']:.4g} m, final {o['final_error']:.4g} m, " \
           f"max {o['max_error']:.4g} m" in text


def test_the_html_page_fits_the_width_of_the_screen(reach_log, tmp_path):
    artifact, _, log = reach_log
    summary = summarise(log, artifact)
    page = write_html(summary, summary_text(summary), [], tmp_path / "report.html").read_text()
    assert "<meta name='viewport' content='width=device-width, initial-scale=1'>" in page
    assert "img{max-width:100%;height:auto}" in page
    assert "table{" in page and "overflow-x:auto" in page.split("table{")[1].split("}")[0]
    assert "white-space:pre-wrap" in page                                   # the summary's long lines wrap
    assert "<h2>Tracking error (y - ref)</h2>" in page and "<td>tool_x</td>" in page
