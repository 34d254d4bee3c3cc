"""``linz check``: decide whether and where a plant can be feedback linearized."""

from __future__ import annotations

import json
from pathlib import Path

__all__ = ["check", "render_check", "StepProgress"]


class StepProgress:
    """Progress of an analysis on stderr: one bar per step (``linz sim``'s :class:`ProgressBar`).

    Parameters
    ----------
    enabled : bool
    label : str
        Printed before each step's name.
    """

    def __init__(self, enabled: bool, label: str) -> None:
        self.enabled, self.label = enabled, label
        self.step: str | None = None
        self.bar = None
        self.fraction = 0.0

    def __call__(self, step: str, fraction: float) -> None:
        from linz_ros.commands.sim import ProgressBar

        if step != self.step:
            self.close()
            self.step, self.bar = step, ProgressBar(self.enabled, f"{self.label}: {step}")
        self.fraction = fraction
        self.bar(fraction)

    def close(self) -> None:
        """Finish the current step's bar (its line ends).

        Returns
        -------
        None
        """
        if self.bar is not None and self.fraction < 1.0:
            self.bar(1.0)
        self.bar = None


def check(plant: str | Path, samples: int = 1024, budget: float | None = None, progress: bool = False):
    """Analyse a plant file.

    Parameters
    ----------
    plant : str or pathlib.Path
        The plant file.
    samples : int
        Envelope samples for the conditioning sweep.
    budget : float or None
        CPU seconds for the analysis (default ``analysis.DEFAULT_BUDGET_SECONDS``); beyond
        them the verdicts are "could not decide within the budget".
    progress : bool
        Report each step and how far it is on stderr.

    Returns
    -------
    linz_ros.analysis.Report

    Raises
    ------
    LinzError
        For a plant file that cannot be read or is not valid.
    """
    from linz_ros.analysis import DEFAULT_BUDGET_SECONDS, analyse
    from linz_ros.geometry import Monitor
    from linz_ros.model import load_plant

    loaded = load_plant(plant)
    bars = StepProgress(progress, f"check {loaded.name}")
    monitor = Monitor(DEFAULT_BUDGET_SECONDS if budget is None else budget, bars if progress else None)
    try:
        return analyse(loaded, samples=samples, monitor=monitor)
    finally:
        bars.close()


def render_check(report, as_json: bool = False) -> str:
    """The report as ``linz check`` prints it.

    Parameters
    ----------
    report : linz_ros.analysis.Report
    as_json : bool
        One JSON object (the contract of ``--json``) instead of the text.

    Returns
    -------
    str
    """
    from linz_ros.analysis import render_text

    return json.dumps(report.to_json(), indent=2) if as_json else render_text(report)
