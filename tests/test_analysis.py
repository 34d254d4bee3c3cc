"""Linearizability verdicts on published examples, each check naming its source."""

import numpy as np
import pytest
import sympy as sp

from support import BUNDLED, REFERENCE, pendulum_chain_text
from linz_ros.analysis import (analyse, controllability_indices, invariant_zeros, render_text,
                               sample_envelope)
from linz_ros.analysis._common import plant_context
from linz_ros.analysis._input_state import relative_degree_of
from linz_ros.model import load_plant, plant_from_text


def _symbols(plant):
    names = {s.name: s for s in plant.states + plant.inputs}
    names.update({s.name: s for s in plant.parameters})
    return names


def _same(a, b):
    return sp.simplify(sp.sympify(a) - sp.sympify(b)) == 0


def _zero_set_factors(expr):
    """Factors of a singular-set expression, each normalised by sign."""
    _, factors = sp.factor_list(sp.sympify(expr))
    return {(-f if f.could_extract_minus_sign() else f) for f, _ in factors}


# -- Khalil, Nonlinear Systems, 3rd ed., ch. 13: dx1 = a sin x2, dx2 = -x1^2 + u ----------------
def test_khalil_two_state_example_is_input_state_linearizable_with_T1_x1():
    plant = load_plant(REFERENCE / "khalil_two_state.yaml")
    s = _symbols(plant)
    report = analyse(plant)
    iss = report.input_state
    assert iss.linearizable is True
    assert s["x1"] in iss.linearizing_outputs          # Khalil: z1 = x1, z2 = a sin x2
    assert [d.rank for d in iss.distributions] == [1, 2]
    assert iss.controllability_indices == [2]
    # [g, ad_f g] = [[0, -a cos x2], [1, 0]] loses rank where cos x2 = 0 (Khalil, same example)
    assert _zero_set_factors(iss.singular_set) == {sp.cos(s["x2"])}
    degree, coefficient = relative_degree_of(s["x1"], plant, plant_context(plant))
    assert degree == 2 and _same(coefficient[0], s["a"] * sp.cos(s["x2"]))


def test_khalil_example_at_a_point_of_the_singular_set_is_refused():
    text = (REFERENCE / "khalil_two_state.yaml").read_text().replace(
        "envelope: {x1: [-1, 1], x2: [-1.2, 1.2]}", "operating_point: {x2: 1.5707963267948966}")
    iss = analyse(plant_from_text(text)).input_state
    assert iss.linearizable is False
    assert "rank D_1" in iss.reason and "1 < 2" in iss.reason


# -- Spong (1987), single-link flexible-joint arm: link angle has relative degree 4 ----------------
def test_flexible_joint_link_angle_has_relative_degree_four():
    plant = load_plant(REFERENCE / "flexible_joint.yaml")
    s = _symbols(plant)
    report = analyse(plant)
    io = report.input_output
    assert io.relative_degree == [4] and io.relative_degree_generic == [4]
    # L_g L_f^3 q1 = k / (I J) (Spong 1987; also Khalil, Nonlinear Systems, Example 13.? from memory)
    assert _same(io.decoupling_matrix[0, 0], s["k"] / (s["I"] * s["J"]))
    assert io.zero_dynamics_order == 0
    assert io.singular_set == 1                       # never singular
    assert report.input_state.linearizable is True
    assert s["q1"] in report.input_state.linearizing_outputs
    assert report.input_state.controllability_indices == [4]


