"""Input-state linearizability decided from Taylor-mode jets, for brackets beyond the symbolic budget.

The same conditions, order of checks and wording as :mod:`linz_ros.analysis._input_state`;
the ranks, brackets and the linearizing-output check come from
:mod:`linz_ros.analysis._numeric` at the operating point and the random points.
"""

from __future__ import annotations

import numpy as np
import sympy as sp

from linz_ros.analysis._input_state import (EVERYWHERE, DistributionInfo, InputStateResult, _decide_involutivity,
                                            _generator_name, _verdict, controllability_indices)
from linz_ros.analysis._numeric import (NUMERIC_METHOD, numeric_chains, numeric_involutivity, plant_jets,
                                        sampled_generic_rank, sampled_minimum)
from linz_ros.geometry import NumericContext, PlantJets, checkpoint, numeric_rank
from linz_ros.model import Plant

__all__ = ["numeric_input_state", "is_linearizing_output_numeric"]

#: What the report says of a result decided from jets.
INPUT_STATE_METHOD = (f"{NUMERIC_METHOD}: ad_f^k g by the variational flow at the operating point and "
                      "the random points (the brackets exceed the symbolic budget)")


def numeric_input_state(plant: Plant, ctx: NumericContext, jets: PlantJets) -> InputStateResult:
    """:func:`linz_ros.analysis.analyse_input_state` from jets.

    Parameters
    ----------
    plant : Plant
    ctx : NumericContext
    jets : PlantJets

    Returns
    -------
    InputStateResult
    """
    n, m = plant.n, plant.m
    points = np.vstack([plant.operating_vector(), ctx.samples])
    checkpoint(ctx, "input-state: ad_f^k g (Taylor-mode jets)", 0.0)
    V = jets.ad_values(points, n - 1)                                  # n, B, n, m
    columns = np.moveaxis(V, 0, 2).reshape(points.shape[0], n, n * m)  # by order, then input
    at_point, at_samples = columns[0], columns[1:]
    infos = _distributions(plant, at_point, at_samples)
    test = numeric_involutivity(plant, ctx, jets, at_samples)

    def check(info: DistributionInfo) -> None:
        info.involutive, info.method, witness = test(info.order)
        if witness:
            a, b = (_generator_name(i, m, plant.input_names) for i in witness)
            info.witness = f"[{a}, {b}]"
    _decide_involutivity(infos, plant, check)
    result = InputStateResult(*_verdict(plant, infos), distributions=infos, method=INPUT_STATE_METHOD)
    ranks = [d.rank for d in infos]
    if all(r is not None for r in ranks):
        result.controllability_indices = controllability_indices(ranks, m)
    if m == 1:
        _single_input(result, plant, ctx, at_point, at_samples)
    else:
        result.linearizing_output_note = "the search for linearizing outputs covers single-input plants"
    return result


def _distributions(plant: Plant, at_point: np.ndarray, at_samples: np.ndarray) -> list[DistributionInfo]:
    """D_0, D_1, ... as the symbolic loop builds them (stops where D_k has full rank here)."""
    n, m = plant.n, plant.m
    infos: list[DistributionInfo] = []
    full_from: int | None = None
    for k in range(n):
        width = (k + 1) * m
        rank_here = numeric_rank(at_point[:, :width])
        if full_from is None:
            generic = sampled_generic_rank(at_samples[:, :, :width])
            infos.append(DistributionInfo(k, rank_here, generic.rank, None, generic.method))
            if generic.rank == n:
                infos[-1].involutive, infos[-1].method = True, "full rank"
                full_from = k
        else:
            infos.append(DistributionInfo(k, rank_here, n, True, f"contains D_{full_from}"))
        if full_from is not None and rank_here == n:
            infos.extend(DistributionInfo(later, n, n, True, f"contains D_{k}") for later in range(k + 1, n))
            break
    return infos


def _single_input(result: InputStateResult, plant: Plant, ctx: NumericContext, at_point: np.ndarray,
                  at_samples: np.ndarray) -> None:
    """Singular set (not formed: sampled instead) and the linearizing output of a one-input plant."""
    from linz_ros.analysis._input_state import find_linearizing_output

    n = plant.n
    if result.distributions[-1].rank_generic is not None and result.distributions[-1].rank_generic < n:
        result.singular_set = EVERYWHERE
    else:
        result.singular_set_note = (f"not formed symbolically (the brackets exceed the symbolic budget); "
                                    f"[g, ..., ad_f^{n - 1} g] at the {at_samples.shape[0]} random points: "
                                    + sampled_minimum(at_samples, ctx.samples, plant))
    if result.linearizable:
        annihilating = [i for i in range(n) if np.allclose(at_samples[:, i, : n - 1], 0.0)
                        and abs(at_point[i, n - 1]) > 0]
        result.linearizing_outputs, result.linearizing_output_note = find_linearizing_output(
            plant, None, ctx, annihilating)


def is_linearizing_output_numeric(candidate: sp.Expr, plant: Plant, ctx: NumericContext,
                                  undefined: list[sp.Expr] | None) -> bool:
    """Relative degree n with L_g L_f^(n-1) T1 finite and nonzero at x0, from jets.

    Parameters
    ----------
    candidate : sympy.Expr
    plant : Plant
    ctx : NumericContext
    undefined : list of sympy.Expr or None
        Receives the candidate when it has relative degree n but is not finite at x0.

    Returns
    -------
    bool
    """
    chains = numeric_chains([candidate], plant, ctx, plant_jets(plant, ctx))
    if chains.degrees != [plant.n]:
        return False
    if not chains.finite_here:
        if undefined is not None:
            undefined.append(candidate)
        return False
    return bool(abs(chains.rows_here[0, 0]) > 1e-9)
