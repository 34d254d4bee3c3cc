"""Offline closed loop: the controller core sampled at its rate against the artifact's plant.

The controller sees the state at the sampling instants t_k = k T (plus optional sensor
noise) and its command is held until the next instant (zero-order hold), optionally
delayed; between instants the plant is integrated by classical RK4 sub-steps or by
scipy's adaptive RK45. The plant may run with mismatched parameters.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np

from linz_ros.artifact.document import Artifact
from linz_ros.errors import ConfigError
from linz_ros.runtime.core import ControllerCore
from linz_ros.runtime.native import BACKENDS, make_core
from linz_ros.runtime.physics import advance_period, make_physics_plant
from linz_ros.runtime.plant import IntegrationBudgetError
from linz_ros.runtime.reference import Reference, make_reference
from linz_ros.runtime.steprecord import (ACTED_MODES, ALARMS, MODES, alarms_from_reasons, decode, encode,
                                         record_labels, write_csv)
from linz_ros.runtime.transform import Transform
from linz_ros.runtime.verdict import VERDICTS, Verdict, error_statistics, first_time, outside_envelope, run_verdict
from linz_ros.runtime.watchdogs import WatchdogConfig

__all__ = ["SimSettings", "SimResult", "simulate", "INITIAL_STATE", "fit_decay_rate", "INTEGRATORS", "VERDICTS", "Verdict",
           "run_verdict", "outside_envelope", "MAX_SIM_STEPS", "MAX_SUBSTEPS", "ACTED_MODES"]

INTEGRATORS = ("rk4", "scipy")


@dataclass
class SimSettings:
    """How to run the closed loop.

    Attributes
    ----------
    duration : float
        Seconds of simulated time.
    reference : Reference, optional
        Default: hold the outputs at their initial values.
    initial : sequence of float, optional
        Initial state (default: the plant's operating point).
    plant_parameters : sequence of float, optional
        Parameters of the simulated plant (default nominal; see ``mismatched_parameters``).
    noise : sequence of float, optional
        Standard deviation of Gaussian sensor noise per state.
    delay : float
        Input delay in seconds (the command computed at t_k acts from t_k + delay).
    substeps : int
        RK4 steps per control period.
    integrator : {"rk4", "scipy"}
    config : WatchdogConfig, optional
    seed : int
        Of the noise.
    backend : {"native", "python"}
        Of the control step and the plant (:mod:`linz_ros.runtime.native`); ``native`` falls
        back to Python with a note where it cannot be built.
    physics : {"model", "mujoco"}
        The plant: our integrator of the artifact's dynamics, or MuJoCo on the artifact's URDF
        (:mod:`linz_ros.runtime.physics`; its own RK4, ``substeps`` steps a period).
    """

    duration: float = 5.0
    reference: Reference | None = None
    initial: Sequence[float] | None = None
    plant_parameters: Sequence[float] | None = None
    noise: Sequence[float] | None = None
    delay: float = 0.0
    substeps: int = 4
    integrator: str = "rk4"
    config: WatchdogConfig | None = None
    seed: int = 1
    backend: str = "native"
    physics: str = "model"


@dataclass
class SimResult:
    """Sampled signals of one closed-loop run (row k is the sampling instant t_k).

    ``damping``, ``warn`` and ``alarms`` are those of the per-step record (None where the
    run did not record them); ``x_measured`` is the state the controller used.
    """

    artifact: Artifact
    reference: Reference
    t: np.ndarray
    x: np.ndarray
    x_measured: np.ndarray
    ref: np.ndarray
    y: np.ndarray
    u: np.ndarray
    sigma_min: np.ndarray
    condition: np.ndarray
    mode: list[str]
    reason: list[str]
    saturated: np.ndarray
    compute_time: np.ndarray
    diverged_at: float | None = None
    ref_state: np.ndarray | None = None
    notes: list[str] = field(default_factory=list)
    alarms: np.ndarray | None = None
    config: WatchdogConfig | None = None
    damping: np.ndarray | None = None
    warn: np.ndarray | None = None
    backend: tuple[str, str] | None = None      # (step, plant) of an offline run; None for a record of a field run
    physics: str | None = None                  # "model" or "mujoco" of an offline run; None for a field run
    wall_seconds: float = 0.0

    @property
    def period(self) -> float:
        """The control period."""
        return 1.0 / self.artifact.rate

    def reference_values(self) -> np.ndarray:
        """y_ref of each chain (K x p), without the derivatives."""
        columns, j = [], 0
        for r in self.artifact.relative_degree:
            columns.append(self.ref[:, j])
            j += r + 1
        return np.column_stack(columns)

    def errors(self) -> np.ndarray:
        """Tracking error y - y_ref of each chain (K x p)."""
        return self.y - self.reference_values()

    def summary(self) -> dict:
        """The ``linz sim --json`` object: tracking, conditioning, modes, saturation, cost.

        Returns
        -------
        dict
        """
        errors = self.errors()
        T = self.period
        verdict = run_verdict(self)
        outputs = {}
        for i, name in enumerate(self.artifact.outputs):
            e = errors[:, i]
            finite = np.isfinite(e)
            outputs[name] = {
                **error_statistics(e),
                "unit": self.artifact.signal_units.get(name),
                # a decay rate means something only when the error did decay
                "decay_rate": fit_decay_rate(self.t[finite], e[finite]) if verdict.word == "tracked" else None,
            }
        sigma = self.sigma_min[np.isfinite(self.sigma_min)]
        condition = self.condition[np.isfinite(self.condition)]
        reasons: dict[str, int] = {}
        for r in self.reason:
            reasons[r] = reasons.get(r, 0) + 1
        return {
            "plant": self.artifact.name,
            "verdict": verdict.word,
            "verdict_at": verdict.at,
            "verdict_detail": verdict.detail,
            "duration": float(self.t[-1] - self.t[0]) if len(self.t) else 0.0,
            "rate": self.artifact.rate,
            "steps": len(self.t),
            "outputs": outputs,
            "min_sigma": float(sigma.min()) if sigma.size else None,
            "max_condition": float(condition.max()) if condition.size else None,
            "time_in_mode": {m: float(sum(1 for x in self.mode if x == m) * T) for m in MODES},
            "saturated_fraction": {u: float(np.mean(self.saturated[:, j])) if len(self.t) else 0.0
                                   for j, u in enumerate(self.artifact.plant_inputs)},
            "reasons": reasons,
            "compute_time_us": {"p50": float(np.percentile(self.compute_time, 50) * 1e6),
                                "p99": float(np.percentile(self.compute_time, 99) * 1e6),
                                "max": float(np.max(self.compute_time) * 1e6)} if len(self.t) else None,
            # the verdict's time when it is "diverged" (state not finite, or the divergence watchdog)
            "diverged_at": verdict.at if verdict.word == "diverged" else None,
            "non_finite_at": self.diverged_at,
            "alarm_steps": {name: int(np.count_nonzero(self.alarm_mask() >> bit & 1))
                            for bit, name in enumerate(ALARMS)},
            "backend": None if self.backend is None else {"step": self.backend[0], "plant": self.backend[1]},
            "physics": self.physics,
            # wall-clock speed of this run on this machine: reported, never judged
            "steps_per_second": (float(len(self.t) / self.wall_seconds) if self.wall_seconds > 0 else None),
            "notes": list(self.notes),
        }

    def alarm_mask(self) -> np.ndarray:
        """Per step, the alarm bits of the record (see ``runtime.ALARMS``).

        Returns
        -------
        numpy.ndarray
            Integers; derived from the reasons for results read from older logs.
        """
        if self.alarms is not None:
            return np.asarray(self.alarms, dtype=int)
        return alarms_from_reasons(self.reason)

    def write_csv(self, path: str | Path) -> Path:
        """Write every sampled signal as one CSV row per control step (``steprecord.write_csv``).

        Parameters
        ----------
        path : str or pathlib.Path

        Returns
        -------
        pathlib.Path
        """
        a = self.artifact
        return write_csv(path, vars(self), a.states, a.outputs, a.plant_inputs, a.relative_degree)


def fit_decay_rate(t: np.ndarray, error: np.ndarray, upper: float = 1e-1, lower: float = 1e-4,
                   floor: float = 1e-10) -> float | None:
    """Exponential decay rate of an error, fitted to its upper envelope.

    The envelope is ``max_{s >= t} |e(s)|`` from the largest error on; the rate is minus
    the least-squares slope of its logarithm where it lies between ``lower`` and
    ``upper`` times its peak (and above ``floor``), so the initial transient and the
    noise floor are left out.

    Parameters
    ----------
    t, error : numpy.ndarray
    upper, lower : float
        Window, relative to the peak.
    floor : float
        Absolute level below which the envelope is rounding noise.

    Returns
    -------
    float or None
        1/s; None when the error does not decay through the window (at least five points).

    Examples
    --------
    >>> t = np.linspace(0, 3, 301)
    >>> round(fit_decay_rate(t, np.exp(-4 * t)), 6)
    4.0
    """
    if len(t) < 5:
        return None
    magnitude = np.abs(np.asarray(error, dtype=float))
    start = int(np.argmax(magnitude))
    peak = magnitude[start]
    if not peak > floor:
        return None
    envelope = np.maximum.accumulate(magnitude[start:][::-1])[::-1]
    times = np.asarray(t, dtype=float)[start:]
    window = (envelope <= upper * peak) & (envelope >= max(lower * peak, floor))
    if np.count_nonzero(window) < 5:
        return None
    slope = np.polyfit(times[window], np.log(envelope[window]), 1)[0]
    return float(-slope)


#: Most control steps one offline run may take (every step is kept in memory, about 1 kB).
MAX_SIM_STEPS = 10_000_000
#: Most RK4 sub-steps per control period, and in one run (four evaluations of f each).
MAX_SUBSTEPS = 1000
MAX_RUN_SUBSTEPS = 4 * MAX_SIM_STEPS


def _check_settings(artifact: Artifact, settings: SimSettings) -> None:
    n = len(artifact.states)
    if not (math.isfinite(settings.duration) and settings.duration > 0):
        raise ConfigError("--duration", f"expected a positive number of seconds, got {settings.duration}")
    if settings.duration * artifact.rate > MAX_SIM_STEPS:
        raise ConfigError("--duration", f"{settings.duration:g} s at {artifact.rate:g} Hz is more than "
                                        f"{MAX_SIM_STEPS:,} control steps; run it in parts")
    if settings.backend not in BACKENDS:
        raise ConfigError("--backend", f"expected one of {', '.join(BACKENDS)}, got {settings.backend!r}")
    if settings.integrator not in INTEGRATORS:
        raise ConfigError("--integrator", f"expected one of {', '.join(INTEGRATORS)}, got {settings.integrator!r}")
    if settings.physics == "mujoco" and settings.integrator != "rk4":
        raise ConfigError("--integrator", f"{settings.integrator} integrates the model physics only; mujoco steps "
                                          "with its own RK4 (set --substeps)")
    if not (isinstance(settings.substeps, int) and 1 <= settings.substeps <= MAX_SUBSTEPS):
        raise ConfigError("--substeps", f"expected a whole number from 1 to {MAX_SUBSTEPS}, got {settings.substeps}")
    if settings.integrator == "rk4" and settings.duration * artifact.rate * settings.substeps > MAX_RUN_SUBSTEPS:
        raise ConfigError("--substeps", f"{settings.substeps} sub-steps for each of {settings.duration * artifact.rate:,.0f} "
                                        f"control steps is more than {MAX_RUN_SUBSTEPS:,} RK4 steps; run it in parts")
    if not (math.isfinite(settings.delay) and settings.delay >= 0):
        raise ConfigError("--delay", f"expected a number of seconds >= 0, got {settings.delay}")
    if settings.delay > settings.duration:
        raise ConfigError("--delay", f"{settings.delay:g} s is longer than the run ({settings.duration:g} s)")
    if settings.initial is not None and len(settings.initial) != n:
        raise ConfigError("--initial", f"expected {n} values")
    if settings.noise is not None and (len(settings.noise) != n or any(not (s >= 0) for s in settings.noise)):
        raise ConfigError("--noise", f"expected {n} standard deviations >= 0")
    own = len(artifact.plant_states)      # a dynamic extension's compensator states follow the plant's
    unmeasured = [s for s, sigma in zip(artifact.states[own:], list(settings.noise or ())[own:]) if sigma]
    if unmeasured:
        raise ConfigError("--noise", f"{unmeasured[0]} is the controller's own compensator state, not measured")


def simulate(artifact: Artifact, settings: SimSettings | None = None,
             progress: Callable[[float], None] | None = None, field_log: Any = None) -> SimResult:
    """Run the sampled closed loop.

    Parameters
    ----------
    artifact : Artifact
    settings : SimSettings, optional
    progress : callable, optional
        Called with the fraction done (0..1) every few hundred steps.
    field_log : FieldLogWriter, optional
        Every step's record goes to it as the controller node would write it (log times
        count from the start of the run on the wall clock).

    Returns
    -------
    SimResult
        Stops early (``diverged_at`` set) if the plant's state stops being finite.

    Raises
    ------
    ConfigError
        For settings out of range.
    """
    settings = settings or SimSettings()
    _check_settings(artifact, settings)
    core, core_note = make_core(artifact, settings.config, backend=settings.backend)
    plant, plant_note = make_physics_plant(artifact, settings.physics, settings.plant_parameters, settings.backend,
                                           field="--physics", mismatch_field="--mismatch")
    start = [float(v) for v in (settings.initial if settings.initial is not None else artifact.operating_point)]
    x, compensator = start[:plant.n], start[plant.n:] or None   # a dynamic extension's compensator starts here
    if compensator is not None:
        core.reset(compensator)
    reference = settings.reference
    if reference is None:
        reference = make_reference("hold", artifact.relative_degree, initial_outputs(core, x))
    if reference.size != core.reference_size:
        raise ConfigError("--reference", f"expected a reference for chains of degrees {artifact.relative_degree}")
    T = 1.0 / artifact.rate
    steps = int(math.floor(settings.duration / T + 1e-9)) + 1
    delay_periods = int(math.floor(settings.delay / T + 1e-12))
    fraction = settings.delay - delay_periods * T
    rng = np.random.default_rng(settings.seed)
    noise = np.asarray(settings.noise, dtype=float) if settings.noise is not None else None
    n, m = plant.n, plant.m
    zero = [0.0] * m
    rows: list[list[float]] = []          # each step's record as the field log writes it (state included)
    xs: list[list[float]] = []
    refs: list[list[float]] = []
    ys: list[list[float]] = []
    commands: list[list[float]] = []
    no_outputs, diverged_at, budget_note = [math.nan] * len(core.orders), None, None
    report_every = max(1, steps // 200)
    log_start = time.time_ns()
    ref_offsets = [sum(r + 1 for r in core.orders[:i]) for i in range(len(core.orders))]
    started = time.perf_counter()
    for k in range(steps):
        t = k * T
        measured = list(x) if noise is None else (np.asarray(x) + rng.normal(0.0, noise[:n])).tolist()
        ref = reference.sample(t)
        u, record = core.step(measured, ref, t)
        if compensator is not None:       # logged beside the state: the compensator this step used
            compensator = list(core.last_extended_state[n:])
        values = encode(record, [ref[i] for i in ref_offsets], u, no_outputs,
                        measured if compensator is None else measured + compensator)
        if field_log is not None:
            field_log.put(values, log_start + int(round(t * 1e9)))
        rows.append(values)
        commands.append(u)
        xs.append(list(x) if compensator is None else list(x) + compensator)
        refs.append(ref)
        ys.append(_outputs_of(core, x))
        if progress is not None and k % report_every == 0:
            progress(k / steps)
        if k == steps - 1:
            break
        # during (t_k, t_k+1]: the command issued delay_periods (+1 before the fraction) ago
        before = commands[k - delay_periods - 1] if k - delay_periods - 1 >= 0 else zero
        after = commands[k - delay_periods] if k - delay_periods >= 0 else zero
        try:
            x = advance_period(plant, x, (before, after), fraction, T, settings.substeps, settings.integrator)
        except IntegrationBudgetError as err:
            budget_note = f"stopped at t = {(k + 1) * T:.4g} s: {err}"
            x = [math.nan] * n
        except (ArithmeticError, ValueError):
            x = [math.nan] * n
        if not all(math.isfinite(v) for v in x):
            diverged_at = (k + 1) * T
            break
    wall_seconds = time.perf_counter() - started
    if progress is not None:
        progress(1.0)
    fields = decode(rows, record_labels(artifact, states=True)).result_fields(artifact.relative_degree,
                                                                              from_zero=False)
    fields.update(x=np.array(xs), ref=np.array(refs), y=np.array(ys))   # the true state, y at it, y_ref's derivatives
    result = SimResult(artifact=artifact, reference=reference, diverged_at=diverged_at, config=core.config, **fields)
    if artifact.kind == "input_state":
        result.ref_state = _reference_states(artifact, result.ref)
    _note_alarms(result)
    _note_slow_steps(result)
    result.backend, result.wall_seconds, result.physics = (core.backend, plant.backend), wall_seconds, settings.physics
    # MuJoCo's plant describes the engine (the version, what it models); ours need no description
    result.notes.extend(n for n in (core_note, plant_note, getattr(plant, "description", None)) if n is not None)
    if budget_note is not None:
        result.notes.append(budget_note)
    elif diverged_at is not None:
        result.notes.append(f"the plant's state stopped being finite at t = {diverged_at:.4g} s")
    return result


def _note_alarms(result: SimResult) -> None:
    """A note per watchdog alarm of the run: when first, how many steps, what was done."""
    alarms = result.alarm_mask()
    for bit, name in enumerate(ALARMS):
        first = first_time(result.t, alarms >> bit & 1)
        if first is not None:
            acted = {m for r, m in zip(result.reason, result.mode) if r == name and m in ACTED_MODES}
            done = ("stopped under control" if "stopping" in acted else "the safe command sent" if acted
                    else "warned only")
            if "stopping" in acted and "diverging" in result.reason:
                done = "a controlled stop tried, then the safe command when the stop itself diverged"
            elif "stopping" in acted and not _ended_near_envelope(result):
                done = ("a controlled stop tried, but the machine ran away: its last state is not finite or lies "
                        f"more than a full range outside the envelope (verdict {run_verdict(result).word})")
            result.notes.append(f"watchdog {name} first at t = {first:.4g} s, {int(np.count_nonzero(alarms >> bit & 1))} "
                                f"step(s), {done}")


def _note_slow_steps(result: SimResult) -> None:
    """A note when the median control step took longer than the control period (this machine, this run)."""
    if not len(result.compute_time):
        return
    median = float(np.median(result.compute_time))
    if median > result.period:
        result.notes.append(f"the control step took longer than the control period here (p50 {median * 1e6:.0f} us "
                            f"against {result.period * 1e6:.0f} us at {result.artifact.rate:g} Hz): this core cannot "
                            "keep this rate in real time on this machine")


#: A stop held the machine when its last state lies within the envelope widened by this fraction of
#: each range (a stop ends where the machine came to rest, which may be just outside the envelope).
STOP_HELD_MARGIN = 1.0


def _ended_near_envelope(result: SimResult) -> bool:
    """Whether the run's last state is finite and within :data:`STOP_HELD_MARGIN` of the envelope."""
    if not len(result.t):
        return False
    last = np.asarray(result.x[-1], dtype=float)
    return bool(np.all(np.isfinite(last)) and not outside_envelope(result.artifact, last, STOP_HELD_MARGIN)[0])