# -- Hauser, Sastry and Kokotovic (IEEE TAC 37(3), 1992): the ball and beam ----------------------
def test_ball_and_beam_has_no_well_defined_relative_degree_at_the_origin():
    plant = load_plant(REFERENCE / "ball_beam.yaml")
    s = _symbols(plant)
    report = analyse(plant)
    io = report.input_output
    assert io.relative_degree is None                      # undefined at x = 0
    assert "not defined at the operating point" in io.reason
    assert io.relative_degree_generic == [3]
    # L_g L_f^2 r = 2 B r omega, which vanishes at the origin (Hauser et al. 1992, sec. II)
    assert _same(io.decoupling_matrix[0, 0], 2 * s["B"] * s["r"] * s["omega"])
    assert _zero_set_factors(io.singular_set) == {s["r"], s["omega"]}
    assert io.reason == ("relative degree not defined at the operating point: L_g L_f^(r-1) h vanishes there "
                         "(it lies on the singular set); generic relative degree [3]")
    assert io.summary == "relative degree not defined at the operating point (on the singular set)"
    # not full-state linearizable: span{g, ad_f g} is not involutive (same paper)
    assert report.input_state.linearizable is False
    assert report.input_state.distributions[1].involutive is False


def test_ball_and_beam_away_from_the_singular_set_has_relative_degree_three():
    text = (REFERENCE / "ball_beam.yaml").read_text() + "operating_point: {r: 0.5, omega: 0.2}\n"
    io = analyse(plant_from_text(text)).input_output
    assert io.relative_degree == [3]
    assert io.zero_dynamics.reason.startswith("the operating point is not an equilibrium")


# -- cart-pole: not input-state linearizable (common practice; e.g. Spong, "Underactuated
#    mechanical systems", 1998, from memory) ----------------------------------------------------
def test_cart_pole_is_not_input_state_linearizable():
    plant = load_plant(REFERENCE / "cart_pole.yaml")
    s = _symbols(plant)
    report = analyse(plant)
    assert report.input_state.linearizable is False
    assert "not involutive" in report.input_state.reason
    io = report.input_output
    # pole angle: relative degree 2, coefficient -cos(theta)/(l (mc + mp sin^2 theta))
    assert io.relative_degree == [2]
    expected = -sp.cos(s["theta"]) / (s["l"] * (s["mc"] + s["mp"] * sp.sin(s["theta"]) ** 2))
    assert _same(io.decoupling_matrix[0, 0], expected)
    assert _zero_set_factors(io.singular_set) == {sp.cos(s["theta"])}
    # the cart is the zero dynamics: a double integrator, eigenvalues 0, 0
    assert io.zero_dynamics_order == 2
    assert io.zero_dynamics.stability == "critical"
    np.testing.assert_allclose([abs(z) for z in io.zero_dynamics.eigenvalues], [0, 0], atol=1e-6)


# -- two-link planar arm with tool-point output: singular where sin q2 = 0 ------------------------
def _two_link_reference(q, values):
    """J(q) M(q)^-1 with M from Spong, Hutchinson and Vidyasagar, Robot Modeling and
    Control, ch. 7 (two-link planar arm) and J the tool-point Jacobian (same book, ch. 4)."""
    q1, q2 = q
    v = values
    a = v["I1"] + v["I2"] + v["m1"] * v["lc1"] ** 2 + v["m2"] * (v["l1"] ** 2 + v["lc2"] ** 2)
    b = v["m2"] * v["l1"] * v["lc2"]
    d = v["I2"] + v["m2"] * v["lc2"] ** 2
    M = np.array([[a + 2 * b * np.cos(q2), d + b * np.cos(q2)], [d + b * np.cos(q2), d]])
    l1, l2 = v["l1"], v["l2"]
    J = np.array([[-l1 * np.sin(q1) - l2 * np.sin(q1 + q2), -l2 * np.sin(q1 + q2)],
                  [l1 * np.cos(q1) + l2 * np.cos(q1 + q2), l2 * np.cos(q1 + q2)]])
    return J @ np.linalg.inv(M)


