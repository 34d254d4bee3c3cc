"""Over 500 lines because every part of one log's summary shares the episode and time rules here.

What a field log says: near-singular and saturation episodes, mode switches, refused
states, dropped records and compute-time percentiles.

An episode is a maximal run of consecutive records that meet a condition (sigma_min under
a level, an input saturated, a state refused for one reason). Its duration runs from its
first record's time to the first record after it (to its last record's time plus one
median period at the end of the log), so a one-record episode lasts one period.
"""

from __future__ import annotations

import functools
import math
from dataclasses import asdict, dataclass
from typing import Any, Callable, TypeVar

import numpy as np

from linz_ros.artifact import Artifact
from linz_ros.logs.reader import LogError, StepLog, metadata_json
from linz_ros.errors import LinzError
from linz_ros.runtime import ALARMS, MODES, REASONS, SimResult
from linz_ros.runtime.steprecord import ACTED_MODES, codes, saturation_bits
from linz_ros.runtime.verdict import Verdict, error_statistics, run_verdict

__all__ = ["Episode", "Thresholds", "as_sim_result", "control_gaps", "episodes", "gap_ends", "summarise",
           "thresholds_of", "log_verdict", "tracking", "near_singular_masks", "record_durations"]

_REFUSED = ("wrong_length", "non_finite_state", "bad_reference", "bad_time", "out_of_order", "stale",
            "future_stamp", "model_not_finite", "non_finite_command", "no_state", "bad_message")
#: Every watchdog alarm of the runtime (envelope, divergence), acted on or only flagged.
_ALARMS = ALARMS
#: Episodes listed in full in a summary (the longest first); the counts cover all of them.
LISTED = 20
_F = TypeVar("_F", bound=Callable[..., Any])


def _quiet_nonfinite(function: _F) -> _F:
    """Run ``function`` without numpy's warnings on nan and inf arithmetic.

    A log holds nan (refused states, damaged records) and inf (a singular step, a bad
    stamp); every result derived from them is filtered where it is used, so the warnings
    would only clutter the summary.
    """
    @functools.wraps(function)
    def quiet(*args: Any, **kwargs: Any) -> Any:
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            return function(*args, **kwargs)
    return quiet  # type: ignore[return-value]


def _mode_name(code: int) -> str:
    return MODES[code] if 0 <= code < len(MODES) else "unknown"


@dataclass(frozen=True)
class Thresholds:
    """The watchdog levels a log is read against, and where they came from."""

    sigma_warn: float
    sigma_act: float
    sigma_stop: float
    source: str


@dataclass
class Episode:
    """A run of consecutive records meeting one condition.

    Attributes
    ----------
    kind : str
        ``under_warn``, ``under_act``, ``saturated`` or ``refused``.
    detail : str
        The input (saturated) or the reason (refused); empty otherwise.
    start, duration : float
        Seconds (record time).
    records : int
    min_sigma : float
        Smallest sigma_min in the episode (nan when none was computed).
    worst_time : float
        Time of the smallest sigma_min.
    state_at_worst : dict of str to float
        The state at that record (empty when the log has no state).
    modes : dict of str to int
        Records per controller mode in the episode.
    """

    kind: str
    detail: str
    start: float
    duration: float
    records: int
    min_sigma: float
    worst_time: float
    state_at_worst: dict[str, float]
    modes: dict[str, int]


def thresholds_of(log: StepLog, artifact: Artifact | None = None) -> Thresholds | None:
    """The watchdog levels: as recorded in the log, else the artifact's, else None.

    Parameters
    ----------
    log : StepLog
    artifact : Artifact, optional

    Returns
    -------
    Thresholds or None
    """
    recorded = log.metadata.get("linz_watchdog", {})
    try:
        levels = [float(recorded[key]) for key in ("sigma_warn", "sigma_act", "sigma_stop")]
    except (KeyError, ValueError):
        levels = []
    if levels and all(math.isfinite(v) for v in levels):       # "nan" and "1e999" read as floats too
        return Thresholds(*levels, "recorded in the log")
    if artifact is not None:
        w = artifact.watchdog
        return Thresholds(float(w["sigma_warn"]), float(w["sigma_act"]), float(w["sigma_stop"]),
                          f"artifact {artifact.source}")
    return None


def runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """Maximal runs of True in ``mask`` as ``(first, last)`` index pairs (inclusive).

    Parameters
    ----------
    mask : numpy.ndarray of bool

    Returns
    -------
    list of (int, int)
    """
    padded = np.concatenate(([False], np.asarray(mask, dtype=bool), [False]))
    edges = np.flatnonzero(np.diff(padded.astype(np.int8)))
    return [(int(a), int(b) - 1) for a, b in zip(edges[::2], edges[1::2])]


def _finite_times(t: np.ndarray) -> np.ndarray:
    """Step times with each non-finite one (a refused bad stamp) replaced by the finite time before it."""
    finite = np.isfinite(t)
    if finite.all() or not finite.any():
        return np.where(finite, t, 0.0)
    last = np.maximum.accumulate(np.where(finite, np.arange(len(t)), -1))
    first = int(np.argmax(finite))
    return t[np.where(last >= 0, last, first)]


def _period(t: np.ndarray) -> float:
    with np.errstate(invalid="ignore", over="ignore"):
        steps = np.diff(t)
    steps = steps[np.isfinite(steps) & (steps > 0)]
    return float(np.median(steps)) if len(steps) else 0.0


@_quiet_nonfinite
def record_durations(t: np.ndarray) -> np.ndarray:
    """Each record's time up to the next (the last: one median period); a summary's ``duration`` is their sum.

    A non-finite time counts as the one before it (as in :func:`episodes`), a step back as zero.

    Parameters
    ----------
    t : numpy.ndarray
        Step times.

    Returns
    -------
    numpy.ndarray
    """
    times = _finite_times(np.asarray(t, dtype=float))
    steps = np.diff(times, append=times[-1:] + _period(np.asarray(t, dtype=float)))
    return np.where(np.isfinite(steps) & (steps > 0), steps, 0.0)


@_quiet_nonfinite
def episodes(log: StepLog, mask: np.ndarray, kind: str, detail: str = "") -> list[Episode]:
    """The episodes where ``mask`` holds.

    A record whose time is not finite (a refused bad stamp) counts at the time of the
    record before it, so every start and duration is a number.

    Parameters
    ----------
    log : StepLog
    mask : numpy.ndarray of bool
        One entry per record.
    kind, detail : str

    Returns
    -------
    list of Episode
    """
    t = _finite_times(log.column("t"))
    sigma = log.column("sigma_min")
    mode = codes(log.column("mode"), len(MODES))
    states = log.names("x")
    x = log.block("x")
    period = _period(t)
    out = []
    for first, last in runs(mask):
        end = t[last + 1] if last + 1 < len(t) else t[last] + period
        window = sigma[first:last + 1]
        finite = np.isfinite(window)
        if finite.any():
            worst = first + int(np.argmin(np.where(finite, window, np.inf)))
            min_sigma = float(sigma[worst])
        else:
            worst, min_sigma = first, math.nan
        found, counts = np.unique(mode[first:last + 1], return_counts=True)
        out.append(Episode(kind, detail, float(t[first]), float(max(end - t[first], 0.0)), last - first + 1,
                           min_sigma, float(t[worst]),
                           {s: float(v) for s, v in zip(states, x[worst])} if states else {},
                           {MODES[c]: int(n) for c, n in zip(found, counts) if 0 <= c < len(MODES)}))
    return out


def _episode_group(found: list[Episode]) -> dict[str, Any]:
    longest = sorted(found, key=lambda e: -e.duration)[:LISTED]
    return {"count": len(found), "total_time": float(sum(e.duration for e in found)),
            "longest": float(longest[0].duration) if longest else 0.0,
            "episodes": [_jsonable(asdict(e)) for e in sorted(longest, key=lambda e: e.start)]}


