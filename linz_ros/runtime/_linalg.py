"""Small dense linear algebra for one control step: closed forms for 1x1 and 2x2, numpy above.

Matrices arrive flat in row-major order (as the compiled law returns them). For m <= 2
everything is plain float arithmetic, which in CPython is several times faster than a
numpy call on a 2x2 array; for larger m numpy's LAPACK routines are used.
"""

from __future__ import annotations

import math
from typing import Sequence

import numpy as np

__all__ = ["singular_values", "solve", "damped_solve", "spd_solve", "task_space_terms",
           "inverse_mass_singular_values", "computed_torque"]

#: Up to this size a symmetric positive definite solve is plain float arithmetic (Cholesky).
SMALL_SPD = 3


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
        p, q, r, s = a[0], a[1], a[2], a[3]
        frob = p * p + q * q + r * r + s * s
        if 1e-140 < frob < 1e140:
            # no square can have overflowed or lost precision to underflow: no scaling needed
            det = abs(p * s - q * r)
            disc = frob * frob - 4.0 * det * det
            big = math.sqrt(0.5 * (frob + math.sqrt(disc if disc > 0.0 else 0.0)))
            return det / big, big
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
    if m == 3:
        return _singular_values_3(a)
    sigma = np.linalg.svd(np.asarray(a, dtype=float).reshape(m, m), compute_uv=False)
    return float(sigma[-1]), float(sigma[0])


def _singular_values_3(a: Sequence[float]) -> tuple[float, float]:
    # eigenvalues of G = A^T A in closed form (O. K. Smith, Comm. ACM 4(4), 1961: the
    # trigonometric solution of the characteristic cubic); sigma_max and sigma_mid from them,
    # sigma_min = |det A| / (sigma_max sigma_mid), which keeps it accurate when tiny; where two
    # eigenvalues of G nearly coincide the cubic's solution is good to about sqrt(eps) relative
    scale = max(map(abs, a))
    if not scale > 0.0:
        return (0.0, 0.0) if scale == 0.0 else (math.nan, math.nan)
    if scale == math.inf:
        return math.nan, math.inf
    a0, a1, a2, a3, a4, a5, a6, a7, a8 = (v / scale for v in a)
    g11 = a0 * a0 + a3 * a3 + a6 * a6
    g22 = a1 * a1 + a4 * a4 + a7 * a7
    g33 = a2 * a2 + a5 * a5 + a8 * a8
    g12 = a0 * a1 + a3 * a4 + a6 * a7
    g13 = a0 * a2 + a3 * a5 + a6 * a8
    g23 = a1 * a2 + a4 * a5 + a7 * a8
    q = (g11 + g22 + g33) / 3.0
    off = g12 * g12 + g13 * g13 + g23 * g23
    d1, d2, d3 = g11 - q, g22 - q, g33 - q
    spread = math.sqrt((d1 * d1 + d2 * d2 + d3 * d3 + 2.0 * off) / 6.0)
    if spread > 0.0:
        b11, b22, b33 = d1 / spread, d2 / spread, d3 / spread
        b12, b13, b23 = g12 / spread, g13 / spread, g23 / spread
        half_det = 0.5 * (b11 * (b22 * b33 - b23 * b23) - b12 * (b12 * b33 - b23 * b13)
                          + b13 * (b12 * b23 - b22 * b13))
        phi = math.acos(max(-1.0, min(1.0, half_det))) / 3.0
        largest = q + 2.0 * spread * math.cos(phi)
        smallest = q + 2.0 * spread * math.cos(phi + 2.0 * math.pi / 3.0)
        middle = 3.0 * q - largest - smallest
    else:
        largest = middle = q
    s_max = math.sqrt(largest)
    s_mid = math.sqrt(middle) if middle > 0.0 else 0.0
    det = abs(a0 * (a4 * a8 - a5 * a7) - a1 * (a3 * a8 - a5 * a6) + a2 * (a3 * a7 - a4 * a6))
    s_min = min(det / (s_max * s_mid), s_mid) if s_mid > 0.0 else 0.0
    return s_min * scale, s_max * scale


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
    if m == 3:
        # the adjugate (Cramer's rule): forward error of order cond(A) eps (Higham, Accuracy and
        # Stability of Numerical Algorithms, sec. 1.10.1), and the core solves here only where
        # sigma_min >= sigma_act bounds cond(A); numpy costs ten times more per 3 x 3 call
        a0, a1, a2, a3, a4, a5, a6, a7, a8 = a
        c0, c3, c6 = a4 * a8 - a5 * a7, a5 * a6 - a3 * a8, a3 * a7 - a4 * a6
        det = a0 * c0 + a1 * c3 + a2 * c6
        r0, r1, r2 = rhs
        return [(c0 * r0 + (a2 * a7 - a1 * a8) * r1 + (a1 * a5 - a2 * a4) * r2) / det,
                (c3 * r0 + (a0 * a8 - a2 * a6) * r1 + (a2 * a3 - a0 * a5) * r2) / det,
                (c6 * r0 + (a1 * a6 - a0 * a7) * r1 + (a0 * a4 - a1 * a3) * r2) / det]
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
    # above 2 x 2, as the least-squares problem min |[A; lambda I] u - [rhs; 0]| (LAPACK's SVD-based
    # solver): its condition number is the square root of that of A A^T + lambda^2 I, so two
    # implementations (this one and the native step's Householder QR) agree to eps * cond
    stacked = np.vstack([np.asarray(a, dtype=float).reshape(m, m), damping * np.eye(m)])
    target = np.concatenate([np.asarray(rhs, dtype=float), np.zeros(m)])
    return np.linalg.lstsq(stacked, target, rcond=None)[0].tolist()


