"""Offline closed loop: the controller core sampled at its rate against the artifact's plant.

The controller sees the state at the sampling instants t_k = k T (plus optional sensor
noise) and its command is held until the next instant (zero-order hold), optionally
delayed; between instants the plant is integrated by classical RK4 sub-steps or by
scipy's adaptive RK45. The plant may run with mismatched parameters.
"""

from __future__ import annotations

import csv
import math
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np

from linz_ros.artifact.document import Artifact
from linz_ros.errors import ConfigError
from linz_ros.runtime.core import ALARMS, MODES, ControllerCore, WatchdogConfig
from linz_ros.runtime.fieldlog import conditioning_values
from linz_ros.runtime.plant import IntegrationBudgetError, NumericPlant
from linz_ros.runtime.reference import Reference, make_reference
from linz_ros.runtime.transform import Transform

__all__ = ["SimSettings", "SimResult", "simulate", "fit_decay_rate", "INTEGRATORS", "VERDICTS", "Verdict",
           "run_verdict", "outside_envelope", "MAX_SIM_STEPS", "MAX_SUBSTEPS"]

INTEGRATORS = ("rk4", "scipy")
#: One word for how a run went, the worst first: the first that applies is the run's verdict.
VERDICTS = ("diverged", "left_envelope", "held_safe", "saturated", "not_settled", "tracked")
#: Modes in which a watchdog acted: the safe or held command, or a controlled stop.
ACTED_MODES = ("safe", "held", "stopping")
#: A run is saturated when an input sat on a limit for more than this fraction of its steps.
SATURATED_FRACTION = 0.05
#: Settled: the RMS error over the last tenth of the run is at most this fraction of the peak error
#: (or of the divergence bound, when the artifact carries one).
SETTLED_FRACTION = 0.05


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


@dataclass
class SimResult:
    """Sampled signals of one closed-loop run (row k is the sampling instant t_k)."""

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
                "rms_error": float(np.sqrt(np.mean(e[finite] ** 2))) if finite.any() else None,
                "final_error": float(abs(e[finite][-1])) if finite.any() else None,
                "max_error": float(np.max(np.abs(e[finite]))) if finite.any() else None,
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
                                   for j, u in enumerate(self.artifact.inputs)},
            "reasons": reasons,
            "compute_time_us": {"p50": float(np.percentile(self.compute_time, 50) * 1e6),
                                "p99": float(np.percentile(self.compute_time, 99) * 1e6),
                                "max": float(np.max(self.compute_time) * 1e6)} if len(self.t) else None,
            # the verdict's time when it is "diverged" (state not finite, or the divergence watchdog)
            "diverged_at": verdict.at if verdict.word == "diverged" else None,
            "non_finite_at": self.diverged_at,
            "alarm_steps": {name: int(np.count_nonzero(self.alarm_mask() >> bit & 1))
                            for bit, name in enumerate(ALARMS)},
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
        return np.array([sum(1 << bit for bit, name in enumerate(ALARMS) if reason == name)
                         for reason in self.reason], dtype=int)

    def write_csv(self, path: str | Path) -> Path:
        """Write every sampled signal as one CSV row per control step.

        Parameters
        ----------
        path : str or pathlib.Path

        Returns
        -------
        pathlib.Path
        """
        a = self.artifact
        ref_names = [f"ref_{name}" + ("_d" + str(k) if k else "") for name, r in zip(a.outputs, a.relative_degree)
                     for k in range(r + 1)]
        header = (["t"] + a.states + [f"measured_{s}" for s in a.states] + ref_names + list(a.outputs)
                  + a.inputs + ["sigma_min", "condition", "mode", "reason"] + [f"saturated_{u}" for u in a.inputs]
                  + ["compute_time_us"])
        if self.ref_state is not None:
            header += [f"ref_state_{s}" for s in a.states]
        path = Path(path)
        with path.open("w", newline="") as handle:
            writer = csv.writer(handle)
            writer.writerow(header)
            for k in range(len(self.t)):
                row = ([self.t[k]] + list(self.x[k]) + list(self.x_measured[k]) + list(self.ref[k]) + list(self.y[k])
                       + list(self.u[k]) + [self.sigma_min[k], self.condition[k], self.mode[k], self.reason[k]]
                       + [int(v) for v in self.saturated[k]] + [self.compute_time[k] * 1e6])
                if self.ref_state is not None:
                    row += list(self.ref_state[k])
                writer.writerow([f"{v:.10g}" if isinstance(v, (float, np.floating)) else v for v in row])
        return path


