"""The report of a finished (or interrupted) campaign: a JSON-ready summary, its text, and the
files ``cases.csv``, ``region.png``, ``sensitivity.png`` and ``report.html``.

The numbers come from :mod:`linz_ros.campaign.measures` (success rate and its interval, worst
cases, sensitivity, region of attraction); the figures from :mod:`linz_ros.campaign.plots`.
Everything in the summary but ``timing`` (and ``files``, added by the command) depends on the
cases, their results and the artifact alone, so the same campaign of the same artifact on any
executor reports the same (an artifact built again from its plant file records a new build
time, so a new ``artifact_sha256``, and the rerun commands name where it was written).

A campaign never reads as fine when it is not: the status is ``all succeeded`` only when every
drawn case finished with a success verdict; lost cases, an interruption or cases never run make
it ``incomplete``, a failed or refused case ``failures found``, and the text says each loudly.
"""

from __future__ import annotations

import csv
import html
import math
from pathlib import Path
from typing import Any

from linz_ros.artifact import Artifact
from linz_ros.campaign.measures import (WORST_ORDER, region_estimate, sensitivity, success_rate,
                                        worst_results)
from linz_ros.campaign.spec import ERRORED, OUTCOMES, REFUSED, CampaignOutcome, Case, CaseResult
from linz_ros.plotting.page import embedded_image, html_table, page

__all__ = ["campaign_summary", "render_campaign", "write_campaign_files", "write_cases_csv", "case_outcome",
           "status_of", "STATUSES", "LOST", "NEVER_RUN"]

#: The campaign's one-word-ish status, best first.
STATUSES = ("all succeeded", "failures found", "incomplete")
#: What ``cases.csv`` says of a case whose worker died on every attempt, and of one never run.
LOST, NEVER_RUN = "lost", "never_run"


def case_outcome(outcome: CampaignOutcome, index: int) -> str:
    """What became of one drawn case: its verdict, ``lost`` or ``never_run``.

    Parameters
    ----------
    outcome : CampaignOutcome
    index : int

    Returns
    -------
    str
    """
    if index in outcome.results:
        return outcome.results[index].verdict
    return LOST if index in outcome.lost else NEVER_RUN


def status_of(counts: dict[str, Any]) -> tuple[str, str]:
    """The status (a word of :data:`STATUSES`) and the headline of a campaign's counts.

    Parameters
    ----------
    counts : dict
        ``finished``, ``succeeded``, ``failed``, ``refused``, ``lost``, ``never_run`` and
        ``interrupted``.

    Returns
    -------
    (str, str)

    Examples
    --------
    >>> status_of(dict(finished=9, succeeded=9, failed=0, refused=0, lost=1, never_run=0, interrupted=False))
    ('incomplete', 'incomplete: 1 lost')
    """
    c = counts
    missing = [f"{c['lost']} lost"] * bool(c["lost"])
    if c["never_run"] or c["interrupted"]:
        missing.append(("interrupted, " if c["interrupted"] else "") + f"{c['never_run']} never run")
    if not c["finished"]:
        missing.append("no case finished")
    bad = [f"{c['failed']} of {c['finished']} failed"] * bool(c["failed"])
    bad += [f"{c['refused']} refused"] * bool(c["refused"])
    parts = ["incomplete: " + ", ".join(missing)] * bool(missing) + ["failures found: " + ", ".join(bad)] * bool(bad)
    status = STATUSES[2] if missing else STATUSES[1] if bad else STATUSES[0]
    return status, "; ".join(parts) or f"all succeeded ({c['succeeded']} of {c['finished']})"


def _clean(value: Any) -> Any:
    """JSON-ready: nan and inf as None, numpy numbers as Python ones, tuples as lists."""
    if isinstance(value, dict):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return value
    if hasattr(value, "item"):                   # a numpy scalar
        value = value.item()
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    return value


def _backends(results: Any) -> dict[str, int]:
    """Runs per control step / plant that ran them (refused runs ran none)."""
    counts: dict[str, int] = {}
    for r in results:
        if r.backend:
            counts[r.backend] = counts.get(r.backend, 0) + 1
    return dict(sorted(counts.items()))


def _case_entry(outcome: CampaignOutcome, case: Case, result: CaseResult | None) -> dict[str, Any]:
    entry: dict[str, Any] = {"index": case.index}
    if result is not None:
        entry.update(verdict=result.verdict, verdict_at=result.verdict_at, detail=result.detail,
                     severity=result.severity, succeeded=outcome.succeeded(result))
    else:
        entry["why"] = outcome.lost.get(case.index, "never run")
    entry.update(factors=case.factor_values(outcome.spec), reference=case.reference, seed=case.seed,
                 rerun=outcome.rerun.get(case.index))
    return entry


