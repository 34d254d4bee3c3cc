"""Input-state (full-state) linearizability: distributions, indices, linearizing output."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np
import sympy as sp

from linz_ros.analysis._common import depends_on_states, show, tidy
from linz_ros.analysis._numeric import plant_jets
from linz_ros.geometry import (SYMBOLIC_TREE_BUDGET, BeyondSymbolicBudget, NumericContext, beyond_tree_budget, bracket_blocks,
                               checkpoint, evaluate, evaluate_many, fits_symbolic_budget, generic_rank,
                               involutivity, is_identically_zero, lie_derivative, numeric_rank, sampled_rank)
from linz_ros.model import Plant

__all__ = ["DistributionInfo", "InputStateResult", "analyse_input_state", "relative_degree_of", "lie_chain",
           "EVERYWHERE", "state_factors", "describe_singular_set"]

#: The singular-set expression of a matrix singular everywhere: its zero set is every state
#: (``1``, never zero, means nowhere).
EVERYWHERE = sp.Integer(0)


@dataclass
class DistributionInfo:
    """One distribution D_k = span{ad_f^j g_i : j <= k}."""

    order: int
    rank: int | None            # at the operating point
    rank_generic: int | None
    involutive: bool | None
    method: str = ""
    witness: str = ""           # the bracket that leaves D_k, when not involutive

    def to_json(self) -> dict[str, Any]:
        out = {"order": self.order, "rank": self.rank, "rank_generic": self.rank_generic,
               "involutive": self.involutive, "method": self.method}
        if self.witness:
            out["witness"] = self.witness
        return out


@dataclass
class InputStateResult:
    """Verdict on input-state linearizability at the operating point."""

    linearizable: bool | None
    reason: str
    distributions: list[DistributionInfo] = field(default_factory=list)
    controllability_indices: list[int] = field(default_factory=list)
    linearizing_outputs: list[sp.Expr] = field(default_factory=list)
    linearizing_output_note: str = ""
    singular_set: sp.Expr | None = None      # single input: det[g, ..., ad_f^(n-1) g]
    singular_set_note: str = ""              # why no expression, when it was not formed
    method: str = ""                         # set when the decisions came from jets, not expressions

    def to_json(self) -> dict[str, Any]:
        extra = {"method": self.method, "singular_set_note": self.singular_set_note} if self.method else {}
        return {**extra,
            "linearizable": self.linearizable,
            "reason": self.reason,
            "distributions": [d.to_json() for d in self.distributions],
            "controllability_indices": self.controllability_indices,
            "linearizing_outputs": [show(e) for e in self.linearizing_outputs],
            "linearizing_output_note": self.linearizing_output_note,
            "singular_set": None if self.singular_set is None else show(self.singular_set),
            "singular_set_everywhere": None if self.singular_set is None else self.singular_set == EVERYWHERE,
        }


def _generator_name(index: int, m: int, input_names: list[str]) -> str:
    j, i = divmod(index, m)
    g = f"g_{input_names[i]}" if m > 1 else "g"
    return g if j == 0 else (f"ad_f {g}" if j == 1 else f"ad_f^{j} {g}")


def controllability_indices(ranks: list[int], m: int) -> list[int]:
    """Kronecker indices from the ranks r_k of D_k (Isidori sec. 5.2, Brunovsky).

    The number of indices larger than k equals r_k - r_(k-1), so index i (sorted in
    decreasing order) is the number of k with r_k - r_(k-1) >= i.

    Parameters
    ----------
    ranks : list of int
        r_0, r_1, ... the ranks of D_0, D_1, ...
    m : int
        Number of inputs.

    Returns
    -------
    list of int
        m indices, largest first.

    Examples
    --------
    >>> controllability_indices([2, 4, 5], 2)
    [3, 2]
    """
    increments = [ranks[0]] + [b - a for a, b in zip(ranks, ranks[1:])]
    return [sum(1 for d in increments if d >= i) for i in range(1, m + 1)]


def analyse_input_state(plant: Plant, ctx: NumericContext) -> InputStateResult:
    """Decide input-state linearizability at the operating point.

    Conditions (Isidori, Nonlinear Control Systems, Thm. 4.2.3 for one input and
    Thm. 5.2.3 for several): each D_k has constant rank near x0, D_k is involutive for
    k <= n-2, and rank D_(n-1)(x0) = n.

    Parameters
    ----------
    plant : Plant
    ctx : NumericContext

    Returns
    -------
    InputStateResult
    """
    n, m, x = plant.n, plant.m, plant.states
    generators: list[sp.Matrix] = []
    point_blocks: list[np.ndarray] = []
    sample_blocks: list[np.ndarray] = []
    infos: list[DistributionInfo] = []
    full_from: int | None = None      # first k with D_k of full generic rank
    largest: int | None = None
    for k, block in zip(range(n), bracket_blocks(plant.f, plant.G, x)):
        checkpoint(ctx, "input-state: distributions D_k", k / n)
        beyond, largest = beyond_tree_budget([e for c in block for e in c], largest, n - 1 - k)
        if beyond and plant_jets(plant, ctx) is not None:
            from linz_ros.analysis._input_state_numeric import numeric_input_state
            return numeric_input_state(plant, ctx, plant_jets(plant, ctx))
        generators.extend(block)
        # D_k are nested: evaluate only the new generators, once, and keep the numbers
        new = sp.Matrix.hstack(*block)
        point_blocks.append(evaluate_many(new, ctx, [plant.operating_vector()])[0])
        sample_blocks.append(evaluate_many(new, ctx, ctx.samples))
        rank_here = numeric_rank(np.hstack(point_blocks))
        if full_from is None:
            infos.append(_distribution_info(k, generators, np.concatenate(sample_blocks, axis=2),
                                            rank_here, plant, ctx))
            if infos[-1].rank_generic == n:
                full_from = k
        else:
            # contains a distribution of full generic rank: full rank and involutive
            infos.append(DistributionInfo(k, rank_here, n, True, f"contains D_{full_from}"))
        if full_from is not None and rank_here == n:
            infos.extend(DistributionInfo(later, n, n, True, f"contains D_{k}")
                         for later in range(k + 1, n))
            break
    _decide_involutivity(infos, plant, lambda info: _check_involutive(info, generators, plant, ctx))
    at_point = np.hstack(point_blocks)
    at_samples = np.concatenate(sample_blocks, axis=2)
    result = InputStateResult(*_verdict(plant, infos), distributions=infos)
    ranks = [d.rank for d in infos]
    if all(r is not None for r in ranks):
        result.controllability_indices = controllability_indices(ranks, m)
    if m == 1:
        result.singular_set = _controllability_singular_set(plant, generators, ctx)
        if infos[-1].rank_generic is not None and infos[-1].rank_generic < n:
            result.singular_set = EVERYWHERE
        if result.linearizable:
            # a coordinate x_i can only work if row i of D_(n-2) vanishes at the samples
            annihilating = [i for i in range(n) if np.allclose(at_samples[:, i, : n - 1], 0.0)
                            and abs(at_point[i, n - 1]) > 0]
            outputs, note = find_linearizing_output(plant, generators, ctx, annihilating)
            result.linearizing_outputs, result.linearizing_output_note = outputs, note
    else:
        result.linearizing_output_note = "the search for linearizing outputs covers single-input plants"
    return result


def _distribution_info(k: int, generators: list[sp.Matrix], samples: np.ndarray, rank_here: int | None,
                       plant: Plant, ctx: NumericContext) -> DistributionInfo:
    """Ranks of D_k from its generators and their values at the samples."""
    D = sp.Matrix.hstack(*generators)
    generic = generic_rank(D, ctx) if fits_symbolic_budget(D) else sampled_rank(samples)
    info = DistributionInfo(k, rank_here, generic.rank, None, generic.method)
    if generic.rank == plant.n:
        info.involutive, info.method = True, "full rank"
    return info


def _check_involutive(info: DistributionInfo, generators: list[sp.Matrix], plant: Plant,
                      ctx: NumericContext) -> None:
    width = (info.order + 1) * plant.m
    result = involutivity(generators[:width], plant.states, ctx)
    info.involutive, info.method = result.involutive, result.method
    if result.witness:
        a, b = (_generator_name(i, plant.m, plant.input_names) for i in result.witness)
        info.witness = f"[{a}, {b}]"


def _decide_involutivity(infos: list[DistributionInfo], plant: Plant,
                         check: Callable[[DistributionInfo], None]) -> None:
    """Involutivity of D_0 .. D_(n-2), cheapest route first.

    With one input only D_(n-2) matters (Isidori, Thm. 4.2.3); when it is involutive
    and rank D_(n-1) = n the plant is linearizable, and since the D_k are invariant
    under regular static feedback the lower ones are then involutive too. With several
    inputs every D_k is checked in order. After the first failure the rest are left
    unchecked (``involutive`` None, saying so).
    """
    n = plant.n
    pending = [d for d in infos if d.order <= n - 2 and d.involutive is None]
    if not pending:
        return
    top = pending[-1]
    if plant.m == 1 and top.order == n - 2 and infos[-1].rank == n:
        check(top)
        if top.involutive:
            for d in pending[:-1]:
                d.involutive = True
                d.method = f"implied: D_{n - 2} involutive with one input (feedback invariance)"
            return
        pending = pending[:-1]
    failed: int | None = None
    for d in pending:
        if failed is not None:
            d.method = f"not checked: D_{failed} is already not involutive"
            continue
        check(d)
        if d.involutive is False:
            failed = d.order


def _verdict(plant: Plant, infos: list[DistributionInfo]) -> tuple[bool | None, str]:
    """All failed conditions, joined; undecided conditions make the verdict None."""
    n = plant.n
    last = infos[-1]
    if any(d.rank is None for d in infos):
        return None, "could not decide: the vector fields are not finite at the operating point"
    failures, undecided = [], []
    if last.rank < n:
        elsewhere = f" (generic rank {last.rank_generic})" if last.rank_generic != last.rank else ""
        failures.append(f"rank D_{n - 1} = rank [g, ad_f g, ..., ad_f^{n - 1} g] is {last.rank} < {n} "
                        f"at the operating point{elsewhere}")
    for d in infos:
        if d.rank_generic is None:
            undecided.append(f"the generic rank of D_{d.order} ({d.method})")
        elif d.rank != d.rank_generic and last.rank == n:
            failures.append(f"D_{d.order} changes rank at the operating point "
                            f"({d.rank} there, {d.rank_generic} nearby)")
    for d in infos[: n - 1]:
        if d.involutive is None:
            undecided.append(f"whether D_{d.order} is involutive ({d.method})")
        elif d.involutive is False:
            failures.append(f"D_{d.order} is not involutive: {d.witness} is not in D_{d.order}")
            break  # D_k involutive fails for the first k; later ones add nothing
    if failures:
        return False, "; ".join(failures)
    if undecided:
        return None, "could not decide " + "; ".join(undecided)
    involutive = "D_0 involutive" if n == 2 else f"D_0..D_{n - 2} involutive"
    if n == 1:
        return True, "rank D_0 = 1 at the operating point"
    return True, f"rank D_{n - 1} = {n} at the operating point; {involutive} and of constant rank"


def _controllability_singular_set(plant: Plant, generators: list[sp.Matrix], ctx: NumericContext
                                  ) -> sp.Expr | None:
    C = sp.Matrix.hstack(*generators)
    if sum(sp.count_ops(e) for e in C) > 4 * 250:
        return None
    return state_factors(C.det(method="berkowitz"), plant)


def state_factors(expr: sp.Expr, plant: Plant) -> sp.Expr:
    """The state-dependent factors of the numerator of ``expr``: where it vanishes.

    Constant and parameter-only factors are dropped when nonzero at the nominal
    parameters, and so are factors that sympy proves positive or negative for all real
    states there (sums of squares such as det M). ``1`` means "nowhere"; ``0`` means
    "everywhere" (:data:`EVERYWHERE`): a factor, or the whole expression, that is zero at
    the nominal parameters.

    Examples
    --------
    >>> from linz_ros.model import plant_from_text
    >>> plant = plant_from_text("plant: p\\nstates: [x]\\ninputs: [u]\\nparameters: {a: 0}\\ndynamics: {x: u}")
    >>> x, a = plant.states[0], list(plant.parameters)[0]
    >>> state_factors(a * sp.cos(x) ** 2, plant), state_factors(2 * sp.cos(x), plant)
    (0, cos(x))
    """
    numerator, _ = sp.fraction(sp.cancel(sp.together(expr)))
    coefficient, factors = sp.factor_list(numerator)
    if coefficient == 0:
        return EVERYWHERE
    kept = sp.Integer(1)
    for factor, _power in factors:
        factor = tidy(factor)
        nominal = factor.subs(plant.nominal)
        if not depends_on_states(factor, plant):
            if nominal == 0:
                return EVERYWHERE
            continue
        if nominal == 0:
            return EVERYWHERE
        if nominal.is_positive or nominal.is_negative:
            continue
        kept *= factor
    return -kept if kept.could_extract_minus_sign() else kept


def describe_singular_set(expr: sp.Expr, what: str = "") -> str:
    """The singular set in words: ``nowhere``, ``everywhere (...)`` or ``where s(x) = 0``.

    Parameters
    ----------
    expr : sympy.Expr
        As returned by :func:`state_factors`.
    what : str
        The determinant or coefficient it came from, named for "everywhere".

    Returns
    -------
    str
    """
    if expr == 1:
        return "nowhere"
    if expr == EVERYWHERE:
        return f"everywhere ({what or 'it'} = 0 at every state, at the nominal parameters)"
    return f"where {show(expr)} = 0"


def relative_degree_of(h: sp.Expr, plant: Plant, ctx: NumericContext) -> tuple[int | None, sp.Expr]:
    """Generic relative degree of a scalar output and the coefficient L_G L_f^(r-1) h.

    Parameters
    ----------
    h : sympy.Expr
        Output function of the states.
    plant : Plant
    ctx : NumericContext

    Returns
    -------
    degree : int or None
        None when no input reaches the output within n derivatives.
    coefficient : sympy.Matrix or sympy.Integer
        The row ``L_G L_f^(r-1) h`` (1 x m), or 0 when ``degree`` is None.
    """
    degree, row, _ = lie_chain(h, plant, ctx)
    return degree, row


def lie_chain(h: sp.Expr, plant: Plant, ctx: NumericContext,
              tree_budget: int | None = None) -> tuple[int | None, sp.Expr, list[sp.Expr]]:
    """Relative degree r of ``h``, the row L_G L_f^(r-1) h, and the chain h, ..., L_f^(r-1) h.

    Parameters
    ----------
    h : sympy.Expr
    plant : Plant
    ctx : NumericContext
    tree_budget : int or None
        Raise :class:`linz_ros.geometry.BeyondSymbolicBudget` when a derivative has more tree
        nodes than this (None: no limit).

    Returns
    -------
    degree : int or None
    coefficient : sympy.Matrix or sympy.Integer
    chain : list of sympy.Expr
        ``[h, L_f h, ..., L_f^(r-1) h]``: the derivatives of the output that the inputs
        do not reach (so L_f^r h is one more Lie derivative of the last);
        ``[h, ..., L_f^(n-1) h]`` when ``degree`` is None.
    """
    key = ("lie_chain", sp.sympify(h), tree_budget)      # a chain formed without a budget may exceed one
    if key not in ctx.memo:
        ctx.memo[key] = _lie_chain(sp.sympify(h), plant, ctx, tree_budget)
    degree, row, chain = ctx.memo[key]
    return degree, row, list(chain)


def _lie_chain(h: sp.Expr, plant: Plant, ctx: NumericContext, tree_budget: int | None):
    chain = [h]
    for k in range(plant.n):
        checkpoint(ctx, "output chains L_f^k h", k / plant.n)
        phi = chain[-1]
        row = [lie_derivative(phi, plant.G[:, j], plant.states) for j in range(plant.m)]
        if not all(is_identically_zero(e, ctx).value for e in row):
            return k + 1, sp.Matrix([row]), chain
        if k < plant.n - 1:
            chain.append(lie_derivative(phi, plant.f, plant.states))
            if tree_budget is not None and beyond_tree_budget(chain[-1:], budget=tree_budget)[0]:
                raise BeyondSymbolicBudget(f"L_f^{k + 1} h has more than {tree_budget} tree nodes")
    return None, sp.Integer(0), chain


def find_linearizing_output(plant: Plant, generators: list[sp.Matrix] | None, ctx: NumericContext,
                            coordinates: list[int] | None = None) -> tuple[list[sp.Expr], str]:
    """Find T1 with dT1 annihilating D_(n-2) and relative degree n (single input).

    Candidates: the coordinate functions (those listed in ``coordinates`` when given,
    e.g. after a numeric pre-screen), the plant's own output, then the potential of
    the annihilating covector of D_(n-2) normalised on each nonzero component (tried as
    an exact one-form, Poincare's lemma). Every candidate is kept only after its
    relative degree has been verified to be n, with L_g L_f^(n-1) T1 nonzero at x0.
    Without symbolic ``generators`` (beyond the symbolic budget) the candidates are checked
    from jets and the annihilators are not searched.
    """
    from linz_ros.analysis._input_state_numeric import is_linearizing_output_numeric

    n = plant.n
    indices = range(n) if coordinates is None else coordinates
    candidates: list[sp.Expr] = [plant.states[i] for i in indices]
    if plant.h.shape[0] == 1:
        candidates.append(plant.h[0])
    unique = list(dict.fromkeys(candidates))
    undefined: list[sp.Expr] = []
    verify = _is_linearizing_output if generators is not None else is_linearizing_output_numeric
    found = [c for c in unique if verify(c, plant, ctx, undefined)]
    if not found and n > 1 and generators is not None:
        D = sp.Matrix.hstack(*generators[: n - 1])
        for potential in _annihilator_potentials(D, plant, ctx):
            if _is_linearizing_output(potential, plant, ctx, undefined):
                found.append(potential)
                break
    skipped = ("; " + ", ".join(show(c) for c in undefined) + " would have relative degree n but "
               + ("is" if len(undefined) == 1 else "are") + " undefined at the operating point") if undefined else ""
    if found:
        return found[:3], ("verified: relative degree n with L_g L_f^(n-1) T1 nonzero at the operating point"
                           + skipped)
    return [], ("none found by the search (coordinates, the plant's output, exact annihilators)" + skipped
                + "; supply a candidate output in the plant file's outputs to have it checked")


def _is_linearizing_output(candidate: sp.Expr, plant: Plant, ctx: NumericContext,
                           undefined: list[sp.Expr] | None = None) -> bool:
    """Relative degree n, and T1, its chain and L_g L_f^(n-1) T1 finite, the last nonzero, at x0.

    A candidate of relative degree n that is not finite at x0 (``log(th)`` at th = 0) is
    appended to ``undefined``.
    """
    budget = SYMBOLIC_TREE_BUDGET if plant_jets(plant, ctx) is not None else None
    try:
        degree, coefficient, chain = lie_chain(candidate, plant, ctx, budget)
    except BeyondSymbolicBudget:
        from linz_ros.analysis._input_state_numeric import is_linearizing_output_numeric
        return is_linearizing_output_numeric(candidate, plant, ctx, undefined)
    if degree != plant.n:
        return False
    x0 = plant.operating_vector()
    values = evaluate(sp.Matrix([*chain, coefficient[0, 0]]), ctx, x0)
    if not np.all(np.isfinite(values)):
        if undefined is not None:
            undefined.append(candidate)
        return False
    return bool(abs(values[-1, 0]) > 1e-9)


def _annihilator_potentials(D: sp.Matrix, plant: Plant, ctx: NumericContext):
    """Yield functions T with dT proportional to the covector annihilating D."""
    x = plant.states
    if sum(sp.count_ops(e) for e in D) > 600:
        return
    null = D.T.nullspace(simplify=False)
    if len(null) != 1:
        return
    w = [sp.cancel(e) for e in null[0]]
    for k, wk in enumerate(w):
        if is_identically_zero(wk, ctx).value:
            continue
        omega = [sp.cancel(e / wk) for e in w]
        if not _is_closed(omega, x, ctx):
            continue
        potential = _integrate_exact(omega, x, ctx)
        if potential is not None:
            yield potential


def _is_closed(omega: list[sp.Expr], x, ctx: NumericContext) -> bool:
    for i in range(len(x)):
        for j in range(i + 1, len(x)):
            curl = sp.diff(omega[i], x[j]) - sp.diff(omega[j], x[i])
            if not is_identically_zero(curl, ctx).value:
                return False
    return True


def _integrate_exact(omega: list[sp.Expr], x, ctx: NumericContext) -> sp.Expr | None:
    """Potential of a closed one-form by successive partial integration."""
    potential = sp.Integer(0)
    for i, xi in enumerate(x):
        residual = sp.cancel(omega[i] - sp.diff(potential, xi))
        if is_identically_zero(residual, ctx).value:
            continue
        term = sp.integrate(residual, xi)
        if term.has(sp.Integral):
            return None
        potential += term
    for i, xi in enumerate(x):
        if not is_identically_zero(sp.diff(potential, xi) - omega[i], ctx).value:
            return None
    return tidy(potential)
