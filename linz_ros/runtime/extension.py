"""The compensator of a dynamically extended law, around either core.

An artifact with ``design.extension`` (:mod:`linz_ros.artifact.extension`) carries the static
law of the extended plant: states ``(x, xi)``, new inputs ``w``. :class:`ExtendedCore` wraps
the core of that law (Python or native) and is what nodes and simulations step: it takes the
plant's own state, appends the compensator states, steps the core for ``w``, and drives the
plant's own inputs. Per delayed input with k integrators (``u = xi_1, xi_1' = xi_2, ...,
xi_k' = w``):

- at each accepted state the compensator is first advanced exactly from the last accepted
  state under the w chosen there, over the real interval between their stamps (at most
  ``max_dt``): ``xi_i <- sum_(j>=i) xi_j dt^(j-i) / (j-i)! + w dt^(k-i+1) / (k-i+1)!`` (the
  chain of integrators solved in closed form), so a late or slow state stream keeps its time
  scale;
- the plant then receives the mean of ``xi_1`` over the coming control period T under the new
  w, ``sum_i xi_i T^(i-1) / i! + w T^k / (k+1)!`` (the held value whose integral over the
  period equals that of the continuous compensator), within the input's limits;
- anti-windup: ``xi_1`` is kept within the input's limits (its rates that push past a limit
  are zeroed); a rate limit of the input bounds ``w`` (one integrator) or ``xi_2``; a step
  whose compensator was cut (a limit, a rate limit, the floor) is flagged saturated and the
  law's integral action skips its next update;
- the watchdog setting ``compensator_floor`` keeps ``|xi_1|`` at least the floor (a speed
  floor: a cart whose law needs ``det A = v`` away from zero never plans through a stop), on
  the side ``xi_1`` was on (so a period cannot carry it through zero unseen), or, at zero, on
  the start value's side; a floor that fits the limits on one side only holds that side, one
  that fits neither is refused.

Inputs without integrators pass ``w`` through. When the core refuses (modes ``held`` and
``safe``) the plant receives the safe command in its own inputs (the last good plant command
while ``held``, else zero or the fixed command), and the record's compensator is what the
plant then has. The compensator restarts at the next accepted state: each first state from its
measurement when there is one (:meth:`ExtendedCore.observe_compensator`, e.g. a cart's speed in
its odometry), else the command last sent (so a held command continues without a jump), else
(a first start) the artifact's start value; within the limits, off the floor, and at most one
period's rate limit away from the command last sent. :meth:`ExtendedCore.reset` starts afresh
(given values, else the start values).

The plant such a law drives in a simulation: :mod:`linz_ros.runtime.extended_plant`.
"""

from __future__ import annotations

import math
from dataclasses import replace
from typing import Any, Sequence

from linz_ros.artifact.extension import Extension
from linz_ros.errors import ConfigError
from linz_ros.runtime._around import AroundExtension
from linz_ros.runtime.core import settings_property
from linz_ros.runtime.steprecord import StepRecord
from linz_ros.runtime.watchdogs import WatchdogConfig

__all__ = ["ExtendedCore", "AroundExtension", "GOOD_MODES", "advance_chain", "mean_of_first", "command_limits"]

#: Modes in which the law is in command and the compensator advances.
GOOD_MODES = ("nominal", "damped", "stopping")


def advance_chain(chain: Sequence[float], w: float, period: float) -> list[float]:
    """The chain of integrators ``xi_1' = xi_2, ..., xi_k' = w`` after ``period`` with w held.

    Parameters
    ----------
    chain : sequence of float
        ``xi_1 .. xi_k``.
    w : float
    period : float

    Returns
    -------
    list of float

    Examples
    --------
    >>> advance_chain([1.0, 2.0], 6.0, 0.5)        # 1 + 2 (0.5) + 6 (0.125), 2 + 6 (0.5)
    [2.75, 5.0]
    """
    k = len(chain)
    result = []
    for i in range(k):
        value, power = 0.0, 1.0
        for j in range(i, k):
            value += chain[j] * power
            power *= period / (j - i + 1)
        result.append(value + w * power)
    return result


def mean_of_first(chain: Sequence[float], w: float, period: float) -> float:
    """The mean of ``xi_1`` over ``period`` with w held: ``sum_i xi_i T^(i-1)/i! + w T^k/(k+1)!``.

    Parameters
    ----------
    chain : sequence of float
    w : float
    period : float

    Returns
    -------
    float

    Examples
    --------
    >>> mean_of_first([1.0, 2.0], 6.0, 0.5)        # 1 + 2 (0.25) + 6 (0.25 / 6)
    1.75
    """
    value, factor = 0.0, 1.0
    for i, xi in enumerate(chain):
        factor /= i + 1
        value += xi * factor
        factor *= period
    return value + w * factor / (len(chain) + 1)


