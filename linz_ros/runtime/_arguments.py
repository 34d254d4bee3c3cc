"""The one conversion of a control step's arguments (stamps, state and reference), shared by the Python
and the native core."""

from __future__ import annotations

import math
from typing import Any, Sequence

__all__ = ["stamps", "refusal_stamps", "float_list"]

_isfinite = math.isfinite


def stamps(t: Any, now: Any) -> tuple[float, float] | None:
    """The state's stamp and the current time as finite floats (``now`` defaults to ``t``), or None.

    The one conversion of a step's times, for both backends: None means the step is refused
    as ``bad_time``.
    """
    try:
        t = float(t)
        now = t if now is None else float(now)
    except (TypeError, ValueError, OverflowError):
        return None
    return (t, now) if _isfinite(t) and _isfinite(now) else None


def refusal_stamps(t: Any, now: Any) -> tuple[float, float | None]:
    """The stamp a refused step records (nan when ``t`` is no number) and the time it holds against."""
    try:
        stamp = float(t)
    except (TypeError, ValueError, OverflowError):
        stamp = math.nan
    try:
        current = None if now is None else float(now)
    except (TypeError, ValueError, OverflowError):
        current = None
    return stamp, current


def float_list(values: Sequence[float]) -> list[float]:
    """``values`` as a list of floats, ``float()`` of each (the list itself when it already is one).

    Raises
    ------
    TypeError, ValueError, OverflowError
        As ``float()`` does.
    """
    if type(values) is list and all(type(v) is float for v in values):
        return values
    return [float(v) for v in values]
