"""The fleet summary of :mod:`linz_ros.logs.fleet` as terminal text, CSV (one row per
recording: analysed, failed or not run) and one HTML page linking every recording's own
report; and the fleet folder itself: checked and emptied of an earlier run before the
analysis, each recording's reports written as they arrive (:class:`ReportWriter`)."""

from __future__ import annotations

import csv
import dataclasses
import html
import json
import math
import shutil
from pathlib import Path
from typing import Any, Callable

from linz_ros.errors import ConfigError
from linz_ros.plotting.page import html_table, page

__all__ = ["fleet_text", "write_fleet_csv", "write_fleet_html", "CSV_COLUMNS", "duration_text", "fraction", "ReportWriter",
           "prepare_fleet_folder", "FLEET_JSON"]

#: The fleet folder's summary; a folder holding one is a fleet folder (re-used, emptied first).
FLEET_JSON = "fleet.json"
#: The columns of ``fleet.csv``.
CSV_COLUMNS = ("name", "status", "machine", "day", "plant", "files", "records", "duration", "under_warn_time",
               "under_warn_fraction", "under_act_time", "under_act_fraction", "under_warn_episodes",
               "under_act_episodes", "min_sigma", "verdict", "worst_min_sigma", "worst_utc", "problems",
               "first_problem")


def duration_text(seconds: float | None) -> str:
    """A duration for people: ``1.2 s``, ``5 min 3 s``, ``100 h 0 min``.

    Parameters
    ----------
    seconds : float or None

    Returns
    -------
    str
    """
    if seconds is None or not math.isfinite(seconds):
        return "n/a"
    if seconds < 59.95:
        return f"{seconds:.3g} s"
    if seconds < 3599.5:
        minutes, rest = divmod(round(seconds), 60)
        return f"{minutes} min {rest} s"
    hours, minutes = divmod(round(seconds / 60), 60)
    return f"{hours} h {minutes} min"


def _fmt(value: Any, unit: str = "") -> str:
    return "n/a" if value is None else (f"{value:.4g}{unit}" if isinstance(value, float) else f"{value}{unit}")


def _worst_text(worst: list[dict[str, Any]], with_recording: bool = True) -> str:
    if not worst:
        return "none"
    e = worst[0]
    where = f"{e['recording']} ({e['machine']}) " if with_recording else ""
    return (f"{where}min sigma {_fmt(e['min_sigma'])} at t = {e['worst_time']:.3f} s"
            + (f" ({e['utc']})" if e["utc"] else "") + (", under act" if e["under_act"] else ""))


def _group_lines(name: str, g: dict[str, Any]) -> list[str]:
    failed = f", {g['failed']} failed" if g["failed"] else ""
    failed += f", {g['not_run']} not run" if g["not_run"] else ""
    verdicts = "".join(f", {n} {v}" for v, n in g["not_tracked"].items())
    return [f"  {name}: {g['recordings']} recording(s){failed}{verdicts}, {duration_text(g['duration'])}, under warn "
            f"{duration_text(g['under_warn_time'])} ({100 * g['under_warn_fraction']:.2f}%), under act "
            f"{duration_text(g['under_act_time'])} ({100 * g['under_act_fraction']:.2f}%)",
            f"    worst: {_worst_text(g['worst'])}"]


def _episode_line(e: dict[str, Any]) -> str:
    return (f"    {e['recording']} ({e['machine']}): min sigma {_fmt(e['min_sigma'])} at t = {e['worst_time']:.3f} s, "
            f"from {e['start']:.3f} s for {e['duration']:.3f} s" + (f" ({e['utc']})" if e["utc"] else "")
            + (", under act" if e["under_act"] else ""))


