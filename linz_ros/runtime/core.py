"""The ROS-free controller core: one linearizing control step, guarded by its watchdogs.

Each step evaluates the artifact's law at the measured state, closes the outer loop on
the Brunovsky chains, solves ``A(x) u = v - b(x)`` and passes the command through the
watchdogs:

- singularity: sigma_min of A below ``sigma_warn`` flags the record; below
  ``sigma_act`` the solve becomes a damped least-squares one whose damping grows as
  sigma_min falls, ``lambda^2 = lambda_max^2 (1 - (sigma_min / sigma_act)^2)``
  (variable damping of Chiaverini, Siciliano and Egeland, IEEE TCST 2(2), 1994, built
  on Nakamura and Hanafusa 1986); below ``sigma_stop`` the configured safe command;
- saturation: rate limits, then box limits, per input; integral action is frozen on
  steps that saturate or leave the nominal mode (conditional integration);
- bad input: a state of the wrong length, non-finite, older than the last one used,
  or older than ``stale_after``, and a model that is not finite at the state, all give
  the safe command and a record saying why; a step never raises;
- the machine (``ALARMS``): a state outside the envelope widened by ``envelope_margin``
  (by default a controlled stop: the outputs held where the envelope was left, until the
  state is back inside the envelope itself), and a tracking error that stays above
  ``divergence_error`` for ``divergence_time`` without shrinking (by default the safe
  command, until ``reset``).

Modes: ``nominal``, ``damped``, ``held`` (the safe command is "hold the last command",
within ``hold_time``), ``safe``, ``stopping`` (the controlled stop).
"""

from __future__ import annotations

import math
import operator
import time
from collections import deque
from dataclasses import dataclass, fields, replace
from typing import Any, Callable, Sequence

from linz_ros.artifact.document import Artifact
from linz_ros.artifact.watchdog import setting as watchdog_setting
from linz_ros.artifact.watchdog import SAFE_KINDS, watchdog_problem
from linz_ros.artifact.watchdog import is_real_number as _is_real
from linz_ros.errors import ConfigError
from linz_ros.runtime._linalg import (computed_torque, damped_solve, inverse_mass_singular_values, singular_values,
                                      solve, task_space_terms)

__all__ = ["ControllerCore", "StepRecord", "WatchdogConfig", "MODES", "REASONS", "ALARMS"]

#: ``stopping``: a controlled stop (the law holds the outputs where the envelope was left). Only
#: ever appended to: logs store modes by index.
MODES = ("nominal", "damped", "held", "safe", "stopping")
#: Why a step ended as it did (``ok`` for a nominal step).
REASONS = ("ok", "near_singular", "singular", "wrong_length", "non_finite_state", "bad_reference",
           "bad_time", "out_of_order", "stale", "future_stamp", "model_not_finite", "non_finite_command",
           "no_state", "bad_message", "outside_envelope", "diverging")
#: Watchdogs that watch the machine rather than the message: bit i of ``StepRecord.alarms``.
ALARMS = ("outside_envelope", "diverging")
_isfinite = math.isfinite


def _all_finite(values: Sequence[float]) -> bool:
    """Whether every value is finite: a finite sum proves it, otherwise each is looked at."""
    # nan and +-inf make any float sum non-finite, so a finite sum needs no second look; a sum
    # that overflowed on finite values falls through to the exact check
    return _isfinite(sum(values)) or all(map(_isfinite, values))


def _straight_line_outer_loop(layout: list[tuple], b_offset: int | None = None) -> Callable:
    """The outer loop of :meth:`ControllerCore._outer_loop` as one function without loops.

    It returns ``(w, e)``: ``w = v - b`` with b read from the law's values at ``b_offset``
    (a plant whose law carries b), or ``w = v`` without it; e are the output errors. Built
    from the core's own numbers only (offsets and the artifact's gains, printed with
    ``repr`` of a float, which round-trips exactly), never from text in the file.
    """
    vs, errors = [], []
    for i, (k, j, r, k_integral, gains) in enumerate(layout):
        terms = [f"ref[{j + r}]"]
        if k_integral != 0.0:
            terms.append(f"{float(k_integral)!r} * integrators[{i}]")
        terms += [f"{float(gains[d])!r} * (values[{k + d}] - ref[{j + d}])" for d in range(r)]
        if b_offset is not None:
            terms.append(f"values[{b_offset + i}]")
        vs.append(" - ".join(terms))
        errors.append(f"values[{k}] - ref[{j}]")
    source = (f"def outer(values, ref, integrators):\n"
              f"    return [{', '.join(vs)}], [{', '.join(errors)}]\n")
    scope: dict = {}
    exec(compile(source, "<outer loop>", "exec"), {"__builtins__": {}}, scope)   # noqa: S102
    return scope["outer"]


