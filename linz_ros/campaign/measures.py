"""The numbers a campaign report is made of: the success rate with its interval, the worst cases,
which factors drive failure, and the region of attraction over two states.

Every number here depends on the cases and their results only (never on where or in which
order they ran), so two runs of one campaign on different executors report the same.

- Success rate: successes among the finished cases (a refused start counts as finished and
  failed), with the exact (Clopper-Pearson) 95 % interval of ``scipy.stats.binomtest``.
- Worst first: failures before successes; among failures the run verdicts in the order of
  ``OUTCOMES`` (diverged, left_envelope, held_safe, saturated, not_settled, ...), then refused
  starts (the run never began: the guard worked, nothing went wrong in motion); ties go to the
  larger severity (an unknown or unbounded one counts as the largest), then the lower index.
- Sensitivity: per varied factor, the failure rate in each quarter of its range and their
  spread (largest minus smallest), and Spearman's rank correlation with failure (0/1) and with
  severity. Ranked by the spread, then |rho| against failure: the spread also catches a factor
  that fails at both ends of its range (a mass off either way), where rho is near zero. When no
  case (or every case) failed, ranked by |rho| against severity.
- Region of attraction: in the plane of the two region states, each normalised by its sampled
  range, the largest disc around the operating point free of sampled failures. It projects every
  other factor away (a failure caused by, say, a heavy mismatch anywhere in the plane shrinks
  it), and failures between the samples can lie inside it: an estimate, not a guarantee. Not
  given when fewer than ``MIN_INSIDE`` successes lie inside (no evidence of attraction). Plus
  the success fraction per cell of a coarse grid.
"""

from __future__ import annotations

import math
import warnings
from typing import Any, Sequence

import numpy as np

from linz_ros.artifact import Artifact
from linz_ros.campaign.spec import ERRORED, OUTCOMES, REFUSED, CampaignOutcome, Case, CaseResult, factor_matrix

__all__ = ["CONFIDENCE", "CI_METHOD", "WORST_ORDER", "SENSITIVITY_MEASURES", "REGION_MEASURE", "success_rate",
           "worst_key", "worst_results", "sensitivity", "region_estimate", "case_point"]

CONFIDENCE = 0.95
CI_METHOD = "Clopper-Pearson exact binomial (scipy.stats.binomtest(k, n).proportion_ci(0.95, method='exact'))"
WORST_ORDER = ("failures first, run verdicts worst first (" + ", ".join(OUTCOMES[:-1]) + "), then refused "
               "starts, then successes; ties: larger severity (unknown or unbounded counts largest), then index")
SENSITIVITY_MEASURES = {
    "failure": ("spread of the failure rate over the four quarters of each factor's range (largest minus "
                "smallest), then Spearman rank correlation with failure (0/1), over the finished cases"),
    "severity": "Spearman rank correlation of each factor with severity (no case, or every case, failed)",
}
REGION_MEASURE = ("radius of the largest disc around the operating point free of sampled failures, in the plane "
                  "of the two states each divided by its sampled range (other factors projected away; an estimate "
                  "from the samples, not a guarantee)")
#: Successes a failure-free disc must hold to be reported as a region of attraction.
MIN_INSIDE = 5
#: Quarters of a factor's range, for its failure rates.
QUARTERS = 4
#: The coarse grid of the region: at most this many cells a side, about this many cases a cell.
GRID_MAX, CASES_PER_CELL = 8, 4


def success_rate(successes: int, finished: int) -> dict[str, Any]:
    """The rate of success with its exact two-sided 95 % interval.

    Parameters
    ----------
    successes, finished : int

    Returns
    -------
    dict
        ``successes``, ``finished``, ``rate``, ``low``, ``high`` (None each when nothing
        finished), ``confidence`` and ``method``.

    Examples
    --------
    >>> r = success_rate(10, 10)
    >>> round(r["low"], 4), r["high"]
    (0.6915, 1.0)
    """
    rate: dict[str, Any] = {"successes": successes, "finished": finished, "rate": None, "low": None, "high": None,
                            "confidence": CONFIDENCE, "method": CI_METHOD}
    if finished:
        from scipy.stats import binomtest

        interval = binomtest(successes, finished).proportion_ci(CONFIDENCE, method="exact")
        rate.update(rate=successes / finished, low=float(interval.low), high=float(interval.high))
    return rate


def worst_key(outcome: CampaignOutcome, result: CaseResult) -> tuple[bool, int, float, int]:
    """The sort key of a finished case, worst first (see the module's rule).

    Parameters
    ----------
    outcome : CampaignOutcome
    result : CaseResult

    Returns
    -------
    tuple
        Smaller is worse.
    """
    rank = OUTCOMES.index(result.verdict) if result.verdict in OUTCOMES[:-1] else len(OUTCOMES)
    severity = math.inf if result.severity is None else float(result.severity)
    return outcome.succeeded(result), rank, -severity, result.index


