"""A planned trajectory of the outputs, sampled with its derivatives: piecewise quintic Hermite.

What a ``trajectory_msgs/msg/JointTrajectory`` carries, without ROS (the controller node
converts the message into :class:`TrajectoryPoints`): names, and points with a time from the
start, positions and optionally velocities and accelerations. :func:`check_points` refuses a
trajectory that does not fit the outputs (one line) and puts the points in the outputs'
order; :class:`Trajectory` joins consecutive knots by the one quintic that matches position,
velocity and acceleration at both ends, so the reference is continuous up to its second
derivative; its third to fifth derivatives are those of the quintic (the jerk and snap that a
chain of relative degree 4, an elastic joint, follows jump at the knots), higher ones are zero.

Points closer than :data:`MIN_INTERVAL` are refused: a segment's k-th derivative grows as
1 / length^k, and points a hair apart would give references out of all proportion (or not finite).

Missing derivatives (given for no point): velocities are zero at the first and last knot and
the central difference ``(p[k+1] - p[k-1]) / (t[k+1] - t[k-1])`` inside (Catmull-Rom);
accelerations likewise from the velocities. Before its first knot the trajectory is held at
that knot's position, after its last knot at the last position, derivatives zero.
"""

from __future__ import annotations

import bisect
import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from linz_ros.errors import ConfigError

__all__ = ["TrajectoryPoints", "Knots", "Trajectory", "check_points", "check_not_over", "quintic_coefficients",
           "MAX_POINTS", "HIGHEST_DERIVATIVE", "MIN_INTERVAL"]

#: Most points a trajectory may carry (the sampler keeps six coefficients per output and segment).
MAX_POINTS = 100_000
#: Derivatives above this are zero (the segments are quintics).
HIGHEST_DERIVATIVE = 5
#: Shortest time between two points, seconds (a segment's fifth derivative grows as 1 / length^5); a
#: point taken up less than this after the start of the move is skipped.
MIN_INTERVAL = 1e-3
#: Named in every refusal.
_FIELD = "trajectory"


@dataclass(frozen=True)
class TrajectoryPoints:
    """A trajectory as received: names and points (a JointTrajectory's content).

    Attributes
    ----------
    names : list of str
        What each column is (``joint_names``).
    times : list of float
        Each point's time from the start, seconds.
    positions, velocities, accelerations : list of list of float
        Per point; a point's velocities or accelerations may be empty (not given).
    """

    names: list[str]
    times: list[float]
    positions: list[list[float]]
    velocities: list[list[float]]
    accelerations: list[list[float]]


@dataclass(frozen=True)
class Knots:
    """Checked points in the outputs' order: times (K,), positions (K, p), velocities and accelerations
    (K, p) or None when not given."""

    times: np.ndarray
    positions: np.ndarray
    velocities: np.ndarray | None
    accelerations: np.ndarray | None


def _refuse(problem: str) -> ConfigError:
    return ConfigError(_FIELD, problem)


def _listed(names: Sequence[str], most: int = 6) -> str:
    shown = ", ".join(repr(n) for n in names[:most])
    return shown + (f", ... ({len(names)} in all)" if len(names) > most else "")


def _column_order(names: Sequence[str], outputs: Sequence[str]) -> list[int]:
    """Where each output's column is among ``names``; refuses duplicates, unknown and missing names."""
    names = list(names)
    if len(set(names)) != len(names):
        raise _refuse("a name appears twice in joint_names")
    unknown = [n for n in names if n not in outputs]
    if unknown:
        raise _refuse(f"joint_names {_listed(unknown)} are not among the expected names ({_listed(list(outputs))})")
    missing = [o for o in outputs if o not in names]
    if missing:
        raise _refuse(f"joint_names lack {_listed(missing)}: a trajectory names every output")
    return [names.index(o) for o in outputs]


def _optional_block(rows: Sequence[Sequence[float]], width: int, what: str) -> np.ndarray | None:
    """Velocities or accelerations of every point, or None when no point gives them."""
    given = [len(row) > 0 for row in rows]
    if not any(given):
        return None
    if not all(given):
        raise _refuse(f"{what} are given for some points only: give them for every point or for none")
    return _block(rows, width, what)


def _block(rows: Sequence[Sequence[float]], width: int, what: str) -> np.ndarray:
    for k, row in enumerate(rows):
        if len(row) != width:
            raise _refuse(f"point {k} has {len(row)} {what} for {width} joint_names")
    values = np.array(rows, dtype=float).reshape(len(rows), width)
    if not np.all(np.isfinite(values)):
        k = int(np.flatnonzero(~np.isfinite(values).all(axis=1))[0])
        raise _refuse(f"point {k} has {what} that are not finite")
    return values


