"""The controller core and its watchdogs: singularity, saturation, bad input, hold, staleness."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from support import BUNDLED, MINIMAL, built_artifact
from support import pendulum_chain_text as chain_text
from linz_ros.errors import ConfigError
from linz_ros.runtime import ControllerCore, SimSettings, WatchdogConfig, make_reference, simulate


@pytest.fixture(scope="module")
def arm():
    return built_artifact(BUNDLED / "pick_arm.yaml")


def _sigma_numpy(core, x):
    A = core.artifact.programs["law"].evaluate(x, core.parameters)["A"]
    s = np.linalg.svd(A, compute_uv=False)
    return s[-1], s[0] / s[-1]


def test_a_trajectory_through_the_singular_set_switches_modes_as_specified(arm):
    # the stretched arm (q2 = 0) is singular for the tool point: sigma_min ~ |sin q2|; the path
    # leaves the envelope (q2 >= 0.15, widened by 10 % of its range), where the envelope watchdog
    # is set to warn so the singularity watchdog alone decides the mode
    core = ControllerCore(arm, WatchdogConfig.from_artifact(arm, envelope_action="warn"))
    c = core.config
    low = c.widened_envelope()[1][1]
    q2_path = np.concatenate([np.linspace(0.9, -0.4, 400), np.linspace(-0.4, 0.9, 400)])
    ref = core.hold_reference([0.4, 0.9, 0.0, 0.0])
    seen, previous = [], None
    for k, q2 in enumerate(q2_path):
        x = [0.4, q2, 0.05, -0.1]
        u, record = core.step(x, ref, t=0.002 * (k + 1))
        sigma, condition = _sigma_numpy(core, x)
        assert record.sigma_min == pytest.approx(sigma, rel=1e-9, abs=1e-15)
        if math.isfinite(condition):
            assert record.condition == pytest.approx(condition, rel=1e-8)
        expected = ("safe" if sigma < c.sigma_stop else "damped" if sigma < c.sigma_act else "nominal")
        assert record.mode == expected, (q2, sigma)
        assert record.warn == (sigma < c.sigma_warn)
        outside = q2 < low
        assert record.alarms == int(outside)
        nominal = "outside_envelope" if outside else "ok"
        assert record.reason == {"safe": "singular", "damped": "near_singular", "nominal": nominal}[expected]
        assert all(math.isfinite(v) for v in u) and len(u) == 2
        assert record.compute_time > 0
        if expected == "safe":
            assert u == [0.0, 0.0]
        if record.mode != previous:
            seen.append(record.mode)
            previous = record.mode
    assert seen == ["nominal", "damped", "safe", "damped", "nominal", "damped", "safe", "damped", "nominal"]


def test_damped_command_is_continuous_at_the_act_threshold_and_bounded_near_the_stop(arm):
    core = ControllerCore(arm, WatchdogConfig.from_artifact(arm, input_limits=((-1e9, 1e9), (-1e9, 1e9))))
    # q2 near the value where sigma_min crosses sigma_act, in fine steps: no jump in the command
    q2s = np.linspace(0.2, 0.02, 2000)
    ref = core.hold_reference([0.4, 0.5, 0.0, 0.0])
    commands, modes, damped = [], [], []
    c = core.config
    for k, q2 in enumerate(q2s):
        u, record = core.step([0.4, q2, 0.0, 0.0], ref, t=1e-3 * (k + 1))
        commands.append(u)
        modes.append(record.mode)
        if record.mode == "damped":
            damped.append((record.sigma_min, record.damping))
            # |u| <= |v - b| / (2 lambda) for the damped least-squares solution
            law = core.artifact.programs["law"].evaluate([0.4, q2, 0.0, 0.0], core.parameters)
            v = np.array(ref[2::3]) - 42 * (law["chain"][0::2] - np.array(ref[0::3])) - 13 * law["chain"][1::2]
            assert np.linalg.norm(u) <= np.linalg.norm(v - law["b"]) / (2 * record.damping) * (1 + 1e-9)
    assert "damped" in modes and "nominal" in modes
    # sigma_min falls along the path and the damping grows with it: lambda = lambda_max sqrt(1 - (s / s_act)^2)
    sigmas, dampings = np.array(damped).T
    assert np.all(np.diff(sigmas) < 0) and np.all(np.diff(dampings) > 0)
    assert dampings == pytest.approx(c.damping * np.sqrt(1 - (sigmas / c.sigma_act) ** 2), rel=1e-12)
    assert dampings[0] < 0.05 * c.damping and dampings[-1] > 0.5 * c.damping
    switch = modes.index("damped")
    jumps = np.abs(np.diff(np.array(commands), axis=0)).max(axis=1)
    assert jumps[switch - 1] < 5 * np.median(jumps[max(0, switch - 50):switch - 1]) + 1e-9


def test_box_and_rate_limits_clip_and_say_which_input(arm):
    wide = ((-1e6, 1e6), (-1e6, 1e6))
    free = ControllerCore(arm, WatchdogConfig.from_artifact(arm, input_limits=wide))
    boxed = ControllerCore(arm, WatchdogConfig.from_artifact(arm, input_limits=((-2.0, 2.0), (-1.0, 1.0))))
    rated = ControllerCore(arm, WatchdogConfig.from_artifact(arm, input_limits=wide, rate_limits=(100.0, math.inf)))
    x = [0.4, 1.2, 0.0, 0.0]
    ref = free.hold_reference(x)
    ref[0] += 0.05                                    # a step in tool_x
    u_free, _ = free.step(x, ref, t=0.01)
    u_box, record = boxed.step(x, ref, t=0.01)
    assert u_box == [min(max(u_free[0], -2.0), 2.0), min(max(u_free[1], -1.0), 1.0)]
    assert record.saturated == (abs(u_free[0]) > 2.0, abs(u_free[1]) > 1.0)
    # rate limits: the first step starts from the resting command (zero) with dt = 1/rate
    commands = [rated.step(x, ref, t=0.002 * k) for k in range(1, 40)]
    u1, record1 = commands[0]
    assert u1[0] == pytest.approx(math.copysign(100.0 * 0.002, u_free[0])) and record1.saturated == (True, False)
    steps = np.abs(np.diff([u[0] for u, _ in commands]))
    assert np.all(steps <= 100.0 * 0.002 + 1e-12)
    assert all(r.saturated[0] for _, r in commands[:10]) and not any(r.saturated[1] for _, r in commands)


def test_integral_action_with_anti_windup_overshoots_less(tmp_path):
    text = (MINIMAL + "outputs: {y: x1}\ninput_limits: {u: [-3, 3]}\n"
            "design: {rate: 200, integral: true, poles: {y: [-3, -4, -5]}}\n")
    artifact = built_artifact(text)
    reference = make_reference("step", [2], [0.0], 1.2, at=0.05)
    runs = {}
    for anti_windup in (True, False):
        config = WatchdogConfig.from_artifact(artifact, anti_windup=anti_windup)
        result = simulate(artifact, SimSettings(duration=6.0, reference=reference, config=config,
                                                initial=[0.0, 0.0]))
        runs[anti_windup] = result
    overshoot = {k: float(np.max(r.y[:, 0]) - 1.2) for k, r in runs.items()}
    assert runs[True].saturated.any() and runs[False].saturated.any()
    assert overshoot[True] < 0.5 * overshoot[False]
    assert abs(runs[True].errors()[-1, 0]) < 1e-3          # integral action still removes the offset


def test_integral_action_removes_a_constant_model_error():
    text = (MINIMAL + "outputs: {y: x1}\n"
            "design: {rate: 200, integral: true, poles: {y: [-3, -4, -5]}}\n")
    artifact = built_artifact(text)
    reference = make_reference("hold", [2], [0.3])
    with_integral = simulate(artifact, SimSettings(duration=8.0, reference=reference, initial=[0.3, 0.0],
                                                   plant_parameters=[2.6]))        # k 30 % off
    assert abs(with_integral.errors()[-1, 0]) < 1e-4


@pytest.mark.parametrize("x, ref, t, now, reason", [
    ([0.4, 1.2, 0.0], None, 1.0, None, "wrong_length"),
    ([0.4, 1.2, 0.0, 0.0, 0.0], None, 1.0, None, "wrong_length"),
    ([0.4, math.nan, 0.0, 0.0], None, 1.0, None, "non_finite_state"),
    ([0.4, 1.2, math.inf, 0.0], None, 1.0, None, "non_finite_state"),
    (["a", 1.2, 0.0, 0.0], None, 1.0, None, "wrong_length"),
    (None, None, 1.0, None, "wrong_length"),
    ([0.4, 1.2, 0.0, 0.0], [0.0] * 5, 1.0, None, "bad_reference"),
    ([0.4, 1.2, 0.0, 0.0], [math.nan] * 6, 1.0, None, "bad_reference"),
    ([0.4, 1.2, 0.0, 0.0], None, math.nan, None, "bad_time"),
    ([0.4, 1.2, 0.0, 0.0], None, "soon", None, "bad_time"),
    ([0.4, 1.2, 0.0, 0.0], None, 0.5, None, "out_of_order"),       # older than the last one used
    ([0.4, 1.2, 0.0, 0.0], None, 0.9, None, "out_of_order"),       # the same stamp again
    ([0.4, 1.2, 0.0, 0.0], None, 1.0, 1.5, "stale"),               # 0.5 s old at 'now'
])
def test_bad_input_gives_the_safe_command_and_a_reason(arm, x, ref, t, now, reason):
    core = ControllerCore(arm)
    good = [0.4, 1.2, 0.0, 0.0]
    core.step(good, core.hold_reference(good), t=0.9)
    u, record = core.step(x, core.hold_reference(good) if ref is None else ref, t=t, now=now)
    assert record.reason == reason and record.mode == "safe" and u == [0.0, 0.0]
    u, record = core.step(good, core.hold_reference(good), t=2.0)       # and it recovers
    assert record.mode == "nominal"


def test_a_model_that_is_not_finite_at_the_state_is_refused():
    text = ("plant: root\nstates: [x]\ninputs: [u]\ndynamics: {x: sqrt(x) + u}\noutputs: {y: sqrt(x)}\n"
            "operating_point: {x: 1.0}\nenvelope: {x: [0.5, 2]}\ndesign: {poles: {y: [-1]}}\n")
    core = ControllerCore(built_artifact(text))
    u, record = core.step([-1.0], [1.0, 0.0], t=0.1)
    assert record.reason == "model_not_finite" and u == [0.0]
    u, record = core.step([1.0], [1.0, 0.0], t=0.2)
    assert record.mode == "nominal"


def test_hold_repeats_the_last_good_command_within_hold_time_then_goes_safe(arm):
    core = ControllerCore(arm, WatchdogConfig.from_artifact(arm, safe_kind="hold", hold_time=0.1))
    good = [0.4, 1.2, 0.3, 0.0]
    ref = core.hold_reference([0.4, 1.25, 0.0, 0.0])
    u, record = core.step(good, ref, t=1.0)
    assert record.mode == "nominal" and u != [0.0, 0.0]
    held, record = core.step([math.nan] * 4, ref, t=1.05)
    assert record.mode == "held" and held == u and record.reason == "non_finite_state"
    later, record = core.step([math.nan] * 4, ref, t=1.2)
    assert record.mode == "safe" and later == [0.0, 0.0]
    core.step(good, ref, t=1.3)
    final, record = core.safe_step(1.31, "no_state", final=True)     # deactivate or shutdown: never held
    assert final == [0.0, 0.0] and record.mode == "safe"


def test_fixed_safe_command_and_staleness(arm):
    core = ControllerCore(arm, WatchdogConfig.from_artifact(arm, safe_kind="fixed", safe_value=(1.0, -0.5)))
    assert core.is_stale(0.0)
    x = [0.4, 1.2, 0.0, 0.0]
    core.step(x, core.hold_reference(x), t=1.0)
    assert not core.is_stale(1.0 + 0.5 * core.config.stale_after)
    assert core.is_stale(1.0 + 2 * core.config.stale_after)
    u, record = core.safe_step(1.5, "stale")
    assert u == [1.0, -0.5] and record.mode == "safe" and record.reason == "stale"


def test_watchdog_settings_are_checked(arm):
    with pytest.raises(ConfigError, match="sigma_act: 100 is above sigma_warn .*; expected sigma_warn >= sigma_act"):
        WatchdogConfig.from_artifact(arm, sigma_act=100.0)
    with pytest.raises(ConfigError, match="unknown watchdog setting"):
        WatchdogConfig.from_artifact(arm, sigma_wran=1.0)
    with pytest.raises(ConfigError, match="rate_limits: expected 2 entries, one per input, got 1"):
        WatchdogConfig.from_artifact(arm, rate_limits=(1.0,))
    with pytest.raises(ConfigError, match="damping: expected a number > 0, got 0"):
        WatchdogConfig.from_artifact(arm, damping=0.0)
    with pytest.raises(ConfigError, match="parameters: expected 9 finite values"):
        ControllerCore(arm, parameters=[1.0])
    with pytest.raises(ConfigError, match="damping: expected a number, got '0.1'"):
        WatchdogConfig.from_artifact(arm, damping="0.1")
    with pytest.raises(ConfigError, match="max_dt: expected a positive number"):
        WatchdogConfig.from_artifact(arm, max_dt=0.0)
    with pytest.raises(ConfigError, match="input_limits: input 1"):
        WatchdogConfig.from_artifact(arm, input_limits=((-1.0, 1.0), (2.0, 1.0)))
    for key in ("stale_after", "hold_time", "future_tolerance"):      # timers of such periods overflow
        with pytest.raises(ConfigError, match=f"{key}: expected at most 3600 s, got 1e[+]12"):
            WatchdogConfig.from_artifact(arm, **{key: 1e12})


def test_a_stamp_from_the_future_is_refused_and_does_not_block_later_states(arm):
    core = ControllerCore(arm)
    x = [0.4, 1.2, 0.0, 0.0]
    ref = core.hold_reference(x)
    u, record = core.step(x, ref, t=1e9, now=0.002)
    assert record.reason == "future_stamp" and record.mode == "safe"
    tolerance = core.config.stale_after                         # future_tolerance defaults to stale_after
    u, record = core.step(x, ref, t=0.001 + 0.5 * tolerance, now=0.001)     # a little clock skew: accepted
    assert record.mode == "nominal"
    core.reset()
    for k in range(2, 6):
        u, record = core.step(x, ref, t=0.002 * k)
        assert record.mode == "nominal"


def test_hold_time_is_measured_against_now_for_every_refusal(arm):
    core = ControllerCore(arm, WatchdogConfig.from_artifact(arm, safe_kind="hold", hold_time=0.5))
    x = [0.4, 1.2, 0.3, 0.0]
    ref = core.hold_reference(x)
    good, _ = core.step(x, ref, t=1.0)
    for bad_x, t, now in (([0.4], 0.0, 1000.0), ([math.nan] * 4, math.nan, 1000.0), (x, 0.5, 1000.0)):
        u, record = core.step(bad_x, ref, t=t, now=now)
        assert record.mode == "safe" and u == [0.0, 0.0], record
    u, record = core.step([0.4], ref, t=1.1, now=1.1)             # within hold_time of the good command
    assert record.mode == "held" and u == good


def test_huge_numbers_and_odd_types_never_raise(arm):
    core = ControllerCore(arm)
    x = [0.4, 1.2, 0.0, 0.0]
    ref = core.hold_reference(x)
    for args in (([10 ** 400, 1, 0, 0], ref, 0.1, None), (x, [10 ** 400] * 6, 0.2, None), (x, ref, 10 ** 400, None),
                 (x, ref, 0.3, 10 ** 400), ([0.4], ref, 10 ** 400, None), (np.array(x), np.array(ref), np.float64(0.4), None),
                 ((v for v in x), ref, 0.5, None), ([True, 1, 0, 0], ref, 0.6, None), ({"a": 1}, ref, 0.7, None)):
        u, record = core.step(*args)
        assert len(u) == 2 and all(math.isfinite(v) for v in u)


_junk = st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.integers(-10**6, 10**6),
                  st.none(), st.text(max_size=3), st.booleans())


@settings(max_examples=300, deadline=None)
@given(st.one_of(st.lists(_junk, max_size=6), st.none(), st.text(max_size=4)),
       st.one_of(st.lists(_junk, max_size=7), st.none()), _junk, _junk)
def test_the_step_never_raises_and_the_command_is_always_finite_and_within_limits(x, ref, t, now):
    core = _shared_core()
    u, record = core.step(x, ref, t, now)
    assert len(u) == 2 and all(math.isfinite(v) for v in u)
    assert all(lo <= v <= hi for v, (lo, hi) in zip(u, core.config.input_limits))
    assert record.mode in ("nominal", "damped", "held", "safe")


_CORE = []


def _shared_core():
    if not _CORE:
        _CORE.append(ControllerCore(built_artifact(BUNDLED / "pick_arm.yaml")))
    return _CORE[0]


# -- three inputs: the numpy path of the core ----------------------------------------------------
_THREE = """\
plant: three_axis
states: [a, b, c]
inputs: [u1, u2, u3]
dynamics: {a: u1 + 0.5*u2, b: u2 - 0.2*u3, c: c*u3 + 0.1*u1}
outputs: {ya: a, yb: b, yc: c}
operating_point: {c: 1.0}
envelope: {a: [-1, 1], b: [-1, 1], c: [-1, 2]}
design: {rate: 100, poles: {ya: [-2], yb: [-3], yc: [-4]}}
"""


def test_three_inputs_use_numpy_and_agree_with_a_direct_solve():
    core = ControllerCore(built_artifact(_THREE))
    rng = np.random.default_rng(1)
    for k in range(20):
        x = [rng.uniform(-1, 1), rng.uniform(-1, 1), rng.uniform(0.5, 2.0)]
        ref = [0.1, 0.0, -0.1, 0.0, 0.2, 0.0]
        u, record = core.step(x, ref, t=0.01 * (k + 1))
        A = np.array([[1.0, 0.5, 0.0], [0.0, 1.0, -0.2], [0.1, 0.0, x[2]]])
        v = np.array([-2 * (x[0] - 0.1), -3 * (x[1] + 0.1), -4 * (x[2] - 0.2)])
        assert record.mode == "nominal"
        np.testing.assert_allclose(u, np.linalg.solve(A, v), rtol=1e-10)
        assert record.sigma_min == pytest.approx(np.linalg.svd(A, compute_uv=False)[-1], rel=1e-12)


def test_three_inputs_pass_through_the_singular_set_with_finite_commands():
    core = ControllerCore(built_artifact(_THREE))
    c = core.config
    modes = []
    for k, x3 in enumerate(np.linspace(1.0, -0.5, 600)):
        u, record = core.step([0.0, 0.0, x3], [0.0, 0.0, 0.0, 0.0, 0.5, 0.0], t=0.01 * (k + 1))
        assert all(math.isfinite(v) for v in u)
        A = np.array([[1.0, 0.5, 0.0], [0.0, 1.0, -0.2], [0.1, 0.0, x3]])
        sigma = np.linalg.svd(A, compute_uv=False)[-1]
        assert record.mode == ("safe" if sigma < c.sigma_stop else "damped" if sigma < c.sigma_act else "nominal")
        modes.append(record.mode)
    assert {"nominal", "damped", "safe"} <= set(modes)


@pytest.mark.parametrize("name", ["pick_arm_mass_matrix", "pick_arm_energy", "pick_arm_serial"])
def test_a_mechanical_artifact_commands_what_the_explicit_one_does(arm, name):
    # the same arm: the explicit file carries A and b, the mechanical one M, F, B, J and J' q'
    from support import REFERENCE

    mechanical = ControllerCore(built_artifact(REFERENCE / f"{name}.yaml"))
    explicit = ControllerCore(arm)
    assert mechanical.artifact.mechanical_coordinates == 2 and explicit.artifact.mechanical_coordinates is None
    rng = np.random.default_rng(21)
    modes = set()
    for k in range(60):
        x = [rng.uniform(-0.6, 1.8), rng.uniform(0.0, 2.6), rng.uniform(-2, 2), rng.uniform(-2, 2)]
        ref = [rng.uniform(0.2, 0.6), 0.1, 0.0, rng.uniform(0.2, 0.6), 0.0, 0.0]
        u1, r1 = explicit.step(x, ref, t=0.002 * (k + 1))
        u2, r2 = mechanical.step(x, ref, t=0.002 * (k + 1))
        assert u2 == pytest.approx(u1, rel=1e-9, abs=1e-9)
        assert (r2.mode, r2.reason, r2.saturated) == (r1.mode, r1.reason, r1.saturated)
        assert r2.sigma_min == pytest.approx(r1.sigma_min, rel=1e-9, abs=1e-15)
        modes.add(r1.mode)
    assert {"nominal", "damped"} <= modes            # the states reach the singular set q2 = 0


def test_a_mass_matrix_that_is_not_positive_definite_at_run_time_gives_the_safe_command():
    text = """\
