"""Tests of the dynamic-extension search (linz_ros/analysis/_extension.py) and its report."""

import json
from dataclasses import replace

import pytest
import sympy as sp

from support import BUNDLED, REFERENCE
from linz_ros.analysis import analyse, render_text
from linz_ros.analysis._common import plant_context
from linz_ros.analysis._extension import (MAX_ADDED_STATES, MAX_INTEGRATORS_PER_INPUT, extended_plant,
                                          extension_candidates, search_dynamic_extension)
from linz_ros.analysis._input_output import analyse_input_output
from linz_ros.cli import main
from linz_ros.geometry import Monitor
from linz_ros.model import load_plant, plant_from_text

UNICYCLE = REFERENCE / "unicycle.yaml"
QUADROTOR = REFERENCE / "quadrotor.yaml"
TWIN_CART = REFERENCE / "twin_thruster_cart.yaml"


def _extension(path):
    report = analyse(load_plant(path), samples=64)
    return report, report.input_output.dynamic_extension


def _symbols(*names):
    return [sp.Symbol(name, real=True) for name in names]


# -- the unicycle: one integrator on the speed (common practice; De Luca, Oriolo and Vendittelli 2001) --
def test_the_unicycle_is_decoupled_by_one_integrator_on_its_speed():
    report, ext = _extension(UNICYCLE)
    io = report.input_output
    assert io.relative_degree is None and io.linearizable is False     # the plant itself: no static design
    assert ext.found is True and ext.tried == 1
    assert ext.integrators == {"v": 1}
    assert ext.compensator_states == ["v_i1"] and ext.new_inputs == ["v_d1"]
    assert ext.start == {"v_i1": 0.5}                                  # the midpoint of v's limits [-0.5, 1.5]
    assert ext.result.relative_degree_generic == [2, 2] and ext.result.relative_degree == [2, 2]
    assert ext.result.zero_dynamics_order == 0                         # 3 + 1 states = 2 + 2


def test_the_unicycles_extended_decoupling_matrix_is_the_textbook_one():
    _, ext = _extension(UNICYCLE)
    th, v = _symbols("th", "v_i1")                                     # v is now the compensator state
    expected = sp.Matrix([[sp.cos(th), -v * sp.sin(th)], [sp.sin(th), v * sp.cos(th)]])
    A = ext.result.decoupling_matrix
    assert sp.simplify(A - expected) == sp.zeros(2, 2)
    assert sp.simplify(A.det() - v) == 0                               # det = v
    assert ext.result.singular_set == v                                # singular where v = 0


def test_the_unicycles_extended_matrix_is_swept_over_the_speed_limits():
    # sigma_min of [[cos th, -v sin th], [sin th, v cos th]] is min(1, |v|) (its columns are orthogonal,
    # of norms 1 and |v|); with v uniform over its limits [-0.5, 1.5], P(min(1, |v|) <= s) = (0.5 + s) / 2
    # for 0.5 <= s < 1, so the median is 0.5 (hand-derived)
    _, ext = _extension(UNICYCLE)
    envelope = ext.envelope
    assert envelope.subject == "decoupling matrix of the extended plant" and envelope.samples == 256
    assert envelope.median_sigma == pytest.approx(0.5, abs=0.02)
    assert 0 < envelope.min_sigma < 0.02 and abs(envelope.worst_state["v_i1"]) == pytest.approx(envelope.min_sigma)
    assert ext.to_json()["envelope"]["median_sigma"] == envelope.median_sigma


def test_the_unicycle_report_says_what_was_found_in_text_and_json():
    report, _ = _extension(UNICYCLE)
    io = report.to_json()["input_output"]
    assert io["relative_degree"] is None                               # still no static design
    assert io["reason"].startswith("the decoupling matrix has rank 1 < 2 everywhere: the outputs cannot be "
                                   "decoupled by static feedback; a dynamic extension decouples them: "
                                   "1 integrator on v (compensator state v_i1; new input v_d1)")
    assert "may help" not in io["reason"]
    ext = io["dynamic_extension"]
    assert ext["found"] is True and ext["integrators"] == {"v": 1}
    assert ext["relative_degree"] == [2, 2] and ext["singular_set"] == "v_i1"
    assert ext["decoupling_matrix"] == [["cos(th)", "-v_i1*sin(th)"], ["sin(th)", "v_i1*cos(th)"]]
    assert ext["bound"] == {"integrators_per_input": 2, "added_states": 4} and ext["tried"] == 1
    assert "  dynamic extension: v + 1 integrator: relative degree [2, 2], defined at the operating point " \
           "with v_i1=0.5" in render_text(report).splitlines()


