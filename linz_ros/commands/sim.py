"""``linz sim``: the sampled closed loop offline; CSV, plots, an optional field log and a summary."""

from __future__ import annotations

import dataclasses
import json
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

from linz_ros.commands._common import DEFAULT_OUT, load_source
from linz_ros.commands._options import DesignChoices, noise_levels, state_vector, watchdog_overrides
from linz_ros.errors import ConfigError
from linz_ros.logs.report import tracking_line

__all__ = ["ProgressBar", "SimRequest", "SimRun", "render_sim", "run_settings", "simulate_run"]


@dataclass
class SimRequest:
    """One offline run, as ``linz sim`` takes it (item lists as written: ``NAME=VALUE``).

    Attributes
    ----------
    source : str
        A plant file (built in memory) or an artifact (``*.json``).
    out : str, optional
        Output folder (default ``linz_out/<plant>-sim``).
    duration, delay : float
        Seconds.
    reference : str, optional
        A reference spec; default the plant's ``design.reference``, else hold.
    mismatch, noise, initial, watchdog : list of str
        ``PARAM=PCT``, ``SIGMA`` or ``STATE=SIGMA``, ``STATE=VALUE``, ``SETTING=VALUE``.
    force_initial : bool
        Accept an initial state outside the envelope.
    integrator : {"rk4", "scipy"}
    backend : {"native", "python"}
        Of the control step and the plant.
    physics : {"model", "mujoco"}
        The plant: our integrator of the artifact's dynamics, or MuJoCo on its URDF.
    substeps, seed : int
    plots : bool
    progress : bool
        A progress bar on stderr.
    allow_plant_change : bool
    field_log : str, optional
        Folder for a field log of every step.
    trusted_keys : list of str
    design : DesignChoices
        With a plant file only.
    """

    source: str
    out: str | None = None
    duration: float = 5.0
    reference: str | None = None
    mismatch: list[str] = field(default_factory=list)
    noise: list[str] = field(default_factory=list)
    delay: float = 0.0
    initial: list[str] = field(default_factory=list)
    force_initial: bool = False
    watchdog: list[str] = field(default_factory=list)
    integrator: str = "rk4"
    backend: str = "native"
    physics: str = "model"
    substeps: int = 4
    seed: int = 1
    plots: bool = True
    progress: bool = False
    allow_plant_change: bool = False
    field_log: str | None = None
    trusted_keys: list[str] = field(default_factory=list)
    design: DesignChoices = field(default_factory=DesignChoices)


@dataclass
class SimRun:
    """What a run gave: the summary (``linz sim --json``, files included) and its folder."""

    summary: dict[str, Any]
    out: Path

    @property
    def warnings(self) -> list[str]:
        """The design's warnings, which a run repeats."""
        return list(self.summary["design_warnings"])


class ProgressBar:
    """A one-line progress bar on stderr with the time spent and an estimate of the time left.

    Redrawn at most ten times a second; the estimate is the time spent per fraction done,
    times the fraction left (said once a twentieth is done).

    Parameters
    ----------
    enabled : bool
    label : str
    """

    def __init__(self, enabled: bool, label: str) -> None:
        self.enabled = enabled
        self.label = label
        self.last = 0.0
        self.started = time.monotonic()
        self.drawn = False            # a bar is on the line, not yet ended

    def __call__(self, fraction: float, detail: str = "") -> None:
        if not self.enabled:
            return
        now = time.monotonic()
        if fraction < 1.0 and now - self.last < 0.1:
            return
        self.last = now
        filled = int(round(30 * fraction))
        spent = now - self.started
        left = f", about {spent * (1.0 - fraction) / fraction:5.0f} s left" if 0.05 <= fraction < 1.0 else ""
        sys.stderr.write(f"\r{self.label} [{'#' * filled}{'.' * (30 - filled)}] {100 * fraction:5.1f}% "
                         f"{detail}{spent:5.1f} s{left}   ")
        if fraction >= 1.0:
            sys.stderr.write("\n")
        self.drawn = fraction < 1.0
        sys.stderr.flush()

    def close(self) -> None:
        """End a bar left unfinished (an interrupted run), so what follows starts on a line of its own."""
        if self.drawn:
            sys.stderr.write("\n")
            sys.stderr.flush()
            self.drawn = False