def check_points(points: TrajectoryPoints, outputs: Sequence[str]) -> Knots:
    """A received trajectory, checked and in the outputs' order.

    Parameters
    ----------
    points : TrajectoryPoints
    outputs : sequence of str
        The name each output goes by in ``points.names``, in the outputs' order.

    Returns
    -------
    Knots

    Raises
    ------
    ConfigError
        Named ``trajectory``, one line: no points, too many, unknown, missing or repeated
        names, rows of the wrong length, values or times not finite, times negative or not
        increasing or closer than :data:`MIN_INTERVAL`, derivatives given for some points only.
    """
    count = len(points.times)
    if count == 0:
        raise _refuse("no points")
    if count > MAX_POINTS:
        raise _refuse(f"{count} points; at most {MAX_POINTS} are taken")
    if not (len(points.positions) == len(points.velocities) == len(points.accelerations) == count):
        raise _refuse("the points' times, positions, velocities and accelerations differ in number")
    order = _column_order(points.names, outputs)
    width = len(points.names)
    times = np.array(points.times, dtype=float)
    if not np.all(np.isfinite(times)):
        raise _refuse("a time_from_start is not finite")
    if times[0] < 0.0:
        raise _refuse(f"time_from_start of point 0 is negative ({times[0]:g} s)")
    steps = np.diff(times)
    if np.any(steps <= 0.0):
        k = int(np.flatnonzero(steps <= 0.0)[0]) + 1
        raise _refuse(f"time_from_start must increase from point to point: point {k} at {times[k]:g} s "
                      f"follows {times[k - 1]:g} s")
    if np.any(steps < MIN_INTERVAL):
        k = int(np.flatnonzero(steps < MIN_INTERVAL)[0]) + 1
        raise _refuse(f"points {k - 1} and {k} are {steps[k - 1]:g} s apart: at least {MIN_INTERVAL:g} s "
                      "is needed (the reference's derivatives grow as 1 / interval^5)")
    positions = _block(points.positions, width, "positions")[:, order]
    velocities = _optional_block(points.velocities, width, "velocities")
    accelerations = _optional_block(points.accelerations, width, "accelerations")
    return Knots(times, positions, None if velocities is None else velocities[:, order],
                 None if accelerations is None else accelerations[:, order])


def check_not_over(knots: Knots, elapsed: float) -> None:
    """Refuse a trajectory whose every point is over ``elapsed`` seconds after its stamp.

    Parameters
    ----------
    knots : Knots
    elapsed : float
        Seconds since the trajectory's time 0 (its stamp); at or below zero nothing is over.

    Raises
    ------
    ConfigError
        Named ``trajectory``, one line, when ``elapsed > 0`` and the last point's time is at most ``elapsed``.
    """
    last = float(knots.times[-1])
    if elapsed > 0.0 and last <= elapsed:
        raise _refuse(f"every point is in the past: the last is {last:g} s after the stamp, "
                      f"which was {elapsed:g} s ago")


