"""z = T(x) and its inverse at runtime: closed form, warm-started Newton, and failure."""

import math

import numpy as np
import pytest

from support import BUNDLED, REFERENCE, built_artifact
from linz_ros.errors import ConfigError
from linz_ros.runtime import Transform
from linz_ros.synthesis import DesignOptions


def test_khalil_transform_and_its_inverse():
    artifact = built_artifact(REFERENCE / "khalil_two_state.yaml")
    transform = Transform(artifact)
    assert transform.closed_form
    z = transform.forward([0.3, 0.4])
    assert z == pytest.approx([0.3, 1.5 * math.sin(0.4)])          # Khalil, ch. 13: z2 = a sin x2
    assert transform.inverse(z).x == pytest.approx([0.3, 0.4])
    newton = transform.inverse(z, guess=[0.0, 0.0], newton=True)
    assert newton.converged and newton.x == pytest.approx([0.3, 0.4], abs=1e-12)


def test_newton_warm_start_converges_in_few_iterations_along_a_path():
    transform = Transform(built_artifact(REFERENCE / "flexible_joint.yaml", DesignOptions(linearize="state")))
    x = np.array([0.1, 0.0, 0.1, 0.0])
    iterations = []
    for k in range(50):
        x = x + np.array([0.01, 0.02, -0.01, 0.03])
        result = transform.inverse(transform.forward(x), newton=True)
        assert result.converged and np.allclose(result.x, x, atol=1e-10)
        iterations.append(result.iterations)
    assert max(iterations[1:]) <= 3


def test_newton_reports_failure_outside_the_domain_instead_of_raising():
    transform = Transform(built_artifact(REFERENCE / "khalil_two_state.yaml"))
    result = transform.inverse([0.0, 5.0], guess=[0.0, 0.0], newton=True)     # a sin x2 = 5 > a: no solution
    assert not result.converged and result.method == "newton"
    closed = transform.inverse([0.0, 5.0])                                  # asin(5/1.5) is not defined
    assert not closed.converged


def test_an_input_output_artifact_has_no_transform():
    with pytest.raises(ConfigError, match="carries no transform"):
        Transform(built_artifact(BUNDLED / "mast_camera.yaml"))
