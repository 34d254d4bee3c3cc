"""Serial arms from DH tables against forms derived independently (textbook, Lagrange, energy)."""

import numpy as np
import sympy as sp
import sympy.physics.mechanics as me

from support import BUNDLED, REFERENCE
from linz_ros.model import load_plant, numeric_function, plant_from_text
from linz_ros.model._serial_arm import Link, arm_model


def _numeric(plant, *matrices):
    return numeric_function(list(plant.states) + list(plant.parameters), [list(m) for m in matrices])


def test_two_link_planar_arm_matches_the_textbook_mass_matrix_coriolis_and_gravity():
    # Spong, Hutchinson and Vidyasagar, Robot Modeling and Control (2006), sec. 7.4.1,
    # two-link planar elbow arm: d11, d12, d22, h = -m2 l1 lc2 sin q2, phi1, phi2
    plant = load_plant(REFERENCE / "pick_arm_serial.yaml")
    values = {s.name: v for s, v in plant.parameters.items()}
    l1, lc1, lc2 = values["l1"], values["lc1"], values["lc2"]
    m1, m2, I1, I2, g = values["m1"], values["m2"], values["I1"], values["I2"], values["g0"]
    evaluate = _numeric(plant, plant.mechanics.M, plant.mechanics.F)
    rng = np.random.default_rng(12)
    for _ in range(20):
        q1, q2, w1, w2 = rng.uniform(-3, 3, 4)
        d11 = m1 * lc1 ** 2 + m2 * (l1 ** 2 + lc2 ** 2 + 2 * l1 * lc2 * np.cos(q2)) + I1 + I2
        d12 = m2 * (lc2 ** 2 + l1 * lc2 * np.cos(q2)) + I2
        d22 = m2 * lc2 ** 2 + I2
        h = -m2 * l1 * lc2 * np.sin(q2)
        phi1 = (m1 * lc1 + m2 * l1) * g * np.cos(q1) + m2 * lc2 * g * np.cos(q1 + q2)
        phi2 = m2 * lc2 * g * np.cos(q1 + q2)
        coriolis = np.array([2 * h * w1 * w2 + h * w2 ** 2, -h * w1 ** 2])
        M, F = evaluate(q1, q2, w1, w2, *values.values())
        assert np.allclose(np.reshape(M, (2, 2)), [[d11, d12], [d12, d22]], rtol=1e-13)
        assert np.allclose(F, -(coriolis + np.array([phi1, phi2])), rtol=1e-12, atol=1e-12)


THREE_LINK = """\
plant: three_link
coordinates: [q1, q2, q3]
velocities: [w1, w2, w3]
inputs: [t1, t2, t3]
parameters: {l1: 0.5, l2: 0.4, l3: 0.3, m1: 2.0, m2: 1.5, m3: 0.8, g0: 9.81}
serial_arm:
  gravity: [0, -g0, 0]
  joints:
    - {type: revolute, a: l1, alpha: 0, d: 0, theta: 0, mass: m1, com: [-l1/2, 0, 0], inertia: [0, 0.03, 0.04]}
    - {type: revolute, a: l2, alpha: 0, d: 0, theta: 0, mass: m2, com: [-l2/2, 0, 0], inertia: [0, 0.02, 0.02]}
    - {type: revolute, a: l3, alpha: 0, d: 0, theta: 0, mass: m3, com: [-l3/2, 0, 0], inertia: [0, 0.01, 0.006]}
"""


def _three_link_by_lagrange():
    """The same planar arm by sympy.physics.mechanics' Lagrange method (an independent derivation)."""
    q = me.dynamicsymbols("q1:4")
    qd = [me.dynamicsymbols(f"q{i}", 1) for i in range(1, 4)]
    lengths, masses, izz = [0.5, 0.4, 0.3], [2.0, 1.5, 0.8], [0.04, 0.02, 0.006]
    N = me.ReferenceFrame("N")
    O = me.Point("O")
    O.set_vel(N, 0)
    frames, joint, angle = [], O, 0
    bodies = []
    for i in range(3):
        angle = angle + q[i]
        frame = N.orientnew(f"L{i}", "Axis", [angle, N.z])
        frame.set_ang_vel(N, sum(qd[: i + 1]) * N.z)
        centre = joint.locatenew(f"C{i}", lengths[i] / 2 * frame.x)
        centre.v2pt_theory(joint, N, frame)
        inertia = me.inertia(frame, 0, 0, izz[i])
        body = me.RigidBody(f"B{i}", centre, frame, masses[i], (inertia, centre))
        body.potential_energy = masses[i] * 9.81 * centre.pos_from(O).dot(N.y)
        bodies.append(body)
        joint = joint.locatenew(f"J{i}", lengths[i] * frame.x)
        joint.v2pt_theory(centre, N, frame)
        frames.append(frame)
    L = me.Lagrangian(N, *bodies)
    method = me.LagrangesMethod(L, q)
    method.form_lagranges_equations()
    return q, qd, method.mass_matrix, method.forcing


