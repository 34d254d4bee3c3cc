"""The numeric plant: f + G u from the artifact, RK4 of order four, RK45, mismatch."""

import math

import numpy as np
import pytest

from support import MINIMAL, built_artifact
from linz_ros.errors import ConfigError
from linz_ros.runtime import NumericPlant, mismatched_parameters, parse_assignments

_OSCILLATOR = MINIMAL.replace("-k*sin(x1) + u", "-k*x1 + u") + "outputs: {y: x1}\n"


def test_derivative_is_f_plus_g_u():
    plant = NumericPlant(built_artifact(MINIMAL + "outputs: {y: x1}\n"))
    assert plant.derivative([0.3, -0.2], [0.5]) == pytest.approx([-0.2, -2.0 * math.sin(0.3) + 0.5])


def test_rk4_is_fourth_order_and_rk45_agrees():
    # x1'' = -k x1 with k = 2: x1(t) = cos(sqrt(2) t) from (1, 0)
    plant = NumericPlant(built_artifact(_OSCILLATOR))
    exact = math.cos(math.sqrt(2.0) * 1.0)
    errors = [abs(plant.rk4([1.0, 0.0], [0.0], 1.0 / steps, steps)[0] - exact) for steps in (20, 40)]
    assert 14 < errors[0] / errors[1] < 18              # halving h divides the error by 2^4
    assert plant.adaptive([1.0, 0.0], [0.0], 1.0)[0] == pytest.approx(exact, abs=1e-8)


def test_mismatch_changes_only_the_named_parameters_and_all_changes_every_one():
    artifact = built_artifact(MINIMAL + "outputs: {y: x1}\n")
    assert mismatched_parameters(artifact, {"k": 10.0}) == pytest.approx([2.2])
    assert mismatched_parameters(artifact, {"all": -50.0}) == pytest.approx([1.0])
    with pytest.raises(ConfigError, match="--mismatch: 'm' is not a parameter of demo \\(k\\)"):
        mismatched_parameters(artifact, {"m": 5.0})
    for change in (-100.0, -150.0):                    # zeroed or flipped: another machine
        with pytest.raises(ConfigError, match="a change of -100 % or less zeroes the parameter"):
            mismatched_parameters(artifact, {"k": change})


def test_parse_assignments_errors_are_one_line():
    assert parse_assignments(["a=1,b=2", "c=3e-2"], "--x") == {"a": 1.0, "b": 2.0, "c": 0.03}
    for bad, words in (["a"], "expected name=value"), (["a=x"], "a: expected a number"), (["a=inf"], "finite"):
        with pytest.raises(ConfigError, match=words):
            parse_assignments(bad, "--x")


def test_a_mechanical_artifact_integrates_like_the_explicit_one():
    from support import BUNDLED, REFERENCE

    explicit = NumericPlant(built_artifact(BUNDLED / "survey_boat.yaml"))
    vectorial = NumericPlant(built_artifact(REFERENCE / "survey_boat_mass_matrix.yaml"))
    rng = np.random.default_rng(6)
    for _ in range(20):
        x, u = list(rng.uniform(-1, 1, 6)), list(rng.uniform(-20, 20, 2))
        assert vectorial.derivative(x, u) == pytest.approx(explicit.derivative(x, u), rel=1e-12, abs=1e-12)
    x0 = [0.0, 0.0, 0.3, 1.0, 0.1, 0.2]
    assert vectorial.rk4(x0, [30.0, 2.0], 0.01, 100) == pytest.approx(explicit.rk4(x0, [30.0, 2.0], 0.01, 100),
                                                                      rel=1e-10)


def test_a_name_given_twice_is_refused_not_overwritten():
    """``--mismatch k=1 --mismatch k=2`` silently kept the last value."""
    with pytest.raises(ConfigError, match=r"^--mismatch: k given twice$"):
        parse_assignments(["k=1", "k=2"], "--mismatch")
    with pytest.raises(ConfigError, match=r"^--initial: x1 given twice$"):
        parse_assignments(["x1=0.1,x1=0.2"], "--initial")
