"""Analysis of mechanical plants on their structure, against the explicit forms of the same plants."""

import json

import numpy as np
import pytest
import sympy as sp

from support import BUNDLED, REFERENCE
from linz_ros.analysis import analyse, mechanical_terms, render_text
from linz_ros.model import load_plant, plant_from_text


@pytest.fixture(scope="module")
def explicit_pick_arm():
    return analyse(load_plant(BUNDLED / "pick_arm.yaml"), samples=256)


@pytest.mark.parametrize("name", ["pick_arm_mass_matrix", "pick_arm_energy", "pick_arm_serial"])
def test_each_form_of_the_pick_arm_is_analysed_like_the_explicit_file(name, explicit_pick_arm):
    report = analyse(load_plant(REFERENCE / f"{name}.yaml"), samples=256)
    io, ref = report.input_output, explicit_pick_arm.input_output
    assert io.relative_degree == ref.relative_degree == [2, 2]
    assert sp.simplify(io.singular_set - ref.singular_set) == 0 and io.singular_set == sp.sin(report.plant.states[1])
    assert io.zero_dynamics_order == ref.zero_dynamics_order == 0
    assert report.input_state.linearizable is True and report.input_state.controllability_indices == [2, 2]
    assert report.envelope.min_sigma == pytest.approx(explicit_pick_arm.envelope.min_sigma, rel=1e-9)
    assert report.envelope.max_condition == pytest.approx(explicit_pick_arm.envelope.max_condition, rel=1e-9)
    assert io.decoupling_matrix is None and io.decoupling_structure["form"] == "J(q) M(q)^-1 B(q)"
    assert io.reason == ("relative degree [2, 2] at the operating point (mechanical structure, A = J M^-1 B); "
                         "zero dynamics of order 0")


def test_decoupling_matrix_numbers_equal_the_symbolic_one_of_the_explicit_file():
    explicit = load_plant(BUNDLED / "pick_arm.yaml")
    A_explicit = analyse(explicit, samples=8).input_output.decoupling_matrix
    evaluate = sp.lambdify(list(explicit.states), list(A_explicit.subs(explicit.nominal)))
    terms = mechanical_terms(load_plant(REFERENCE / "pick_arm_serial.yaml"))
    points = np.random.default_rng(1).uniform(-1.5, 1.5, (20, 4))
    A, _ = terms.decoupling(points)
    expected = np.array([np.reshape(evaluate(*p), (2, 2)) for p in points], dtype=float)
    assert np.allclose(A, expected, rtol=1e-11, atol=1e-13)


def test_underactuated_vessel_matches_the_explicit_zero_dynamics_and_envelope():
    explicit = analyse(load_plant(BUNDLED / "survey_boat.yaml"), samples=256)
    report = analyse(load_plant(REFERENCE / "survey_boat_mass_matrix.yaml"), samples=256)
    io, ref = report.input_output, explicit.input_output
    assert io.relative_degree == ref.relative_degree == [2, 2]
    assert io.zero_dynamics_order == ref.zero_dynamics_order == 2
    got = sorted((complex(z) for z in io.zero_dynamics.eigenvalues), key=lambda z: (z.real, z.imag))
    expected = sorted((complex(z) for z in ref.zero_dynamics.eigenvalues), key=lambda z: (z.real, z.imag))
    assert np.allclose(got, expected, atol=1e-6)               # central differences against exact
    assert io.zero_dynamics.stability == ref.zero_dynamics.stability == "critical"
    assert report.envelope.min_sigma == pytest.approx(explicit.envelope.min_sigma, rel=1e-9)
    assert report.input_state.linearizable is None and "underactuated" in report.input_state.reason
    assert io.decoupling_structure["form"] == "J(q) K(q) M(q)^-1 B(q)"


def test_fully_actuated_vessel_has_no_singular_set_and_no_zero_dynamics():
    report = analyse(load_plant(BUNDLED / "survey_boat_thrusters.yaml"), samples=128)
    assert report.input_state.linearizable is True
    assert report.input_output.relative_degree == [2, 2, 2]
    assert report.input_output.singular_set == 1                 # det R(psi) det B: a constant
    document = json.loads(json.dumps(report.to_json()))
    assert document["mechanics"]["form"] == "mass_matrix" and document["drift"] is None
    assert document["input_output"]["singular_set_empty"] is True


