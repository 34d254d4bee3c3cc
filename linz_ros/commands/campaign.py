"""``linz campaign``: many closed-loop runs over the envelope, parameter ranges, noise, delay and references.

Every case is a ``linz sim`` run: it is turned into the same request ``linz sim`` builds
from its options, run by the same code, and its rerun command is that request written back
as options, so a rerun reproduces the case exactly. The cases run on local worker processes
or a Dask cluster (:mod:`linz_ros.executor`), which receive the artifact by content.
"""

from __future__ import annotations

import dataclasses
import json
import math
import shlex
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from linz_ros.campaign.spec import (CAMPAIGN_KEY, ERRORED, REFUSED, Case, CampaignOutcome, CampaignSpec, CaseResult,
                                    draw_cases, read_campaign)
from linz_ros.commands._common import DEFAULT_OUT, EXIT_FINDINGS, load_source
from linz_ros.commands._options import DesignChoices
from linz_ros.commands.sim import ProgressBar, SimRequest, run_settings
from linz_ros.errors import ConfigError
from linz_ros.executor import DEFAULT_ATTEMPTS, ExecutorSettings, Shipment, run_tasks, scheduler_address

__all__ = ["CampaignRequest", "CampaignRun", "run_campaign", "render_campaign_run", "case_request", "rerun_command",
           "prepare_case_context", "run_case", "case_result"]


@dataclass
class CampaignRequest:
    """What ``linz campaign`` takes.

    Attributes
    ----------
    source : str
        A plant file (built here; its artifact is written beside the report) or an artifact.
    campaign : str, optional
        A campaign file (``campaign:`` section or the keys alone); default: the plant file's
        ``campaign:`` section, else every default.
    out : str, optional
        Output folder (default ``linz_out/<plant>-campaign``).
    runs, seed : int, optional
        Override the section's.
    worst : int
        Worst cases listed.
    workers, scheduler, attempts
        Of the executor (:class:`linz_ros.executor.ExecutorSettings`).
    integrator, backend, physics, substeps
        Of every run (as ``linz sim``).
    plots, progress, allow_plant_change, trusted_keys, design
        As ``linz sim``.
    """

    source: str
    campaign: str | None = None
    out: str | None = None
    runs: int | None = None
    seed: int | None = None
    worst: int = 5
    workers: int | None = None
    scheduler: str | None = None
    attempts: int = DEFAULT_ATTEMPTS
    integrator: str = SimRequest.integrator
    backend: str = SimRequest.backend
    physics: str = SimRequest.physics
    substeps: int = SimRequest.substeps
    plots: bool = True
    progress: bool = False
    allow_plant_change: bool = False
    trusted_keys: list[str] = field(default_factory=list)
    design: DesignChoices = field(default_factory=DesignChoices)


@dataclass
class CampaignRun:
    """A finished (or interrupted) campaign: its summary, outcome and folder."""

    summary: dict[str, Any]
    outcome: CampaignOutcome
    out: Path

    @property
    def exit_code(self) -> int:
        """0: every case succeeded; 3: failed, refused, errored or lost cases; 130: interrupted."""
        if self.outcome.interrupted:
            return 130
        good = all(self.outcome.succeeded(r) for r in self.outcome.results.values())
        return 0 if good and not self.outcome.lost else EXIT_FINDINGS


# ---------------------------------------------------------------- one case

def _number_text(value: float) -> str:
    """A float as text that reads back to the same float (Python's shortest round-trip repr)."""
    return repr(float(value))


def case_request(spec: CampaignSpec, case: Case, base: SimRequest) -> SimRequest:
    """The ``linz sim`` request of one case: the campaign's shared request with the case's own values.

    Parameters
    ----------
    spec : CampaignSpec
    case : Case
    base : SimRequest
        What every case shares (artifact, integrator, backend, physics, sub-steps, forced start,
        plant-change and key options); the rest is the case's.

    Returns
    -------
    SimRequest
    """
    initial = [f"{k}={_number_text(v)}" for k, v in case.of_kind(spec, "initial").items()]
    mismatch = [f"{k}={_number_text(v)}" for k, v in case.of_kind(spec, "mismatch").items()]
    return dataclasses.replace(base, duration=spec.duration, reference=case.reference or None, mismatch=mismatch,
                               noise=list(spec.noise), delay=float(case.delay(spec)), initial=initial,
                               watchdog=list(spec.watchdog), seed=case.seed, plots=False)