def test_without_input_limits_the_compensator_starts_at_the_equilibrium_input():
    # v = 0 at rest: on the singular set, which the report says (documented start rule)
    text = UNICYCLE.read_text().replace("input_limits: {v: [-0.5, 1.5], omega: [-2.0, 2.0]}\n", "")
    ext = analyse(plant_from_text(text), samples=16).input_output.dynamic_extension
    assert ext.found is True and ext.start == {"v_i1": 0.0}
    assert ext.result.relative_degree is None and ext.result.relative_degree_generic == [2, 2]
    assert "not defined (on the singular set)" in ext.text_line()


# -- the quadrotor: two integrators on the thrust (Mistler, Benallegue and M'Sirdi 2001, from memory) --
def test_the_quadrotor_is_decoupled_by_two_integrators_on_the_thrust():
    _, ext = _extension(QUADROTOR)
    assert ext.found is True and ext.integrators == {"thrust": 2}
    assert ext.compensator_states == ["thrust_i1", "thrust_i2"] and ext.new_inputs == ["thrust_d2"]
    assert ext.result.relative_degree_generic == [4, 4, 4, 2]
    assert ext.result.zero_dynamics_order == 0                         # 12 + 2 = 4 + 4 + 4 + 2
    assert ext.start["thrust_i1"] == pytest.approx(1.2 * 9.81)        # hover thrust, midpoint of [0, 2 m g]
    assert ext.result.relative_degree == [4, 4, 4, 2]                  # defined at hover


def test_the_quadrotors_extended_decoupling_matrix_is_singular_at_zero_thrust():
    _, ext = _extension(QUADROTOR)
    A, plant = ext.result.decoupling_matrix, load_plant(QUADROTOR)
    roll, pitch, yaw, thrust = _symbols("roll", "pitch", "yaw", "thrust_i1")
    det = sp.simplify(A.det().subs(plant.nominal))
    at = {roll: sp.Rational(1, 5), pitch: sp.Rational(-1, 3), yaw: sp.Rational(7, 10)}
    assert det.subs({**at, thrust: 0}) == 0
    assert abs(float(det.subs({**at, thrust: 11}))) > 1e-3
    assert ext.result.singular_set.has(thrust)                         # the singular set names zero thrust


# -- no extension within the bound (common practice: redundant thrusters, outputs a position and its rate) --
def test_a_plant_no_extension_decouples_says_so_and_why():
    report, ext = _extension(TWIN_CART)
    assert ext.found is False and ext.tried == 8 and ext.largest_rank == 1    # every (k1, k2), 1 <= k1 + k2 <= 4
    assert ext.reason.startswith("no extension with at most 2 integrators per input and 4 in all gives a "
                                 "decoupling matrix of full rank: its rank stays at most 1 < 2 in all 8 candidates")
    io = report.to_json()["input_output"]
    assert io["linearizable"] is False and io["reason"].endswith(ext.reason)
    assert io["dynamic_extension"]["found"] is False and io["dynamic_extension"]["integrators"] == {}
    assert io["dynamic_extension"]["relative_degree"] is None


def test_statically_decouplable_plants_get_no_extension():
    for name in ("pick_arm.yaml", "survey_boat.yaml"):
        report = analyse(load_plant(BUNDLED / name), samples=16)
        assert report.input_output.relative_degree is not None
        assert "dynamic_extension" not in report.to_json()["input_output"]