def test_two_link_arm_decoupling_matrix_and_singular_set():
    plant = load_plant(BUNDLED / "pick_arm.yaml")
    s = _symbols(plant)
    report = analyse(plant, samples=256)
    io = report.input_output
    assert io.relative_degree == [2, 2]
    assert io.zero_dynamics_order == 0
    assert _zero_set_factors(io.singular_set) == {sp.sin(s["q2"])}
    values = {p.name: v for p, v in plant.parameters.items()}
    A = sp.lambdify([plant.states], io.decoupling_matrix.subs(plant.nominal), "numpy")
    rng = np.random.default_rng(3)
    for _ in range(10):
        q = rng.uniform(-3, 3, 2)
        state = [q[0], q[1], *rng.uniform(-2, 2, 2)]
        np.testing.assert_allclose(np.array(A(state), float), _two_link_reference(q, values),
                                   rtol=1e-10, atol=1e-12)
    assert report.input_state.linearizable is True          # fully actuated
    assert report.input_state.controllability_indices == [2, 2]


def test_envelope_through_the_arm_singularity_reports_near_zero_sigma():
    text = (BUNDLED / "pick_arm.yaml").read_text().replace("q2: [0.15, 2.6]", "q2: [-0.5, 0.5]")
    plant = plant_from_text(text.replace("q2: 1.2", "q2: 0.3"))
    env = analyse(plant, samples=512).envelope
    assert env.samples == 512
    assert env.min_sigma < 0.01
    assert abs(env.worst_state["q2"]) < 0.02
    # the reported worst state really has that sigma (numpy, independent evaluation)
    values = {p.name: v for p, v in plant.parameters.items()}
    sigma = np.linalg.svd(_two_link_reference([env.worst_state["q1"], env.worst_state["q2"]], values),
                          compute_uv=False)
    assert sigma[-1] == pytest.approx(env.min_sigma, rel=1e-9)


def test_envelope_min_sigma_is_a_true_minimum_over_its_samples():
    plant = plant_from_text("""
plant: p
states: [q, w]
inputs: [u1, u2]
dynamics: {q: u1, w: (2 + cos(q))*u2}
envelope: {q: [-3, 3], w: [-1, 1]}
""")
    env = sample_envelope(plant, plant.G, "G", samples=1000)
    assert env.samples == 1024                     # rounded up to a power of two
    assert env.min_sigma == pytest.approx(1.0)
    assert 1.0 < env.max_condition <= 3.0
    assert env.max_condition == pytest.approx(3.0, rel=1e-3)   # near q = 0


# -- invariant zeros against python-control (independent library) ---------------------------------
@pytest.mark.parametrize("seed", range(4))
def test_invariant_zeros_match_python_control(seed):
    control = pytest.importorskip("control")
    rng = np.random.default_rng(seed)
    n, m = 5, 2
    A, B, C = rng.normal(size=(n, n)), rng.normal(size=(n, m)), rng.normal(size=(m, n))
    ours = np.sort_complex(np.array(invariant_zeros(A, B, C)))
    theirs = np.sort_complex(control.ss(A, B, C, np.zeros((m, m))).zeros())
    np.testing.assert_allclose(ours, theirs, rtol=1e-7, atol=1e-9)


def test_survey_boat_zero_dynamics_match_python_control_zeros_of_the_linearization():
    control = pytest.importorskip("control")
    plant = load_plant(BUNDLED / "survey_boat.yaml")
    io = analyse(plant, samples=64).input_output
    assert io.relative_degree == [2, 2] and io.zero_dynamics_order == 2
    ctx = plant_context(plant)
    from linz_ros.geometry import evaluate
    X = sp.Matrix(plant.states)
    x0 = plant.operating_vector()
    A = evaluate(plant.f.jacobian(X), ctx, x0)
    B = evaluate(plant.G, ctx, x0)
    C = evaluate(plant.h.jacobian(X), ctx, x0)
    theirs = np.sort_complex(control.ss(A, B, C, np.zeros((2, 2))).zeros())
    ours = np.sort_complex(np.array(io.zero_dynamics.eigenvalues))
    np.testing.assert_allclose(ours, theirs, atol=1e-9)
    # sway decays with -d22/m22 (our scenario's numbers)
    assert min(z.real for z in ours) == pytest.approx(-55.0 / 85.0)


