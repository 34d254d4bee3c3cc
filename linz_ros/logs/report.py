"""Field-log reports: terminal text, CSV, PNG plots and one self-contained HTML page.

Plots: those of every run, drawn by :mod:`linz_ros.plotting` from the log's
:func:`log_view` (outputs, tracking error on a log scale, states in their envelope,
inputs against their limits, sigma_min with the watchdog levels and the mode; units on
every axis, the run verdict in every title); and the recorded trajectory with its
near-singular steps over the singular set ``s(x) = 0``, evaluated from the artifact's
``singular_set`` program on a grid in the slice where the run was: the other states held
at their median over the near-singular steps, in the plane along which s changes most
over the run's own range.
"""

from __future__ import annotations

import html
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from linz_ros.artifact import Artifact
from linz_ros.logs.analysis import log_verdict, thresholds_of
from linz_ros.logs.reader import StepLog, metadata_json
from linz_ros.plotting import (NO_UNIT, RunView, draw_singular_set, pyplot, save_figure, sigma_label, title_figure,
                               unit_label, write_plots)
from linz_ros.plotting.page import embedded_image, html_table, page
from linz_ros.runtime import WatchdogConfig
from linz_ros.runtime.extension import command_limits
from linz_ros.runtime.steprecord import write_csv as write_run_csv

__all__ = ["summary_text", "write_csv", "plot_log", "write_html", "log_view", "singular_plane", "singular_slice",
           "singular_scatter_figure", "SingularSlice"]


def _fmt(value: Any, unit: str = "") -> str:
    if value is None:
        return "n/a"
    if isinstance(value, float):
        return f"{value:.4g}{unit}"
    return f"{value}{unit}"


def tracking_line(name: str, error: dict[str, Any]) -> str:
    """One output's tracking error as every text summary (``linz sim``, ``linz logs``) words it.

    Parameters
    ----------
    name : str
        The output.
    error : dict
        ``rms_error``, ``final_error``, ``max_error`` and ``unit`` (None when not stated).

    Returns
    -------
    str
    """
    unit = f" {error['unit']}" if error.get("unit") else ""
    return (f"  tracking error of {name} (y - ref): rms {_fmt(error['rms_error'], unit)}, final "
            f"{_fmt(error['final_error'], unit)}, max {_fmt(error['max_error'], unit)}"
            + ("" if unit else f" ({NO_UNIT})"))