def _central_differences(times: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Zero at the first and last knot, (v[k+1] - v[k-1]) / (t[k+1] - t[k-1]) inside (Catmull-Rom)."""
    out = np.zeros_like(values)
    if len(times) > 2:
        out[1:-1] = (values[2:] - values[:-2]) / (times[2:] - times[:-2])[:, None]
    return out


def quintic_coefficients(h: float, p0, v0, a0, p1, v1, a1) -> np.ndarray:
    """Coefficients c_0..c_5 (in powers of the time since the first knot) of the quintic on [0, h]
    with the given position, velocity and acceleration at both ends.

    Parameters
    ----------
    h : float
        Length of the segment (> 0).
    p0, v0, a0, p1, v1, a1 : float or numpy.ndarray
        Values at the start and the end (arrays: one quintic per entry).

    Returns
    -------
    numpy.ndarray
        Shape ``(6, *shape of p0)``.

    Examples
    --------
    >>> quintic_coefficients(1.0, 0.0, 0.0, 0.0, 1.0, 0.0, 0.0).tolist()     # 10 t^3 - 15 t^4 + 6 t^5
    [0.0, 0.0, 0.0, 10.0, -15.0, 6.0]
    """
    p0, v0, a0, p1, v1, a1 = (np.asarray(v, dtype=float) for v in (p0, v0, a0, p1, v1, a1))
    d = p1 - p0
    # in s = t / h: c3..c5 solve the three end conditions of the quintic Hermite basis
    s3 = 10.0 * d - (6.0 * v0 + 4.0 * v1) * h - (3.0 * a0 - a1) * h * h / 2.0
    s4 = -15.0 * d + (8.0 * v0 + 7.0 * v1) * h + (3.0 * a0 - 2.0 * a1) * h * h / 2.0
    s5 = 6.0 * d - 3.0 * (v0 + v1) * h - (a0 - a1) * h * h / 2.0
    return np.stack([p0, v0, a0 / 2.0, s3 / h ** 3, s4 / h ** 4, s5 / h ** 5])


def _derivative_table(coefficients: np.ndarray) -> np.ndarray:
    """(derivative d, power j, output): the coefficient of tau^j in the d-th derivative."""
    table = np.zeros((HIGHEST_DERIVATIVE + 1,) + coefficients.shape)
    for d in range(HIGHEST_DERIVATIVE + 1):
        for i in range(d, HIGHEST_DERIVATIVE + 1):
            table[d, i - d] = coefficients[i] * math.prod(range(i - d + 1, i + 1))
    return table


class Trajectory:
    """Checked knots joined by quintic Hermite segments, sampled with derivatives per chain.

    Parameters
    ----------
    knots : Knots
    start : tuple of three sequences of float, optional
        Position, velocity and acceleration of the outputs where the trajectory is taken up (at
        ``start_time``); a first knot in place of the points up to :data:`MIN_INTERVAL` after
        ``start_time`` (they are over; the move from the start to the next point is a quintic too).
        When no point is left it is dropped and the last point is held. Without it a first point
        after time 0 is held until its time.
    start_time : float
        Time of ``start`` from the trajectory's time 0 (its stamp), seconds.

    Examples
    --------
    >>> knots = check_points(TrajectoryPoints(["a"], [0.0, 1.0], [[0.0], [1.0]], [[], []], [[], []]), ["a"])
    >>> Trajectory(knots).sample(0.5, [2])         # the smoothstep 10 t^3 - 15 t^4 + 6 t^5 at t = 0.5
    [0.5, 1.875, 0.0]
    """

    def __init__(self, knots: Knots, start: tuple[Sequence[float], Sequence[float], Sequence[float]] | None = None,
                 start_time: float = 0.0) -> None:
        times, positions = knots.times, knots.positions
        velocities, accelerations = knots.velocities, knots.accelerations
        if start is not None:
            # the points the move is past (or too close to its start for a segment) are dropped
            ahead = times >= start_time + MIN_INTERVAL
            if not ahead.any():
                ahead[-1] = True           # nothing left to follow: its last point is held
                start = None
            times, positions = times[ahead], positions[ahead]
            velocities = None if velocities is None else velocities[ahead]
            accelerations = None if accelerations is None else accelerations[ahead]
        if start is not None:
            first = [np.asarray(v, dtype=float).reshape(1, -1) for v in start]
            times = np.r_[start_time, times]
            positions = np.vstack([first[0], positions])
            # derivatives the points do not give come from the rule over every knot, the start's included
            velocities = None if velocities is None else np.vstack([first[1], velocities])
            accelerations = None if accelerations is None else np.vstack([first[2], accelerations])
            given_v, given_a = first[1][0], first[2][0]
        else:
            given_v = given_a = None
        if velocities is None:
            velocities = _central_differences(times, positions)
            if given_v is not None:
                velocities[0] = given_v
        if accelerations is None:
            accelerations = _central_differences(times, velocities)
            if given_a is not None:
                accelerations[0] = given_a
        self.times = times
        self.positions = positions
        self.velocities = velocities
        self.accelerations = accelerations
        self._starts = times.tolist()
        self._tables = [_derivative_table(quintic_coefficients(
            times[k + 1] - times[k], positions[k], velocities[k], accelerations[k], positions[k + 1],
            velocities[k + 1], accelerations[k + 1])) for k in range(len(times) - 1)]

    @property
    def duration(self) -> float:
        """Time of the last knot from the start, seconds."""
        return float(self.times[-1])

    def derivatives(self, t: float) -> np.ndarray:
        """Position and its derivatives 1..5 of every output at time ``t`` from the start.

        Parameters
        ----------
        t : float

        Returns
        -------
        numpy.ndarray
            Shape ``(6, outputs)``: row d is the d-th derivative.
        """
        if len(self._tables) == 0 or not t >= self._starts[0]:      # one knot, or before the first: held
            return self._held(0)
        if t >= self._starts[-1]:
            return self._held(-1)
        k = bisect.bisect_right(self._starts, t) - 1
        tau = t - self._starts[k]
        powers = tau ** np.arange(HIGHEST_DERIVATIVE + 1)
        return np.tensordot(powers, self._tables[k], axes=(0, 1))

    def _held(self, knot: int) -> np.ndarray:
        out = np.zeros((HIGHEST_DERIVATIVE + 1, self.positions.shape[1]))
        out[0] = self.positions[knot]
        return out

    def sample(self, t: float, orders: Sequence[int]) -> list[float]:
        """The reference vector ``[y1, y1', ..., y1^(r1), y2, ...]`` at time ``t`` from the start.

        Parameters
        ----------
        t : float
        orders : sequence of int
            Relative degree of each chain, in the outputs' order; derivatives above the fifth are zero.

        Returns
        -------
        list of float
        """
        values = self.derivatives(t)
        return [float(values[d, i]) if d <= HIGHEST_DERIVATIVE else 0.0
                for i, r in enumerate(orders) for d in range(r + 1)]