def _recording_line(r: dict[str, Any]) -> str:
    return (f"  {r['name']}: {r['machine']}, {r['day']}, {r['plant'] or 'unknown plant'}, {len(r['files'])} file(s), "
            f"{duration_text(r['duration'])}, under warn {duration_text(r['under_warn_time'])}, min sigma "
            f"{_fmt(r['min_sigma'])}, verdict {r['verdict'] or 'n/a'}, worst {_worst_text(r['worst'], False)}"
            + (f", {len(r['problems'])} problem(s): {r['problems'][0]}" if r["problems"] else ""))


def fleet_text(summary: dict[str, Any], listed: int = 50, safe: Callable[[str], str] = str) -> str:
    """The fleet summary for a terminal.

    Parameters
    ----------
    summary : dict
        From :func:`~linz_ros.logs.fleet_summary.fleet_summary`.
    listed : int
        Recordings listed one per line at most (all failed and not run ones are listed).
    safe : callable
        Applied to each line (``commands._common.terminal_safe``: file names and problems
        may hold what a terminal acts on).

    Returns
    -------
    str
    """
    lines = [summary["headline"], "per machine:"]
    lines += [line for name, g in summary["by_machine"].items() for line in _group_lines(name, g)]
    lines.append("per day (UTC):")
    lines += [line for name, g in summary["by_day"].items() for line in _group_lines(name, g)]
    lines.append("worst episodes (lowest sigma_min):" if summary["totals"]["worst"] else "worst episodes: none")
    lines += [_episode_line(e) for e in summary["totals"]["worst"]]
    lines.append("recordings:")
    lines += [_recording_line(r) for r in summary["recordings"][:listed]]
    if len(summary["recordings"]) > listed:
        lines.append(f"  ... and {len(summary['recordings']) - listed} more (fleet.json, fleet.csv)")
    if summary["problems"]:
        lines.append("NOT analysed:")
        lines += [f"  {p['name']} ({p['machine']}): {p['problem']}" for p in summary["problems"]]
    if summary["not_run"]:
        lines.append("NOT run (interrupted):")
        lines += [f"  {p['name']} ({p['machine']}): {len(p['files'])} file(s), first {p['files'][0]}"
                  for p in summary["not_run"]]
    return "\n".join(safe(line) for line in lines)


def fraction(part: float, whole: float) -> float:
    """``part`` of ``whole`` (0 for a whole of no time): the one rule of the fleet's fractions.

    Parameters
    ----------
    part, whole : float

    Returns
    -------
    float
    """
    return part / whole if whole > 0 else 0.0


def _csv_rows(summary: dict[str, Any]) -> list[dict[str, Any]]:
    rows = []
    for r in summary["recordings"]:
        worst = r["worst"][0] if r["worst"] else {}
        rows.append({"name": r["name"], "status": "analysed", "machine": r["machine"], "day": r["day"],
                     "plant": r["plant"], "files": len(r["files"]), "records": r["records"],
                     "duration": r["duration"], "under_warn_time": r["under_warn_time"],
                     "under_warn_fraction": fraction(r["under_warn_time"], r["duration"]),
                     "under_act_time": r["under_act_time"],
                     "under_act_fraction": fraction(r["under_act_time"], r["duration"]),
                     "under_warn_episodes": r["under_warn_count"], "under_act_episodes": r["under_act_count"],
                     "min_sigma": r["min_sigma"], "verdict": r["verdict"], "worst_min_sigma": worst.get("min_sigma"),
                     "worst_utc": worst.get("utc"), "problems": len(r["problems"]),
                     "first_problem": r["problems"][0] if r["problems"] else ""})
    for p in summary["problems"]:
        rows.append({"name": p["name"], "status": "failed", "machine": p["machine"], "day": p["day"],
                     "files": len(p["files"]), "problems": 1 + len(p["other_problems"]), "first_problem": p["problem"]})
    for p in summary["not_run"]:
        rows.append({"name": p["name"], "status": "not_run", "machine": p["machine"], "day": p["day"],
                     "files": len(p["files"])})
    return sorted(rows, key=lambda row: row["name"])