def campaign_summary(outcome: CampaignOutcome, artifact: Artifact, worst: int = 5) -> dict[str, Any]:
    """The campaign's summary, ready for JSON (no nan or inf: None instead).

    Parameters
    ----------
    outcome : CampaignOutcome
    artifact : Artifact
        The one the cases ran.
    worst : int
        How many of the worst cases to list.

    Returns
    -------
    dict
        ``plant``, ``artifact_sha256``, ``campaign`` (the section's source), ``seed``,
        ``duration``, ``success_verdicts``, ``factors``, ``status`` and ``headline``
        (:func:`status_of`), the counts ``drawn``, ``finished``, ``succeeded``, ``failed``
        (finished, not a success, not refused), ``refused``, ``lost``, ``never_run`` and
        ``interrupted``; ``success_rate`` (:func:`~linz_ros.campaign.measures.success_rate`
        over the finished cases), ``verdicts`` (count per word of ``OUTCOMES``), ``worst_order``
        and ``worst`` (index, verdict, verdict_at, detail, severity, succeeded, factors by
        label, reference, seed, rerun), ``lost_cases`` (the same with ``why``),
        ``sensitivity``, ``region`` and ``timing`` (executor, workers, wall_seconds,
        runs_per_second: the only part that changes from run to run), ``backends`` (runs per
        control step / plant that ran them) and ``notes``.
    """
    spec = outcome.spec
    results = outcome.results
    by_index = {c.index: c for c in outcome.cases}
    finished = len(results)
    succeeded = sum(outcome.succeeded(r) for r in results.values())
    refused = sum(r.verdict == REFUSED for r in results.values())
    counts = {"drawn": len(outcome.cases), "finished": finished, "succeeded": succeeded,
              "failed": finished - succeeded - refused, "refused": refused, "lost": len(outcome.lost),
              "never_run": sum(1 for i in by_index if i not in results and i not in outcome.lost),
              "interrupted": bool(outcome.interrupted)}
    status, headline = status_of(counts)
    verdicts = dict.fromkeys(OUTCOMES, 0)
    for r in results.values():
        verdicts[r.verdict] = verdicts.get(r.verdict, 0) + 1
    wall = float(outcome.wall_seconds)
    summary = {
        "plant": artifact.name, "artifact_sha256": artifact.sha256, "campaign": spec.source, "seed": spec.seed,
        "duration": spec.duration, "success_verdicts": list(spec.success),
        "factors": [{"label": f.label, "kind": f.kind, "name": f.name, "low": f.low, "high": f.high, "unit": f.unit}
                    for f in spec.factors],
        "status": status, "headline": headline, **counts,
        "success_rate": success_rate(succeeded, finished), "verdicts": verdicts, "worst_order": WORST_ORDER,
        "worst": [_case_entry(outcome, by_index[r.index], r) for r in worst_results(outcome, worst)
                  if r.index in by_index],
        "lost_cases": [_case_entry(outcome, by_index[i], None) for i in sorted(outcome.lost) if i in by_index],
        "sensitivity": sensitivity(outcome), "region": region_estimate(outcome, artifact),
        "backends": _backends(results.values()), "notes": list(outcome.notes),
        "timing": {"executor": outcome.executor, "workers": outcome.workers, "wall_seconds": wall,
                   "runs_per_second": finished / wall if wall > 0 else None}}
    return _clean(summary)


# ---------------------------------------------------------------- text

def _num(value: Any, unit: str = "") -> str:
    return "n/a" if value is None else f"{value:.4g}{unit}"


def _pct(value: Any) -> str:
    return "n/a" if value is None else f"{100 * value:.1f} %"


def _factors_text(factors: dict[str, Any]) -> str:
    return ", ".join(f"{label} = {_num(v)}" for label, v in factors.items()) or "no varied factor"


def _rate_line(s: dict[str, Any]) -> str:
    r = s["success_rate"]
    if r["rate"] is None:
        return "  success rate: n/a (no case finished)"
    return (f"  success rate {_pct(r['rate'])} ({r['successes']} of {r['finished']} finished), "
            f"{100 * r['confidence']:g} % interval {_pct(r['low'])} to {_pct(r['high'])} "
            f"({r['method'].split(' (')[0]})")


def _case_lines(entry: dict[str, Any]) -> list[str]:
    if "verdict" in entry:
        at = "" if entry["verdict_at"] is None else f" at t = {entry['verdict_at']:.4g} s"
        head = (f"    case {entry['index']}: {entry['verdict']}{at}, severity {_num(entry['severity'])}: "
                f"{entry['detail']}")
    else:
        head = f"    case {entry['index']}: LOST: {entry['why']}"
    reference = entry["reference"] or "the artifact's own"
    lines = [head, f"      {_factors_text(entry['factors'])}; reference {reference}; noise seed {entry['seed']}"]
    lines.append(f"      rerun: {entry['rerun']}" if entry.get("rerun") else "      rerun: not known")
    return lines


