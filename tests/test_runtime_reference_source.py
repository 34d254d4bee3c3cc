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


def _trajectory(names, times, positions, velocities=None):
    from linz_ros.runtime.trajectory import TrajectoryPoints
    empty = [[] for _ in times]
    return TrajectoryPoints(names, times, positions, velocities or empty, list(empty))


def test_a_trajectory_reference_holds_until_one_comes_then_follows_it_from_where_the_outputs_were(core):
    from linz_ros.runtime.reference_source import TRAJECTORY
    from linz_ros.runtime.trajectory import quintic_coefficients
    source = ReferenceSource(core, TRAJECTORY, 0.5, OUTPUTS, trajectory_names=["x", "y"])
    held = core.hold_reference(X)
    assert source.sample(X, now=1.0) == held and not source.stale          # nothing planned: held, not stale
    x0, y0 = held[0], held[3]
    # one point 2 s after its stamp (1.5 s), names in another order than the outputs
    assert source.accept_trajectory(_trajectory(["y", "x"], [2.0], [[y0 + 0.1, x0 - 0.2]]), 1.5, now=1.6) is None
    assert source.sample(X, now=1.6) == pytest.approx(held)                # from where the outputs were, at rest
    # the move starts when it is taken (0.1 s after the stamp) and still ends at the stamp + 2 s
    c = quintic_coefficients(1.9, x0, 0.0, 0.0, x0 - 0.2, 0.0, 0.0)
    assert source.sample(X, now=2.5)[:3] == pytest.approx([sum(c[i] * 0.9 ** i for i in range(6)),
                                                          sum(i * c[i] * 0.9 ** (i - 1) for i in range(1, 6)),
                                                          sum(i * (i - 1) * c[i] * 0.9 ** (i - 2)
                                                              for i in range(2, 6))])
    assert source.sample(X, now=9.0) == pytest.approx([x0 - 0.2, 0.0, 0.0, y0 + 0.1, 0.0, 0.0])   # held at its end


def test_a_new_trajectory_starts_from_the_one_followed_so_far_and_bad_ones_are_counted(core):
    from linz_ros.runtime.reference_source import TRAJECTORY
    source = ReferenceSource(core, TRAJECTORY, 0.5, OUTPUTS)
    source.sample(X, now=0.0)
    assert source.accept_trajectory(_trajectory(OUTPUTS, [0.0, 1.0], [[0.0, 0.0], [1.0, 1.0]]), None, 0.0) is None
    mid = source.sample(X, now=0.5)
    assert source.accept_trajectory(_trajectory(OUTPUTS, [1.0], [[2.0, 2.0]]), None, now=0.5) is None
    assert source.sample(X, now=0.5) == pytest.approx(mid)                  # continuous up to the acceleration
    refusal = source.accept_trajectory(_trajectory(["tool_x", "elbow"], [1.0], [[0.0, 0.0]]), None, 0.6)
    assert refusal.startswith("trajectory: joint_names 'elbow' are not among") and source.refused == 1
    assert source.accept_trajectory(_trajectory(OUTPUTS, [1.0, 0.5], [[0.0, 0.0]] * 2), None, 0.6) is not None
    assert source.refused == 2
    assert source.sample(X, now=1.5) == pytest.approx([2.0, 0.0, 0.0, 2.0, 0.0, 0.0])   # the good one goes on


def test_trajectory_names_must_be_one_per_output(core):
    from linz_ros.runtime.reference_source import TRAJECTORY
    with pytest.raises(ConfigError, match="reference_joints: expected 2 names, one per output"):
        ReferenceSource(core, TRAJECTORY, 0.5, OUTPUTS, trajectory_names=["a"])


PERIOD = 0.002


def _moving(core):
    """A trajectory source moving tool_x by 1 m over 10 s from where it was held, sampled up to 1.0 s;
    and where tool_x was held."""
    from linz_ros.runtime.reference_source import TRAJECTORY
    source = ReferenceSource(core, TRAJECTORY, 0.5, OUTPUTS)
    x0, y0 = source.sample(X, now=0.0)[0:4:3]
    ramp = _trajectory(OUTPUTS, [0.0, 10.0], [[x0, y0], [x0 + 1.0, y0]], [[0.0, 0.0], [0.1, 0.0]])
    assert source.accept_trajectory(ramp, 0.0, now=0.0) is None
    for k in range(501):
        source.sample(X, now=k * PERIOD)
    return source, x0


def test_a_trajectory_stamped_in_the_past_is_joined_where_the_reference_is_without_a_jump(core):
    source, x0 = _moving(core)
    before = source.sample(X, now=1.0)
    # stamped 0.8 s ago: its first 0.8 s are over; the reference goes on from where it is
    move = _trajectory(OUTPUTS, [0.5, 2.0], [[x0 + 0.2, 0.0], [x0 + 0.5, 0.0]])
    assert source.accept_trajectory(move, 0.2, now=1.0) is None
    previous = before
    for k in range(1, 700):
        ref = source.sample(X, now=1.0 + k * PERIOD)
        # at most what 2 ms of a move of under 1 m/s (and 100 m/s^2) covers
        assert abs(ref[0] - previous[0]) < 2e-3 and abs(ref[1] - previous[1]) < 0.2, k
        previous = ref
    assert source.sample(X, now=2.2 + PERIOD) == pytest.approx([x0 + 0.5, 0.0, 0.0, 0.0, 0.0, 0.0])   # on time


def test_a_trajectory_stamped_in_the_future_waits_for_its_stamp_while_the_current_one_goes_on(core):
    source, x0 = _moving(core)
    twin, _ = _moving(core)                          # the same without the new trajectory
    assert source.accept_trajectory(_trajectory(OUTPUTS, [1.0], [[x0 + 0.5, 0.0]]), 1.5, now=1.0) is None
    for now in (1.0 + PERIOD, 1.2, 1.5 - PERIOD):
        ref = source.sample(X, now=now)
        assert ref == pytest.approx(twin.sample(X, now=now)) and ref[1] > 0.01    # the first one goes on
    assert source.sample(X, now=1.5) == pytest.approx(twin.sample(X, now=1.5))    # joined at the stamp
    assert source.sample(X, now=2.5)[:2] == pytest.approx([x0 + 0.5, 0.0])        # then the new one


def test_a_trajectory_that_has_ended_before_it_came_is_refused_and_counted(core):
    source, x0 = _moving(core)
    twin, _ = _moving(core)
    refusal = source.accept_trajectory(_trajectory(OUTPUTS, [0.2, 0.5], [[0.3, 0.0], [0.4, 0.0]]), 0.2, now=1.0)
    assert refusal == ("trajectory: every point is in the past: the last is 0.5 s after the stamp, "
                       "which was 0.8 s ago")
    assert source.refused == 1
    assert source.sample(X, now=1.0 + PERIOD) == pytest.approx(twin.sample(X, now=1.0 + PERIOD))


def test_a_trajectory_without_a_stamp_is_never_in_the_past(core):
    source, x0 = _moving(core)
    assert source.accept_trajectory(_trajectory(OUTPUTS, [0.0], [[x0, 0.0]]), None, now=1.0) is None
    assert source.refused == 0
