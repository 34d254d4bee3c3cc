"""Tests of the bundled vehicle plants: the delivery cart (a unicycle) and the inspection drone (a quadrotor).

Both need a dynamic extension for an input-output design; each check names its source beside it.
"""

import json
import math

import numpy as np
import pytest
import sympy as sp

from support import BUNDLED
from linz_ros.analysis import analyse, render_text
from linz_ros.cli import main
from linz_ros.model import load_plant
from linz_ros.runtime import parse_reference

CART = BUNDLED / "delivery_cart.yaml"
DRONE = BUNDLED / "inspection_drone.yaml"
G0 = 9.81
#: Points per period at which a closed path is sampled.
SAMPLES = 2001


@pytest.fixture(scope="module")
def cart():
    plant = load_plant(CART)
    return plant, analyse(plant, samples=64)


@pytest.fixture(scope="module")
def drone():
    plant = load_plant(DRONE)
    return plant, analyse(plant, samples=64)


def _symbols(*names):
    return [sp.Symbol(name, real=True) for name in names]


def _path(plant, orders):
    """The plant's design reference over one period from its outputs at the operating point:
    per output an array (r + 1, SAMPLES) of y, y', ..., y^(r), and the period."""
    at_point = {**plant.nominal, **{s: plant.operating_point[s.name] for s in plant.states}}
    base = [float(y) for y in plant.h.subs(at_point)]
    reference = parse_reference(plant.design["reference"], orders, base, list(plant.output_names))
    times = reference.at + np.linspace(0.0, reference.period, SAMPLES)
    flat = np.array([reference.sample(t) for t in times]).T
    chains, start = {}, 0
    for name, r in zip(plant.output_names, orders):
        chains[name], start = flat[start:start + r + 1], start + r + 1
    return chains, reference.period


def _inside(values, interval, margin):
    low, high = interval
    return low + margin <= values.min() and values.max() <= high - margin


# -- the delivery cart: one integrator on the speed (common practice; De Luca, Oriolo and Vendittelli 2001) --
def test_the_carts_check_finds_one_integrator_on_its_speed(cart):
    _, report = cart
    io, ext = report.input_output, report.input_output.dynamic_extension
    assert io.relative_degree is None and io.linearizable is False     # no static design
    assert ext.found is True and ext.integrators == {"v": 1} and ext.tried == 1
    assert ext.compensator_states == ["v_i1"] and ext.new_inputs == ["v_d1"]
    assert ext.start["v_i1"] == pytest.approx(0.45)                   # the midpoint of v's limits [-0.3, 1.2]
    assert ext.result.relative_degree_generic == [2, 2] and ext.result.relative_degree == [2, 2]
    assert ext.result.zero_dynamics_order == 0                         # 3 + 1 states = 2 + 2


def test_the_carts_extended_decoupling_matrix_is_the_textbook_one(cart):
    # common practice: with v a state, (x'', y'') = [[cos th, -v sin th], [sin th, v cos th]] (v', omega)
    _, report = cart
    ext = report.input_output.dynamic_extension
    th, v = _symbols("th", "v_i1")
    expected = sp.Matrix([[sp.cos(th), -v * sp.sin(th)], [sp.sin(th), v * sp.cos(th)]])
    A = ext.result.decoupling_matrix
    assert sp.simplify(A - expected) == sp.zeros(2, 2)
    assert sp.simplify(A.det() - v) == 0                               # det = v
    assert ext.result.singular_set == v                                # singular where the cart stands still


def test_linz_check_shows_the_carts_extension_in_json_and_text(capsys):
    assert main(["check", str(CART), "--json", "--samples", "16"]) == 0
    out, err = capsys.readouterr()
    ext = json.loads(out)["input_output"]["dynamic_extension"]
    assert err == "" and ext["found"] is True and ext["integrators"] == {"v": 1}
    assert ext["relative_degree"] == [2, 2] and ext["singular_set"] == "v_i1"
    assert main(["check", str(CART), "--samples", "16"]) == 0
    out, _ = capsys.readouterr()
    assert "  dynamic extension: v + 1 integrator: relative degree [2, 2], defined at the operating point " \
           "with v_i1=0.45" in out.splitlines()


