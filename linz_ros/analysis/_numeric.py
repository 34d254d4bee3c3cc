"""Decisions from Taylor-mode jets at sample points, for plants whose expressions exceed the symbolic budget.

The same conditions as the symbolic analyses (Isidori, Thm. 4.2.3, 5.2.3 and sec. 5.1),
decided from exact derivatives at the operating point and the context's random points:
``ad_f^k g`` through the variational flow, brackets of those fields by complex steps,
``L_f^k h`` as Taylor coefficients along the flow and ``L_gj L_f^k h = d(L_f^k h) g_j``
from gradients by complex steps (:class:`linz_ros.geometry.PlantJets`). Nothing here forms
a symbolic Lie derivative or bracket; only the plant's own f, G, h and the Jacobian of f.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
import sympy as sp

from linz_ros.geometry import (RANK_RTOL, NumericContext, PlantJets, RankResult, UnsupportedExpression, checkpoint,
                               numeric_rank, sampled_rank)
from linz_ros.model import Plant

__all__ = ["NUMERIC_METHOD", "plant_jets", "NumericChains", "numeric_chains", "numeric_involutivity",
           "sampled_minimum"]

#: How decisions from jets are named in the report.
NUMERIC_METHOD = "numeric from Taylor-mode jets"
#: |L_g L_f^k h| at most this times |d(L_f^k h)| |g| at every sample point is zero (rounding).
ZERO_RTOL = RANK_RTOL


def plant_jets(plant: Plant, ctx: NumericContext) -> PlantJets | None:
    """The plant's jet programs (made once per context), or None when f or G use a function jets lack.

    Parameters
    ----------
    plant : Plant
    ctx : NumericContext

    Returns
    -------
    PlantJets or None
    """
    if "jets" not in ctx.memo:
        try:
            ctx.memo["jets"] = PlantJets(plant.f, plant.G, plant.states, plant.nominal)
        except UnsupportedExpression:
            ctx.memo["jets"] = None
    return ctx.memo["jets"]


@dataclass
class NumericChains:
    """Relative degrees and the decoupling rows of some outputs, at x0 (index 0) and the samples."""

    degrees: list[int | None]
    rows_here: np.ndarray | None      # outputs x m at the operating point
    rows_samples: np.ndarray | None   # samples x outputs x m
    finite_here: bool                 # h, ..., L_f^(r-1) h and the rows finite at x0
    program: object = None
    method: str = NUMERIC_METHOD

    def decoupling(self, jets: PlantJets) -> Callable[[np.ndarray], np.ndarray]:
        """The decoupling matrix as a function of K x n points -> K x outputs x m (complex steps along g).

        Parameters
        ----------
        jets : PlantJets

        Returns
        -------
        callable
        """
        order = max(self.degrees) - 1
        index = np.array(self.degrees) - 1

        def evaluate(points: np.ndarray) -> np.ndarray:
            values = jets.input_lie_values(self.program, points, order)       # order+1, p, K, m
            picked = values[index, np.arange(len(index))]                     # p, K, m
            return np.moveaxis(picked, 0, 1)
        return evaluate


def _is_zero(values: np.ndarray, scale: np.ndarray) -> bool | None:
    """The numeric zero test over the samples: None when no sample is finite (as the symbolic one)."""
    finite = np.isfinite(values) & np.isfinite(scale)
    if not np.any(finite):
        return None
    return bool(np.all(np.abs(values[finite]) <= ZERO_RTOL * scale[finite]))


def numeric_chains(outputs: list[sp.Expr], plant: Plant, ctx: NumericContext, jets: PlantJets) -> NumericChains:
    """Generic relative degree of each output and its row L_G L_f^(r-1) h, from jets.

    Parameters
    ----------
    outputs : list of sympy.Expr
    plant : Plant
    ctx : NumericContext
    jets : PlantJets

    Returns
    -------
    NumericChains
    """
    n = plant.n
    program = jets.program(outputs)
    points = np.vstack([plant.operating_vector(), ctx.samples])
    checkpoint(ctx, "output chains L_f^k h (Taylor-mode jets)", 0.0)
    gradients = jets.lie_gradients(program, points, n - 1)                      # n, p, B, n
    g = jets.input_fields(points)                                               # B, n, m
    rows = np.einsum("kpbn,bnm->kpbm", gradients, g)
    scale = np.linalg.norm(gradients, axis=-1)[..., None] * np.linalg.norm(g, axis=1)[None, None]
    degrees: list[int | None] = []
    for i in range(len(outputs)):
        degree = None
        for k in range(n):
            if _is_zero(rows[k, i, 1:], scale[k, i, 1:]) is not True:
                degree = k + 1
                break
        degrees.append(degree)
    checkpoint(ctx, "output chains L_f^k h (Taylor-mode jets)", 1.0)
    if any(d is None for d in degrees):
        return NumericChains(degrees, None, None, False, program)
    picked = np.stack([rows[d - 1, i] for i, d in enumerate(degrees)])          # p, B, m
    values_here = jets.lie_values(program, points[:1], max(degrees) - 1)[:, :, 0]
    finite_here = bool(np.all(np.isfinite(values_here)) and np.all(np.isfinite(picked[:, 0])))
    return NumericChains(degrees, picked[:, 0], np.moveaxis(picked[:, 1:], 1, 0), finite_here, program)


def numeric_involutivity(plant: Plant, ctx: NumericContext, jets: PlantJets, samples: np.ndarray
                         ) -> Callable[[int], tuple[bool | None, str, tuple[int, int] | None]]:
    """A test of D_k (k = 0 .. n-2) for involutivity at the random points, from jets.

    Every bracket ``[X_a, X_b] = (DX_b) X_a - (DX_a) X_b`` of generators comes from complex
    steps of the ad-field jets along each generator, computed once for the largest D_k.

    Parameters
    ----------
    plant : Plant
    ctx : NumericContext
    jets : PlantJets
    samples : numpy.ndarray
        S x n x (n m): the generators of D_(n-1) at the random points (columns by order, then input).

    Returns
    -------
    callable
        k -> (involutive, method, witness pair or None).
    """
    n, m = plant.n, plant.m
    top = max(n - 2, 0)
    width = (top + 1) * m
    finite = np.all(np.isfinite(samples[:, :, :width]), axis=(1, 2))
    points, fields = ctx.samples[finite], samples[finite][:, :, :width]
    if points.shape[0]:
        checkpoint(ctx, "involutivity: brackets by complex steps", 0.0)
        T = jets.ad_directional(points, np.swapaxes(fields, 1, 2), top)        # top+1, S, width, n, m
        derivative = np.moveaxis(T, 0, 3).reshape(points.shape[0], width, n, width)  # S, a, n, b: DX_b X_a
        checkpoint(ctx, "involutivity: brackets by complex steps", 1.0)

    def test(k: int) -> tuple[bool | None, str, tuple[int, int] | None]:
        w = (k + 1) * m
        if points.shape[0] == 0:
            return None, "not finite at any sample point", None
        D = fields[:, :, :w]
        ranks = [numeric_rank(v) for v in D]
        generic = max(ranks)
        if generic == n:
            return True, "full rank", None
        regular = [s for s, r in enumerate(ranks) if r == generic]
        method = f"{NUMERIC_METHOD} at {len(regular)} random points (rtol {RANK_RTOL:g})"
        for a in range(w):
            for b in range(a + 1, w):
                for s in regular:
                    bracket = derivative[s, a, :, b] - derivative[s, b, :, a]
                    if numeric_rank(np.column_stack([D[s], bracket])) > generic:
                        return False, method, (a, b)
        return True, method, None
    return test


def sampled_minimum(values: np.ndarray, points: np.ndarray, plant: Plant) -> str:
    """``smallest singular value S at x1=.., x2=..`` over sampled matrices (K x rows x cols).

    Parameters
    ----------
    values : numpy.ndarray
    points : numpy.ndarray
        K x n.
    plant : Plant

    Returns
    -------
    str
    """
    finite = np.all(np.isfinite(values), axis=(1, 2))
    if not np.any(finite):
        return "not finite at any sample point"
    sigma = np.linalg.svd(values[finite], compute_uv=False)[:, -1]
    worst = int(np.argmin(sigma))
    where = ", ".join(f"{s.name}={v:.4g}" for s, v in zip(plant.states, points[finite][worst]))
    return f"smallest singular value {sigma[worst]:.4g} at {where}"


def sampled_generic_rank(values: np.ndarray) -> RankResult:
    """:func:`linz_ros.geometry.sampled_rank` named for jets.

    Parameters
    ----------
    values : numpy.ndarray

    Returns
    -------
    RankResult
    """
    return sampled_rank(values, NUMERIC_METHOD)