def write_fleet_csv(summary: dict[str, Any], path: str | Path) -> Path:
    """``fleet.csv``: one row per recording (:data:`CSV_COLUMNS`): analysed, failed (with its problem), not_run.

    Parameters
    ----------
    summary : dict
        From :func:`~linz_ros.logs.fleet_summary.fleet_summary`.
    path : str or pathlib.Path
        In an existing folder.

    Returns
    -------
    pathlib.Path
    """
    with open(path, "w", newline="") as stream:
        writer = csv.DictWriter(stream, CSV_COLUMNS, restval="")
        writer.writeheader()
        writer.writerows({k: ("" if v is None else v) for k, v in row.items()} for row in _csv_rows(summary))
    return Path(path)


def _group_rows(groups: dict[str, dict[str, Any]]) -> list[list[str]]:
    return [[name, str(g["recordings"]), str(g["failed"]), str(g["not_run"]), duration_text(g["duration"]),
             duration_text(g["under_warn_time"]), f"{100 * g['under_warn_fraction']:.2f}",
             duration_text(g["under_act_time"]), f"{100 * g['under_act_fraction']:.2f}", str(g["with_problems"]),
             ", ".join(f"{n} {v}" for v, n in g["not_tracked"].items()) or "none", _worst_text(g["worst"])]
            for name, g in groups.items()]


_GROUP_HEAD = ["", "recordings", "failed", "not run", "time", "under warn", "under warn [%]", "under act",
               "under act [%]", "read with problems", "not tracked", "worst episode"]


def _recordings_table(summary: dict[str, Any]) -> str:
    head = ("recording", "machine", "day", "time", "under warn", "min sigma", "verdict", "worst episode", "problems")
    rows = []
    for r in summary["recordings"]:
        link = (f"<a href='{html.escape(r['name'])}/report.html'>{html.escape(r['name'])}</a>"
                if "report.html" in r["reports"] else html.escape(r["name"]))
        cells = [r["machine"], r["day"], duration_text(r["duration"]), duration_text(r["under_warn_time"]),
                 _fmt(r["min_sigma"]), r["verdict"] or "n/a", _worst_text(r["worst"], False),
                 "; ".join(r["problems"][:3])]
        rows.append(f"<tr><td>{link}</td>" + "".join(f"<td>{html.escape(c)}</td>" for c in cells) + "</tr>")
    return ("<h2>Recordings</h2><table><tr>" + "".join(f"<th>{h}</th>" for h in head) + "</tr>" + "".join(rows)
            + "</table>")


def write_fleet_html(summary: dict[str, Any], path: str | Path) -> Path:
    """``fleet.html``: the summary's tables and a link to each recording's ``report.html``.

    Parameters
    ----------
    summary : dict
        From :func:`~linz_ros.logs.fleet_summary.fleet_summary`.
    path : str or pathlib.Path
        The fleet folder's page (the recordings' folders beside it).

    Returns
    -------
    pathlib.Path
    """
    path = Path(path)
    worst = summary["totals"]["worst"]
    parts = [f"<p>{html.escape(summary['headline'])}</p>",
             html_table("Totals", _GROUP_HEAD, _group_rows({"all": summary["totals"]})),
             html_table("Per machine", _GROUP_HEAD, _group_rows(summary["by_machine"])),
             html_table("Per day (UTC)", _GROUP_HEAD, _group_rows(summary["by_day"])),
             html_table("Worst episodes (lowest sigma_min)",
                        ["recording", "machine", "min sigma", "at [s]", "from [s]", "for [s]", "UTC", "under act"],
                        [[e["recording"], e["machine"], _fmt(e["min_sigma"]), f"{e['worst_time']:.3f}",
                          f"{e['start']:.3f}", f"{e['duration']:.3f}", e["utc"] or "n/a",
                          "yes" if e["under_act"] else "no"] for e in worst]),
             html_table("Not analysed", ["recording", "machine", "problem"],
                        [[p["name"], p["machine"], p["problem"]] for p in summary["problems"]]),
             html_table("NOT run (interrupted)", ["recording", "machine", "files"],
                        [[p["name"], p["machine"], ", ".join(p["files"])] for p in summary["not_run"]]),
             _recordings_table(summary)]
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(page("fleet of field logs", "Fleet of field logs", parts,
                         heading_class="" if summary["complete"] else "bad"))
    return path


