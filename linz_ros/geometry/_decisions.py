"""Numeric decisions on symbolic expressions: "is this identically zero?" and "what is the rank?".

A :class:`NumericContext` holds the parameter values and the random sample points used
when simplification alone cannot decide; every answer records how it was reached.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np
import sympy as sp

__all__ = ["NumericContext", "Decision", "is_identically_zero", "evaluate", "evaluate_many", "rank_at",
           "numeric_rank", "fits_symbolic_budget", "sampled_rank", "RankResult", "generic_rank"]

#: Relative tolerance on singular values for ranks at a point: sigma_i > RANK_RTOL * sigma_1.
RANK_RTOL = 1e-9
#: Absolute floor below which a matrix counts as zero.
RANK_ATOL = 1e-12
#: Digits used when deciding "identically zero" by evaluation at random points.
ZERO_DIGITS = 30
#: |value| below this at every sample point, evaluated with ZERO_DIGITS digits, is zero.
ZERO_ATOL = 1e-15
#: Matrices whose entries together exceed this many operations get a numeric generic rank.
SYMBOLIC_RANK_BUDGET = 400
#: Matrices with more entries than this get a numeric generic rank too (symbolic
#: elimination costs about entries^1.5 zero tests, however simple the entries).
SYMBOLIC_RANK_MAX_ENTRIES = 144


@dataclass(frozen=True)
class NumericContext:
    """Parameter values and sample points for the numeric side of symbolic decisions.

    Attributes
    ----------
    coordinates : tuple of sympy.Symbol
        The state coordinates, in order.
    constants : dict
        Symbol -> value for every other symbol (the plant's parameters).
    samples : numpy.ndarray
        K x n random points (in the operating envelope) where "identically zero" and
        "generic rank" are checked numerically.
    monitor : Monitor or None
        The CPU-time budget and progress reports of the analysis using the context.
    memo : dict
        Results computed once per analysis (the plant's jet programs).
    """

    coordinates: tuple[sp.Symbol, ...]
    constants: dict[sp.Symbol, sp.Expr] = field(default_factory=dict)
    samples: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))
    monitor: Any = field(default=None, compare=False)      # a Monitor: CPU budget and progress
    memo: dict = field(default_factory=dict, compare=False)  # results reused within one analysis

    @property
    def constant_symbols(self) -> tuple[sp.Symbol, ...]:
        """The constants' symbols, in a fixed order."""
        return tuple(self.constants)

    @property
    def constant_values(self) -> np.ndarray:
        """The constants' values as floats, in the order of :attr:`constant_symbols`."""
        return np.array([float(v) for v in self.constants.values()], dtype=float)

    @classmethod
    def around(cls, coordinates: Sequence[sp.Symbol], constants: dict, center: Sequence[float],
               bounds: dict[int, tuple[float, float]] | None = None, count: int = 5,
               seed: int = 20261202) -> "NumericContext":
        """Context with ``count`` random samples in ``bounds`` (index -> interval),
        or within +-1 of ``center`` for coordinates without bounds."""
        rng = np.random.default_rng(seed)
        n = len(coordinates)
        samples = np.empty((count, n))
        for i in range(n):
            lo, hi = (bounds or {}).get(i, (center[i] - 1.0, center[i] + 1.0))
            samples[:, i] = rng.uniform(lo, hi, size=count)
        return cls(tuple(coordinates), dict(constants), samples)

    def point(self, values: Sequence[float]) -> dict[sp.Symbol, sp.Expr]:
        """Substitution dict for one point, constants included."""
        subs: dict[sp.Symbol, sp.Expr] = dict(self.constants)
        subs.update(zip(self.coordinates, (sp.Float(float(v), ZERO_DIGITS) for v in values)))
        return subs


@dataclass(frozen=True)
class Decision:
    """A yes/no answer with how it was reached; ``value`` is None when undecided."""

    value: bool | None
    method: str


def is_identically_zero(expr: sp.Expr, ctx: NumericContext) -> Decision:
    """Decide whether ``expr`` vanishes for all coordinates (at the nominal parameters).

    First exactly (sympy's structural and assumption-based checks); otherwise by
    evaluation with
    :data:`ZERO_DIGITS` digits at the context's random sample points, where an analytic
    function that vanishes at every random point is zero with probability one.

    Parameters
    ----------
    expr : sympy.Expr
    ctx : NumericContext

    Returns
    -------
    Decision
        ``value`` is None when no sample point gave a finite value.
    """
    expr = sp.sympify(expr)
    if not expr.free_symbols & set(ctx.coordinates):
        expr = expr.subs(ctx.constants)
    if expr == 0 or expr.is_zero is True:
        return Decision(True, "symbolic")
    if expr.is_zero is False:
        return Decision(False, "symbolic")
    if not expr.free_symbols:
        value = complex(expr.evalf(ZERO_DIGITS))
        return Decision(abs(value) <= ZERO_ATOL, "exact evaluation")
    finite = 0
    for row in ctx.samples:
        try:
            value = complex(expr.evalf(ZERO_DIGITS, subs=ctx.point(row)))
        except (TypeError, ValueError):
            continue
        if not (math.isfinite(value.real) and math.isfinite(value.imag)):
            continue
        finite += 1
        if abs(value) > ZERO_ATOL:
            return Decision(False, "numeric")
    if finite == 0:
        return Decision(None, "not finite at any sample point")
    return Decision(True, f"numeric ({finite} random points, {ZERO_DIGITS} digits)")


@functools.lru_cache(maxsize=512)
def _compiled(matrix: sp.ImmutableMatrix, coordinates: tuple[sp.Symbol, ...],
              constants: tuple[sp.Symbol, ...]):
    # no cse and no blanket dummify: these functions run a handful of times, and both
    # cost more than they save on large matrices (unsafe names are still replaced)
    return sp.lambdify([coordinates, constants], matrix, modules="numpy", dummify=False)


def evaluate(matrix: sp.Matrix, ctx: NumericContext, point: Sequence[float]) -> np.ndarray:
    """Evaluate a symbolic matrix at one point, in float64.

    Parameters
    ----------
    matrix : sympy.Matrix
    ctx : NumericContext
    point : sequence of float
        Coordinates, in the order of ``ctx.coordinates``.

    Returns
    -------
    numpy.ndarray
        Same shape as ``matrix``; entries are nan where undefined.
    """
    return evaluate_many(matrix, ctx, [point])[0]


def evaluate_many(matrix: sp.Matrix, ctx: NumericContext, points: Sequence[Sequence[float]]) -> np.ndarray:
    """Evaluate a symbolic matrix at several points with one compiled function.

    Parameters
    ----------
    matrix : sympy.Matrix
    ctx : NumericContext
    points : sequence of sequences of float

    Returns
    -------
    numpy.ndarray
        K x rows x cols.
    """
    if len(points) == 0:
        return np.zeros((0, *matrix.shape))
    compiled = _compiled(sp.ImmutableMatrix(matrix), ctx.coordinates, ctx.constant_symbols)
    constants = ctx.constant_values
    out = np.empty((len(points), *matrix.shape))
    for index, point in enumerate(points):
        with np.errstate(all="ignore"):
            value = np.asarray(compiled(np.asarray(point, float), constants), dtype=complex)
        if np.any(np.abs(value.imag) > 1e-12 * (1 + np.abs(value.real))):
            value = np.full(value.shape, np.nan, dtype=complex)
        out[index] = np.real(value).reshape(matrix.shape)
    return out


def rank_at(matrix: sp.Matrix, ctx: NumericContext, point: Sequence[float],
            rtol: float = RANK_RTOL, atol: float = RANK_ATOL) -> int | None:
    """Numeric rank at a point: singular values above ``max(rtol * sigma_1, atol)``,
    after scaling columns to unit norm (see :func:`numeric_rank`).

    Parameters
    ----------
    matrix : sympy.Matrix
    ctx : NumericContext
    point : sequence of float
    rtol, atol : float
        Relative and absolute tolerances on the singular values.

    Returns
    -------
    int or None
        None when the matrix is not finite at the point.
    """
    return numeric_rank(evaluate(matrix, ctx, point), rtol, atol)


def numeric_rank(values: np.ndarray, rtol: float = RANK_RTOL, atol: float = RANK_ATOL) -> int | None:
    """Rank of a numeric matrix: singular values above ``max(rtol * sigma_1, atol)``,
    after scaling columns to unit norm.

    Parameters
    ----------
    values : numpy.ndarray
    rtol, atol : float

    Returns
    -------
    int or None
        None when an entry is not finite.
    """
    if values.size == 0:
        return 0
    if not np.all(np.isfinite(values)):
        return None
    sigma = np.linalg.svd(_equilibrate(values, atol), compute_uv=False)
    return int(np.sum(sigma > max(rtol * sigma[0], atol)))


def _equilibrate(values: np.ndarray, atol: float) -> np.ndarray:
    """Scale every column to unit norm; columns with norm up to ``atol`` become zero.

    Rank is invariant under nonsingular column scaling, and iterated brackets differ
    in size by many orders of magnitude (ad_f^k g grows like a rate to the k-th power),
    so an unscaled relative tolerance would drop real directions. Rows are left alone:
    scaling a row of rounding noise would turn noise into a direction.
    """
    norms = np.linalg.norm(values, axis=0, keepdims=True)
    return np.where(norms > atol, values / np.where(norms > atol, norms, 1.0), 0.0)


def fits_symbolic_budget(matrix: sp.Matrix) -> bool:
    """True when a matrix is small enough for symbolic elimination.

    Parameters
    ----------
    matrix : sympy.Matrix

    Returns
    -------
    bool
        Whether the entries together have at most :data:`SYMBOLIC_RANK_BUDGET` operations
        and there are at most :data:`SYMBOLIC_RANK_MAX_ENTRIES` of them.
    """
    if matrix.rows * matrix.cols > SYMBOLIC_RANK_MAX_ENTRIES:
        return False
    total = 0
    for entry in matrix:
        total += sp.count_ops(entry)
        if total > SYMBOLIC_RANK_BUDGET:
            return False
    return True


def sampled_rank(values: np.ndarray, label: str = "numeric") -> RankResult:
    """Generic rank from a stack of numeric evaluations (K x rows x cols): the largest rank.

    Parameters
    ----------
    values : numpy.ndarray
    label : str
        How the values were found, the head of the method.

    Returns
    -------
    RankResult
    """
    ranks = [r for r in (numeric_rank(v) for v in values) if r is not None]
    if not ranks:
        return RankResult(None, "not finite at any sample point")
    return RankResult(max(ranks), f"{label}, largest rank at {len(ranks)} random points")


@dataclass(frozen=True)
class RankResult:
    """A generic rank with how it was found."""

    rank: int | None
    method: str


def generic_rank(matrix: sp.Matrix, ctx: NumericContext) -> RankResult:
    """Rank of a matrix of functions at a generic point.

    Small matrices are row-reduced symbolically, with :func:`is_identically_zero` as
    the pivot test; larger ones are ranked numerically at the context's random points
    (the largest rank seen, which is the generic rank with probability one).

    Parameters
    ----------
    matrix : sympy.Matrix
    ctx : NumericContext

    Returns
    -------
    RankResult
    """
    matrix = sp.Matrix(matrix)
    if matrix.is_zero_matrix:
        return RankResult(0, "symbolic")
    if fits_symbolic_budget(matrix):
        methods: set[str] = set()
        undecided = False

        def zero_test(e: sp.Expr) -> bool | None:
            nonlocal undecided
            decision = is_identically_zero(e, ctx)
            methods.add(decision.method.split(" (")[0])
            undecided |= decision.value is None
            return decision.value

        rank = matrix.rank(iszerofunc=zero_test, simplify=False)
        if not undecided:
            method = "symbolic" if methods <= {"symbolic", "exact evaluation"} else \
                "symbolic elimination, numeric zero tests"
            return RankResult(rank, method)
    return sampled_rank(evaluate_many(matrix, ctx, ctx.samples))
