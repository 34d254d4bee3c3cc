"""Where the controller's reference comes from at each step: the reference topic or a built-in generator.

A topic reference (``[y1, y1', ..., y1^(r1), y2, ...]``) usually comes slower than the
control rate; between messages each chain is carried along its own Taylor polynomial
(:func:`~linz_ros.runtime.reference.extrapolate_reference`) for at most the typical
interval between messages, and once the latest message is older than the timeout the
outputs are held where they were. A built-in reference (a spec such as
``smooth:tool_x=0.05,duration=2``) starts from the outputs at the first good state.
"""

from __future__ import annotations

import math
import statistics
from collections import deque
from typing import Sequence

from linz_ros.errors import LinzError
from linz_ros.runtime.closed_loop import initial_outputs
from linz_ros.runtime.core import ControllerCore
from linz_ros.runtime.reference import Reference, extrapolate_reference, parse_reference

__all__ = ["ReferenceSource", "TOPIC"]

#: The spec that means "from the reference topic".
TOPIC = "topic"
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

    Raises
    ------
    ConfigError
        For a spec that cannot be read.
    """

    def __init__(self, core: ControllerCore, spec: str, timeout: float, outputs: list[str],
                 extrapolate: bool = True) -> None:
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
        if spec != TOPIC:
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