# ----------------------------------------------------------------------------- the fleet folder

def _listed_names(old: Path) -> set[str]:
    """The recording folders an earlier run's ``fleet.json`` names (plain names only)."""
    try:
        found = json.loads(old.read_text())
    except (OSError, ValueError, RecursionError):
        raise ConfigError("--fleet", f"{old} is not a readable fleet summary; give a new or empty folder") from None
    names = set(found.get("planned", []) if isinstance(found, dict) else [])
    for key in ("recordings", "problems", "not_run"):
        items = found.get(key) if isinstance(found, dict) else None
        names |= {item.get("name") for item in items or [] if isinstance(item, dict)}
    return {n for n in names if isinstance(n, str) and n and "/" not in n and "\\" not in n and n not in (".", "..")}


def prepare_fleet_folder(out: Path, planned: list[str]) -> None:
    """Check the fleet folder and make it ready, before any recording is analysed.

    A new or empty folder is created; a folder of an earlier run (with ``fleet.json``)
    loses the recording folders that run listed; any other non-empty folder is refused.
    A ``fleet.json`` naming the ``planned`` recordings is written at once, so an
    interrupted run's folder is still known as a fleet folder.

    Parameters
    ----------
    out : pathlib.Path
    planned : list of str
        The recordings' names (their folders).

    Raises
    ------
    ConfigError
        A file in the way, a non-empty folder that is no fleet folder, a folder that
        cannot be written.
    """
    if out.exists() and not out.is_dir():
        raise ConfigError("--fleet", f"{out} is a file, not a folder")
    try:
        if out.is_dir() and any(out.iterdir()):
            if not (out / FLEET_JSON).is_file():
                raise ConfigError("--fleet", f"{out} is not empty and holds no {FLEET_JSON}: not a fleet folder; "
                                             "give a new or empty folder")
            for name in sorted(_listed_names(out / FLEET_JSON)):
                target = out / name
                if target.is_dir() and not target.is_symlink():
                    shutil.rmtree(target)
        out.mkdir(parents=True, exist_ok=True)
        (out / FLEET_JSON).write_text(json.dumps({"complete": False, "headline": "in progress",
                                                  "planned": sorted(planned)}, indent=2))
    except OSError as err:
        raise ConfigError("--fleet", f"cannot write {err.filename or out}: {err.strerror}") from None


class ReportWriter:
    """The executor's ``keep``: each recording's reports written into the fleet folder as it arrives.

    Parameters
    ----------
    out : pathlib.Path
        The fleet folder (ready: :func:`prepare_fleet_folder`).
    """

    def __init__(self, out: Path) -> None:
        self.out = out

    def __call__(self, outcome: Any) -> Any:
        """Write the digest's reports in ``out/<name>/``; the digest kept without them.

        Parameters
        ----------
        outcome : TaskOutcome
            Its value a :class:`~linz_ros.logs.fleet.RecordingDigest`.

        Returns
        -------
        RecordingDigest
            ``reports`` emptied, ``written`` their names; a write that fails is one of its problems.
        """
        digest = outcome.value
        written, problems = [], list(digest.problems)
        try:
            for name, data in digest.reports.items():
                target = self.out / digest.name / name
                target.parent.mkdir(parents=True, exist_ok=True)
                target.write_bytes(data)
                written.append(name)
        except OSError as err:
            problems.append(f"its reports could not be written: {err.filename or self.out}: {err.strerror}")
        return dataclasses.replace(digest, reports={}, written=sorted(written), problems=problems)
