"""The controller node's settings without ROS: its parameter table, watchdog overrides and their checks."""

import math
import re
from pathlib import Path

import pytest

from linz_ros.artifact import WATCHDOG_SETTINGS
from linz_ros.runtime.controller_settings import (DYNAMIC, SIM_TIME_FUTURE_TOLERANCE, SIM_TIME_NO_STATE_TIMEOUT,
                                                  TABLE_PARAMETERS, UNSET, controller_parameters, field_log_settings,
                                                  no_state_timeout, parameter_problem, table_override,
                                                  watchdog_overrides)


def _values(**changed):
    values = {spec.name: spec.default for spec in controller_parameters(("s",), ("c",), ("e",))}
    values.update(changed)
    return values


def test_every_watchdog_setting_is_a_parameter_and_only_runtime_ones_may_change():
    specs = {spec.name: spec for spec in controller_parameters(("a/msg/State",), ("b/msg/Command",), ("x", "y"))}
    assert len(specs) == len(controller_parameters(("a",), ("b",), ("x",)))       # names are unique
    for row in WATCHDOG_SETTINGS:
        assert row.name in specs
        assert specs[row.name].read_only is not (row.name in DYNAMIC)
    assert all(spec.read_only for name, spec in specs.items() if name not in DYNAMIC)
    assert specs["state_type"].description == "one of a/msg/State"
    assert specs["command_type"].description == "one of b/msg/Command"
    assert specs["executor"].description == "one of x, y"
    assert specs["rate_limits"].array_of is float and specs["rate_limits"].default == []
    assert specs["sigma_warn"].default == UNSET and specs["sigma_warn"].minimum == -1.0
    assert specs["envelope_action"].default == "artifact" and "artifact or one of warn, stop, safe" in \
        specs["envelope_action"].description


@pytest.mark.parametrize("shape, value, expected", [
    ("scalar", UNSET, None), ("scalar", 0.0, 0.0), ("scalar", 2, 2.0),
    ("choice", "artifact", None), ("choice", "warn", "warn"),
    ("per_input", [], None), ("per_input", [1.5, 0.0], (1.5, math.inf)),
])
def test_a_parameter_value_is_the_artifacts_or_an_override(shape, value, expected):
    assert table_override(shape, value) == expected


@pytest.mark.parametrize("changed, words", [
    ({"sigma_warn": -0.5}, r"sigma_warn must be -1 \(the artifact's value\) or >= 0, got -0.5"),
    ({"rate_limits": [1.0, -2.0]}, r"rate_limits must be >= 0 \(0: no limit\)"),
    ({"envelope_action": "halt"}, "envelope_action: expected one of warn, stop, safe, got 'halt'"),
    ({"sigma_warn": 0.01, "sigma_act": 0.1}, "sigma_warn"),
])
def test_a_refused_change_names_the_parameter(changed, words):
    problem = parameter_problem(changed, _values(**changed))
    assert problem is not None and len(problem.splitlines()) == 1
    assert re.search(words, problem), problem


def test_an_accepted_change_has_no_problem_and_other_parameters_are_not_checked_here():
    assert parameter_problem({"stale_after": 0.5, "rate_limits": [0.0, 3.0]}, _values()) is None
    assert parameter_problem({"state_topic": "anything"}, _values()) is None


def test_overrides_carry_only_what_differs_from_the_artifact():
    assert watchdog_overrides(_values(), sim_time=False) == {}
    assert watchdog_overrides(_values(), sim_time=True) == {"future_tolerance": SIM_TIME_FUTURE_TOLERANCE}
    overrides = watchdog_overrides(_values(stale_after=0.3, rate_limits=[0.0, 2.0], future_tolerance=0.0,
                                           safe_command="fixed", safe_value=[1, -1]), sim_time=True)
    assert overrides == {"stale_after": 0.3, "rate_limits": (math.inf, 2.0), "future_tolerance": 0.0,
                         "safe_kind": "fixed", "safe_value": (1.0, -1.0)}
    assert watchdog_overrides(_values(safe_command="hold"), sim_time=False) == {"safe_kind": "hold"}
    assert len(TABLE_PARAMETERS) == len(WATCHDOG_SETTINGS) - 2


@pytest.mark.parametrize("setting, stale_after, system_time, expected", [
    (UNSET, 0.2, True, 0.2), (UNSET, 0.2, False, SIM_TIME_NO_STATE_TIMEOUT), (UNSET, 0.8, False, 0.8),
    (UNSET, 0.0, False, SIM_TIME_NO_STATE_TIMEOUT), (0.05, 0.8, False, 0.05), (3, 0.2, True, 3.0),
])
def test_the_no_state_timeout_rule(setting, stale_after, system_time, expected):
    assert no_state_timeout(setting, stale_after, system_time) == expected


def test_field_log_settings_come_from_the_field_log_parameters(tmp_path):
    settings = field_log_settings(_values(field_log_folder=str(tmp_path), field_log_max_mb=1.5,
                                          field_log_max_minutes=2.0), "linz_controller")
    assert settings.folder == Path(tmp_path) and settings.prefix == "linz_controller"
    assert settings.max_bytes == int(1.5 * 2**20) and settings.max_seconds == 120.0
    assert settings.flush_period == 0.5 and settings.queue_size == 20000
