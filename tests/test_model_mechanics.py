"""Mechanical plant forms (mass-matrix, energy, serial arm): what they reduce to, and every refusal."""

import numpy as np
import pytest
import sympy as sp

from support import BUNDLED, REFERENCE
from linz_ros.errors import PlantFileError
from linz_ros.model import load_plant, numeric_function, plant_from_text

MASS_MATRIX = """\
plant: cart
coordinates: [p]
inputs: [force]
parameters: {m: 2.0, c: 0.5}
mass_matrix: [[m]]
forces: {p: -c*p_dot}
outputs: {y: p}
"""

FORMS = ["pick_arm_mass_matrix", "pick_arm_energy", "pick_arm_serial"]


def _accelerations(plant, x, u):
    """v' = M^-1 (F + B u) numerically (the test's own solve)."""
    mech = plant.mechanics
    args = list(plant.states) + list(plant.parameters)
    M, F, B = numeric_function(args, [list(mech.M), list(mech.F), list(mech.B)])(*x, *plant.parameters.values())
    nq = mech.nq
    M = np.array(M, float).reshape(nq, nq)
    B = np.array(B, float).reshape(nq, plant.m)
    return np.linalg.solve(M, np.array(F, float) + B @ u)


@pytest.mark.parametrize("name", FORMS)
def test_each_form_of_the_pick_arm_has_the_dynamics_of_its_explicit_file(name):
    # config/plants/pick_arm.yaml writes M^-1 out by hand (the textbook two-link arm);
    # the three mechanical forms must give the same accelerations everywhere
    explicit = load_plant(BUNDLED / "pick_arm.yaml")
    plant = load_plant(REFERENCE / f"{name}.yaml")
    rhs = numeric_function(list(explicit.states) + list(explicit.inputs) + list(explicit.parameters),
                           list(explicit.closed_form_dynamics()[2:, 0]))
    rng = np.random.default_rng(4)
    for _ in range(25):
        x, u = rng.uniform(-2, 2, 4), rng.uniform(-10, 10, 2)
        expected = np.array(rhs(*x, *u, *explicit.parameters.values()), dtype=float)
        assert np.allclose(_accelerations(plant, x, u), expected, rtol=1e-12, atol=1e-12)
    assert plant.f is None and plant.G is None
    assert plant.state_names == ["q1", "q2", "w1", "w2"]


def test_mass_matrix_form_defaults_velocity_names_joint_outputs_and_identity_input_map():
    plant = plant_from_text(MASS_MATRIX.replace("outputs: {y: p}\n", ""))
    mech = plant.mechanics
    assert plant.state_names == ["p", "p_dot"]
    assert plant.output_names == ("y_p",) and plant.h[0] == mech.coordinates[0]
    assert mech.B == sp.eye(1) and mech.form == "mass_matrix"
    m, c = list(plant.parameters)
    assert mech.F[0] == -c * mech.velocities[0] and mech.M[0, 0] == m


def test_energy_form_gives_the_christoffel_coriolis_terms_of_a_pendulum_on_a_cart():
    # T = (M + m) x'^2 / 2 + m l x' th' cos th + m l^2 th'^2 / 2, V = -m g l cos th
    # (cart-pendulum, Spong, Hutchinson and Vidyasagar, Robot Modeling and Control, ch. 7 exercises):
    # x: (M + m) x'' + m l cos th th'' - m l sin th th'^2 = F
    plant = plant_from_text("""
plant: cart_pendulum
coordinates: [x, th]
inputs: [push, twist]
parameters: {M: 1.5, m: 0.4, l: 0.6, g: 9.81}
kinetic_energy: (M + m)*x_dot**2/2 + m*l*x_dot*th_dot*cos(th) + m*l**2*th_dot**2/2
potential_energy: -m*g*l*cos(th)
""")
    M_, m, l, g = list(plant.parameters)
    x, th, xd, thd = plant.states
    mech = plant.mechanics
    assert sp.simplify(mech.M - sp.Matrix([[M_ + m, m * l * sp.cos(th)], [m * l * sp.cos(th), m * l ** 2]])) == sp.zeros(2)
    assert sp.simplify(mech.F - sp.Matrix([m * l * sp.sin(th) * thd ** 2, -m * g * l * sp.sin(th)])) == sp.zeros(2, 1)