def _reference_states(artifact: Artifact, ref: np.ndarray) -> np.ndarray:
    """x_ref = T^-1(z_ref): the states the linearizing output's reference asks for."""
    transform = Transform(artifact)
    n = len(artifact.states)
    rows = []
    for values in ref:
        solution = transform.inverse(values[:n])
        rows.append(solution.x if solution.converged else [math.nan] * n)
    return np.array(rows)


#: The field :func:`initial_outputs` names; callers say where the state came from.
INITIAL_STATE = "initial state"


def initial_outputs(core: ControllerCore, x: Sequence[float]) -> list[float]:
    """The outputs at the initial state, from which references start.

    Parameters
    ----------
    core : ControllerCore
    x : sequence of float

    Returns
    -------
    list of float

    Raises
    ------
    ConfigError
        When the outputs are not defined or not finite there (field :data:`INITIAL_STATE`).
    """
    try:
        values = core.output_values([float(v) for v in x])
    except (ArithmeticError, ValueError) as err:
        raise ConfigError(INITIAL_STATE, f"the outputs are not defined at this state ({type(err).__name__}: "
                                         f"{err})") from None
    if not all(math.isfinite(v) for v in values):
        raise ConfigError(INITIAL_STATE, f"the outputs are not finite at this state ({values})")
    return values


def _outputs_of(core: ControllerCore, x: Sequence[float]) -> list[float]:
    """y_i at the true state (nan where the model is not defined there)."""
    try:
        return core.output_values(x)
    except (ArithmeticError, ValueError):
        return [math.nan] * len(core.orders)