def test_six_joint_arm_is_analysed_on_its_structure():
    report = analyse(load_plant(BUNDLED / "loader_arm.yaml"), samples=64)
    io = report.input_output
    assert io.relative_degree == [2] * 6 and io.singular_set == 1 and io.zero_dynamics_order == 0
    assert report.envelope.min_sigma > 0
    text = render_text(report)
    assert text.splitlines()[3] == "VERDICT" and "serial arm (DH table)" in text
    assert max(len(line) for line in text.splitlines()) < 400      # big expressions are not printed


def test_a_tool_point_on_the_joint_axis_has_a_singular_set_on_the_arm():
    # tool point of the two-link arm: det J = l1 l2 sin q2, the elbow stretched or folded
    report = analyse(load_plant(REFERENCE / "pick_arm_mass_matrix.yaml"), samples=64)
    q2 = report.plant.states[1]
    assert report.input_output.singular_set == sp.sin(q2)


def test_an_output_that_no_input_moves_has_no_relative_degree():
    plant = plant_from_text("""
plant: p
coordinates: [a, b]
inputs: [u]
mass_matrix: [[1, 0], [0, 1]]
input_map: [[1], [0]]
outputs: {y: b}
""")
    io = analyse(plant, samples=8).input_output
    assert io.relative_degree is None and io.relative_degree_generic == [None]
    assert "zero row" in io.reason


def test_vessel_terms_separate_the_output_jacobian_from_the_velocity_factor():
    # y = h(q) with q' = R(psi) v: H = dh/dq is what linearizes the output map, J = dy'/dv = H R(psi)
    # is what multiplies M^-1 B; away from heading 0 they differ
    plant = load_plant(REFERENCE / "survey_boat_mass_matrix.yaml")
    terms = mechanical_terms(plant)
    x = np.array([[0.4, -0.2, 0.7, 0.5, 0.1, -0.2]])
    v = terms.evaluate(x)
    psi = 0.7
    H = np.array([[1.0, 0.0, -1.5 * np.sin(psi)], [0.0, 1.0, 1.5 * np.cos(psi)]])
    R = np.array([[np.cos(psi), -np.sin(psi), 0.0], [np.sin(psi), np.cos(psi), 0.0], [0.0, 0.0, 1.0]])
    np.testing.assert_allclose(v["H"][0], H, atol=1e-14)
    np.testing.assert_allclose(v["J"][0], H @ R, atol=1e-14)
    assert np.max(np.abs(H - H @ R)) > 0.1


# -- elastic joints (analysis._elastic) -----------------------------------------------------
def test_single_elastic_joint_has_relative_degree_4_and_the_published_decoupling():
    plant = load_plant(REFERENCE / "elastic_joint.yaml")
    report = analyse(plant, samples=32)
    io = report.input_output
    assert io.relative_degree == [4] and io.zero_dynamics_order == 0
    assert io.to_json()["singular_set_empty"] is True
    assert report.input_state.linearizable is True and report.input_state.controllability_indices == [4]
    # Spong 1987 (one-link flexible joint): L_g L_f^3 h = k / (I J) for h = q
    I, k, J = 0.031, 31.0, 0.004
    A, _ = report.mechanical_terms.decoupling(np.array([[0.3, -1.0, 0.2, 2.0]]))
    assert A[0, 0, 0] == pytest.approx(k / (I * J), rel=1e-12)


def test_six_joint_elastic_arm_on_its_structure():
    report = analyse(load_plant(BUNDLED / "flex_loader_arm.yaml"), samples=32)
    io = report.input_output
    assert io.relative_degree == [4] * 6 and io.zero_dynamics_order == 0
    assert io.zero_dynamics.stability == "none" and io.singular_set == 1
    assert io.decoupling_structure["form"] == "M(q)^-1 K J_m^-1"
    assert [d.rank for d in report.input_state.distributions[:4]] == [6, 12, 18, 24]
    data = report.to_json()
    assert data["mechanics"]["elastic"]["stiffness"][0] == "k_base"
    assert "elastic joints" in render_text(report)