def _straight_line_outside(bounds: list[tuple[int, float, float]]) -> Callable[[list[float]], bool]:
    """``x -> whether some x[i] lies outside [lo, hi]``, as one expression (a nan is outside).

    Built, like the outer loop, from the core's own numbers only (indices and ``repr`` of
    floats), never from text in the file.
    """
    if not bounds:
        return lambda x: False
    inside = " and ".join(f"{float(lo)!r} <= x[{int(i)}] <= {float(hi)!r}" for i, lo, hi in bounds)
    scope: dict = {}
    exec(compile(f"def outside(x):\n    return not ({inside})\n", "<envelope>", "exec"),   # noqa: S102
         {"__builtins__": {}}, scope)
    return scope["outside"]


def _straight_line_scaled_error(scale: list[float]) -> Callable[[list[float]], float]:
    """``e -> max_i |e_i| k_i`` over the watched outputs (k_i = 1 / divergence_error_i), as one expression."""
    terms = [f"abs(e[{i}]) * {float(k)!r}" for i, k in enumerate(scale) if k]
    if not terms:
        return lambda e: 0.0
    body = terms[0] if len(terms) == 1 else f"max({', '.join(terms)})"
    scope: dict = {}
    exec(compile(f"def scaled(e):\n    return {body}\n", "<divergence>", "exec"),   # noqa: S102
         {"__builtins__": {"abs": abs, "max": max}}, scope)
    return scope["scaled"]


def _slot_slice(slots: dict, name: str) -> slice:
    """Where output ``name`` of a compiled program lies in its flat result."""
    return slice(slots[name].offset, slots[name].offset + slots[name].size)


