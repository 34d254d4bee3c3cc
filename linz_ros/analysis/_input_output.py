"""Input-output linearization: relative degree, decoupling matrix, singular set, zero dynamics."""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import partial
from typing import Any, Callable

import numpy as np
import scipy.linalg
import sympy as sp

from linz_ros.analysis._common import count, names_are, show, show_matrix, tidy
from linz_ros.analysis._extension import DynamicExtension, search_dynamic_extension
from linz_ros.analysis._input_state import EVERYWHERE, lie_chain, state_factors
from linz_ros.analysis._numeric import NUMERIC_METHOD, numeric_chains, plant_jets, sampled_generic_rank, sampled_minimum
from linz_ros.geometry import (SYMBOLIC_TREE_BUDGET, BeyondSymbolicBudget, NumericContext, PlantJets, evaluate,
                               generic_rank, lie_derivative, numeric_rank, rank_at)
from linz_ros.model import Plant

__all__ = ["InputOutputResult", "ZeroDynamics", "analyse_input_output", "decoupling_terms",
           "classified_zero_dynamics", "MatrixWording", "rank_verdict"]

#: Finite invariant zeros are generalized eigenvalues below this magnitude.
_FINITE_ZERO = 1e8
#: Real parts within this distance of the imaginary axis are "critical".
_CRITICAL_RE = 1e-9


@dataclass
class ZeroDynamics:
    """Linearization of the zero dynamics at an equilibrium."""

    equilibrium_input: list[float] | None
    eigenvalues: list[complex] = field(default_factory=list)
    stability: str | None = None
    reason: str = ""

    def to_json(self) -> dict[str, Any]:
        return {
            "equilibrium_input": self.equilibrium_input,
            "eigenvalues": [[float(e.real), float(e.imag)] for e in self.eigenvalues],
            "stability": self.stability,
            "reason": self.reason,
        }


@dataclass
class InputOutputResult:
    """Input-output linearization of the plant's outputs at the operating point."""

    outputs: list[str]
    relative_degree: list[int] | None
    relative_degree_generic: list[int | None]
    reason: str
    decoupling_matrix: sp.Matrix | None = None
    drift_terms: sp.Matrix | None = None
    chains: list[list[sp.Expr]] = field(default_factory=list)
    singular_set: sp.Expr | None = None
    singular_set_note: str = ""
    zero_dynamics_order: int | None = None
    zero_dynamics: ZeroDynamics | None = None
    decoupling_structure: dict[str, Any] | None = None   # mechanical plants: A = J M^-1 B
    summary: str = ""            # the reason in a few words, for the verdict line
    method: str = ""             # set when decided from jets (no symbolic chains or decoupling matrix)
    decoupling_values: Callable[[np.ndarray], np.ndarray] | None = None   # K x n points -> K x p x m, from jets
    dynamic_extension: DynamicExtension | None = None    # square, rank-deficient explicit plants only

    @property
    def linearizable(self) -> bool | None:
        """True with a relative degree here, None when undecided (the reason says why), else False."""
        if self.relative_degree is not None:
            return True
        return None if self.reason.startswith("could not decide") else False

    def to_json(self) -> dict[str, Any]:
        extra = {"method": self.method} if self.method else {}
        extension = {} if self.dynamic_extension is None else {"dynamic_extension": self.dynamic_extension.to_json()}
        return {
            **extra,
            "outputs": self.outputs,
            "linearizable": self.linearizable,
            "relative_degree": self.relative_degree,
            "relative_degree_generic": self.relative_degree_generic,
            "reason": self.reason,
            "decoupling_matrix": None if self.decoupling_matrix is None else show_matrix(self.decoupling_matrix),
            "singular_set": None if self.singular_set is None else show(self.singular_set),
            "singular_set_empty": None if self.singular_set is None else self.singular_set == 1,
            "singular_set_everywhere": None if self.singular_set is None else self.singular_set == EVERYWHERE,
            "singular_set_note": self.singular_set_note,
            "zero_dynamics_order": self.zero_dynamics_order,
            "zero_dynamics": None if self.zero_dynamics is None else self.zero_dynamics.to_json(),
            "decoupling_structure": self.decoupling_structure,
            **extension,
        }


