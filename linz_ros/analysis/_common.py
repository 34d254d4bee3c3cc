"""Helpers shared by the analyses: the numeric context of a plant and expression tidying."""

from __future__ import annotations

import sympy as sp

from linz_ros.geometry import NumericContext, tree_size
from linz_ros.model import Plant

#: Expressions with more operations than this are shown as computed, not simplified.
TIDY_BUDGET = 250


def plant_context(plant: Plant, count: int = 5) -> NumericContext:
    """Numeric context of a plant: nominal parameters, random points in its envelope.

    Parameters
    ----------
    plant : Plant
    count : int
        Number of random points (within +-1 of the operating point where unbounded).

    Returns
    -------
    NumericContext
    """
    bounds = {i: plant.envelope[s.name] for i, s in enumerate(plant.states) if s.name in plant.envelope}
    return NumericContext.around(plant.states, plant.nominal, plant.operating_vector(), bounds, count)


def tidy(expr: sp.Expr) -> sp.Expr:
    """Simplify an expression for display, within a size budget (simplify is costly)."""
    expr = sp.sympify(expr)
    ops = sp.count_ops(expr)
    if ops > TIDY_BUDGET:
        return expr
    if ops > TIDY_BUDGET // 5:
        return sp.cancel(expr)
    return sp.simplify(expr)


def show(expr: sp.Expr) -> str:
    """Text form of an expression, in the plant-file grammar (``**`` for powers)."""
    return str(expr)


#: Expressions with more tree nodes than this are summarised, not printed (a six-joint
#: arm's mass-matrix entries print to hundreds of kilobytes).
SHOW_BUDGET = 2000


def tree_size_above(expr: sp.Expr, limit: int) -> bool:
    """True when ``expr`` has more than ``limit`` nodes; stops counting there (cheap on big trees)."""
    return tree_size(expr, limit) > limit


def small_enough(matrix: sp.Matrix, limit: int = SHOW_BUDGET) -> bool:
    """True when every entry of ``matrix`` has at most ``limit`` nodes."""
    return not any(tree_size_above(e, limit) for e in matrix)


def show_bounded(expr: sp.Expr, limit: int = SHOW_BUDGET) -> str:
    """:func:`show`, or a placeholder for an expression too large to print usefully."""
    if tree_size_above(expr, limit):
        return f"<expression of more than {limit} nodes>"
    return show(expr)


def show_matrix(matrix: sp.Matrix, bounded: bool = False) -> list[list[str]]:
    """A matrix as rows of entry texts, for the JSON report.

    Parameters
    ----------
    matrix : sympy.Matrix
    bounded : bool
        Summarise entries too large to print (:func:`show_bounded`) instead of printing all.

    Returns
    -------
    list of list of str
    """
    text = show_bounded if bounded else show
    return [[text(e) for e in row] for row in matrix.tolist()]


def count(number: int, noun: str, plural: str = "") -> str:
    """``1 input``, ``2 inputs``: a number with its noun in the right form.

    Parameters
    ----------
    number : int
    noun : str
        The singular.
    plural : str
        The plural when not ``noun + "s"``.

    Returns
    -------
    str

    Examples
    --------
    >>> count(1, "input"), count(3, "output"), count(2, "matrix", "matrices")
    ('1 input', '3 outputs', '2 matrices')
    """
    return f"{number} {noun if number == 1 else (plural or noun + 's')}"


def names_are(names: list[str], noun: str) -> str:
    """``output y is`` or ``outputs y1, y2 are``.

    Parameters
    ----------
    names : list of str
    noun : str

    Returns
    -------
    str
    """
    return f"{noun} {names[0]} is" if len(names) == 1 else f"{noun}s {', '.join(names)} are"


def depends_on_states(expr: sp.Expr, plant: Plant) -> bool:
    """True when ``expr`` contains a state symbol."""
    return bool(sp.sympify(expr).free_symbols & set(plant.states))
