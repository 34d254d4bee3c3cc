"""Serial-arm plants against Pinocchio (the ``pin`` package), an independent rigid-body library."""

import numpy as np
import pytest

from support import BUNDLED, REFERENCE
from linz_ros.crosscheck import pinocchio_available, pinocchio_reference
from linz_ros.errors import ConfigError
from linz_ros.model import load_plant, numeric_function, plant_from_text
from test_model_serial_arm import POLAR


def _inverse_dynamics_residual(plant, samples: int = 25, seed: int = 0) -> tuple[float, float]:
    """Worst relative difference of M q'' - F against Pinocchio's RNEA (+ friction), and of M against CRBA."""
    mech = plant.mechanics
    reference = pinocchio_reference(plant)
    evaluate = numeric_function(list(plant.states) + list(plant.parameters), [list(mech.M), list(mech.F)])
    rng = np.random.default_rng(seed)
    worst_tau = worst_m = 0.0
    for _ in range(samples):
        q, qd, qdd = rng.uniform(-2, 2, mech.nq), rng.uniform(-2, 2, mech.nq), rng.uniform(-4, 4, mech.nq)
        M, F = evaluate(*q, *qd, *plant.parameters.values())
        M = np.reshape(np.array(M, float), (mech.nq, mech.nq))
        tau = M @ qdd - np.array(F, float)
        expected = reference.inverse_dynamics(q, qd, qdd)
        worst_tau = max(worst_tau, float(np.max(np.abs(tau - expected)) / np.max(np.abs(expected))))
        worst_m = max(worst_m, float(np.max(np.abs(M - reference.mass_matrix(q))) / np.max(np.abs(M))))
    return worst_tau, worst_m


def test_pinocchio_is_installed_with_the_test_dependencies():
    assert pinocchio_available()


@pytest.mark.parametrize("path", [BUNDLED / "loader_arm.yaml", REFERENCE / "pick_arm_serial.yaml"],
                         ids=lambda p: p.stem)
def test_inverse_dynamics_of_a_serial_arm_match_pinocchio(path):
    worst_tau, worst_m = _inverse_dynamics_residual(load_plant(path))
    assert worst_tau < 1e-12 and worst_m < 1e-12


def test_a_prismatic_joint_matches_pinocchio():
    worst_tau, worst_m = _inverse_dynamics_residual(plant_from_text(POLAR))
    assert worst_tau < 1e-12 and worst_m < 1e-12


def test_a_wrong_model_would_be_caught():
    # the same six-joint arm with one link heavier in the reference only: the check must see it
    plant = load_plant(BUNDLED / "loader_arm.yaml")
    heavier = [v * (1.1 if s.name == "m3" else 1.0) for s, v in plant.parameters.items()]
    reference = pinocchio_reference(plant, heavier)
    mech = plant.mechanics
    evaluate = numeric_function(list(plant.states) + list(plant.parameters), [list(mech.M), list(mech.F)])
    q, qd, qdd = np.full(6, 0.3), np.full(6, 0.5), np.full(6, 1.0)
    M, F = evaluate(*q, *qd, *plant.parameters.values())
    tau = np.reshape(np.array(M, float), (6, 6)) @ qdd - np.array(F, float)
    assert np.max(np.abs(tau - reference.inverse_dynamics(q, qd, qdd))) > 0.1


def test_only_serial_arms_have_a_reference():
    with pytest.raises(ConfigError, match="not in serial-arm form"):
        pinocchio_reference(load_plant(REFERENCE / "pick_arm_mass_matrix.yaml"))