@dataclass(frozen=True)
class Verdict:
    """How a run went, in one word of :data:`VERDICTS`, when it first happened and why."""

    word: str
    at: float | None
    detail: str


def outside_envelope(artifact: Artifact, x: np.ndarray, margin: float = 0.0) -> np.ndarray:
    """Per row of states, whether a bounded state lies outside the envelope widened by ``margin``.

    Parameters
    ----------
    artifact : Artifact
    x : numpy.ndarray
        K x n states.
    margin : float
        Fraction of each state's range added on both sides.

    Returns
    -------
    numpy.ndarray
        K booleans.
    """
    x = np.asarray(x, dtype=float).reshape(-1, len(artifact.states))
    outside = np.zeros(x.shape[0], dtype=bool)
    # the core's own rule for the widened envelope
    for i, lo, hi in WatchdogConfig.from_artifact(artifact).widened_envelope(margin):
        with np.errstate(invalid="ignore"):      # nan (a refused state) is not outside
            outside |= (x[:, i] < lo) | (x[:, i] > hi)
    return outside


def _first_time(t: np.ndarray, flags: np.ndarray) -> float | None:
    hits = np.flatnonzero(flags)
    return float(t[hits[0]]) if hits.size else None


def run_verdict(result: "SimResult") -> Verdict:
    """The run's verdict: the first of :data:`VERDICTS` that applies, and when it first did.

    - ``diverged``: the plant's state stopped being finite, or the divergence watchdog tripped;
    - ``left_envelope``: the true state left the envelope widened by the watchdog's margin,
      or the envelope watchdog tripped on the measured state;
    - ``held_safe``: the controller sent the safe (or held) command at some step;
    - ``saturated``: an input sat on a limit for more than 5 % of the steps;
    - ``not_settled``: the RMS error over the last tenth of the run is above 5 % of the
      peak error (or of the divergence bound);
    - ``tracked``: none of these.

    Parameters
    ----------
    result : SimResult

    Returns
    -------
    Verdict
    """
    t = result.t
    alarms = result.alarm_mask()
    if result.diverged_at is not None:
        return Verdict("diverged", result.diverged_at, "the plant's state stopped being finite")
    diverging = (alarms >> 1 & 1).astype(bool)
    margin = (result.config or WatchdogConfig.from_artifact(result.artifact)).envelope_margin
    left = outside_envelope(result.artifact, result.x, margin) | (alarms & 1).astype(bool)
    if diverging.any():
        left_at = _first_time(t, left)
        before = (f"; it left the envelope first, at t = {left_at:.4g} s"
                  if left_at is not None and left_at < _first_time(t, diverging) else "")
        return Verdict("diverged", _first_time(t, diverging), "the tracking error grew past its bound "
                                                              "(divergence watchdog)" + before)
    if left.any():
        k = int(np.flatnonzero(left)[0])
        return Verdict("left_envelope", float(t[k]), _envelope_detail(result, k, margin))
    unsafe = np.array([m in ("safe", "held") for m in result.mode], dtype=bool)
    if unsafe.any():
        k = int(np.flatnonzero(unsafe)[0])
        return Verdict("held_safe", float(t[k]), f"{int(unsafe.sum())} step(s) sent the safe or held command, "
                                                 f"the first for {result.reason[k]}")
    if len(t) and result.saturated.size:
        fractions = result.saturated.mean(axis=0)
        worst = int(np.argmax(fractions))
        if fractions[worst] > SATURATED_FRACTION:
            return Verdict("saturated", _first_time(t, result.saturated[:, worst]),
                           f"{result.artifact.inputs[worst]} saturated {100 * fractions[worst]:.0f} % of the time")
    unsettled = _unsettled_outputs(result)
    if unsettled:
        return Verdict("not_settled", None, "the error has not settled: " + ", ".join(unsettled))
    return Verdict("tracked", None, "tracked the reference")


