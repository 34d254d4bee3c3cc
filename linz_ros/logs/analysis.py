"""What a field log says: near-singular and saturation episodes, mode switches, refused
states, dropped records and compute-time percentiles.

An episode is a maximal run of consecutive records that meet a condition (sigma_min under
a level, an input saturated, a state refused for one reason). Its duration runs from its
first record's time to the first record after it (to its last record's time plus one
median period at the end of the log), so a one-record episode lasts one period.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from linz_ros.artifact import Artifact
from linz_ros.logs.reader import LogError, StepLog, metadata_json
from linz_ros.runtime import MODES, REASONS, SimResult

__all__ = ["Episode", "Thresholds", "as_sim_result", "control_gaps", "episodes", "gap_ends", "summarise",
           "thresholds_of"]

_REFUSED = ("wrong_length", "non_finite_state", "bad_reference", "bad_time", "out_of_order", "stale",
            "future_stamp", "model_not_finite", "non_finite_command", "no_state", "bad_message")
#: Episodes listed in full in a summary (the longest first); the counts cover all of them.
LISTED = 20


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
        return Thresholds(float(recorded["sigma_warn"]), float(recorded["sigma_act"]),
                          float(recorded["sigma_stop"]), "recorded in the log")
    except (KeyError, ValueError):
        pass
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


def _period(t: np.ndarray) -> float:
    steps = np.diff(t)
    steps = steps[np.isfinite(steps) & (steps > 0)]
    return float(np.median(steps)) if len(steps) else 0.0


def episodes(log: StepLog, mask: np.ndarray, kind: str, detail: str = "") -> list[Episode]:
    """The episodes where ``mask`` holds.

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
    t = log.column("t")
    sigma = log.column("sigma_min")
    mode = log.column("mode")
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
        codes, counts = np.unique(mode[first:last + 1].astype(int), return_counts=True)
        out.append(Episode(kind, detail, float(t[first]), float(max(end - t[first], 0.0)), last - first + 1,
                           min_sigma, float(t[worst]),
                           {s: float(v) for s, v in zip(states, x[worst])} if states else {},
                           {MODES[c]: int(n) for c, n in zip(codes, counts) if 0 <= c < len(MODES)}))
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
    """Every change of controller mode as ``(time, from, to)``."""
    mode = log.column("mode").astype(int)
    t = log.column("t")
    changed = np.flatnonzero(mode[1:] != mode[:-1]) + 1
    return [(float(t[i]), MODES[mode[i - 1]], MODES[mode[i]]) for i in changed]


def sequence_gaps(log: StepLog) -> int:
    """Records missing between consecutive sequence numbers of a field log (0 for bags)."""
    seq = log.sequence
    if not len(seq) or (seq < 0).all():
        return 0
    steps = np.diff(seq[seq >= 0]) % 2**32
    return int(np.sum(steps[steps > 1] - 1))


LATE_PERIODS = 5.0     # a step this many median periods after the one before it ends a control-loop gap


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
    return {"count": int(len(ends)), "longest_s": float(np.nanmax(steps)) if len(steps) else 0.0,
            "periods": periods, "ends": [float(e) for e in ends[:LISTED]]}


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
    """(records, inputs) bool array from the saturation bit mask."""
    mask = np.nan_to_num(log.column("saturated_mask")).astype(np.int64)
    inputs = log.names("u")
    return np.stack([(mask >> i) & 1 == 1 for i in range(len(inputs))], axis=1) if inputs else \
        np.zeros((len(mask), 0), dtype=bool)


def as_sim_result(log: StepLog, artifact: Artifact, note: str = "from the controller's field log") -> SimResult:
    """A field log as a :class:`~linz_ros.runtime.SimResult`, for the run summary, CSV and plots.

    One row per record, time from the first record. The reference carries y_ref only (the
    log does not record its derivatives, which are left at zero); the state is the one
    the step used (nan where the step refused it).

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
    for prefix, names in (("y", artifact.outputs), ("u", artifact.inputs), ("x", artifact.states)):
        if log.names(prefix) != list(names):
            raise LogError(", ".join(log.files) or "log", f"its {prefix} fields {log.names(prefix)} are not "
                                                         f"those of the artifact {artifact.name} ({list(names)})")
    t = log.column("t")
    ref = np.zeros((len(t), sum(r + 1 for r in artifact.relative_degree)))
    offsets = np.cumsum([0] + [r + 1 for r in artifact.relative_degree[:-1]])
    ref[:, offsets] = log.block("ref")
    x = log.block("x")
    return SimResult(artifact=artifact, reference=None, t=t - t[0] if len(t) else t, x=x, x_measured=x, ref=ref,
                     y=log.block("y"), u=log.block("u"), sigma_min=log.column("sigma_min"),
                     condition=log.column("condition"), mode=[MODES[int(v)] for v in log.column("mode")],
                     reason=[REASONS[int(v)] for v in log.column("reason")], saturated=saturated_inputs(log),
                     compute_time=log.column("compute_time_us") * 1e-6, notes=[note])


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
    mode = log.column("mode").astype(int)
    reason = log.column("reason").astype(int)
    levels = thresholds_of(log, artifact)
    if levels is not None:
        under_warn, under_act = sigma < levels.sigma_warn, sigma < levels.sigma_act
    else:      # a bag without levels: the controller's own flags (warn bit; damped or singular steps)
        under_warn = log.column("warn") > 0.5
        under_act = (mode == MODES.index("damped")) | (reason == REASONS.index("singular"))
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
    finite_sigma = sigma[np.isfinite(sigma)]
    finite_condition = condition[~np.isnan(condition)]
    summary = {
        "files": list(log.files),
        "records": len(log),
        "start": float(t[0]) if len(t) else None,
        "end": float(t[-1]) if len(t) else None,
        "duration": float(t[-1] - t[0] + period) if len(t) else 0.0,
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
        "compute_time_us": _percentiles(log.column("compute_time_us")),
        "missing_records": sequence_gaps(log),
        "control_gaps": control_gaps(log),
        "dropped_by_writer": int(recorded["dropped_total"]) if recorded.get("dropped_total", "").isdigit() else None,
        "cut_files": [f for f, clean in log.clean_close.items() if not clean and log.sequence.max(initial=-1) >= 0],
        "problems": list(log.problems),
        "parameters": metadata_json(log, "linz_parameters", "parameters"),
    }
    return _jsonable(summary)