def test_serial_arm_tool_point_names_and_dh_table_are_kept():
    plant = load_plant(REFERENCE / "pick_arm_serial.yaml")
    mech = plant.mechanics
    assert len(mech.links) == 2 and mech.form == "serial_arm"
    l1, l2 = [s for s in plant.parameters if s.name in ("l1", "l2")]
    q1, q2 = mech.coordinates
    tool_x = l1 * sp.cos(q1) + l2 * sp.cos(q1 + q2)
    assert sp.simplify(plant.h[0] - tool_x) == 0


def test_six_joint_arm_loads_quickly_enough_to_be_analysed():
    plant = load_plant(BUNDLED / "loader_arm.yaml")
    assert plant.mechanics.nq == 6 and plant.m == 6 and len(plant.output_names) == 6
    assert plant.mechanics.M.shape == (6, 6) and plant.mechanics.F.shape == (6, 1)


def test_kinematics_of_a_vessel_are_the_coordinate_rates():
    plant = load_plant(REFERENCE / "survey_boat_mass_matrix.yaml")
    north, east, heading, surge, sway, yaw = plant.states
    rates = plant.mechanics.coordinate_rates
    assert rates[2] == yaw and sp.simplify(rates[0] - (surge * sp.cos(heading) - sway * sp.sin(heading))) == 0


@pytest.mark.parametrize("text, field, problem", [
    (MASS_MATRIX.replace("mass_matrix: [[m]]", "mass_matrix: [[-m]]"), "mass_matrix",
     "not positive definite at p=0"),
    ("""plant: two
coordinates: [a, b]
inputs: [u1, u2]
mass_matrix: [[2, 1], [0, 2]]
""", "mass_matrix", "not symmetric at a=0, b=0: M[0][1] = 1 but M[1][0] = 0"),
    ("""plant: two
coordinates: [a, b]
inputs: [u1, u2]
mass_matrix: [[1, 0], [0, cos(b)]]
envelope: {b: [0, 3]}
""", "mass_matrix", "not positive definite at a="),
    (MASS_MATRIX.replace("[[m]]", "[[m + p_dot**2]]"), "mass_matrix[0][0]", "depends on p_dot"),
    (MASS_MATRIX.replace("[[m]]", "[[m, 1]]"), "mass_matrix[0]", "expected a row of 1 expression(s)"),
    (MASS_MATRIX.replace("{p: -c*p_dot}", "{p: -c*p_dot + force}"), "forces.p", "inputs enter through input_map"),
    (MASS_MATRIX.replace("{p: -c*p_dot}", "{r: 1}"), "forces.r", "'r' is not a coordinate"),
    (MASS_MATRIX.replace("outputs: {y: p}", "outputs: {y: p_dot}"), "outputs.y", "depends on velocity p_dot"),
    (MASS_MATRIX.replace("inputs: [force]", "inputs: [f1, f2]"), "input_map", "required when the inputs (2)"),
    (MASS_MATRIX + "states: [p]\n", "states", "give coordinates"),
    (MASS_MATRIX + "dynamics: {p: 1}\n", "mass_matrix", "give one model form; dynamics is given as well"),
    (MASS_MATRIX.replace("coordinates: [p]\n", ""), "coordinates", "missing (required with mass_matrix)"),
    (MASS_MATRIX + "velocities: [v1, v2]\n", "velocities", "one velocity per coordinate (1), got 2"),
    (MASS_MATRIX + "potential_energy: p**2\n", "potential_energy", "belongs to the energy form"),
    ("""plant: p
states: [x]
inputs: [u]
dynamics: {x: u}
forces: {x: 1}
""", "forces", "belongs to the mechanical forms"),
    ("""plant: p
coordinates: [x]
inputs: [u]
kinetic_energy: x_dot**3
""", "kinetic_energy", "not quadratic in the velocities"),
    ("""plant: p
coordinates: [x]
inputs: [u]
kinetic_energy: x_dot**2/2 + x*x_dot
""", "kinetic_energy", "not quadratic in the velocities"),
    ("""plant: p
coordinates: [x]
inputs: [u]
kinetic_energy: x_dot**2/2
kinematics: {x: x_dot}
""", "kinematics", "only the mass-matrix form takes kinematics"),
    (MASS_MATRIX + "kinematics: {}\n", "kinematics", "missing an entry for coordinate(s) p"),
    ("""plant: p
inputs: [u]
""", "dynamics", "give the model as dynamics"),
])
def test_mechanical_plant_mistakes_are_named(text, field, problem):
    with pytest.raises(PlantFileError) as caught:
        plant_from_text(text, "arm.yaml")
    assert caught.value.field == field
    assert problem in caught.value.problem
    assert "\n" not in str(caught.value)


