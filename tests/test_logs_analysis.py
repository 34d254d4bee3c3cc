"""Episodes, mode switches, saturation, refusals and percentiles of a log built by hand."""

import math

import numpy as np
import pytest

from linz_ros.logs import StepLog, episodes, runs, summarise
from linz_ros.logs.analysis import control_gaps, mode_switches, sequence_gaps
from linz_ros.runtime import MODES, REASONS

LABELS = ["t", "sigma_min", "condition", "mode", "reason", "damping", "compute_time_us", "saturated_mask", "warn",
          "y.a", "ref.a", "u.f", "u.g", "x.q", "x.w"]
PERIOD = 0.01


def _log(n: int = 100, **columns) -> StepLog:
    values = np.zeros((n, len(LABELS)))
    values[:, 0] = PERIOD * np.arange(n)
    values[:, 1] = 1.0
    values[:, 2] = 1.0
    values[:, 6] = 10.0
    values[:, 13] = np.arange(n)          # x.q marks the record
    for name, column in columns.items():
        values[:, LABELS.index(name)] = column
    return StepLog(list(LABELS), values, values[:, 0] + 1.8e9, np.arange(n), ["hand.mcap"],
                   {"linz_watchdog": {"sigma_warn": "0.5", "sigma_act": "0.2", "sigma_stop": "0.05"}},
                   clean_close={"hand.mcap": True})


def test_runs_finds_maximal_stretches():
    assert runs(np.array([0, 1, 1, 0, 1, 0, 0, 1], dtype=bool)) == [(1, 2), (4, 4), (7, 7)]
    assert runs(np.zeros(3, dtype=bool)) == [] and runs(np.ones(2, dtype=bool)) == [(0, 1)]


def test_near_singular_episodes_have_their_start_duration_minimum_and_state():
    sigma = np.ones(100)
    sigma[10:20] = np.linspace(0.4, 0.3, 10)
    sigma[14] = 0.1                              # the worst point of the first episode
    sigma[50:53] = 0.45
    log = _log(sigma_min=sigma)
    found = episodes(log, sigma < 0.5, "under_warn")
    assert [(e.start, e.records) for e in found] == [(pytest.approx(0.10), 10), (pytest.approx(0.50), 3)]
    assert found[0].duration == pytest.approx(10 * PERIOD) and found[1].duration == pytest.approx(3 * PERIOD)
    assert found[0].min_sigma == pytest.approx(0.1) and found[0].worst_time == pytest.approx(0.14)
    assert found[0].state_at_worst == {"q": 14.0, "w": 0.0}
    summary = summarise(log)
    assert summary["near_singular"]["under_warn"]["count"] == 2
    assert summary["near_singular"]["under_warn"]["total_time"] == pytest.approx(0.13)
    assert summary["near_singular"]["under_act"]["count"] == 1          # only the 0.1 dip is under 0.2
    assert summary["thresholds"]["source"] == "recorded in the log"
    assert summary["min_sigma"] == pytest.approx(0.1)


def test_an_episode_at_the_end_of_the_log_lasts_to_one_period_after_its_last_record():
    sigma = np.ones(20)
    sigma[17:] = 0.01
    (e,) = episodes(_log(20, sigma_min=sigma), sigma < 0.5, "under_warn")
    assert e.duration == pytest.approx(3 * PERIOD)


def test_mode_switches_and_time_in_mode():
    mode = np.zeros(100)
    mode[30:40] = MODES.index("damped")
    mode[35:37] = MODES.index("safe")
    log = _log(mode=mode)
    assert [(round(t, 2), a, b) for t, a, b in mode_switches(log)] == [
        (0.30, "nominal", "damped"), (0.35, "damped", "safe"), (0.37, "safe", "damped"), (0.40, "damped", "nominal")]
    summary = summarise(log)
    assert summary["time_in_mode"]["damped"] == pytest.approx(0.08)
    assert summary["time_in_mode"]["safe"] == pytest.approx(0.02)
    assert summary["mode_switches"]["by_kind"] == {"nominal->damped": 1, "damped->safe": 1, "safe->damped": 1,
                                                   "damped->nominal": 1}


def test_saturation_episodes_per_input_from_the_bit_mask():
    mask = np.zeros(100)
    mask[5:10] = 1            # u.f
    mask[8:12] += 2           # u.g
    summary = summarise(_log(saturated_mask=mask))
    assert summary["saturation"]["f"]["count"] == 1 and summary["saturation"]["f"]["fraction"] == pytest.approx(0.05)
    assert summary["saturation"]["g"]["episodes"][0]["start"] == pytest.approx(0.08)
    assert summary["saturation"]["g"]["longest"] == pytest.approx(0.04)


