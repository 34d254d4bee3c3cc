"""The controller's diagnostics without ROS: a window of step records summed into a level and key values.

The controller node adds every step's record to a :class:`DiagnosticWindow`, counts what
the records do not carry (rejected and stale states, publish failures, ...) on it, and
about once a second turns it into one ``diagnostic_msgs/DiagnosticStatus``: the level
(:data:`OK`, :data:`WARN`, :data:`ERROR`, numbered as that message numbers them), a
one-line summary and ``(key, value)`` text pairs; then it starts a new window. With a
field log, :func:`field_log_report` adds the writer's state to that status.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from linz_ros.runtime import MODES
from linz_ros.runtime.fieldlog import FieldLogStatus

__all__ = ["DiagnosticWindow", "field_log_report", "OK", "WARN", "ERROR", "LEVELS"]

#: Levels, numbered as ``diagnostic_msgs/DiagnosticStatus`` numbers them.
OK, WARN, ERROR = 0, 1, 2
LEVELS = ("OK", "WARN", "ERROR")


@dataclass
class DiagnosticWindow:
    """What happened since the last diagnostics message.

    Attributes
    ----------
    started : float
        Time the window opened (seconds, the node's clock).
    steps : int
        Records added.
    rejected, stale, reference_stale, reference_missing, publish_failures, unstamped : int
        Counted by the node: states rejected or stale, steps without a fresh reference,
        messages the middleware refused, states with a zero header stamp.
    """

    started: float
    steps: int = 0
    min_sigma: float = math.inf
    max_condition: float = 0.0
    saturated: int = 0
    warned: int = 0
    modes: dict[str, int] = field(default_factory=lambda: {m: 0 for m in MODES})
    rejected: int = 0
    stale: int = 0
    singular: int = 0
    reference_stale: int = 0
    reference_missing: int = 0
    publish_failures: int = 0
    unstamped: int = 0                 # states whose header stamp was zero (judged by arrival)
    outside_envelope: int = 0          # steps outside the widened envelope (acted on or not)
    diverging: int = 0                 # steps the divergence watchdog flagged
    compute: list[float] = field(default_factory=list)

    def add(self, record) -> None:
        """Count one step's record.

        Parameters
        ----------
        record : StepRecord
        """
        self.steps += 1
        self.modes[record.mode] += 1
        self.singular += record.reason == "singular"
        if math.isfinite(record.sigma_min):
            self.min_sigma = min(self.min_sigma, record.sigma_min)
        if math.isfinite(record.condition):
            self.max_condition = max(self.max_condition, record.condition)
        elif record.condition == math.inf:
            self.max_condition = math.inf
        self.saturated += any(record.saturated)
        self.warned += record.warn
        if record.alarms:
            self.outside_envelope += record.alarms & 1
            self.diverging += record.alarms >> 1 & 1
        self.compute.append(record.compute_time)

    def level(self) -> tuple[int, str]:
        """OK, WARN or ERROR with a one-line summary.

        ERROR when any step sent the safe (or held) command: singular, stale or rejected
        state; WARN when near singular (damped or under the warn level), saturating, or
        holding because the reference stalled; OK otherwise.

        Returns
        -------
        (int, str)
            One of :data:`OK`, :data:`WARN`, :data:`ERROR`, and the summary.
        """
        if self.publish_failures:
            return ERROR, f"{self.publish_failures} message(s) refused by the middleware"
        if self.modes["stopping"]:
            return ERROR, (f"controlled stop: outside the envelope {self.outside_envelope}x; "
                           "holding the outputs until the state is back inside the envelope")
        if self.modes["safe"] or self.modes["held"]:
            why = [f"{label} {count}x" for label, count in (("diverging", self.diverging),
                                                            ("outside the envelope", self.outside_envelope),
                                                            ("singular", self.singular), ("state stale", self.stale),
                                                            ("state rejected", self.rejected)) if count]
            return ERROR, "safe command sent: " + (", ".join(why) or "safe command")
        why = [f"{label} {count}x (warn only)" for label, count in (("diverging", self.diverging),
                                                                   ("outside the envelope", self.outside_envelope))
               if count]
        if self.modes["damped"]:
            why.append("near singular: damped")
        elif self.warned:
            why.append("sigma_min under the warn level")
        if self.saturated:
            why.append("saturating")
        if self.reference_stale:
            why.append("reference stale: holding")
        if self.reference_missing:
            why.append("no reference received: holding")
        if why:
            return WARN, ", ".join(why)
        if self.steps == 0:
            return WARN, "active, but no state received"
        return OK, "nominal"

    def values(self, now: float) -> list[tuple[str, str]]:
        """Key values of the window, as text.

        Parameters
        ----------
        now : float
            Time the window closes (the loop rate is steps over the window's span).

        Returns
        -------
        list of (str, str)
        """
        span = max(now - self.started, 1e-9)
        p99 = float(np.percentile(self.compute, 99)) * 1e6 if self.compute else math.nan
        pairs = [("window_min_sigma", self.min_sigma if self.steps else math.nan),
                 ("max_condition", self.max_condition if self.steps else math.nan),
                 ("saturated_fraction", self.saturated / self.steps if self.steps else 0.0),
                 ("stale_count", self.stale), ("rejected_count", self.rejected),
                 ("reference_stale_count", self.reference_stale),
                 ("reference_missing_count", self.reference_missing),
                 ("publish_failures", self.publish_failures), ("unstamped_count", self.unstamped),
                 ("outside_envelope_count", self.outside_envelope), ("diverging_count", self.diverging),
                 ("loop_rate_hz", self.steps / span), ("compute_time_p99_us", p99)]
        pairs += [(f"mode_{m}", c) for m, c in self.modes.items()]
        return [(k, f"{v:.6g}" if isinstance(v, float) else str(v)) for k, v in pairs]


def field_log_report(status: FieldLogStatus | None, error: str,
                     reported: tuple[int, int]) -> tuple[int, list[str], list[tuple[str, str]]]:
    """The field log's part of the diagnostics: ERROR when it stopped, WARN when records were dropped.

    Parameters
    ----------
    status : FieldLogStatus or None
        The writer's status; None when no writer could be opened.
    error : str
        Why it could not be opened (when ``status`` is None).
    reported : (int, int)
        Records dropped and lost as of the last report (only new drops warn).

    Returns
    -------
    (int, list of str, list of (str, str))
        The least level the status must have (:data:`OK` when all is well), notes to
        append to its summary, and key values.
    """
    level, notes = OK, []
    if status is None or status.state == "failed":
        level = ERROR
        notes.append(f"field log not recording: {error}" if status is None else f"field log stopped: {status.error}")
    if status is None:
        return level, notes, [("field_log", "not recording")]
    if status.dropped > reported[0]:
        level = max(level, WARN)
        notes.append(f"field log dropped {status.dropped - reported[0]} records")
    return level, notes, [("field_log", str(status.path)), ("field_log_state", status.state),
                          ("field_log_written", str(status.written)), ("field_log_dropped", str(status.dropped)),
                          ("field_log_lost", str(status.lost))]
