"""``linz logs``: read field logs (or bags) and summarise them; CSV, PNG plots and an HTML report.

With ``--fleet DIR`` every recording under the paths is analysed on its own, on local
worker processes or a Dask cluster (:func:`linz_ros.executor.run_tasks`), and summed up
per day and per machine (:mod:`linz_ros.logs.fleet`): ``fleet.json``, ``fleet.csv``,
``fleet.html`` and each recording's own reports in ``DIR/<recording>/``.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

from linz_ros.commands._common import EXIT_FINDINGS
from linz_ros.errors import ConfigError
from linz_ros.executor import DEFAULT_ATTEMPTS

__all__ = ["LogsReport", "LogsRequest", "read_and_report", "render_logs", "FleetRequest", "FleetReport", "fleet_report",
           "run_logs_options"]


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
    from linz_ros.artifact import load_artifact
    from linz_ros.logs.fleet import attached_artifact

    return attached_artifact(log, load_artifact(path, check_plant=False) if path else None)


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


def render_logs(report: LogsReport | FleetReport, as_json: bool = False) -> str:
    """What ``linz logs`` prints: the summary's text (one log's, or the fleet's) and the files written.

    Parameters
    ----------
    report : LogsReport or FleetReport
    as_json : bool

    Returns
    -------
    str
    """
    if as_json:
        return json.dumps(report.summary, indent=2)
    if isinstance(report, FleetReport):
        where = report.summary["execution"]["where"]
        from linz_ros.commands._common import terminal_safe

        return report.text + "\n" + terminal_safe(f"ran on {where}; wrote " + ", ".join(map(str, report.files)))
    return report.text + ("\nwrote " + ", ".join(map(str, report.files)) if report.files else "")


# ------------------------------------------------------------------------------ fleet mode

@dataclass
class FleetRequest:
    """What ``linz logs --fleet`` reads and where it writes.

    Attributes
    ----------
    paths : list of str
        Field-log files, bags or folders holding them; grouped into recordings.
    out : str
        The fleet folder: ``fleet.json``, ``fleet.csv``, ``fleet.html``, ``<recording>/``.
    artifact : str, optional
        For bags of the conditioning topic (shipped to the workers by content).
    workers : int, optional
        Local worker processes (default: one per core).
    scheduler : str, optional
        A Dask scheduler address (default: ``LINZ_DASK_SCHEDULER``, else local processes).
    attempts : int
        Runs of one recording at most when its worker dies.
    plots, csv : bool
        Each recording's PNG plots and records CSV.
    progress : bool
        Draw a progress bar on stderr.
    """

    paths: Sequence[str]
    out: str
    artifact: str | None = None
    workers: int | None = None
    scheduler: str | None = None
    attempts: int = DEFAULT_ATTEMPTS
    plots: bool = True
    csv: bool = True
    progress: bool = False


@dataclass
class FleetReport:
    """The fleet summary (``linz logs --fleet --json``), its text, the files written, whether interrupted."""

    summary: dict[str, Any]
    text: str
    files: list[Path] = field(default_factory=list)
    interrupted: bool = False

    @property
    def exit_code(self) -> int:
        """130: interrupted; 3: a recording failed, was lost or ended other than ``tracked`` (or an
        entry was no regular file); else 0."""
        if self.interrupted:
            return 130
        return EXIT_FINDINGS if self.summary["problems"] or self.summary["totals"]["not_tracked"] else 0


def _fleet_outcomes(recordings: list[Any], execution: Any) -> tuple[list[Any], list[dict[str, Any]], list[dict]]:
    """Digests, problems (refused or lost recordings) and the recordings never started."""
    from linz_ros.logs.fleet import not_run_entry, recording_problem

    digests, problems, not_run = [], [], []
    for index, recording in enumerate(recordings):
        outcome = execution.outcomes.get(index)
        if outcome is None:
            not_run.append(not_run_entry(recording))
        elif outcome.refused is not None:
            problems.append(recording_problem(recording, outcome.refused))
        elif outcome.error is not None:            # a fault of linz_ros while reading it: said, never hidden
            problems.append(recording_problem(recording, f"unexpected error: {outcome.error}"))
        elif outcome.lost is not None:
            problems.append(recording_problem(recording, f"lost: {outcome.lost}"))
        else:
            digests.append(outcome.value)
    return digests, problems, not_run


def _write_fleet(out: Path, summary: dict[str, Any]) -> tuple[list[Path], bool]:
    """``fleet.json`` first, then the CSV and HTML; Ctrl-C while those are written leaves
    ``fleet.json`` whole and removes the half-written tables.

    Returns the files written and whether Ctrl-C came while the tables were written.
    """
    from linz_ros.logs.fleet_report import FLEET_JSON, write_fleet_csv, write_fleet_html

    try:
        (out / FLEET_JSON).write_text(json.dumps(summary, indent=2))
        files = [out / FLEET_JSON]
        try:
            for write, name in ((write_fleet_csv, "fleet.csv"), (write_fleet_html, "fleet.html")):
                files.append(write(summary, out / name))
        except KeyboardInterrupt:
            for name in ("fleet.csv", "fleet.html"):
                if out / name not in files:
                    (out / name).unlink(missing_ok=True)
            return files, True
    except OSError as err:
        raise ConfigError("--fleet", f"cannot write {err.filename or out}: {err.strerror}") from None
    return files, False


def _fleet_artifact(path: str | None) -> str | None:
    """The ``--artifact`` file's text, checked here once before any worker (None: not given)."""
    if path is None:
        return None
    if not path.strip():
        raise ConfigError("--artifact", "expected a file name, got an empty one")
    from linz_ros.artifact import load_artifact

    load_artifact(path, check_plant=False)
    return Path(path).read_text()


