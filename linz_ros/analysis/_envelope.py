"""Conditioning of the decoupling matrix over the operating envelope (quasi-random samples)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

import numpy as np
import scipy.stats.qmc as qmc
import sympy as sp

from linz_ros.model import Plant

__all__ = ["EnvelopeResult", "sample_envelope", "envelope_points", "output_ranges"]


@dataclass
class EnvelopeResult:
    """Smallest singular value and largest condition number of A(x) over the envelope."""

    subject: str
    samples: int
    skipped: int
    min_sigma: float | None
    max_condition: float | None
    worst_state: dict[str, float] | None
    median_sigma: float | None
    method: str

    def to_json(self) -> dict[str, Any]:
        return {
            "subject": self.subject, "samples": self.samples, "skipped": self.skipped,
            "min_sigma": self.min_sigma, "max_condition": self.max_condition,
            "worst_state": self.worst_state, "median_sigma": self.median_sigma,
            "method": self.method,
        }


def _evaluate_batch(matrix: sp.Matrix, plant: Plant, points: np.ndarray) -> np.ndarray:
    """Evaluate ``matrix`` at K points (K x n) -> K x rows x cols, nan where undefined."""
    # an entry undefined at the nominal values (zoo) evaluates to nan, as at a singular point
    entries = [e.xreplace({sp.zoo: sp.nan}) for e in sp.Matrix(matrix).subs(plant.nominal)]
    fn = sp.lambdify([plant.states], entries, modules="numpy", dummify=True, cse=True)
    count = points.shape[0]
    with np.errstate(all="ignore"):
        values = fn(points.T)
    columns = [np.broadcast_to(np.asarray(v, dtype=complex), (count,)) for v in values]
    stacked = np.stack(columns, axis=1)
    real = np.where(np.abs(stacked.imag) > 1e-12 * (1 + np.abs(stacked.real)), np.nan, stacked.real)
    return real.reshape(count, *matrix.shape)


def envelope_points(plant: Plant, samples: int = 1024, seed: int = 7) -> tuple[np.ndarray, list[int]]:
    """Points over the plant's envelope (scrambled Sobol); unbounded states at the operating point.

    Parameters
    ----------
    plant : Plant
    samples : int
        Rounded up to a power of two (Sobol balance).
    seed : int

    Returns
    -------
    points : numpy.ndarray
        K x n.
    bounded : list of int
        Indices of the states the envelope bounds.
    """
    bounded = [i for i, s in enumerate(plant.states) if s.name in plant.envelope]
    base = np.asarray(plant.operating_vector(), dtype=float)
    power = max(0, int(np.ceil(np.log2(max(samples, 1)))))
    unit = qmc.Sobol(d=len(bounded), scramble=True, seed=seed).random_base2(power)
    lower = np.array([plant.envelope[plant.states[i].name][0] for i in bounded])
    upper = np.array([plant.envelope[plant.states[i].name][1] for i in bounded])
    points = np.tile(base, (unit.shape[0], 1))
    points[:, bounded] = qmc.scale(unit, lower, upper)
    return points, bounded


def output_ranges(plant: Plant, outputs: list[sp.Expr], samples: int = 256) -> list[float] | None:
    """Range (max - min) of each output over the envelope, or None without an envelope.

    Parameters
    ----------
    plant : Plant
    outputs : list of sympy.Expr
        Functions of the states.
    samples : int

    Returns
    -------
    list of float or None
        None also when an output is nowhere finite over the samples.
    """
    if not plant.envelope:
        return None
    points, _ = envelope_points(plant, samples)
    values = _evaluate_batch(sp.Matrix(outputs), plant, points)[:, :, 0]
    ranges = []
    for column in values.T:
        finite = column[np.isfinite(column)]
        if finite.size == 0:
            return None
        ranges.append(float(np.ptp(finite)))
    return ranges


def sample_envelope(plant: Plant, matrix: sp.Matrix | Callable[[np.ndarray], np.ndarray], subject: str,
                    samples: int = 1024, seed: int = 7) -> EnvelopeResult:
    """Sample ``matrix`` over the plant's envelope with a scrambled Sobol sequence.

    States without envelope bounds stay at their operating-point values.

    Parameters
    ----------
    plant : Plant
    matrix : sympy.Matrix or callable
        Usually the decoupling matrix A(x); or a function of K x n states returning
        K x rows x cols values (nan where undefined), for matrices that are evaluated
        numerically (J M^-1 B of a mechanical plant).
    subject : str
        What the matrix is, for the report.
    samples : int
        Number of points; rounded up to a power of two (Sobol balance).
    seed : int

    Returns
    -------
    EnvelopeResult
    """
    points, bounded = envelope_points(plant, samples, seed)
    values = matrix(points) if callable(matrix) else _evaluate_batch(matrix, plant, points)
    finite = np.all(np.isfinite(values), axis=(1, 2))
    method = f"scrambled Sobol, {points.shape[0]} points over {len(bounded)} bounded state(s)"
    if not np.any(finite):
        return EnvelopeResult(subject, int(points.shape[0]), int(points.shape[0]), None, None, None,
                              None, method)
    sigma = np.linalg.svd(values[finite], compute_uv=False)
    smallest, largest = sigma[:, -1], sigma[:, 0]
    worst = int(np.argmin(smallest))
    with np.errstate(divide="ignore"):
        condition = np.where(smallest > 0, largest / np.where(smallest > 0, smallest, 1), np.inf)
    max_condition = float(np.max(condition))
    worst_point = points[finite][worst]
    return EnvelopeResult(
        subject=subject, samples=int(points.shape[0]), skipped=int(np.sum(~finite)),
        min_sigma=float(smallest[worst]),
        max_condition=max_condition if np.isfinite(max_condition) else None,
        worst_state={s.name: float(v) for s, v in zip(plant.states, worst_point)},
        median_sigma=float(np.median(smallest)), method=method)
