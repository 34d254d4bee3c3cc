"""Planned trajectories: the checks of a received one, and the quintic Hermite sampling against polynomials
worked out by hand."""

import math

import numpy as np
import pytest

from linz_ros.errors import ConfigError
from linz_ros.runtime.trajectory import Trajectory, TrajectoryPoints, check_points, quintic_coefficients


def _points(names, times, positions, velocities=None, accelerations=None):
    empty = [[] for _ in times]
    return TrajectoryPoints(list(names), list(times), [list(p) for p in positions],
                            [list(v) for v in velocities] if velocities is not None else empty,
                            [list(a) for a in accelerations] if accelerations is not None else empty)


def _poly(c, t, d=0):
    """d-th derivative of sum c_i t^i at t, written out."""
    return sum(c[i] * math.prod(range(i - d + 1, i + 1)) * t ** (i - d) for i in range(d, len(c)))


def test_the_rest_to_rest_segment_is_the_smoothstep_scaled_to_its_length():
    # p(t) = 10 s^3 - 15 s^4 + 6 s^5 with s = t / 2, from 0 to 1 over 2 s, at rest at both ends
    trajectory = Trajectory(check_points(_points(["a"], [0.0, 2.0], [[0.0], [1.0]]), ["a"]))
    for t in (0.0, 0.3, 1.0, 1.7, 2.0):
        s = t / 2
        expected = [10 * s**3 - 15 * s**4 + 6 * s**5, (30 * s**2 - 60 * s**3 + 30 * s**4) / 2,
                    (60 * s - 180 * s**2 + 120 * s**3) / 4, (60 - 360 * s + 360 * s**2) / 8,
                    (-360 + 720 * s) / 16]
        if t < 2.0:
            assert trajectory.sample(t, [4]) == pytest.approx(expected, abs=1e-12)
    assert quintic_coefficients(2.0, 0, 0, 0, 1, 0, 0) == pytest.approx([0, 0, 0, 10 / 8, -15 / 16, 6 / 32])


def test_a_quintic_given_by_its_knots_is_reproduced_with_every_derivative_and_none_above_the_fifth():
    # y = 1 + 2t - t^2 + 0.5t^3 - 0.25t^4 + 0.1t^5: the quintic through p, v, a at two knots is unique
    c = [1.0, 2.0, -1.0, 0.5, -0.25, 0.1]
    times = [0.0, 0.7, 1.5, 2.25]
    knots = check_points(_points(["y"], times, [[_poly(c, t)] for t in times], [[_poly(c, t, 1)] for t in times],
                                 [[_poly(c, t, 2)] for t in times]), ["y"])
    trajectory = Trajectory(knots)
    for t in np.linspace(0.0, 2.2, 23):
        assert trajectory.sample(t, [6]) == pytest.approx([_poly(c, t, d) for d in range(6)] + [0.0],
                                                           rel=1e-9, abs=1e-9)


def test_missing_velocities_and_accelerations_are_zero_at_the_ends_and_central_differences_inside():
    knots = check_points(_points(["a"], [0.0, 1.0, 3.0], [[0.0], [1.0], [5.0]]), ["a"])
    trajectory = Trajectory(knots)
    # v = 0, (5 - 0) / 3, 0; a = 0, (0 - 0) / 3, 0
    assert trajectory.velocities[:, 0] == pytest.approx([0.0, 5 / 3, 0.0])
    assert trajectory.accelerations[:, 0] == pytest.approx([0.0, 0.0, 0.0])
    c = quintic_coefficients(1.0, 0.0, 0.0, 0.0, 1.0, 5 / 3, 0.0)
    # hand: c3 = 10 - 4 (5/3) = 10/3, c4 = -15 + 7 (5/3) = -10/3, c5 = 6 - 3 (5/3) = 1
    assert c == pytest.approx([0, 0, 0, 10 / 3, -10 / 3, 1.0])
    assert trajectory.sample(0.4, [2]) == pytest.approx([_poly(c, 0.4, d) for d in range(3)])


def test_held_at_the_first_point_before_it_and_at_the_last_after_the_end():
    knots = check_points(_points(["a", "b"], [0.5, 1.0], [[1.0, 2.0], [3.0, 4.0]], [[0.0, 0.0], [1.0, 1.0]]),
                         ["b", "a"])
    trajectory = Trajectory(knots)
    assert trajectory.sample(0.2, [2, 1]) == [2.0, 0.0, 0.0, 1.0, 0.0]
    assert trajectory.sample(7.0, [2, 1]) == [4.0, 0.0, 0.0, 3.0, 0.0]      # its last position, at rest
    assert trajectory.duration == 1.0


