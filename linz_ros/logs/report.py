"""Field-log reports: terminal text, CSV, PNG plots and one self-contained HTML page.

Plots: sigma_min with the watchdog levels and the mode over time; each input against its
limits with saturated stretches shaded; and the near-singular records in the plane of the
two states the singular set depends on most, over the singular set ``s(x) = 0``
evaluated from the artifact's ``singular_set`` program on a grid (the other states held
at the median of the near-singular records).
"""

from __future__ import annotations

import base64
import csv
import html
import math
from pathlib import Path
from typing import Any

import numpy as np

from linz_ros.artifact import Artifact
from linz_ros.logs.analysis import Thresholds, saturated_inputs, thresholds_of
from linz_ros.logs.reader import StepLog
from linz_ros.runtime import MODES

__all__ = ["summary_text", "write_csv", "plot_log", "write_html"]


def _fmt(value: Any, unit: str = "") -> str:
    if value is None:
        return "n/a"
    if isinstance(value, float):
        return f"{value:.4g}{unit}"
    return f"{value}{unit}"


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
            state = ", ".join(f"{k}={v:.4g}" for k, v in e["state_at_worst"].items() if v is not None)
            lines.append(f"    at {e['start']:.3f} s for {e['duration']:.3f} s: min sigma {_fmt(e['min_sigma'])}"
                         f" at {e['worst_time']:.3f} s" + (f" ({state})" if state else "")
                         + "; " + ", ".join(f"{m} {n}" for m, n in e["modes"].items()))
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
    """Every record as a CSV row (``log_time`` and ``sequence`` first, then the labels; mode
    and reason as words).

    Parameters
    ----------
    log : StepLog
    path : str or pathlib.Path

    Returns
    -------
    pathlib.Path
    """
    from linz_ros.runtime import REASONS

    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    mode_i, reason_i = log.labels.index("mode"), log.labels.index("reason")
    with open(path, "w", newline="") as stream:
        writer = csv.writer(stream)
        writer.writerow(["log_time", "sequence", *log.labels])
        for when, seq, row in zip(log.log_time, log.sequence, log.values):
            cells: list[Any] = [f"{when:.9f}", int(seq)] + [repr(float(v)) for v in row]
            cells[2 + mode_i] = _word(MODES, row[mode_i])
            cells[2 + reason_i] = _word(REASONS, row[reason_i])
            writer.writerow(cells)
    return path


def _word(words: tuple[str, ...], code: float) -> str:
    return words[int(code)] if math.isfinite(code) and 0 <= int(code) < len(words) else str(code)


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _save(fig, path: Path, plt) -> Path:
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def _plot_conditioning(log: StepLog, levels: Thresholds | None, path: Path, plt) -> Path:
    t = log.column("t")
    fig, (ax, ax_mode) = plt.subplots(2, 1, figsize=(9, 5), sharex=True, gridspec_kw={"height_ratios": [3, 1]})
    sigma = log.column("sigma_min")
    ax.semilogy(t, np.where(sigma > 0, sigma, np.nan), lw=0.8, label="sigma_min(A)")
    if levels is not None:
        for value, name, style in ((levels.sigma_warn, "warn", ":"), (levels.sigma_act, "act", "--"),
                                   (levels.sigma_stop, "stop", "-")):
            if value > 0:
                ax.axhline(value, color="tab:red", ls=style, lw=0.9, label=f"{name} {value:.4g}")
    ax.set_ylabel("sigma_min")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(loc="best", fontsize=8)
    ax_mode.step(t, log.column("mode"), where="post", lw=0.9)
    ax_mode.set_yticks(range(len(MODES)), MODES)
    ax_mode.set_xlabel("time [s]")
    ax_mode.grid(True, alpha=0.3)
    fig.suptitle("conditioning of the decoupling matrix, and the controller mode")
    return _save(fig, path, plt)