def spd_solve(a: Sequence[float], columns: Sequence[Sequence[float]], n: int) -> list[list[float]]:
    """Solve ``M X = [c_1 ... c_k]`` for symmetric positive definite M given flat (Cholesky).

    Parameters
    ----------
    a : sequence of float
        Row-major entries of M, length n*n (only the lower triangle is read).
    columns : sequence of sequence of float
        The right-hand sides, each of length n.
    n : int

    Returns
    -------
    list of list of float
        One solution per right-hand side.

    Raises
    ------
    ArithmeticError
        When M is not positive definite (a pivot is not positive).

    Examples
    --------
    >>> spd_solve([4.0, 2.0, 2.0, 3.0], [[2.0, 1.0]], 2)
    [[0.5, 0.0]]
    """
    if n > SMALL_SPD:
        return _cholesky_solve_lapack(a, np.asarray(columns, dtype=float).T, n).T.tolist()
    if n == 3:
        return _spd_solve_3(a, columns)
    # M = L L^T, row by row (Golub and Van Loan, Matrix Computations, alg. 4.2.1)
    L = [[0.0] * n for _ in range(n)]
    for i in range(n):
        for j in range(i + 1):
            acc = a[i * n + j] - sum(L[i][k] * L[j][k] for k in range(j))
            if i == j:
                if not acc > 0.0:
                    raise ArithmeticError("mass matrix is not positive definite")
                L[i][i] = math.sqrt(acc)
            else:
                L[i][j] = acc / L[j][j]
    out = []
    for c in columns:
        y = [0.0] * n
        for i in range(n):
            y[i] = (c[i] - sum(L[i][k] * y[k] for k in range(i))) / L[i][i]
        x = [0.0] * n
        for i in reversed(range(n)):
            x[i] = (y[i] - sum(L[k][i] * x[k] for k in range(i + 1, n))) / L[i][i]
        out.append(x)
    return out


def _spd_solve_3(a: Sequence[float], columns: Sequence[Sequence[float]]) -> list[list[float]]:
    # the 3 x 3 case of the row-by-row Cholesky factorisation above, written out (vessels)
    d1 = a[0]
    if not d1 > 0.0:
        raise ArithmeticError("mass matrix is not positive definite")
    l11 = math.sqrt(d1)
    l21, l31 = a[3] / l11, a[6] / l11
    d2 = a[4] - l21 * l21
    if not d2 > 0.0:
        raise ArithmeticError("mass matrix is not positive definite")
    l22 = math.sqrt(d2)
    l32 = (a[7] - l31 * l21) / l22
    d3 = a[8] - l31 * l31 - l32 * l32
    if not d3 > 0.0:
        raise ArithmeticError("mass matrix is not positive definite")
    l33 = math.sqrt(d3)
    out = []
    for c0, c1, c2 in columns:
        y0 = c0 / l11
        y1 = (c1 - l21 * y0) / l22
        x2 = (c2 - l31 * y0 - l32 * y1) / l33 / l33
        x1 = (y1 - l32 * x2) / l22
        out.append([(y0 - l21 * x1 - l31 * x2) / l11, x1, x2])
    return out


