"""The campaign's figures: the region of attraction over two states with the singular set, and
the sensitivity ranking. Titles carry the campaign's headline, in red unless every case
succeeded; legends name the verdicts by their words."""

from __future__ import annotations

from typing import Any

import numpy as np

from linz_ros.artifact import Artifact
from linz_ros.campaign.measures import case_point
from linz_ros.campaign.spec import OUTCOMES, CampaignOutcome
from linz_ros.plotting import draw_singular_set, pyplot, unit_label
from linz_ros.runtime.watchdogs import WatchdogConfig

__all__ = ["region_figure", "sensitivity_figure", "VERDICT_STYLES"]

#: Marker and colour of each failure word in the region plot (a success is a green dot).
VERDICT_STYLES = {"diverged": ("x", "tab:red"), "left_envelope": ("^", "tab:orange"),
                  "held_safe": ("s", "tab:purple"), "saturated": ("v", "tab:brown"),
                  "not_settled": ("D", "tab:olive"), "tracked": ("P", "tab:cyan"), "refused": ("+", "black")}


def _title(fig: Any, summary: dict[str, Any], what: str) -> None:
    fine = summary["status"] == "all succeeded"
    fig.suptitle(f"{summary['plant']}: {what}\n{summary['headline']}", color="black" if fine else "tab:red",
                 fontsize=10)


def _window(values: list[np.ndarray], bounds: list[tuple[float, float]]) -> tuple[float, float]:
    """The plot's range along one state: every point and bound, padded by 5 %."""
    found = np.concatenate([v[np.isfinite(v)] for v in values] + [np.asarray(bounds, dtype=float).ravel()])
    lo, hi = (float(found.min()), float(found.max())) if found.size else (-1.0, 1.0)
    pad = 0.05 * (hi - lo) if hi > lo else 1.0
    return lo - pad, hi + pad


def _draw_cases(ax: Any, outcome: CampaignOutcome, artifact: Artifact, states: list[str]) -> np.ndarray:
    """Every finished case where it started, by verdict, and the lost ones; returns all points drawn."""
    by_index = {c.index: c for c in outcome.cases}
    points = {}
    for index, result in sorted(outcome.results.items()):
        word = "success" if outcome.succeeded(result) else result.verdict
        points.setdefault(word, []).append(case_point(outcome, artifact, by_index[index], states))
    success = " or ".join(outcome.spec.success)
    if "success" in points:
        p = np.array(points.pop("success"))
        ax.scatter(p[:, 0], p[:, 1], s=10, color="tab:green", alpha=0.7, label=f"success ({success}): {len(p)}",
                   zorder=3)
    for word in sorted(points, key=lambda w: OUTCOMES.index(w) if w in OUTCOMES else len(OUTCOMES)):
        p = np.array(points[word])
        marker, colour = VERDICT_STYLES.get(word, ("o", "tab:gray"))
        ax.scatter(p[:, 0], p[:, 1], s=22, marker=marker, color=colour, label=f"{word}: {len(p)}", zorder=4)
    lost = [case_point(outcome, artifact, by_index[i], states) for i in sorted(outcome.lost) if i in by_index]
    if lost:
        p = np.array(lost)
        ax.scatter(p[:, 0], p[:, 1], s=40, marker="o", facecolors="none", edgecolors="black",
                   label=f"lost (worker died): {len(p)}", zorder=5)
    drawn = [np.array(v) for v in points.values()] + [np.array(lost)] * bool(lost)
    return np.concatenate([d.reshape(-1, 2) for d in drawn]) if drawn else np.zeros((0, 2))


def _draw_disc(ax: Any, region: dict[str, Any]) -> None:
    from matplotlib.patches import Ellipse

    if not region.get("estimated") or region["radius"] is None:
        return
    (a, b), r = region["semi_axes"], region["radius"]
    ax.add_patch(Ellipse(region["centre"], 2 * a, 2 * b, fill=False, color="tab:green", lw=1.5, zorder=6,
                         label=f"no failure within {r:.3g} of the ranges ({region['successes_inside']} successes)"))


def _draw_box(ax: Any, bounds: list[tuple[float, float] | None], style: dict[str, Any]) -> None:
    from matplotlib.patches import Rectangle

    if all(bounds):
        (x0, x1), (y0, y1) = bounds
        ax.add_patch(Rectangle((x0, y0), x1 - x0, y1 - y0, fill=False, zorder=2, **style))