def _plot_inputs(log: StepLog, limits: list[tuple[float, float]] | None, path: Path, plt) -> Path:
    t = log.column("t")
    inputs = log.names("u")
    u = log.block("u")
    saturated = saturated_inputs(log)
    fig, axes = plt.subplots(len(inputs), 1, figsize=(9, 2.2 * len(inputs) + 0.6), sharex=True, squeeze=False)
    for j, name in enumerate(inputs):
        ax = axes[j, 0]
        ax.plot(t, u[:, j], lw=0.8, label=name)
        if limits is not None and j < len(limits):
            for bound in limits[j]:
                if math.isfinite(bound):
                    ax.axhline(bound, color="tab:red", ls="--", lw=0.9)
        if saturated[:, j].any():
            low, high = np.nanmin(u[:, j]), np.nanmax(u[:, j])
            ax.fill_between(t, low, high, where=saturated[:, j], color="tab:orange", alpha=0.25, step="post",
                            label="saturated")
        ax.set_ylabel(name)
        ax.grid(True, alpha=0.3)
        ax.legend(loc="best", fontsize=8)
    axes[-1, 0].set_xlabel("time [s]")
    fig.suptitle("inputs against their limits")
    return _save(fig, path, plt)


def singular_plane(artifact: Artifact, points: np.ndarray) -> tuple[int, int, np.ndarray]:
    """The two states the singular-set expression depends on most near ``points``.

    Parameters
    ----------
    artifact : Artifact
    points : numpy.ndarray
        (k, n) states (the near-singular records); the sensitivity is taken at their median.

    Returns
    -------
    (int, int, numpy.ndarray)
        The two state indices and the base point (the median).
    """
    n = len(artifact.states)
    base = np.nanmedian(points, axis=0) if len(points) else np.zeros(n)
    base = np.where(np.isfinite(base), base, 0.0)
    program = artifact.numpy_program("singular_set")
    p = artifact.nominal_parameters
    s0 = program.evaluate(list(base), list(p))["s"].ravel()[0]
    sensitivity = []
    for i in range(n):
        step = 1e-4 * max(1.0, abs(base[i]))
        moved = base.copy()
        moved[i] += step
        s1 = program.evaluate(list(moved), list(p))["s"].ravel()[0]
        sensitivity.append(abs(s1 - s0) / step if np.isfinite(s1) and np.isfinite(s0) else 0.0)
    order = np.argsort(sensitivity)[::-1]
    i, j = (int(order[0]), int(order[1])) if n > 1 else (0, 0)
    return min(i, j), max(i, j), base


def _plot_state_scatter(log: StepLog, artifact: Artifact | None, near: np.ndarray, path: Path,
                        plt) -> Path | None:
    states = log.names("x")
    if len(states) < 2:
        return None
    x = log.block("x")
    sigma = log.column("sigma_min")
    fig, ax = plt.subplots(figsize=(7, 6))
    has_set = artifact is not None and artifact.has_program("singular_set")
    if has_set:
        i, j, base = singular_plane(artifact, x[near])
    else:
        i, j, base = 0, 1, np.zeros(len(states))
    xi, xj = x[:, i], x[:, j]
    ax.plot(xi, xj, color="0.8", lw=0.5, label="all records", zorder=1)
    if near.any():
        points = ax.scatter(xi[near], xj[near], c=sigma[near], s=8, cmap="viridis_r", zorder=3,
                            label="near-singular records")
        fig.colorbar(points, ax=ax, label="sigma_min")
    if has_set:
        lo_i, hi_i = _span(xi, artifact, i)
        lo_j, hi_j = _span(xj, artifact, j)
        gi, gj = np.meshgrid(np.linspace(lo_i, hi_i, 241), np.linspace(lo_j, hi_j, 241))
        grid = [np.full(gi.shape, v) for v in base]
        grid[i], grid[j] = gi, gj
        s = artifact.numpy_program("singular_set").evaluate(grid, list(artifact.nominal_parameters))["s"][0]
        s = np.broadcast_to(s, gi.shape)
        if np.nanmin(s) < 0 < np.nanmax(s) or np.any(s == 0):
            ax.contour(gi, gj, s, levels=[0.0], colors="tab:red", linewidths=1.5, zorder=2)
            ax.plot([], [], color="tab:red", label="singular set s(x) = 0")
        others = ", ".join(f"{states[k]}={base[k]:.3g}" for k in range(len(states)) if k not in (i, j))
        ax.set_title("near-singular records over the singular set" + (f"\n(other states at {others})"
                                                                       if others else ""), fontsize=10)
    else:
        ax.set_title("near-singular records (no singular-set expression: pass --artifact)", fontsize=10)
    ax.set_xlabel(states[i])
    ax.set_ylabel(states[j])
    ax.grid(True, alpha=0.3)
    ax.legend(loc="best", fontsize=8)
    return _save(fig, path, plt)