def test_three_link_planar_arm_matches_sympy_mechanics_lagrange_method():
    plant = plant_from_text(THREE_LINK)
    q, qd, M_ref, forcing_ref = _three_link_by_lagrange()
    values = list(plant.parameters.values())
    evaluate = _numeric(plant, plant.mechanics.M, plant.mechanics.F)
    reference = sp.lambdify(q + qd, [list(M_ref), list(forcing_ref)], modules="numpy")
    rng = np.random.default_rng(5)
    for _ in range(15):
        x = rng.uniform(-2.5, 2.5, 6)
        M, F = evaluate(*x, *values)
        M_expected, F_expected = reference(*x)
        assert np.allclose(np.reshape(M, (3, 3)), np.reshape(np.array(M_expected, float), (3, 3)), rtol=1e-12)
        assert np.allclose(F, np.ravel(np.array(F_expected, float)), rtol=1e-11, atol=1e-11)


POLAR = """\
plant: polar
coordinates: [th, r]
velocities: [w, s]
inputs: [torque, push]
parameters: {m1: 1.0, m2: 0.7, I1: 0.02, I2: 0.01, g0: 9.81}
serial_arm:
  gravity: [0, -g0, 0]
  joints:
    - {type: revolute, a: 0, alpha: pi/2, d: 0, theta: 0, mass: m1, com: [0, 0, 0], inertia: [I1, I1, I1]}
    - {type: prismatic, a: 0, alpha: 0, d: 0.2, theta: 0, mass: m2, com: [0, 0, 0], inertia: [I2, I2, I2]}
envelope: {r: [0.0, 0.5]}
"""

POLAR_ENERGY = """\
plant: polar_energy
coordinates: [th, r]
velocities: [w, s]
inputs: [torque, push]
parameters: {m1: 1.0, m2: 0.7, I1: 0.02, I2: 0.01, g0: 9.81}
kinetic_energy: I1*w**2/2 + I2*w**2/2 + m2*(s**2 + (r + 0.2)**2*w**2)/2
potential_energy: -m2*g0*(r + 0.2)*cos(th)
"""


def test_a_prismatic_joint_matches_the_energy_form_of_a_polar_arm():
    # joint 1 turns the arm about the base z axis (alpha = pi/2 sends the slide along the arm),
    # joint 2 slides the second body out to r + 0.2 along (sin th, -cos th, 0): T and V by hand
    dh, energy = plant_from_text(POLAR), plant_from_text(POLAR_ENERGY)
    f_dh = _numeric(dh, dh.mechanics.M, dh.mechanics.F)
    f_en = _numeric(energy, energy.mechanics.M, energy.mechanics.F)
    rng = np.random.default_rng(9)
    for _ in range(15):
        x = rng.uniform([-3, 0, -2, -1], [3, 0.5, 2, 1])
        M1, F1 = f_dh(*x, *dh.parameters.values())
        M2, F2 = f_en(*x, *energy.parameters.values())
        assert np.allclose(M1, M2, rtol=1e-12) and np.allclose(F1, F2, rtol=1e-12, atol=1e-12)