def test_refused_states_are_grouped_by_reason():
    reason = np.zeros(100)
    reason[40:45] = REASONS.index("stale")
    reason[70] = REASONS.index("non_finite_state")
    reason[72] = REASONS.index("non_finite_state")
    summary = summarise(_log(reason=reason))
    assert summary["refused"]["stale"]["records"] == 5 and summary["refused"]["stale"]["count"] == 1
    assert summary["refused"]["non_finite_state"]["count"] == 2
    assert "near_singular" not in summary["refused"]


def test_compute_time_percentiles_match_numpy():
    rng = np.random.default_rng(3)
    ct = rng.gamma(3.0, 5.0, 100)
    summary = summarise(_log(compute_time_us=ct))
    assert summary["compute_time_us"]["p99"] == pytest.approx(np.percentile(ct, 99))
    assert summary["compute_time_us"]["max"] == pytest.approx(ct.max())


def test_sequence_gaps_count_the_missing_records_across_a_wrap():
    log = _log(10)
    log.sequence = np.array([0, 1, 2, 5, 6, 2**32 - 1, 0, 1, 3, 4])   # 2 missing, a jump of 2**32-7, ...
    log.sequence[5:] = [7, 8, 10, 11, 12]
    assert sequence_gaps(log) == 3
    wrapped = _log(4)
    wrapped.sequence = np.array([2**32 - 2, 2**32 - 1, 0, 2])
    assert sequence_gaps(wrapped) == 1
    restarted = _log(6)                  # two runs joined: the second writer counts from 0 again
    restarted.sequence = np.array([0, 1, 2, 0, 1, 3])
    assert sequence_gaps(restarted) == 1


def test_without_recorded_levels_the_controller_flags_are_used():
    log = _log(warn=np.r_[np.zeros(50), np.ones(5), np.zeros(45)])
    log.metadata = {}
    summary = summarise(log)
    assert summary["thresholds"] is None
    assert summary["near_singular"]["under_warn"]["count"] == 1


def test_the_summary_is_json_ready():
    import json
    sigma = np.ones(100)
    sigma[3] = math.nan
    summary = summarise(_log(sigma_min=sigma, condition=np.full(100, math.inf)))
    text = json.dumps(summary, allow_nan=False)
    assert '"max_condition": null' in text


def test_control_gaps_are_intervals_of_more_than_five_periods_between_steps():
    t = PERIOD * np.arange(100.0)
    t[40:] += 0.035                 # 4.5 periods between records 39 and 40: not over the limit
    t[70:] += 0.05                  # 6 periods between 69 and 70: a gap
    gaps = control_gaps(_log(t=t))
    assert gaps["count"] == 1 and gaps["ends"] == [pytest.approx(t[70])]
    assert gaps["longest_s"] == pytest.approx(6 * PERIOD)
    assert summarise(_log(t=t))["control_gaps"]["count"] == 1
    assert control_gaps(_log())["count"] == 0


def test_a_field_log_as_a_sim_result_gives_back_the_run_that_wrote_it(tmp_path):
    from linz_ros.logs import read_logs
    from linz_ros.logs.analysis import as_sim_result
    from linz_ros.runtime import ControllerCore, SimSettings, WatchdogConfig, parse_reference, simulate
    from linz_ros.runtime.fieldlog import FieldLogSettings, open_field_log
    from support import BUNDLED, built_artifact

    artifact = built_artifact(BUNDLED / "pick_arm.yaml")
    # through the singular set: damped and safe steps, saturation
    x0 = [float(artifact.document["plant"]["operating_point"][s]) for s in artifact.states]
    reach = parse_reference("smooth:tool_x=0.12,tool_y=0.16,duration=1", artifact.relative_degree,
                            ControllerCore(artifact).output_values(x0), artifact.outputs)
    config = WatchdogConfig.from_artifact(artifact, envelope_action="warn")     # to reach the singular set
    settings = SimSettings(duration=2.0, reference=reach, initial=x0, config=config)
    writer = open_field_log(FieldLogSettings(tmp_path), artifact, config)
    run = simulate(artifact, settings, field_log=writer)
    assert writer.close().state == "closed"
    back = as_sim_result(read_logs([tmp_path]), artifact)
    assert len(back.t) == len(run.t) and back.mode == run.mode and back.reason == run.reason
    assert {"damped", "safe"} <= set(back.mode) and back.saturated.any()
    np.testing.assert_allclose(back.t, run.t - run.t[0], atol=1e-12)
    for name in ("x_measured", "u", "sigma_min", "condition", "saturated"):
        np.testing.assert_array_equal(getattr(back, name), getattr(run, name), err_msg=name)
    # the per-step record carries no outputs for a step that sent the safe command
    safe = np.array(back.mode) == "safe"
    assert np.isnan(back.y[safe]).all() and not np.isnan(back.y[~safe]).any()
    np.testing.assert_array_equal(back.y[~safe], run.y[~safe])
    np.testing.assert_array_equal(back.reference_values()[~safe], run.reference_values()[~safe])
    ours, theirs = back.summary(), run.summary()
    for key in ("steps", "min_sigma", "max_condition", "time_in_mode", "saturated_fraction", "reasons"):
        assert ours[key] == theirs[key], key