def _span(values: np.ndarray, artifact: Artifact, index: int) -> tuple[float, float]:
    finite = values[np.isfinite(values)]
    lo, hi = (float(finite.min()), float(finite.max())) if len(finite) else (-1.0, 1.0)
    envelope = artifact.envelope.get(artifact.states[index])
    if envelope:
        lo, hi = min(lo, float(envelope[0])), max(hi, float(envelope[1]))
    pad = 0.05 * (hi - lo) if hi > lo else 1.0
    return lo - pad, hi + pad


def plot_log(log: StepLog, out_dir: str | Path, artifact: Artifact | None = None) -> list[Path]:
    """Write ``conditioning.png``, ``inputs.png`` and (with states) ``singular_scatter.png``.

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
    plt = _pyplot()
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    levels = thresholds_of(log, artifact)
    files = [_plot_conditioning(log, levels, out / "conditioning.png", plt)]
    if log.names("u"):          # a log of another layout may record no inputs: no panel to draw
        files.append(_plot_inputs(log, artifact.input_limits if artifact is not None else None, out / "inputs.png",
                                  plt))
    sigma = log.column("sigma_min")
    near = (sigma < levels.sigma_warn) if levels is not None else log.column("warn") > 0.5
    scatter = _plot_state_scatter(log, artifact, near & np.isfinite(sigma), out / "singular_scatter.png", plt)
    if scatter is not None:
        files.append(scatter)
    return files


def write_html(summary: dict[str, Any], text: str, images: list[Path], path: str | Path) -> Path:
    """One self-contained HTML page: the summary text, episode tables and the plots inline.

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
    parts = ["<!DOCTYPE html>", "<html><head><meta charset='utf-8'>",
             f"<title>field log: {html.escape(str(summary['plant']))}</title>",
             "<style>body{font-family:sans-serif;max-width:1000px;margin:2em auto}"
             "table{border-collapse:collapse;font-size:0.9em}td,th{border:1px solid #ccc;padding:2px 6px}"
             "pre{background:#f6f6f6;padding:1em;overflow-x:auto}img{max-width:100%}</style></head><body>",
             f"<h1>Field log: {html.escape(str(summary['plant']))}</h1>",
             f"<pre>{html.escape(text)}</pre>"]
    for key, title in (("under_warn", "Episodes under the warn level"), ("under_act", "Episodes under the act level")):
        parts.append(_episode_table(title, summary["near_singular"][key]["episodes"]))
    for name, group in summary["saturation"].items():
        if group["episodes"]:
            parts.append(_episode_table(f"Saturation of {name}", group["episodes"]))
    for image in images:
        data = base64.b64encode(Path(image).read_bytes()).decode()
        parts.append(f"<h2>{html.escape(Path(image).stem.replace('_', ' '))}</h2>"
                     f"<img alt='{html.escape(Path(image).stem)}' src='data:image/png;base64,{data}'>")
    parts.append("</body></html>")
    path.write_text("\n".join(parts) + "\n")
    return path


def _episode_table(title: str, rows: list[dict[str, Any]]) -> str:
    if not rows:
        return f"<h2>{html.escape(title)}</h2><p>none</p>"
    head = "<tr><th>start [s]</th><th>duration [s]</th><th>records</th><th>min sigma</th><th>state at worst</th>" \
           "<th>modes</th></tr>"
    body = []
    for e in rows:
        state = ", ".join(f"{k}={v:.4g}" for k, v in e["state_at_worst"].items() if v is not None)
        modes = ", ".join(f"{m} {n}" for m, n in e["modes"].items())
        body.append(f"<tr><td>{e['start']:.3f}</td><td>{e['duration']:.3f}</td><td>{e['records']}</td>"
                    f"<td>{_fmt(e['min_sigma'])}</td><td>{html.escape(state)}</td><td>{html.escape(modes)}</td></tr>")
    return f"<h2>{html.escape(title)}</h2><table>{head}{''.join(body)}</table>"
