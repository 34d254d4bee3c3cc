"""Analysis of an elastic-joint arm on its structure (``model._elastic``).

Link side ``M(q) q'' = F(q, q') + K (theta - q)``, motor side
``J theta'' = u - K (theta - q) - D theta'``, states (q, q', theta, theta'). For y = q,
y'' does not see u, neither does y''' (it sees theta'), and
``y'''' = M^-1 K J^-1 u + b(x)``: relative degree 4 per joint, decoupling matrix
``A = M^-1 K J^-1``, nonsingular wherever M is (M positive definite, K and J positive
diagonal), so the singular set is empty and, with 4 nq = n, there are no zero dynamics
(Spong, "Modeling and control of elastic joint robots", ASME J. Dyn. Sys. Meas. Control
109, 1987: the reduced model is input-state linearizable with the link angles as
linearizing outputs). The distributions D_k = span{ad_f^j g : j <= k} are spanned by
coordinate directions: D_0 by theta', D_1 adds theta, D_2 adds q' (through M^-1 K J^-1,
invertible), D_3 adds q; each is involutive. M^-1 is never formed symbolically: A is
evaluated at sample points with a linear solve.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
import sympy as sp

from linz_ros.analysis._common import show_matrix
from linz_ros.analysis._input_output import InputOutputResult, MatrixWording, ZeroDynamics, rank_verdict
from linz_ros.analysis._input_state import DistributionInfo, InputStateResult
from linz_ros.geometry import NumericContext, numeric_rank
from linz_ros.model import Plant, numeric_function

__all__ = ["ElasticTerms", "elastic_terms", "elastic_json", "ELASTIC_LAW_TEXT", "analyse_elastic_input_state", "analyse_elastic_input_output",
           "ELASTIC_DEGREE"]

#: The model in one line, for the report.
ELASTIC_LAW_TEXT = "M(q) q'' = F(q, q') + K (theta - q), J_m theta'' = u - K (theta - q) - D theta' (elastic joints)"
#: Relative degree of each link angle of an elastic-joint arm.
ELASTIC_DEGREE = 4
_STRUCTURE = MatrixWording("M^-1 K J^-1", "at every sample", structure=" (elastic joints, A = M^-1 K J^-1)")


@dataclass
class ElasticTerms:
    """Numeric M(q) and the diagonals K, J of an elastic-joint arm, for A = M^-1 K J^-1 at points."""

    plant: Plant
    _function: Callable

    def decoupling(self, points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """A = M^-1 K J^-1 at K points (nan where M is singular or not finite); b is not formed (nan).

        Parameters
        ----------
        points : numpy.ndarray
            K x n states.

        Returns
        -------
        A : numpy.ndarray
            K x nq x nq.
        b : numpy.ndarray
            K x nq of nan (b needs the motion's derivatives; the runtime forms it).
        """
        points = np.atleast_2d(np.asarray(points, dtype=float))
        count, nq = points.shape[0], self.plant.mechanics.nq
        params = [float(v) for v in self.plant.parameters.values()]
        with np.errstate(all="ignore"):
            raw = self._function(*points.T, *params)
        flat = np.stack([np.broadcast_to(np.asarray(v, dtype=float), (count,)) for v in raw], axis=1)
        M = flat[:, :nq * nq].reshape(count, nq, nq)
        gain = flat[:, nq * nq:nq * nq + nq] / flat[:, nq * nq + nq:]        # K J^-1
        A = np.full((count, nq, nq), np.nan)
        for k in np.flatnonzero(np.all(np.isfinite(flat), axis=1)):
            try:
                A[k] = np.linalg.solve(M[k], np.diag(gain[k]))
            except np.linalg.LinAlgError:
                continue
        return A, np.full((count, nq), np.nan)


def elastic_terms(plant: Plant) -> ElasticTerms:
    """Build the numeric evaluator of an elastic-joint arm's decoupling matrix.

    Parameters
    ----------
    plant : Plant
        With ``plant.mechanics.elastic`` set.

    Returns
    -------
    ElasticTerms
    """
    mech = plant.mechanics
    parts = list(mech.M) + list(mech.elastic.stiffness) + list(mech.elastic.motor_inertia)
    return ElasticTerms(plant, numeric_function(list(plant.states) + list(plant.parameters), parts))


def elastic_json(mech) -> dict:
    """The motor side of an elastic-joint arm for the JSON report.

    Parameters
    ----------
    mech : Mechanics
        With ``elastic`` set.

    Returns
    -------
    dict
        Motor angle and rate names and the diagonals of K, J_m and D as text.
    """
    e = mech.elastic
    return {"motor_angles": [s.name for s in e.motor_angles], "motor_rates": [s.name for s in e.motor_rates],
            "stiffness": [str(k) for k in e.stiffness], "motor_inertia": [str(j) for j in e.motor_inertia],
            "motor_damping": [str(d) for d in e.motor_damping]}


def analyse_elastic_input_state(plant: Plant) -> InputStateResult:
    """Input-state verdict of an elastic-joint arm: linearizable, the link angles as outputs.

    Parameters
    ----------
    plant : Plant

    Returns
    -------
    InputStateResult
    """
    nq = plant.mechanics.nq
    spans = ["span{d/dtheta'}", "adds d/dtheta", "adds d/dq' (through M^-1 K J^-1)", "adds d/dq: all of R^n"]
    distributions = [DistributionInfo(k, (k + 1) * nq, (k + 1) * nq, True, f"elastic-joint structure: {spans[k]}")
                     for k in range(ELASTIC_DEGREE)]
    distributions += [DistributionInfo(k, plant.n, plant.n, True, "contains D_3") for k in range(4, plant.n)]
    names = ", ".join(q.name for q in plant.mechanics.coordinates)
    return InputStateResult(True, "elastic-joint arm (M positive definite, K and J positive diagonal): "
                                  f"linearized with the link angles {names} as outputs",
                            distributions, controllability_indices=[ELASTIC_DEGREE] * nq,
                            linearizing_output_note=f"the link angles ({names}) are linearizing outputs "
                                                    f"(relative degree {ELASTIC_DEGREE} each)")


def analyse_elastic_input_output(plant: Plant, terms: ElasticTerms, ctx: NumericContext
                                 ) -> InputOutputResult | None:
    """Relative degree 4 per link angle, A = M^-1 K J^-1, an empty singular set and no zero dynamics.

    Parameters
    ----------
    plant : Plant
    terms : ElasticTerms
    ctx : NumericContext

    Returns
    -------
    InputOutputResult or None
        None when the plant has no outputs.
    """
    mech = plant.mechanics
    if plant.h.shape[0] == 0:
        return None
    chains = [[q, v] for q, v in zip(mech.coordinates, mech.velocities)]
    structure = {"form": "M(q)^-1 K J_m^-1", "J": show_matrix(sp.eye(mech.nq)),
                 "K": [str(k) for k in mech.elastic.stiffness], "J_m": [str(j) for j in mech.elastic.motor_inertia]}
    result = InputOutputResult(list(plant.output_names), None, [ELASTIC_DEGREE] * mech.nq, "", chains=chains,
                               decoupling_structure=structure)
    result.singular_set = sp.Integer(1)
    result.singular_set_note = "empty: det A = det K / (det M det J_m) > 0 (M positive definite, K, J_m positive)"
    A_samples, _ = terms.decoupling(ctx.samples)
    generic = max((numeric_rank(a) for a in A_samples if np.all(np.isfinite(a))), default=None)
    A_here, _ = terms.decoupling(np.array([plant.operating_vector()]))
    at_point = numeric_rank(A_here[0]) if np.all(np.isfinite(A_here[0])) else None
    return rank_verdict(result, plant, (generic, at_point), _STRUCTURE, _no_zero_dynamics)


def _no_zero_dynamics(order: int) -> ZeroDynamics:
    if order == 0:
        return ZeroDynamics(None, [], "none", "no zero dynamics (sum of relative degrees = n)")
    return ZeroDynamics(None, [], None, f"zero dynamics of order {order} not analysed")