# -- structure of linear systems: Brunovsky / Kronecker indices (common practice) ----------------
def test_linear_system_indices_match_the_brunovsky_structure():
    # chain of 3 on u1 and chain of 2 on u2, mixed by an invertible change of coordinates
    plant = plant_from_text("""
plant: lin
states: [x1, x2, x3, x4, x5]
inputs: [u1, u2]
dynamics:
  x1: x2 + x4
  x2: x3
  x3: u1 + x1 - x5
  x4: x5
  x5: u2 + 2*x2
""")
    report = analyse(plant)
    assert report.input_state.linearizable is True
    assert report.input_state.controllability_indices == [3, 2]
    assert controllability_indices([1, 2, 3, 4], 1) == [4]
    assert controllability_indices([2, 3, 3], 2) == [2, 1]


def test_linearizing_output_that_is_not_a_coordinate_is_found_by_integration():
    # z1 = x1 + x2**2, z2 = x2 gives z1' = z2, z2' = u: T1 = x1 + x2**2 (constructed example)
    plant = plant_from_text("""
plant: bent
states: [x1, x2]
inputs: [u]
dynamics: {x1: x2 - 2*x2*u, x2: u}
""")
    iss = analyse(plant).input_state
    x1, x2 = plant.states
    assert iss.linearizable is True
    assert len(iss.linearizing_outputs) == 1
    assert _same(iss.linearizing_outputs[0], x1 + x2 ** 2)


def test_text_report_puts_the_verdict_first():
    text = render_text(analyse(load_plant(REFERENCE / "ball_beam.yaml")))
    lines = text.splitlines()
    assert lines[3] == "VERDICT"
    assert "input-state linearizable:  no" in lines[4]
    assert "no (relative degree not defined at the operating point" in lines[5]


def test_drift_terms_and_decoupling_matrix_give_the_output_second_derivative():
    # y'' = b(x) + A(x) u for relative degree (2, 2): differentiate y twice along
    # f + G u (u held constant) with sympy directly and compare at random points
    from linz_ros.analysis import decoupling_terms
    plant = load_plant(BUNDLED / "mast_camera.yaml")
    degrees, A, b, chains = decoupling_terms(plant, plant_context(plant))
    assert degrees == [2, 2]
    assert [len(c) for c in chains] == [2, 2] and chains[0][0] == plant.h[0]
    X, U = sp.Matrix(plant.states), sp.Matrix(plant.inputs)
    F = plant.closed_form_dynamics()
    y_dot = plant.h.jacobian(X) * F
    y_ddot = y_dot.jacobian(X) * F
    args = list(plant.states) + list(plant.inputs)
    direct = sp.lambdify([args], y_ddot.subs(plant.nominal), "numpy")
    ours = sp.lambdify([args], (b + A * U).subs(plant.nominal), "numpy")
    rng = np.random.default_rng(11)
    for _ in range(5):
        point = rng.uniform(-1, 1, len(args))
        np.testing.assert_allclose(np.ravel(ours(point)), np.ravel(direct(point)), rtol=1e-10, atol=1e-12)


# -- singular everywhere, verdicts that agree with their reasons, budgets -------------------
DECOUPLING_RANK_ONE = """
plant: p
states: [x1, x2]
inputs: [u1, u2]
parameters: {a: 2, b: 0.5}
dynamics:
  x1: u1 + a*u2
  x2: b*u1 + u2
outputs: {y1: x1, y2: x2}
"""


