"""``linz logs``: read field logs (or bags) and summarise them; CSV, PNG plots and an HTML report."""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

from linz_ros.errors import ConfigError, LinzError

__all__ = ["LogsReport", "LogsRequest", "read_and_report", "render_logs"]


@dataclass
class LogsRequest:
    """What ``linz logs`` reads and writes.

    Attributes
    ----------
    paths : list of str
        Field-log files, bags or folders holding them; joined in time order.
    artifact : str, optional
        The controller's artifact (a field log carries its own).
    csv, html : str, optional
        Files to write.
    plots : str, optional
        Folder for the PNG plots.
    """

    paths: Sequence[str]
    artifact: str | None = None
    csv: str | None = None
    plots: str | None = None
    html: str | None = None


@dataclass
class LogsReport:
    """The summary (``linz logs --json``, with ``written``), its text and the files written."""

    summary: dict[str, Any]
    text: str
    files: list[Path] = field(default_factory=list)


def _refuse_writing_over_logs(request: LogsRequest) -> None:
    """An output named like one of the logs read (``--csv run.mcap``) would destroy that log."""
    from linz_ros.logs import log_files

    inputs = {p.resolve() for p in log_files(request.paths)}
    for option in ("csv", "html"):
        target = getattr(request, option)
        if target and Path(target).resolve() in inputs:
            raise ConfigError(f"--{option}", f"{target} is one of the logs being read; writing there would destroy it")


def _log_artifact(log: Any, path: str | None):
    """The artifact to read a log against: the one given, else the one attached to the log."""
    from linz_ros.artifact import artifact_from_text, load_artifact

    if path:
        return load_artifact(path, check_plant=False)
    if log.artifact_text is None:
        return None
    try:
        return artifact_from_text(log.artifact_text, source=f"{log.files[0]} (attached artifact)")
    except LinzError as err:
        log.problems.append(f"the attached artifact is not usable ({err}); plots without the singular set")
        return None


def _write_outputs(log: Any, artifact: Any, summary: dict[str, Any], text: str, request: LogsRequest) -> list[Path]:
    from linz_ros.logs import plot_log, write_csv, write_html

    files: list[Path] = []
    if request.csv:
        files.append(write_csv(log, request.csv))
    images = plot_log(log, request.plots, artifact) if request.plots else []
    files.extend(images)
    if request.html:
        if not images:
            import tempfile

            with tempfile.TemporaryDirectory() as scratch:
                files.append(write_html(summary, text, plot_log(log, scratch, artifact), request.html))
        else:
            files.append(write_html(summary, text, images, request.html))
    return files


def read_and_report(request: LogsRequest) -> LogsReport:
    """Read the logs, summarise them and write what was asked for.

    Parameters
    ----------
    request : LogsRequest

    Returns
    -------
    LogsReport

    Raises
    ------
    LinzError
    """
    from linz_ros.logs import read_logs, summarise, summary_text

    for option in ("csv", "plots", "html", "artifact"):
        value = getattr(request, option)
        if value is not None and not value.strip():
            raise ConfigError(f"--{option}", "expected a file or folder name, got an empty one")
    log = read_logs(request.paths)
    _refuse_writing_over_logs(request)
    artifact = _log_artifact(log, request.artifact)
    summary = summarise(log, artifact)
    text = summary_text(summary)
    try:
        files = _write_outputs(log, artifact, summary, text, request)
    except OSError as err:
        raise ConfigError("logs output", f"cannot write {err.filename or ''}: {err.strerror}") from None
    summary["written"] = [str(f) for f in files]
    return LogsReport(summary, text, files)


def render_logs(report: LogsReport, as_json: bool = False) -> str:
    """What ``linz logs`` prints: the summary's text and the files written.

    Parameters
    ----------
    report : LogsReport
    as_json : bool

    Returns
    -------
    str
    """
    if as_json:
        return json.dumps(report.summary, indent=2)
    return report.text + ("\nwrote " + ", ".join(map(str, report.files)) if report.files else "")