def decoupling_terms(plant: Plant, ctx: NumericContext, tree_budget: int | None = None
                     ) -> tuple[list[int | None], sp.Matrix | None, sp.Matrix | None, list[list[sp.Expr]]]:
    """Generic relative degrees, decoupling matrix A(x), stacked b(x) = L_f^r_i h_i, chains.

    Parameters
    ----------
    plant : Plant
    ctx : NumericContext
    tree_budget : int or None
        Tree nodes at most in a Lie derivative (:func:`lie_chain`), None for no limit.

    Returns
    -------
    degrees : list of int or None
        Generic relative degree of each output (None: not reached by any input).
    A : sympy.Matrix or None
        Row i is ``L_G L_f^(r_i - 1) h_i``; None when some degree is None.
    b : sympy.Matrix or None
        Column of ``L_f^(r_i) h_i``.
    chains : list of list of sympy.Expr
        For each output, ``[h_i, L_f h_i, ..., L_f^(r_i - 1) h_i]``.
    """
    degrees, rows, drift, chains = [], [], [], []
    for i in range(plant.h.shape[0]):
        degree, row, chain = lie_chain(plant.h[i], plant, ctx, tree_budget)
        degrees.append(degree)
        chains.append(chain)
        if degree is None:
            continue
        rows.append(row)
        drift.append(lie_derivative(chain[-1], plant.f, plant.states))
    if any(d is None for d in degrees):
        return degrees, None, None, chains
    A = sp.Matrix.vstack(*rows).applyfunc(tidy)
    return degrees, A, sp.Matrix(drift), chains


def analyse_input_output(plant: Plant, ctx: NumericContext, numeric: bool = False,
                         extend: bool = True) -> InputOutputResult | None:
    """Relative degree, decoupling matrix, singular set and zero dynamics of the outputs.

    Definitions follow Isidori, Nonlinear Control Systems, sec. 5.1: the vector
    relative degree exists at x0 when L_gj L_f^k h_i vanishes near x0 for k < r_i - 1
    and the decoupling matrix A(x0) is nonsingular (full row rank).

    Parameters
    ----------
    plant : Plant
    ctx : NumericContext
    numeric : bool
        Decide from jets at once (the plant's expressions are known to exceed the symbolic
        budget); otherwise symbolically, switching to jets when a Lie derivative exceeds it.
    extend : bool
        Search for a dynamic extension when the decoupling matrix is square and of deficient
        generic rank (:func:`search_dynamic_extension`; its candidates are analysed without one).

    Returns
    -------
    InputOutputResult or None
        None when the plant declares no outputs.
    """
    p, m = plant.h.shape[0], plant.m
    if p == 0:
        return None
    names = list(plant.output_names)
    jets = plant_jets(plant, ctx)
    extension = partial(search_dynamic_extension, plant, ctx, partial(analyse_input_output, extend=False)) \
        if extend else None
    try:
        if numeric and jets is not None:
            raise BeyondSymbolicBudget("the brackets exceed the symbolic budget")
        degrees, A, b, chains = decoupling_terms(plant, ctx, None if jets is None else SYMBOLIC_TREE_BUDGET)
    except BeyondSymbolicBudget:
        return _numeric_input_output(plant, ctx, jets, extension)
    if A is None:
        return _unreached(names, degrees, plant)
    result = InputOutputResult(names, None, degrees, "", decoupling_matrix=A, drift_terms=b, chains=chains)
    if p > m:
        result.reason, result.summary = more_outputs_than_inputs(p, m)
        return result
    result.singular_set, result.singular_set_note = _singular_set(A, plant, ctx)
    ranks = generic_rank(A, ctx).rank, rank_at(A, ctx, plant.operating_vector())
    return rank_verdict(result, plant, ranks, _DECOUPLING_MATRIX, lambda order: _zero_dynamics(plant, order, ctx),
                        extension)


#: What the report says of input-output results decided from jets.
INPUT_OUTPUT_METHOD = (f"{NUMERIC_METHOD}: L_f^k h along the flow and L_g L_f^k h by complex steps at the "
                       "operating point and the random points (the expressions exceed the symbolic budget)")


def _numeric_input_output(plant: Plant, ctx: NumericContext, jets: PlantJets,
                          extension: Callable[[], DynamicExtension] | None = None) -> InputOutputResult:
    """:func:`analyse_input_output` from jets: no chains and no decoupling matrix are formed."""
    p, m, names = plant.h.shape[0], plant.m, list(plant.output_names)
    chains = numeric_chains(list(plant.h), plant, ctx, jets)
    if None in chains.degrees:
        return _unreached(names, chains.degrees, plant, INPUT_OUTPUT_METHOD)
    result = InputOutputResult(names, None, chains.degrees, "", method=INPUT_OUTPUT_METHOD,
                               decoupling_values=chains.decoupling(jets))
    if p > m:
        result.reason, result.summary = more_outputs_than_inputs(p, m)
        return result
    what = "det A" if p > 1 else "L_g L_f^(r-1) h"
    result.singular_set_note = (f"not formed symbolically ({what} exceeds the symbolic budget); at the "
                                f"{ctx.samples.shape[0]} random points: "
                                + sampled_minimum(chains.rows_samples, ctx.samples, plant))
    here = chains.rows_here if chains.finite_here else np.full_like(chains.rows_here, np.nan)
    ranks = sampled_generic_rank(chains.rows_samples).rank, numeric_rank(here)
    return rank_verdict(result, plant, ranks, _DECOUPLING_MATRIX, lambda order: _zero_dynamics(plant, order, ctx),
                        extension)