def _sensitivity_lines(sens: dict[str, Any], top: int = 5) -> list[str]:
    ranking = sens["ranking"]
    if not ranking:
        return ["  sensitivity: no factor varied"]
    lines = [f"  sensitivity ({sens['method']}), strongest first:"]
    for e in ranking[:top]:
        quarters = " / ".join(_pct(r) for r in e["failure_rates"])
        lines.append(f"    {e['label']}: failure rate by quarter of its range {quarters} (spread {_pct(e['spread'])}); "
                     f"rho {_num(e['rho_failure'])} with failure, {_num(e['rho_severity'])} with severity")
    lines.extend(f"    reference {r['reference']}: {r['failed']} of {r['cases']} failed" for r in sens["references"])
    return lines


def _region_line(region: dict[str, Any]) -> str:
    states = " and ".join(region["states"]) or "no states"
    if not region["estimated"]:
        return f"  region of attraction over {states}: not estimated ({region['why']})"
    if region["radius"] is None:
        return (f"  region of attraction over {states}: no case failed; the disc around the operating point "
                f"reaches past every sampled case ({_num(region['reach'])} of the ranges)")
    half = ", ".join(f"{s} +/- {_num(h)}" for s, h in zip(region["states"], region["semi_axes"]))
    near = region["nearest_failure"]
    return (f"  region of attraction over {states} (estimate): no sampled failure within {_num(region['radius'])} of the ranges "
            f"around the operating point ({half}); {region['successes_inside']} success(es) inside; the nearest "
            f"failure is case {near['index']} ({near['verdict']})")


def render_campaign(summary: dict[str, Any]) -> str:
    """The campaign's text report.

    Parameters
    ----------
    summary : dict
        From :func:`campaign_summary` (with ``files`` when the command wrote them).

    Returns
    -------
    str
    """
    s = summary
    loud = "" if s["status"] == STATUSES[0] else "!! "
    lines = [f"{loud}campaign of {s['plant']} ({s['campaign']}): {s['headline']}",
             f"  {s['drawn']} run(s) drawn, {s['finished']} finished: {s['succeeded']} succeeded (verdict "
             f"{' or '.join(s['success_verdicts'])}), {s['failed']} failed, {s['refused']} refused; "
             f"{s['lost']} lost, {s['never_run']} never run", _rate_line(s),
             "  verdicts: " + ", ".join(f"{w} {n}" for w, n in s["verdicts"].items())]
    if s["lost"]:
        lines.append(f"  LOST: {s['lost']} case(s) whose worker died on every attempt (not in the rate):")
        lines.extend(line for e in s["lost_cases"][:10] for line in _case_lines(e))
    if s["interrupted"] or s["never_run"]:
        lines.append(f"  INTERRUPTED: {s['never_run']} case(s) never run; the rate covers the finished ones only"
                     if s["interrupted"] else f"  NEVER RUN: {s['never_run']} case(s)")
    if s["refused"]:
        lines.append(f"  REFUSED: {s['refused']} case(s) could not start (counted as failures)")
    if s["verdicts"].get(ERRORED):
        lines.append(f"  ERRORS: {s['verdicts'][ERRORED]} case(s) raised an unexpected error, a fault of linz_ros "
                     "and not of the controller (counted as failures; please report it with the rerun command)")
    if s["worst"]:
        lines.append(f"  the {len(s['worst'])} worst case(s), worst first (failures before successes):")
        lines.extend(line for e in s["worst"] for line in _case_lines(e))
    lines.extend(_sensitivity_lines(s["sensitivity"]))
    lines.append(_region_line(s["region"]))
    backends = s.get("backends") or {}
    ran = ", ".join(f"{name} in {count} run(s)" for name, count in backends.items())
    lines.append(f"  {'MIXED: ' if len(backends) > 1 else ''}control step/plant: {ran or 'none ran'}"
                 + (" (workers differed: results may differ from a rerun here)" if len(backends) > 1 else ""))
    lines.extend(f"  note: {note}" for note in s.get("notes", []))
    t = s["timing"]
    lines.append(f"  ran on {t['executor'] or 'an unnamed executor'} ({t['workers']} worker(s)) in "
                 f"{_num(t['wall_seconds'], ' s')}")
    if s.get("files"):
        lines.append("  files: " + ", ".join(str(f) for f in s["files"]))
    return "\n".join(lines)


# ---------------------------------------------------------------- files

def _cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        return repr(value) if math.isfinite(value) else ""
    return str(value)