def test_a_field_log_of_another_plant_is_refused_by_name(tmp_path):
    from linz_ros.logs import LogError
    from linz_ros.logs.analysis import as_sim_result
    from support import BUNDLED, built_artifact

    with pytest.raises(LogError, match=r"hand.mcap: its y fields \['a'\] are not those of the artifact pick_arm"):
        as_sim_result(_log(), built_artifact(BUNDLED / "pick_arm.yaml"))


def test_the_tracking_error_per_output_by_hand():
    """y - ref of output a: 0.3 at record 2, -0.4 at record 5, a refused step (nan) last; zero elsewhere."""
    from linz_ros.logs import summary_text
    y = np.zeros(10)
    ref = np.zeros(10)
    y[2], ref[5] = 0.5, 0.4
    ref[2] = 0.2
    y[9] = np.nan                                  # a refused state records no output
    summary = summarise(_log(10, **{"y.a": y, "ref.a": ref}))
    rms = math.sqrt((0.3 ** 2 + 0.4 ** 2) / 9)     # over the 9 steps with an error
    assert summary["tracking"] == {"a": {"rms_error": pytest.approx(rms), "final_error": 0.0,
                                         "max_error": pytest.approx(0.4), "unit": None}}
    assert f"tracking error of a (y - ref): rms {rms:.4g}, final 0, max 0.4 (unit not stated)" in summary_text(summary)


def test_a_log_without_references_reports_no_tracking():
    labels = [label for label in LABELS if not label.startswith("ref.")]
    values = np.zeros((5, len(labels)))
    values[:, 0] = PERIOD * np.arange(5)
    log = StepLog(labels, values, values[:, 0], np.arange(5), ["hand.mcap"], {}, clean_close={"hand.mcap": True})
    assert summarise(log)["tracking"] == {}


@pytest.mark.filterwarnings("error")             # numpy's RuntimeWarnings would print before the summary
def test_nan_and_inf_anywhere_give_a_clean_summary_without_warnings():
    from linz_ros.logs import summary_text
    n = 60
    t = PERIOD * np.arange(n)
    t[[5, 6]] = [np.nan, np.inf]                 # refused bad stamps are recorded as they came
    mode = np.zeros(n)
    mode[20:25] = MODES.index("damped")
    mode[30] = np.nan                            # a damaged record
    reason = np.zeros(n)
    reason[5:7] = REASONS.index("bad_time")
    reason[40] = np.inf
    sigma = np.ones(n)
    sigma[3:8] = [0.1, np.nan, np.inf, 0.05, np.nan]
    mask = np.zeros(n)
    mask[10:12] = [np.inf, np.nan]
    log = _log(n, t=t, mode=mode, reason=reason, sigma_min=sigma, condition=1 / sigma, saturated_mask=mask,
               compute_time_us=np.where(np.arange(n) == 9, np.inf, 10.0))
    summary = summarise(log)
    text = summary_text(summary)
    assert summary["records"] == n and summary["min_sigma"] == pytest.approx(0.05)
    assert summary["refused"]["bad_time"]["records"] == 2
    assert summary["saturation"]["f"]["fraction"] == 0.0                  # a damaged mask saturates nothing
    assert summary["mode_switches"]["by_kind"] == {"nominal->damped": 1, "damped->nominal": 1,
                                                   "nominal->unknown": 1, "unknown->nominal": 1}
    groups = [summary["near_singular"]["under_warn"], *summary["refused"].values()]
    assert all(math.isfinite(e["start"]) and math.isfinite(e["duration"]) for g in groups for e in g["episodes"])
    assert "near-singular" in text or "sigma" in text


