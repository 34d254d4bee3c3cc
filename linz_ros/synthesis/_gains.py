"""Outer-loop gains on the Brunovsky chains: pole placement, LQR, and the sampled-loop check.

After exact linearization each output i is a chain of r_i integrators driven by v_i.
With integral action the chain is extended by eta_i' = e_i (the tracking error), so it
has r_i + 1 states ordered ``(eta_i, e_i, e_i', ..., e_i^(r_i - 1))``; without, r_i states
``(e_i, ..., e_i^(r_i - 1))``. The law is ``v_i = y_ref_i^(r_i) - K_i . state_i``.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
import scipy.linalg

__all__ = ["chain_matrices", "gains_from_poles", "gains_from_lqr", "SampledLoop", "sampled_loop",
           "LQR_WEIGHT_RANGE"]

#: LQR weights lie within this range (q may also be 0): beyond it the Riccati solver works
#: on numbers that have lost all precision, and no outer loop needs them.
LQR_WEIGHT_RANGE = (1e-12, 1e12)

#: Imaginary parts below this (relative) count as zero when pairing conjugate poles.
_CONJUGATE_RTOL = 1e-9


def chain_matrices(order: int) -> tuple[np.ndarray, np.ndarray]:
    """The Brunovsky chain of ``order`` integrators in companion form.

    Parameters
    ----------
    order : int
        Number of integrators (r, or r + 1 with integral action).

    Returns
    -------
    A, B : numpy.ndarray
        ``order x order`` shift matrix and ``order x 1`` input column (last entry 1).

    Examples
    --------
    >>> A, B = chain_matrices(2)
    >>> A.tolist(), B.ravel().tolist()
    ([[0.0, 1.0], [0.0, 0.0]], [0.0, 1.0])
    """
    A = np.eye(order, k=1)
    B = np.zeros((order, 1))
    B[-1, 0] = 1.0
    return A, B


def gains_from_poles(poles: list[complex]) -> np.ndarray:
    """Gains that place the poles of one Brunovsky chain exactly.

    On a chain of integrators in companion form, ``A - B K`` has the characteristic
    polynomial ``s^r + K_(r-1) s^(r-1) + ... + K_0``, so K is read off the coefficients
    of ``prod (s - p_i)`` (Ackermann's formula in companion form; Kailath, Linear
    Systems, sec. 3.2). Unlike ``scipy.signal.place_poles``, which refuses a pole of
    multiplicity above rank B = 1, this accepts repeated poles (critical damping).

    Parameters
    ----------
    poles : list of complex
        The closed-loop poles of the chain, in the open left half-plane, complex ones
        in conjugate pairs.

    Returns
    -------
    numpy.ndarray
        ``K = [K_0, ..., K_(r-1)]``, multiplying ``(e, e', ..., e^(r-1))``.

    Raises
    ------
    ValueError
        When complex poles do not come in conjugate pairs.

    Examples
    --------
    >>> gains_from_poles([-2, -3]).tolist()
    [6.0, 5.0]
    """
    values = np.asarray(poles, dtype=complex)
    _check_conjugate_pairs(values)
    coefficients = np.poly(values)           # [1, a_(r-1), ..., a_0]
    return np.real(coefficients[1:][::-1]).astype(float)


def _check_conjugate_pairs(values: np.ndarray) -> None:
    complex_ones = [p for p in values if abs(p.imag) > _CONJUGATE_RTOL * max(1.0, abs(p))]
    remaining = list(complex_ones)
    while remaining:
        p = remaining.pop()
        match = [i for i, q in enumerate(remaining)
                 if abs(q - p.conjugate()) <= 1e-9 * max(1.0, abs(p))]
        if not match:
            raise ValueError(f"pole {p.real:g}{p.imag:+g}j has no complex-conjugate partner")
        remaining.pop(match[0])


def gains_from_lqr(orders: list[int], q: list[float], r: list[float]) -> tuple[list[np.ndarray], np.ndarray]:
    """LQR gains for a set of Brunovsky chains with diagonal weights.

    Solves the continuous algebraic Riccati equation of the stacked chains with
    ``scipy.linalg.solve_continuous_are``; ``K = R^-1 B^T P``. With diagonal Q and R
    the chains decouple, so K is block diagonal and each block is one chain's gains.

    Parameters
    ----------
    orders : list of int
        Number of states of each chain.
    q : list of float
        One weight per chain state, chains in order (length ``sum(orders)``).
    r : list of float
        One weight per chain (its virtual input v_i), positive.

    Returns
    -------
    gains : list of numpy.ndarray
        Per chain, its gains in state order.
    P : numpy.ndarray
        The stabilising solution of the Riccati equation.
    """
    blocks = [chain_matrices(k) for k in orders]
    A = scipy.linalg.block_diag(*(a for a, _ in blocks))
    B = scipy.linalg.block_diag(*(b for _, b in blocks))
    Q = np.diag(np.asarray(q, dtype=float))
    R = np.diag(np.asarray(r, dtype=float))
    # scipy warns (casts of non-finite intermediates) before it raises; the caller reports the failure
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore", RuntimeWarning)
        P = scipy.linalg.solve_continuous_are(A, B, Q, R)
        K = np.linalg.solve(R, B.T @ P)
    gains, start = [], 0
    for i, k in enumerate(orders):
        gains.append(K[i, start:start + k].copy())
        start += k
    return gains, P


def closed_loop_poles(gains: np.ndarray) -> np.ndarray:
    """Poles of one chain under ``v = -K state``.

    Parameters
    ----------
    gains : numpy.ndarray
        K, in state order.

    Returns
    -------
    numpy.ndarray
        Eigenvalues of ``A - B K``, sorted by real part.
    """
    A, B = chain_matrices(len(gains))
    values = np.linalg.eigvals(A - B @ np.atleast_2d(gains))
    return np.array(sorted(values, key=lambda z: (z.real, z.imag)))


@dataclass(frozen=True)
class SampledLoop:
    """The chain under the sampled law (zero-order hold at the control period T)."""

    period: float
    spectral_radius: float
    equivalent_decay: float        # -ln(rho) / T: the continuous rate the sampled loop achieves
    designed_decay: float          # -max Re(p) of the continuous design
    fastest_pole_times_period: float


def sampled_loop(gains: np.ndarray, period: float) -> SampledLoop:
    """The chain discretized with a zero-order hold and closed by the sampled law.

    ``x[k+1] = (Phi - Gamma K) x[k]`` with ``Phi = exp(A T)``, ``Gamma = int_0^T exp(A s) ds B``
    (computed together as one matrix exponential; Franklin, Powell and Workman, Digital
    Control of Dynamic Systems, sec. 4.3).

    Parameters
    ----------
    gains : numpy.ndarray
    period : float
        Control period T in seconds.

    Returns
    -------
    SampledLoop
    """
    order = len(gains)
    A, B = chain_matrices(order)
    augmented = np.zeros((order + 1, order + 1))
    augmented[:order, :order] = A * period
    augmented[:order, order:] = B * period
    exponential = scipy.linalg.expm(augmented)
    Phi, Gamma = exponential[:order, :order], exponential[:order, order:]
    rho = float(max(abs(np.linalg.eigvals(Phi - Gamma @ np.atleast_2d(gains)))))
    poles = closed_loop_poles(gains)
    decay = -math.log(rho) / period if 0 < rho else math.inf
    return SampledLoop(period, rho, decay, float(-max(poles.real)),
                       float(max(abs(poles)) * period))