def write_cases_csv(outcome: CampaignOutcome, artifact: Artifact, path: Path) -> Path:
    """One row per drawn case, in index order.

    Parameters
    ----------
    outcome : CampaignOutcome
    artifact : Artifact
    path : pathlib.Path

    Returns
    -------
    pathlib.Path
        Columns: index, each factor by label, reference, seed, outcome (verdict, ``lost`` or
        ``never_run``), verdict_at, severity, max_error_<output> and rms_error_<output> per
        output, min_sigma, saturated, attempts (empty when not known) and message.
    """
    outputs = list(artifact.outputs)
    head = (["index", *(f.label for f in outcome.spec.factors), "reference", "seed", "outcome", "verdict_at",
             "severity", *(f"max_error_{o}" for o in outputs), *(f"rms_error_{o}" for o in outputs), "min_sigma",
             "saturated", "attempts", "message"])
    with path.open("w", newline="") as stream:
        writer = csv.writer(stream)
        writer.writerow(head)
        for case in sorted(outcome.cases, key=lambda c: c.index):
            r = outcome.results.get(case.index)
            numbers = ([r.verdict_at, r.severity, *(r.max_error.get(o) for o in outputs),
                        *(r.rms_error.get(o) for o in outputs), r.min_sigma, float(r.saturated)]
                       if r is not None else [None] * (4 + 2 * len(outputs)))
            message = r.detail if r is not None else outcome.lost.get(case.index, "never run (interrupted)"
                                                                      if outcome.interrupted else "never run")
            writer.writerow([_cell(v) for v in (case.index, *case.values, case.reference, case.seed,
                                                 case_outcome(outcome, case.index), *numbers,
                                                 outcome.attempts.get(case.index), message)])
    return path


def _html_tables(s: dict[str, Any]) -> list[str]:
    verdicts = html_table("Verdicts", ["verdict", "cases"], [[w, str(n)] for w, n in s["verdicts"].items()])
    worst = html_table("Worst cases", ["case", "verdict", "at [s]", "severity", "detail", "factors", "rerun"],
                       [[str(e["index"]), e["verdict"], _num(e["verdict_at"]), _num(e["severity"]), e["detail"],
                         _factors_text(e["factors"]), e["rerun"] or "not known"] for e in s["worst"]])
    lost = html_table("Lost cases", ["case", "why", "factors", "rerun"],
                      [[str(e["index"]), e["why"], _factors_text(e["factors"]), e["rerun"] or "not known"]
                       for e in s["lost_cases"]])
    sens = s["sensitivity"]
    ranking = html_table(f"Sensitivity ({sens['method']})",
                         ["factor", "failure rate by quarter of its range", "spread", "rho with failure",
                          "rho with severity"],
                         [[e["label"], " / ".join(_pct(r) for r in e["failure_rates"]), _pct(e["spread"]),
                           _num(e["rho_failure"]), _num(e["rho_severity"])] for e in sens["ranking"]])
    parts = [verdicts, worst, lost, ranking]
    region = s["region"]
    if region.get("estimated"):
        grid, (a, b) = region["grid"], region["states"]
        edges_a, edges_b = grid["edges"]
        rows = [[f"{a} {edges_a[i]:.4g} to {edges_a[i + 1]:.4g}",
                 *(_pct(f) + f" of {n}" if n else "-" for f, n in zip(grid["success_fraction"][i], grid["cases"][i]))]
                for i in range(grid["cells"])]
        head = [f"{a} \\ {b}", *(f"{edges_b[j]:.4g} to {edges_b[j + 1]:.4g}" for j in range(grid["cells"]))]
        parts.append(html_table(f"Success fraction per cell over {a} and {b}", head, rows))
    return parts


def write_campaign_files(outcome: CampaignOutcome, artifact: Artifact, summary: dict[str, Any],
                         out: Path) -> list[Path]:
    """Write the campaign's files to ``out``.

    Parameters
    ----------
    outcome : CampaignOutcome
    artifact : Artifact
    summary : dict
        From :func:`campaign_summary`.
    out : pathlib.Path
        Created when missing.

    Returns
    -------
    list of pathlib.Path
        ``cases.csv``; ``region.png`` (when the campaign names two region states);
        ``sensitivity.png`` (when a factor was varied); ``report.html``.
    """
    from linz_ros.campaign.plots import region_figure, sensitivity_figure
    from linz_ros.plotting import save_figure

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    files = [write_cases_csv(outcome, artifact, out / "cases.csv")]
    images = []
    for name, figure in (("region.png", region_figure(outcome, artifact, summary)),
                         ("sensitivity.png", sensitivity_figure(summary))):
        if figure is not None:
            images.append(save_figure(figure, out / name))
    parts = [f"<pre>{html.escape(render_campaign(summary))}</pre>", *_html_tables(summary),
             *(embedded_image(p) for p in images)]
    report = out / "report.html"
    report.write_text(page(f"campaign: {summary['plant']}", f"Campaign of {summary['plant']}: {summary['headline']}",
                           parts, "" if summary["status"] == STATUSES[0] else "bad"))
    return [*files, *images, report]