def region_figure(outcome: CampaignOutcome, artifact: Artifact, summary: dict[str, Any]) -> Any | None:
    """Where each finished case started in the two region states, by verdict, with the lost cases,
    the no-failure disc, the envelope, the sampled range and the singular set s(x) = 0 (the other
    states at the operating point).

    Parameters
    ----------
    outcome : CampaignOutcome
    artifact : Artifact
    summary : dict
        From :func:`linz_ros.campaign.report.campaign_summary` (its region, headline, status).

    Returns
    -------
    matplotlib.figure.Figure or None
        None when the campaign names no two region states.
    """
    states = list(outcome.spec.region)
    if len(states) != 2:
        return None
    fig, ax = pyplot().subplots(figsize=(10, 7), layout="constrained")
    points = _draw_cases(ax, outcome, artifact, states)
    plane = [artifact.states.index(s) for s in states]
    centre = [float(artifact.operating_point[k]) for k in plane]
    ax.plot(*centre, "*", color="black", ms=12, label="operating point", zorder=7)
    _draw_disc(ax, summary["region"])
    envelope = [artifact.envelope.get(s) for s in states]
    config = WatchdogConfig.from_artifact(artifact)
    wide = {i: (lo, hi) for i, lo, hi in config.widened_envelope()}
    widened = [wide.get(k) for k in plane]
    sampled = [(f.low, f.high) if f is not None else None for f in (outcome.spec.factor("initial", s) for s in states)]
    _draw_box(ax, envelope, {"color": "tab:red", "ls": "--", "lw": 1.0, "label": "envelope"})
    _draw_box(ax, widened, {"color": "tab:red", "ls": ":", "lw": 0.8,
                            "label": f"envelope widened by the watchdog's margin ({config.envelope_margin:.0%})"})
    _draw_box(ax, sampled, {"color": "0.4", "ls": ":", "lw": 1.0, "label": "sampled range"})
    # the window spans the widened envelope, where the machine may be before the watchdog acts, so a
    # singular set just outside the envelope shows
    window = [_window([points[:, k], np.array([centre[k]])], [b[k] for b in (envelope, widened, sampled) if b[k]])
              for k in range(2)]
    if artifact.has_program("singular_set"):
        if not draw_singular_set(ax, artifact, artifact.operating_point, (plane[0], plane[1]),
                                 (window[0], window[1])):
            ax.plot([], [], color="tab:red", label="singular set s(x) = 0: not in this window")
        where = "the singular set with the other states at the operating point"
    else:
        ax.text(0.5, 0.02, "the artifact carries no singular-set program: s(x) = 0 not drawn",
                transform=ax.transAxes, ha="center", fontsize=8, color="tab:red")
        where = "no singular set (the artifact carries no program for it)"
    ax.set_xlim(*window[0])
    ax.set_ylim(*window[1])
    ax.set_xlabel(unit_label(states[0], artifact.signal_units, f"{states[0]} at the start"))
    ax.set_ylabel(unit_label(states[1], artifact.signal_units, f"{states[1]} at the start"))
    ax.grid(True, alpha=0.3)
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=7)
    _title(fig, summary, f"region of attraction over {states[0]} and {states[1]}; {where}")
    return fig


def sensitivity_figure(summary: dict[str, Any]) -> Any | None:
    """The sensitivity ranking as bars: per factor, the spread of its quarters' failure rates and
    Spearman's rho against failure and against severity, the strongest at the top.

    Parameters
    ----------
    summary : dict
        From :func:`linz_ros.campaign.report.campaign_summary`.

    Returns
    -------
    matplotlib.figure.Figure or None
        None when no factor was varied.
    """
    ranking = summary["sensitivity"]["ranking"]
    if not ranking:
        return None
    fig, ax = pyplot().subplots(figsize=(9, 1.2 + 0.45 * len(ranking)), layout="constrained")
    rows = np.arange(len(ranking))[::-1]
    for shift, key, colour, what in ((0.27, "spread", "tab:orange", "failure-rate spread over the quarters"),
                                     (0.0, "rho_failure", "tab:red", "Spearman rho against failure (0/1)"),
                                     (-0.27, "rho_severity", "tab:blue", "Spearman rho against severity")):
        values = [np.nan if e[key] is None else e[key] for e in ranking]
        ax.barh(rows + shift, values, height=0.26, color=colour, label=what)
    ax.set_yticks(rows, [e["label"] for e in ranking])
    ax.axvline(0.0, color="black", lw=0.8)
    ax.set_xlim(-1.05, 1.05)
    ax.set_xlabel("spread of the failure rate, or rank correlation rho (dimensionless)")
    ax.grid(True, axis="x", alpha=0.3)
    ax.legend(loc="best", fontsize=7)
    measure = summary["sensitivity"]["measure"]
    _title(fig, summary, "sensitivity, ranked by " + ("the failure-rate spread" if measure == "failure"
                                                      else "rho against severity"))
    return fig