plant: softening
coordinates: [p]
inputs: [u]
parameters: {m: 1.0}
mass_matrix: [[m - p**2]]
envelope: {p: [-0.5, 0.5]}
design: {poles: [-2, -3]}
"""
    core = ControllerCore(built_artifact(text))
    u, record = core.step([0.2, 0.0], [0.0, 0.0, 0.0], t=0.01)
    assert record.mode == "nominal" and math.isfinite(u[0])
    u, record = core.step([1.5, 0.0], [0.0, 0.0, 0.0], t=0.02)      # M = -1.25: the model is void here
    assert (record.mode, record.reason) == ("safe", "model_not_finite") and u == [0.0]


def test_the_six_joint_arm_core_step_is_computed_torque():
    # joint outputs: u = M v - F exactly (B = I, J = I), with v the outer-loop acceleration
    from linz_ros.model import load_plant, numeric_function

    plant = load_plant(BUNDLED / "loader_arm.yaml")
    artifact = built_artifact(BUNDLED / "loader_arm.yaml")
    # random states over [-1, 1] leave the arm's envelope: the envelope watchdog only warns here
    core = ControllerCore(artifact, WatchdogConfig.from_artifact(
        artifact, envelope_action="warn", input_limits=tuple((-1e9, 1e9) for _ in range(6))))
    evaluate = numeric_function(list(plant.states) + list(plant.parameters),
                                [list(plant.mechanics.M), list(plant.mechanics.F)])
    gains = [np.asarray(g) for g in artifact.gains]
    rng = np.random.default_rng(3)
    for k in range(10):
        x = list(rng.uniform(-1, 1, 12))
        ref = []
        for i in range(6):
            ref += [x[i] + 0.01, 0.02, 0.3]
        u, record = core.step(x, ref, t=0.002 * (k + 1))
        M, F = evaluate(*x, *plant.parameters.values())
        v = [ref[3 * i + 2] - gains[i][0] * (x[i] - ref[3 * i]) - gains[i][1] * (x[6 + i] - ref[3 * i + 1])
             for i in range(6)]
        expected = np.reshape(np.array(M, float), (6, 6)) @ v - np.array(F, float)
        assert record.mode == "nominal"
        np.testing.assert_allclose(u, expected, rtol=1e-9)


@pytest.mark.parametrize("integral", [False, True])
def test_the_straight_line_outer_loop_is_the_chain_law(integral):
    # v_i = y_ref_i^(r_i) - k_I eta_i - sum_d K_id (y_i^(d) - y_ref_i^(d)), minus b_i where the law carries b
    design = ("design: {rate: 200, integral: true, poles: {y: [-3, -4, -5], z: [-2, -6]}}\n" if integral else
              "design: {rate: 200, poles: {y: [-3, -4], z: [-2]}}\n")
    text = ("plant: two_chains\nstates: [x1, x2, x3]\ninputs: [u1, u2]\nparameters: {k: 2.0}\n"
            "dynamics: {x1: x2, x2: -k*sin(x1) + u1 + x3, x3: u2 - x3}\noutputs: {y: x1, z: x3}\n" + design)
    core = ControllerCore(built_artifact(text))
    rng = np.random.default_rng(int(integral))
    for _ in range(20):
        values = list(rng.normal(size=core.artifact.programs["law"].size))
        ref = list(rng.normal(size=core.reference_size))
        core.integrators = list(rng.normal(size=2))
        w, errors = core._outer_loop(values, ref)
        b = values[core._b_slice]
        k, j = core._chain_offset, 0
        for i, (r, gains) in enumerate(zip(core.orders, core.gains)):
            k_integral, K = (gains[0], gains[1:]) if integral else (0.0, gains)
            v = ref[j + r] - k_integral * core.integrators[i] - sum(K[d] * (values[k + d] - ref[j + d])
                                                                   for d in range(r))
            assert w[i] == pytest.approx(v - b[i], rel=1e-12, abs=1e-12)
            assert errors[i] == values[k] - ref[j]
            k, j = k + r, j + r + 1


def test_a_state_whose_sum_overflows_is_still_finite():
    from linz_ros.runtime.core import _all_finite

    assert _all_finite([1e308, 1e308, -1.0]) and _all_finite([]) and _all_finite((0.5,))
    assert not _all_finite([1.0, math.nan]) and not _all_finite([math.inf, -math.inf]) and not _all_finite([1e308, math.inf])


def test_an_accepted_future_stamp_does_not_lock_out_the_states_after_it(arm):
    # one state stamped 0.24 s ahead (inside a 0.3 s tolerance) used to make every state up to
    # that stamp "out of order": 0.24 s of safe command
    core = ControllerCore(arm, WatchdogConfig.from_artifact(arm, future_tolerance=0.3))
    x = [0.4, 1.2, 0.0, 0.0]
    ref = core.hold_reference(x)
    assert core.step(x, ref, t=1.0, now=1.0)[1].mode == "nominal"
    assert core.step(x, ref, t=1.24, now=1.002)[1].mode == "nominal"      # skewed, accepted
    for k in range(2, 50):
        now = 1.002 + 0.002 * k
        u, record = core.step(x, ref, t=now, now=now)
        assert (record.mode, record.reason) == ("nominal", "ok"), k
    u, record = core.step(x, ref, t=now, now=now)                         # a true repeat is still refused
    assert record.reason == "out_of_order"


def test_the_envelope_watchdog_acts_outside_the_widened_envelope_only(arm):
    core = ControllerCore(arm, WatchdogConfig.from_artifact(arm, envelope_action="safe"))
    config = core.config
    (i, lo, hi), = [b for b in config.widened_envelope() if b[0] == 1]
    assert (lo, hi) == pytest.approx((0.15 - 0.1 * 2.45, 2.6 + 0.1 * 2.45))     # q2: [0.15, 2.6] widened 10 %
    x = [0.4, 1.2, 0.0, 0.0]
    ref = core.hold_reference(x)
    inside = core.step([0.4, hi - 1e-9, 0.0, 0.0], ref, t=0.002)[1]
    assert (inside.mode, inside.alarms) == ("nominal", 0)
    u, outside = core.step([0.4, hi + 1e-6, 0.0, 0.0], ref, t=0.004)
    assert (outside.mode, outside.reason, outside.alarms) == ("safe", "outside_envelope", 1)
    assert u == [0.0, 0.0] and math.isfinite(outside.sigma_min)
    back = core.step(x, ref, t=0.006)[1]
    assert (back.mode, back.reason, back.alarms) == ("nominal", "ok", 0)     # not latched
    warn = ControllerCore(arm, config.with_overrides(envelope_action="warn"))
    u, flagged = warn.step([0.4, hi + 1e-6, 0.0, 0.0], ref, t=0.002)
    assert (flagged.mode, flagged.reason, flagged.alarms) == ("nominal", "outside_envelope", 1)
    assert u != [0.0, 0.0]


def test_the_divergence_watchdog_trips_on_a_growing_error_and_latches_until_reset(arm):
    core = ControllerCore(arm, WatchdogConfig.from_artifact(arm, divergence_error=(0.01, 0.01),
                                                          divergence_time=0.1, envelope_action="warn"))
    x = [0.4, 1.2, 0.0, 0.0]
    y = core.output_values(x)
    p = [y[0], 0.0, 0.0, y[1], 0.0, 0.0]
    records = []
    for k in range(200):                      # the reference runs away from the arm: 0.2 m/s
        t = 0.002 * (k + 1)
        ref = [y[0] + 0.2 * t, 0.0, 0.0, y[1], 0.0, 0.0]
        records.append(core.step(x, ref, t=t)[1])
    crossed = next(k for k, r in enumerate(records) if abs(0.2 * 0.002 * (k + 1)) > 0.01)
    first = next(k for k, r in enumerate(records) if r.alarms & 2)
    assert records[first].t - records[crossed].t == pytest.approx(0.1, abs=0.0021)
    assert all(r.mode == "nominal" for r in records[:first])
    assert all((r.mode, r.reason) == ("safe", "diverging") for r in records[first:])
    back = core.step(x, p, t=1.0)[1]
    assert (back.mode, back.reason) == ("safe", "diverging")             # latched: the model is wrong
    core.reset()
    assert core.step(x, p, t=1.002)[1].mode == "nominal"


def test_a_large_error_that_decays_is_a_transient_not_divergence(arm):
    core = ControllerCore(arm, WatchdogConfig.from_artifact(arm, divergence_error=(0.01, 0.01),
                                                          divergence_time=0.05))
    x = [0.4, 1.2, 0.0, 0.0]
    y = core.output_values(x)
    for k in range(200):                      # error 0.1 falling to zero: above the bound for 0.36 s
        t = 0.002 * (k + 1)
        offset = max(0.0, 0.1 - 0.25 * t)
        u, record = core.step(x, [y[0] + offset, 0.0, 0.0, y[1], 0.0, 0.0], t=t)
        assert record.alarms == 0 and record.mode == "nominal", t


def test_watchdog_changes_reach_the_envelope_and_divergence_checks(arm):
    core = ControllerCore(arm, WatchdogConfig.from_artifact(arm, envelope_action="safe"))
    x_out = [0.4, 3.2, 0.0, 0.0]
    ref = core.hold_reference([0.4, 1.2, 0.0, 0.0])
    assert core.step(x_out, ref, t=0.002)[1].reason == "outside_envelope"
    core.config = core.config.with_overrides(envelope_margin=0.5)
    assert core.step(x_out, ref, t=0.004)[1].reason == "ok"
    with pytest.raises(ConfigError, match="divergence_error: expected 2 bounds, one per output"):
        core.config = core.config.with_overrides(divergence_error=(1.0,))
    with pytest.raises(ConfigError, match="envelope_action: expected one of warn, stop, safe, got 'halt'"):
        WatchdogConfig.from_artifact(arm, envelope_action="halt")


def test_by_default_leaving_the_envelope_stops_the_machine_under_control(arm):
    # a controlled stop: the law keeps commanding (gravity compensated), the reference is frozen at the
    # outputs where the envelope was left, with zero derivatives, until the state is back inside the
    # envelope itself (the margin is the hysteresis); the user's reference is ignored meanwhile
    core = ControllerCore(arm)
    assert core.config.envelope_action == "stop"
    x = [0.4, 1.2, 0.0, 2.5]                                   # w2 above 2 widened by 10 %: outside
    moving = core.hold_reference([0.5, 1.0, 0.0, 0.0])        # the user's reference asks for a move
    u, record = core.step(x, moving, t=0.002)
    assert (record.mode, record.reason, record.alarms) == ("stopping", "outside_envelope", 1)
    hold = ControllerCore(arm, core.config.with_overrides(envelope_action="warn"))
    expected, _ = hold.step(x, hold.hold_reference(x), t=0.002)
    assert u == pytest.approx(expected, rel=1e-12)             # the law holding the outputs where they were
    target = []
    for y, r in zip(core.output_values(x), core.orders):
        target += [y] + [0.0] * r
    x_margin = [0.42, 1.19, 0.1, 2.2]                          # inside the widened envelope, not the plain one
    u, record = core.step(x_margin, moving, t=0.004)
    assert (record.mode, record.reason, record.alarms) == ("stopping", "outside_envelope", 0)
    fresh = ControllerCore(arm, core.config.with_overrides(envelope_action="warn"))
    assert u == pytest.approx(fresh.step(x_margin, target, t=0.002)[0], rel=1e-12)   # the same target
    x_in = [0.42, 1.19, 0.1, 0.3]                              # back inside: the user's reference again
    u, record = core.step(x_in, moving, t=0.006)
    assert (record.mode, record.reason, record.alarms) == ("nominal", "ok", 0)


@pytest.mark.parametrize("period", [0.25, 0.5, 1.0, 2.0])
def test_a_growing_swing_is_divergence_and_a_decaying_one_is_not(arm, period):
    # the error swings through zero: one episode as long as its dips under the bound are short
    config = WatchdogConfig.from_artifact(arm, divergence_error=(0.01, 0.01), envelope_action="warn")
    x = [0.4, 1.2, 0.0, 0.0]
    # a decaying swing slower than the watchdog's window (2 s against 0.5 s) still rises past the bound
    # for longer than the window: that is growth as far as the window can see
    for growth, expected in ((+1.0, True), (-1.5, period > 1.0)):
        core = ControllerCore(arm, config)
        y = core.output_values(x)
        tripped = False
        for k in range(2000):
            t = 0.002 * (k + 1)
            amplitude = 0.05 * math.exp(growth * t)
            ref = [y[0] + amplitude * math.sin(2 * math.pi * t / period), 0.0, 0.0, y[1], 0.0, 0.0]
            tripped |= bool(core.step(x, ref, t=t)[1].alarms & 2)
        assert tripped == expected, (period, growth)


# -- elastic joints: the law against closed forms ---------------------------------------------
from support import REFERENCE  # noqa: E402


def test_single_elastic_joint_law_equals_the_published_closed_form():
    # Spong 1987, one-link flexible joint: I q'' + MgL sin q + k (q - th) = 0, J th'' - k (q - th) = u;
    # y'''' = a(x) + k / (I J) u with a from differentiating the link equation twice (his eq. for L_f^4 h)
    I, MgL, k, J = 0.031, 0.8, 31.0, 0.004
    core = ControllerCore(built_artifact(REFERENCE / "elastic_joint.yaml"))
    rng = np.random.default_rng(7)
    for n in range(5):
        q, w, th, thd = rng.uniform(-1, 1, 4)
        qdd = (-MgL * math.sin(q) - k * (q - th)) / I
        qddd = (-MgL * math.cos(q) * w - k * (w - thd)) / I
        a = (MgL * math.sin(q) * w * w - MgL * math.cos(q) * qdd - k * qdd + k * k * (q - th) / J) / I
        v = rng.uniform(-50, 50)
        ref = [q, w, qdd, qddd, v]           # errors zero: the outer loop gives v itself
        u, record = core.step([q, w, th, thd], ref, t=float(n))
        assert record.mode == "nominal"
        assert u[0] == pytest.approx((v - a) * I * J / k, rel=1e-9, abs=1e-12)
        assert record.sigma_min == pytest.approx(k / (I * J), rel=1e-12)


def _derivatives(function, curve, h=1e-3):
    """First and second derivative at t = 0 by fourth-order central differences (not jets)."""
    f = {s: np.asarray(function(*curve(s * h)), dtype=float) for s in (-2, -1, 0, 1, 2)}
    first = (-f[2] + 8 * f[1] - 8 * f[-1] + f[-2]) / (12 * h)
    second = (-f[2] + 16 * f[1] - 30 * f[0] + 16 * f[-1] - f[-2]) / (12 * h * h)
    return first, second


def test_six_joint_elastic_arm_commands_match_pinocchio_with_the_springs_added_by_hand():
    pytest.importorskip("pinocchio")
    from linz_ros.crosscheck import pinocchio_reference
    from linz_ros.model import load_plant

    plant = load_plant(BUNDLED / "flex_loader_arm.yaml")
    artifact = built_artifact(BUNDLED / "flex_loader_arm.yaml")
    law, p = artifact.elastic_law(), artifact.nominal_parameters.tolist()
    pin_arm = pinocchio_reference(plant)             # rigid links from the same DH table, Pinocchio's RNEA/CRBA
    values = dict(zip(artifact.parameter_names, p))
    K = np.array([values[n] for n in ("k_base", "k_base", "k_elbow", "k_wrist", "k_wrist", "k_wrist")])
    Jm = np.array([values[n] for n in ("j_base", "j_base", "j_elbow", "j_wrist", "j_wrist", "j_wrist")])
    D = np.array([values[n] for n in ["motor_friction"] * 3 + ["wrist_motor_friction"] * 3])
    rng = np.random.default_rng(3)
    for _ in range(3):
        q, qd, thd = rng.uniform(-1, 1, 6), rng.uniform(-1, 1, 6), rng.uniform(-1, 1, 6)
        th = q + rng.uniform(-0.02, 0.02, 6)
        v = rng.uniform(-100, 100, 6)

        def forces(qq, vv):
            return -pin_arm.inverse_dynamics(qq, vv, np.zeros(6))     # F = -(C q' + g + friction q')

        qdd = np.linalg.solve(pin_arm.mass_matrix(q), forces(q, qd) + K * (th - q))
        M1, _ = _derivatives(lambda qq: [pin_arm.mass_matrix(qq)], lambda t: [q + qd * t + qdd * t * t / 2])
        F1, _ = _derivatives(forces, lambda t: [q + qd * t + qdd * t * t / 2, qd + qdd * t])
        M = pin_arm.mass_matrix(q)
        qddd = np.linalg.solve(M, K * (thd - qd) + F1 - M1[0] @ qdd)
        curve = lambda t: [q + qd * t + qdd * t * t / 2 + qddd * t ** 3 / 6, qd + qdd * t + qddd * t * t / 2]  # noqa: E731
        _, M2 = _derivatives(lambda qq, vv: [pin_arm.mass_matrix(qq)], curve)
        _, F2 = _derivatives(forces, curve)
        # Spong's law for the reduced model: u = J K^-1 (M v + 2 M' q''' + M'' q'' - F'') + J q'' + K (th - q) + D th'
        expected = (Jm / K * (M @ v + 2 * M1[0] @ qddd + M2[0] @ qdd - F2) + Jm * qdd + K * (th - q) + D * thd)
        x = np.concatenate([q, qd, th, thd]).tolist()
        terms = law.terms(x, p)
        got = np.linalg.solve(terms["A"], v - terms["b"])
        # the differences' error (h = 1e-3: about 1e-9 relative on M'', F'') bounds the tolerance
        assert got == pytest.approx(expected, rel=1e-6, abs=1e-6 * np.max(np.abs(expected)))


# -- the chain form: A, b and the chains from f, G and h by Taylor-mode jets -----------------------

def pendulum_chain_text(n: int, rate: float = 100.0) -> str:
    """The chain of :func:`support.pendulum_chain_text` with a design at ``rate``."""
    return chain_text(n, rate=rate)


def _chain_form_artifact(text: str, monkeypatch):
    """The artifact of a plant built through the chain form (a symbolic budget of one tree node)."""
    from linz_ros.analysis import _input_output, _input_state
    from linz_ros.artifact import artifact_from_text, seal
    from linz_ros.codegen import build_document
    from linz_ros.model import plant_from_text
    from linz_ros.synthesis import synthesise

    with monkeypatch.context() as patch:
        for module in (_input_output, _input_state):
            patch.setattr(module, "SYMBOLIC_TREE_BUDGET", 1)
        design = synthesise(plant_from_text(text, "<test>"))
    assert design.law_form == "chain"
    return artifact_from_text(seal(build_document(design, points=8)[0]))


@pytest.mark.parametrize("pendulums", [2, 3])
def test_the_chain_form_gives_the_commands_of_the_expression_form(pendulums, monkeypatch):
    text = pendulum_chain_text(pendulums)
    symbolic = built_artifact(text)
    chained = _chain_form_artifact(text, monkeypatch)
    assert symbolic.law_form == "expressions" and chained.law_form == "chain"
    assert [o[0] for o in chained.document["programs"]["law"]["outputs"]] == ["h"]
    cores = ControllerCore(symbolic), ControllerCore(chained)
    rng = np.random.default_rng(3)
    order = 2 * pendulums
    for t in range(12):
        x = rng.uniform(-0.8, 0.8, 2 * pendulums).tolist()
        ref = rng.uniform(-0.1, 0.1, order + 1).tolist()
        (u1, r1), (u2, r2) = (core.step(x, ref, t=0.01 * (t + 1)) for core in cores)
        assert r1.mode == r2.mode == "nominal"
        assert u2[0] == pytest.approx(u1[0], rel=1e-10, abs=1e-10 * max(1.0, abs(u1[0])))
        assert cores[1].outputs(x) == pytest.approx(cores[0].outputs(x), rel=1e-10, abs=1e-12)


def test_a_tampered_chain_form_artifact_is_refused(monkeypatch):
    import json

    from linz_ros.artifact import artifact_from_text, seal
    from linz_ros.errors import ArtifactError
    artifact = _chain_form_artifact(pendulum_chain_text(2), monkeypatch)
    document = {k: v for k, v in artifact.document.items() if k != "sha256"}
    edited = json.loads(json.dumps(document))
    edited["programs"]["law"]["outputs"][0][2] = ["th1"]
    with pytest.raises(ArtifactError, match="sha256|hash"):
        artifact_from_text(json.dumps(dict(edited, sha256=artifact.sha256)))
    resealed = json.loads(json.dumps(document))
    del resealed["design"]["law_form"]           # the expression form's law needs A, b and the chains
    with pytest.raises(ArtifactError, match="programs.law: A must have shape"):
        artifact_from_text(seal(resealed))
    resealed = json.loads(json.dumps(document))
    resealed["design"]["law_form"] = "jets"
    with pytest.raises(ArtifactError, match="design.law_form: expected expressions, or chain"):
        artifact_from_text(seal(resealed))


def test_without_symengine_the_chain_form_is_checked_by_sympy(monkeypatch):
    import builtins

    real_import = builtins.__import__

    def no_symengine(name, *args, **kwargs):
        if name == "symengine" or name.startswith("symengine."):
            raise ImportError("symengine hidden by the test")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", no_symengine)
    artifact = _chain_form_artifact(pendulum_chain_text(2), monkeypatch)
    checked = artifact.document["verification"]["per_program"]["chain_law"]
    assert "sympy" in checked["reference"] and "symengine" not in checked["reference"]
    assert checked["max_relative_residual"] < 1e-12