def summary_text(summary: dict[str, Any]) -> str:
    """The summary for a terminal.

    Parameters
    ----------
    summary : dict
        From :func:`linz_ros.logs.analysis.summarise`.

    Returns
    -------
    str
    """
    s = summary
    lines = [f"log of {s['plant'] or 'unknown plant'}: {s['records']} records, {_fmt(s['duration'], ' s')} "
             f"at {_fmt(s['rate_hz'], ' Hz')}, {len(s['files'])} file(s)"]
    verdict = s.get("verdict")
    if verdict:
        at = "" if verdict["at"] is None else f" at t = {verdict['at']:.4g} s"
        lines.append(f"  verdict: {verdict['word']}{at} ({verdict['detail']})")
    lines.extend(tracking_line(name, o) for name, o in s.get("tracking", {}).items())
    levels = s["thresholds"]
    if levels:
        lines.append(f"  watchdog levels ({levels['source']}): warn {levels['sigma_warn']:g}, "
                     f"act {levels['sigma_act']:g}, stop {levels['sigma_stop']:g}")
    else:
        lines.append("  watchdog levels unknown (a bag: pass --artifact); the controller's own flags are used")
    lines.append(f"  min sigma {_fmt(s['min_sigma'])}, max condition {_fmt(s['max_condition'])}")
    for key, label in (("under_warn", "under the warn level"), ("under_act", "under the act level (damped)")):
        group = s["near_singular"][key]
        lines.append(f"  {label}: {group['count']} episode(s), {_fmt(group['total_time'], ' s')} in all, "
                     f"longest {_fmt(group['longest'], ' s')}")
        shown = sorted(sorted(group["episodes"], key=lambda e: -e["duration"])[:5], key=lambda e: e["start"])
        if len(shown) < group["count"]:
            lines.append(f"    the {len(shown)} longest:")
        for e in shown:
            state, modes = _episode_words(e)
            lines.append(f"    at {e['start']:.3f} s for {e['duration']:.3f} s: min sigma {_fmt(e['min_sigma'])}"
                         f" at {e['worst_time']:.3f} s" + (f" ({state})" if state else "") + "; " + modes)
    modes = ", ".join(f"{m} {v:.3g} s" for m, v in s["time_in_mode"].items() if v)
    lines.append(f"  modes: {modes or 'none'}; {s['mode_switches']['count']} switch(es)"
                 + (" (" + ", ".join(f"{k} {v}" for k, v in s["mode_switches"]["by_kind"].items()) + ")"
                    if s["mode_switches"]["count"] else ""))
    for name, group in s["saturation"].items():
        lines.append(f"  saturated {name}: {100 * group['fraction']:.1f}% of steps, {group['count']} episode(s), "
                     f"longest {_fmt(group['longest'], ' s')}")
    if s["refused"]:
        lines.append("  refused states: " + ", ".join(f"{k} {v['records']} step(s) in {v['count']} episode(s)"
                                                      for k, v in s["refused"].items()))
    else:
        lines.append("  refused states: none")
    for name, group in s.get("watchdog_alarms", {}).items():
        acted = f"acted on {group['acted']} (safe command or controlled stop)" if group["acted"] else "warned only"
        lines.append(f"  watchdog {name}: {group['records']} step(s) in {group['count']} episode(s) from "
                     f"{group['first']:.3f} s, {acted}")
    c = s["compute_time_us"]
    lines.append(f"  step compute time: p50 {_fmt(c['p50'], ' us')}, p99 {_fmt(c['p99'], ' us')}, "
                 f"p99.9 {_fmt(c['p99.9'], ' us')}, max {_fmt(c['max'], ' us')}")
    dropped = s["dropped_by_writer"]
    lines.append(f"  records missing in the files: {s['missing_records']}"
                 + (f"; dropped by the writer (as it reported): {dropped}" if dropped is not None else ""))
    gaps = s["control_gaps"]
    lines.append(f"  control-loop gaps over {gaps['periods']:g} periods: {gaps['count']}"
                 + (f" (longest {1000 * gaps['longest_s']:.1f} ms between steps)" if gaps["count"] else ""))
    for f in s["cut_files"]:
        lines.append(f"  {f}: not closed cleanly (crash or kill): read up to its last flush")
    for problem in s["problems"]:
        lines.append(f"  problem: {problem}")
    return "\n".join(lines)


def write_csv(log: StepLog, path: str | Path) -> Path:
    """Every record as a CSV row: ``log_time`` and ``sequence``, then the columns of every run's
    CSV (``linz_ros.runtime.steprecord.write_csv``; the reference's derivatives, which a log
    does not record, as nan).

    Parameters
    ----------
    log : StepLog
    path : str or pathlib.Path

    Returns
    -------
    pathlib.Path
    """
    steps = log.decoded()
    degrees = metadata_json(log, "linz_artifact", "relative_degree")
    if not (isinstance(degrees, list) and len(degrees) == len(steps.outputs)
            and all(isinstance(r, int) and r >= 0 for r in degrees) and sum(degrees) <= len(steps.states)):
        degrees = None                # a bag, or metadata that does not fit (sum r_i <= n): y_ref columns only
    lead = {"log_time": [f"{when:.9f}" for when in log.log_time], "sequence": [int(v) for v in log.sequence]}
    return write_run_csv(path, steps.result_fields(degrees, from_zero=False), steps.states, steps.outputs,
                         steps.inputs, degrees, lead)


