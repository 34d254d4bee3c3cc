"""The compensator of a dynamically extended law, around either core, and the plant it drives.

An artifact with ``design.extension`` (:mod:`linz_ros.artifact.extension`) carries the static
law of the extended plant: states ``(x, xi)``, new inputs ``w``. :class:`ExtendedCore` wraps
the core of that law (Python or native) and is what nodes and simulations step: it takes the
plant's own state, appends the compensator states, steps the core for ``w``, and drives the
plant's own inputs. Per delayed input with k integrators (``u = xi_1, xi_1' = xi_2, ...,
xi_k' = w``), with ``w`` held over the control period T:

- the plant receives the mean of ``xi_1`` over the period, ``sum_i xi_i T^(i-1) / i! +
  w T^k / (k+1)!`` (the held value whose integral over the period equals that of the
  continuous compensator), within the input's limits;
- the compensator advances exactly, ``xi_i <- sum_(j>=i) xi_j T^(j-i) / (j-i)! +
  w T^(k-i+1) / (k-i+1)!`` (the chain of integrators is solved in closed form);
- anti-windup: ``xi_1`` is kept within the input's limits (its rates that push past a
  limit are zeroed); a rate limit of the input bounds ``w`` (one integrator) or ``xi_2``;
- the watchdog setting ``compensator_floor`` keeps ``|xi_1|`` at least the floor (a speed
  floor: a cart whose law needs ``det A = v`` away from zero never commands a stop through the
  law); the floor's sign is that of ``xi_1``, or of its start value at zero. A step whose
  compensator was cut by a limit or the floor is flagged saturated.

Inputs without integrators pass ``w`` through. When the core refuses (modes ``held`` and
``safe``) the plant receives the safe command in its own inputs (the last good plant command
while ``held``, else zero or the fixed command) and the compensator restarts at the next
accepted state, as it does on :meth:`ExtendedCore.reset`: from measured values where given
(:meth:`ExtendedCore.observe_compensator`, e.g. a cart's speed from its odometry), else from
the artifact's start values.

:class:`ExtendedPlant` integrates the plant's own states from the extended ``dynamics``
program: the compensator's first states set to the held inputs and its inputs to zero make
the extended right-hand side the plant's own over the period, exactly.
"""

from __future__ import annotations

import math
from dataclasses import replace
from typing import Any, Sequence

from linz_ros.artifact.extension import Extension
from linz_ros.runtime.steprecord import StepRecord
from linz_ros.runtime.watchdogs import WatchdogConfig

__all__ = ["ExtendedCore", "ExtendedPlant", "GOOD_MODES", "advance_chain", "mean_of_first", "command_limits"]

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


class ExtendedCore:
    """A core of an extended law (:class:`ControllerCore` or ``NativeCore``) driving the plant's inputs.

    It has the interface of the core it wraps, in the plant's own states and inputs.

    Parameters
    ----------
    inner : ControllerCore or NativeCore
        Built from the same artifact.
    extension : Extension
    """

    def __init__(self, inner: Any, extension: Extension) -> None:
        self.inner = inner
        self.extension = extension
        self.artifact = inner.artifact
        self.backend = inner.backend
        self.n = len(extension.plant_states)
        self.m = len(extension.plant_inputs)
        self.orders = inner.orders
        self.reference_size = inner.reference_size
        self.period = 1.0 / self.artifact.rate
        self._offsets = extension.offsets
        self._measured: list[float] = [math.nan] * len(extension.compensator_states)
        self.config = inner.config
        self.reset()

    # -- settings --------------------------------------------------------------------------
    @property
    def config(self) -> WatchdogConfig:
        """The watchdog settings in force, in the plant's inputs (rate limits bound the plant's inputs)."""
        return self._config

    @config.setter
    def config(self, config: WatchdogConfig) -> None:
        delayed = [k > 0 for k in self.extension.integrators]
        # the core's own rate limits would bound the change of w: the compensator applies them instead
        inner_rates = tuple(math.inf if d else r for d, r in zip(delayed, config.rate_limits))
        self.inner.config = replace(config, rate_limits=inner_rates)
        self._config = config
        # no floor (inf in the settings) is a floor of 0 here: |xi_1| < 0 never holds
        floors = [0.0 if f == math.inf else f for f in config.compensator_floor or (math.inf,) * self.m]
        self._floors = floors
        # per delayed input: (input, offset, integrators, limits, rate limit, floor, sign at zero)
        self._plan = [(j, at, self.extension.integrators[j], self.extension.plant_input_limits[j],
                       config.rate_limits[j], floors[j], self.extension.start[at] or 1.0)
                      for j, at in enumerate(self._offsets) if at is not None]

    # -- state -----------------------------------------------------------------------------
    def reset(self) -> None:
        """Reset the core and restart the compensator (measured values where observed, else the start values)."""
        self.inner.reset()
        self._restart()
        self.last_extended_state: Sequence[float] = []
        self.last_command = [0.0] * self.m
        self.last_good_command = [0.0] * self.m

    def observe_compensator(self, values: Sequence[float]) -> None:
        """Measured values of the compensator states (nan where not measured), used at every later restart.

        Parameters
        ----------
        values : sequence of float
            One per compensator state.
        """
        if len(values) != len(self._measured):
            raise ValueError(f"expected {len(self._measured)} values, one per compensator state")
        self._measured = [float(v) for v in values]

    def _restart(self) -> None:
        start = self.extension.start
        self.compensator = [m if math.isfinite(m) else s for m, s in zip(self._measured, start)]
        for j, at in enumerate(self._offsets):
            if at is not None:
                lo, hi = self.extension.plant_input_limits[j]
                self.compensator[at] = min(max(self.compensator[at], lo), hi)
                # the floor holds at a restart too: a cart measured standing (v = 0) restarts at the floor,
                # not on the singular set, where the law would only ever send the safe command again
                chain = self.compensator[at:at + self.extension.integrators[j]]
                if abs(chain[0]) < self._floors[j]:
                    self.compensator[at:at + len(chain)] = _kept_off_zero(chain, self._floors[j], start[at] or 1.0)
        self._restart_next = False

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
        if self._restart_next:
            self._restart()
        try:
            extended = list(x) + self.compensator
        except TypeError:
            extended = x                          # the core refuses it with its own reason
        self.last_extended_state = extended       # what this step used: the record's x
        w, record = self.inner.step(extended, ref, t, now)
        if record.mode not in GOOD_MODES:
            return self._refused(record)
        u, cut = self._advance(w)
        self.last_command = self.last_good_command = u
        record.command = tuple(u)
        if cut:
            record.saturated = tuple(a or j in cut for j, a in enumerate(record.saturated))
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

    def _refused(self, record: StepRecord) -> tuple[list[float], StepRecord]:
        config = self._config
        if record.mode == "held":
            u = list(self.last_good_command)
        elif config.safe_kind == "fixed":
            u = list(config.safe_value)
        else:
            u = [0.0] * self.m
        u = [min(max(v, lo), hi) for v, (lo, hi) in zip(u, command_limits(self.artifact, config))]
        self.last_command = u
        self._restart_next = True
        record.command = tuple(u)
        return u, record

    def _advance(self, w: Sequence[float]) -> tuple[list[float], set[int]]:
        """The plant's inputs over the coming period, the compensator advanced over it, and the
        inputs a limit or the floor cut."""
        T, xi = self.period, self.compensator
        u = list(w)
        cut: set[int] = set()
        for j, at, k, (lo, hi), rate, floor, sign in self._plan:
            chain, wj = xi[at:at + k], w[j]
            if rate != math.inf:
                if k == 1 and abs(wj) > rate:
                    wj = math.copysign(rate, wj)
                    cut.add(j)
                elif k > 1 and abs(chain[1]) > rate:
                    chain[1] = math.copysign(rate, chain[1])
                    cut.add(j)
            applied = mean_of_first(chain, wj, T)
            chain = advance_chain(chain, wj, T)
            if not lo <= chain[0] <= hi:
                chain = _kept_within(chain, lo, hi)
                cut.add(j)
            if abs(chain[0]) < floor:
                chain = _kept_off_zero(chain, floor, sign)
                applied = chain[0]
                cut.add(j)
            if not lo <= applied <= hi:
                applied = min(max(applied, lo), hi)
                cut.add(j)
            xi[at:at + k] = chain
            u[j] = applied
        return u, cut