def rerun_command(request: SimRequest) -> str:
    """The ``linz sim`` command line that runs ``request`` (the inverse of its option parser).

    Parameters
    ----------
    request : SimRequest

    Returns
    -------
    str
    """
    words = ["linz", "sim", request.source, "--duration", _number_text(request.duration)]
    if request.reference:
        words += ["--reference", request.reference]
    for option, items in (("--initial", request.initial), ("--mismatch", request.mismatch),
                          ("--noise", request.noise), ("--watchdog", request.watchdog),
                          ("--trusted-key", request.trusted_keys)):
        for item in items:
            words += [option, item]
    if request.delay:
        words += ["--delay", _number_text(request.delay)]
    defaults = SimRequest(source="")
    for option, name in (("--integrator", "integrator"), ("--backend", "backend"), ("--physics", "physics"),
                         ("--substeps", "substeps")):
        if getattr(request, name) != getattr(defaults, name):
            words += [option, str(getattr(request, name))]
    words += ["--seed", str(request.seed)]
    if request.force_initial:
        words.append("--force-initial")
    if request.allow_plant_change:
        words.append("--allow-plant-change")
    return shlex.join(words)


@dataclass(frozen=True)
class CaseItem:
    """What a worker receives for one case: the case and the request every case shares."""

    spec: CampaignSpec
    case: Case
    base: SimRequest


def prepare_case_context(text: str) -> Any:
    """A worker's artifact, loaded from the shipped text (already checked against its hash).

    Parameters
    ----------
    text : str

    Returns
    -------
    Artifact
    """
    from linz_ros.artifact import artifact_from_text

    return artifact_from_text(text, source="the campaign's artifact (shipped)")


def run_case(artifact: Any, item: CaseItem) -> CaseResult:
    """Run one case exactly as ``linz sim`` runs its request, and judge it.

    Parameters
    ----------
    artifact : Artifact
    item : CaseItem

    Returns
    -------
    CaseResult
        Verdict ``refused`` with the one-line reason when the run could not start there
        (outputs undefined at its initial state, a reference the state cannot take ...).
    """
    from linz_ros.errors import LinzError
    from linz_ros.runtime import simulate

    request = case_request(item.spec, item.case, item.base)
    try:
        settings = run_settings(artifact, request)
        result = simulate(artifact, settings)
    except LinzError as err:
        return CaseResult(item.case.index, REFUSED, None, str(err), None)
    return case_result(item.case.index, result)


def case_result(index: int, result: Any) -> CaseResult:
    """A run's numbers as a campaign keeps them.

    Parameters
    ----------
    index : int
    result : SimResult

    Returns
    -------
    CaseResult
    """
    summary = result.summary()
    errors = np.abs(result.errors())
    bounds = np.array([b if b and math.isfinite(b) else 1.0 for b in (result.config.divergence_error or ())]
                      or [1.0] * errors.shape[1])
    with np.errstate(invalid="ignore", over="ignore"):
        scaled = errors / bounds
    finite = scaled[np.isfinite(scaled)]
    severity = float(finite.max()) if finite.size else None
    if not np.all(np.isfinite(errors[-1:])) or summary["verdict"] == "diverged":
        severity = math.inf if severity is None else max(severity, 1.0)
    outputs = summary["outputs"]
    return CaseResult(
        index=index, verdict=summary["verdict"], verdict_at=summary["verdict_at"], detail=summary["verdict_detail"],
        severity=None if severity is None or not math.isfinite(severity) else severity,
        max_error={k: o["max_error"] for k, o in outputs.items()},
        rms_error={k: (o["rms_error"] if o["rms_error"] is not None and math.isfinite(o["rms_error"]) else None)
                   for k, o in outputs.items()},
        min_sigma=summary["min_sigma"], saturated=max(summary["saturated_fraction"].values(), default=0.0),
        steps=summary["steps"], backend="/".join(result.backend) if result.backend else "")


# ---------------------------------------------------------------- the campaign