def test_a_parameter_factor_zero_at_the_nominal_values_makes_the_singular_set_everywhere():
    report = analyse(plant_from_text(DECOUPLING_RANK_ONE))           # det A = 1 - a b = 0
    io = report.to_json()["input_output"]
    assert io["reason"] == ("the decoupling matrix has rank 1 < 2 everywhere: the outputs cannot be decoupled "
                            "by static feedback; no extension with at most 2 integrators per input and 4 in all "
                            "gives a decoupling matrix of full rank: its rank stays at most 1 < 2 in all 8 "
                            "candidates because the outputs' highest derivatives see the inputs through at most "
                            "1 independent combination whatever the delays (as when one output is the rate of "
                            "another)")
    assert io["singular_set"] == "0" and io["singular_set_everywhere"] is True
    assert io["singular_set_empty"] is False and io["linearizable"] is False
    text = render_text(report)
    assert "singular set: everywhere (det A = 0 at every state" in text
    assert "input-output linearizable: no (the decoupling matrix is singular everywhere)" in text
    # the nonsingular case still reports nowhere
    fine = analyse(plant_from_text(DECOUPLING_RANK_ONE.replace("b: 0.5", "b: 0.25"))).to_json()["input_output"]
    assert fine["singular_set"] == "1" and fine["singular_set_everywhere"] is False


def test_single_input_singular_set_with_a_zero_parameter_factor_is_everywhere():
    text = """
plant: p
states: [x1, x2]
inputs: [u]
parameters: {a: 0}
dynamics:
  x1: a*cos(2*x1)**2*x2
  x2: u
"""
    report = analyse(plant_from_text(text))          # det[g, ad_f g] = a cos(2 x1)^2
    iss = report.to_json()["input_state"]
    assert iss["singular_set"] == "0" and iss["singular_set_everywhere"] is True
    assert "loses rank everywhere" in render_text(report)
    nonzero = analyse(plant_from_text(text.replace("a: 0", "a: 3"))).to_json()["input_state"]
    assert nonzero["singular_set"] == "cos(2*x1)" and nonzero["singular_set_everywhere"] is False


def test_verdict_line_agrees_with_an_undecided_detail():
    report = analyse(plant_from_text("plant: p\nstates: [th, w]\ninputs: [u]\n"
                                     "dynamics: {th: w, w: u}\noutputs: {y: log(th)}\n"))
    text = render_text(report)
    assert report.input_output.reason.startswith("could not decide")
    assert "input-output linearizable: could not decide (the decoupling matrix is not finite" in text
    assert report.to_json()["input_output"]["linearizable"] is None


def test_a_linearizing_output_undefined_at_the_operating_point_is_not_verified():
    report = analyse(plant_from_text("plant: p\nstates: [th, w]\ninputs: [u]\n"
                                     "dynamics: {th: w, w: u}\noutputs: {y: log(th)}\n"))
    iss = report.input_state
    assert [str(e) for e in iss.linearizing_outputs] == ["th"]
    assert "log(th) would have relative degree n but is undefined at the operating point" in \
        iss.linearizing_output_note


def test_more_outputs_than_inputs_names_the_reason_in_verdict_and_detail():
    report = analyse(plant_from_text("plant: p\nstates: [x1, x2]\ninputs: [u]\n"
                                     "dynamics: {x1: x2, x2: u}\noutputs: {y1: x1, y2: x2}\n"))
    text = render_text(report)
    assert "input-output linearizable: no (2 outputs but 1 input: give as many outputs as inputs)" in text
    assert "2 outputs but 1 input: the decoupling matrix is 2 x 1" in report.input_output.reason
    assert "plant p: 2 states, 1 input, 2 outputs" in text
    assert "inputs:" not in text.split("\n")[0] and "(s)" not in text