def _jsonable(value: Any) -> Any:
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: _jsonable(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_jsonable(v) for v in value]
    return value


def _percentiles(values: np.ndarray) -> dict[str, float | None]:
    values = values[np.isfinite(values)]
    if not len(values):
        return {k: None for k in ("p50", "p90", "p99", "p99.9", "max")}
    p = np.percentile(values, [50, 90, 99, 99.9])
    return {"p50": float(p[0]), "p90": float(p[1]), "p99": float(p[2]), "p99.9": float(p[3]),
            "max": float(values.max())}


def mode_switches(log: StepLog) -> list[tuple[float, str, str]]:
    """Every change of controller mode as ``(time, from, to)`` (``unknown`` for a damaged code)."""
    mode = codes(log.column("mode"), len(MODES))
    t = log.column("t")
    changed = np.flatnonzero(mode[1:] != mode[:-1]) + 1
    return [(float(t[i]), _mode_name(mode[i - 1]), _mode_name(mode[i])) for i in changed]


def sequence_gaps(log: StepLog) -> int:
    """Records missing between consecutive sequence numbers of a field log (0 for bags)."""
    seq = log.sequence
    if not len(seq) or (seq < 0).all():
        return 0
    seq = seq[seq >= 0].astype(np.int64)
    steps = np.diff(seq)
    # a step back is a new writer (another run, or the writer restarted), unless it wraps at 2^32
    wrapped = (steps < 0) & (seq[:-1] > 2**32 - 2**20)
    steps = np.where(wrapped, steps % 2**32, steps)
    return int(np.sum(steps[steps > 1] - 1))


LATE_PERIODS = 5.0     # a step this many median periods after the one before it ends a control-loop gap


@_quiet_nonfinite
def control_gaps(log: StepLog, periods: float = LATE_PERIODS) -> dict[str, Any]:
    """Gaps in the control loop: consecutive steps more than ``periods`` median periods apart.

    A gap means no state reached the controller for that long (a starved or late sensor,
    a busy machine); the command was held meanwhile.

    Parameters
    ----------
    log : StepLog
    periods : float

    Returns
    -------
    dict
        ``count``, ``longest_s`` (the longest interval between steps), ``periods`` and
        ``ends``: the times of the steps that end each gap (the first 20).
    """
    t = log.column("t")
    steps = np.diff(t)
    ends = gap_ends(t, periods)
    steps = steps[~np.isnan(steps)]
    return {"count": int(len(ends)), "longest_s": float(steps.max()) if len(steps) else 0.0,
            "periods": periods, "ends": [float(e) for e in ends[:LISTED]]}


@_quiet_nonfinite
def gap_ends(t: np.ndarray, periods: float = LATE_PERIODS) -> np.ndarray:
    """Times of every step that ends a control-loop gap (see :func:`control_gaps`), unlisted.

    Parameters
    ----------
    t : numpy.ndarray
        Step times.
    periods : float

    Returns
    -------
    numpy.ndarray
    """
    period = _period(t)
    steps = np.diff(t)
    if not period > 0:
        return t[:0]
    return t[1:][np.isfinite(steps) & (steps > periods * period)]


def saturated_inputs(log: StepLog) -> np.ndarray:
    """(records, inputs) bool array from the saturation bit mask (none where the mask is damaged)."""
    return saturation_bits(log.column("saturated_mask"), len(log.names("u")))


