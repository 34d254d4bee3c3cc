"""The diagnostics window without ROS: records summed into a level, a one-line summary and key values."""

import math
from pathlib import Path

import pytest

from linz_ros.runtime import StepRecord
from linz_ros.runtime.diagnostics import ERROR, LEVELS, OK, WARN, DiagnosticWindow, field_log_report
from linz_ros.runtime.fieldlog import FieldLogStatus


def _record(mode="nominal", reason="ok", sigma=0.5, condition=2.0, warn=False, saturated=(False, False),
            compute=1e-5, alarms=0):
    return StepRecord(0.0, (0.0, 0.0), mode, reason, sigma, condition, warn, 0.0, saturated, compute, (), alarms)


def test_levels_are_numbered_as_the_diagnostics_message_numbers_them():
    assert (OK, WARN, ERROR) == (0, 1, 2) and LEVELS[ERROR] == "ERROR"


def test_an_empty_window_warns_that_no_state_came():
    window = DiagnosticWindow(started=0.0)
    assert window.level() == (WARN, "active, but no state received")
    values = dict(window.values(2.0))
    assert values["window_min_sigma"] == "nan" and values["loop_rate_hz"] == "0" and values["mode_safe"] == "0"


def test_nominal_steps_are_ok_and_their_key_values_sum_them():
    window = DiagnosticWindow(started=1.0)
    for k, sigma in enumerate((0.5, 0.2, 0.9, 0.4)):
        window.add(_record(sigma=sigma, condition=1.0 / sigma, compute=(k + 1) * 1e-5))
    assert window.level() == (OK, "nominal")
    values = dict(window.values(3.0))
    assert values["window_min_sigma"] == "0.2" and values["max_condition"] == "5"
    assert values["loop_rate_hz"] == "2" and values["mode_nominal"] == "4"
    assert float(values["compute_time_p99_us"]) == pytest.approx(39.7)       # numpy's linear percentile
    assert list(values)[:3] == ["window_min_sigma", "max_condition", "saturated_fraction"]


def test_an_infinite_condition_is_kept_and_a_nan_one_skipped():
    window = DiagnosticWindow(started=0.0)
    window.add(_record(sigma=math.nan, condition=math.nan))
    assert window.max_condition == 0.0 and window.min_sigma == math.inf
    window.add(_record(sigma=0.0, condition=math.inf, mode="safe", reason="singular"))
    assert window.max_condition == math.inf and window.min_sigma == 0.0
    assert window.level() == (ERROR, "safe command sent: singular 1x")


def test_an_envelope_alarm_is_named_whether_it_acted_or_only_warned():
    window = DiagnosticWindow(started=0.0)
    window.add(_record(mode="safe", reason="outside_envelope", alarms=1))
    level, text = window.level()
    assert level == ERROR and "outside the envelope 1x" in text
    values = dict(window.values(1.0))
    assert values["outside_envelope_count"] == "1" and values["diverging_count"] == "0"
    warned = DiagnosticWindow(started=0.0)
    warned.add(_record(reason="diverging", alarms=2))
    assert warned.level() == (WARN, "diverging 1x (warn only)")


@pytest.mark.parametrize("change, expected", [
    ({"publish_failures": 2}, (ERROR, "2 message(s) refused by the middleware")),
    ({"stale": 1, "rejected": 3}, (ERROR, "safe command sent: state stale 1x, state rejected 3x")),
    ({"reference_stale": 1}, (WARN, "reference stale: holding")),
    ({"reference_missing": 4}, (WARN, "no reference received: holding")),
])
def test_what_the_node_counts_sets_the_level(change, expected):
    window = DiagnosticWindow(started=0.0)
    window.add(_record(mode="safe" if "stale" in change else "nominal", reason="stale" if "stale" in change else "ok"))
    for name, count in change.items():
        setattr(window, name, count)
    assert window.level() == expected


def test_warnings_are_joined_in_one_line():
    window = DiagnosticWindow(started=0.0)
    window.add(_record(mode="damped", reason="near_singular", warn=True, saturated=(True, False)))
    window.add(_record(mode="stopping", reason="outside_envelope", alarms=1))
    assert window.level()[0] == ERROR and window.level()[1].startswith("controlled stop: outside the envelope 1x")
    damped = DiagnosticWindow(started=0.0)
    damped.add(_record(mode="damped", reason="near_singular", warn=True, saturated=(True, False)))
    assert damped.level() == (WARN, "near singular: damped, saturating")
    assert dict(damped.values(1.0))["saturated_fraction"] == "1"


def test_the_field_log_report_is_ok_while_recording_and_warns_of_new_drops_only():
    status = FieldLogStatus(files=[Path("/logs/a.mcap")], written=120, dropped=0)
    level, notes, values = field_log_report(status, "", (0, 0))
    assert (level, notes) == (OK, [])
    assert values == [("field_log", "/logs/a.mcap"), ("field_log_state", "recording"), ("field_log_written", "120"),
                      ("field_log_dropped", "0"), ("field_log_lost", "0")]
    status.dropped = 7
    assert field_log_report(status, "", (0, 0))[:2] == (WARN, ["field log dropped 7 records"])
    assert field_log_report(status, "", (7, 0))[:2] == (OK, [])


def test_a_field_log_that_stopped_or_never_opened_is_an_error():
    stopped = FieldLogStatus(state="failed", files=[Path("a.mcap")], dropped=3, error="No space left on device")
    level, notes, _ = field_log_report(stopped, "", (0, 0))
    assert level == ERROR and notes == ["field log stopped: No space left on device", "field log dropped 3 records"]
    level, notes, values = field_log_report(None, "field_log_folder: cannot create it", (0, 0))
    assert (level, notes, values) == (ERROR, ["field log not recording: field_log_folder: cannot create it"],
                                      [("field_log", "not recording")])
