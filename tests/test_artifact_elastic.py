"""The elastic-joint law's derivatives along the motion (artifact.elastic, jet2 backend)."""

import numpy as np
import pytest

from linz_ros.artifact import taylor
from linz_ros.geometry._jets import JetProgram
from linz_ros.model import load_plant
from support import BUNDLED, REFERENCE, built_artifact


def _relative(got, expected):
    return float(np.max(np.abs(got - expected)) / max(np.max(np.abs(expected)), 1e-300))


@pytest.mark.parametrize("path", [REFERENCE / "elastic_joint.yaml", BUNDLED / "flex_loader_arm.yaml"])
def test_derivatives_along_the_motion_equal_numpy_jets_of_the_plant_expressions(path):
    """M', M'', F', F'' from the artifact's text (scalar jet2) against numpy jets (artifact.taylor) of the
    plant's own sympy M and F (geometry.JetProgram): two independent walks, equal to rounding."""
    plant = load_plant(path)
    mech, nq = plant.mechanics, plant.mechanics.nq
    reference = JetProgram(list(mech.M) + list(mech.F), plant.states, plant.nominal)
    artifact = built_artifact(path)
    law, p = artifact.elastic_law(), artifact.nominal_parameters.tolist()
    rng = np.random.default_rng(11)
    for _ in range(5):
        q, qd, thd = rng.uniform(-1.5, 1.5, nq), rng.uniform(-2, 2, nq), rng.uniform(-2, 2, nq)
        th = q + rng.uniform(-0.05, 0.05, nq)
        x = np.concatenate([q, qd, th, thd]).tolist()
        terms = law.terms(x, p)
        qdd, qddd = terms["qdd"], terms["qddd"]
        curve = ([np.array([q[i], qd[i], qdd[i] / 2]) for i in range(nq)]
                 + [np.array([qd[i], qdd[i], qddd[i] / 2]) for i in range(nq)]
                 + [taylor.constant(v, np.zeros(3)) for v in np.concatenate([th, thd])])
        jets = [taylor.constant(v, np.zeros(3)) if np.ndim(v) == 0 else v for v in reference(curve)]
        M, F = np.array(jets[:nq * nq]).reshape(nq, nq, 3), np.array(jets[nq * nq:])
        assert _relative(terms["M1"], M[..., 1]) < 1e-12 and _relative(terms["M2"], 2 * M[..., 2]) < 1e-12
        assert _relative(terms["F1"], F[:, 1]) < 1e-12 and _relative(terms["F2"], 2 * F[:, 2]) < 1e-12
        # q'' and q''' from the link equation and its first derivative with the reference's M, F, M', F'
        K = np.array(terms["values"][law.slots["stiffness"].offset:][:nq])
        assert _relative(qdd, np.linalg.solve(M[..., 0], F[:, 0] + K * (th - q))) < 1e-12
        assert _relative(qddd, np.linalg.solve(M[..., 0], K * (thd - qd) + F[:, 1] - M[..., 1] @ qdd)) < 1e-12
        # the extended values: the law program's own values first, then A, b, the chains
        assert np.allclose(law(x, p)[:artifact.programs["law"].size], artifact.programs["law"](x, p),
                           rtol=1e-13, atol=0)
