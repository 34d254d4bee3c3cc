"""The watchdogs' settings and their compiled checks: the envelope test and the divergence watch.

:class:`WatchdogConfig` holds the settings of the one table
(:data:`linz_ros.artifact.watchdog.WATCHDOG_SETTINGS`) as the core uses them;
:func:`outside_check` and :class:`DivergenceWatch` are the two watchdogs of the machine
(``ALARMS``) that the core runs on every accepted state.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields, replace
from typing import Any, Callable, Sequence

from linz_ros.artifact.document import Artifact
from linz_ros.artifact.watchdog import setting as watchdog_setting
from linz_ros.artifact.watchdog import SAFE_KINDS, watchdog_problem
from linz_ros.artifact.watchdog import is_real_number as _is_real
from linz_ros.errors import ConfigError

__all__ = ["WatchdogConfig", "DivergenceWatch", "outside_check"]

_isfinite = math.isfinite


def outside_check(bounds: list[tuple[int, float, float]]) -> Callable[[Sequence[float]], bool]:
    """``x -> whether some x[i] lies outside [lo, hi]``, as one expression (a nan is outside).

    Built, like the core's outer loop, from our own numbers only (indices and ``repr`` of
    floats), never from text in the file.

    Parameters
    ----------
    bounds : list of (int, float, float)
        Index, lower and upper bound per checked entry (:meth:`WatchdogConfig.widened_envelope`).

    Returns
    -------
    callable
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
    compensator_floor : tuple of float
        Per input, the smallest magnitude of a dynamically extended input's compensator
        (``linz_ros.runtime.extension``); ``inf`` for none, ignored by inputs without integrators.
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
    compensator_floor: tuple[float, ...] = ()

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
            divergence_action=stored("divergence_action"),
            compensator_floor=tuple(math.inf if f is None else float(f)
                                    for f in (w.get("compensator_floor") or [None] * m)))
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
        values["compensator_floor"] = list(self.compensator_floor) or [math.inf] * len(self.input_limits)
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
        for key in ("input_limits", "rate_limits", "safe_value", "envelope", "divergence_error", "compensator_floor"):
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
        if len(self.compensator_floor) not in (inputs, 0):
            raise ConfigError("compensator_floor", f"expected {inputs} values, one per input")

    def limit(self, u: Sequence[float], previous: Sequence[float], dt: float) -> tuple[list[float], list[bool]]:
        """The saturation watchdog: rate limits against the previous command, then box limits.

        Parameters
        ----------
        u : sequence of float
            The command of the law.
        previous : sequence of float
            The command sent before (for the rate limits).
        dt : float
            Seconds since then.

        Returns
        -------
        command : list of float
        saturated : list of bool
            Per input, whether a limit cut it.
        """
        out, saturated = [], []
        for i, value in enumerate(u):
            cut = False
            rate = self.rate_limits[i]
            if rate != math.inf:
                last = previous[i]
                step = rate * dt
                if value > last + step:
                    value, cut = last + step, True
                elif value < last - step:
                    value, cut = last - step, True
            lo, hi = self.input_limits[i]
            if value > hi:
                value, cut = hi, True
            elif value < lo:
                value, cut = lo, True
            out.append(value)
            saturated.append(cut)
        return out, saturated

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



class DivergenceWatch:
    """The divergence watchdog on s = max_i |e_i| / bound_i, with its episode state.

    An episode starts when s rises above 1 and ends only after s has stayed at or under 1
    for ``divergence_time`` (so a swinging error that crosses zero stays one episode). It
    is divergence once the episode has lasted ``divergence_time`` and the largest s over
    the last half of that time is at least the largest over the episode's first half:
    an error that grows, or stays large, rather than one that decays.
    """

    def __init__(self) -> None:
        self.configure((), math.inf)
        self.reset()

    def configure(self, bounds: Sequence[float], span: float) -> None:
        """Set the bounds and the time (a settings change keeps the episode under way).

        Parameters
        ----------
        bounds : sequence of float
            Per output, ``divergence_error`` (``inf``: not watched).
        span : float
            ``divergence_time``, seconds.
        """
        scale = [0.0 if not _isfinite(b) else 1.0 / b for b in bounds]
        self.active = any(scale)
        self._scaled = _straight_line_scaled_error(scale)
        self._span = span

    def reset(self) -> None:
        """Forget the episode."""
        self._above_since: float | None = None     # start of the episode above the bound
        self._below_since: float | None = None     # when the error last went back under it, in the episode
        self._first_peak = 0.0                     # largest scaled error in the episode's first half-window
        self._last_high = -math.inf                # latest time the scaled error reached the first peak

    def end_episode(self) -> None:
        """End the episode under way (the law was not in command: its error says nothing of the model)."""
        self._above_since = None

    def check(self, errors: Sequence[float], t: float) -> bool:
        """Whether the errors at time ``t`` make a divergence.

        Parameters
        ----------
        errors : sequence of float
            The outer loop's output errors e_i.
        t : float

        Returns
        -------
        bool
        """
        scaled = self._scaled(errors)
        span = self._span
        if scaled > 1.0:
            self._below_since = None
            if self._above_since is None:
                self._above_since, self._first_peak = t, scaled
                self._last_high = -math.inf
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
        # "the largest s over the last half-window is at least the first peak" is "s reached the
        # first peak at some time in the last half-window": once the episode has lasted its span
        # that window lies wholly after the first half, where the first peak no longer changes,
        # so the latest such time is all there is to keep (constant memory at any rate and span)
        if elapsed > 0.5 * span and scaled >= self._first_peak:
            self._last_high = t
        return elapsed >= span and self._last_high > t - 0.5 * span