def _campaign_section(request: CampaignRequest, loaded: Any) -> tuple[Any, str]:
    """The section as parsed YAML and where it came from."""
    from linz_ros.model import read_yaml_file

    if request.campaign:
        document = read_yaml_file(request.campaign)
        if document is None:
            raise ConfigError(request.campaign, "empty; expected a campaign: section or its keys")
        if isinstance(document, dict) and CAMPAIGN_KEY in document:
            return document[CAMPAIGN_KEY], request.campaign
        return document, request.campaign
    if loaded.document is not None:           # built here from a plant file
        document = read_yaml_file(request.source)
        return (document.get(CAMPAIGN_KEY) if isinstance(document, dict) else None), request.source
    return None, f"{request.source} (defaults: no --campaign file)"


def _artifact_file(request: CampaignRequest, loaded: Any, out: Path) -> Path:
    """The artifact the cases run: the one given, or the one built here, written beside the report."""
    if loaded.document is None:
        return Path(request.source)
    from linz_ros.codegen import write_artifact

    return write_artifact(loaded.document, out / f"{loaded.artifact.name}.artifact.json")


def _outside_envelope(spec: CampaignSpec, artifact: Any) -> bool:
    envelope = artifact.envelope
    return any(f.kind == "initial" and f.name in envelope
               and (f.low < envelope[f.name][0] or f.high > envelope[f.name][1]) for f in spec.factors)


#: The section's key of each ``linz sim`` option a campaign fills in (errors name the key).
_SECTION_KEYS = {"--reference": "references", "--noise": "noise", "--watchdog": "watchdog", "--delay": "delay",
                 "--duration": "duration", "--initial": "initial", "--mismatch": "mismatch"}


def _check_first_cases(artifact: Any, spec: CampaignSpec, cases: list[Case], base: SimRequest) -> None:
    """Settings every case shares (noise, watchdog, references) checked once here: a mistake is one line
    naming the section's key.

    Each reference is tried from the operating point; a case whose own state refuses it is
    reported as refused instead.
    """
    from linz_ros.runtime import simulate

    class Checked(Exception):
        """Raised at the run's first step: every setting was checked by then."""

    def stop(fraction: float) -> None:
        raise Checked

    factor = spec.factor("delay", "delay")
    longest = spec.delay if factor is None else factor.high        # the range, not only the cases drawn
    seen: set[str] = set()
    for case in cases:
        if case.reference in seen:
            continue
        request = case_request(spec, case, base)
        request.initial, request.force_initial = [], True
        try:
            settings = run_settings(artifact, request)
            if not seen:      # linz sim's own checks of the run (length, delay, plant, physics, integration)
                try:
                    simulate(artifact, dataclasses.replace(settings, delay=longest), progress=stop)
                except Checked:
                    pass
        except ConfigError as err:
            key = _SECTION_KEYS.get(err.field)
            if key is None:
                raise
            raise ConfigError(f"{spec.source}: {CAMPAIGN_KEY}.{key}", err.problem) from None
        seen.add(case.reference)


