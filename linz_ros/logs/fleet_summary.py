"""The fleet's summary (:mod:`linz_ros.logs.fleet`): per recording, per UTC day, per machine and in all.

Per day the numbers are the recordings' own per-day splits (a recording spanning
midnight counts on each of its days); per machine and in all they are the recordings'
totals. The headline puts what went wrong first: failed recordings, an interrupted run,
recordings whose verdict is not ``tracked``.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any, Sequence

from linz_ros.logs.fleet_group import UNKNOWN_DAY, Recording
from linz_ros.logs.fleet_report import duration_text, fraction
from linz_ros.runtime.recording_identity import UNKNOWN_MACHINE

__all__ = ["WORST", "worst_key", "recording_problem", "not_run_entry", "entry_problem", "fleet_summary"]

#: Worst episodes kept per recording and per group (lowest sigma_min first).
WORST = 5
#: How the headline words a verdict that is not ``tracked`` (one recording, several).
_VERDICT_WORDS = {"diverged": ("diverged", "diverged"),
                  "left_envelope": ("left its envelope", "left their envelope"),
                  "held_safe": ("was held safe", "were held safe"),
                  "saturated": ("saturated", "saturated"),
                  "not_settled": ("did not settle", "did not settle")}
_SUMMED = ("records", "duration", "under_warn_time", "under_act_time", "under_warn_count", "under_act_count")


def worst_key(e: dict[str, Any]) -> tuple:
    """The order of worst episodes: lowest sigma_min, then longest, then by recording and start.

    Parameters
    ----------
    e : dict
        An episode of :attr:`~linz_ros.logs.fleet.RecordingDigest.worst`.

    Returns
    -------
    tuple
    """
    return (math.inf if e["min_sigma"] is None else e["min_sigma"], -e["duration"], e["recording"], e["start"])


def recording_problem(recording: Recording, problem: str) -> dict[str, Any]:
    """A recording that was not analysed, as the fleet summary lists it.

    Parameters
    ----------
    recording : Recording
    problem : str
        Its first line is kept.

    Returns
    -------
    dict
        ``name``, ``machine``, ``day`` (the identity's ``started``), ``files``, ``problem``
        and ``other_problems`` (of its set of files).
    """
    return {"name": recording.name, "machine": recording.machine, "day": recording.day,
            "files": list(recording.files), "problem": problem.splitlines()[0] if problem else "unknown",
            "other_problems": list(recording.problems)}


def entry_problem(path: str | Path, what: str) -> dict[str, Any]:
    """A folder entry named like a log that is no regular file, as a problem of the fleet.

    Parameters
    ----------
    path : str or pathlib.Path
    what : str
        What it is (a broken symbolic link, a named pipe...).

    Returns
    -------
    dict
        As :func:`recording_problem`.
    """
    return {"name": Path(path).name, "machine": UNKNOWN_MACHINE, "day": UNKNOWN_DAY, "files": [str(path)],
            "problem": f"{path}: {what}, not a regular file: not read", "other_problems": []}


def not_run_entry(recording: Recording) -> dict[str, Any]:
    """A recording never started (the run was interrupted), as the summary lists it.

    Parameters
    ----------
    recording : Recording

    Returns
    -------
    dict
        ``name``, ``machine``, ``day``, ``files``.
    """
    return {"name": recording.name, "machine": recording.machine, "day": recording.day,
            "files": list(recording.files)}


def _group(parts: list[dict[str, Any]], failed: int, not_run: int) -> dict[str, Any]:
    """One group's numbers from its parts (each: the _SUMMED numbers, files, problems, verdict, worst)."""
    sums = {key: sum(p[key] for p in parts) for key in _SUMMED}
    duration, warn, act = (float(sums[k]) for k in ("duration", "under_warn_time", "under_act_time"))
    verdicts: dict[str, int] = {}
    for p in parts:
        if p["verdict"] not in (None, "tracked"):
            verdicts[p["verdict"]] = verdicts.get(p["verdict"], 0) + 1
    return {"recordings": len(parts), "failed": failed, "not_run": not_run, "files": sum(p["files"] for p in parts),
            "records": sums["records"], "duration": duration,
            "under_warn_time": warn, "under_warn_fraction": fraction(warn, duration),
            "under_act_time": act, "under_act_fraction": fraction(act, duration),
            "under_warn_episodes": sums["under_warn_count"], "under_act_episodes": sums["under_act_count"],
            "with_problems": sum(1 for p in parts if p["problems"]), "not_tracked": dict(sorted(verdicts.items())),
            "worst": sorted((e for p in parts for e in p["worst"]), key=worst_key)[:WORST]}


def _whole(d: Any) -> dict[str, Any]:
    return {**{k: getattr(d, k) for k in _SUMMED}, "files": len(d.files), "problems": d.problems,
            "verdict": d.verdict, "worst": d.worst}


def _on_day(d: Any, day: str) -> dict[str, Any]:
    return {**d.days[day], "files": len(d.files), "problems": d.problems, "verdict": d.verdict}


def _groups(digests: list[Any], problems: list[dict[str, Any]], not_run: list[dict[str, Any]],
            key: str) -> dict[str, Any]:
    if key == "day":
        names = {day for d in digests for day in d.days}
        parts = {name: [_on_day(d, name) for d in digests if name in d.days] for name in names}
    else:
        names = {d.machine for d in digests}
        parts = {name: [_whole(d) for d in digests if d.machine == name] for name in names}
    names |= {p[key] for p in problems} | {p[key] for p in not_run}
    return {name: _group(parts.get(name, []), sum(p[key] == name for p in problems),
                         sum(p[key] == name for p in not_run)) for name in sorted(names)}


def fleet_summary(digests: Sequence[Any], problems: Sequence[dict[str, Any]],
                  not_run: Sequence[dict[str, Any]] = ()) -> dict[str, Any]:
    """The fleet's summary (JSON-ready): per recording, per day, per machine and in all.

    Parameters
    ----------
    digests : sequence of RecordingDigest
        The recordings analysed.
    problems : sequence of dict
        The recordings that failed or were lost (:func:`recording_problem`) and folder
        entries that are no regular files (:func:`entry_problem`).
    not_run : sequence of dict
        Recordings never started, the run interrupted (:func:`not_run_entry`).

    Returns
    -------
    dict
        ``headline``, ``complete``, ``totals``, ``by_day`` and ``by_machine`` (each a group:
        ``recordings``, ``failed``, ``not_run``, ``files``, ``records``, ``duration``,
        ``under_warn_time`` / ``_fraction``, ``under_act_time`` / ``_fraction``, episode
        counts, ``with_problems``, ``not_tracked`` (verdict: count), ``worst``),
        ``recordings`` (one row per recording analysed), ``problems`` and ``not_run``.
    """
    digests = sorted(digests, key=lambda d: d.name)
    problems = sorted(problems, key=lambda p: (p["name"], p["files"]))
    not_run = sorted(not_run, key=lambda p: p["name"])
    summary = {"totals": _group([_whole(d) for d in digests], len(problems), len(not_run)),
               "by_day": _groups(digests, problems, not_run, "day"),
               "by_machine": _groups(digests, problems, not_run, "machine"),
               "recordings": [d.row() for d in digests], "problems": problems, "not_run": not_run,
               "complete": not problems and not not_run}
    summary["headline"] = _headline(summary)
    return summary


def _count(n: int, one: str, many: str) -> str:
    return f"{n} {one if n == 1 else many}"


def _headline(summary: dict[str, Any]) -> str:
    t = summary["totals"]
    analysed, failed, not_run = t["recordings"], t["failed"], t["not_run"]
    whole = analysed + failed + not_run
    words = ["nothing analysed"] if not analysed else []
    if failed:
        words.append(f"{failed} of {whole} recording(s) FAILED")
    if not_run:
        words.append(f"INTERRUPTED: {not_run} recording(s) not run")
    for verdict, n in t["not_tracked"].items():
        one, many = _VERDICT_WORDS.get(verdict, (f"ended {verdict}", f"ended {verdict}"))
        words.append(f"{_count(n, 'recording', 'recordings')} {one if n == 1 else many}")
    machines = [m for m in summary["by_machine"] if m != UNKNOWN_MACHINE]
    days = [d for d in summary["by_day"] if d != UNKNOWN_DAY]
    words.append(f"fleet: {analysed} of {whole} recording(s) analysed ({t['files']} file(s), {len(machines)} "
                 f"machine(s), {len(days)} day(s)), {duration_text(t['duration'])}")
    if analysed:
        words.append(f"near-singular {duration_text(t['under_warn_time'])} under warn "
                     f"({100 * t['under_warn_fraction']:.2f}%), {duration_text(t['under_act_time'])} under act "
                     f"({100 * t['under_act_fraction']:.2f}%)")
    if t["with_problems"]:
        words.append(f"{t['with_problems']} read with problems")
    return "; ".join(words)