def _reference(artifact: Any, text: str | None, x0: list[float], given_initial: bool):
    from linz_ros.runtime import ControllerCore, parse_reference
    from linz_ros.runtime.closed_loop import initial_outputs

    try:
        base = initial_outputs(ControllerCore(artifact), x0)
    except ConfigError as err:
        # the state is the user's (--initial) or the artifact's operating point
        where = "--initial" if given_initial else f"{artifact.source}: the operating point"
        raise ConfigError(where, err.problem) from None
    try:
        return parse_reference(text or artifact.design_reference or "hold", artifact.relative_degree, base,
                               artifact.outputs)
    except ConfigError as err:
        if text:
            problem = err.problem if err.field == "reference" else str(err)   # "reference duration: ..." keeps its name
            raise (err if err.field == "--reference" else ConfigError("--reference", problem)) from None
        raise ConfigError(f"{artifact.plant_source}: design.reference", err.problem) from None


def _check_initial_inside_envelope(artifact: Any, x0: list[float]) -> None:
    """Refuse an initial state outside the envelope (the design was checked only inside it)."""
    envelope = artifact.envelope
    for name, value in zip(artifact.states, x0):
        if name in envelope and not envelope[name][0] <= value <= envelope[name][1]:
            lo, hi = envelope[name]
            raise ConfigError("--initial", f"{name} = {value:g} lies outside the envelope [{lo:g}, {hi:g}]; "
                                           "add --force-initial to run it anyway")


def run_settings(artifact: Any, request: SimRequest):
    """The closed loop's settings for a request, every item checked against the artifact.

    Parameters
    ----------
    artifact : Artifact
    request : SimRequest

    Returns
    -------
    SimSettings

    Raises
    ------
    ConfigError
    """
    from linz_ros.runtime import SimSettings, mismatched_parameters, parse_assignments

    x0 = state_vector(artifact, request.initial, "--initial", artifact.operating_point)
    if not request.force_initial:
        _check_initial_inside_envelope(artifact, x0)
    return SimSettings(
        duration=request.duration, reference=_reference(artifact, request.reference, x0, bool(request.initial)),
        initial=x0,
        plant_parameters=(mismatched_parameters(artifact, parse_assignments(request.mismatch, "--mismatch"))
                          if request.mismatch else None),
        noise=noise_levels(artifact, request.noise), delay=request.delay, substeps=request.substeps,
        integrator=request.integrator, seed=request.seed, config=watchdog_overrides(artifact, request.watchdog),
        backend=request.backend, physics=request.physics)


def _simulate(artifact: Any, settings: Any, request: SimRequest, progress: Callable[[float], None]):
    """The run, with its field log when asked for; the log's status (None without one)."""
    from linz_ros.runtime import WatchdogConfig, simulate

    field_log = None
    if request.field_log:
        from linz_ros.runtime.fieldlog import FieldLogSettings, open_field_log

        config = settings.config or WatchdogConfig.from_artifact(artifact)
        field_log = open_field_log(FieldLogSettings(Path(request.field_log), prefix=f"{artifact.name}_sim"), artifact,
                                   config, dataclasses.asdict(request), source="linz sim")
    try:
        result = simulate(artifact, settings, progress=progress, field_log=field_log)
    finally:
        status = field_log.close() if field_log is not None else None
    if status is not None and status.state != "closed":
        raise ConfigError("--field-log", f"the field log was not written completely: {status.error or status.state}")
    return result, status


