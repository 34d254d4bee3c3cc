"""Lie derivatives, brackets, ``ad_f^k g`` and the distributions they span (symbolic only).

Conventions (Isidori, Nonlinear Control Systems, 3rd ed., sec. 1.2):
``L_f h = dh . f``, ``[f, g] = (dg/dx) f - (df/dx) g``, ``ad_f^0 g = g``,
``ad_f^k g = [f, ad_f^(k-1) g]``.
"""

from __future__ import annotations

import itertools
from typing import Iterator, Sequence

import sympy as sp

__all__ = ["lie_derivative", "lie_derivative_covector", "lie_bracket", "ad", "bracket_blocks", "distribution"]


def lie_derivative(h: sp.Expr, f: sp.Matrix, x: Sequence[sp.Symbol]) -> sp.Expr:
    """Lie derivative of a function along a vector field, ``L_f h = (dh/dx) f``.

    Parameters
    ----------
    h : sympy.Expr
        Scalar function of ``x``.
    f : sympy.Matrix
        Vector field, n x 1.
    x : sequence of sympy.Symbol
        Coordinates, length n.

    Returns
    -------
    sympy.Expr

    Examples
    --------
    >>> x1, x2 = sp.symbols("x1 x2")
    >>> lie_derivative(x1**2, sp.Matrix([x2, 0]), (x1, x2))
    2*x1*x2
    """
    return sp.Add(*[sp.diff(h, xi) * fi for xi, fi in zip(x, f)])


def lie_derivative_covector(w: sp.Matrix, f: sp.Matrix, x: Sequence[sp.Symbol]) -> sp.Matrix:
    """Lie derivative of a covector field, ``L_f w = f^T (dw^T/dx)^T + w (df/dx)``.

    Parameters
    ----------
    w : sympy.Matrix
        Covector field, 1 x n.
    f : sympy.Matrix
        Vector field, n x 1.
    x : sequence of sympy.Symbol

    Returns
    -------
    sympy.Matrix
        1 x n. For an exact covector ``w = dh`` this equals ``d(L_f h)``.

    Examples
    --------
    >>> x1, x2 = sp.symbols("x1 x2")
    >>> lie_derivative_covector(sp.Matrix([[x2, 0]]), sp.Matrix([0, x1]), (x1, x2))
    Matrix([[x1, 0]])
    """
    X = sp.Matrix(x)
    return (w.T.jacobian(X) * f).T + w * f.jacobian(X)


def lie_bracket(f: sp.Matrix, g: sp.Matrix, x: Sequence[sp.Symbol]) -> sp.Matrix:
    """Lie bracket of two vector fields, ``[f, g] = (dg/dx) f - (df/dx) g``.

    Parameters
    ----------
    f, g : sympy.Matrix
        Vector fields, n x 1.
    x : sequence of sympy.Symbol

    Returns
    -------
    sympy.Matrix
        n x 1.

    Examples
    --------
    >>> x1, x2 = sp.symbols("x1 x2")
    >>> lie_bracket(sp.Matrix([x2, 0]), sp.Matrix([0, 1]), (x1, x2)).T
    Matrix([[-1, 0]])
    """
    X = sp.Matrix(x)
    return g.jacobian(X) * f - f.jacobian(X) * g


def ad(f: sp.Matrix, g: sp.Matrix, x: Sequence[sp.Symbol], k: int) -> sp.Matrix:
    """Iterated bracket ``ad_f^k g`` (``ad_f^0 g = g``).

    Parameters
    ----------
    f, g : sympy.Matrix
    x : sequence of sympy.Symbol
    k : int
        Order, k >= 0.

    Returns
    -------
    sympy.Matrix
    """
    if k < 0:
        raise ValueError(f"k must be >= 0, got {k}")
    result = g
    for _ in range(k):
        result = lie_bracket(f, result, x)
    return result


def bracket_blocks(f: sp.Matrix, G: sp.Matrix, x: Sequence[sp.Symbol]) -> Iterator[list[sp.Matrix]]:
    """Yield ``[ad_f^j g_1, ..., ad_f^j g_m]`` for j = 0, 1, 2, ... (computed on demand).

    Parameters
    ----------
    f : sympy.Matrix
        Drift, n x 1.
    G : sympy.Matrix
        Input matrix, n x m.
    x : sequence of sympy.Symbol

    Returns
    -------
    iterator of list of sympy.Matrix
        Block j holds the m fields ``ad_f^j g_i``; the next block is only computed
        when asked for.
    """
    block = [G[:, i] for i in range(G.shape[1])]
    while True:
        yield block
        block = [lie_bracket(f, c, x) for c in block]


def distribution(f: sp.Matrix, G: sp.Matrix, x: Sequence[sp.Symbol], k: int) -> list[sp.Matrix]:
    """Generators of ``D_k = span{ad_f^j g_i : 0 <= j <= k, all inputs i}``.

    Parameters
    ----------
    f : sympy.Matrix
        Drift, n x 1.
    G : sympy.Matrix
        Input matrix, n x m.
    x : sequence of sympy.Symbol
    k : int

    Returns
    -------
    list of sympy.Matrix
        Ordered by j, then by input: g_1, ..., g_m, ad_f g_1, ..., ad_f^k g_m.
    """
    return [field for block in itertools.islice(bracket_blocks(f, G, x), k + 1) for field in block]
