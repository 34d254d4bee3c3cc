"""The plant's own states under its own held inputs, from a dynamically extended artifact's dynamics.

An artifact with ``design.extension`` stores the extended ``dynamics`` program (states ``(x, xi)``,
new inputs ``w``). With the compensator's first states set to the held plant inputs and its
rates and ``w`` set to zero, the extended right-hand side is the plant's own over the period,
exactly, so no second program is stored.
"""

from __future__ import annotations

from typing import Any, Sequence

from linz_ros.artifact.extension import Extension
from linz_ros.runtime._around import AroundExtension

__all__ = ["ExtendedPlant"]


class ExtendedPlant(AroundExtension):
    """The plant's own states under its own held inputs, from an extended artifact's dynamics.

    Parameters
    ----------
    inner : NumericPlant or NativePlant
        The extended artifact's plant.
    extension : Extension
    """

    def __init__(self, inner: Any, extension: Extension) -> None:
        super().__init__(inner, extension)
        self.parameters = inner.parameters

    def _extended(self, x: Sequence[float], u: Sequence[float]) -> tuple[list[float], list[float]]:
        # a compensated input is held in xi_1 (its rates and w zero keep it there); the others are w
        w = [float(u[j]) if at is None else 0.0 for j, at in enumerate(self._offsets)]
        return list(x) + self.held_compensator(u), w

    def derivative(self, x: Sequence[float], u: Sequence[float]) -> list[float]:
        """dx/dt of the plant's own states under its inputs u.

        Parameters
        ----------
        x, u : sequence of float

        Returns
        -------
        list of float
        """
        return self.inner.derivative(*self._extended(x, u))[:self.n]

    def rk4(self, x: Sequence[float], u: Sequence[float], h: float, steps: int = 1) -> list[float]:
        """Advance by ``steps`` Runge-Kutta steps of size h with u held (see ``NumericPlant.rk4``).

        Parameters
        ----------
        x, u : sequence of float
        h : float
        steps : int

        Returns
        -------
        list of float
        """
        return self.inner.rk4(*self._extended(x, u), h, steps)[:self.n]

    def adaptive(self, x: Sequence[float], u: Sequence[float], duration: float,
                 rtol: float = 1e-9, atol: float = 1e-12) -> list[float]:
        """Advance by ``duration`` with the adaptive integrator, u held (see ``NumericPlant.adaptive``).

        Parameters
        ----------
        x, u : sequence of float
        duration, rtol, atol : float

        Returns
        -------
        list of float
        """
        return self.inner.adaptive(*self._extended(x, u), duration, rtol, atol)[:self.n]
