"""The coordinate change z = T(x) of an input-state design, and its inverse at runtime.

The inverse uses the artifact's closed form when synthesis found one, and otherwise
Newton's method on ``T(x) - z = 0`` with the artifact's Jacobian, warm-started from the
previous solution (consecutive references are close, so one or two iterations suffice).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from linz_ros.artifact.document import Artifact
from linz_ros.errors import ConfigError

__all__ = ["Transform", "InverseResult"]


@dataclass(frozen=True)
class InverseResult:
    """x with T(x) = z, how it was found, and the residual |T(x) - z|_inf."""

    x: list[float]
    method: str
    iterations: int
    residual: float
    converged: bool


class Transform:
    """``z = T(x)`` and ``x = T^-1(z)`` for an input-state artifact.

    Parameters
    ----------
    artifact : Artifact
        Of kind ``input_state``.
    parameters : sequence of float, optional
        Nominal by default.
    tolerance : float
        Newton stops when ``|T(x) - z|_inf <= tolerance * (1 + |z|_inf)``.
    max_iterations : int
    """

    def __init__(self, artifact: Artifact, parameters: Sequence[float] | None = None,
                 tolerance: float = 1e-12, max_iterations: int = 30) -> None:
        if "transform" not in artifact.programs:
            raise ConfigError("artifact", f"{artifact.source} carries no transform (not an input-state design)")
        self.artifact = artifact
        self.n = len(artifact.states)
        self.parameters = list(artifact.nominal_parameters.tolist() if parameters is None else parameters)
        self._transform = artifact.programs["transform"]
        self._inverse = artifact.programs.get("inverse")
        self.tolerance = tolerance
        self.max_iterations = max_iterations
        self._guess = artifact.operating_point

    @property
    def closed_form(self) -> bool:
        """Whether the artifact carries T^-1 in closed form."""
        return self._inverse is not None

    def forward(self, x: Sequence[float]) -> list[float]:
        """z = T(x).

        Parameters
        ----------
        x : sequence of float

        Returns
        -------
        list of float
        """
        values = self._transform(list(map(float, x)), self.parameters)
        slot = self._transform.slots["T"]
        return list(values[slot.offset:slot.offset + slot.size])

    def _forward_and_jacobian(self, x: list[float]) -> tuple[np.ndarray, np.ndarray]:
        values = self._transform(x, self.parameters)
        T, J = self._transform.slots["T"], self._transform.slots["jacobian"]
        return (np.asarray(values[T.offset:T.offset + T.size]),
                np.asarray(values[J.offset:J.offset + J.size]).reshape(self.n, self.n))

    def inverse(self, z: Sequence[float], guess: Sequence[float] | None = None, newton: bool = False) -> InverseResult:
        """x with T(x) = z.

        Parameters
        ----------
        z : sequence of float
        guess : sequence of float, optional
            Start of Newton's method; the previous solution by default.
        newton : bool
            Use Newton's method even when a closed form exists (for checks).

        Returns
        -------
        InverseResult
            ``converged`` False (and the best iterate) when Newton fails or leaves the
            model's domain; never raises for a numeric failure.
        """
        z = [float(v) for v in z]
        if self._inverse is not None and not newton:
            try:
                x = list(self._inverse(z, self.parameters))
                residual = self._residual(x, z)
                self._guess = x
                return InverseResult(x, "closed form", 0, residual, math.isfinite(residual))
            except (ArithmeticError, ValueError):
                return InverseResult([math.nan] * self.n, "closed form", 0, math.inf, False)
        return self._newton(np.asarray(z), np.asarray(guess if guess is not None else self._guess, dtype=float))

    def _residual(self, x: list[float], z: list[float]) -> float:
        try:
            return float(np.max(np.abs(np.asarray(self.forward(x)) - np.asarray(z))))
        except (ArithmeticError, ValueError):
            return math.inf

    def _newton(self, z: np.ndarray, x: np.ndarray) -> InverseResult:
        scale = 1.0 + float(np.max(np.abs(z)))
        residual = math.inf
        for iteration in range(1, self.max_iterations + 1):
            try:
                Tx, J = self._forward_and_jacobian(x.tolist())
                delta = np.linalg.solve(J, Tx - z)
            except (ArithmeticError, ValueError, np.linalg.LinAlgError):
                return InverseResult(x.tolist(), "newton", iteration, math.inf, False)
            residual = float(np.max(np.abs(Tx - z)))
            if residual <= self.tolerance * scale:
                self._guess = x.tolist()
                return InverseResult(x.tolist(), "newton", iteration - 1, residual, True)
            x = x - delta
            if not np.all(np.isfinite(x)):
                return InverseResult(x.tolist(), "newton", iteration, math.inf, False)
        residual = self._residual(x.tolist(), z.tolist())
        converged = residual <= self.tolerance * scale
        if converged:
            self._guess = x.tolist()
        return InverseResult(x.tolist(), "newton", self.max_iterations, residual, converged)