def fleet_report(request: FleetRequest) -> FleetReport:
    """Analyse every recording under the paths on its own, through the executor, and sum them up.

    The fleet folder is checked and made ready first (:func:`~linz_ros.logs.fleet_report.prepare_fleet_folder`);
    each recording's reports are written as it finishes. A recording that cannot be read
    is one line of the summary's problems, never the end of the run; Ctrl-C keeps and
    writes what finished (``interrupted``) and names what did not run. ``fleet.json`` is
    written first: Ctrl-C while the CSV and HTML are written leaves it (``interrupted``).

    Parameters
    ----------
    request : FleetRequest

    Returns
    -------
    FleetReport

    Raises
    ------
    LinzError
        Paths that do not exist, an unusable output folder or artifact, a Dask
        scheduler that cannot be reached.
    """
    import time

    from linz_ros.commands._common import terminal_safe
    from linz_ros.commands.sim import ProgressBar
    from linz_ros.executor import ExecutorSettings, Shipment, run_tasks
    from linz_ros.logs._paths import irregular_entries
    from linz_ros.logs.fleet import (analyse_recording, fleet_options_text, fleet_summary, fleet_text,
                                     group_recordings, prepare_fleet)
    from linz_ros.logs.fleet_report import ReportWriter, prepare_fleet_folder
    from linz_ros.logs.fleet_summary import entry_problem

    if not request.out.strip():
        raise ConfigError("--fleet", "expected an output folder, got an empty one")
    out = Path(request.out)
    if out.exists() and not out.is_dir():
        raise ConfigError("--fleet", f"{out} is a file, not a folder")
    settings = ExecutorSettings(request.workers, request.scheduler, request.attempts)
    artifact_text = _fleet_artifact(request.artifact)
    recordings = group_recordings(request.paths)
    prepare_fleet_folder(out, [r.name for r in recordings])
    bar = ProgressBar(request.progress, "logs")
    started = time.monotonic()
    try:
        execution = run_tasks(prepare_fleet, analyse_recording,
                              Shipment.of(fleet_options_text(request.plots, request.csv, artifact_text,
                                                             request.artifact)),
                              recordings, settings, lambda done, total: bar(done / total, f"{done}/{total} recordings "),
                              keep=ReportWriter(out))
    finally:
        bar.close()          # an interrupted bar ends its line, as the campaign's does
    digests, problems, not_run = _fleet_outcomes(recordings, execution)
    problems += [entry_problem(path, what) for path, what in irregular_entries(request.paths)]
    summary = fleet_summary(digests, problems, not_run)
    summary["execution"] = {"where": execution.where, "workers": execution.workers,
                            "interrupted": execution.interrupted, "seconds": time.monotonic() - started}
    text = fleet_text(summary, safe=terminal_safe)
    files, cut = _write_fleet(out, summary)
    if cut:
        text += ("\nINTERRUPTED while writing the fleet's tables: fleet.json is whole, fleet.csv or fleet.html "
                 "not written")
    return FleetReport(summary, text, files, execution.interrupted or cut)


#: Options of the fleet mode only, and whether each was given (parsed options by name).
_FLEET_ONLY = {"--workers": lambda o: o.get("workers") is not None,
               "--scheduler": lambda o: o.get("scheduler") is not None,
               "--attempts": lambda o: o.get("attempts") is not None,
               "--no-plots": lambda o: bool(o.get("no_plots")), "--no-csv": lambda o: bool(o.get("no_csv")),
               "--progress": lambda o: bool(o.get("progress"))}


def run_logs_options(options: Mapping[str, Any], terminal: bool = False) -> tuple[str, int]:
    """``linz logs`` from its parsed options by name: one reading, or the fleet mode with ``fleet``.

    Parameters
    ----------
    options : mapping
        ``paths``, ``artifact``, ``json``, ``csv``, ``plots``, ``html``; for the fleet mode
        ``fleet``, ``workers``, ``scheduler``, ``attempts``, ``no_plots``, ``no_csv``, ``progress``.
    terminal : bool
        Whether stderr is a terminal (the progress bar's default).

    Returns
    -------
    tuple of (str, int)
        The text to print and the exit code: 0 for one reading whatever its verdict; in the
        fleet mode 3 when a recording failed, was lost or ended other than ``tracked``, 130
        when interrupted by Ctrl-C (what finished is reported), else 0.

    Raises
    ------
    LinzError
        Options of one mode given in the other, and whatever the reading refuses.
    """
    o = dict(options)
    if o.get("fleet") is None:
        for option, given in _FLEET_ONLY.items():
            if given(o):
                raise ConfigError(option, "only with --fleet DIR (one log reading runs in this process)")
        report = read_and_report(LogsRequest(o["paths"], artifact=o.get("artifact"), csv=o.get("csv"),
                                             plots=o.get("plots"), html=o.get("html")))
        return render_logs(report, as_json=bool(o.get("json"))), 0
    for option in ("csv", "plots", "html"):
        if o.get(option) is not None:
            raise ConfigError(f"--{option}", "not with --fleet: each recording's reports go into the fleet folder "
                                             "(--no-plots, --no-csv to leave some out)")
    progress = o.get("progress")
    fleet = fleet_report(FleetRequest(
        o["paths"], o["fleet"], artifact=o.get("artifact"), workers=o.get("workers"), scheduler=o.get("scheduler"),
        attempts=DEFAULT_ATTEMPTS if o.get("attempts") is None else o["attempts"],
        plots=not o.get("no_plots"), csv=not o.get("no_csv"),
        progress=bool(terminal if progress is None else progress)))
    return render_logs(fleet, as_json=bool(o.get("json"))), fleet.exit_code
