"""The coordinate change z = T(x) of input-state linearization and its inverse."""

from __future__ import annotations

import numpy as np
import sympy as sp

from linz_ros.geometry import NumericContext, evaluate_many
from linz_ros.model import Plant

__all__ = ["transformed_symbols", "closed_form_inverse"]

#: Equations with more operations than this are not handed to sympy's solver.
_SOLVE_BUDGET = 300
#: Round trip x -> T(x) -> T^-1(T(x)) must agree to this relative tolerance.
_ROUND_TRIP_RTOL = 1e-8


def transformed_symbols(n: int) -> tuple[sp.Symbol, ...]:
    """Symbols of the linearizing coordinates ``_z0 .. _z(n-1)`` (no plant name starts with _).

    Parameters
    ----------
    n : int

    Returns
    -------
    tuple of sympy.Symbol
    """
    return tuple(sp.Symbol(f"_z{i}", real=True) for i in range(n))


def closed_form_inverse(T: list[sp.Expr], plant: Plant, ctx: NumericContext) -> sp.Matrix | None:
    """Solve ``z = T(x)`` for x in closed form, one state at a time, or give up.

    Each step takes an equation that, after substituting the states solved so far,
    contains exactly one unsolved state, and solves it with sympy. Where sympy returns
    several branches, the one that maps the operating point back onto itself is kept.
    The result is accepted only when the round trip ``T^-1(T(x)) = x`` holds at the
    context's random points; otherwise the runtime inverts T by Newton's method.

    Parameters
    ----------
    T : list of sympy.Expr
        ``[T1, L_f T1, ..., L_f^(n-1) T1]``.
    plant : Plant
    ctx : NumericContext

    Returns
    -------
    sympy.Matrix or None
        n x 1, x as functions of the symbols of :func:`transformed_symbols` and the
        parameters; None when no closed form was found.
    """
    n = plant.n
    z = transformed_symbols(n)
    x0 = dict(zip(plant.states, plant.operating_vector()))
    z_at_x0 = {zk: sp.Float(float(sp.N(Tk.subs(plant.nominal).subs(x0))), 30) for zk, Tk in zip(z, T)}
    solved: dict[sp.Symbol, sp.Expr] = {}
    unused = list(range(n))
    progress = True
    while unused and progress:
        progress = False
        for k in list(unused):
            equation = T[k].subs(solved) - z[k]
            unknown = equation.free_symbols & (set(plant.states) - set(solved))
            if len(unknown) == 0:
                unused.remove(k)     # redundant equation: carries no new state
                continue
            if len(unknown) != 1 or sp.count_ops(equation) > _SOLVE_BUDGET:
                continue
            state = unknown.pop()
            branch = _solve_for(equation, state, x0, z_at_x0, solved, plant)
            if branch is None:
                return None
            solved[state] = branch
            unused.remove(k)
            progress = True
    if len(solved) != n:
        return None
    inverse = sp.Matrix([solved[s] for s in plant.states])
    return inverse if _round_trip_holds(T, inverse, plant, ctx) else None


def _solve_for(equation: sp.Expr, state: sp.Symbol, x0: dict, z_at_x0: dict, solved: dict,
               plant: Plant) -> sp.Expr | None:
    try:
        candidates = sp.solve(equation, state, check=False, rational=False)
    except (NotImplementedError, ValueError, TypeError):
        return None
    target = float(x0[state])
    for candidate in candidates:
        if isinstance(candidate, dict):
            continue
        value = candidate.subs(plant.nominal).subs(z_at_x0)
        try:
            number = complex(sp.N(value))
        except (TypeError, ValueError):
            continue
        if abs(number.imag) < 1e-9 and abs(number.real - target) <= 1e-8 * (1 + abs(target)):
            return candidate
    return None


def _round_trip_holds(T: list[sp.Expr], inverse: sp.Matrix, plant: Plant, ctx: NumericContext) -> bool:
    z = transformed_symbols(plant.n)
    forward = evaluate_many(sp.Matrix(T), ctx, ctx.samples)[:, :, 0]
    if not np.all(np.isfinite(forward)):
        return False
    inverse_ctx = NumericContext(z, ctx.constants, forward)
    back = evaluate_many(inverse, inverse_ctx, forward)[:, :, 0]
    if not np.all(np.isfinite(back)):
        return False
    return bool(np.allclose(back, ctx.samples, rtol=_ROUND_TRIP_RTOL, atol=_ROUND_TRIP_RTOL))