def _envelope_detail(result: "SimResult", k: int, margin: float) -> str:
    envelope = result.artifact.envelope
    for i, name in enumerate(result.artifact.states):
        if name in envelope:
            lo, hi = envelope[name]
            value = result.x[k, i]
            extra = margin * (hi - lo)
            if not lo - extra <= value <= hi + extra:
                return (f"{name} = {value:.4g} outside its envelope [{lo:g}, {hi:g}] widened by "
                        f"{100 * margin:g} %")
    return "the envelope watchdog tripped on the measured state"


def _unsettled_outputs(result: "SimResult") -> list[str]:
    errors = result.errors()
    if len(result.t) < 10:
        return []
    tail = max(1, len(result.t) // 10)
    bounds = result.artifact.watchdog.get("divergence_error") or [None] * errors.shape[1]
    names = []
    for i, name in enumerate(result.artifact.outputs):
        e = errors[:, i]
        finite = e[np.isfinite(e)]
        if finite.size < 10:
            continue
        peak = float(np.max(np.abs(finite)))
        rms_tail = float(np.sqrt(np.mean(finite[-tail:] ** 2)))
        scale = max(peak, bounds[i] or 0.0)
        if rms_tail > max(SETTLED_FRACTION * scale, 1e-9):
            names.append(f"{name} (RMS {rms_tail:.3g} over the last tenth, peak {peak:.3g})")
    return names


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
    if settings.integrator not in INTEGRATORS:
        raise ConfigError("--integrator", f"expected one of {', '.join(INTEGRATORS)}, got {settings.integrator!r}")
    if not (isinstance(settings.substeps, int) and 1 <= settings.substeps <= MAX_SUBSTEPS):
        raise ConfigError("--substeps", f"expected a whole number from 1 to {MAX_SUBSTEPS}, got {settings.substeps}")
    if settings.integrator == "rk4" and settings.duration * artifact.rate * settings.substeps > MAX_RUN_SUBSTEPS:
        raise ConfigError("--substeps", f"{settings.substeps} sub-steps for each of {settings.duration * artifact.rate:,.0f} "
                                        f"control steps is more than {MAX_RUN_SUBSTEPS:,} RK4 steps; run it in parts")
    if not (math.isfinite(settings.delay) and settings.delay >= 0):
        raise ConfigError("--delay", f"expected a number of seconds >= 0, got {settings.delay}")
    if settings.delay > settings.duration:
        raise ConfigError("--delay", f"{settings.delay:g} s is longer than the run ({settings.duration:g} s): no "
                                     "command would arrive")
    if settings.initial is not None and len(settings.initial) != n:
        raise ConfigError("--initial", f"expected {n} values")
    if settings.noise is not None and (len(settings.noise) != n or any(not (s >= 0) for s in settings.noise)):
        raise ConfigError("--noise", f"expected {n} standard deviations >= 0")


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
    core = ControllerCore(artifact, settings.config)
    plant = NumericPlant(artifact, settings.plant_parameters)
    x = [float(v) for v in (settings.initial if settings.initial is not None else artifact.operating_point)]
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
    records = {"t": [], "x": [], "xm": [], "ref": [], "y": [], "u": [], "s": [], "c": [], "mode": [],
               "reason": [], "sat": [], "ct": [], "alarms": []}
    commands: list[list[float]] = []
    diverged_at = None
    report_every = max(1, steps // 200)
    budget_note = None
    log_start = time.time_ns()
    ref_offsets = [sum(r + 1 for r in core.orders[:i]) for i in range(len(core.orders))]
    for k in range(steps):
        t = k * T
        measured = list(x) if noise is None else (np.asarray(x) + rng.normal(0.0, noise)).tolist()
        ref = reference.sample(t)
        u, record = core.step(measured, ref, t)
        if field_log is not None:
            values = conditioning_values(record, [ref[i] for i in ref_offsets], u, [math.nan] * len(ref_offsets))
            field_log.put(values + list(measured), log_start + int(round(t * 1e9)))
        commands.append(u)
        records["t"].append(t)
        records["x"].append(list(x))
        records["xm"].append(measured)
        records["ref"].append(ref)
        records["y"].append(_outputs_of(core, x))
        records["u"].append(u)
        records["s"].append(record.sigma_min)
        records["c"].append(record.condition)
        records["mode"].append(record.mode)
        records["reason"].append(record.reason)
        records["sat"].append(record.saturated)
        records["ct"].append(record.compute_time)
        records["alarms"].append(record.alarms)
        if progress is not None and k % report_every == 0:
            progress(k / steps)
        if k == steps - 1:
            break
        # during (t_k, t_k+1]: the command issued delay_periods (+1 before the fraction) ago
        before = commands[k - delay_periods - 1] if k - delay_periods - 1 >= 0 else zero
        after = commands[k - delay_periods] if k - delay_periods >= 0 else zero
        try:
            x = _advance(plant, x, before, after, fraction, T, settings)
        except IntegrationBudgetError as err:
            budget_note = f"stopped at t = {(k + 1) * T:.4g} s: {err}"
            x = [math.nan] * n
        except (ArithmeticError, ValueError):
            x = [math.nan] * n
        if not all(math.isfinite(v) for v in x):
            diverged_at = (k + 1) * T
            break
    if progress is not None:
        progress(1.0)
    result = SimResult(
        artifact=artifact, reference=reference, t=np.array(records["t"]), x=np.array(records["x"]),
        x_measured=np.array(records["xm"]), ref=np.array(records["ref"]), y=np.array(records["y"]),
        u=np.array(records["u"]), sigma_min=np.array(records["s"]), condition=np.array(records["c"]),
        mode=records["mode"], reason=records["reason"], saturated=np.array(records["sat"], dtype=bool),
        compute_time=np.array(records["ct"]), diverged_at=diverged_at, alarms=np.array(records["alarms"], dtype=int),
        config=core.config)
    if artifact.kind == "input_state":
        result.ref_state = _reference_states(artifact, result.ref)
    alarms = result.alarm_mask()
    for bit, name in enumerate(ALARMS):
        first = _first_time(result.t, alarms >> bit & 1)
        if first is not None:
            acted = {m for r, m in zip(result.reason, result.mode) if r == name and m in ACTED_MODES}
            done = ("stopped under control" if "stopping" in acted else "the safe command sent" if acted
                    else "warned only")
            if "stopping" in acted and "diverging" in result.reason:
                done = "a controlled stop tried, then the safe command when the stop itself diverged"
            result.notes.append(f"watchdog {name} first at t = {first:.4g} s, {int(np.count_nonzero(alarms >> bit & 1))} "
                                f"step(s), {done}")
    if budget_note is not None:
        result.notes.append(budget_note)
    elif diverged_at is not None:
        result.notes.append(f"the plant's state stopped being finite at t = {diverged_at:.4g} s")
    return result


def _reference_states(artifact: Artifact, ref: np.ndarray) -> np.ndarray:
    """x_ref = T^-1(z_ref): the states the linearizing output's reference asks for."""
    transform = Transform(artifact)
    n = len(artifact.states)
    rows = []
    for values in ref:
        solution = transform.inverse(values[:n])
        rows.append(solution.x if solution.converged else [math.nan] * n)
    return np.array(rows)


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
        When the outputs are not defined or not finite there (``--initial``).
    """
    try:
        values = core.output_values([float(v) for v in x])
    except (ArithmeticError, ValueError) as err:
        raise ConfigError("--initial", f"the outputs are not defined at this state ({type(err).__name__}: "
                                       f"{err})") from None
    if not all(math.isfinite(v) for v in values):
        raise ConfigError("--initial", f"the outputs are not finite at this state ({values})")
    return values


def _outputs_of(core: ControllerCore, x: Sequence[float]) -> list[float]:
    """y_i at the true state (nan where the model is not defined there)."""
    try:
        return core.output_values(x)
    except (ArithmeticError, ValueError):
        return [math.nan] * len(core.orders)


def _advance(plant: NumericPlant, x: list[float], before: list[float], after: list[float], fraction: float,
             T: float, settings: SimSettings) -> list[float]:
    """One control period: ``before`` acts for ``fraction`` seconds, then ``after``."""
    segments = [(fraction, before), (T - fraction, after)] if fraction > 0 else [(T, after)]
    for length, u in segments:
        if length <= 0:
            continue
        if settings.integrator == "scipy":
            x = plant.adaptive(x, u, length)
        else:
            steps = max(1, int(round(settings.substeps * length / T)))
            x = plant.rk4(x, u, length / steps, steps)
    return x