ARM = """\
plant: arm
coordinates: [q1]
inputs: [tau]
parameters: {l: 0.5}
serial_arm:
  joints:
    - {type: revolute, a: l, alpha: 0, d: 0, theta: 0, mass: 1.2, com: [0, 0, 0], inertia: [0, 0, 0.01]}
"""


@pytest.mark.parametrize("replace, add, field, problem", [
    ("type: revolute", "type: ball", "serial_arm.joints[0].type", "expected revolute or prismatic"),
    ("mass: 1.2", "mass: -1.2", "serial_arm.joints[0].mass", "must be positive"),
    ("a: l", "a: q1", "serial_arm.joints[0].a", "may not appear here"),
    ("inertia: [0, 0, 0.01]", "inertia: [0, 0]", "serial_arm.joints[0].inertia", "expected [ixx, iyy, izz]"),
    ("com: [0, 0, 0]", "com: [0, 0]", "serial_arm.joints[0].com", "expected [x, y, z]"),
    ("theta: 0,", "theta: 0, spin: 1,", "serial_arm.joints[0].spin", "unknown key"),
    ("coordinates: [q1]", "coordinates: [q1, q2]", "serial_arm.joints", "1 joint(s) but 2 coordinate(s)"),
    (", mass: 1.2", "", "serial_arm.joints[0].mass", "missing (required)"),
])
def test_serial_arm_mistakes_are_named(replace, add, field, problem):
    with pytest.raises(PlantFileError) as caught:
        plant_from_text(ARM.replace(replace, add), "arm.yaml")
    assert (caught.value.field, caught.value.problem.startswith(problem) or problem in caught.value.problem) == (field, True)


def test_a_zero_inertia_serial_arm_is_refused_as_not_positive_definite():
    # one massless direction: a point mass on the joint axis has no rotational inertia
    text = ARM.replace("a: l", "a: 0").replace("inertia: [0, 0, 0.01]", "inertia: [0, 0, 0]")
    with pytest.raises(PlantFileError) as caught:
        plant_from_text(text, "arm.yaml")
    assert caught.value.field == "serial_arm" and "not positive definite at q1=0" in caught.value.problem


def test_vessel_coriolis_terms_do_no_work():
    # C(v) = C_RB(v) + C_A(v) is skew-symmetric (Fossen, Handbook of Marine Craft Hydrodynamics and
    # Motion Control, 2011, property 6.2, from memory): with the damping set to zero, v^T F = 0
    plant = load_plant(BUNDLED / "survey_boat_thrusters.yaml")
    values = {s.name: v for s, v in plant.parameters.items()}
    for name in ("Xu", "Yv", "Yr", "Nv", "Nr"):
        values[name] = 0.0
    F = numeric_function(list(plant.states) + list(plant.parameters), list(plant.mechanics.F))
    rng = np.random.default_rng(8)
    for _ in range(20):
        x = rng.uniform(-1.5, 1.5, 6)
        forces = np.array(F(*x, *values.values()), dtype=float)
        assert abs(x[3:] @ forces) < 1e-12 * (1 + np.max(np.abs(forces)))
        assert np.max(np.abs(forces)) > 1e-3
    # and with damping, the damping dissipates: v^T F < 0
    nominal = np.array(F(*[0.0, 0.0, 0.3, 0.8, 0.2, -0.3], *plant.parameters.values()), dtype=float)
    assert np.array([0.8, 0.2, -0.3]) @ nominal < 0


# -- elastic joints (model._elastic) ----------------------------------------------------------
ELASTIC = (REFERENCE / "elastic_joint.yaml").read_text()


def test_elastic_joint_has_four_states_per_joint_zero_link_input_and_the_spring():
    plant = plant_from_text(ELASTIC)
    assert plant.state_names == ["q", "w", "th", "thd"] and plant.output_names == ("y_q",)
    mech = plant.mechanics
    assert mech.B == sp.zeros(1, 1) and mech.elastic.stiffness == (sp.Symbol("k", real=True),)
    assert mech.elastic.motor_damping == (0,)
    assert sp.simplify(mech.elastic.spring(mech.coordinates)[0] - sp.sympify("k*(th - q)", locals={
        "k": sp.Symbol("k", real=True), "th": sp.Symbol("th", real=True), "q": sp.Symbol("q", real=True)})) == 0


