"""The campaign section and the cases drawn from it."""

from __future__ import annotations

import numpy as np
import pytest

from linz_ros.artifact import load_artifact
from linz_ros.campaign.spec import case_seed, draw_cases, factor_matrix, read_campaign, sobol_points
from linz_ros.errors import ConfigError
from support import BUNDLED, built_artifact_file


@pytest.fixture(scope="module")
def arm(tmp_path_factory):
    return load_artifact(built_artifact_file(BUNDLED / "pick_arm.yaml", tmp_path_factory.mktemp("arm")))


def test_without_a_section_the_initial_states_span_the_envelope(arm):
    spec = read_campaign(None, arm, "here")
    assert [(f.kind, f.name, f.low, f.high, f.unit) for f in spec.factors] == [
        ("initial", "q1", -0.6, 1.8, "rad"), ("initial", "q2", 0.15, 2.6, "rad"),
        ("initial", "w1", -2.0, 2.0, "rad/s"), ("initial", "w2", -2.0, 2.0, "rad/s")]
    assert spec.region == ("q1", "q2") and spec.success == ("tracked",) and spec.references == ()


def test_a_section_reads_ranges_in_state_and_parameter_order(arm):
    spec = read_campaign({"runs": 64, "seed": 3, "duration": 2.5, "initial": {"q2": [0.5, 1.5], "q1": 0.4},
                          "mismatch": {"m2": [-30, 30], "l1": 5}, "delay": [0, 0.004], "noise": {"q1": 1e-4},
                          "references": ["hold", "step:tool_x=0.01,at=0.2"], "region": ["q2", "q1"],
                          "success": ["tracked", "not_settled"], "watchdog": {"envelope_action": "warn"}},
                         arm, "c.yaml")
    assert [f.label for f in spec.factors] == ["q1 (initial, rad)", "q2 (initial, rad)", "l1 (mismatch, %)",
                                               "m2 (mismatch, %)", "delay (s)"]
    assert spec.noise == ("q1=0.0001",) and spec.watchdog == ("envelope_action=warn",)
    # YAML 1.1 reads 1e-5 (no dot) as text: taken as the number it reads as
    assert read_campaign({"noise": {"q1": "1e-5"}, "delay": ["0", "2e-3"]}, arm, "c").noise == ("q1=1e-05",)
    cases = draw_cases(spec)
    values = factor_matrix(spec, cases)
    assert np.all(values[:, 0] == 0.4) and np.all(values[:, 2] == 5.0)     # one number: held there
    assert values[:, 1].min() >= 0.5 and values[:, 1].max() <= 1.5
    assert [c.reference for c in cases[:3]] == ["hold", "step:tool_x=0.01,at=0.2", "hold"]
    assert cases[1].delay(spec) == values[1, 4]


def test_sobol_points_are_stratified_in_every_dimension_and_a_prefix_of_a_longer_campaign():
    """Scrambled Sobol: 2^m points put one point in each of the 2^m equal bins of every coordinate
    (a (0, m, 1)-net in each one-dimensional projection; scipy.stats.qmc.Sobol, Owen scrambling)."""
    points = sobol_points(3, 16, seed=11)
    for d in range(3):
        assert sorted(np.floor(points[:, d] * 16).astype(int)) == list(range(16))
    assert np.array_equal(sobol_points(3, 10, seed=11), points[:10])
    assert not np.array_equal(sobol_points(3, 16, seed=12), points)


def test_cases_are_the_same_whatever_the_number_of_runs(arm):
    short = draw_cases(read_campaign({"runs": 5, "seed": 9}, arm, "x"))
    long = draw_cases(read_campaign({"runs": 40, "seed": 9}, arm, "x"))
    assert long[:5] == short
    assert len({c.seed for c in long}) == 40 and long[3].seed == case_seed(9, 3)


@pytest.mark.parametrize("section, match", [
    ({"runz": 3}, r"here: campaign.runz: unknown key; expected one of runs, seed"),
    ({"runs": 0}, r"campaign.runs: expected a whole number from 1 to 100,000, got 0"),
    ({"runs": 2.5}, r"campaign.runs: expected a whole number"),
    ({"duration": -1}, r"campaign.duration: expected a positive number of seconds"),
    ({"initial": {"q9": [0, 1]}}, r"campaign.initial.q9: not a state of pick_arm"),
    ({"initial": {"q1": [1, 0]}}, r"campaign.initial.q1: low 1 is above high 0"),
    ({"initial": {"q1": ["a", 1]}}, r"campaign.initial.q1: expected a finite number, got 'a'"),
    ({"initial": {"q1": [0, float("nan")]}}, r"campaign.initial.q1: expected a finite number"),
    ({"mismatch": {"m2": [-100, 10]}}, r"campaign.mismatch.m2: -100 %: a change of -100 % or less"),
    ({"mismatch": {"mass": [0, 10]}}, r"campaign.mismatch.mass: not a parameter of pick_arm \(l1, l2"),
    ({"delay": [-0.1, 0]}, r"campaign.delay: expected seconds >= 0"),
    ({"region": ["q1"]}, r"campaign.region: expected two different states"),
    ({"region": ["q1", "x"]}, r"campaign.region: 'x' is not a state|campaign.region: x is not a state"),
    ({"success": ["fine"]}, r"campaign.success: fine is not a run verdict"),
    ({"references": [""]}, r"campaign.references: expected a text or a list of non-empty texts"),
    ([1, 2], r"here: campaign: expected a mapping"),
])
def test_mistakes_in_the_section_are_one_line_naming_the_key(arm, section, match):
    with pytest.raises(ConfigError, match=match):
        read_campaign(section, arm, "here")
