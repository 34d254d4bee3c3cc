"""A fleet of field logs: files grouped into recordings, each analysed on its own, summed up.

The recordings are found by :func:`~linz_ros.logs.fleet_group.group_recordings` (the
files of one field-log writer, by machine and recording id). :func:`prepare_fleet` and
:func:`analyse_recording` are the executor's prepare and task
(:func:`linz_ros.executor.run_tasks`): one recording is read, summarised
(:func:`~linz_ros.logs.analysis.summarise`, as ``linz logs`` does for one log), split at
UTC midnights by its records' log times, and its reports written in a scratch folder
and returned by content with a :class:`RecordingDigest`, so no folder is shared with the
worker; the parent writes them out as each arrives
(:class:`~linz_ros.logs.fleet_report.ReportWriter`) and keeps the digest only.
:func:`~linz_ros.logs.fleet_summary.fleet_summary` sums the digests per day, per machine
and in all; :func:`~linz_ros.logs.fleet_report.fleet_text` words it.
"""

from __future__ import annotations

import json
import math
import tempfile
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np

from linz_ros.artifact import Artifact, artifact_from_text
from linz_ros.errors import LinzError
from linz_ros.logs.analysis import episodes, near_singular_masks, record_durations, runs, summarise, thresholds_of
from linz_ros.logs.fleet_group import UNKNOWN_DAY, Recording, group_recordings, read_identity
from linz_ros.logs.fleet_report import fleet_text
from linz_ros.logs.fleet_summary import WORST, fleet_summary, not_run_entry, recording_problem, worst_key
from linz_ros.logs.reader import StepLog, read_logs
from linz_ros.logs.report import plot_log, summary_text, write_csv, write_html

__all__ = ["Recording", "RecordingDigest", "FleetOptions", "group_recordings", "read_identity", "fleet_options_text",
           "prepare_fleet", "analyse_recording", "attached_artifact", "recording_problem", "not_run_entry",
           "fleet_summary", "fleet_text", "WORST"]

_DAY_SECONDS = 86400.0


@dataclass
class RecordingDigest:
    """What the fleet summary needs of one recording, and its reports by content.

    Attributes
    ----------
    name, recording, machine : str
    files : list of str
    day : str
        The UTC day it started: the identity's ``started``, else its first record's log
        time (the rule of :func:`~linz_ros.logs.fleet_summary.recording_problem` too).
    plant : str or None
    records : int
    duration : float
        Seconds.
    under_warn_time, under_act_time : float
        Seconds with sigma_min under the warn and the act level.
    under_warn_count, under_act_count : int
        Episodes.
    min_sigma : float or None
    worst : list of dict
        The :data:`WORST` episodes under the warn level with the lowest sigma_min, each
        with its UTC ``day``.
    verdict : str or None
        The run verdict's word.
    problems : list of str
        What could not be read in its files, one line each.
    days : dict of str to dict
        Per UTC day of the records' log times: ``records``, ``duration``,
        ``under_warn_time``, ``under_act_time``, ``under_warn_count``,
        ``under_act_count`` (episodes counted on the day they start) and ``worst``.
    reports : dict of str to bytes
        Report files by path relative to the recording's folder (emptied once written).
    written : list of str
        The report files written in the recording's folder.
    """

    name: str
    recording: str | None
    machine: str
    files: list[str]
    day: str
    plant: str | None
    records: int
    duration: float
    under_warn_time: float
    under_act_time: float
    under_warn_count: int
    under_act_count: int
    min_sigma: float | None
    worst: list[dict[str, Any]]
    verdict: str | None
    problems: list[str] = field(default_factory=list)
    days: dict[str, dict[str, Any]] = field(default_factory=dict)
    reports: dict[str, bytes] = field(default_factory=dict)
    written: list[str] = field(default_factory=list)

    def row(self) -> dict[str, Any]:
        """The digest as JSON (the reports by name, not content).

        Returns
        -------
        dict
        """
        out = {k: v for k, v in asdict(self).items() if k not in ("reports", "written")}
        out["reports"] = sorted(self.written or self.reports)
        return out