def log_view(log: StepLog, artifact: Artifact | None = None) -> RunView:
    """The plots' view of a log (see :mod:`linz_ros.plotting`): its records, with the artifact's
    units, envelope, limits and the run verdict when an artifact is known.

    Parameters
    ----------
    log : StepLog
    artifact : Artifact, optional
        The controller's: units, envelope, input limits, divergence bounds and the verdict.

    Returns
    -------
    RunView
    """
    steps = log.decoded()
    levels = thresholds_of(log, artifact)
    config = WatchdogConfig.from_artifact(artifact) if artifact is not None else None
    plant = artifact.name if artifact is not None else log.metadata.get("linz_artifact", {}).get("plant")
    return RunView(
        plant=str(plant or "field log"), t=steps.t, units=artifact.signal_units if artifact is not None else {},
        outputs=steps.outputs, y=steps.y, ref=steps.ref if steps.outputs and log.names("ref") == steps.outputs
        else None, inputs=steps.inputs, u=steps.u, saturated=steps.saturated,
        input_limits=command_limits(artifact, config) if artifact is not None else None, states=steps.states, x=steps.x,
        sigma_min=steps.sigma_min, mode=steps.mode, reason=steps.reason, alarms=steps.alarms,
        envelope=artifact.envelope if artifact is not None else {},
        envelope_margin=_recorded_margin(log, config),
        levels=None if levels is None else (levels.sigma_warn, levels.sigma_act, levels.sigma_stop),
        verdict=log_verdict(log, artifact), divergence_error=config.divergence_error if config is not None else (),
        relative_degree=list(artifact.relative_degree) if artifact is not None else [])


def _recorded_margin(log: StepLog, config: WatchdogConfig | None) -> float:
    """The envelope watchdog's margin in force when the log was written, else the artifact's."""
    try:
        margin = float(log.metadata.get("linz_watchdog", {})["envelope_margin"])
    except (KeyError, ValueError, TypeError):
        margin = math.nan
    if math.isfinite(margin) and margin >= 0:
        return margin
    return config.envelope_margin if config is not None else 0.0


@dataclass(frozen=True)
class SingularSlice:
    """Where the singular-set plot cuts the state space: the plane and the other states' values.

    Attributes
    ----------
    i, j : int
        The states along the two axes.
    base : numpy.ndarray
        Every state's value; the others than i and j are held there.
    basis : str
        Where ``base`` comes from, for the title.
    """

    i: int
    j: int
    base: np.ndarray
    basis: str


def singular_slice(artifact: Artifact, x: np.ndarray, near: np.ndarray) -> SingularSlice:
    """The slice of the state space where the run actually was.

    The other states are held at their median over the accepted near-singular steps (over
    all accepted steps when none was near-singular; at the operating point when no step was
    accepted); the plane is chosen by :func:`singular_plane` with the run's own range.

    Parameters
    ----------
    artifact : Artifact
    x : numpy.ndarray
        (steps, states) as recorded (nan where a step refused its state).
    near : numpy.ndarray of bool
        The near-singular steps.

    Returns
    -------
    SingularSlice
    """
    x = np.asarray(x, dtype=float).reshape(-1, len(artifact.states))
    accepted = np.isfinite(x).all(axis=1)
    chosen, basis = accepted & np.asarray(near, dtype=bool), "the near-singular steps"
    if not chosen.any():
        chosen, basis = accepted, "all accepted steps"
    points = x[chosen]
    if not len(points):
        points, basis = np.array([artifact.operating_point], dtype=float), "the operating point (no step accepted)"
    extent = np.ptp(x[accepted], axis=0) if accepted.any() else None
    i, j, base = singular_plane(artifact, points, extent)
    return SingularSlice(i, j, base, basis)


def singular_plane(artifact: Artifact, points: np.ndarray, extent: np.ndarray | None = None
                   ) -> tuple[int, int, np.ndarray]:
    """The two states along which the singular-set expression changes most near ``points``.

    Parameters
    ----------
    artifact : Artifact
    points : numpy.ndarray
        (k, n) recorded states; rows with a nan are left out. The base point is their
        median (the operating point when no row is left).
    extent : numpy.ndarray, optional
        How far the run moved along each state (default: the points' own range). A state
        scores |ds/dx_i| times its extent (what the run's motion along it could change s
        by); the sensitivity alone, then the extent, break ties.

    Returns
    -------
    (int, int, numpy.ndarray)
        The two state indices (in order) and the base point.
    """
    n = len(artifact.states)
    points = np.asarray(points, dtype=float).reshape(-1, n)
    points = points[np.isfinite(points).all(axis=1)]
    base = np.median(points, axis=0) if len(points) else np.asarray(artifact.operating_point, dtype=float)
    if extent is None:
        extent = np.ptp(points, axis=0) if len(points) else np.zeros(n)
    sensitivity = _sensitivity(artifact, base)
    if n < 2:
        return 0, 0, base
    order = sorted(range(n), key=lambda k: (sensitivity[k] * extent[k], sensitivity[k], extent[k]), reverse=True)
    i, j = sorted(order[:2])
    return i, j, base