def _unreached(names: list[str], degrees: list[int | None], plant: Plant, method: str = "") -> InputOutputResult:
    """The result when some output is not reached by any input within n derivatives."""
    lost = [names[i] for i, d in enumerate(degrees) if d is None]
    return InputOutputResult(names, None, degrees,
                             f"{names_are(lost, 'output')} not affected by any input "
                             f"within {count(plant.n, 'derivative')} (infinite relative degree)",
                             summary=f"{names_are(lost, 'output')} not reached by any input", method=method)


@dataclass(frozen=True)
class MatrixWording:
    """How the verdicts name a decoupling matrix and how its rank was found."""

    name: str                    # "the decoupling matrix", "J M^-1 B"
    everywhere: str              # where a generic rank was seen: "everywhere", "at every sample"
    hint: str = ""               # after "cannot be decoupled by static feedback"
    vanishes: str = ""           # for one output: what vanishes on the singular set, instead of a rank
    structure: str = ""          # after "relative degree [..] at the operating point"


_DECOUPLING_MATRIX = MatrixWording("the decoupling matrix", "everywhere", " (dynamic extension may help)",
                                   "L_g L_f^(r-1) h vanishes")


def rank_verdict(result: InputOutputResult, plant: Plant, ranks: tuple[int | None, int | None],
                 wording: MatrixWording, zero_dynamics: Callable[[int], ZeroDynamics],
                 extension: Callable[[], DynamicExtension] | None = None) -> InputOutputResult:
    """The verdict on a p x m decoupling matrix (p <= m) from its generic rank and its rank at the
    operating point.

    Parameters
    ----------
    result : InputOutputResult
        Outputs, generic relative degrees and the decoupling terms filled in; completed in place.
    plant : Plant
    ranks : tuple of int or None
        Generic rank and rank at the operating point (None: not finite).
    wording : MatrixWording
    zero_dynamics : callable
        Order of the zero dynamics -> their linearization, called when the relative degree is defined.
    extension : callable or None
        The dynamic-extension search, run when the matrix is square and of deficient generic
        rank; its result is attached and its reason replaces the wording's hint.

    Returns
    -------
    InputOutputResult
        ``result``.
    """
    (generic, at_point), p, degrees = ranks, len(result.outputs), result.relative_degree_generic
    if generic is None or at_point is None:
        result.reason = f"could not decide: {wording.name} is not finite at the operating point"
        result.summary = f"{wording.name} is not finite at the operating point"
        return result
    if generic < p:
        hint = wording.hint
        if extension is not None and p == plant.m:
            result.dynamic_extension = extension()
            hint = f"; {result.dynamic_extension.reason}"
        result.reason = (f"{wording.name} has rank {generic} < {p} {wording.everywhere}: the outputs "
                         f"cannot be decoupled by static feedback{hint}")
        result.summary = "the decoupling matrix is singular everywhere"
        result.singular_set = EVERYWHERE
        return result
    result.zero_dynamics_order = plant.n - sum(degrees)
    if at_point < p:
        what = wording.vanishes if p == 1 and wording.vanishes else f"{wording.name} has rank {at_point} < {p}"
        result.reason = (f"relative degree not defined at the operating point: {what} there "
                         f"(it lies on the singular set); generic relative degree {degrees}")
        result.summary = "relative degree not defined at the operating point (on the singular set)"
        return result
    result.relative_degree = list(degrees)
    result.reason = (f"relative degree {degrees} at the operating point{wording.structure}; "
                     f"zero dynamics of order {result.zero_dynamics_order}")
    result.zero_dynamics = zero_dynamics(result.zero_dynamics_order)
    return result


def more_outputs_than_inputs(p: int, m: int) -> tuple[str, str]:
    """The reason (and its summary) why p > m outputs cannot be linearized by static feedback.

    Parameters
    ----------
    p, m : int
        Numbers of outputs and inputs.

    Returns
    -------
    reason, summary : str
    """
    return (f"{count(p, 'output')} but {count(m, 'input')}: the decoupling matrix is {p} x {m} and cannot have "
            f"full row rank; give as many outputs as inputs (a square decoupling matrix)",
            f"{count(p, 'output')} but {count(m, 'input')}: give as many outputs as inputs")


def _singular_set(A: sp.Matrix, plant: Plant, ctx: NumericContext) -> tuple[sp.Expr | None, str]:
    p, m = A.shape
    if sum(sp.count_ops(e) for e in A) > 1500:
        return None, "could not decide: decoupling matrix too large for a symbolic determinant"
    square = A if p == m else A * A.T
    determinant = square.det(method="berkowitz")
    if p != m:
        note = "where det(A A^T) = 0 (A has fewer rows than columns)"
    else:
        note = "where det A = 0" if p > 1 else "where L_g L_f^(r-1) h = 0"
    return state_factors(determinant, plant), note


