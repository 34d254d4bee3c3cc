"""The controller's reference source without ROS: topic messages carried forward, held, or a built-in move."""

import math

import pytest

from support import BUNDLED, built_artifact
from linz_ros.errors import ConfigError
from linz_ros.runtime import ControllerCore
from linz_ros.runtime.reference_source import TOPIC, ReferenceSource

X = [0.4, 1.2, 0.0, 0.0]
OUTPUTS = ["tool_x", "tool_y"]


@pytest.fixture(scope="module")
def core():
    return ControllerCore(built_artifact(BUNDLED / "pick_arm.yaml"))


@pytest.mark.parametrize("extrapolate", [True, False])
def test_a_topic_reference_is_carried_forward_along_its_derivatives_until_the_next(core, extrapolate):
    source = ReferenceSource(core, TOPIC, 0.5, OUTPUTS, extrapolate)
    # tool_x on a parabola x = 0.1 + 0.2 t + 0.5 t^2 sampled at t = 0; tool_y still
    assert source.accept([0.1, 0.2, 1.0, 0.3, 0.0, 0.0], now=9.98)
    assert source.sample(X, now=9.99)[0] == 0.1                         # one message: no interval to go by
    assert source.accept([0.1, 0.2, 1.0, 0.3, 0.0, 0.0], now=10.0)      # messages 20 ms apart
    ref = source.sample(X, now=10.01)
    expected = [0.1 + 0.2 * 0.01 + 0.5 * 0.01 ** 2, 0.2 + 0.01, 1.0, 0.3, 0.0, 0.0] if extrapolate else \
        [0.1, 0.2, 1.0, 0.3, 0.0, 0.0]
    assert ref == pytest.approx(expected, abs=1e-15)
    assert source.sample(X, now=10.0) == [0.1, 0.2, 1.0, 0.3, 0.0, 0.0]
    # a stalled reference is carried one interval (20 ms) at most, then stays there until the timeout
    at_interval = source.sample(X, now=10.02)
    assert source.sample(X, now=10.3) == at_interval and not source.stale
    assert at_interval[0] == pytest.approx(0.1 + 0.2 * 0.02 + 0.5 * 0.02 ** 2 if extrapolate else 0.1, abs=1e-15)
    held = source.sample(X, now=10.6)                                   # past the timeout: held, not extrapolated
    assert source.stale and held == core.hold_reference(X)
    assert source.sample([0.0, 0.5, 0.0, 0.0], now=10.7) == held        # latched where it stopped


def test_bunched_reference_messages_do_not_cut_the_extrapolation_short(core):
    source = ReferenceSource(core, TOPIC, 0.5, OUTPUTS, True)
    ramp = [0.0, 1.0, 0.0, 0.0, 0.0, 0.0]                               # tool_x at 1 m/s
    for k in range(6):                                                  # 100 Hz
        assert source.accept(ramp, now=1.0 + 0.01 * k)
    assert source.accept(ramp, now=1.0601)                              # one came late and the next at once
    # carried 10 ms (the typical interval), not the 0.1 ms since the one before
    assert source.sample(X, now=1.08)[0] == pytest.approx(0.01, abs=1e-12)


@pytest.mark.parametrize("values", [[0.0] * 5, [0.0] * 7, [0.0, 0.0, math.nan, 0.0, 0.0, 0.0],
                                    [math.inf, 0.0, 0.0, 0.0, 0.0, 0.0]])
def test_a_topic_message_of_the_wrong_size_or_not_finite_is_refused_and_not_kept(core, values):
    source = ReferenceSource(core, TOPIC, 0.5, OUTPUTS)
    assert not source.accept(values, now=1.0)
    assert source.latest is None
    assert source.sample(X, now=1.0) == core.hold_reference(X) and source.stale


def test_a_bad_built_in_spec_is_refused_at_once(core):
    with pytest.raises(ConfigError, match="unknown kind 'ramp'"):
        ReferenceSource(core, "ramp:tool_x=1", 0.5, OUTPUTS)


def test_a_built_in_move_starts_at_the_first_state_and_counts_from_the_restart(core):
    source = ReferenceSource(core, "step:tool_x=0.05,at=1", 0.5, OUTPUTS)
    source.restart(100.0)
    start = core.output_values(X)
    before = source.sample(X, now=100.5)
    assert before[0] == pytest.approx(start[0]) and before[3] == pytest.approx(start[1])
    after = source.sample([0.0, 0.5, 0.0, 0.0], now=101.5)            # the base stays the first state's
    assert after[0] == pytest.approx(start[0] + 0.05) and after[3] == pytest.approx(start[1])


def test_in_simulated_time_the_origin_waits_for_the_first_clock_reading(core):
    source = ReferenceSource(core, "step:tool_x=0.05,at=1", 0.5, OUTPUTS)
    source.restart(0.0)                                                # no /clock yet
    assert source.origin is None
    source.sample(X, now=0.0)
    assert source.origin is None
    source.sample(X, now=20.0)
    assert source.origin == 20.0
    assert source.sample(X, now=20.5)[0] == pytest.approx(core.output_values(X)[0])


def test_a_built_in_move_waits_for_a_state_the_core_accepts(core):
    source = ReferenceSource(core, "hold", 0.5, OUTPUTS)
    source.restart(1.0)
    assert all(math.isnan(v) for v in source.sample([math.nan] * 4, now=1.0))
    assert source.generator is None
    assert source.sample(X, now=1.1)[0] == pytest.approx(core.output_values(X)[0])


def test_a_clock_jump_moves_the_ages_and_the_origin(core):
    source = ReferenceSource(core, TOPIC, 0.5, OUTPUTS)
    source.accept([0.1, 0.0, 0.0, 0.3, 0.0, 0.0], now=10.0)
    source.restart(9.0)
    source.shift(-5.0)
    assert source.latest_at == 5.0 and source.origin == 4.0
    assert source.sample(X, now=5.1)[0] == 0.1 and not source.stale
    source.restart(0.0)
    source.shift(-1.0)                                                 # an origin not yet taken stays so
    assert source.origin is None
