"""The one conversion of a control step's arguments (stamps, state and reference), shared by the Python
and the native core."""

from __future__ import annotations

import math
from typing import Any, Sequence

__all__ = ["state_arguments", "sized_floats", "refusal_stamps", "float_list"]

_isfinite = math.isfinite


def state_arguments(x: Any, size: int, t: Any, now: Any) -> tuple[str | None, list[float] | None, Any, Any]:
    """The step's state and times converted, or the reason the step is refused.

    The one conversion of a step's stamps and state, for both backends; a step refused here
    records ``refusal_stamps`` of the ``t`` and ``now`` returned.

    Parameters
    ----------
    x : Any
        The state as given.
    size : int
        How many entries the state has.
    t, now : Any
        The state's stamp and the current time as given (``now`` defaults to ``t``).

    Returns
    -------
    reason : str or None
        None when accepted; ``bad_time`` (a stamp or time that is no finite number) or
        ``wrong_length`` (a state not of ``size`` numbers).
    x : list of float or None
        The state as floats, None when refused.
    t, now : float, or as given
        Finite floats (``now`` is ``t`` when not given); for ``bad_time`` as given.
    """
    try:
        stamp = float(t)
        current = stamp if now is None else float(now)
    except (TypeError, ValueError, OverflowError):
        return "bad_time", None, t, now
    if not (_isfinite(stamp) and _isfinite(current)):
        return "bad_time", None, t, now
    x = sized_floats(x, size)
    return (None if x is not None else "wrong_length"), x, stamp, current


def sized_floats(values: Any, size: int) -> list[float] | None:
    """``values`` as a list of floats (:func:`float_list`) when it has ``size`` entries that convert, else None.

    Parameters
    ----------
    values : Any
    size : int

    Returns
    -------
    list of float or None
    """
    try:
        if len(values) != size:
            return None
        return float_list(values)
    except (TypeError, ValueError, OverflowError):
        return None


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
