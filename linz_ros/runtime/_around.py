"""The base of the wrappers around an extended artifact's core and plant: the inner object, the plant's
own sizes, and the compensator state that holds the plant's inputs."""

from __future__ import annotations

from typing import Any, Sequence

from linz_ros.artifact.extension import Extension

__all__ = ["AroundExtension"]


class AroundExtension:
    """What a wrapper of an extended artifact's core or plant keeps: the inner object and the plant's
    own sizes.

    Parameters
    ----------
    inner : Any
        The extended artifact's core or plant.
    extension : Extension
    """

    def __init__(self, inner: Any, extension: Extension) -> None:
        self.inner = inner
        self.extension = extension
        self.artifact = inner.artifact
        self.backend = inner.backend
        self.n = len(extension.plant_states)
        self.m = len(extension.plant_inputs)
        self._offsets = extension.offsets

    def held_compensator(self, u: Sequence[float]) -> list[float]:
        """The compensator state that holds the plant's inputs at ``u`` (xi_1 = u, its rates zero).

        Parameters
        ----------
        u : sequence of float
            The plant's inputs.

        Returns
        -------
        list of float
        """
        xi = [0.0] * len(self.extension.compensator_states)
        for j, at in enumerate(self._offsets):
            if at is not None:
                xi[at] = float(u[j])
        return xi
