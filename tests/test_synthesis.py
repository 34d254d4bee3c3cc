"""Synthesis: gains against python-control and scipy, the law against independent mechanics,
the coordinate change of input-state designs, and every refusal with its one line."""

import math

import numpy as np
import pytest
import scipy.signal
import sympy as sp
import sympy.physics.mechanics as me

from support import BUNDLED, MINIMAL, REFERENCE
from linz_ros.artifact import artifact_from_text, seal
from linz_ros.codegen import build_document
from linz_ros.errors import DesignError
from linz_ros.model import load_plant, plant_from_text
from linz_ros.runtime import ControllerCore, Transform
from linz_ros.synthesis import (DesignOptions, chain_matrices, closed_form_inverse, closed_loop_poles,
                                gains_from_lqr, gains_from_poles, sampled_loop, synthesise)
from linz_ros.analysis import plant_context


def _python_control():
    """python-control (PyPI: control), the outside reference for the gains; a test extra."""
    return pytest.importorskip("control", reason="python-control is not installed (pip install '.[test]')")


def test_python_control_is_installed_with_the_test_dependencies():
    # the gain checks below skip without it; with the test extra they must run
    import importlib.util

    assert importlib.util.find_spec("control") is not None, "pip install '.[test]'"


# -- gains on Brunovsky chains ----------------------------------------------------------------
@pytest.mark.parametrize("poles", [[-2.0, -3.0], [-1.0, -4.0, -6.0], [-3 + 2j, -3 - 2j, -5.0], [-0.8, -1.0, -1.3, -2.0]])
def test_pole_placement_gains_match_python_control_and_scipy(poles):
    control = _python_control()
    A, B = chain_matrices(len(poles))
    ours = gains_from_poles(poles)
    np.testing.assert_allclose(ours, np.ravel(control.place(A, B, poles)), rtol=1e-9)   # python-control place
    np.testing.assert_allclose(ours, np.ravel(scipy.signal.place_poles(A, B, poles).gain_matrix), rtol=1e-9)
    np.testing.assert_allclose(sorted(closed_loop_poles(ours), key=lambda z: (z.real, z.imag)),
                               sorted(np.asarray(poles, complex), key=lambda z: (z.real, z.imag)), rtol=1e-7)


def test_repeated_poles_are_placed_where_scipy_refuses():
    poles = [-2.0, -2.0, -2.0]
    A, B = chain_matrices(3)
    with pytest.raises(ValueError):
        scipy.signal.place_poles(A, B, poles)     # multiplicity above rank B
    assert gains_from_poles(poles).tolist() == [8.0, 12.0, 6.0]       # (s + 2)^3 = s^3 + 6 s^2 + 12 s + 8
    np.testing.assert_allclose(closed_loop_poles(gains_from_poles(poles)).real, -2.0, atol=1e-4)


def test_complex_poles_need_their_conjugate():
    with pytest.raises(ValueError, match="no complex-conjugate partner"):
        gains_from_poles([-1 + 1j, -2.0])