# -- the search itself -----------------------------------------------------------------------------------
def test_candidates_come_by_total_then_earlier_inputs_first_within_the_bound():
    candidates = list(extension_candidates(4))
    assert candidates[:5] == [(1, 0, 0, 0), (0, 1, 0, 0), (0, 0, 1, 0), (0, 0, 0, 1), (2, 0, 0, 0)]
    assert [sum(k) for k in candidates] == sorted(sum(k) for k in candidates)
    assert max(max(k) for k in candidates) == MAX_INTEGRATORS_PER_INPUT
    assert max(sum(k) for k in candidates) == MAX_ADDED_STATES
    assert len(candidates) == len(set(candidates)) == 4 + 10 + 16 + 19


def test_the_extended_plant_delays_the_input_through_its_integrators():
    plant = load_plant(UNICYCLE)
    ext = extended_plant(plant, (2, 0), {"v": 0.5})
    x, y, th, v1, v2, w, omega = _symbols("x", "y", "th", "v_i1", "v_i2", "v_d2", "omega")
    assert ext.states == (x, y, th, v1, v2) and ext.inputs == (w, omega)
    assert ext.f == sp.Matrix([v1 * sp.cos(th), v1 * sp.sin(th), 0, v2, 0])
    assert ext.G == sp.Matrix([[0, 0], [0, 0], [0, 1], [0, 0], [1, 0]])
    assert ext.operating_point == {"x": 0.0, "y": 0.0, "th": 0.0, "v_i1": 0.5, "v_i2": 0.0}
    assert ext.envelope["v_i1"] == (-0.5, 1.5) and ext.input_limits == {"omega": (-2.0, 2.0)}


def test_compensator_names_never_clash_with_the_plants_names():
    text = ("plant: p\nstates: [v_i1, a]\ninputs: [v, w]\nparameters: {v_d1: 2.0}\n"
            "dynamics: {v_i1: v*cos(a), a: w}\noutputs: {y1: v_i1}")
    ext = extended_plant(plant_from_text(text), (1, 0))
    assert ext.state_names == ["v_i1", "a", "v_i1_"] and [u.name for u in ext.inputs] == ["v_d1_", "w"]


def test_a_search_out_of_budget_is_undecided_and_says_so():
    plant = load_plant(UNICYCLE)
    ctx = replace(plant_context(plant), monitor=Monitor(seconds=0.0))
    ext = search_dynamic_extension(plant, ctx, lambda p, c: analyse_input_output(p, c, extend=False))
    assert ext.found is None and ext.tried == 0
    assert ext.reason == ("could not decide within the budget (0 s) of the dynamic-extension search: "
                          "stopped after 0 of 8 candidates")


def test_extended_plants_beyond_the_symbolic_budget_are_decided_from_jets(monkeypatch):
    import linz_ros.analysis._extension as extension
    import linz_ros.analysis._input_output as input_output
    monkeypatch.setattr(extension, "SYMBOLIC_TREE_BUDGET", 2)
    monkeypatch.setattr(input_output, "SYMBOLIC_TREE_BUDGET", 2)
    _, ext = _extension(UNICYCLE)
    assert ext.found is True and ext.integrators == {"v": 1} and ext.tried == 1
    assert ext.result.method.startswith("numeric from Taylor-mode jets")
    assert ext.result.relative_degree_generic == [2, 2] and ext.result.decoupling_matrix is None
    assert ext.to_json()["decoupling_matrix"] is None and "method" in ext.to_json()


# -- the command line --------------------------------------------------------------------------------------
def test_linz_check_shows_the_extension_in_json_and_text(capsys):
    assert main(["check", str(UNICYCLE), "--json", "--samples", "16"]) == 0
    out, err = capsys.readouterr()
    ext = json.loads(out)["input_output"]["dynamic_extension"]
    assert err == "" and ext["found"] is True and ext["compensator_states"] == ["v_i1"]
    assert main(["check", str(UNICYCLE)]) == 0
    lines = capsys.readouterr()[0].splitlines()
    at = lines.index("  dynamic extension: v + 1 integrator: relative degree [2, 2], defined at the operating "
                     "point with v_i1=0.5")
    assert lines[at + 1].startswith("  extended decoupling matrix over the envelope: smallest singular value ")
    assert main(["check", str(TWIN_CART)]) == 0
    out, _ = capsys.readouterr()
    assert "  dynamic extension: none within 2 integrators per input and 4 in all (8 candidates, largest " \
           "rank 1)" in out.splitlines()
