"""The compensator of a dynamically extended law (linz_ros/runtime/extension.py), and closed loops
of the extended designs: the unicycle (common practice; De Luca, Oriolo and Vendittelli 2001) and
the quadrotor with its thrust delayed twice (Mistler, Benallegue and M'Sirdi 2001, from memory)."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg

from linz_ros.runtime import SimSettings, WatchdogConfig, simulate
from linz_ros.runtime.core import ControllerCore
from linz_ros.errors import ConfigError
from linz_ros.runtime.extended_plant import ExtendedPlant
from linz_ros.runtime.extension import ExtendedCore, advance_chain, command_limits, mean_of_first
from linz_ros.runtime.native import make_core, make_plant
from linz_ros.runtime.reference import make_reference
from support import built_artifact

PLANTS = Path(__file__).parent / "plants"

# The kinematic unicycle with the position as output, designed at 50 Hz with poles -2, -3 per output.
CART = """plant: cart
states: [x, y, th]
inputs: [v, omega]
dynamics: {x: v*cos(th), y: v*sin(th), th: omega}
outputs: {px: x, py: y}
input_limits: {v: [-0.5, 1.5], omega: [-2.0, 2.0]}
envelope: {x: [-5, 5], y: [-5, 5], th: [-7, 7]}
design: {rate: 50, poles: {px: [-2, -3], py: [-2, -3]}}
"""


@pytest.fixture(scope="module")
def cart():
    return built_artifact(CART)


@pytest.fixture(scope="module")
def quadrotor():
    text = (PLANTS / "quadrotor.yaml").read_text() + (
        "design: {rate: 200, poles: {x: [-2, -2.5, -3, -3.5], y: [-2, -2.5, -3, -3.5], "
        "z: [-2, -2.5, -3, -3.5], psi: [-2, -3]}}\n")
    return built_artifact(text)


# -- the chain of integrators --------------------------------------------------------------
@pytest.mark.parametrize("k", [1, 2, 3])
def test_the_chain_advances_as_its_exact_discretisation(k):
    # independent route: the matrix exponential of the chain augmented with the held input
    # (scipy.linalg.expm; the zero-order-hold discretisation, common practice)
    rng = np.random.default_rng(k)
    chain, w, T = rng.normal(size=k).tolist(), float(rng.normal()), 0.037
    M = np.zeros((k + 1, k + 1))
    for i in range(k):
        M[i, i + 1] = 1.0
    expected = scipy.linalg.expm(M * T) @ np.array(chain + [w])
    assert advance_chain(chain, w, T) == pytest.approx(expected[:k].tolist(), rel=1e-12, abs=1e-14)
    # the mean of xi_1 over the period: the integral of the first row of exp(M s) over [0, T], over T
    Z = np.zeros((k + 2, k + 2))
    Z[:k + 1, :k + 1] = M
    Z[k + 1, 0] = 1.0        # an extra state integrating xi_1
    integral = (scipy.linalg.expm(Z * T) @ np.array(chain + [w, 0.0]))[k + 1]
    assert mean_of_first(chain, w, T) == pytest.approx(integral / T, rel=1e-12, abs=1e-14)


# -- the wrapper ------------------------------------------------------------------------------
HOLD = [0.0] * 6
AHEAD = [1.0, 0.3, 0.0, 0.0, 0.0, 0.0]          # 1 m ahead in x, moving on at 0.3 m/s


def test_the_core_of_an_extended_artifact_steps_the_plants_own_state_and_inputs(cart):
    core, _ = make_core(cart, backend="python")
    assert isinstance(core, ExtendedCore) and (core.n, core.m) == (3, 2)
    assert cart.plant_states == ["x", "y", "th"] and cart.plant_inputs == ["v", "omega"]
    assert cart.states == ["x", "y", "th", "v_i1"] and cart.inputs == ["v_d1", "omega"]
    assert core.compensator == [0.5]                      # the midpoint of v's limits
    ref = [0.1, 0.0, 0.0, 0.2, 0.0, 0.0]
    u, record = core.step([0.0, 0.0, 0.0], ref, t=0.0)
    # the law of the extended plant at (0, 0, 0, v = 0.5), stepped alone
    w, _ = ControllerCore(cart).step([0.0, 0.0, 0.0, 0.5], ref, t=0.0)
    T = 1 / 50
    assert u == pytest.approx([0.5 + w[0] * T / 2, w[1]], rel=1e-12)   # the compensator's mean over the period
    assert core.last_extended_state == [0.0, 0.0, 0.0, 0.5] and record.command == tuple(u)
    core.step([0.0, 0.0, 0.0], ref, t=T)                  # the next state: advanced exactly over the period
    assert core.last_extended_state[3] == pytest.approx(0.5 + w[0] * T, rel=1e-12)


def test_the_compensator_advances_over_the_real_interval_between_states(cart):
    # states every second period (a slow odometry): each advance covers the real 2T under the w the law
    # chose at the state before (read back from the command: u = xi + w T / 2 for one integrator)
    core = make_core(cart, backend="python")[0]
    T, chain = 1 / 50, 0.5
    for k in range(0, 12, 2):
        u, _ = core.step([0.0, 0.0, 0.0], AHEAD, t=k * T)
        assert core.last_extended_state[3] == pytest.approx(chain, rel=1e-12)
        w = (u[0] - chain) * 2 / T
        chain = advance_chain([chain], w, 2 * T)[0]
    assert chain > 0.6                          # the law did speed the cart up


def test_either_core_wrapped_gives_the_same_commands(cart):
    runs = []
    for backend in ("python", "native"):
        core, note = make_core(cart, backend=backend)
        reference = make_reference("eight", [2, 2], [0.0, 0.0], 1.0, period=12.0)
        commands = []
        x = [0.0, 0.0, 0.3]
        plant, _ = make_plant(cart, backend="python")
        for k in range(200):
            u, _ = core.step(x, reference.sample(k / 50), t=k / 50)
            commands.append(u)
            x = plant.rk4(x, u, 1 / 200, 4)
        runs.append(np.array(commands))
        if backend == "native" and note is not None:
            pytest.skip(f"the native step cannot be built here: {note}")
    assert np.max(np.abs(runs[0] - runs[1])) < 1e-9


def test_the_compensator_stays_within_the_inputs_limits_and_says_so(cart):
    core, _ = make_core(cart, backend="python")
    far = [4.0, 0.0, 0.0, 0.0, 0.0, 0.0]     # 4 m ahead: the law asks for a large speed
    saturated = False
    for k in range(200):
        u, record = core.step([0.0, 0.0, 0.0], far, t=k / 50)
        assert -0.5 <= u[0] <= 1.5 and -0.5 <= core.compensator[0] <= 1.5
        saturated |= record.saturated[0]
    assert saturated and core.compensator[0] == 1.5


def test_a_cut_compensator_freezes_the_laws_integral_action():
    # with integral action, a speed pinned at its limit must not wind the integrator up
    text = CART.replace("poles: {px: [-2, -3], py: [-2, -3]}", "poles: {px: [-1, -1.5, -2], py: [-1, -1.5, -2]}, "
                                                             "integral: true")
    core, _ = make_core(built_artifact(text), backend="python")
    far = [3.0, 0.0, 0.0, 0.0, 0.0, 0.0]
    seen = []
    for k in range(150):
        _, record = core.step([0.0, 0.0, 0.0], far, t=k / 50)
        if record.saturated[0]:
            seen.append(core.inner.integrators[0])
    assert len(seen) > 50 and max(seen) - min(seen) < 0.1 * 3.0 / 50      # at most the step before the cut


def test_a_speed_floor_keeps_the_compensator_and_the_cart_off_the_singular_set(cart):
    config = WatchdogConfig.from_artifact(cart, compensator_floor=(0.2, math.inf))
    core, _ = make_core(cart, config, backend="python")
    floored = False
    for k in range(300):                 # held at the origin: the law slows the cart towards v = 0
        u, record = core.step([0.0, 0.0, 0.0], HOLD, t=k / 50)
        assert abs(core.compensator[0]) >= 0.2 - 1e-15 and abs(u[0]) >= 0.2 - 1e-15
        floored |= record.saturated[0]
    assert floored and record.mode == "nominal"


def test_a_floor_outside_the_limits_is_refused_and_a_one_sided_one_holds_its_side(cart):
    with pytest.raises(ConfigError, match=r"compensator_floor: 2 for v lies outside its limits \[-0.5, 1.5\] on both sides"):
        make_core(cart, WatchdogConfig.from_artifact(cart, compensator_floor=(2.0, math.inf)), backend="python")
    # 0.8 fits above (v <= 1.5) but not below (v >= -0.5): the floor holds the cart moving forward
    core, _ = make_core(cart, WatchdogConfig.from_artifact(cart, compensator_floor=(0.8, math.inf)),
                        backend="python")
    core.reset([-0.3])
    assert core.compensator == [0.8]
    for k in range(100):
        u, _ = core.step([0.0, 0.0, math.pi], HOLD, t=k / 50)
        assert 0.8 - 1e-12 <= core.compensator[0] <= 1.5 and 0.8 - 1e-12 <= u[0] <= 1.5


def test_the_floor_catches_a_period_that_would_carry_the_speed_through_zero(cart):
    core, _ = make_core(cart, WatchdogConfig.from_artifact(cart, compensator_floor=(0.05, math.inf)),
                        backend="python")
    core.reset([0.06])
    core.step([0.0, 0.0, 0.0], HOLD, t=0.0)
    core._w[0] = -20.0                         # a period that ends at 0.06 - 0.4 = -0.34
    core.step([0.0, 0.0, 0.0], HOLD, t=0.02)
    assert core.last_extended_state[3] == 0.05


def test_without_a_floor_the_singularity_watchdog_acts_near_a_stop(cart):
    core, _ = make_core(cart, backend="python")
    modes = set()
    for k in range(300):
        _, record = core.step([0.0, 0.0, 0.0], HOLD, t=k / 50)
        modes.add(record.mode)
    assert {"damped", "safe"} <= modes


def test_a_refusal_sends_the_plants_safe_command_and_logs_what_the_plant_has(cart):
    core, _ = make_core(cart, backend="python")
    for k in range(5):
        core.step([0.0, 0.0, 0.0], AHEAD, t=k / 50)
    assert core.compensator[0] != 0.5
    u, record = core.step([math.nan, 0.0, 0.0], HOLD, t=0.1)
    assert record.mode == "safe" and u == [0.0, 0.0] and record.command == (0.0, 0.0)
    assert core.last_extended_state[3] == 0.0             # the plant's speed input while safe, not the law's


def test_after_a_safe_command_the_compensator_restarts_from_what_the_plant_has(cart):
    core, _ = make_core(cart, backend="python")
    for k in range(5):
        core.step([0.0, 0.0, 0.0], AHEAD, t=k / 50)
    core.step([math.nan, 0.0, 0.0], HOLD, t=0.1)           # safe: the cart was sent v = 0
    core.step([0.0, 0.0, 0.0], HOLD, t=0.12)
    assert core.last_extended_state[3] == 0.0             # no measurement: continue from the command sent
    core.step([math.nan, 0.0, 0.0], HOLD, t=0.14)
    core.observe_compensator([0.3])                       # e.g. the speed in the cart's odometry
    core.step([0.0, 0.0, 0.0], AHEAD, t=0.16)
    assert core.last_extended_state[3] == 0.3
    with pytest.raises(ValueError, match="expected 1 values"):
        core.observe_compensator([0.1, 0.2])


def test_a_restart_moves_the_input_no_faster_than_its_rate_limit(cart):
    config = WatchdogConfig.from_artifact(cart, rate_limits=(0.5, math.inf))
    core, _ = make_core(cart, config, backend="python")
    core.step([0.0, 0.0, 0.0], AHEAD, t=0.0)
    core.step([math.nan, 0.0, 0.0], HOLD, t=0.02)          # safe: v = 0 sent
    core.observe_compensator([1.2])                       # measured 1.2 m/s: a restart there would jump
    u, _ = core.step([0.0, 0.0, 0.0], AHEAD, t=0.04)
    assert core.last_extended_state[3] == pytest.approx(0.5 / 50)
    assert abs(u[0]) <= 2 * 0.5 / 50 + 1e-12


def test_reset_starts_from_given_values_without_remembering_them(cart):
    core, _ = make_core(cart, backend="python")
    core.reset([0.3])
    assert core.compensator == [0.3]
    core.reset()
    assert core.compensator == [0.5]
    core.reset([math.nan])
    assert core.compensator == [0.5]


def test_a_held_safe_command_holds_the_plants_last_command_and_the_restart_continues_it(quadrotor):
    config = WatchdogConfig.from_artifact(quadrotor).with_overrides(safe_kind="hold")
    core, _ = make_core(quadrotor, config, backend="python")
    x = [0.0] * 12
    climb = [0.0] * 18
    climb[10:15] = [0.5, 0.2, 0.0, 0.0, 0.0]              # z: 0.5 m up, rising at 0.2 m/s
    for k in range(40):
        last, _ = core.step(x, climb, t=k / 200)
    u, record = core.step([math.nan] * 12, climb, t=40 / 200)
    assert record.mode == "held" and u == last
    core.step(x, climb, t=41 / 200)
    assert core.last_extended_state[12] == last[0]        # the thrust continues from the held one: no jump


def test_rate_limits_bound_the_plants_input_not_the_new_one(cart):
    config = WatchdogConfig.from_artifact(cart, rate_limits=(0.5, math.inf))
    core, _ = make_core(cart, config, backend="python")
    assert core.inner.config.rate_limits == (math.inf, math.inf)
    previous = core.compensator[0]
    for k in range(50):
        core.step([0.0, 0.0, 0.0], [3.0, 0.0, 0.0, 0.0, 0.0, 0.0], t=k / 50)
        assert abs(core.compensator[0] - previous) <= 0.5 / 50 + 1e-12
        previous = core.compensator[0]


def test_command_limits_are_the_plants(cart):
    config = WatchdogConfig.from_artifact(cart)
    assert config.input_limits[0] == (-math.inf, math.inf)       # the new input v_d1 has none
    assert command_limits(cart, config) == [(-0.5, 1.5), (-2.0, 2.0)]


# -- the plant it drives ------------------------------------------------------------------------
def test_the_extended_plant_is_the_plant_under_its_own_inputs(cart):
    plant, _ = make_plant(cart, backend="python")
    assert isinstance(plant, ExtendedPlant) and (plant.n, plant.m) == (3, 2)
    x, u = [0.3, -0.2, 0.7], [0.8, -0.4]
    # tests/plants/unicycle.yaml: x' = v cos th, y' = v sin th, th' = omega
    assert plant.derivative(x, u) == pytest.approx([0.8 * math.cos(0.7), 0.8 * math.sin(0.7), -0.4], rel=1e-14)
    # exact solution under held inputs: a circular arc of radius v / omega
    h = 0.5
    th1 = 0.7 - 0.4 * h
    exact = [0.3 + 0.8 / -0.4 * (math.sin(th1) - math.sin(0.7)), -0.2 - 0.8 / -0.4 * (math.cos(th1) - math.cos(0.7)), th1]
    assert plant.rk4(x, u, h / 50, 50) == pytest.approx(exact, abs=1e-10)
    assert plant.adaptive(x, u, h) == pytest.approx(exact, abs=1e-7)


# -- closed loops of the extended designs ---------------------------------------------------------
def designed_error(poles: list[float], e0: float, t: np.ndarray) -> np.ndarray:
    """The error of a chain with these closed-loop poles from (e0, 0, ..., 0): the first entry of
    exp(A t) z0 with A the companion matrix of prod (s - p) (scipy.linalg.expm)."""
    coefficients = np.real(np.poly(poles))
    r = len(poles)
    A = np.zeros((r, r))
    A[:-1, 1:] = np.eye(r - 1)
    A[-1, :] = -coefficients[:0:-1]
    z0 = np.zeros(r)
    z0[0] = e0
    return np.array([(scipy.linalg.expm(A * s) @ z0)[0] for s in t])


def test_the_cart_tracks_a_figure_eight_at_the_designed_rates(cart):
    # start on the path's heading and speed, 0.2 m beside it: the error in y obeys e'' + 5 e' + 6 e = 0
    # (poles -2, -3), e = 0.2 (3 exp(-2 t) - 2 exp(-3 t)); the sampled loop (50 Hz, the input held
    # at the compensator's mean) follows it within a few per cent of the offset
    a, period = 2.0, 20.0
    speed = a * 2 * math.pi / period * math.sqrt(2)
    reference = make_reference("eight", [2, 2], [0.0, 0.0], a, period=period)
    result = simulate(cart, SimSettings(duration=6.0, reference=reference, initial=[0.0, 0.2, math.pi / 4, speed],
                                        backend="python"))
    assert result.summary()["verdict"] == "tracked"
    e = result.errors()
    expected = designed_error([-2.0, -3.0], 0.2, result.t)
    assert expected[-1] == pytest.approx(0.2 * (3 * math.exp(-12) - 2 * math.exp(-18)), rel=1e-6)
    assert np.max(np.abs(e[:, 1] - expected)) < 0.02 * 0.2
    assert np.max(np.abs(e[:, 0])) < 0.02 * 0.2
    assert np.max(np.abs(e[-50:])) < 2e-3


def test_the_quadrotor_returns_to_hover_at_the_designed_rates(quadrotor):
    # hover thrust m g, 0.3 m off in x and z, at rest: chains of degree 4 (poles -2 .. -3.5) from
    # (0.3, 0, 0, 0): the thrust's compensator starts at hover and its rate at zero, so x'' and x''' start at 0
    x0 = [0.3, 0.0, 0.3] + [0.0] * 9 + [1.2 * 9.81, 0.0]
    result = simulate(quadrotor, SimSettings(duration=8.0, initial=x0, backend="python",
                                             reference=make_reference("hold", [4, 4, 4, 2], [0.0, 0.0, 0.0, 0.0])))
    assert result.summary()["verdict"] == "tracked"
    e = result.errors()
    expected = designed_error([-2.0, -2.5, -3.0, -3.5], 0.3, result.t)
    for i in (0, 2):
        assert np.max(np.abs(e[:, i] - expected)) < 0.01 * 0.3
    assert np.max(np.abs(e[:, 1])) < 1e-6 and np.max(np.abs(e[:, 3])) < 1e-6
    assert np.min(result.x[:, 12]) > 0         # the thrust never reached the singular set (zero thrust)
    assert result.x.shape[1] == 14 and list(result.artifact.plant_inputs)[0] == "thrust"


def test_a_restart_from_a_measured_standstill_starts_at_the_floor_not_on_the_singular_set(cart):
    # a cart whose odometry says it stands still (v = 0) after a stop: det A = v, so a compensator restarted
    # at 0 would give sigma_min = 0 and the safe command again at every step; the floor lifts the restart too
    stuck, _ = make_core(cart, backend="python")
    stuck.reset([0.0])
    _, record = stuck.step([0.0, 0.0, 0.0], [0.0] * 6, t=0.0)
    assert stuck.compensator == [0.0] and record.mode == "safe" and record.reason == "singular"
    config = WatchdogConfig.from_artifact(cart, compensator_floor=(0.2, math.inf))
    core, _ = make_core(cart, config, backend="python")
    core.reset([0.0])
    assert core.compensator == [0.2]                 # the side of the start value (0.5)
    _, record = core.step([0.0, 0.0, 0.0], [0.0] * 6, t=0.0)
    assert record.mode == "nominal" and record.sigma_min == pytest.approx(0.2)
    core.reset([-0.05])                              # reversing slowly: the floor keeps its side
    assert core.compensator == [-0.2]