def test_the_carts_figure_eight_stays_on_the_floor_and_within_its_limits(cart):
    # common practice (the unicycle's flat outputs): v = |p'|, th = atan2(y', x'), omega = (x' y'' - y' x'') / v^2
    plant, report = cart
    orders = report.input_output.dynamic_extension.result.relative_degree
    chains, _ = _path(plant, orders)
    (x, dx, ddx), (y, dy, ddy) = chains["cart_x"], chains["cart_y"]
    assert _inside(x, plant.envelope["x"], 1.0) and _inside(y, plant.envelope["y"], 1.0)
    speed = np.hypot(dx, dy)
    v_low, v_high = plant.input_limits["v"]
    assert speed.max() < 0.5 * v_high                                  # at most 0.44 of 1.2 m/s
    assert speed.min() > 0.15                                          # never near v = 0, the singular set
    turn = (dx * ddy - dy * ddx) / speed ** 2
    assert np.abs(turn).max() < 0.5 * plant.input_limits["omega"][1]  # at most 0.50 of 1.5 rad/s
    heading = np.unwrap(np.arctan2(dy, dx))
    assert heading[0] == pytest.approx(plant.operating_point["th"], abs=1e-4)   # starts along the first leg
    assert "th" not in plant.envelope                                   # a cart may turn any number of times
    assert heading.min() == pytest.approx(-5 * math.pi / 4, abs=1e-3)  # turns from pi/4 to -5 pi/4 and back
    assert speed[0] == pytest.approx(report.input_output.dynamic_extension.start["v_i1"], abs=0.01)


# -- the inspection drone: two integrators on the thrust (Mistler, Benallegue and M'Sirdi 2001, from memory) --
def test_the_drones_check_finds_two_integrators_on_its_thrust(drone):
    _, report = drone
    io, ext = report.input_output, report.input_output.dynamic_extension
    assert io.relative_degree is None and io.linearizable is False
    assert ext.found is True and ext.integrators == {"thrust": 2}
    assert ext.compensator_states == ["thrust_i1", "thrust_i2"] and ext.new_inputs == ["thrust_d2"]
    assert ext.result.relative_degree_generic == [4, 4, 4, 2] and ext.result.relative_degree == [4, 4, 4, 2]
    assert ext.result.zero_dynamics_order == 0                         # 12 + 2 = 4 + 4 + 4 + 2
    assert ext.start == {"thrust_i1": pytest.approx(1.5 * G0), "thrust_i2": 0.0}   # hover, midpoint of [0, 2 m g]
    assert report.to_json()["input_output"]["dynamic_extension"]["found"] is True


def test_the_drones_decoupling_matrix_is_singular_at_zero_thrust_and_regular_at_hover(drone):
    plant, report = drone
    ext = report.input_output.dynamic_extension
    roll, pitch, yaw, thrust = _symbols("roll", "pitch", "yaw", "thrust_i1")
    det = sp.simplify(ext.result.decoupling_matrix.det().subs(plant.nominal))
    tilted = {roll: sp.Rational(1, 5), pitch: sp.Rational(-1, 3), yaw: sp.Rational(7, 10)}
    level = {roll: 0, pitch: 0, yaw: 0}
    assert det.subs({**tilted, thrust: 0}) == 0 and det.subs({**level, thrust: 0}) == 0
    assert abs(float(det.subs({**level, thrust: sp.Rational(1.5) * sp.Float(G0)}))) > 1e-3    # hover
    assert abs(float(det.subs({**tilted, thrust: 10}))) > 1e-3
    assert ext.result.singular_set.has(thrust)


def test_the_designs_give_one_pole_per_step_of_each_extended_chain(cart, drone):
    for plant, report in (cart, drone):
        orders = report.input_output.dynamic_extension.result.relative_degree
        assert [len(plant.design["poles"][name]) for name in plant.output_names] == orders


def test_each_vehicle_has_the_safe_command_its_kind_needs(cart, drone):
    assert cart[0].design["watchdog"]["safe_command"] == {"kind": "zero"}     # a cart at rest is safe
    assert drone[0].design["watchdog"]["safe_command"] == {"kind": "hold"}    # zero thrust drops a drone


def test_the_drones_figure_eight_stays_in_its_box_at_a_held_altitude_and_yaw(drone):
    # common practice (the multirotor's flat outputs): the thrust points along p'' + g e_z, so the tilt is
    # atan(|horizontal acceleration| / g) and the thrust m |p'' + g e_z| while z is held
    plant, report = drone
    orders = report.input_output.dynamic_extension.result.relative_degree
    chains, _ = _path(plant, orders)
    px, py, pz, heading = (chains[name] for name in ("x", "y", "z", "heading"))
    assert _inside(px[0], plant.envelope["px"], 5.0) and _inside(py[0], plant.envelope["py"], 5.0)
    assert np.all(pz[0] == plant.operating_point["pz"]) and np.all(pz[1:] == 0.0)    # altitude held
    assert np.all(heading == 0.0)                                                    # yaw held
    assert _inside(pz[0], plant.envelope["pz"], 1.0)
    speed = np.hypot(px[1], py[1])
    assert speed.max() < 0.5 * plant.envelope["vx"][1]                 # 1.11 of 3 m/s
    acceleration = np.hypot(px[2], py[2])
    assert np.arctan2(acceleration, G0).max() < 0.25 * plant.envelope["roll"][1]   # about 0.045 of 0.5 rad
    thrust = 1.5 * np.hypot(acceleration, G0)
    assert thrust.max() < 0.6 * plant.input_limits["thrust"][1]        # about half of 2 m g