def command_limits(artifact: Any, config: WatchdogConfig) -> list[tuple[float, float]]:
    """The box limits of the commands a controller sends, per input it drives.

    Parameters
    ----------
    artifact : Artifact
    config : WatchdogConfig
        The settings in force (their ``input_limits`` bound the law's own inputs).

    Returns
    -------
    list of (float, float)
        ``config.input_limits``; with a dynamic extension, the plant's own limits for its
        delayed inputs (the law's new inputs there have none).
    """
    extension = artifact.extension
    if extension is None:
        return list(config.input_limits)
    return [extension.plant_input_limits[j] if k else config.input_limits[j]
            for j, k in enumerate(extension.integrators)]


class ExtendedCore(AroundExtension):
    """A core of an extended law (:class:`ControllerCore` or ``NativeCore``) driving the plant's inputs.

    It has the interface of the core it wraps, in the plant's own states and inputs.

    Parameters
    ----------
    inner : ControllerCore or NativeCore
        Built from the same artifact.
    extension : Extension
    """

    def __init__(self, inner: Any, extension: Extension) -> None:
        super().__init__(inner, extension)
        self.orders = inner.orders
        self.reference_size = inner.reference_size
        self.period = 1.0 / self.artifact.rate
        self.config = inner.config
        self.reset()

    # -- settings --------------------------------------------------------------------------
    def _load_config(self, config: WatchdogConfig) -> None:
        """Check ``config`` against the compensator and give the inner core its share of it."""
        delayed = [k > 0 for k in self.extension.integrators]
        # no floor (inf in the settings) is a floor of 0 here: |xi_1| < 0 never holds
        floors = [0.0 if f == math.inf else f for f in config.compensator_floor or (math.inf,) * self.m]
        limits = command_limits(self.artifact, config)
        sides = [_floor_side(f, lo, hi, self.extension.start[at] if at is not None else 1.0)
                 for f, (lo, hi), at in zip(floors, limits, self._offsets)]
        for j, side in enumerate(sides):
            if side is None:
                lo, hi = limits[j]
                raise ConfigError("compensator_floor", f"{floors[j]:g} for {self.extension.plant_inputs[j]} lies "
                                                       f"outside its limits [{lo:g}, {hi:g}] on both sides")
        # the core's own rate limits would bound the change of w: the compensator applies them instead
        inner_rates = tuple(math.inf if d else r for d, r in zip(delayed, config.rate_limits))
        self.inner.config = replace(config, rate_limits=inner_rates)
        self._limits = limits
        # per delayed input: (input, offset, integrators, limits, rate limit, floor, the floor's side)
        self._plan = [(j, at, self.extension.integrators[j], limits[j], config.rate_limits[j], floors[j], sides[j])
                      for j, at in enumerate(self._offsets) if at is not None]

    config = settings_property(_load_config, "The watchdog settings in force, in the plant's inputs (rate limits "
                                             "bound the plant's inputs).")

    # -- state -----------------------------------------------------------------------------
    def reset(self, compensator: Sequence[float] | None = None) -> None:
        """Reset the core and start the compensator afresh.

        Parameters
        ----------
        compensator : sequence of float, optional
            Values to start from (a measurement at activation, ``linz sim --initial``), nan where
            unknown; the artifact's start values elsewhere. Not remembered for later restarts.
        """
        self.inner.reset()
        self._measured: list[float] = [math.nan] * len(self.extension.compensator_states)
        self._sent = False                        # no command since the reset: nothing to continue from
        self.last_command = [0.0] * self.m
        self.last_good_command = [0.0] * self.m
        self.compensator = self._restart_values(compensator)
        self._w = [0.0] * self.m
        self._t: float | None = None
        self._restart_next = False
        self.last_extended_state: Sequence[float] = []

    def observe_compensator(self, values: Sequence[float]) -> None:
        """Measured values of the compensator states (nan where not measured), used at the next restarts.

        Parameters
        ----------
        values : sequence of float
            One per compensator state.
        """
        if len(values) != len(self._measured):
            raise ValueError(f"expected {len(self._measured)} values, one per compensator state")
        self._measured = [float(v) for v in values]

    def _restart_values(self, given: Sequence[float] | None = None) -> list[float]:
        """Where the compensator restarts (module docstring): per delayed input, its value from ``given``
        or the measurement, else the command last sent (continuing what the plant has), else the start
        value; within the limits, off the floor, and at most a rate limit's period step from the
        command last sent; its rates from the same sources, else 0."""
        known = list(given) if given is not None else self._measured
        chain = [v if math.isfinite(v) else 0.0 for v in known]
        for j, at, k, (lo, hi), rate, floor, side in self._plan:
            value = known[at]
            if not math.isfinite(value):
                value = self.last_command[j] if self._sent else self.extension.start[at]
            value = min(max(value, lo), hi)
            if abs(value) < floor:
                value = _side_now(value, floor, lo, hi, side) * floor
            if self._sent and rate != math.inf:
                step = rate * self.period
                value = min(max(value, self.last_command[j] - step), self.last_command[j] + step)
            chain[at] = value
        return chain

    def extended_state(self, x: Sequence[float]) -> list[float]:
        """The core's state: the plant's state followed by the compensator's.

        Parameters
        ----------
        x : sequence of float

        Returns
        -------
        list of float
        """
        return list(x) + self.compensator

    @property
    def last_t(self) -> float | None:
        """Stamp of the last accepted state."""
        return self.inner.last_t

    def is_stale(self, now: float) -> bool:
        """Whether the last accepted state is older than ``stale_after`` at ``now``.

        Parameters
        ----------
        now : float

        Returns
        -------
        bool
        """
        return self.inner.is_stale(now)

    def hold_reference(self, x: Sequence[float]) -> list[float]:
        """The reference that holds the outputs where they are (see the core's).

        Parameters
        ----------
        x : sequence of float
            The plant's state.

        Returns
        -------
        list of float
        """
        return self.inner.hold_reference(self.extended_state(x))

    def output_values(self, x: Sequence[float]) -> list[float]:
        """The outputs at the plant's state ``x``.

        Parameters
        ----------
        x : sequence of float

        Returns
        -------
        list of float
        """
        return self.inner.output_values(self.extended_state(x))

    def outputs(self, x: Sequence[float]) -> list[float]:
        """The chains' values at the plant's state ``x`` and the compensator's, flat.

        Parameters
        ----------
        x : sequence of float

        Returns
        -------
        list of float
        """
        return self.inner.outputs(self.extended_state(x))

    # -- the step --------------------------------------------------------------------------
    def step(self, x: Sequence[float], ref: Sequence[float], t: float,
             now: float | None = None) -> tuple[list[float], StepRecord]:
        """The plant's command for its state ``x`` at time ``t`` (see the core's ``step``).

        Parameters
        ----------
        x : sequence of float
            The plant's own state.
        ref : sequence of float
        t : float
        now : float, optional

        Returns
        -------
        command : list of float
            The plant's inputs.
        record : StepRecord
        """
        restart = self._restart_next
        chain, cut = (self._restart_values(), set()) if restart else self._advanced_to(t)
        try:
            extended = list(x) + chain
        except TypeError:
            extended = x                          # the core refuses it with its own reason
        self.last_extended_state = extended       # what this step used: the record's x
        w, record = self.inner.step(extended, ref, t, now)
        if record.mode not in GOOD_MODES:
            return self._refused(record, x)
        self.compensator, self._t, self._restart_next = chain, float(record.t), False
        u = self._commands(w, cut)
        self.last_command = self.last_good_command = u
        self._sent = True
        record.command = tuple(u)
        if cut:
            record.saturated = tuple(a or j in cut for j, a in enumerate(record.saturated))
            if self._config.anti_windup:
                self.inner.freeze_integrators()   # the law's integral action must not wind up on a cut input
        return u, record

    def safe_step(self, now: float, reason: str = "no_state", final: bool = False) -> tuple[list[float], StepRecord]:
        """The safe command in the plant's inputs (see the core's ``safe_step``).

        Parameters
        ----------
        now : float
        reason : str
        final : bool

        Returns
        -------
        command : list of float
        record : StepRecord
        """
        _, record = self.inner.safe_step(now, reason, final)
        return self._refused(record)

    def _refused(self, record: StepRecord, x: Sequence[float] = ()) -> tuple[list[float], StepRecord]:
        """The plant's safe (or held) command; the compensator restarts at the next accepted state."""
        config = self._config
        if record.mode == "held":
            u = list(self.last_good_command)
        elif config.safe_kind == "fixed":
            u = list(config.safe_value)
        else:
            u = [0.0] * self.m
        u = [min(max(v, lo), hi) for v, (lo, hi) in zip(u, self._limits)]
        self.last_command = u
        self._sent = True
        self._restart_next = True
        if x:                                     # the record's x: what the plant has, its inputs held
            try:
                self.last_extended_state = list(x) + self.held_compensator(u)
            except TypeError:
                pass
        record.command = tuple(u)
        return u, record

    def _advanced_to(self, t: Any) -> tuple[list[float], set[int]]:
        """The compensator at stamp ``t``: advanced exactly from the last accepted step under its held w
        over the real interval (at most ``max_dt``), kept within the limits and off the floor."""
        chain = list(self.compensator)
        cut: set[int] = set()
        if self._t is None:
            return chain, cut
        try:
            dt = min(max(float(t) - self._t, 0.0), self._config.max_dt)
        except (TypeError, ValueError):
            return chain, cut                     # the core refuses the stamp
        if not dt > 0.0:
            return chain, cut
        for j, at, k, (lo, hi), rate, floor, side in self._plan:
            before = chain[at]
            piece = advance_chain(chain[at:at + k], self._w[j], dt)
            if not lo <= piece[0] <= hi:
                piece = _kept_within(piece, lo, hi)
                cut.add(j)
            # the floor on the side xi_1 was on, so a period cannot carry it through zero unseen
            now_side = _side_now(before, floor, lo, hi, side)
            if floor > 0.0 and (abs(piece[0]) < floor or piece[0] * now_side < 0.0):
                piece = _kept_off_zero(piece, floor, now_side)
                cut.add(j)
            chain[at:at + k] = piece
        return chain, cut

    def _commands(self, w: Sequence[float], cut: set[int]) -> list[float]:
        """The plant's inputs over the coming period (the compensator's mean under w, within limits), and
        w kept for the next advance (bounded by the rate limits)."""
        T, chain = self.period, self.compensator
        u, kept = list(w), list(w)
        for j, at, k, (lo, hi), rate, floor, side in self._plan:
            wj = w[j]
            if rate != math.inf:
                if k == 1 and abs(wj) > rate:
                    wj = math.copysign(rate, wj)
                    cut.add(j)
                elif k > 1 and abs(chain[at + 1]) > rate:
                    chain[at + 1] = math.copysign(rate, chain[at + 1])
                    cut.add(j)
            applied = mean_of_first(chain[at:at + k], wj, T)
            if floor > 0.0:                   # on the floor: no w that takes it below, no input below it
                now_side = _side_now(chain[at], floor, lo, hi, side)
                if abs(applied) < floor or applied * now_side < 0.0:
                    wj = 0.0 if wj * now_side < 0.0 else wj
                    applied = max(mean_of_first(chain[at:at + k], wj, T) * now_side, floor) * now_side
                    cut.add(j)
            if not lo <= applied <= hi:
                applied = min(max(applied, lo), hi)
                cut.add(j)
            u[j], kept[j] = applied, wj
        self._w = kept
        return u


