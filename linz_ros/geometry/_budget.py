"""Bounds on the analysis: the symbolic size budget and the CPU-time budget with progress reports."""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Callable, Iterable

import sympy as sp

__all__ = ["SYMBOLIC_TREE_BUDGET", "tree_size", "beyond_tree_budget", "Monitor", "BudgetExceeded", "checkpoint",
           "BeyondSymbolicBudget"]

#: Tree nodes at most in one symbolic expression the analysis forms (Lie derivatives,
#: brackets; predicted from the growth per order for brackets). Beyond it, decisions come
#: from Taylor-mode jets at sample points. The largest tree on the bundled and published
#: plants is ad_f^3 g of the pick arm (about 32 000 nodes).
SYMBOLIC_TREE_BUDGET = 40_000


def tree_size(expr: sp.Expr, limit: int) -> int:
    """Nodes of the expanded tree of ``expr``, counting stops past ``limit`` (cheap on big trees).

    Parameters
    ----------
    expr : sympy.Expr
    limit : int

    Returns
    -------
    int
        The count, at most ``limit + 1``.
    """
    count = 0
    for count, _ in enumerate(sp.preorder_traversal(sp.sympify(expr)), start=1):
        if count > limit:
            break
    return count


def beyond_tree_budget(exprs: Iterable[sp.Expr], previous: int | None = None, remaining: int = 0,
                       budget: int = SYMBOLIC_TREE_BUDGET) -> tuple[bool, int]:
    """Whether expressions (of one order) are, or are predicted to grow, beyond the budget.

    Parameters
    ----------
    exprs : iterable of sympy.Expr
    previous : int or None
        The largest tree of the previous order; with ``remaining`` it predicts the size at
        the last order needed from this order's growth.
    remaining : int
        Orders still to be formed after this one.
    budget : int

    Returns
    -------
    beyond : bool
    largest : int
        The largest tree of this order (capped at ``budget + 1``).
    """
    largest = max((tree_size(e, budget) for e in exprs), default=0)
    predicted = float(largest)
    if previous and remaining > 0 and largest > previous:
        predicted *= (largest / previous) ** remaining
    return largest > budget or predicted > budget, largest


class BeyondSymbolicBudget(Exception):
    """An expression grew beyond :data:`SYMBOLIC_TREE_BUDGET`: decide from jets instead."""


class BudgetExceeded(Exception):
    """The analysis ran out of its CPU-time budget at a step."""

    def __init__(self, seconds: float, step: str) -> None:
        super().__init__(f"could not decide within the budget ({seconds:g} s): stopped at {step}")
        self.seconds, self.step = seconds, step


@dataclass
class Monitor:
    """CPU-time budget and progress of one analysis.

    Attributes
    ----------
    seconds : float or None
        CPU seconds allowed (``time.process_time``), None for no limit.
    report : callable or None
        Called with (step, fraction done) at every checkpoint.
    """

    seconds: float | None = None
    report: Callable[[str, float], None] | None = None
    started: float = field(default_factory=time.process_time)

    def check(self, step: str, fraction: float) -> None:
        """Report progress, then raise :class:`BudgetExceeded` when the CPU time is spent.

        Parameters
        ----------
        step : str
        fraction : float
            Of the step done, 0..1.

        Returns
        -------
        None
        """
        if self.report is not None:
            self.report(step, min(max(fraction, 0.0), 1.0))
        if self.seconds is not None and time.process_time() - self.started > self.seconds:
            raise BudgetExceeded(self.seconds, step)


def checkpoint(ctx, step: str, fraction: float) -> None:
    """:meth:`Monitor.check` of the context's monitor, if it has one.

    Parameters
    ----------
    ctx : NumericContext
    step : str
    fraction : float

    Returns
    -------
    None
    """
    if getattr(ctx, "monitor", None) is not None:
        ctx.monitor.check(step, fraction)
