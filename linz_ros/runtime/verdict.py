"""The verdict of a run: one word for how it went, when it first happened and why.

A run is a ``SimResult``: from ``linz sim``, from a field log (``linz logs``, ``linz
demo``) or from a recorder over DDS; all are judged by the same rules, and the envelope
by the core's own rule for the widened envelope.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from linz_ros.artifact.document import Artifact
from linz_ros.runtime.watchdogs import WatchdogConfig

if TYPE_CHECKING:
    from linz_ros.runtime.closed_loop import SimResult

__all__ = ["VERDICTS", "Verdict", "run_verdict", "outside_envelope", "first_time", "error_statistics", "SATURATED_FRACTION",
           "SETTLED_FRACTION"]

#: One word for how a run went, the worst first: the first that applies is the run's verdict.
VERDICTS = ("diverged", "left_envelope", "held_safe", "saturated", "not_settled", "tracked")
#: A run is saturated when an input sat on a limit for more than this fraction of its steps.
SATURATED_FRACTION = 0.05
#: Settled: the RMS error over the last tenth of the run is at most this fraction of the peak error
#: (or of the divergence bound, when the artifact carries one).
SETTLED_FRACTION = 0.05


@dataclass(frozen=True)
class Verdict:
    """How a run went, in one word of :data:`VERDICTS`, when it first happened and why."""

    word: str
    at: float | None
    detail: str


def outside_envelope(artifact: Artifact, x: np.ndarray, margin: float = 0.0) -> np.ndarray:
    """Per row of states, whether a bounded state lies outside the envelope widened by ``margin``.

    Parameters
    ----------
    artifact : Artifact
    x : numpy.ndarray
        K x n states.
    margin : float
        Fraction of each state's range added on both sides.

    Returns
    -------
    numpy.ndarray
        K booleans.
    """
    x = np.asarray(x, dtype=float).reshape(-1, len(artifact.states))
    outside = np.zeros(x.shape[0], dtype=bool)
    # the core's own rule for the widened envelope
    for i, lo, hi in WatchdogConfig.from_artifact(artifact).widened_envelope(margin):
        with np.errstate(invalid="ignore"):      # nan (a refused state) is not outside
            outside |= (x[:, i] < lo) | (x[:, i] > hi)
    return outside


def first_time(t: np.ndarray, flags: np.ndarray) -> float | None:
    """The time of the first step where ``flags`` holds.

    Parameters
    ----------
    t, flags : numpy.ndarray

    Returns
    -------
    float or None
    """
    hits = np.flatnonzero(flags)
    return float(t[hits[0]]) if hits.size else None


def run_verdict(result: SimResult) -> Verdict:
    """The run's verdict: the first of :data:`VERDICTS` that applies, and when it first did.

    - ``diverged``: the plant's state stopped being finite, or the divergence watchdog tripped;
    - ``left_envelope``: the true state left the envelope widened by the watchdog's margin,
      or the envelope watchdog tripped on the measured state;
    - ``held_safe``: the controller sent the safe (or held) command at some step;
    - ``saturated``: an input sat on a limit for more than 5 % of the steps;
    - ``not_settled``: the RMS error over the last tenth of the run is above 5 % of the
      peak error (or of the divergence bound);
    - ``tracked``: none of these.

    Parameters
    ----------
    result : SimResult

    Returns
    -------
    Verdict
    """
    t = result.t
    alarms = result.alarm_mask()
    if result.diverged_at is not None:
        return Verdict("diverged", result.diverged_at, "the plant's state stopped being finite")
    diverging = (alarms >> 1 & 1).astype(bool)
    margin = (result.config or WatchdogConfig.from_artifact(result.artifact)).envelope_margin
    left = outside_envelope(result.artifact, result.x, margin) | (alarms & 1).astype(bool)
    if diverging.any():
        left_at = first_time(t, left)
        before = (f"; it left the envelope first, at t = {left_at:.4g} s"
                  if left_at is not None and left_at < first_time(t, diverging) else "")
        return Verdict("diverged", first_time(t, diverging), "the tracking error grew past its bound "
                                                              "(divergence watchdog)" + before)
    if left.any():
        k = int(np.flatnonzero(left)[0])
        return Verdict("left_envelope", float(t[k]), _envelope_detail(result, k, margin))
    unsafe = np.array([m in ("safe", "held") for m in result.mode], dtype=bool)
    if unsafe.any():
        k = int(np.flatnonzero(unsafe)[0])
        return Verdict("held_safe", float(t[k]), f"{int(unsafe.sum())} step(s) sent the safe or held command, "
                                                 f"the first for {result.reason[k]}")
    if len(t) and result.saturated.size:
        fractions = result.saturated.mean(axis=0)
        worst = int(np.argmax(fractions))
        if fractions[worst] > SATURATED_FRACTION:
            return Verdict("saturated", first_time(t, result.saturated[:, worst]),
                           f"{result.artifact.plant_inputs[worst]} saturated {100 * fractions[worst]:.0f} % of the time")
    unsettled = _unsettled_outputs(result)
    if unsettled:
        return Verdict("not_settled", None, "the error has not settled: " + ", ".join(unsettled))
    return Verdict("tracked", None, "tracked the reference")


def _envelope_detail(result: SimResult, k: int, margin: float) -> str:
    envelope = result.artifact.envelope
    for i, name in enumerate(result.artifact.states):
        if name in envelope:
            lo, hi = envelope[name]
            value = result.x[k, i]
            extra = margin * (hi - lo)
            if not lo - extra <= value <= hi + extra:
                return (f"{name} = {value:.4g} outside its envelope [{lo:g}, {hi:g}] widened by "
                        f"{100 * margin:g} %")
    return "the envelope watchdog tripped on the measured state"


def _unsettled_outputs(result: SimResult) -> list[str]:
    errors = result.errors()
    if len(result.t) < 10:
        return []
    tail = max(1, len(result.t) // 10)
    bounds = result.artifact.watchdog.get("divergence_error") or [None] * errors.shape[1]
    names = []
    for i, name in enumerate(result.artifact.outputs):
        e = errors[:, i]
        finite = e[np.isfinite(e)]
        if finite.size < 10:
            continue
        peak = float(np.max(np.abs(finite)))
        rms_tail = float(np.sqrt(np.mean(finite[-tail:] ** 2)))
        scale = max(peak, bounds[i] or 0.0)
        if rms_tail > max(SETTLED_FRACTION * scale, 1e-9):
            names.append(f"{name} (RMS {rms_tail:.3g} over the last tenth, peak {peak:.3g})")
    return names


def error_statistics(error: np.ndarray) -> dict[str, float | None]:
    """The tracking error of one output as ``linz sim`` reports it: RMS, final and largest magnitude.

    Parameters
    ----------
    error : numpy.ndarray
        y - y_ref per step (nan where the step refused its state: left out).

    Returns
    -------
    dict
        ``rms_error``, ``final_error`` (|e| at the last finite step) and ``max_error``; None each
        when no step has a finite error.

    Examples
    --------
    >>> error_statistics(np.array([0.3, np.nan, -0.4]))
    {'rms_error': 0.3535533905932738, 'final_error': 0.4, 'max_error': 0.4}
    """
    finite = np.asarray(error, dtype=float)
    finite = finite[np.isfinite(finite)]
    if not finite.size:
        return {"rms_error": None, "final_error": None, "max_error": None}
    with np.errstate(over="ignore"):             # a run that blew up has an rms of inf, said as such
        rms = float(np.sqrt(np.mean(finite ** 2)))
    return {"rms_error": rms, "final_error": float(abs(finite[-1])),
            "max_error": float(np.max(np.abs(finite)))}
