"""The singular set s(x) = 0 drawn in a plane of two states: the one place the artifact's
``singular_set`` program is evaluated on a grid (the field-log scatter and the campaign's
region of attraction both draw it from here)."""

from __future__ import annotations

from typing import Any, Sequence

import numpy as np

from linz_ros.artifact import Artifact

__all__ = ["draw_singular_set"]


def draw_singular_set(ax: Any, artifact: Artifact, base: Sequence[float], plane: tuple[int, int],
                      window: tuple[tuple[float, float], tuple[float, float]], points: int = 241) -> bool:
    """Draw s(x) = 0 in the plane of two states, the others held at ``base``: the one place the
    artifact's ``singular_set`` program (nominal parameters) is evaluated on a grid.

    Parameters
    ----------
    ax : matplotlib.axes.Axes
    artifact : Artifact
        Carrying the ``singular_set`` program.
    base : sequence of float
        Every state's value.
    plane : (int, int)
        The states along x and along y.
    window : ((float, float), (float, float))
        The grid's range along x and along y.
    points : int
        Grid points per axis.

    Returns
    -------
    bool
        Whether the set crosses the window (then drawn, and named in the legend).
    """
    gi, gj = np.meshgrid(np.linspace(*window[0], points), np.linspace(*window[1], points))
    grid = [np.full(gi.shape, float(v)) for v in base]
    grid[plane[0]], grid[plane[1]] = gi, gj
    with np.errstate(all="ignore"):
        s = artifact.numpy_program("singular_set").evaluate(grid, list(artifact.nominal_parameters))["s"][0]
    s = np.broadcast_to(np.asarray(s, dtype=float), gi.shape)
    finite = s[np.isfinite(s)]
    if not (finite.size and (finite.min() < 0 < finite.max() or np.any(finite == 0))):
        return False
    ax.contour(gi, gj, s, levels=[0.0], colors="tab:red", linewidths=1.5, zorder=2)
    ax.plot([], [], color="tab:red", label="singular set s(x) = 0")
    return True

