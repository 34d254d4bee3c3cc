"""Small dense linear algebra for one control step: closed forms for 1x1 and 2x2, numpy above.

Matrices arrive flat in row-major order (as the compiled law returns them). For m <= 2
everything is plain float arithmetic, which in CPython is several times faster than a
numpy call on a 2x2 array; for larger m numpy's LAPACK routines are used.
"""

from __future__ import annotations

import math
from typing import Sequence

import numpy as np

__all__ = ["singular_values", "solve", "damped_solve"]


def singular_values(a: Sequence[float], m: int) -> tuple[float, float]:
    """Smallest and largest singular value of a square m x m matrix given flat.

    For 2x2 with ``S = |A|_F^2`` and ``D = |det A|``: ``sigma_max^2 = (S + sqrt(S^2 - 4 D^2)) / 2``
    and ``sigma_min = D / sigma_max`` (the product of the singular values is ``|det A|``),
    which stays accurate when sigma_min is tiny.

    Parameters
    ----------
    a : sequence of float
        Row-major entries, length m*m.
    m : int

    Returns
    -------
    (float, float)
        ``(sigma_min, sigma_max)``.

    Examples
    --------
    >>> [round(s, 12) for s in singular_values([3.0, 0.0, 0.0, -0.5], 2)]
    [0.5, 3.0]
    """
    if m == 1:
        s = abs(a[0])
        return s, s
    if m == 2:
        # scaled by the largest entry, so squares neither overflow nor underflow
        scale = max(abs(a[0]), abs(a[1]), abs(a[2]), abs(a[3]))
        if not scale > 0.0:
            return (0.0, 0.0) if scale == 0.0 else (math.nan, math.nan)
        if scale == math.inf:
            return math.nan, math.inf
        p, q, r, s = a[0] / scale, a[1] / scale, a[2] / scale, a[3] / scale
        frob = p * p + q * q + r * r + s * s
        det = abs(p * s - q * r)
        disc = frob * frob - 4.0 * det * det
        big = math.sqrt(0.5 * (frob + math.sqrt(disc if disc > 0.0 else 0.0)))
        return det / big * scale, big * scale
    sigma = np.linalg.svd(np.asarray(a, dtype=float).reshape(m, m), compute_uv=False)
    return float(sigma[-1]), float(sigma[0])


def solve(a: Sequence[float], rhs: Sequence[float], m: int) -> list[float]:
    """Solve ``A u = rhs`` for square, nonsingular A given flat.

    Parameters
    ----------
    a : sequence of float
        Row-major entries, length m*m.
    rhs : sequence of float
        Length m.
    m : int

    Returns
    -------
    list of float

    Examples
    --------
    >>> solve([2.0, 1.0, 1.0, 3.0], [3.0, 5.0], 2)
    [0.8, 1.4]
    """
    if m == 1:
        return [rhs[0] / a[0]]
    if m == 2:
        p, q, r, s = a[0], a[1], a[2], a[3]
        det = p * s - q * r
        return [(s * rhs[0] - q * rhs[1]) / det, (p * rhs[1] - r * rhs[0]) / det]
    return np.linalg.solve(np.asarray(a, dtype=float).reshape(m, m), np.asarray(rhs, dtype=float)).tolist()


def damped_solve(a: Sequence[float], rhs: Sequence[float], m: int, damping: float) -> list[float]:
    """Damped least-squares solution ``u = A^T (A A^T + lambda^2 I)^-1 rhs``.

    This is the singularity-robust inverse (Nakamura and Hanafusa, ASME J. Dyn. Syst.
    Meas. Control 108, 1986; Wampler, IEEE SMC 16, 1986): it minimises
    ``|A u - rhs|^2 + lambda^2 |u|^2``, so ``|u| <= |rhs| / (2 lambda)`` however singular A is.

    Parameters
    ----------
    a : sequence of float
        Row-major entries, length m*m.
    rhs : sequence of float
    m : int
    damping : float
        lambda >= 0.

    Returns
    -------
    list of float

    Examples
    --------
    >>> damped_solve([1.0, 0.0, 0.0, 0.0], [1.0, 1.0], 2, 1.0)
    [0.5, 0.0]
    """
    lam2 = damping * damping
    if m == 1:
        return [a[0] * rhs[0] / (a[0] * a[0] + lam2)]
    if m == 2:
        p, q, r, s = a[0], a[1], a[2], a[3]
        # M = A A^T + lambda^2 I (symmetric), w = M^-1 rhs, u = A^T w
        m11, m12, m22 = p * p + q * q + lam2, p * r + q * s, r * r + s * s + lam2
        det = m11 * m22 - m12 * m12
        w1 = (m22 * rhs[0] - m12 * rhs[1]) / det
        w2 = (m11 * rhs[1] - m12 * rhs[0]) / det
        return [p * w1 + r * w2, q * w1 + s * w2]
    A = np.asarray(a, dtype=float).reshape(m, m)
    w = np.linalg.solve(A @ A.T + lam2 * np.eye(m), np.asarray(rhs, dtype=float))
    return (A.T @ w).tolist()