@dataclass(frozen=True)
class FleetOptions:
    """What every recording's analysis is given (:func:`prepare_fleet`).

    Attributes
    ----------
    plots : bool
        Write the PNG plots (and embed them in the HTML report).
    csv : bool
        Write every record as CSV.
    artifact : Artifact or None
        For logs without an attached artifact (bags).
    """

    plots: bool = True
    csv: bool = True
    artifact: Artifact | None = None


def fleet_options_text(plots: bool = True, csv: bool = True, artifact_text: str | None = None,
                       artifact_source: str = "--artifact") -> str:
    """The shipped text :func:`prepare_fleet` reads (the artifact travels by content).

    Parameters
    ----------
    plots, csv : bool
    artifact_text : str, optional
        The artifact file's text, for logs without one attached.
    artifact_source : str
        Named in errors about it.

    Returns
    -------
    str
    """
    return json.dumps({"plots": plots, "csv": csv, "artifact": artifact_text, "artifact_source": artifact_source})


def prepare_fleet(text: str) -> FleetOptions:
    """The executor's prepare: the options of :func:`fleet_options_text`, the artifact loaded.

    Parameters
    ----------
    text : str

    Returns
    -------
    FleetOptions

    Raises
    ------
    LinzError
        The shipped artifact is not a valid artifact.
    """
    values = json.loads(text)
    artifact = None
    if values.get("artifact") is not None:
        artifact = artifact_from_text(values["artifact"], source=values.get("artifact_source") or "--artifact")
    return FleetOptions(bool(values.get("plots", True)), bool(values.get("csv", True)), artifact)


def attached_artifact(log: StepLog, given: Artifact | None = None) -> Artifact | None:
    """The artifact to read a log against: the one attached to the log, else the one given.

    A given artifact is for logs that carry none (bags): it never overrides an attached
    one. A given artifact of another plant than the attached one, and an attached one that
    does not load, are said in ``log.problems``.

    Parameters
    ----------
    log : StepLog
    given : Artifact, optional

    Returns
    -------
    Artifact or None
    """
    if log.artifact_text is None:
        return given
    try:
        attached = artifact_from_text(log.artifact_text, source=f"{log.files[0]} (attached artifact)")
    except LinzError as err:
        log.problems.append(f"the attached artifact is not usable ({err}); "
                            + ("the given --artifact used" if given is not None else "plots without the singular set"))
        return given
    if given is not None and given.name != attached.name:
        log.problems.append(f"--artifact {given.source} is for plant {given.name}, the log's attached artifact for "
                            f"{attached.name}: --artifact not used")
    return attached


def _reports(log: StepLog, artifact: Artifact | None, summary: dict[str, Any], text: str,
             options: FleetOptions) -> dict[str, bytes]:
    """The per-log report files of ``linz logs``, written in a scratch folder, by content."""
    with tempfile.TemporaryDirectory(prefix="linz_fleet_") as scratch:
        folder = Path(scratch)
        if options.csv:
            write_csv(log, folder / "records.csv")
        images = plot_log(log, folder / "plots", artifact) if options.plots else []
        write_html(summary, text, images, folder / "report.html")
        written = sorted(str(p.relative_to(folder)) for p in folder.rglob("*") if p.is_file())
        summary = {**summary, "written": written + ["summary.json", "summary.txt"]}
        (folder / "summary.json").write_text(json.dumps(summary, indent=2))
        (folder / "summary.txt").write_text(text + "\n")
        return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def _utc(seconds: float) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(seconds))


def _record_days(log: StepLog, fallback: str) -> tuple[list[str], np.ndarray]:
    """The UTC days of the records' log times and each record's index into them (``fallback``: no valid time)."""
    stamps = np.asarray(log.log_time, dtype=float)
    valid = np.isfinite(stamps) & (stamps > 0)
    numbers = np.where(valid, np.floor(np.where(valid, stamps, 0.0) / _DAY_SECONDS), -1).astype(np.int64)
    found, inverse = np.unique(numbers, return_inverse=True)
    names = [fallback if n < 0 else _utc(n * _DAY_SECONDS)[:10] for n in found]
    merged = sorted(set(names))
    return merged, np.array([merged.index(n) for n in names], dtype=np.int64)[inverse]


