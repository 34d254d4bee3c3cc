"""The one table of watchdog settings and its one check, as every layer sees it."""

import math
from pathlib import Path

import pytest

from support import BUNDLED, MINIMAL, built_artifact
from linz_ros.artifact.watchdog import (MAX_WATCHDOG_SECONDS, PLANT_FILE_SETTINGS, RUNTIME_SETTINGS, SETTING_NAMES,
                                        WATCHDOG_SETTINGS, default_settings, setting_problem, watchdog_problem)
from linz_ros.errors import ArtifactError, ConfigError, PlantFileError
from linz_ros.model import plant_from_text
from linz_ros.runtime import WatchdogConfig

PACKAGE = Path(__file__).resolve().parents[1] / "linz_ros"


def test_every_row_is_complete_and_names_are_unique():
    assert len(SETTING_NAMES) == len(set(SETTING_NAMES))
    for row in WATCHDOG_SETTINGS:
        assert row.help and row.unit and row.shape in ("scalar", "per_input", "per_output", "choice", "safe_command")
        assert row.default is not None or row.default_rule or row.none_means, row.name
        if row.shape == "choice":
            assert row.default in row.choices


@pytest.mark.parametrize("name, value, problem", [
    ("sigma_warn", -1.0, "expected a number >= 0, got -1"),
    ("damping", 0.0, "expected a number > 0, got 0"),
    ("stale_after", 2 * MAX_WATCHDOG_SECONDS, "expected at most 3600 s, got 7200"),
    ("hold_time", 0.0, None),                        # one rule everywhere: zero hold is allowed
    ("integral_limit", None, None),
    ("integral_limit", math.inf, None),
    ("rate_limits", [1.0, None], None),
    ("rate_limits", [1.0, 0.0], "entry 1: expected a number > 0, got 0"),
    ("envelope_margin", 11.0, "expected at most 10, got 11"),
    ("envelope_action", "halt", "expected one of warn, stop, safe, got 'halt'"),
    ("divergence_action", "stop", "expected one of warn, safe, got 'stop'"),
    ("divergence_time", float("nan"), "expected a number, got nan"),
    ("safe_command", {"kind": "fixed", "value": [0.0]}, "a fixed safe command needs 2 value(s), one per input"),
    ("sigma_wran", 1.0, "unknown watchdog setting"),
])
def test_one_check_for_each_setting(name, value, problem):
    found = setting_problem(name, value, inputs=2, outputs=2)
    if problem is None:
        assert found is None
    else:
        assert found is not None and found.startswith(problem)


def test_the_levels_keep_their_order():
    assert watchdog_problem({"sigma_warn": 1.0, "sigma_act": 0.5, "sigma_stop": 0.1}) is None
    assert watchdog_problem({"sigma_warn": 1.0, "sigma_stop": 2.0})[0] == "sigma_stop"


def test_defaults_fill_every_artifact_setting():
    values = default_settings(2.0, 100.0, inputs=2, outputs=2)
    assert {row.name for row in WATCHDOG_SETTINGS if row.artifact} <= set(values)
    assert (values["sigma_warn"], values["sigma_act"], values["sigma_stop"]) == (0.5, 0.2, 0.04)
    assert values["stale_after"] == 0.1 and watchdog_problem(values, 2, 2) is None


@pytest.mark.parametrize("text, field", [
    ("hold_time: 0", None),
    ("hold_time: -1", "design.watchdog.hold_time"),
    ("envelope_action: halt", "design.watchdog.envelope_action"),
    ("divergence_time: 0", "design.watchdog.divergence_time"),
])
def test_the_plant_file_the_artifact_and_the_core_agree(text, field):
    # the same value is accepted, or refused with the same words, by the plant file and the core
    source = MINIMAL + "outputs: {y: x1}\ndesign: {watchdog: {" + text + "}}\n"
    name, _, raw = text.partition(": ")
    if field is None:
        plant = plant_from_text(source)
        artifact = built_artifact(source)
        assert artifact.watchdog[name] == float(raw)
        WatchdogConfig.from_artifact(artifact)
        return
    with pytest.raises(PlantFileError, match=field) as refused:
        plant_from_text(source)
    value = raw if name.endswith("action") else float(raw)
    arm = built_artifact(BUNDLED / "pick_arm.yaml")
    with pytest.raises(ConfigError) as core:
        WatchdogConfig.from_artifact(arm, **{name: value})
    assert core.value.problem in str(refused.value)


def test_the_artifact_check_uses_the_table():
    from linz_ros.artifact import artifact_from_text, seal
    arm = built_artifact(BUNDLED / "pick_arm.yaml")
    document = dict(arm.document, watchdog=dict(arm.document["watchdog"], divergence_time=-2.0))
    with pytest.raises(ArtifactError, match="watchdog.divergence_time: expected a number > 0, got -2"):
        artifact_from_text(seal(document))
    for key in ("rate_limits", "envelope_margin", "safe_command"):      # found by the sealed-edit fuzzer
        document = dict(arm.document, watchdog=dict(arm.document["watchdog"], **{key: None}))
        with pytest.raises(ArtifactError, match=f"watchdog.{key}"):
            artifact_from_text(seal(document))
    older = dict(arm.document, watchdog={k: v for k, v in arm.document["watchdog"].items()
                                         if k not in ("envelope_margin", "divergence_error", "hold_time")})
    config = WatchdogConfig.from_artifact(artifact_from_text(seal(older)))     # older artifacts: the defaults
    assert config.envelope_margin == 0.1 and config.divergence_error == (math.inf, math.inf)


def test_the_table_is_the_only_home_of_the_settings_rules():
    # no module but the table spells out the level ordering or the watchdog key list
    offenders = []
    for path in PACKAGE.rglob("*.py"):
        if path.name == "watchdog.py":
            continue
        text = path.read_text()
        for needle in ("sigma_warn >= sigma_act >= sigma_stop\")", "_WATCHDOG_KEYS", "WATCHDOG_FRACTIONS",
                       "\"hold_time\", \"integral_limit\""):
            if needle in text:
                offenders.append(f"{path.relative_to(PACKAGE)}: {needle}")
    assert not offenders


def test_runtime_and_plant_file_sets_follow_the_table():
    assert "future_tolerance" not in PLANT_FILE_SETTINGS and "safe_command" not in RUNTIME_SETTINGS
    assert {"envelope_action", "divergence_error", "sigma_warn"} <= set(RUNTIME_SETTINGS)