def task_space_terms(M: Sequence[float], F: Sequence[float], B: Sequence[float], J: Sequence[float],
                     c: Sequence[float], nq: int, m: int) -> tuple[list[float], list[float]]:
    """Decoupling matrix ``A = J M^-1 B`` (flat, m x m) and ``b = J M^-1 F + c`` of a mechanical plant.

    For outputs y = h(q), ``y'' = J M^-1 (F + B u) + J' q'`` (Spong, Hutchinson and
    Vidyasagar, Robot Modeling and Control, sec. 8.3), with ``c = J' q'``. M is never
    inverted: ``M X = [B F]`` is solved with the Cholesky factor of M (closed form for
    nq <= 2, plain floats for nq = 3, LAPACK above).

    Parameters
    ----------
    M, F, B, J, c : sequence of float
        Row-major: M nq x nq, F nq, B nq x m, J m x nq, c m.
    nq, m : int

    Returns
    -------
    (list of float, list of float)

    Raises
    ------
    ArithmeticError
        When M is not positive definite.

    Examples
    --------
    >>> task_space_terms([4.0, 0.0, 0.0, 16.0], [2.0, 4.0], [1.0, 0.0, 0.0, 1.0],
    ...                  [1.0, 0.0, 0.0, 1.0], [0.5, 0.0], 2, 2)
    ([0.25, 0.0, 0.0, 0.0625], [1.0, 0.25])
    """
    if nq > SMALL_SPD:
        return _task_space_terms_lapack(M, F, B, J, c, nq, m)
    if nq == 1:
        if not M[0] > 0.0:
            raise ArithmeticError("mass matrix is not positive definite")
        inv = 1.0 / M[0]
        A = [J[r] * B[j] * inv for r in range(m) for j in range(m)]
        return A, [J[r] * F[0] * inv + c[r] for r in range(m)]
    if nq == 2:
        p, q, s = M[0], M[1], M[3]
        det = p * s - q * q
        if not (p > 0.0 and det > 0.0):
            raise ArithmeticError("mass matrix is not positive definite")
        # M^-1 = [[s, -q], [-q, p]] / det applied to the columns of [B F]
        columns = [(B[j], B[m + j]) for j in range(m)]
        columns.append((F[0], F[1]))
        solved = [((s * b0 - q * b1) / det, (p * b1 - q * b0) / det) for b0, b1 in columns]
    else:
        columns = [[B[i * m + j] for i in range(nq)] for j in range(m)]
        columns.append(list(F))
        solved = spd_solve(M, columns, nq)
    A = [0.0] * (m * m)
    b = [0.0] * m
    for r in range(m):
        row = J[r * nq:(r + 1) * nq]
        for j in range(m + 1):
            x = solved[j]
            value = 0.0
            for k in range(nq):
                value += row[k] * x[k]
            if j < m:
                A[r * m + j] = value
            else:
                b[r] = value + c[r]
    return A, b


def _cholesky_solve_lapack(a: Sequence[float], rhs: np.ndarray, n: int) -> np.ndarray:
    """X with M X = rhs (n x k) through LAPACK's Cholesky factor of M given flat."""
    try:
        L = np.linalg.cholesky(np.asarray(a, dtype=float).reshape(n, n))
    except np.linalg.LinAlgError:
        raise ArithmeticError("mass matrix is not positive definite") from None
    return np.linalg.solve(L.T, np.linalg.solve(L, rhs))


def _task_space_terms_lapack(M, F, B, J, c, nq: int, m: int) -> tuple[list[float], list[float]]:
    rhs = np.empty((nq, m + 1))
    rhs[:, :m] = np.asarray(B, dtype=float).reshape(nq, m)
    rhs[:, m] = F
    X = _cholesky_solve_lapack(M, rhs, nq)
    projected = np.asarray(J, dtype=float).reshape(m, nq) @ X
    return projected[:, :m].ravel().tolist(), (projected[:, m] + np.asarray(c, dtype=float)).tolist()


def inverse_mass_singular_values(M: Sequence[float], n: int) -> tuple[float, float]:
    """Smallest and largest singular value of M^-1 for symmetric positive definite M: 1 / eig(M).

    Parameters
    ----------
    M : sequence of float
        Row-major, n x n, symmetric.
    n : int

    Returns
    -------
    (float, float)
        ``(1 / lambda_max, 1 / lambda_min)``.

    Raises
    ------
    ArithmeticError
        When M is not positive definite.

    Examples
    --------
    >>> inverse_mass_singular_values([4.0, 0.0, 0.0, 0.5], 2)
    (0.25, 2.0)
    """
    if n == 1:
        low = high = M[0]
    elif n == 2:
        p, q, s = M[0], M[1], M[3]
        mean, spread = 0.5 * (p + s), math.hypot(0.5 * (p - s), q)
        high = mean + spread
        low = (p * s - q * q) / high if high > 0.0 else -1.0      # product of the eigenvalues is det M
    else:
        eigenvalues = np.linalg.eigvalsh(np.asarray(M, dtype=float).reshape(n, n))
        low, high = float(eigenvalues[0]), float(eigenvalues[-1])
    if not low > 0.0:
        raise ArithmeticError("mass matrix is not positive definite")
    return 1.0 / high, 1.0 / low


def computed_torque(M: Sequence[float], F: Sequence[float], v: Sequence[float], n: int) -> list[float]:
    """The computed-torque law ``u = M v - F`` (Spong, Hutchinson and Vidyasagar, sec. 8.3).

    Parameters
    ----------
    M : sequence of float
        Row-major, n x n.
    F, v : sequence of float
        Generalized forces other than the inputs, and the commanded accelerations.
    n : int

    Returns
    -------
    list of float

    Examples
    --------
    >>> computed_torque([2.0, 1.0, 1.0, 3.0], [0.5, -1.0], [1.0, 2.0], 2)
    [3.5, 8.0]
    """
    out = []
    for i in range(n):
        row = M[i * n:(i + 1) * n]
        acc = -F[i]
        for k in range(n):
            acc += row[k] * v[k]
        out.append(acc)
    return out
