"""Involutivity of a distribution (Frobenius): symbolic for small distributions, sampled otherwise."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
import sympy as sp

from linz_ros.geometry._decisions import (RANK_RTOL, NumericContext, evaluate_many, fits_symbolic_budget,
                                          generic_rank, is_identically_zero, numeric_rank)
from linz_ros.geometry._lie import lie_bracket

__all__ = ["Involutivity", "involutivity"]


@dataclass(frozen=True)
class Involutivity:
    """Whether a distribution is involutive, how it was decided, and a witness pair.

    ``witness`` is ``(i, j)`` such that ``[X_i, X_j]`` is not in the distribution.
    """

    involutive: bool | None
    method: str
    witness: tuple[int, int] | None = None


def involutivity(columns: Sequence[sp.Matrix], x: Sequence[sp.Symbol], ctx: NumericContext) -> Involutivity:
    """Decide whether ``span(columns)`` is involutive (closed under Lie brackets).

    A distribution of generic rank r is involutive when, for every pair of generators,
    ``rank [X_1 ... X_k  [X_i, X_j]] = r`` generically (Frobenius; Isidori, Thm. 1.4.1).

    Parameters
    ----------
    columns : sequence of sympy.Matrix
        Generators, each n x 1.
    x : sequence of sympy.Symbol
    ctx : NumericContext

    Returns
    -------
    Involutivity
    """
    columns = list(columns)
    if not columns:
        return Involutivity(True, "empty distribution")
    D = sp.Matrix.hstack(*columns)
    pairs = [(i, j) for i in range(len(columns)) for j in range(i + 1, len(columns))]
    if fits_symbolic_budget(D):
        brackets = [lie_bracket(columns[i], columns[j], x) for i, j in pairs]
        if fits_symbolic_budget(sp.Matrix.hstack(D, *brackets)):
            return _involutivity_symbolic(D, pairs, brackets, len(x), ctx)
    return _involutivity_sampled(columns, pairs, x, ctx)


def _involutivity_symbolic(D, pairs, brackets, n, ctx) -> Involutivity:
    base = generic_rank(D, ctx)
    if base.rank is None:
        return Involutivity(None, base.method)
    if base.rank == n:
        return Involutivity(True, "full rank")
    methods = {base.method}
    for pair, bracket in zip(pairs, brackets):
        if all(is_identically_zero(e, ctx).value for e in bracket):
            continue
        augmented = generic_rank(sp.Matrix.hstack(D, bracket), ctx)
        methods.add(augmented.method)
        if augmented.rank is None:
            return Involutivity(None, augmented.method)
        if augmented.rank > base.rank:
            return Involutivity(False, "; ".join(sorted(methods)), pair)
    return Involutivity(True, "; ".join(sorted(methods)))


def _involutivity_sampled(columns, pairs, x, ctx) -> Involutivity:
    """Each bracket against D at the random points where D has its generic rank.

    The brackets are formed numerically, ``[X_i, X_j] = (dX_j/dx) X_i - (dX_i/dx) X_j``,
    from the compiled fields and their Jacobians: compiling k Jacobians costs far less
    than compiling k(k-1)/2 symbolic brackets, each about 2n times larger.
    """
    n, k = len(x), len(columns)
    X = sp.Matrix(x)
    stacked = sp.Matrix.hstack(*columns, *(c.jacobian(X) for c in columns))
    values = evaluate_many(stacked, ctx, ctx.samples)
    finite = [v for v in values if np.all(np.isfinite(v))]
    if not finite:
        return Involutivity(None, "not finite at any sample point")
    ranks = [numeric_rank(v[:, :k]) for v in finite]
    generic = max(ranks)
    if generic == n:
        return Involutivity(True, "full rank")
    regular = [v for v, r in zip(finite, ranks) if r == generic]
    method = f"numeric at {len(regular)} random points (rtol {RANK_RTOL:g})"
    for pair in pairs:
        i, j = pair
        for v in regular:
            fields = v[:, :k]
            jac_i = v[:, k + i * n: k + (i + 1) * n]
            jac_j = v[:, k + j * n: k + (j + 1) * n]
            bracket = jac_j @ fields[:, i] - jac_i @ fields[:, j]
            if numeric_rank(np.column_stack([fields, bracket])) > generic:
                return Involutivity(False, method, pair)
    return Involutivity(True, method)