def test_lqr_gains_match_python_control_on_stacked_chains():
    control = _python_control()
    orders, q, r = [2, 3], [4.0, 1.0, 9.0, 2.0, 0.5], [0.5, 2.0]
    gains, P = gains_from_lqr(orders, q, r)
    blocks = [chain_matrices(k) for k in orders]
    A = scipy.linalg.block_diag(*(a for a, _ in blocks))
    B = scipy.linalg.block_diag(*(b for _, b in blocks))
    K, S, _ = control.lqr(A, B, np.diag(q), np.diag(r))                   # python-control lqr
    np.testing.assert_allclose(scipy.linalg.block_diag(*[g[None, :] for g in gains]), K, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(P, S, rtol=1e-8)
    # the double integrator with q = (1, 1), r = 1 has K = (1, sqrt(3)) (common practice)
    np.testing.assert_allclose(gains_from_lqr([2], [1.0, 1.0], [1.0])[0][0], [1.0, math.sqrt(3.0)], rtol=1e-12)


def test_sampled_loop_matches_python_control_zero_order_hold():
    control = _python_control()
    K = gains_from_poles([-6.0, -7.0])
    A, B = chain_matrices(2)
    T = 1 / 50
    sampled = control.c2d(control.ss(A, B, np.eye(2), 0), T, method="zoh")   # python-control c2d
    rho = max(abs(np.linalg.eigvals(sampled.A - sampled.B @ K[None, :])))
    loop = sampled_loop(K, T)
    assert loop.spectral_radius == pytest.approx(rho, rel=1e-10)
    assert loop.fastest_pole_times_period == pytest.approx(7 * T)
    assert loop.designed_decay == pytest.approx(6.0)
    assert sampled_loop(gains_from_poles([-300.0, -320.0]), 1 / 50).spectral_radius > 1   # far too fast


# -- the law against mechanics derived independently ---------------------------------------------
def _two_link_lagrange():
    """Two-link planar arm by sympy.physics.mechanics' Lagrange method (relative joint angles,
    gravity along -y): M(q) q'' = F(q, q', tau), derived without the plant file's formulas."""
    q1, q2 = me.dynamicsymbols("q1 q2")
    u1, u2 = me.dynamicsymbols("q1 q2", 1)
    l1, lc1, lc2, m1, m2, I1, I2, g0, tau1, tau2 = sp.symbols("l1 lc1 lc2 m1 m2 I1 I2 g0 tau1 tau2")
    N = me.ReferenceFrame("N")
    A = N.orientnew("A", "Axis", [q1, N.z])
    B = A.orientnew("B", "Axis", [q2, A.z])
    O = me.Point("O")
    O.set_vel(N, 0)
    P1 = O.locatenew("P1", lc1 * A.x)
    J = O.locatenew("J", l1 * A.x)
    P2 = J.locatenew("P2", lc2 * B.x)
    for point in (P1, J, P2):
        point.v2pt_theory(O if point is not P2 else J, N, A if point is not P2 else B)
    link1 = me.RigidBody("link1", P1, A, m1, (me.inertia(A, 0, 0, I1), P1))
    link2 = me.RigidBody("link2", P2, B, m2, (me.inertia(B, 0, 0, I2), P2))
    link1.potential_energy = m1 * g0 * P1.pos_from(O).dot(N.y)
    link2.potential_energy = m2 * g0 * P2.pos_from(O).dot(N.y)
    L = me.Lagrangian(N, link1, link2)
    loads = [(A, (tau1 - tau2) * N.z), (B, tau2 * N.z)]
    method = me.LagrangesMethod(L, [q1, q2], forcelist=loads, frame=N)
    method.form_lagranges_equations()
    names = dict(q1=q1, q2=q2, w1=u1, w2=u2, tau1=tau1, tau2=tau2, l1=l1, lc1=lc1, lc2=lc2, m1=m1, m2=m2,
                 I1=I1, I2=I2, g0=g0)
    return method.mass_matrix, method.forcing, names


@pytest.fixture(scope="module")
def lagrange():
    return _two_link_lagrange()


def _accelerations(lagrange, state, tau, params):
    M, F, s = lagrange
    subs = {s["q1"]: state[0], s["q2"]: state[1], s["w1"]: state[2], s["w2"]: state[3],
            s["tau1"]: tau[0], s["tau2"]: tau[1]}
    subs.update({s[k]: v for k, v in params.items() if k in s})
    return np.linalg.solve(np.array(M.subs(subs), dtype=float), np.array(F.subs(subs), dtype=float).ravel())


def _core(text):
    plant = plant_from_text(text, "<test>")
    design = synthesise(plant)
    return ControllerCore(artifact_from_text(seal(build_document(design, points=8)[0])))


def test_computed_torque_of_the_two_link_arm_matches_lagrange_mechanics(lagrange):
    # joint-space outputs: the law is computed torque, u = M a + C(q, q') q' + g(q)
    text = (BUNDLED / "pick_arm.yaml").read_text()
    text = text.replace("tool_x: l1*cos(q1) + l2*cos(q1 + q2)", "joint1: q1").replace(
        "tool_y: l1*sin(q1) + l2*sin(q1 + q2)", "joint2: q2").replace(
        "poles: {tool_x: [-6, -7], tool_y: [-6, -7]}", "poles: {joint1: [-6, -7], joint2: [-6, -7]}")
    text = text.replace('reference: "smooth:tool_x=-0.08,tool_y=0.06,duration=1.5,at=0.25"', "")
    text = text.replace(", tool_x: m, tool_y: m}", "}")        # the joint outputs take rad from q1 and q2
    text = text.replace("input_limits: {tau1: [-25.0, 25.0], tau2: [-12.0, 12.0]}", "")
    core = _core(text)
    params = dict(zip(core.artifact.parameter_names, core.parameters))
    rng = np.random.default_rng(5)
    for k in range(5):
        state = [rng.uniform(-0.6, 1.8), rng.uniform(0.3, 2.6), rng.uniform(-2, 2), rng.uniform(-2, 2)]
        a = rng.uniform(-3, 3, 2)
        ref = [state[0], state[2], a[0], state[1], state[3], a[1]]       # zero error: v = a
        tau, record = core.step(state, ref, t=float(k + 1))
        assert record.mode == "nominal"
        np.testing.assert_allclose(_accelerations(lagrange, state, tau, params), a, rtol=1e-9, atol=1e-9)


def test_tool_point_law_gives_the_commanded_tool_acceleration_under_lagrange_mechanics(lagrange):
    core = _core((BUNDLED / "pick_arm.yaml").read_text().replace("input_limits: {tau1: [-25.0, 25.0], "
                                                                  "tau2: [-12.0, 12.0]}", ""))
    p = dict(zip(core.artifact.parameter_names, core.parameters))
    rng = np.random.default_rng(9)
    for k in range(5):
        q1, q2, w1, w2 = rng.uniform(-0.6, 1.8), rng.uniform(0.3, 2.6), rng.uniform(-2, 2), rng.uniform(-2, 2)
        x = [q1, q2, w1, w2]
        ref = core.hold_reference(x)
        ref[1], ref[4] = core.outputs(x)[1], core.outputs(x)[3]        # match velocities: e = e' = 0
        a = rng.uniform(-2, 2, 2)
        ref[2], ref[5] = a
        tau, record = core.step(x, ref, t=float(k + 1))
        qdd = _accelerations(lagrange, x, tau, p)
        l1, l2 = p["l1"], p["l2"]
        J = np.array([[-l1 * np.sin(q1) - l2 * np.sin(q1 + q2), -l2 * np.sin(q1 + q2)],
                      [l1 * np.cos(q1) + l2 * np.cos(q1 + q2), l2 * np.cos(q1 + q2)]])
        Jdot_qdot = np.array([-l1 * np.cos(q1) * w1 ** 2 - l2 * np.cos(q1 + q2) * (w1 + w2) ** 2,
                              -l1 * np.sin(q1) * w1 ** 2 - l2 * np.sin(q1 + q2) * (w1 + w2) ** 2])
        np.testing.assert_allclose(J @ qdd + Jdot_qdot, a, rtol=1e-9, atol=1e-9)


# -- designs of the bundled and reference plants --------------------------------------------------
def test_bundled_designs_follow_their_plant_files():
    design = synthesise(load_plant(BUNDLED / "pick_arm.yaml"))
    assert design.kind == "input_output" and design.relative_degree == [2, 2] and design.rate == 500
    assert [c.gains.tolist() for c in design.chains] == [[42.0, 13.0], [42.0, 13.0]]   # (s+6)(s+7)
    assert design.method == "poles" and not design.warnings
    w = design.watchdog
    assert w["sigma_warn"] > w["sigma_act"] > w["sigma_stop"] > 0 and w["stale_after"] == pytest.approx(0.02)


def test_integral_action_needs_one_more_pole_per_chain():
    plant = load_plant(BUNDLED / "mast_camera.yaml")
    with pytest.raises(DesignError, match="design.poles.pan_angle: 2 pole\\(s\\) given, but the chain has 3 "
                                          "states including the integrator"):
        synthesise(plant, DesignOptions(integral=True))
    design = synthesise(plant, DesignOptions(integral=True, poles={"pan_angle": [-4, -5, -6],
                                                                   "tilt_angle": [-7, -8, -9]}))
    assert design.chains[0].gains.tolist() == [120.0, 74.0, 15.0]          # (s+4)(s+5)(s+6)


def test_default_design_is_lqr_with_unit_weights_and_says_so():
    design = synthesise(plant_from_text(MINIMAL + "outputs: {y: x1}\n"))
    assert design.method == "lqr" and design.chains[0].gains.tolist() == pytest.approx([1.0, math.sqrt(3)])
    assert any("LQR with unit weights" in n for n in design.notes)
    assert any("100 Hz assumed" in n for n in design.notes)


def test_poles_too_fast_for_the_rate_are_warned_about():
    design = synthesise(load_plant(BUNDLED / "survey_boat.yaml"),
                        DesignOptions(poles={"point_north": [-12, -14], "point_east": [-1, -1.2]}))
    assert any("point_north: poles too fast for 50 Hz" in w for w in design.warnings)
    design = synthesise(load_plant(BUNDLED / "survey_boat.yaml"),
                        DesignOptions(poles={"point_north": [-150, -160], "point_east": [-1, -1.2]}))
    assert any("UNSTABLE" in w and "point_north" in w for w in design.warnings)


def test_unstable_zero_dynamics_are_warned_about():
    # y = x1 with x1' = u and x2' = x2 + x1: zero dynamics x2' = x2, eigenvalue +1 (non-minimum phase)
    plant = plant_from_text("plant: nmp\nstates: [x1, x2]\ninputs: [u]\ndynamics: {x1: u, x2: x2 + x1}\n"
                            "outputs: {y: x1}\ndesign: {poles: {y: [-2]}}\n")
    design = synthesise(plant)
    assert any("zero dynamics are UNSTABLE" in w for w in design.warnings)


# -- input-state designs and the coordinate change -------------------------------------------------
def test_khalil_example_has_the_closed_form_inverse_from_the_book():
    plant = load_plant(REFERENCE / "khalil_two_state.yaml")
    design = synthesise(plant)
    x1, x2 = plant.states
    a = next(iter(plant.parameters))
    assert design.kind == "input_state" and design.relative_degree == [2]
    assert design.transform == [x1, a * sp.sin(x2)]            # Khalil, ch. 13: z = (x1, a sin x2)
    z0, z1 = sp.symbols("_z0 _z1", real=True)
    assert sp.simplify(design.transform_inverse[1] - sp.asin(z1 / a)) == 0


def test_newton_inverse_agrees_with_the_closed_form():
    plant = load_plant(REFERENCE / "flexible_joint.yaml")
    design = synthesise(plant, DesignOptions(linearize="state"))
    assert design.transform_inverse is not None
    artifact = artifact_from_text(seal(build_document(design, points=8)[0]))
    transform = Transform(artifact)
    rng = np.random.default_rng(2)
    for _ in range(10):
        x = rng.uniform(-1.2, 1.2, 4)
        z = transform.forward(x)
        closed = transform.inverse(z)
        newton = transform.inverse(z, guess=x + rng.normal(0, 0.05, 4), newton=True)
        assert closed.converged and newton.converged and newton.iterations <= 8
        np.testing.assert_allclose(closed.x, x, atol=1e-10)
        np.testing.assert_allclose(newton.x, x, atol=1e-10)


def test_a_user_supplied_linearizing_output_is_checked():
    plant = load_plant(REFERENCE / "khalil_two_state.yaml")
    with pytest.raises(DesignError, match="--linearizing-output: T1 = x2 has relative degree 1, not n = 2"):
        synthesise(plant, DesignOptions(linearizing_output="x2"))
    with pytest.raises(DesignError, match="unknown symbol 'q'"):
        synthesise(plant, DesignOptions(linearizing_output="q"))
    design = synthesise(plant, DesignOptions(linearizing_output="2*x1 + 1"))
    assert design.relative_degree == [2]


def test_closed_form_inverse_gives_up_rather_than_guess():
    plant = load_plant(REFERENCE / "khalil_two_state.yaml")
    x1, x2 = plant.states
    # x1 and x1 + sin(x2) x1: the second equation has two unknowns once the first is used twice
    assert closed_form_inverse([x1 + x2 ** 3 + x2, x2 * sp.exp(x1) + x1 ** 5], plant, plant_context(plant)) is None


# -- refusals ----------------------------------------------------------------------------------------
@pytest.mark.parametrize("text, options, words", [
    (MINIMAL, DesignOptions(linearize="outputs"), "outputs: input-output linearization needs outputs"),
    (MINIMAL.replace("inputs: [u]", "inputs: [u, w]").replace("+ u", "+ u + w"), DesignOptions(),
     "inputs: input-state synthesis covers single-input plants"),
    (MINIMAL + "outputs: {y: x1, z: x2}\n", DesignOptions(), "as many outputs as inputs (2 output(s), 1 input(s))"),
    (MINIMAL + "outputs: {y: k}\n", DesignOptions(), "not affected by any input"),
    (MINIMAL + "outputs: {y: x1}\n", DesignOptions(poles={"y": [-1.0]}), "1 pole(s) given, but the chain has 2"),
    (MINIMAL + "outputs: {y: x1}\n", DesignOptions(poles={"z": [-1.0, -2.0]}), "no poles for output chain(s) y"),
    (MINIMAL + "outputs: {y: x1}\n", DesignOptions(poles={"y": [-1 + 1j, -2.0]}), "no complex-conjugate partner"),
    (MINIMAL + "outputs: {y: x1}\n", DesignOptions(lqr={"q": [1.0]}), "design.lqr.q: expected 2 weights, one per "
                                                                       "chain state (y, y'); got 1"),
    (MINIMAL + "outputs: {y: x1}\n", DesignOptions(lqr={"r": [1.0, 2.0]}), "design.lqr.r: expected 1 weights"),
    (MINIMAL + "outputs: {y: x1}\ndesign: {watchdog: {safe_command: {u: 9}}}\ninput_limits: {u: [-1, 1]}\n",
     DesignOptions(), "safe_command.u: 9 lies outside the input limits"),
    (MINIMAL + "outputs: {y: x1}\n", DesignOptions(poles={"y": [complex("nan"), -1.0]}), "poles must be finite"),
    (MINIMAL + "outputs: {y: x1}\n", DesignOptions(poles={"y": [-1e300, -1e300]}), "gains of chain y are not finite"),
    (MINIMAL + "outputs: {y: x1}\n", DesignOptions(lqr={"q": [0.0, 0.0]}), "would not be asymptotically stable"),
    (MINIMAL + "outputs: {y: x1}\n", DesignOptions(lqr={"q": [0.0, 1.0]}), "give the first state of every chain"),
    (MINIMAL + "outputs: {y: x1}\n", DesignOptions(poles={"y": [-1.0, -2.0]}, rate=1e-300),
     "--rate: control rate 1e-300 Hz is below 0.00278 Hz (the stale-state watchdog's default of 10 periods"),
    (MINIMAL + "outputs: {y: x1}\ndesign: {rate: 1.0e-9}\n", DesignOptions(poles={"y": [-1.0, -2.0]}),
     "p.yaml: design.rate: control rate 1e-09 Hz is below 0.00278 Hz"),
])
def test_designs_that_cannot_be_built_are_one_line(text, options, words):
    with pytest.raises(DesignError) as info:
        synthesise(plant_from_text(text, "p.yaml"), options)
    message = str(info.value)
    assert words in message and "\n" not in message
    assert message.startswith(("p.yaml", "<command line>"))


def test_poles_are_kept_in_the_order_given():
    plant = load_plant(BUNDLED / "mast_camera.yaml")
    design = synthesise(plant, DesignOptions(poles={"pan_angle": [-3, -5], "tilt_angle": [-2 - 1j, -2 + 1j]}))
    pan, tilt = design.chains
    np.testing.assert_allclose(pan.poles, [-3, -5], atol=1e-9)
    np.testing.assert_allclose(tilt.poles, [-2 - 1j, -2 + 1j], atol=1e-9)


def test_absurd_lqr_weights_are_refused_in_one_line_without_a_solver_warning():
    import warnings
    plant = load_plant(BUNDLED / "mast_camera.yaml")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with pytest.raises(DesignError, match=r"<command line>: --lqr-q: weight 1e\+308 is outside "
                                              r"\[1e-12, 1e\+12\] \(or 0\)"):
            synthesise(plant, DesignOptions(lqr={"q": [1e308, 1, 1, 1]}))
        with pytest.raises(DesignError, match=r"--lqr-r: weight 1e-20 is outside"):
            synthesise(plant, DesignOptions(lqr={"r": [1e-20, 1]}))


def test_elastic_joint_design_has_chains_of_degree_4_and_an_elastic_artifact():
    from support import REFERENCE, built_artifact
    from linz_ros.artifact import artifact_from_text
    from linz_ros.errors import ArtifactError
    import json

    design = synthesise(load_plant(REFERENCE / "elastic_joint.yaml"))
    assert design.relative_degree == [4] and design.mechanical and design.A is None
    assert np.allclose(design.chains[0].gains, [5 * 6 * 7 * 8, 5 * 6 * 7 + 5 * 6 * 8 + 5 * 7 * 8 + 6 * 7 * 8,
                                                5 * 6 + 5 * 7 + 5 * 8 + 6 * 7 + 6 * 8 + 7 * 8, 26])
    artifact = built_artifact(REFERENCE / "elastic_joint.yaml")
    assert artifact.elastic and not artifact.computed_torque
    document = dict(artifact.document)
    document["design"] = dict(document["design"], mechanics=dict(document["design"]["mechanics"], elastic=False))
    from linz_ros.artifact import seal
    with pytest.raises(ArtifactError, match="design.mechanics"):
        artifact_from_text(seal({k: v for k, v in document.items() if k != "sha256"}))
    assert json.loads(seal({k: v for k, v in artifact.document.items() if k != "sha256"}))["design"]["mechanics"][
        "elastic"] is True