def _zero_dynamics(plant: Plant, order: int, ctx: NumericContext) -> ZeroDynamics:
    if order == 0:
        return ZeroDynamics(None, [], "none", "no zero dynamics (sum of relative degrees = n)")
    x0 = plant.operating_vector()
    f0 = evaluate(plant.f, ctx, x0)[:, 0]
    G0 = evaluate(plant.G, ctx, x0)
    if not (np.all(np.isfinite(f0)) and np.all(np.isfinite(G0))):
        return ZeroDynamics(None, [], None, "the model is not finite at the operating point")
    u0, *_ = np.linalg.lstsq(G0, -f0, rcond=None)
    if np.linalg.norm(f0 + G0 @ u0) > 1e-9 * (1 + np.linalg.norm(f0)):
        return ZeroDynamics(None, [], None, "the operating point is not an equilibrium for any "
                                            "constant input; zero-dynamics linearization not stated")
    if plant.h.shape[0] != plant.m:
        return ZeroDynamics([float(v) for v in u0], [], None,
                            "zero-dynamics linearization is stated for as many outputs as inputs")
    X = sp.Matrix(plant.states)
    closed = plant.f + plant.G * sp.Matrix([sp.Float(v) for v in u0])
    A_lin = evaluate(closed.jacobian(X), ctx, x0)
    C_lin = evaluate(plant.h.jacobian(X), ctx, x0)
    return classified_zero_dynamics([float(v) for v in u0], invariant_zeros(A_lin, G0, C_lin), order)


def classified_zero_dynamics(u0: list[float], zeros: list[complex], order: int, method: str = "",
                             critical: float = _CRITICAL_RE) -> ZeroDynamics:
    """Stability of the linearized zero dynamics from the invariant zeros at an equilibrium.

    Parameters
    ----------
    u0 : list of float
        The equilibrium input.
    zeros : list of complex
        Finite invariant zeros of the linearization.
    order : int
        Order of the zero dynamics (n - sum of the relative degrees).
    method : str
        How the linearization was obtained, appended to the reason.
    critical : float
        Real parts within this distance of the imaginary axis count as critical.

    Returns
    -------
    ZeroDynamics
    """
    zd = ZeroDynamics(u0, zeros)
    if len(zeros) != order:
        zd.reason = (f"the linearization has {len(zeros)} finite zeros but the zero dynamics have "
                     f"order {order}; stability not stated")
        return zd
    real = np.array([z.real for z in zeros])
    suffix = f" ({method})" if method else ""
    if np.all(real < -critical):
        zd.stability = "asymptotically stable"
        zd.reason = "all eigenvalues of the linearized zero dynamics in the open left half-plane" + suffix
    elif np.any(real > critical):
        zd.stability = "unstable"
        zd.reason = ("an eigenvalue of the linearized zero dynamics in the right half-plane "
                     "(non-minimum phase): an exact linearizing law would be unsafe" + suffix)
    else:
        zd.stability = "critical"
        zd.reason = "eigenvalues on the imaginary axis: the linearization does not decide stability" + suffix
    return zd


def invariant_zeros(A: np.ndarray, B: np.ndarray, C: np.ndarray) -> list[complex]:
    """Finite invariant zeros of a square linear system (no feedthrough).

    Parameters
    ----------
    A, B, C : numpy.ndarray
        n x n, n x m and m x n matrices of dx = A x + B u, y = C x.

    Returns
    -------
    list of complex
        Sorted by real part, then imaginary part.

    The zeros are the finite generalized eigenvalues of the Rosenbrock pencil
    ``[[A, B], [C, 0]] - s [[I, 0], [0, 0]]`` (common practice; e.g. Emami-Naeini and
    Van Dooren, Automatica 1982). For a relative degree defined at an equilibrium they
    are the eigenvalues of the linearized zero dynamics (Isidori, sec. 4.3).

    Examples
    --------
    >>> A = np.array([[0., 1.], [-2., -3.]]); B = np.array([[0.], [1.]]); C = np.array([[1., 1.]])
    >>> [round(z.real, 9) for z in invariant_zeros(A, B, C)]
    [-1.0]
    """
    n, m = B.shape
    p = C.shape[0]
    pencil = np.block([[A, B], [C, np.zeros((p, m))]])
    mass = np.block([[np.eye(n), np.zeros((n, m))], [np.zeros((p, n)), np.zeros((p, m))]])
    with np.errstate(all="ignore"):
        values = scipy.linalg.eigvals(pencil, mass)
    finite = [complex(v) for v in values if np.isfinite(v) and abs(v) < _FINITE_ZERO]
    return sorted(finite, key=lambda z: (z.real, z.imag))