@dataclass(frozen=True)
class WatchdogConfig:
    """Watchdog settings; start from :meth:`from_artifact` and override what you need.

    The settings, their units, bounds and defaults are those of the one table,
    :data:`linz_ros.artifact.watchdog.WATCHDOG_SETTINGS`; :meth:`validate` applies its
    check. Per-input and per-output settings are tuples here, ``inf`` for none.

    Attributes
    ----------
    sigma_warn, sigma_act, sigma_stop : float
        Levels of the smallest singular value of A (units of A).
    damping : float
        lambda_max of the damped least-squares inverse (reached at sigma_min = 0).
    stale_after : float
        A state older than this (now - stamp, seconds) is refused.
    input_limits : tuple of (float, float)
        Box limits per input.
    rate_limits : tuple of float
        Largest change per second per input (``inf`` for none).
    safe_kind : {"zero", "hold", "fixed"}
    safe_value : tuple of float
        The fixed safe command (zeros for ``zero``).
    hold_time : float
        How long ``hold`` may repeat the last command before falling back to zero.
    integral_limit : float
        Bound on each integrator state (``inf`` for none).
    anti_windup : bool
        Freeze the integrators on steps that saturate or leave the nominal mode.
    max_dt : float
        Longest interval credited to the integrators in one step (seconds).
    future_tolerance : float or None
        A stamp up to this far ahead of ``now`` is accepted (clock skew between machines,
        ``/clock`` arriving after the state in simulated time); further ahead it is
        refused. None: the same as ``stale_after``.
    envelope : tuple of (float, float)
        Per state, the operating envelope (``(-inf, inf)`` where the plant gives none).
    envelope_margin : float
        The envelope is widened by this fraction of each bounded state's range.
    envelope_action : {"stop", "warn", "safe"}
        Outside the widened envelope: stop under control (hold the outputs where the envelope
        was left until the state is back inside the envelope itself), flag the step only, or
        send the safe command.
    divergence_error : tuple of float
        Per output, the tracking-error bound of the divergence watchdog (``inf``: not watched).
    divergence_time : float
        Seconds the error must stay above its bound, not smaller than when it crossed it.
    divergence_action : {"warn", "safe"}
        When diverging: flag the step, or send the safe command until the next reset.
    """

    sigma_warn: float
    sigma_act: float
    sigma_stop: float
    damping: float
    stale_after: float
    input_limits: tuple[tuple[float, float], ...]
    rate_limits: tuple[float, ...]
    safe_kind: str = "zero"
    safe_value: tuple[float, ...] = ()
    hold_time: float = watchdog_setting("hold_time").default
    integral_limit: float = math.inf
    anti_windup: bool = True
    max_dt: float = 0.1
    future_tolerance: float | None = None
    envelope: tuple[tuple[float, float], ...] = ()
    envelope_margin: float = watchdog_setting("envelope_margin").default
    envelope_action: str = watchdog_setting("envelope_action").default
    divergence_error: tuple[float, ...] = ()
    divergence_time: float = watchdog_setting("divergence_time").default
    divergence_action: str = watchdog_setting("divergence_action").default

    @classmethod
    def from_artifact(cls, artifact: Artifact, **overrides: Any) -> "WatchdogConfig":
        """The artifact's watchdog settings and limits, with checked overrides.

        Settings an older artifact does not store take the table's defaults.

        Parameters
        ----------
        artifact : Artifact
        **overrides
            Any attribute of this class.

        Returns
        -------
        WatchdogConfig

        Raises
        ------
        ConfigError
            For an unknown setting or a value out of range.
        """
        w = artifact.watchdog
        m = len(artifact.inputs)
        safe = w["safe_command"]
        envelope = artifact.envelope
        divergence = w.get("divergence_error") or [None] * len(artifact.outputs)

        def stored(name: str) -> Any:
            return w.get(name, watchdog_setting(name).default)

        config = cls(
            sigma_warn=float(w["sigma_warn"]), sigma_act=float(w["sigma_act"]),
            sigma_stop=float(w["sigma_stop"]), damping=float(w["damping"]),
            stale_after=float(w["stale_after"]),
            input_limits=tuple((float(a), float(b)) for a, b in artifact.input_limits),
            rate_limits=tuple(math.inf if r is None else float(r) for r in w["rate_limits"]),
            safe_kind=safe["kind"],
            safe_value=tuple(float(v) for v in safe.get("value", [0.0] * m)),
            hold_time=float(stored("hold_time")),
            integral_limit=math.inf if w.get("integral_limit") is None else float(w["integral_limit"]),
            max_dt=max(0.1, 10.0 / artifact.rate),
            envelope=tuple(tuple(float(v) for v in envelope.get(name, (-math.inf, math.inf)))
                           for name in artifact.states),
            envelope_margin=float(stored("envelope_margin")),
            envelope_action=stored("envelope_action"),
            divergence_error=tuple(math.inf if e is None else float(e) for e in divergence),
            divergence_time=float(stored("divergence_time")),
            divergence_action=stored("divergence_action"))
        config = config.with_overrides(**overrides)
        config.check_counts(len(artifact.states), m, len(artifact.outputs), complete=True)
        return config

    def with_overrides(self, **overrides: Any) -> "WatchdogConfig":
        """A copy with some settings changed, checked as a whole.

        Parameters
        ----------
        **overrides
            Any attribute of this class.

        Returns
        -------
        WatchdogConfig

        Raises
        ------
        ConfigError
        """
        known = {f.name for f in fields(self)}
        for key in overrides:
            if key not in known:
                raise ConfigError(key, f"unknown watchdog setting; expected one of {', '.join(sorted(known))}")
        config = replace(self, **overrides)
        config.validate()
        return config

    def table_values(self) -> dict[str, Any]:
        """The settings of the one table, in its canonical form (``inf`` where none).

        Returns
        -------
        dict
        """
        values = {f.name: getattr(self, f.name) for f in fields(self)
                  if f.name not in ("input_limits", "anti_windup", "max_dt", "envelope", "safe_kind", "safe_value")}
        values["rate_limits"] = list(self.rate_limits)
        values["divergence_error"] = list(self.divergence_error)
        values["safe_command"] = ({"kind": self.safe_kind} if self.safe_kind != "fixed"
                                  else {"kind": "fixed", "value": list(self.safe_value)})
        return values

    def validate(self) -> None:
        """Check ranges and consistency (the table's check, then what only the runtime has).

        Raises
        ------
        ConfigError
            Naming the first setting that is wrong.
        """
        m = len(self.input_limits)
        for key in ("input_limits", "rate_limits", "safe_value", "envelope", "divergence_error"):
            if not isinstance(getattr(self, key), tuple):
                raise ConfigError(key, "expected a tuple")
        if self.safe_kind not in SAFE_KINDS:
            raise ConfigError("safe_kind", f"expected {', '.join(SAFE_KINDS)}, got {self.safe_kind!r}")
        found = watchdog_problem(self.table_values(), m, len(self.divergence_error) or None)
        if found is not None:
            name, problem = found
            raise ConfigError("safe_value" if name == "safe_command" else name, problem)
        if not (_is_real(self.max_dt) and self.max_dt > 0):
            raise ConfigError("max_dt", f"expected a positive number, got {self.max_dt!r}")
        if not isinstance(self.anti_windup, bool):
            raise ConfigError("anti_windup", f"expected true or false, got {self.anti_windup!r}")
        for key, what in (("input_limits", "input"), ("envelope", "state")):
            for i, pair in enumerate(getattr(self, key)):
                if not (isinstance(pair, tuple) and len(pair) == 2 and all(_is_real(v) for v in pair)
                        and pair[0] < pair[1]):
                    raise ConfigError(key, f"{what} {i}: expected (lower, upper) with lower below upper, "
                                           f"got {pair!r}")
        if len(self.safe_value) != m or not all(_is_real(v) and _isfinite(v) for v in self.safe_value):
            raise ConfigError("safe_value", f"expected {m} finite numbers")

    def check_counts(self, states: int, inputs: int, outputs: int, complete: bool = False) -> None:
        """Check the per-state, per-input and per-output settings against a controller's sizes.

        Parameters
        ----------
        states, inputs, outputs : int
        complete : bool
            Require every entry (settings read from an artifact); otherwise an empty
            ``envelope`` or ``divergence_error`` means none.

        Raises
        ------
        ConfigError
        """
        empty = () if complete else (0,)
        if len(self.input_limits) != inputs:
            raise ConfigError("input_limits", f"expected {inputs} (lower, upper) pairs, one per input")
        if len(self.envelope) not in (states, *empty):
            raise ConfigError("envelope", f"expected {states} (lower, upper) pairs, one per state")
        if len(self.divergence_error) not in (outputs, *empty):
            raise ConfigError("divergence_error", f"expected {outputs} bounds, one per output")

    def widened_envelope(self, margin: float | None = None) -> list[tuple[int, float, float]]:
        """Per bounded state: its index and the envelope widened by ``margin`` of its range.

        Parameters
        ----------
        margin : float, optional
            Fraction of each state's range added on both sides (``envelope_margin`` by default;
            0 for the envelope itself).

        Returns
        -------
        list of (int, float, float)
        """
        margin = self.envelope_margin if margin is None else margin
        bounds = []
        for i, (lo, hi) in enumerate(self.envelope):
            if _isfinite(lo) and _isfinite(hi):
                extra = margin * (hi - lo)
                bounds.append((i, lo - extra, hi + extra))
        return bounds