def run_campaign(request: CampaignRequest) -> CampaignRun:
    """Draw the cases, run them on the executor, judge them and write the report.

    Parameters
    ----------
    request : CampaignRequest

    Returns
    -------
    CampaignRun

    Raises
    ------
    LinzError
        For a mistake in the source, the section or the options (before any case runs).
    """
    from linz_ros.campaign.report import campaign_summary, write_campaign_files

    settings = ExecutorSettings(workers=request.workers, scheduler=request.scheduler, attempts=request.attempts)
    if not isinstance(request.worst, int) or not 0 <= request.worst <= 1000:
        raise ConfigError("--worst", f"expected a whole number from 0 to 1000, got {request.worst}")
    loaded = load_source(request.source, request.design, request.allow_plant_change, request.trusted_keys)
    artifact = loaded.artifact
    section, where = _campaign_section(request, loaded)
    spec = read_campaign(section, artifact, where)
    overrides = {k: v for k, v in (("runs", request.runs), ("seed", request.seed)) if v is not None}
    if overrides:
        try:
            spec = read_campaign({**(section or {}), **overrides}, artifact, where)
        except ConfigError as err:        # the section passed above: the option is what is wrong
            key = err.field.rpartition(".")[2]
            raise (ConfigError(f"--{key}", err.problem) if key in overrides else err) from None
    out = Path(request.out or Path(DEFAULT_OUT) / f"{artifact.name}-campaign")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise ConfigError("--out", f"cannot write to {out}: {err.strerror}") from None
    artifact_path = _artifact_file(request, loaded, out).resolve()      # a rerun works from any folder
    shipped, artifact = _shipped(artifact_path, artifact, built=loaded.document is not None)
    base = SimRequest(str(artifact_path), integrator=request.integrator, backend=request.backend,
                      physics=request.physics, substeps=request.substeps,
                      force_initial=_outside_envelope(spec, artifact),
                      allow_plant_change=request.allow_plant_change, trusted_keys=list(request.trusted_keys))
    if request.physics == "mujoco" and scheduler_address(settings) is not None:
        raise ConfigError("--physics", "mujoco reads the arm's URDF beside the recorded plant file, which Dask "
                                       "workers need not see; run it on local workers (without --scheduler)")
    cases = draw_cases(spec)
    _check_first_cases(artifact, spec, cases, base)
    bar = ProgressBar(request.progress, f"campaign {artifact.name}")
    started = time.perf_counter()
    try:
        execution = run_tasks(prepare_case_context, run_case, Shipment.of(shipped),
                              [CaseItem(spec, c, base) for c in cases], settings,
                              lambda done, total: bar(done / total, f"{done}/{total} runs "))
    finally:
        bar.close()
    outcome = _outcome(spec, cases, execution, base, str(artifact_path), time.perf_counter() - started)
    if base.force_initial:
        outcome.notes.append("initial ranges reach outside the envelope: every run was started with --force-initial")
    summary = campaign_summary(outcome, artifact, request.worst)
    summary["files"] = [str(artifact_path)] * (loaded.document is not None) + [str(out / "summary.json")]
    try:
        # the summary first: a Ctrl-C while the plots are drawn keeps it (and says the files stopped)
        (out / "summary.json").write_text(json.dumps(summary, indent=2) + "\n")
        if request.plots:
            files = write_campaign_files(outcome, artifact, summary, out)
            summary["files"][-1:-1] = [str(f) for f in files if f.name != "summary.json"]
            (out / "summary.json").write_text(json.dumps(summary, indent=2) + "\n")
    except KeyboardInterrupt:
        outcome.interrupted = True
        summary["notes"] = list(summary.get("notes", [])) + ["interrupted while writing the report files: "
                                                             "summary.json holds every result"]
    except OSError as err:
        raise ConfigError("--out", f"cannot write to {out}: {err.strerror}") from None
    return CampaignRun(summary, outcome, out)


def _shipped(path: Path, artifact: Any, built: bool) -> tuple[str, Any]:
    """The text shipped to the workers and the artifact it holds: the very file the reruns name.

    A loaded artifact must still be the one checked here (hash, signature); one built here is the
    file just written (which records where its plant file is, so it has a hash of its own).
    """
    text = path.read_text()
    shipped = prepare_case_context(text)
    if not built and shipped.sha256 != artifact.sha256:
        raise ConfigError(str(path), "changed while the campaign was being set up; run it again")
    return text, shipped


def _outcome(spec: CampaignSpec, cases: list[Case], execution: Any, base: SimRequest, artifact_path: str,
             wall_seconds: float) -> CampaignOutcome:
    results: dict[int, CaseResult] = {}
    lost: dict[int, str] = {}
    for index, task in sorted(execution.outcomes.items()):
        if task.lost is not None:
            lost[index] = task.lost
        elif task.refused is not None:
            results[index] = CaseResult(index, REFUSED, None, task.refused, None)
        elif task.error is not None:
            results[index] = CaseResult(index, ERRORED, None, task.error, None)
        else:
            results[index] = task.value
    rerun = {c.index: rerun_command(case_request(spec, c, base)) for c in cases}
    attempts = {k: task.attempts for k, task in sorted(execution.outcomes.items())}
    return CampaignOutcome(spec, cases, results, lost, execution.interrupted, execution.where, execution.workers,
                           wall_seconds, rerun, artifact_path, attempts)


def render_campaign_run(run: CampaignRun, as_json: bool = False) -> str:
    """What ``linz campaign`` prints.

    Parameters
    ----------
    run : CampaignRun
    as_json : bool

    Returns
    -------
    str
    """
    from linz_ros.campaign.report import render_campaign

    return json.dumps(run.summary, indent=2) if as_json else render_campaign(run.summary)