def _worst_episodes(log: StepLog, mask: np.ndarray, under_act: np.ndarray, recording: Recording,
                    day_of: Callable[[int], str]) -> list[dict[str, Any]]:
    """Every episode under the warn level, lowest sigma_min first, each with its UTC time and day."""
    found = []
    for (first, last), e in zip(runs(mask), episodes(log, mask, "under_warn")):
        stamp = log.log_time[first]
        found.append({"recording": recording.name, "machine": recording.machine, "day": day_of(first),
                      "start": e.start, "duration": e.duration, "records": e.records,
                      "min_sigma": e.min_sigma if math.isfinite(e.min_sigma) else None, "worst_time": e.worst_time,
                      "utc": _utc(stamp) if math.isfinite(stamp) and stamp > 0 else None,
                      "under_act": bool(under_act[first:last + 1].any())})
    return sorted(found, key=worst_key)


def _split_by_day(log: StepLog, artifact: Artifact | None,
                  recording: Recording) -> tuple[str, dict[str, dict[str, Any]], list[dict[str, Any]]]:
    """The recording's day, its per-UTC-day numbers and its worst episodes."""
    under_warn, under_act = near_singular_masks(log, thresholds_of(log, artifact))
    names, index = _record_days(log, recording.day)
    weights = record_durations(log.column("t"))
    size = len(names)

    def starts(mask: np.ndarray) -> np.ndarray:
        return np.bincount(index[[first for first, _ in runs(mask)]], minlength=size)

    numbers = {"records": np.bincount(index, minlength=size), "duration": np.bincount(index, weights, size),
               "under_warn_time": np.bincount(index, weights * under_warn, size),
               "under_act_time": np.bincount(index, weights * under_act, size),
               "under_warn_count": starts(under_warn), "under_act_count": starts(under_act)}

    def day_of(record: int) -> str:
        return names[index[record]]

    worst = _worst_episodes(log, under_warn, under_act, recording, day_of)
    days = {name: {key: (float(v[k]) if key.endswith(("time", "duration")) else int(v[k]))
                   for key, v in numbers.items()} for k, name in enumerate(names)}
    for name, group in days.items():
        group["worst"] = [e for e in worst if e["day"] == name][:WORST]
    day = recording.day if recording.started else (day_of(0) if len(index) else UNKNOWN_DAY)
    return day, days, worst[:WORST]


def analyse_recording(options: FleetOptions, recording: Recording) -> RecordingDigest:
    """The executor's task: read one recording, summarise it, split it per UTC day, write its reports.

    Parameters
    ----------
    options : FleetOptions
    recording : Recording

    Returns
    -------
    RecordingDigest

    Raises
    ------
    LinzError
        Nothing readable in the recording's files (the executor reports it as refused).
    """
    log = read_logs(recording.files)
    artifact = attached_artifact(log, options.artifact)
    summary = summarise(log, artifact)
    text = summary_text(summary)
    near = summary["near_singular"]
    problems = (list(recording.problems) + list(summary["problems"])
                + [f"{f}: not closed cleanly (cut by a crash?)" for f in summary["cut_files"]])
    day, days, worst = _split_by_day(log, artifact, recording)
    return RecordingDigest(
        name=recording.name, recording=recording.recording, machine=recording.machine, files=list(recording.files),
        day=day, plant=summary["plant"], records=summary["records"],
        duration=summary["duration"] or 0.0, under_warn_time=near["under_warn"]["total_time"] or 0.0,
        under_act_time=near["under_act"]["total_time"] or 0.0, under_warn_count=near["under_warn"]["count"],
        under_act_count=near["under_act"]["count"], min_sigma=summary["min_sigma"], worst=worst,
        verdict=(summary["verdict"] or {}).get("word"), problems=problems, days=days,
        reports=_reports(log, artifact, summary, text, options))