def worst_results(outcome: CampaignOutcome, count: int) -> list[CaseResult]:
    """The ``count`` worst finished cases, worst first.

    Parameters
    ----------
    outcome : CampaignOutcome
    count : int

    Returns
    -------
    list of CaseResult
    """
    return sorted(outcome.results.values(), key=lambda r: worst_key(outcome, r))[:max(0, count)]


def _finished(outcome: CampaignOutcome) -> tuple[list[Case], list[CaseResult]]:
    by_index = {c.index: c for c in outcome.cases}
    indices = sorted(i for i in outcome.results if i in by_index)
    return [by_index[i] for i in indices], [outcome.results[i] for i in indices]


def _spearman(x: np.ndarray, y: np.ndarray) -> tuple[float | None, float | None]:
    """rho and its p-value; None when either side is constant (no ranking possible)."""
    if len(x) < 3 or np.ptp(x) == 0 or np.ptp(y) == 0:
        return None, None
    from scipy.stats import spearmanr

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rho, p = spearmanr(x, y)
    return (float(rho), float(p)) if np.isfinite(rho) else (None, None)


def _severities(results: Sequence[CaseResult]) -> np.ndarray:
    """Severity per case; an unknown one above every known (it blew up); nan for refused starts."""
    values = np.array([np.nan if r.verdict in (REFUSED, ERRORED) else math.inf if r.severity is None else r.severity
                       for r in results], dtype=float)
    finite = values[np.isfinite(values)]
    values[np.isinf(values)] = (finite.max() + 1.0) if finite.size else 1.0       # same ranks, no inf
    return values


def _quarter_rates(failed: np.ndarray, values: np.ndarray, low: float, high: float) -> list[float | None]:
    """The failure rate in each quarter of [low, high] (None for a quarter without cases)."""
    quarter = np.clip(np.floor((values - low) / (high - low) * QUARTERS), 0, QUARTERS - 1).astype(int)
    return [float(failed[quarter == q].mean()) if np.any(quarter == q) else None for q in range(QUARTERS)]


def sensitivity(outcome: CampaignOutcome) -> dict[str, Any]:
    """Which factors drive failure (see the module's measure).

    Parameters
    ----------
    outcome : CampaignOutcome

    Returns
    -------
    dict
        ``measure`` (``failure`` or ``severity``), ``method`` (its words), ``ranking`` (one
        entry per varied factor, the strongest first: label, kind, name, the failure rate per
        quarter of its range and their spread, rho and p-value against failure and against
        severity), ``held`` (labels of the factors held at one value) and
        ``references`` (per reference text, cases and failures; only with more than one).
    """
    spec = outcome.spec
    cases, results = _finished(outcome)
    x = factor_matrix(spec, cases)
    failed = np.array([not outcome.succeeded(r) for r in results], dtype=float)
    severity = _severities(results)
    known = np.isfinite(severity)
    measure = "failure" if 0 < failed.sum() < len(failed) else "severity"
    ranking = []
    for k, f in enumerate(spec.factors):
        if not f.high > f.low:
            continue
        rho_f, p_f = _spearman(x[:, k], failed)
        rho_s, p_s = _spearman(x[known, k], severity[known])
        rates = _quarter_rates(failed, x[:, k], f.low, f.high)
        seen = [r for r in rates if r is not None]
        ranking.append({"label": f.label, "kind": f.kind, "name": f.name, "position": k,
                        "failure_rates": rates, "spread": (max(seen) - min(seen)) if seen else None,
                        "rho_failure": rho_f, "p_failure": p_f, "rho_severity": rho_s, "p_severity": p_s})

    def size(value: float | None) -> float:
        return -abs(value) if value is not None else 1.0

    keys = ("spread", "rho_failure") if measure == "failure" else ("rho_severity", "rho_failure")
    ranking.sort(key=lambda e: (size(e[keys[0]]), size(e[keys[1]]), e["position"]))
    for entry in ranking:
        del entry["position"]
    return {"measure": measure, "method": SENSITIVITY_MEASURES[measure], "ranking": ranking,
            "held": [f.label for f in spec.factors if not f.high > f.low],
            "references": _by_reference(cases, failed)}


def _by_reference(cases: Sequence[Case], failed: np.ndarray) -> list[dict[str, Any]]:
    texts = sorted({c.reference for c in cases})
    if len(texts) < 2:
        return []
    rows = []
    for text in texts:
        mine = np.array([c.reference == text for c in cases], dtype=bool)
        rows.append({"reference": text or "the artifact's own", "cases": int(mine.sum()),
                     "failed": int(failed[mine].sum()), "failure_rate": float(failed[mine].mean())})
    return rows


