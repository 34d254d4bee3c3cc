"""Where the controller's reference comes from at each step: the reference topic or a built-in generator.

A topic reference (``[y1, y1', ..., y1^(r1), y2, ...]``) usually comes slower than the
control rate; between messages each chain is carried along its own Taylor polynomial
(:func:`~linz_ros.runtime.reference.extrapolate_reference`) for at most the typical
interval between messages, and once the latest message is older than the timeout the
outputs are held where they were. A built-in reference (a spec such as
``smooth:tool_x=0.05,duration=2``) starts from the outputs at the first good state. A
trajectory reference (:data:`TRAJECTORY`) follows the latest accepted planned trajectory
(:mod:`linz_ros.runtime.trajectory`) and holds its last point after its end; before the first one
the outputs are held where they are. A trajectory is taken up at its stamp (one stamped in the
future waits, the one followed so far goes on): the points already over are dropped and the
move goes on from the reference in force (position, velocity, acceleration), so the reference
never jumps; one that is entirely over when it comes is refused.
"""

from __future__ import annotations

import math
import statistics
from collections import deque
from typing import Sequence

from linz_ros.errors import ConfigError, LinzError
from linz_ros.runtime.closed_loop import initial_outputs
from linz_ros.runtime.core import ControllerCore
from linz_ros.runtime.reference import Reference, extrapolate_reference, parse_reference
from linz_ros.runtime.trajectory import Knots, Trajectory, TrajectoryPoints, check_not_over, check_points

__all__ = ["ReferenceSource", "TOPIC", "TRAJECTORY"]

#: The spec that means "from the reference topic".
TOPIC = "topic"
#: The spec that means "planned trajectories from the reference topic".
TRAJECTORY = "trajectory"
#: Intervals between topic messages whose median is the typical interval.
_INTERVALS = 9