def test_bundled_elastic_arm_defaults_units_of_its_motors_like_its_joints():
    plant = load_plant(BUNDLED / "flex_loader_arm.yaml")
    assert plant.n == 24 and plant.m == 6
    assert plant.signal_units["th3"] == "rad" and plant.signal_units["thd6"] == "rad/s"
    assert plant.signal_units["tau1"] == "N m"


def test_elastic_default_motor_names():
    text = ELASTIC.replace("motor_angles: [th], motor_rates: [thd], ", "").replace("th: [-1.6, 1.6], thd: [-3, 3]",
                                                                                  "q_motor: [-1.6, 1.6]")
    assert plant_from_text(text).state_names == ["q", "w", "q_motor", "q_motor_dot"]


@pytest.mark.parametrize("old, new, words", [
    ("stiffness: [k], ", "", "elastic_joints.stiffness: missing"),
    ("stiffness: [k]", "stiffness: [k, k]", "elastic_joints.stiffness: expected a list of 1 expressions"),
    ("stiffness: [k]", "stiffness: [-k]", r"elastic_joints.stiffness\[0\]: must be positive, got -31"),
    ("motor_inertia: [J]", "motor_inertia: [0]", r"elastic_joints.motor_inertia\[0\]: must be positive"),
    ("motor_inertia: [J]}", "motor_inertia: [J], motor_damping: [-1]}", r"motor_damping\[0\]: must be not negative"),
    ("stiffness: [k]", "stiffness: [k*q]", r"elastic_joints.stiffness\[0\]: depends on q"),
    ("stiffness: [k]", "stiffness: [k], gear: 3", "elastic_joints.gear: unknown key"),
    ("motor_angles: [th]", "motor_angles: [th, th2]", "elastic_joints.motor_angles: expected a list of 1 names"),
    ("motor_angles: [th]", "motor_angles: [w]", r"motor_angles\[0\]: duplicate name 'w'"),
    ("design:", "outputs: {y: q}\ndesign:", "outputs: not taken with elastic_joints"),
    ("design:", "input_map: [[1]]\ndesign:", "input_map: not taken with elastic_joints"),
    ("inputs: [u]", "inputs: [u, u2]", "inputs: an elastic-joint arm takes one motor torque per joint"),
    ("forces: {q: -MgL*sin(q)}", "forces: {q: -MgL*sin(q) + th}", "mass_matrix: depends on motor state th"),
    ("elastic_joints: {", "elastic_joints: [", "elastic_joints"),
    ("stiffness: [k]", "stiffness: [sqrt(-k)]", r"elastic_joints.stiffness\[0\]: must be positive, got a complex"),
    ("motor_inertia: [J]}", "motor_inertia: [J], motor_damping: [sqrt(-1)]}",
     r"motor_damping\[0\]: must be not negative, got a complex"),
])
def test_elastic_section_refuses_bad_input_with_one_line(old, new, words):
    text = ELASTIC.replace(old, new)
    if old == "elastic_joints: {":
        text = text.replace("motor_inertia: [J]}", "motor_inertia: [J]]")
    assert text != ELASTIC
    with pytest.raises(PlantFileError, match=words) as err:
        plant_from_text(text, "arm.yaml")
    assert "\n" not in str(err.value) and str(err.value).startswith("arm.yaml")


def test_an_empty_elastic_section_is_refused_not_ignored():
    start = ELASTIC.index("elastic_joints:")
    end = ELASTIC.index("\n", start)
    text = ELASTIC[:start] + "elastic_joints:" + ELASTIC[end:]
    with pytest.raises(PlantFileError, match="elastic_joints: expected a mapping with stiffness and motor_inertia"):
        plant_from_text(text, "arm.yaml")


def test_elastic_section_belongs_to_the_mechanical_forms():
    text = "plant: p\nstates: [x]\ninputs: [u]\ndynamics: {x: u}\nelastic_joints: {stiffness: [1]}\n"
    with pytest.raises(PlantFileError, match="elastic_joints: belongs to the mechanical forms"):
        plant_from_text(text)
