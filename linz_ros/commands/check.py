"""``linz check``: decide whether and where a plant can be feedback linearized."""

from __future__ import annotations

import json
from pathlib import Path

__all__ = ["check", "render_check"]


def check(plant: str | Path, samples: int = 1024):
    """Analyse a plant file.

    Parameters
    ----------
    plant : str or pathlib.Path
        The plant file.
    samples : int
        Envelope samples for the conditioning sweep.

    Returns
    -------
    linz_ros.analysis.Report

    Raises
    ------
    LinzError
        For a plant file that cannot be read or is not valid.
    """
    from linz_ros.analysis import analyse
    from linz_ros.model import load_plant

    return analyse(load_plant(plant), samples=samples)


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