def test_plants_beyond_the_state_budget_are_undecided_at_once():
    from linz_ros.analysis._report import MAX_ANALYSIS_STATES
    n = MAX_ANALYSIS_STATES + 1
    dynamics = ", ".join(f"x{i}: x{i + 1}" for i in range(1, n)) + f", x{n}: u"
    plant = plant_from_text(f"plant: p\nstates: [{', '.join(f'x{i}' for i in range(1, n + 1))}]\ninputs: [u]\n"
                            f"dynamics: {{{dynamics}}}\noutputs: {{y: x1}}\n")
    report = analyse(plant)
    assert report.input_state.linearizable is None
    assert report.input_state.reason == (f"could not decide within the budget: {n} states, the geometric "
                                         f"analysis handles at most {MAX_ANALYSIS_STATES}")
    assert report.input_output.linearizable is None
    assert "input-output linearizable: could not decide (within the budget" in render_text(report)


# ---- beyond the symbolic budget: decisions from Taylor-mode jets ---------------------------

def _pendulum_chain(n):
    return plant_from_text(pendulum_chain_text(n))


_TWO_INPUTS = ("plant: two\nstates: [x1, x2, x3]\ninputs: [u1, u2]\nparameters: {c: 0.7}\n"
               "dynamics: {x1: sin(x2) + u1, x2: c*x3**2 + exp(x1)*u2, x3: x1*x2 - u1}\n"
               "outputs: {y1: x1, y2: x3 + x2**2}\noperating_point: {x1: 0.1, x2: 0.2, x3: 0.3}\n")


def _jet_cases():
    return [load_plant(REFERENCE / "khalil_two_state.yaml"), load_plant(REFERENCE / "cart_pole.yaml"),
            load_plant(REFERENCE / "flexible_joint.yaml"), _pendulum_chain(2), _pendulum_chain(3),
            plant_from_text(_TWO_INPUTS)]


@pytest.mark.parametrize("index", range(6))
def test_jet_decisions_agree_with_the_symbolic_ones(index):
    from linz_ros.analysis._input_output import _numeric_input_output, analyse_input_output
    from linz_ros.analysis._input_state import analyse_input_state
    from linz_ros.analysis._input_state_numeric import numeric_input_state
    from linz_ros.analysis._numeric import plant_jets
    plant = _jet_cases()[index]
    symbolic = analyse_input_state(plant, plant_context(plant))
    ctx = plant_context(plant)
    numeric = numeric_input_state(plant, ctx, plant_jets(plant, ctx))
    assert not symbolic.method and numeric.method.startswith("numeric from Taylor-mode jets")
    assert numeric.linearizable == symbolic.linearizable
    assert [(d.order, d.rank, d.rank_generic, d.involutive, d.witness) for d in numeric.distributions] == \
        [(d.order, d.rank, d.rank_generic, d.involutive, d.witness) for d in symbolic.distributions]
    assert numeric.controllability_indices == symbolic.controllability_indices
    coordinates = [T for T in symbolic.linearizing_outputs if T.is_Symbol]
    assert coordinates == [T for T in numeric.linearizing_outputs if T.is_Symbol]
    if plant.h.shape[0]:
        exact = analyse_input_output(plant, plant_context(plant))
        jets = _numeric_input_output(plant, ctx, plant_jets(plant, ctx))
        assert (jets.relative_degree, jets.relative_degree_generic, jets.linearizable, jets.zero_dynamics_order) == \
            (exact.relative_degree, exact.relative_degree_generic, exact.linearizable, exact.zero_dynamics_order)
        if exact.decoupling_matrix is not None and exact.relative_degree:
            points = ctx.samples
            from linz_ros.geometry import evaluate_many
            assert np.allclose(jets.decoupling_values(points), evaluate_many(exact.decoupling_matrix, ctx, points),
                               rtol=1e-9, atol=1e-9)