def test_watchdog_alarms_are_counted_flagged_and_acted(tmp_path):
    from linz_ros.logs import read_logs
    from linz_ros.logs.analysis import summarise
    from linz_ros.runtime import SimSettings, WatchdogConfig, simulate
    from linz_ros.runtime.fieldlog import FieldLogSettings, open_field_log
    from support import BUNDLED, built_artifact

    artifact = built_artifact(BUNDLED / "pick_arm.yaml")
    for action, acted in (("safe", True), ("warn", False)):
        config = WatchdogConfig.from_artifact(artifact, envelope_action=action)
        folder = tmp_path / action
        writer = open_field_log(FieldLogSettings(folder), artifact, config, source="test")
        # start outside the envelope (q2 below 0.15 - 0.245): flagged from the first step
        result = simulate(artifact, SimSettings(duration=0.2, initial=[0.4, -0.2, 0.0, 0.0], config=config),
                          field_log=writer)
        writer.close()
        summary = summarise(read_logs([folder]), artifact)
        alarm = summary["watchdog_alarms"]["outside_envelope"]
        flagged = int(np.count_nonzero(result.alarm_mask() & 1))
        assert alarm["records"] == flagged > 0 and alarm["first"] == pytest.approx(0.0, abs=1e-6)
        assert (alarm["acted"] > 0) == acted
        assert summary["verdict"]["word"] == "left_envelope"


@pytest.mark.parametrize("text", ["nan", "inf", "-1e999", "1" * 400])
def test_non_finite_recorded_levels_are_not_used(text):
    """Levels recorded as "nan" or "inf" read as floats; the summary then crashed formatting None."""
    from linz_ros.logs import summary_text
    from linz_ros.logs.analysis import thresholds_of

    log = _log()
    log.metadata["linz_watchdog"] = {"sigma_warn": text, "sigma_act": "0.2", "sigma_stop": "0.05"}
    assert thresholds_of(log) is None
    assert "watchdog levels unknown" in summary_text(summarise(log))


def test_a_log_of_an_extended_plants_own_states_reads_with_the_compensator_unknown(tmp_path):
    # the delivery cart: the controller's field log has x over the extended states (x, y, th, v_i1); a log
    # of the plant's own states (x, y, th; a recorder's) is read too, the compensator's column nan
    from linz_ros.logs import LogError, read_logs
    from linz_ros.logs.analysis import as_sim_result
    from linz_ros.runtime import SimSettings, WatchdogConfig, simulate
    from linz_ros.runtime.fieldlog import FieldLogSettings, open_field_log
    from support import BUNDLED, built_artifact

    artifact = built_artifact(BUNDLED / "delivery_cart.yaml")
    assert artifact.states[-1] == "v_i1" and artifact.plant_states == ["x", "y", "th"]
    settings = SimSettings(duration=0.5, config=WatchdogConfig.from_artifact(artifact))
    writer = open_field_log(FieldLogSettings(tmp_path), artifact, settings.config)
    run = simulate(artifact, settings, field_log=writer)
    assert writer.close().state == "closed"
    full = read_logs([tmp_path])
    assert full.names("x") == artifact.states
    keep = [i for i, label in enumerate(full.labels) if label != "x.v_i1"]
    own = StepLog([full.labels[i] for i in keep], full.values[:, keep], full.log_time, full.sequence, full.files,
                  full.metadata, clean_close={f: True for f in full.files})
    whole, plant_only = as_sim_result(full, artifact), as_sim_result(own, artifact)
    np.testing.assert_array_equal(whole.x, run.x)                 # the compensator each step used: the speed
    assert whole.x[0, 3] == pytest.approx(0.45)
    np.testing.assert_array_equal(plant_only.x[:, :3], run.x[:, :3])
    assert np.isnan(plant_only.x[:, 3]).all() and plant_only.summary()["steps"] == whole.summary()["steps"]
    other = StepLog([label.replace("x.th", "x.heading") for label in own.labels], own.values, own.log_time,
                    own.sequence, own.files, own.metadata, clean_close={f: True for f in own.files})
    with pytest.raises(LogError, match=r"its x fields \['x', 'y', 'heading'\] are not those of the artifact "
                                       r"delivery_cart \(\['x', 'y', 'th', 'v_i1'\]\)"):
        as_sim_result(other, artifact)