def case_point(outcome: CampaignOutcome, artifact: Artifact, case: Case, states: Sequence[str]) -> list[float]:
    """Where a case started in the given states (the operating point for a state not varied).

    Parameters
    ----------
    outcome : CampaignOutcome
    artifact : Artifact
    case : Case
    states : sequence of str

    Returns
    -------
    list of float
    """
    initial = case.of_kind(outcome.spec, "initial")
    op = dict(zip(artifact.states, artifact.operating_point))
    return [float(initial.get(s, op[s])) for s in states]


def region_estimate(outcome: CampaignOutcome, artifact: Artifact) -> dict[str, Any]:
    """The region of attraction over the campaign's two region states (see the module's measure).

    Parameters
    ----------
    outcome : CampaignOutcome
    artifact : Artifact

    Returns
    -------
    dict
        ``states``, ``estimated`` and, when not estimated, ``why``; else ``measure``,
        ``centre`` (the operating point in those states), ``ranges`` (the sampled ones),
        ``radius`` (normalised; None when no case failed: then ``reach``, the farthest
        sampled case, bounds it from below), ``semi_axes`` (the disc's half-widths in each
        state's unit), ``cases_inside``, ``successes_inside``, ``nearest_failure`` (index and
        verdict) and ``grid`` (``cells`` a side, ``edges`` per state, ``cases`` and
        ``success_fraction`` indexed [cell of the first state][cell of the second]).
    """
    spec = outcome.spec
    states = list(spec.region)
    if len(states) != 2:
        return {"states": states, "estimated": False, "why": "the campaign names no two states for the region"}
    factors = [spec.factor("initial", s) for s in states]
    held = [s for s, f in zip(states, factors) if f is None or not f.high > f.low]
    if held:
        return {"states": states, "estimated": False,
                "why": f"{', '.join(held)} not varied (give campaign.initial a [low, high] range)"}
    cases, results = _finished(outcome)
    op = dict(zip(artifact.states, artifact.operating_point))
    centre = np.array([float(op[s]) for s in states])
    lows = np.array([f.low for f in factors])
    spans = np.array([f.high - f.low for f in factors])
    points = np.array([case_point(outcome, artifact, c, states) for c in cases], dtype=float).reshape(-1, 2)
    distance = np.hypot(*((points - centre) / spans).T) if len(points) else np.zeros(0)
    failed = np.array([not outcome.succeeded(r) for r in results], dtype=bool)
    estimate: dict[str, Any] = {
        "states": states, "estimated": True, "measure": REGION_MEASURE, "centre": centre.tolist(),
        "ranges": [[f.low, f.high] for f in factors], "radius": None, "reach": None, "semi_axes": None,
        "cases_inside": int(len(points)), "successes_inside": int((~failed).sum()), "nearest_failure": None}
    if failed.any():
        k = int(np.argmin(np.where(failed, distance, np.inf)))
        radius = float(distance[k])
        inside = distance < radius
        estimate.update(radius=radius, semi_axes=(radius * spans).tolist(), cases_inside=int(inside.sum()),
                        successes_inside=int((inside & ~failed).sum()),
                        nearest_failure={"index": results[k].index, "verdict": results[k].verdict})
        if estimate["successes_inside"] < MIN_INSIDE:
            estimate.update(estimated=False, why=f"too few cases near the operating point: {estimate['successes_inside']} "
                                                 f"success(es) inside the largest disc free of failures (radius "
                                                 f"{radius:.3g} of the ranges; nearest failure case {results[k].index}, "
                                                 f"{results[k].verdict}), fewer than {MIN_INSIDE}")
    elif len(points):
        estimate["reach"] = float(distance.max())
    estimate["grid"] = _grid(points, failed, lows, spans)
    return estimate


def _grid(points: np.ndarray, failed: np.ndarray, lows: np.ndarray, spans: np.ndarray) -> dict[str, Any]:
    cells = int(np.clip(math.isqrt(len(points) // CASES_PER_CELL), 2, GRID_MAX))
    at = np.clip(np.floor((points - lows) / spans * cells), 0, cells - 1).astype(int).reshape(-1, 2)
    cases = np.zeros((cells, cells), dtype=int)
    wins = np.zeros((cells, cells), dtype=int)
    np.add.at(cases, (at[:, 0], at[:, 1]), 1)
    np.add.at(wins, (at[:, 0], at[:, 1]), (~failed).astype(int))
    fraction = [[None if cases[a, b] == 0 else float(wins[a, b] / cases[a, b]) for b in range(cells)]
                for a in range(cells)]
    edges = [np.linspace(lo, lo + span, cells + 1).tolist() for lo, span in zip(lows, spans)]
    return {"cells": cells, "edges": edges, "cases": cases.tolist(), "success_fraction": fraction}