def _kept_within(chain: list[float], lo: float, hi: float) -> list[float]:
    """``xi_1`` (outside [lo, hi]) on the limit it passed, its rates that push further out zeroed (anti-windup)."""
    bound = lo if chain[0] < lo else hi
    outward = -1.0 if chain[0] < lo else 1.0
    return [bound] + [0.0 if v * outward > 0 else v for v in chain[1:]]


def _kept_off_zero(chain: list[float], floor: float, start: float) -> list[float]:
    """``xi_1`` (below the floor in magnitude) on the floor, its rates that push towards zero zeroed;
    the floor's side is that of ``xi_1``, or of ``start`` when ``xi_1`` is zero."""
    sign = math.copysign(1.0, chain[0] if chain[0] != 0.0 else start)
    return [sign * floor] + [0.0 if v * sign < 0 else v for v in chain[1:]]


class ExtendedPlant:
    """The plant's own states under its own held inputs, from an extended artifact's dynamics.

    Parameters
    ----------
    inner : NumericPlant or NativePlant
        The extended artifact's plant.
    extension : Extension
    """

    def __init__(self, inner: Any, extension: Extension) -> None:
        self.inner = inner
        self.extension = extension
        self.artifact = inner.artifact
        self.backend = inner.backend
        self.parameters = inner.parameters
        self.n = len(extension.plant_states)
        self.m = len(extension.plant_inputs)
        self._offsets = extension.offsets

    def _extended(self, x: Sequence[float], u: Sequence[float]) -> tuple[list[float], list[float]]:
        xi = [0.0] * len(self.extension.compensator_states)
        w = []
        for j, at in enumerate(self._offsets):
            if at is None:
                w.append(float(u[j]))
            else:
                xi[at] = float(u[j])          # xi_1 = u held; its rates and w zero keep it there
                w.append(0.0)
        return list(x) + xi, w

    def derivative(self, x: Sequence[float], u: Sequence[float]) -> list[float]:
        """dx/dt of the plant's own states under its inputs u.

        Parameters
        ----------
        x, u : sequence of float

        Returns
        -------
        list of float
        """
        return self.inner.derivative(*self._extended(x, u))[:self.n]

    def rk4(self, x: Sequence[float], u: Sequence[float], h: float, steps: int = 1) -> list[float]:
        """Advance by ``steps`` Runge-Kutta steps of size h with u held (see ``NumericPlant.rk4``).

        Parameters
        ----------
        x, u : sequence of float
        h : float
        steps : int

        Returns
        -------
        list of float
        """
        return self.inner.rk4(*self._extended(x, u), h, steps)[:self.n]

    def adaptive(self, x: Sequence[float], u: Sequence[float], duration: float,
                 rtol: float = 1e-9, atol: float = 1e-12) -> list[float]:
        """Advance by ``duration`` with the adaptive integrator, u held (see ``NumericPlant.adaptive``).

        Parameters
        ----------
        x, u : sequence of float
        duration, rtol, atol : float

        Returns
        -------
        list of float
        """
        return self.inner.adaptive(*self._extended(x, u), duration, rtol, atol)[:self.n]