def _kept_within(chain: list[float], lo: float, hi: float) -> list[float]:
    """``xi_1`` (outside [lo, hi]) on the limit it passed, its rates that push further out zeroed (anti-windup)."""
    bound = lo if chain[0] < lo else hi
    outward = -1.0 if chain[0] < lo else 1.0
    return [bound] + [0.0 if v * outward > 0 else v for v in chain[1:]]


def _kept_off_zero(chain: list[float], floor: float, side: float) -> list[float]:
    """``xi_1`` on the floor on ``side`` (+-1), its rates that push towards zero zeroed."""
    sign = math.copysign(1.0, side)
    return [sign * floor] + [0.0 if v * sign < 0 else v for v in chain[1:]]


def _floor_side(floor: float, lo: float, hi: float, start: float) -> float | None:
    """The side (+-1) a floor holds an input on when nothing else says: the start value's when both
    sides lie within the limits, the only one that does otherwise; None when neither does."""
    up, down = floor <= hi, -floor >= lo
    if floor == 0.0 or (up and down):
        return -1.0 if start < 0 else 1.0
    if up or down:
        return 1.0 if up else -1.0
    return None


def _side_now(before: float, floor: float, lo: float, hi: float, side: float) -> float:
    """The side of ``before`` when the floor fits within the limits there, else the floor's own side."""
    if before == 0.0:
        return side
    sign = math.copysign(1.0, before)
    return sign if lo <= sign * floor <= hi else side