def _sensitivity(artifact: Artifact, base: np.ndarray) -> list[float]:
    """|ds/dx_i| at ``base`` by forward differences (0 where s is not finite)."""
    program = artifact.numpy_program("singular_set")
    p = list(artifact.nominal_parameters)
    with np.errstate(all="ignore"):
        s0 = program.evaluate(list(base), p)["s"].ravel()[0]
        found = []
        for i in range(len(base)):
            step = 1e-4 * max(1.0, abs(base[i]))
            moved = base.copy()
            moved[i] += step
            s1 = program.evaluate(list(moved), p)["s"].ravel()[0]
            found.append(float(abs(s1 - s0) / step) if np.isfinite(s1) and np.isfinite(s0) else 0.0)
    return found


def singular_scatter_figure(view: RunView, artifact: Artifact | None, near: np.ndarray) -> Any | None:
    """The recorded trajectory and its near-singular steps over the singular set ``s(x) = 0``, in
    the slice where the run was (:func:`singular_slice`).

    Parameters
    ----------
    view : RunView
    artifact : Artifact or None
        Without one (or without a singular-set program) the records are drawn alone.
    near : numpy.ndarray of bool

    Returns
    -------
    matplotlib.figure.Figure or None
        None when the log records fewer than two states.
    """
    if view.x is None or len(view.states) < 2:
        return None
    x, states = view.x, view.states
    has_set = artifact is not None and artifact.has_program("singular_set") and list(artifact.states) == states
    where = singular_slice(artifact, x, near) if has_set else None
    i, j = (where.i, where.j) if where is not None else (0, 1)
    fig, ax = pyplot().subplots(figsize=(8, 7), layout="constrained")
    accepted = np.flatnonzero(np.isfinite(x[:, [i, j]]).all(axis=1))
    ax.plot(x[:, i], x[:, j], color="0.55", lw=0.7, label="recorded trajectory", zorder=1)
    if len(accepted):
        first, last = accepted[0], accepted[-1]
        ax.plot(x[first, i], x[first, j], "o", color="tab:green", label="start", zorder=4)
        ax.plot(x[last, i], x[last, j], "s", color="black", label="end", zorder=4)
    if near.any():
        points = ax.scatter(x[near, i], x[near, j], c=view.sigma_min[near], s=8, cmap="viridis_r", zorder=3,
                            label="near-singular steps")
        fig.colorbar(points, ax=ax, label=sigma_label(view))
    for k, line in ((i, ax.axvline), (j, ax.axhline)):
        for bound in view.envelope.get(states[k], ()):
            line(bound, color="tab:red", ls="--", lw=0.8)
    if where is not None:
        _draw_singular_set(ax, artifact, x, where)
        others = ", ".join(f"{states[k]}={where.base[k]:.4g}" for k in range(len(states)) if k not in (i, j))
        what = "the singular set s(x) = 0 where the run was" + (f"\n(other states at their median over "
                                                                 f"{where.basis}: {others})" if others else "")
    elif artifact is None:
        what = "the recorded states (no artifact: pass --artifact for the singular set)"
    else:
        what = "the recorded states (the artifact carries no singular-set expression)"
    ax.set_xlabel(unit_label(states[i], view.units))
    ax.set_ylabel(unit_label(states[j], view.units))
    ax.grid(True, alpha=0.3)
    ax.legend(loc="best", fontsize=7)
    title_figure(fig, view, what)
    return fig