@dataclass(slots=True)
class StepRecord:
    """What one step did: the command, the conditioning, the mode and why, the cost.

    Attributes
    ----------
    t : float
        The state's time stamp (seconds).
    command : tuple of float
        The command sent.
    mode : str
        One of :data:`MODES`.
    reason : str
        One of :data:`REASONS`.
    sigma_min, condition : float
        Of the decoupling matrix at the state (nan when not evaluated).
    warn : bool
        sigma_min below ``sigma_warn``.
    damping : float
        lambda of the damped solve (0 in nominal mode).
    saturated : tuple of bool
        Per input, whether a rate or box limit cut the command.
    compute_time : float
        Seconds spent in the step.
    outputs : tuple of float
        The outputs y_i at the state (empty when the state was refused).
    alarms : int
        Bit i set when watchdog :data:`ALARMS` [i] found the machine in trouble at this
        step, whether it acted (the reason names it) or only warned.
    """

    t: float
    command: tuple[float, ...]
    mode: str
    reason: str
    sigma_min: float
    condition: float
    warn: bool
    damping: float
    saturated: tuple[bool, ...]
    compute_time: float
    outputs: tuple[float, ...] = ()
    alarms: int = 0


class ControllerCore:
    """One feedback-linearizing control step with watchdogs; no ROS, no sympy.

    Parameters
    ----------
    artifact : Artifact
        A loaded controller artifact.
    config : WatchdogConfig, optional
        Defaults to the artifact's levels.
    parameters : sequence of float, optional
        Model parameters for the law (the artifact's nominal values by default).

    Examples
    --------
    A pendulum-like plant x1'' = -sin(x1) + u with output x1 and poles -2, -3, built in
    memory (artifacts usually come from ``linz build``):

    >>> from linz_ros.artifact import artifact_from_text, seal
    >>> from linz_ros.codegen import build_document
    >>> from linz_ros.model import plant_from_text
    >>> from linz_ros.synthesis import synthesise
    >>> plant = plant_from_text("plant: p\\nstates: [x1, x2]\\ninputs: [u]\\n"
    ...     "dynamics: {x1: x2, x2: -sin(x1) + u}\\noutputs: {y: x1}\\ndesign: {poles: {y: [-2, -3]}}")
    >>> core = ControllerCore(artifact_from_text(seal(build_document(synthesise(plant))[0])))
    >>> u, record = core.step([0.1, 0.0], [0.0, 0.0, 0.0], t=0.0)   # u = v - b = -6 (0.1) + sin(0.1)
    >>> round(u[0], 6), record.mode, record.reason
    (-0.500167, 'nominal', 'ok')
    """

    def __init__(self, artifact: Artifact, config: WatchdogConfig | None = None,
                 parameters: Sequence[float] | None = None) -> None:
        self.artifact = artifact
        self.n = len(artifact.states)
        self.m = len(artifact.inputs)
        self.orders = artifact.relative_degree
        self.integral = artifact.integral
        self.gains = [[float(k) for k in g] for g in artifact.gains]
        self.reference_size = sum(r + 1 for r in self.orders)
        nominal = artifact.nominal_parameters.tolist()
        if parameters is None:
            parameters = nominal
        parameters = [float(v) for v in parameters]
        if len(parameters) != len(nominal) or not all(_isfinite(v) for v in parameters):
            raise ConfigError("parameters", f"expected {len(nominal)} finite values "
                                            f"({', '.join(artifact.parameter_names)})")
        self.parameters = parameters
        law = artifact.programs["law"]
        self._law = law.function
        slots = law.slots
        self._mechanical = artifact.mechanical_coordinates
        if self._mechanical is None:
            self._a_slice = _slot_slice(slots, "A")
            self._b_slice = _slot_slice(slots, "b")
        else:
            # A = J M^-1 B and b = J M^-1 F + J' q' are assembled numerically at each step
            self._structure = [_slot_slice(slots, k) for k in ("M", "F", "B", "J", "c")]
        # joint-space outputs of an arm driven joint by joint (h = q, B = I): the computed-torque law
        self._computed_torque = artifact.computed_torque
        self._chain_offset = slots["chain"].offset
        self._period = 1.0 / artifact.rate
        self._output_offsets = [sum(self.orders[:i]) for i in range(len(self.orders))]
        outputs = [self._chain_offset + offset for offset in self._output_offsets]
        # the outputs y_i out of the law's values, as a tuple even for one chain
        self._outputs_of = (operator.itemgetter(*outputs) if len(outputs) > 1 else
                            (lambda values, i=outputs[0]: (values[i],)))
        # per chain: offset in the law's output, offset in the reference, degree, K_I, K_0..K_(r-1)
        self._layout = []
        k, j = self._chain_offset, 0
        for r, gains in zip(self.orders, self.gains):
            k_integral = gains[0] if self.integral else 0.0
            self._layout.append((k, j, r, k_integral, gains[1:] if self.integral else gains))
            k += r
            j += r + 1
        # w = v - b in one pass where the law carries b; v alone for mechanical plants
        self._outer = _straight_line_outer_loop(
            self._layout, self._b_slice.start if self._mechanical is None else None)
        self.config = config or WatchdogConfig.from_artifact(artifact)
        self.reset()

    @property
    def config(self) -> WatchdogConfig:
        """The watchdog settings in force; assigning new ones checks them against this artifact."""
        return self._config

    @config.setter
    def config(self, config: WatchdogConfig) -> None:
        config.validate()
        config.check_counts(self.n, self.m, len(self.orders))
        bounds = config.divergence_error or (math.inf,) * len(self.orders)
        self._config = config
        self._outside_widened = _straight_line_outside(config.widened_envelope())
        self._outside_plain = _straight_line_outside(config.widened_envelope(0.0))
        # the divergence watchdog works on |e_i| / bound_i; an infinite bound is not watched
        self._error_scale = [0.0 if not _isfinite(b) else 1.0 / b for b in bounds]
        self._watch_divergence = any(self._error_scale)
        self._scaled_error = _straight_line_scaled_error(self._error_scale)

    # -- state ------------------------------------------------------------------------
    def reset(self) -> None:
        """Forget the integrators, the last command and the last time stamp."""
        self.integrators = [0.0] * len(self.orders)
        self.last_command = [0.0] * self.m
        self.last_good_command = [0.0] * self.m
        self.last_t: float | None = None          # stamp of the last accepted state
        self.last_good_t: float | None = None     # stamp of the last nominal or damped command
        self._last_errors: list[float] | None = None
        self._integrate_next = False
        self._above_since: float | None = None     # start of the episode above the bound
        self._below_since: float | None = None     # when the error last went back under it, in the episode
        self._first_peak = 0.0                     # largest scaled error in the episode's first half-window
        self._recent: deque[tuple[float, float]] = deque()   # (t, scaled), decreasing: the sliding maximum
        self._diverged = False                     # latched by a divergence with action "safe"
        self._stop_reference: list[float] | None = None   # held while a controlled stop lasts

    def hold_reference(self, x: Sequence[float]) -> list[float]:
        """The reference that holds the outputs where they are at state ``x``.

        Parameters
        ----------
        x : sequence of float

        Returns
        -------
        list of float
            ``[y_i, 0, ..., 0]`` per chain.
        """
        return self._hold_reference_of(self._law([float(v) for v in x], self.parameters))

    def output_values(self, x: Sequence[float]) -> list[float]:
        """The outputs ``y_i`` themselves at ``x`` (the first entry of each chain).

        Parameters
        ----------
        x : sequence of float

        Returns
        -------
        list of float
        """
        chain = self.outputs(x)
        return [chain[k] for k in self._output_offsets]

    def outputs(self, x: Sequence[float]) -> list[float]:
        """The chains' values ``y_i, ..., y_i^(r_i - 1)`` at ``x``, flat.

        Parameters
        ----------
        x : sequence of float

        Returns
        -------
        list of float
        """
        values = self._law([float(v) for v in x], self.parameters)
        return list(values[self._chain_offset:self._chain_offset + sum(self.orders)])

    # -- the step ---------------------------------------------------------------------
    def step(self, x: Sequence[float], ref: Sequence[float], t: float,
             now: float | None = None) -> tuple[list[float], StepRecord]:
        """Compute the command for state ``x`` measured at time ``t``.

        Parameters
        ----------
        x : sequence of float
            The state, in the artifact's order.
        ref : sequence of float
            ``[y_ref_i, y_ref_i', ..., y_ref_i^(r_i)]`` for every chain, flat.
        t : float
            The state's time stamp, seconds.
        now : float, optional
            The current time, for the staleness check (``t`` when not given).

        Returns
        -------
        command : list of float
        record : StepRecord
        """
        start = time.perf_counter()
        config = self.config
        try:
            t = float(t)
            now = t if now is None else float(now)
        except (TypeError, ValueError, OverflowError):
            return self._refuse("bad_time", t, start, now)
        if not (_isfinite(t) and _isfinite(now)):
            return self._refuse("bad_time", t, start, now)
        try:
            if len(x) != self.n:
                return self._refuse("wrong_length", t, start, now)
            x = list(map(float, x))
        except (TypeError, ValueError, OverflowError):
            return self._refuse("wrong_length", t, start, now)
        if not _all_finite(x):
            return self._refuse("non_finite_state", t, start, now)
        last_t = self.last_t
        if last_t is not None and t <= last_t:
            return self._refuse("out_of_order", t, start, now)
        if now - t > config.stale_after:
            return self._refuse("stale", t, start, now)
        if t - now > (config.stale_after if config.future_tolerance is None else config.future_tolerance):
            # a stamp from the future would be kept as the newest and block every real state
            return self._refuse("future_stamp", t, start, now)
        try:
            if len(ref) != self.reference_size:
                return self._refuse("bad_reference", t, start, now)
            ref = list(map(float, ref))
        except (TypeError, ValueError, OverflowError):
            return self._refuse("bad_reference", t, start, now)
        if not _all_finite(ref):
            return self._refuse("bad_reference", t, start, now)
        try:
            values = self._law(x, self.parameters)
        except (ArithmeticError, ValueError):
            return self._refuse("model_not_finite", t, start, now)
        if not _all_finite(values):
            return self._refuse("model_not_finite", t, start, now)
        m = self.m
        A = b = None
        try:
            if self._computed_torque:
                # A = M^-1: its singular values are 1 / eig(M), and u = M v - F needs no solve
                sigma_min, sigma_max = inverse_mass_singular_values(values[self._structure[0]], m)
            else:
                if self._mechanical is None:
                    A, b = values[self._a_slice], values[self._b_slice]
                else:
                    A, b = task_space_terms(*(values[k] for k in self._structure), self._mechanical, m)
                sigma_min, sigma_max = singular_values(A, m)
        except (ArithmeticError, ValueError):
            return self._refuse("model_not_finite", t, start, now)
        condition = sigma_max / sigma_min if sigma_min > 0.0 else math.inf
        accepted_t = t if t <= now else now     # a stamp from the future must not lock out the next states
        dt = 0.0 if last_t is None else min(t - last_t, config.max_dt)
        if self.integral and self._integrate_next and self._last_errors is not None:
            self._advance_integrators(dt)
        alarms = 0
        if self._outside_widened(x):
            alarms = 1
            if config.envelope_action == "stop" and self._stop_reference is None:
                self._stop_reference = self._hold_reference_of(values)
        elif self._stop_reference is not None and not self._outside_plain(x):
            self._stop_reference = None        # back inside the envelope itself: the margin is the hysteresis
        if self._stop_reference is not None:
            if config.envelope_action != "stop":   # the action was changed while stopping
                self._stop_reference = None
            else:
                ref = self._stop_reference
        w, errors = self._outer_loop(values, ref)
        warn = not sigma_min >= config.sigma_warn
        damping = 0.0
        if self._watch_divergence and self._diverging(errors, t):
            alarms |= 2
        acted = "singular" if not sigma_min >= config.sigma_stop else self._acted_alarm(alarms)   # nan: singular
        if acted is not None:
            if acted != "diverging":
                self._above_since = None     # the law is not in command: its error says nothing of the model
            self.last_t = accepted_t
            return self._safe(acted, t, start, sigma_min, condition, warn, now, alarms)
        try:
            if sigma_min < config.sigma_act:
                ratio = sigma_min / config.sigma_act
                damping = config.damping * math.sqrt(1.0 - ratio * ratio)
                if A is None:
                    A, b = task_space_terms(*(values[k] for k in self._structure), self._mechanical, m)
                u = damped_solve(A, self._rhs(w, b), m, damping)
                mode, reason = "damped", "near_singular"
            elif A is None:
                u = computed_torque(values[self._structure[0]], values[self._structure[1]], w, m)
                mode, reason = "nominal", "ok"
            else:
                u = solve(A, self._rhs(w, b), m)
                mode, reason = "nominal", "ok"
        except (ArithmeticError, ValueError):
            self.last_t = accepted_t
            return self._safe("singular", t, start, sigma_min, condition, warn, now, alarms)
        # the first step after a reset is rate-limited from the resting (zero) command
        u, saturated = self._limit(u, dt if last_t is not None else self._period)
        if not all(map(_isfinite, u)):
            self.last_t = accepted_t
            return self._safe("non_finite_command", t, start, sigma_min, condition, warn, now, alarms)
        if self._stop_reference is not None:
            mode, reason = "stopping", ALARMS[0]
        elif alarms and reason == "ok":
            reason = ALARMS[0] if alarms & 1 else ALARMS[1]
        self.last_t = accepted_t
        self.last_good_t = t
        self.last_command = u
        self.last_good_command = u
        self._last_errors = errors
        frozen = mode == "stopping" or (config.anti_windup and (mode != "nominal" or any(saturated)))
        self._integrate_next = not frozen
        record = StepRecord(t, tuple(u), mode, reason, sigma_min, condition, warn, damping,
                            tuple(saturated), time.perf_counter() - start, self._outputs_of(values), alarms)
        return u, record

    def safe_step(self, now: float, reason: str = "no_state", final: bool = False) -> tuple[list[float], StepRecord]:
        """The safe command when no usable state arrived (a node's timer calls this).

        Parameters
        ----------
        now : float
            Current time, seconds.
        reason : str
            One of :data:`REASONS`, recorded.
        final : bool
            The last command before the controller stops (deactivate, shutdown): never the
            held one, which a driver would keep applying; zero or the fixed command.

        Returns
        -------
        command : list of float
        record : StepRecord
        """
        if final:
            self.last_good_t = None          # nothing left to hold
        return self._refuse(reason, now, time.perf_counter(), now)

    def is_stale(self, now: float) -> bool:
        """Whether the last accepted state (stamp) is older than ``stale_after`` at ``now``.

        Parameters
        ----------
        now : float

        Returns
        -------
        bool
        """
        return self.last_t is None or now - self.last_t > self.config.stale_after

    # -- pieces -------------------------------------------------------------------------
    def _diverging(self, errors: list[float], t: float) -> bool:
        """The divergence watchdog on s = max_i |e_i| / bound_i.

        An episode starts when s rises above 1 and ends only after s has stayed at or under 1
        for ``divergence_time`` (so a swinging error that crosses zero stays one episode). It
        is divergence once the episode has lasted ``divergence_time`` and the largest s over
        the last half of that time is at least the largest over the episode's first half:
        an error that grows, or stays large, rather than one that decays.
        """
        scaled = self._scaled_error(errors)
        span = self.config.divergence_time
        if scaled > 1.0:
            self._below_since = None
            if self._above_since is None:
                self._above_since, self._first_peak = t, scaled
                self._recent.clear()
        elif self._above_since is None:
            return False
        elif self._below_since is None:
            self._below_since = t
        elif t - self._below_since >= span:
            self._above_since = None
            return False
        elapsed = t - self._above_since
        if elapsed <= 0.5 * span:
            self._first_peak = max(self._first_peak, scaled)
        recent = self._recent                    # the sliding maximum over the last half-window
        while recent and recent[-1][1] <= scaled:
            recent.pop()
        recent.append((t, scaled))
        while recent[0][0] <= t - 0.5 * span:
            recent.popleft()
        return elapsed >= span and recent[0][1] >= self._first_peak

    def _hold_reference_of(self, values: Sequence[float]) -> list[float]:
        """Hold each output where it is: ``[y_i, 0, ..., 0]`` per chain, from the law's values."""
        ref: list[float] = []
        for y, r in zip(self._outputs_of(values), self.orders):
            ref.extend([y] + [0.0] * r)
        return ref

    def _acted_alarm(self, alarms: int) -> str | None:
        """The alarm whose action is the safe command, if one is raised (divergence latches)."""
        config = self.config
        if alarms & 2 and config.divergence_action == "safe":
            self._diverged = True
        if self._diverged:
            return "diverging"
        if alarms & 1 and config.envelope_action == "safe":
            return "outside_envelope"
        return None

    def _outer_loop(self, values: Sequence[float], ref: list[float]) -> tuple[list[float], list[float]]:
        """w_i = v_i - b_i (or v_i, mechanical plants) and the errors e_i, where
        v_i = y_ref_i^(r_i) - K_i . (eta_i, e_i, ..., e_i^(r_i - 1))."""
        return self._outer(values, ref, self.integrators)

    def _rhs(self, w: list[float], b: Sequence[float]) -> list[float]:
        """v - b: ``w`` already is where the law carries b; a mechanical plant's b is assembled."""
        if self._mechanical is None:
            return w
        return [w[i] - b[i] for i in range(self.m)]

    def _advance_integrators(self, dt: float) -> None:
        limit = self.config.integral_limit
        for i, e in enumerate(self._last_errors or ()):
            value = self.integrators[i] + e * dt
            self.integrators[i] = max(-limit, min(limit, value))

    def _limit(self, u: list[float], dt: float) -> tuple[list[float], list[bool]]:
        """Rate limits against the last command, then box limits; which inputs were cut."""
        config = self.config
        out, saturated = [], []
        for i, value in enumerate(u):
            cut = False
            rate = config.rate_limits[i]
            if rate != math.inf:
                previous = self.last_command[i]
                step = rate * dt
                if value > previous + step:
                    value, cut = previous + step, True
                elif value < previous - step:
                    value, cut = previous - step, True
            lo, hi = config.input_limits[i]
            if value > hi:
                value, cut = hi, True
            elif value < lo:
                value, cut = lo, True
            out.append(value)
            saturated.append(cut)
        return out, saturated

    def _safe_command(self, now: float) -> tuple[list[float], str]:
        config = self.config
        if config.safe_kind == "hold" and self.last_good_t is not None \
                and 0.0 <= now - self.last_good_t <= config.hold_time:
            return list(self.last_good_command), "held"
        if config.safe_kind == "fixed":
            return list(config.safe_value), "safe"
        return [0.0] * self.m, "safe"

    def _safe(self, reason: str, t: float, start: float, sigma_min: float = math.nan,
              condition: float = math.nan, warn: bool = False, now: float | None = None, alarms: int = 0
              ) -> tuple[list[float], StepRecord]:
        """The safe command (or the held one), clipped to the box limits, and its record.

        ``hold`` is measured against ``now``; without a valid ``now`` it is not trusted
        and the zero command is sent.
        """
        if now is not None and _isfinite(now):
            u, mode = self._safe_command(now)
        else:
            u, mode = self._safe_command(math.inf)
        u = [min(max(value, lo), hi) for value, (lo, hi) in zip(u, self.config.input_limits)]
        self.last_command = u
        self._integrate_next = False
        record = StepRecord(t, tuple(u), mode, reason, sigma_min, condition, warn, 0.0,
                            (False,) * self.m, time.perf_counter() - start, (), alarms)
        return u, record

    def _refuse(self, reason: str, t: Any, start: float, now: Any = None) -> tuple[list[float], StepRecord]:
        try:
            stamp = float(t)
        except (TypeError, ValueError, OverflowError):
            stamp = math.nan
        try:
            current = None if now is None else float(now)
        except (TypeError, ValueError, OverflowError):
            current = None
        return self._safe(reason, stamp, start, now=current)