def simulate_run(request: SimRequest) -> SimRun:
    """Run the closed loop offline and write its CSV, plots, artifact (when built here) and summary.

    Parameters
    ----------
    request : SimRequest

    Returns
    -------
    SimRun

    Raises
    ------
    LinzError
    """
    from linz_ros.runtime import parse_assignments

    loaded = load_source(request.source, request.design, request.allow_plant_change, request.trusted_keys)
    artifact = loaded.artifact
    progress = ProgressBar(request.progress, f"sim {artifact.name}")
    result, status = _simulate(artifact, run_settings(artifact, request), request, progress)
    out = Path(request.out or Path(DEFAULT_OUT) / f"{artifact.name}-sim")
    try:
        out.mkdir(parents=True, exist_ok=True)
        files = [result.write_csv(out / "run.csv")]
        if request.plots:
            from linz_ros.plotting import plot_run

            files.extend(plot_run(result, out))
        if loaded.document is not None:
            from linz_ros.codegen import write_artifact

            files.append(write_artifact(loaded.document, out / f"{artifact.name}.artifact.json"))
        summary = result.summary()
        summary["design_warnings"] = artifact.design_warnings
        summary["mismatch_percent"] = parse_assignments(request.mismatch, "--mismatch")
        summary["files"] = [str(f) for f in files] + ([str(f) for f in status.files] if status else [])
        (out / "summary.json").write_text(json.dumps(summary, indent=2) + "\n")
    except OSError as err:
        raise ConfigError("--out", f"cannot write to {out}: {err.strerror}") from None
    summary["files"].append(str(out / "summary.json"))
    return SimRun(summary, out)


def _fmt(value: float | None, spec: str = ".3g") -> str:
    return "n/a" if value is None else format(value, spec)


def render_sim(summary: dict[str, Any], as_json: bool = False, title: str = "sim") -> str:
    """A run's summary as ``linz sim`` prints it.

    Parameters
    ----------
    summary : dict
        :meth:`SimResult.summary` with ``files``.
    as_json : bool
    title : str
        The first word (the demo's bringup says ``bringup``).

    Returns
    -------
    str
    """
    if as_json:
        return json.dumps(summary, indent=2)
    lines = [f"{title} {summary['plant']}: {summary['duration']:g} s at {summary['rate']:g} Hz, "
             f"{summary['steps']} steps"]
    at = "" if summary["verdict_at"] is None else f" at t = {summary['verdict_at']:.4g} s"
    lines.append(f"  verdict: {summary['verdict']}{at} ({summary['verdict_detail']})")
    for name, o in summary["outputs"].items():
        rate = ("no decay rate (the run did not track)" if summary["verdict"] != "tracked"
                else "no decay rate (the error did not decay through the fitting window)" if o["decay_rate"] is None
                else f"fitted decay rate {_fmt(o['decay_rate'])} 1/s")
        lines.append(f"{tracking_line(name, o)}; {rate}")
    modes = ", ".join(f"{m} {t:.3g} s" for m, t in summary["time_in_mode"].items() if t > 0)
    lines.append(f"  min sigma {_fmt(summary['min_sigma'])}, max condition {_fmt(summary['max_condition'])}; "
                 f"modes: {modes}")
    saturated = ", ".join(f"{u} {100 * f:.1f}%" for u, f in summary["saturated_fraction"].items())
    lines.append(f"  saturated: {saturated}")
    alarms = ", ".join(f"{name.replace('_', ' ')} {count} step(s)" for name, count in summary["alarm_steps"].items()
                       if count)
    if alarms:
        lines.append(f"  watchdog alarms: {alarms}")
    ct = summary["compute_time_us"]
    if ct:
        lines.append(f"  step compute time: p50 {ct['p50']:.1f} us, p99 {ct['p99']:.1f} us")
    backend, speed = summary.get("backend"), summary.get("steps_per_second")
    if backend is not None:              # an offline run (a bringup's summary comes from the field log)
        lines.append(f"  {backend['step']} control step, {backend['plant']} plant: "
                     + (f"{speed:,.0f} simulated steps per second here" if speed else "no steps timed"))
    if summary.get("physics") is not None:
        lines.append(f"  physics: {summary['physics']}")
    lines.extend(f"  note: {note}" for note in summary["notes"])
    lines.append("wrote " + ", ".join(summary["files"]))
    return "\n".join(lines)