def _draw_singular_set(ax: Any, artifact: Artifact, x: np.ndarray, where: SingularSlice) -> None:
    i, j = where.i, where.j
    draw_singular_set(ax, artifact, where.base, (i, j), (_span(x[:, i], artifact, i), _span(x[:, j], artifact, j)))
    ax.plot([], [], color="tab:red", ls="--", lw=0.8, label="envelope")


def _span(values: np.ndarray, artifact: Artifact, index: int) -> tuple[float, float]:
    finite = values[np.isfinite(values)]
    lo, hi = (float(finite.min()), float(finite.max())) if len(finite) else (-1.0, 1.0)
    envelope = artifact.envelope.get(artifact.states[index])
    if envelope:
        lo, hi = min(lo, float(envelope[0])), max(hi, float(envelope[1]))
    pad = 0.05 * (hi - lo) if hi > lo else 1.0
    return lo - pad, hi + pad


def plot_log(log: StepLog, out_dir: str | Path, artifact: Artifact | None = None) -> list[Path]:
    """Write the plots of a log: those of every run (:func:`linz_ros.plotting.write_plots`: outputs,
    tracking error, states, inputs, conditioning, as the log records them) and, with states,
    ``singular_scatter.png``.

    Parameters
    ----------
    log : StepLog
    out_dir : str or pathlib.Path
    artifact : Artifact, optional
        The controller's artifact (a field log carries it; a bag needs it given).

    Returns
    -------
    list of pathlib.Path
    """
    view = log_view(log, artifact)
    files = write_plots(view, out_dir)
    levels = thresholds_of(log, artifact)
    sigma = view.sigma_min
    with np.errstate(invalid="ignore"):
        near = (sigma < levels.sigma_warn) if levels is not None else log.decoded().warn
    scatter = singular_scatter_figure(view, artifact, near & np.isfinite(sigma))
    if scatter is not None:
        files.append(save_figure(scatter, Path(out_dir) / "singular_scatter.png"))
    return files


def write_html(summary: dict[str, Any], text: str, images: list[Path], path: str | Path) -> Path:
    """One self-contained HTML page that fits the width of any screen: the summary text, the
    tracking and episode tables and the plots inline.

    Parameters
    ----------
    summary : dict
    text : str
        :func:`summary_text` of the summary.
    images : list of pathlib.Path
        PNG files, embedded as data URIs.
    path : str or pathlib.Path

    Returns
    -------
    pathlib.Path
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    parts = [f"<pre>{html.escape(text)}</pre>", _tracking_table(summary.get("tracking", {}))]
    for key, title in (("under_warn", "Episodes under the warn level"), ("under_act", "Episodes under the act level")):
        parts.append(_episode_table(title, summary["near_singular"][key]["episodes"]))
    for name, group in summary["saturation"].items():
        if group["episodes"]:
            parts.append(_episode_table(f"Saturation of {name}", group["episodes"]))
    parts.extend(embedded_image(image) for image in images)
    plant = str(summary["plant"])
    path.write_text(page(f"field log: {plant}", f"Field log: {plant}", parts))
    return path


def _tracking_table(tracking: dict[str, dict[str, Any]]) -> str:
    rows = [[name, _fmt(o["rms_error"]), _fmt(o["final_error"]), _fmt(o["max_error"]), o["unit"] or NO_UNIT]
            for name, o in tracking.items()]
    return html_table("Tracking error (y - ref)", ["output", "rms", "final", "max", "unit"], rows)


def _episode_table(title: str, rows: list[dict[str, Any]]) -> str:
    head = ["start [s]", "duration [s]", "records", "min sigma", "state at worst", "modes"]
    return html_table(title, head, [[f"{e['start']:.3f}", f"{e['duration']:.3f}", str(e["records"]),
                                 _fmt(e["min_sigma"]), *_episode_words(e)] for e in rows])


def _episode_words(e: dict[str, Any]) -> tuple[str, str]:
    """An episode's state at its worst step and its modes, as text (``q1=0.5, q2=1.2``; ``damped 3``)."""
    state = ", ".join(f"{k}={v:.4g}" for k, v in e["state_at_worst"].items() if v is not None)
    return state, ", ".join(f"{m} {n}" for m, n in e["modes"].items())