class ReferenceSource:
    """The reference vector at time t: from the reference topic, or from a built-in generator.

    Parameters
    ----------
    core : ControllerCore
    spec : str
        :data:`TOPIC`, or a reference spec (checked here, so a bad one is refused at once).
    timeout : float
        Seconds after the latest topic message before the outputs are held.
    outputs : list of str
        Output names, for per-output amplitudes in a spec.
    extrapolate : bool
        Carry a topic reference forward along its derivatives between messages.
    trajectory_names : list of str, optional
        The name of each output in a trajectory's ``names`` (default: the outputs' own names).

    Raises
    ------
    ConfigError
        For a spec that cannot be read.
    """

    def __init__(self, core: ControllerCore, spec: str, timeout: float, outputs: list[str],
                 extrapolate: bool = True, trajectory_names: list[str] | None = None) -> None:
        self.core = core
        self.spec = spec
        self.timeout = timeout
        self.extrapolate = extrapolate
        self.outputs = outputs
        self.latest: list[float] | None = None
        self.latest_at = -math.inf
        self.interval = 0.0            # typical time between reference messages (median of the last few)
        self._intervals: deque[float] = deque(maxlen=_INTERVALS)
        self.generator: Reference | None = None
        self.origin: float | None = 0.0
        self.latched: list[float] | None = None
        self.stale = False
        self.trajectory_names = list(trajectory_names or outputs)
        if len(self.trajectory_names) != len(outputs):
            raise ConfigError("reference_joints", f"expected {len(outputs)} names, one per output "
                                                  f"({', '.join(outputs)}), got {len(self.trajectory_names)}")
        self.trajectory: Trajectory | None = None
        self.trajectory_origin = 0.0          # the clock's reading at the trajectory's time 0
        self._pending: tuple[Knots, float] | None = None    # accepted, taken up at a sample at or after its stamp
        self.refused = 0                      # trajectories refused so far
        if spec not in (TOPIC, TRAJECTORY):
            # checked now so that configure fails on a bad spec
            parse_reference(spec, core.orders, [0.0] * len(core.orders), outputs)

    def restart(self, now: float) -> None:
        """Start a built-in reference over (at activation).

        Parameters
        ----------
        now : float
            The clock's reading; 0 (simulated time before the first ``/clock``) defers the origin.
        """
        self.generator = None
        self.trajectory = self._pending = None
        # times of a built-in reference count from activation; in simulated time before the
        # first /clock the clock reads zero, so the origin is taken at the first real reading
        self.origin = now if now > 0.0 else None
        self.latched = None

    def shift(self, delta: float) -> None:
        """Move every remembered time by ``delta`` seconds (the clock jumped; ages and the move go on).

        Parameters
        ----------
        delta : float
        """
        self.latest_at += delta
        self.trajectory_origin += delta
        if self._pending is not None:
            self._pending = (self._pending[0], self._pending[1] + delta)
        if self.origin is not None:
            self.origin += delta

    def accept(self, values: Sequence[float], now: float) -> bool:
        """Take a topic message.

        Parameters
        ----------
        values : sequence of float
        now : float

        Returns
        -------
        bool
            False (and nothing kept) unless it holds ``core.reference_size`` finite numbers.
        """
        values = list(values)
        if len(values) != self.core.reference_size or not all(math.isfinite(v) for v in values):
            return False
        if math.isfinite(self.latest_at):
            # the median, not the last gap: messages that arrive bunched (a late one, then the next
            # at once) would otherwise stop the extrapolation after almost no time
            self._intervals.append(now - self.latest_at)
            self.interval = statistics.median(self._intervals)
        self.latest, self.latest_at = values, now
        return True

    def sample(self, x: Sequence[float], now: float) -> list[float]:
        """The reference vector for a step at state ``x`` and time ``now``.

        Parameters
        ----------
        x : sequence of float
        now : float

        Returns
        -------
        list of float
            NaN while a built-in reference has no good state to start from; :attr:`stale`
            tells whether a topic reference is being held.
        """
        if self.spec == TRAJECTORY:
            return self._planned(x, now)
        if self.spec != TOPIC:
            return self._generated(x, now)
        if self.latest is not None and now - self.latest_at <= self.timeout:
            self.stale = False
            self.latched = None
            # carried forward at most one typical message interval: a reference that stalls mid-move
            # stops moving after one interval (and is held at the outputs after the timeout)
            ahead = min(now - self.latest_at, self.interval)
            if self.extrapolate and ahead > 0.0:
                return extrapolate_reference(self.latest, self.core.orders, ahead)
            return self.latest
        # no reference, or it stalled: hold the outputs where they were when it stopped
        self.stale = True
        if self.latched is None:
            self.latched = self.core.hold_reference(x)
        return self.latched

    def _generated(self, x: Sequence[float], now: float) -> list[float]:
        if self.generator is None:
            try:
                base = initial_outputs(self.core, x)
            except LinzError:       # the core refuses this state; the move starts from the next good one
                return [math.nan] * self.core.reference_size
            self.generator = parse_reference(self.spec, self.core.orders, base, self.outputs)
        if self.origin is None and now > 0.0:
            self.origin = now
        return self.generator.sample(now - (self.origin if self.origin is not None else now))

    def accept_trajectory(self, points: TrajectoryPoints, start: float | None, now: float) -> str | None:
        """Take a planned trajectory (it replaces the one followed so far at its stamp, or the next sample).

        A later one replaces one still waiting for its stamp.

        Parameters
        ----------
        points : TrajectoryPoints
            Names as :attr:`trajectory_names` says; times from ``start``.
        start : float or None
            The clock's reading at the trajectory's time 0 (its header stamp); None: ``now``.
        now : float

        Returns
        -------
        str or None
            None when accepted, else the one-line reason it was refused (counted in :attr:`refused`).
        """
        try:
            knots = check_points(points, self.trajectory_names)
            origin = now if start is None else start
            check_not_over(knots, now - origin)
        except LinzError as err:
            self.refused += 1
            return str(err)
        self._pending = (knots, origin)
        return None

    def _planned(self, x: Sequence[float], now: float) -> list[float]:
        self.stale = False               # no trajectory, or after its end: held on purpose, not stalled
        if self.trajectory is None and self.latched is None:
            self.latched = self._held(x)
        if (self._pending is not None and now >= self._pending[1]
                and (self.trajectory is not None or self.latched is not None)):
            knots, origin = self._pending
            self._pending = None
            # taken up now, at its time now - origin: the points before are over
            self.trajectory = Trajectory(knots, self._start_of_move(now), now - origin)
            self.trajectory_origin = origin
        if self.trajectory is None:
            return self.latched if self.latched is not None else [math.nan] * self.core.reference_size
        return self.trajectory.sample(now - self.trajectory_origin, self.core.orders)

    def _held(self, x: Sequence[float]) -> list[float] | None:
        """The reference holding the outputs at ``x``; None where they are not defined (a refused state)."""
        try:
            held = self.core.hold_reference(x)
        except (ArithmeticError, ValueError):
            return None
        return held if all(math.isfinite(v) for v in held) else None

    def _start_of_move(self, now: float) -> tuple[list[float], list[float], list[float]]:
        """Position, velocity and acceleration per output where a new trajectory starts: the reference in
        force (the trajectory followed so far, at ``now``), else the outputs held where they were, at rest."""
        if self.trajectory is not None:
            values = self.trajectory.derivatives(now - self.trajectory_origin)
            return values[0].tolist(), values[1].tolist(), values[2].tolist()
        held = self.latched
        offsets = [sum(r + 1 for r in self.core.orders[:i]) for i in range(len(self.core.orders))]
        zeros = [0.0] * len(offsets)
        return [held[k] for k in offsets], zeros, list(zeros)