@_quiet_nonfinite
def as_sim_result(log: StepLog, artifact: Artifact, note: str = "from the controller's field log") -> SimResult:
    """A field log as a :class:`~linz_ros.runtime.SimResult`, for the run summary, CSV and plots.

    One row per record, time from the first record. The reference carries y_ref only (the
    log does not record its derivatives, which are nan); the state is the one the step
    used (nan where the step refused it).

    Parameters
    ----------
    log : StepLog
        A field log of ``artifact``'s controller (with the ``x.*`` fields).
    artifact : Artifact
    note : str
        Kept in the result's notes.

    Returns
    -------
    SimResult

    Raises
    ------
    LogError
        When the log's outputs, inputs or states are not the artifact's.
    """
    # x: the artifact's states or, with a dynamic extension, the plant's own (a log without the compensator)
    own = log.names("x") == artifact.plant_states != artifact.states
    for prefix, names in (("y", artifact.outputs), ("u", artifact.plant_inputs), ("x", artifact.states)):
        if log.names(prefix) != list(names) and not (prefix == "x" and own):
            raise LogError(", ".join(log.files) or "log", f"its {prefix} fields {log.names(prefix)} are not "
                                                         f"those of the artifact {artifact.name} ({list(names)})")
    x = None
    if own:               # the compensator's columns unknown (nan)
        x = np.hstack([log.block("x"), np.full((len(log), len(artifact.states) - len(artifact.plant_states)), np.nan)])
    return SimResult(artifact=artifact, reference=None, notes=[note],
                     **log.decoded().result_fields(artifact.relative_degree, x=x))


def _alarm_summary(log: StepLog, t: np.ndarray, reason: np.ndarray, mode: np.ndarray) -> dict[str, Any]:
    """Per alarm of the runtime: records flagged, records acted on (safe command), first time, episodes.

    Older logs without the ``alarms`` field know only the records acted on (their reason).
    """
    flagged_bits = codes(log.column("alarms"), 4) if "alarms" in log.labels else None
    found = {}
    for bit, name in enumerate(_ALARMS):
        named = reason == REASONS.index(name)
        acted = named & np.isin(mode, [MODES.index(m) for m in ACTED_MODES])
        flagged = named if flagged_bits is None else ((np.maximum(flagged_bits, 0) >> bit) & 1).astype(bool) | named
        if flagged.any():
            found[name] = {"records": int(flagged.sum()), "acted": int(acted.sum()),
                           "first": float(t[np.flatnonzero(flagged)[0]]),
                           **_episode_group(episodes(log, flagged, "alarm", name))}
    return found


def log_verdict(log: StepLog, artifact: Artifact | None) -> Verdict | None:
    """The run verdict of a field log (the words of ``linz sim``), when its states and artifact are known.

    Parameters
    ----------
    log : StepLog
    artifact : Artifact or None

    Returns
    -------
    Verdict or None
        Its time in the log's own clock (the ``t`` field); None when the log cannot be judged.
    """
    if artifact is None or not log.names("x") or len(log) == 0:
        return None
    try:
        result = as_sim_result(log, artifact)
    except LinzError:
        return None
    verdict = run_verdict(result)
    start = float(log.column("t")[0])
    return Verdict(verdict.word, None if verdict.at is None else verdict.at + start, verdict.detail)


@_quiet_nonfinite
def tracking(log: StepLog, artifact: Artifact | None = None) -> dict[str, dict[str, Any]]:
    """Per output, the tracking error y - y_ref of the log (:func:`error_statistics`) and its unit.

    Parameters
    ----------
    log : StepLog
    artifact : Artifact, optional
        For the outputs' units (``signal_units``).

    Returns
    -------
    dict
        Output name -> ``rms_error``, ``final_error``, ``max_error``, ``unit`` (None when not
        stated); empty when the log does not record each output with its reference.
    """
    outputs = log.names("y")
    if not outputs or log.names("ref") != outputs:
        return {}
    errors = log.block("y") - log.block("ref")
    units = artifact.signal_units if artifact is not None else {}
    return {name: {**error_statistics(errors[:, i]), "unit": units.get(name)} for i, name in enumerate(outputs)}


