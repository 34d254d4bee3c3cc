"""Verify generated programs against sympy: same numbers at random points of the envelope.

The generated side is the real runtime path (printed grammar text, compiled by the
artifact compiler, evaluated in float64). The reference is the symbolic expression
before common-subexpression elimination, evaluated with mpmath at 30 digits.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import mpmath
import numpy as np
import sympy as sp

from linz_ros.artifact.compiler import compile_program
from linz_ros.codegen._printer import CodegenError
from linz_ros.model import numeric_function
from linz_ros.synthesis import Design

__all__ = ["Verification", "verify_programs", "DEFAULT_TOLERANCE", "sample_points"]

#: Largest normwise relative residual accepted in an artifact.
DEFAULT_TOLERANCE = 1e-9
_DIGITS = 30


@dataclass
class Verification:
    """Worst residual of every program's outputs, and where it occurred."""

    points: int
    tolerance: float
    per_program: dict[str, dict[str, Any]] = field(default_factory=dict)

    @property
    def max_relative_residual(self) -> float:
        """The worst residual over all programs."""
        values = [v["max_relative_residual"] for v in self.per_program.values()]
        return max(values) if values else 0.0

    @property
    def skipped(self) -> int:
        """Points skipped because the reference was not finite there, over all programs."""
        return sum(v["skipped"] for v in self.per_program.values())

    def to_json(self) -> dict[str, Any]:
        """The ``verification`` section of the artifact."""
        return {
            "points": self.points, "skipped": self.skipped, "tolerance": self.tolerance,
            "max_relative_residual": self.max_relative_residual, "per_program": self.per_program,
            "reference": f"sympy expressions before CSE, evaluated with mpmath at {_DIGITS} digits",
            "residual": "max over points and outputs of |generated - reference|_inf / |reference|_inf",
        }


def sample_points(design: Design, count: int, seed: int = 20261202) -> np.ndarray:
    """Random states of the envelope (operating point +- 1 for unbounded states).

    Parameters
    ----------
    design : Design
    count : int
    seed : int

    Returns
    -------
    numpy.ndarray
        count x n.
    """
    plant = design.plant
    rng = np.random.default_rng(seed)
    center = plant.operating_vector()
    points = np.empty((count, plant.n))
    for i, state in enumerate(plant.state_names):
        lo, hi = plant.envelope.get(state, (center[i] - 1.0, center[i] + 1.0))
        points[:, i] = rng.uniform(lo, hi, size=count)
    return points


def verify_programs(design: Design, programs, printed: dict[str, dict[str, Any]],
                    tolerance: float = DEFAULT_TOLERANCE, points: int = 64) -> Verification:
    """Compare every printed program with its symbolic source at random envelope points.

    Parameters
    ----------
    design : Design
    programs : list of SymbolicProgram
    printed : dict
        Program name -> the printed program (as stored in the artifact).
    tolerance : float
    points : int

    Returns
    -------
    Verification

    Raises
    ------
    CodegenError
        When any residual exceeds ``tolerance``, naming the program, the output and
        the point.
    """
    plant = design.plant
    nominal = [float(v) for v in plant.parameters.values()]
    states = sample_points(design, points)
    result = Verification(points, tolerance)
    for program in programs:
        spec = printed[program.name]
        compiled = compile_program(program.name, spec["arguments"], spec["temporaries"], spec["outputs"])
        symbols = [s for _, vector in program.arguments for s in vector]
        entries = [e for _, _, values in program.outputs for e in values]
        # sympy's own printer and CSE (not ours) keep big trees (six-joint arms) printable
        reference = numeric_function(symbols, entries, "mpmath")
        first = _first_arguments(program, design, states)
        worst, worst_at, skipped = 0.0, None, 0
        for row in first:
            args = list(row) + nominal
            expected = _reference_values(reference, args)
            if expected is None:
                skipped += 1
                continue
            try:
                got = np.asarray(compiled(list(row), nominal), dtype=float)
            except (ArithmeticError, ValueError):
                got = np.full(len(entries), math.nan)
            residual = _normwise_residual(program, got, expected)
            if residual > worst or (math.isnan(residual) and worst_at is None):
                worst, worst_at = residual, row
        result.per_program[program.name] = {
            "max_relative_residual": worst, "skipped": skipped,
            "worst_point": None if worst_at is None else [float(v) for v in worst_at]}
        if points - skipped < _least_verified(points):
            raise CodegenError(f"generated program {program.name!r} could be checked at only {points - skipped} of "
                               f"{points} envelope points (the symbolic expressions are not finite at the others); "
                               "narrow the envelope to where the model is defined; artifact not written")
        if not worst <= tolerance:
            names = [s.name for s in program.arguments[0][1]]
            where = ", ".join(f"{n}={v:.4g}" for n, v in zip(names, worst_at))
            raise CodegenError(f"generated program {program.name!r} differs from the symbolic expressions by "
                               f"{worst:.3g} (tolerance {tolerance:g}) at {where}; artifact not written")
    return result


def _least_verified(points: int) -> int:
    """Points that must give a finite reference for a program to count as verified."""
    return max(1, points // 4)


def _first_arguments(program, design: Design, states: np.ndarray) -> np.ndarray:
    """Values of a program's first argument vector at the sample points."""
    if program.arguments[0][0] == "x":
        return states
    # the inverse takes z = T(x): evaluate T at the same states
    plant = design.plant
    T = sp.Matrix(design.transform).subs(plant.nominal)
    forward = sp.lambdify([plant.states], list(T), modules="numpy")
    return np.array([np.asarray(forward(row), dtype=float) for row in states])


def _reference_values(function, args: list[float]) -> np.ndarray | None:
    with mpmath.workdps(_DIGITS):
        try:
            values = function(*[mpmath.mpf(a) for a in args])
        except (ZeroDivisionError, ValueError, TypeError, OverflowError):
            return None
        out = []
        for v in values:
            c = complex(v)
            if not (math.isfinite(c.real) and math.isfinite(c.imag)) or abs(c.imag) > 1e-20 * (1 + abs(c.real)):
                return None
            out.append(c.real)
    return np.asarray(out, dtype=float)


def _normwise_residual(program, got: np.ndarray, expected: np.ndarray) -> float:
    worst, start = 0.0, 0
    for _, _, values in program.outputs:
        g, e = got[start:start + len(values)], expected[start:start + len(values)]
        start += len(values)
        if not np.all(np.isfinite(g)):
            return math.inf
        scale = float(np.max(np.abs(e))) if e.size else 0.0
        error = float(np.max(np.abs(g - e))) if e.size else 0.0
        worst = max(worst, error / scale if scale > 0 else error)
    return worst