def test_a_later_first_point_is_reached_from_the_start_given():
    knots = check_points(_points(["a"], [2.0], [[1.0]]), ["a"])
    trajectory = Trajectory(knots, start=([0.2], [0.1], [0.0]))
    assert trajectory.sample(0.0, [2]) == pytest.approx([0.2, 0.1, 0.0])
    c = quintic_coefficients(2.0, 0.2, 0.1, 0.0, 1.0, 0.0, 0.0)
    assert trajectory.sample(1.3, [2]) == pytest.approx([_poly(c, 1.3, d) for d in range(3)])
    assert trajectory.sample(2.5, [2]) == [1.0, 0.0, 0.0]


def test_a_degree_four_chain_sees_jerk_and_snap_that_jump_at_a_knot():
    knots = check_points(_points(["a"], [0.0, 1.0, 3.0], [[0.0], [1.0], [0.5]]), ["a"])
    trajectory = Trajectory(knots)
    before, after = trajectory.sample(1.0 - 1e-9, [4]), trajectory.sample(1.0, [4])
    assert before[:3] == pytest.approx(after[:3], abs=1e-6)                  # position, velocity, acceleration
    assert abs(before[3] - after[3]) > 1.0 and abs(before[4] - after[4]) > 1.0


@pytest.mark.parametrize("points, words", [
    (_points(["a", "x"], [0.0], [[0.0, 0.0]]), "joint_names 'x' are not among the expected names"),
    (_points([], [0.0], [[]]), "joint_names lack 'a', 'b'"),
    (_points(["a", "a"], [0.0], [[0.0, 0.0]]), "a name appears twice"),
    (_points(["a", "b"], [], []), "no points"),
    (_points(["a", "b"], [0.0, 1.0, 1.0], [[0, 0], [1, 1], [2, 2]]),
     "time_from_start must increase from point to point: point 2 at 1 s follows 1 s"),
    (_points(["a", "b"], [-0.5, 1.0], [[0, 0], [1, 1]]), "time_from_start of point 0 is negative"),
    (_points(["a", "b"], [0.0, 1e-300, 1.0], [[0, 0], [1, 1], [2, 2]]),
     "points 0 and 1 are 1e-300 s apart: at least 0.001 s"),
    (_points(["a", "b"], [0.0, 1.0, 1.0009], [[0, 0], [1, 1], [2, 2]]),
     "points 1 and 2 are 0.0009 s apart: at least 0.001 s"),
    (_points(["a", "b"], [0.0, math.nan], [[0, 0], [1, 1]]), "a time_from_start is not finite"),
    (_points(["a", "b"], [0.0, 1.0], [[0, 0], [1, math.nan]]), "point 1 has positions that are not finite"),
    (_points(["a", "b"], [0.0, 1.0], [[0, 0], [1]]), "point 1 has 1 positions for 2 joint_names"),
    (_points(["a", "b"], [0.0, 1.0], [[0, 0], [1, 1]], [[0, 0], [0, 0, 0]]), "point 1 has 3 velocities"),
    (_points(["a", "b"], [0.0, 1.0], [[0, 0], [1, 1]], [[0, 0], []]), "velocities are given for some points"),
    (_points(["a", "b"], [0.0, 1.0], [[0, 0], [1, 1]], None, [[0, math.inf], [0, 0]]),
     "point 0 has accelerations that are not finite"),
])
def test_a_trajectory_that_does_not_fit_is_refused_in_one_line(points, words):
    with pytest.raises(ConfigError, match="^'?trajectory'?: " + words.replace("(", r"\(")) as err:
        check_points(points, ["a", "b"])
    assert "\n" not in str(err.value)


def test_taken_up_late_the_points_already_over_are_dropped_and_the_move_goes_on_from_the_start_given():
    knots = check_points(_points(["a"], [0.5, 1.0, 2.0], [[1.0], [2.0], [3.0]], [[0.0], [0.0], [0.0]]), ["a"])
    trajectory = Trajectory(knots, start=([0.7], [0.3], [0.1]), start_time=0.8)
    assert trajectory.times.tolist() == [0.8, 1.0, 2.0]
    assert trajectory.sample(0.8, [2]) == pytest.approx([0.7, 0.3, 0.1])          # no jump where it is taken up
    # accelerations not given: at the 1.0 s point (v[2] - v[start]) / (2.0 - 0.8) = (0 - 0.3) / 1.2
    c = quintic_coefficients(0.2, 0.7, 0.3, 0.1, 2.0, 0.0, -0.25)
    assert trajectory.sample(0.9, [2]) == pytest.approx([_poly(c, 0.1, d) for d in range(3)])
    # taken up after its last point (it ended while waiting): that point is held
    assert Trajectory(knots, start=([0.7], [0.3], [0.1]), start_time=2.5).sample(2.6, [1]) == [3.0, 0.0]