@_quiet_nonfinite
def near_singular_masks(log: StepLog, levels: Thresholds | None) -> tuple[np.ndarray, np.ndarray]:
    """Records under the warn level and under the act level (the near-singular episodes).

    Parameters
    ----------
    log : StepLog
    levels : Thresholds or None
        None (a bag): the controller's own flags (warn bit; damped or singular steps).
    Returns
    -------
    tuple of numpy.ndarray of bool
    """
    if levels is not None:
        sigma = log.column("sigma_min")
        return sigma < levels.sigma_warn, sigma < levels.sigma_act
    mode = codes(log.column("mode"), len(MODES))
    reason = codes(log.column("reason"), len(REASONS))
    return log.column("warn") > 0.5, (mode == MODES.index("damped")) | (reason == REASONS.index("singular"))


@_quiet_nonfinite
def summarise(log: StepLog, artifact: Artifact | None = None) -> dict[str, Any]:
    """The summary of a log (JSON-ready: nan and inf become None).

    Parameters
    ----------
    log : StepLog
    artifact : Artifact, optional
        For the watchdog levels of a bag (a field log records its own).

    Returns
    -------
    dict
    """
    t = log.column("t")
    sigma = log.column("sigma_min")
    condition = log.column("condition")
    mode = codes(log.column("mode"), len(MODES))
    reason = codes(log.column("reason"), len(REASONS))
    levels = thresholds_of(log, artifact)
    under_warn, under_act = near_singular_masks(log, levels)
    period = _period(t)
    time_in_mode = {m: float(np.sum(mode == i) * period) for i, m in enumerate(MODES)}
    switches = mode_switches(log)
    pairs: dict[str, int] = {}
    for _, a, b in switches:
        pairs[f"{a}->{b}"] = pairs.get(f"{a}->{b}", 0) + 1
    saturated = saturated_inputs(log)
    inputs = log.names("u")
    refused = {}
    for name in _REFUSED:
        hits = reason == REASONS.index(name)
        if hits.any():
            refused[name] = {"records": int(hits.sum()), **_episode_group(episodes(log, hits, "refused", name))}
    recorded = log.metadata.get("linz_recording", {})
    alarms = _alarm_summary(log, t, reason, mode)
    verdict = log_verdict(log, artifact)
    finite_sigma = sigma[np.isfinite(sigma)]
    finite_condition = condition[~np.isnan(condition)]
    summary = {
        "files": list(log.files),
        "records": len(log),
        "start": float(t[0]) if len(t) else None,
        "end": float(t[-1]) if len(t) else None,
        "duration": float(record_durations(t).sum()),
        "rate_hz": 1.0 / period if period > 0 else None,
        "plant": log.metadata.get("linz_artifact", {}).get("plant"),
        "states_recorded": bool(log.names("x")),
        "thresholds": None if levels is None else asdict(levels),
        "min_sigma": float(finite_sigma.min()) if len(finite_sigma) else None,
        "max_condition": float(finite_condition.max()) if len(finite_condition) else None,
        "near_singular": {"under_warn": _episode_group(episodes(log, under_warn, "under_warn")),
                          "under_act": _episode_group(episodes(log, under_act, "under_act"))},
        "time_in_mode": time_in_mode,
        "mode_switches": {"count": len(switches), "by_kind": pairs,
                          "first": [{"t": s[0], "from": s[1], "to": s[2]} for s in switches[:LISTED]]},
        "saturation": {u: {"fraction": float(saturated[:, i].mean()) if len(saturated) else 0.0,
                           **_episode_group(episodes(log, saturated[:, i], "saturated", u))}
                       for i, u in enumerate(inputs)},
        "refused": refused,
        "watchdog_alarms": alarms,
        "verdict": None if verdict is None else asdict(verdict),
        "tracking": tracking(log, artifact),
        "compute_time_us": _percentiles(log.column("compute_time_us")),
        "missing_records": sequence_gaps(log),
        "control_gaps": control_gaps(log),
        "dropped_by_writer": int(recorded["dropped_total"]) if recorded.get("dropped_total", "").isdigit() else None,
        "cut_files": [f for f, clean in log.clean_close.items() if not clean and log.sequence.max(initial=-1) >= 0],
        "problems": list(log.problems),
        "parameters": metadata_json(log, "linz_parameters", "parameters"),
    }
    return _jsonable(summary)