def test_mass_matrix_and_newton_euler_bias_agree_on_energy_conservation():
    # with no gravity and no friction, dT/dt = q'^T F when F comes from the same M
    # (q'^T (M' / 2 - C) q' = 0, the skew-symmetry property, Spong et al. sec. 7.5.2)
    plant = load_plant(BUNDLED / "loader_arm.yaml")
    mech = plant.mechanics
    links = [Link(l.kind, l.a, l.alpha, l.d, l.theta, l.mass, l.com, l.inertia) for l in mech.links]
    model = arm_model(links, list(mech.coordinates), list(mech.velocities), sp.zeros(3, 1))
    evaluate = numeric_function(list(plant.states) + list(plant.parameters), [list(model.M), list(model.F)])
    rng = np.random.default_rng(2)
    step = 1e-6
    for _ in range(5):
        x = rng.uniform(-1.5, 1.5, 12)
        v = x[6:]
        M, F = evaluate(*x, *plant.parameters.values())
        ahead = np.concatenate([x[:6] + step * v, v])
        behind = np.concatenate([x[:6] - step * v, v])
        Mdot = (np.reshape(evaluate(*ahead, *plant.parameters.values())[0], (6, 6))
                - np.reshape(evaluate(*behind, *plant.parameters.values())[0], (6, 6))) / (2 * step)
        # T' = v^T M v' + v^T M' v / 2 with M v' = F; without gravity and friction T' = 0
        kinetic_power = v @ np.array(F, float)
        assert abs(kinetic_power + 0.5 * v @ Mdot @ v) < 1e-6 * (1 + abs(kinetic_power))
        assert abs(kinetic_power) > 1e-3          # the check is not trivially zero


def test_three_link_planar_arm_matches_its_hand_derived_mass_matrix_and_gravity():
    # M and g of a planar 3R arm written out from the centre-of-mass positions (the two-link
    # derivation of Spong et al. sec. 7.4.1 carried one link further); C q' from the
    # Christoffel symbols of that M (ibid. eq. 7.52)
    plant = plant_from_text(THREE_LINK)
    q = sp.symbols("q1:4", real=True)
    w = sp.symbols("w1:4", real=True)
    l1, l2, l3, m1, m2, m3, g = 0.5, 0.4, 0.3, 2.0, 1.5, 0.8, 9.81
    lc1, lc2, lc3 = l1 / 2, l2 / 2, l3 / 2
    I1, I2, I3 = 0.04, 0.02, 0.006
    c2, c3, c23 = sp.cos(q[1]), sp.cos(q[2]), sp.cos(q[1] + q[2])
    M11 = (I1 + I2 + I3 + m1 * lc1 ** 2 + m2 * (l1 ** 2 + lc2 ** 2 + 2 * l1 * lc2 * c2)
           + m3 * (l1 ** 2 + l2 ** 2 + lc3 ** 2 + 2 * l1 * l2 * c2 + 2 * l1 * lc3 * c23 + 2 * l2 * lc3 * c3))
    M12 = I2 + I3 + m2 * (lc2 ** 2 + l1 * lc2 * c2) + m3 * (l2 ** 2 + lc3 ** 2 + l1 * l2 * c2 + l1 * lc3 * c23
                                                             + 2 * l2 * lc3 * c3)
    M13 = I3 + m3 * (lc3 ** 2 + l1 * lc3 * c23 + l2 * lc3 * c3)
    M22 = I2 + I3 + m2 * lc2 ** 2 + m3 * (l2 ** 2 + lc3 ** 2 + 2 * l2 * lc3 * c3)
    M23 = I3 + m3 * (lc3 ** 2 + l2 * lc3 * c3)
    M33 = I3 + m3 * lc3 ** 2
    M = sp.Matrix([[M11, M12, M13], [M12, M22, M23], [M13, M23, M33]])
    c1, c12, c123 = sp.cos(q[0]), sp.cos(q[0] + q[1]), sp.cos(q[0] + q[1] + q[2])
    gravity = sp.Matrix([(m1 * lc1 + m2 * l1 + m3 * l1) * g * c1 + (m2 * lc2 + m3 * l2) * g * c12 + m3 * lc3 * g * c123,
                         (m2 * lc2 + m3 * l2) * g * c12 + m3 * lc3 * g * c123,
                         m3 * lc3 * g * c123])
    coriolis = sp.Matrix([sum((M[k, j].diff(q[i]) + M[k, i].diff(q[j]) - M[i, j].diff(q[k])) / 2 * w[i] * w[j]
                              for i in range(3) for j in range(3)) for k in range(3)])
    expected = sp.lambdify(list(q) + list(w), [list(M), list(-coriolis - gravity)], modules="numpy")
    evaluate = _numeric(plant, plant.mechanics.M, plant.mechanics.F)
    rng = np.random.default_rng(31)
    for _ in range(15):
        x = rng.uniform(-2.5, 2.5, 6)
        M_got, F_got = evaluate(*x, *plant.parameters.values())
        M_ref, F_ref = expected(*x)
        assert np.allclose(np.array(M_got, float), np.array(M_ref, float), rtol=1e-12)
        assert np.allclose(np.array(F_got, float), np.array(F_ref, float), rtol=1e-11, atol=1e-11)
