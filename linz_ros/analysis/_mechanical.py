"""Analysis of mechanical plants on their structure ``M(q) q'' = F(q, q') + B(q) u``.

For outputs y = h(q), ``y'' = J M^-1 (F + B u) + J' q'`` with J = dh/dq (J K when the
velocities are quasi-velocities with q' = K(q) v, as for a vessel), so every output
with a nonzero row of J M^-1 B has relative degree 2, the decoupling matrix is
``A = J M^-1 B`` and ``b = J M^-1 F + J' q'``. With M positive definite and B square,
``det A = det J det B / det M``: the singular set is where det J det B = 0 (Spong,
Hutchinson and Vidyasagar, Robot Modeling and Control, sec. 8.3, task-space inverse
dynamics). A fully actuated plant (B of rank nq) is input-state linearizable with the
coordinates as linearizing outputs (computed torque, ibid. sec. 8.3; Isidori,
Nonlinear Control Systems, Thm. 5.2.3 with D_0 = span{0; M^-1 B}). Nothing here forms
M^-1 symbolically: every such product is evaluated numerically with a linear solve.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
import sympy as sp

from linz_ros.analysis._common import names_are, show_matrix, small_enough
from linz_ros.analysis._elastic import (ElasticTerms, analyse_elastic_input_output, analyse_elastic_input_state,
                                        elastic_terms)
from linz_ros.analysis._input_output import (InputOutputResult, MatrixWording, ZeroDynamics,
                                             classified_zero_dynamics, invariant_zeros, more_outputs_than_inputs,
                                             rank_verdict)
from linz_ros.analysis._input_state import DistributionInfo, InputStateResult, state_factors
from linz_ros.geometry import NumericContext, numeric_rank
from linz_ros.model import Plant, numeric_function

__all__ = ["MechanicalTerms", "mechanical_terms", "analyse_mechanical_input_state",
           "analyse_mechanical_input_output"]

#: Relative tolerance under which a row of J M^-1 B counts as zero at every sample.
_ZERO_ROW = 1e-10
#: Step of the central differences that linearize the zero dynamics.
_FD_STEP = 1e-6
_CRITICAL_RE = 1e-7
#: The verdicts' words for A = J M^-1 B, ranked at the envelope samples.
_STRUCTURE = MatrixWording("J M^-1 B", "at every sample", structure=" (mechanical structure, A = J M^-1 B)")


@dataclass
class MechanicalTerms:
    """Numeric evaluation of M, F, B and the output terms J, J' q' of a mechanical plant.

    ``evaluate(points)`` takes K x n states and returns the matrices stacked over the
    points (M: K x nq x nq, F: K x nq, B: K x nq x m, J: K x p x nq, c: K x p), at the
    nominal parameters; H: K x p x nq is dh/dq, k: K x nq the coordinate rates.
    """

    plant: Plant
    J: sp.Matrix
    c: sp.Matrix
    _function: Callable

    def evaluate(self, points: np.ndarray) -> dict[str, np.ndarray]:
        points = np.atleast_2d(np.asarray(points, dtype=float))
        count = points.shape[0]
        mech = self.plant.mechanics
        nq, m, p = mech.nq, self.plant.m, self.J.shape[0]
        params = [float(v) for v in self.plant.parameters.values()]
        with np.errstate(all="ignore"):
            raw = self._function(*points.T, *params)
        shapes = {"M": (nq, nq), "F": (nq,), "B": (nq, m), "J": (p, nq), "c": (p,), "k": (nq,), "H": (p, nq)}
        out = {}
        for (name, shape), values in zip(shapes.items(), raw):
            columns = [np.broadcast_to(np.asarray(v, dtype=float), (count,)) for v in values]
            stacked = np.stack(columns, axis=1) if columns else np.zeros((count, 0))
            out[name] = stacked.reshape(count, *shape)
        return out

    def decoupling(self, points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """A = J M^-1 B and b = J M^-1 F + J' q' at K points (nan where M is singular)."""
        v = self.evaluate(points)
        count = v["M"].shape[0]
        rhs = np.concatenate([v["B"], v["F"][:, :, None]], axis=2)
        solved = np.full_like(rhs, np.nan)
        finite = np.all(np.isfinite(v["M"]), axis=(1, 2)) & np.all(np.isfinite(rhs), axis=(1, 2))
        for k in np.flatnonzero(finite):
            try:
                solved[k] = np.linalg.solve(v["M"][k], rhs[k])
            except np.linalg.LinAlgError:
                continue
        projected = np.einsum("kpq,kqj->kpj", v["J"], solved)
        A = projected[:, :, :-1]
        b = projected[:, :, -1] + v["c"]
        return A.reshape(count, v["J"].shape[1], self.plant.m), b

    def derivative(self, x: np.ndarray, u: np.ndarray) -> np.ndarray:
        """(q', v') = (k(q, v), M^-1 (F + B u)) at one state."""
        v = self.evaluate(x[None, :])
        return np.concatenate([v["k"][0], np.linalg.solve(v["M"][0], v["F"][0] + v["B"][0] @ u)])


def mechanical_terms(plant: Plant) -> MechanicalTerms | ElasticTerms:
    """Build the numeric evaluator of a mechanical plant's structure.

    Parameters
    ----------
    plant : Plant
        With ``plant.mechanics`` set.

    Returns
    -------
    MechanicalTerms or ElasticTerms
        The latter for an elastic-joint arm (``decoupling`` gives A = M^-1 K J^-1).
    """
    mech = plant.mechanics
    if mech.elastic is not None:
        return elastic_terms(plant)
    J = mech.decoupling_jacobian(plant.h) if plant.h.shape[0] else sp.zeros(0, mech.nq)
    c = mech.output_bias(plant.h) if plant.h.shape[0] else sp.zeros(0, 1)
    H = mech.output_jacobian(plant.h) if plant.h.shape[0] else sp.zeros(0, mech.nq)
    parts = [list(mech.M), list(mech.F), list(mech.B), list(J), list(c), list(mech.coordinate_rates), list(H)]
    function = numeric_function(list(plant.states) + list(plant.parameters), parts)
    return MechanicalTerms(plant, J, c, function)


def analyse_mechanical_input_state(plant: Plant, terms: MechanicalTerms, ctx: NumericContext) -> InputStateResult:
    """Input-state verdict of a mechanical plant from the rank of B (structure, not brackets).

    Parameters
    ----------
    plant : Plant
    terms : MechanicalTerms
    ctx : NumericContext

    Returns
    -------
    InputStateResult
    """
    if plant.mechanics.elastic is not None:
        return analyse_elastic_input_state(plant)
    nq, n = plant.mechanics.nq, plant.n
    at_point = terms.evaluate(np.array([plant.operating_vector()]))["B"][0]
    samples = terms.evaluate(ctx.samples)["B"]
    rank_here = numeric_rank(at_point) if np.all(np.isfinite(at_point)) else None
    generic = max((numeric_rank(b) for b in samples if np.all(np.isfinite(b))), default=None)
    if generic is None or rank_here is None:
        return InputStateResult(None, "could not decide: the input map is not finite at the operating point")
    if generic < nq:
        return InputStateResult(None, f"underactuated mechanical plant (rank B = {generic} < {nq} coordinates): "
                                      "the structural test covers fully actuated plants; write the model in "
                                      "explicit form (dynamics) for the geometric test")
    # D_0 = span{(0, M^-1 b_j)}: the velocity directions, involutive (its generators depend on q only
    # and have no q-components, so their brackets vanish); D_1 adds (-M^-1 b_j, *): all of R^n.
    distributions = [DistributionInfo(0, rank_here, nq, True, "mechanical structure: span{(0, M^-1 B)}"),
                     DistributionInfo(1, 2 * rank_here, n, True, "mechanical structure: contains (M^-1 B, *)")]
    distributions += [DistributionInfo(k, 2 * rank_here, n, True, "contains D_1") for k in range(2, n)]
    if rank_here < nq:
        return InputStateResult(False, f"B loses rank at the operating point (rank {rank_here} < {nq})",
                                distributions)
    names = ", ".join(q.name for q in plant.mechanics.coordinates)
    return InputStateResult(True, "fully actuated mechanical plant (M positive definite, B of full rank): "
                                  f"linearized by computed torque with the coordinates {names} as outputs",
                            distributions, controllability_indices=[2] * nq,
                            linearizing_output_note=f"the coordinates ({names}) are linearizing outputs "
                                                    "(relative degree 2 each)")


def analyse_mechanical_input_output(plant: Plant, terms: MechanicalTerms, ctx: NumericContext
                                    ) -> InputOutputResult | None:
    """Relative degree, decoupling structure, singular set and zero dynamics of y = h(q).

    Parameters
    ----------
    plant : Plant
    terms : MechanicalTerms
    ctx : NumericContext

    Returns
    -------
    InputOutputResult or None
        None when the plant has no outputs. ``decoupling_matrix`` stays None: A is
        ``J M^-1 B``, given by ``decoupling_structure``.
    """
    p, m, mech = plant.h.shape[0], plant.m, plant.mechanics
    if mech.elastic is not None:
        return analyse_elastic_input_output(plant, terms, ctx)
    if p == 0:
        return None
    names = list(plant.output_names)
    qd = sp.Matrix(mech.velocities)
    chains = [[plant.h[i], (terms.J[i, :] * qd)[0, 0]] for i in range(p)]
    A_samples, _ = terms.decoupling(ctx.samples)
    scale = max(float(np.nanmax(np.abs(A_samples))) if np.any(np.isfinite(A_samples)) else 0.0, 1e-300)
    degrees: list[int | None] = []
    for i in range(p):
        row = A_samples[:, i, :]
        degrees.append(2 if np.nanmax(np.abs(row)) > _ZERO_ROW * scale else None)
    structure = {"form": "J(q) M(q)^-1 B(q)" if mech.kinematics is None else "J(q) K(q) M(q)^-1 B(q)",
                 "J": show_matrix(terms.J, bounded=True), "B": show_matrix(mech.B, bounded=True)}
    result = InputOutputResult(names, None, degrees, "", chains=chains, decoupling_structure=structure)
    if any(d is None for d in degrees):
        lost = [names[i] for i, d in enumerate(degrees) if d is None]
        result.reason = (f"{names_are(lost, 'output')} not reached: J M^-1 B has a zero row (constant output, or "
                         "an underactuated direction with relative degree above 2; use the explicit form)")
        result.summary = f"{names_are(lost, 'output')} not reached by any input"
        return result
    if p > m:
        result.reason, result.summary = more_outputs_than_inputs(p, m)
        return result
    result.singular_set, result.singular_set_note = _mechanical_singular_set(plant, terms)
    generic = max((numeric_rank(a) for a in A_samples if np.all(np.isfinite(a))), default=None)
    A_here, _ = terms.decoupling(np.array([plant.operating_vector()]))
    at_point = numeric_rank(A_here[0]) if np.all(np.isfinite(A_here[0])) else None
    return rank_verdict(result, plant, (generic, at_point), _STRUCTURE,
                        lambda order: _mechanical_zero_dynamics(plant, terms, order))


def _mechanical_singular_set(plant: Plant, terms: MechanicalTerms) -> tuple[sp.Expr | None, str]:
    mech = plant.mechanics
    p, m, nq = plant.h.shape[0], plant.m, mech.nq
    if not (p == m == nq):
        return None, "depends on M(q) (outputs or inputs fewer than coordinates); sampled over the envelope"
    if not (small_enough(terms.J) and small_enough(mech.B)):
        return None, "J or B too large for a symbolic determinant; sampled over the envelope"
    determinant = terms.J.det(method="berkowitz") * mech.B.det(method="berkowitz")
    return state_factors(determinant, plant), "where det J det B = 0 (det M > 0)"


def _mechanical_zero_dynamics(plant: Plant, terms: MechanicalTerms, order: int) -> ZeroDynamics:
    if order == 0:
        return ZeroDynamics(None, [], "none", "no zero dynamics (sum of relative degrees = n)")
    mech = plant.mechanics
    nq, m = mech.nq, plant.m
    x0 = np.asarray(plant.operating_vector(), dtype=float)
    v = terms.evaluate(x0[None, :])
    if np.linalg.norm(v["k"][0]) > 1e-12:
        return ZeroDynamics(None, [], None, "the coordinates move at the operating point: not an equilibrium")
    u0, *_ = np.linalg.lstsq(v["B"][0], -v["F"][0], rcond=None)
    if np.linalg.norm(v["F"][0] + v["B"][0] @ u0) > 1e-9 * (1 + np.linalg.norm(v["F"][0])):
        return ZeroDynamics(None, [], None, "the operating point is not an equilibrium for any constant input; "
                                            "zero-dynamics linearization not stated")
    if plant.h.shape[0] != m:
        return ZeroDynamics([float(a) for a in u0], [], None,
                            "zero-dynamics linearization is stated for as many outputs as inputs")
    n = plant.n
    A_lin = np.zeros((n, n))
    for k in range(n):
        step = np.zeros(n)
        step[k] = _FD_STEP
        A_lin[:, k] = (terms.derivative(x0 + step, u0) - terms.derivative(x0 - step, u0)) / (2 * _FD_STEP)
    B_lin = np.zeros((n, m))
    B_lin[nq:, :] = np.linalg.solve(v["M"][0], v["B"][0])
    C_lin = np.zeros((m, n))
    C_lin[:, :nq] = v["H"][0]          # y = h(q): dh/dq (J is dy'/dv, which differs with kinematics)
    return classified_zero_dynamics([float(a) for a in u0], invariant_zeros(A_lin, B_lin, C_lin), order,
                                    "central differences", _CRITICAL_RE)