def test_fourteen_state_chain_is_decided_from_jets_with_relative_degree_fourteen():
    import time
    plant = _pendulum_chain(7)
    start = time.process_time()
    report = analyse(plant, samples=64)
    assert time.process_time() - start < 60      # CPU seconds: symbolically this chain takes hours
    assert report.input_state.linearizable is True
    assert report.input_state.method.startswith("numeric from Taylor-mode jets")
    assert [d.rank for d in report.input_state.distributions] == list(range(1, 15))
    assert [str(T) for T in report.input_state.linearizing_outputs] == ["th7"]
    io = report.input_output
    assert io.relative_degree == [14] and io.method.startswith("numeric from Taylor-mode jets")
    assert io.decoupling_matrix is None and io.singular_set is None
    # L_g L_f^13 th7 = k^6 along the chain of springs (only the spring path reaches the output)
    assert report.envelope.min_sigma == pytest.approx(4.0 ** 6, rel=1e-9)
    assert io.singular_set_note.startswith("not formed symbolically (L_g L_f^(r-1) h exceeds the symbolic "
                                           "budget); at the 5 random points: smallest singular value 4096 at th1=")
    document = report.to_json()
    assert document["input_output"]["method"] == io.method and document["input_state"]["method"]
    assert "method: numeric from Taylor-mode jets" in render_text(report)


def test_small_plants_keep_their_symbolic_report_without_new_fields():
    document = analyse(load_plant(REFERENCE / "khalil_two_state.yaml")).to_json()
    assert "method" not in document["input_state"] and "singular_set_note" not in document["input_state"]
    assert all(not d["method"].startswith("numeric from Taylor") for d in document["input_state"]["distributions"])


def test_an_analysis_past_its_cpu_budget_is_undecided_and_says_where_it_stopped():
    import time

    from linz_ros.geometry import Monitor
    plant = _pendulum_chain(3)      # symbolic: about a second of sympy
    start = time.process_time()
    report = analyse(plant, monitor=Monitor(seconds=0.0))
    assert time.process_time() - start < 5.0
    assert report.input_state.linearizable is None and report.input_output.linearizable is None
    assert report.input_state.reason == ("could not decide within the budget (0 s): stopped at input-state: "
                                         "distributions D_k")
    assert report.to_json()["input_output"]["relative_degree"] is None


def test_progress_reports_each_step_with_its_fraction():
    from linz_ros.geometry import Monitor
    seen = []
    analyse(_pendulum_chain(4), samples=16, monitor=Monitor(report=lambda step, fraction: seen.append((step, fraction))))
    steps = list(dict.fromkeys(step for step, _ in seen))
    assert steps[0] == "input-state: distributions D_k"
    assert "input-state: ad_f^k g (Taylor-mode jets)" in steps and "envelope sweep" in steps
    assert all(0.0 <= fraction <= 1.0 for _, fraction in seen)


def test_check_command_budget_and_progress(capsys):
    from linz_ros.cli import main
    assert main(["check", "--json", "--budget", "0.000001", str(REFERENCE / "cart_pole.yaml")]) == 0
    out = capsys.readouterr().out
    assert '"reason": "could not decide within the budget (1e-06 s): stopped at' in out
    assert main(["check", "--progress", "--samples", "16", str(REFERENCE / "khalil_two_state.yaml")]) == 0
    captured = capsys.readouterr()
    assert "check khalil_two_state: input-state: distributions D_k [" in captured.err
    assert "VERDICT" in captured.out


def test_a_lie_chain_formed_without_a_budget_is_not_reused_under_one():
    from linz_ros.analysis import lie_chain, plant_context
    from linz_ros.geometry import BeyondSymbolicBudget
    from linz_ros.model import plant_from_text

    plant = plant_from_text("plant: p\nstates: [x1, x2, x3]\ninputs: [u]\n"
                            "dynamics: {x1: sin(x2), x2: x3**2 + cos(x1), x3: u}\noutputs: {y: x1}")
    ctx = plant_context(plant)
    degree, _, chain = lie_chain(plant.h[0], plant, ctx)
    assert degree == 3 and len(chain) == 3
    with pytest.raises(BeyondSymbolicBudget):
        lie_chain(plant.h[0], plant, ctx, tree_budget=1)
