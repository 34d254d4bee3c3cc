"""The ``design.extension`` section (linz_ros/artifact/extension.py): written by synthesis for a
plant whose outputs need a dynamic extension, checked on load, read as a typed view."""

from __future__ import annotations

import copy
import math
import re

import pytest
import sympy as sp

from linz_ros.artifact import artifact_from_text, seal
from linz_ros.artifact.extension import Extension, read_extension
from linz_ros.errors import ArtifactError, PlantFileError
from linz_ros.model import plant_from_text
from linz_ros.synthesis import synthesise
from support import built_artifact

# The kinematic unicycle (common practice; De Luca, Oriolo and Vendittelli 2001): outputs x, y need
# one integrator on v; the extended decoupling matrix is [[cos th, -v sin th], [sin th, v cos th]].
CART = """plant: cart
states: [x, y, th]
inputs: [v, omega]
dynamics: {x: v*cos(th), y: v*sin(th), th: omega}
outputs: {px: x, py: y}
input_limits: {v: [-0.5, 1.5], omega: [-2.0, 2.0]}
envelope: {x: [-5, 5], y: [-5, 5], th: [-7, 7]}
units: {x: m, y: m, th: rad, v: m/s, omega: rad/s}
design: {rate: 50, poles: {px: [-2, -3], py: [-2, -3]}, watchdog: {compensator_floor: {v: 0.05}}}
"""


@pytest.fixture(scope="module")
def document():
    return copy.deepcopy(built_artifact(CART).document)


def test_synthesis_designs_the_extended_plants_law():
    design = synthesise(plant_from_text(CART, "<test>"))
    assert list(design.base_plant.state_names) == ["x", "y", "th"]
    assert list(design.plant.state_names) == ["x", "y", "th", "v_i1"]
    assert list(design.plant.input_names) == ["v_d1", "omega"]
    assert design.relative_degree == [2, 2]
    th, v = sp.symbols("th v_i1", real=True)
    expected = sp.Matrix([[sp.cos(th), -v * sp.sin(th)], [sp.sin(th), v * sp.cos(th)]])
    assert sp.simplify(design.A - expected) == sp.zeros(2, 2)
    assert sp.simplify(design.A.det() - v) == 0
    assert design.watchdog["compensator_floor"] == [0.05, None]
    assert any(note.startswith("dynamic extension: v + 1 integrator") for note in design.notes)


def test_the_artifact_carries_the_compensator(document):
    section = document["design"]["extension"]
    assert section == {"plant_states": ["x", "y", "th"], "plant_inputs": ["v", "omega"], "integrators": [1, 0],
                       "compensator_states": ["v_i1"], "start": [0.5],
                       "plant_input_limits": {"v": [-0.5, 1.5], "omega": [-2.0, 2.0]}}
    assert document["plant"]["envelope"]["v_i1"] == [-0.5, 1.5]
    assert document["plant"]["input_limits"] == {"omega": [-2.0, 2.0]}
    units = document["plant"]["signal_units"]
    assert (units["v_i1"], units["v_d1"], units["v"]) == ("m/s", "(m/s)/s", "m/s")
    artifact = artifact_from_text(seal(document))
    assert artifact.extension == Extension(("x", "y", "th"), ("v", "omega"), (1, 0), ("v_i1",), (0.5,),
                                           ((-0.5, 1.5), (-2.0, 2.0)))
    assert artifact.extension.offsets == (0, None)
    assert artifact.plant_states == ["x", "y", "th"] and artifact.plant_inputs == ["v", "omega"]


def test_an_artifact_without_an_extension_has_its_own_states_and_inputs():
    artifact = built_artifact("plant: p\nstates: [x1, x2]\ninputs: [u]\ndynamics: {x1: x2, x2: u}\n"
                              "outputs: {y: x1}\ndesign: {poles: {y: [-1, -2]}}\n")
    assert artifact.extension is None
    assert artifact.plant_states == artifact.states and artifact.plant_inputs == artifact.inputs


@pytest.mark.parametrize("change, problem", [
    (lambda s: s.update(plant_states=["y", "x", "th"]), ".plant_states: expected the first of plant.states"),
    (lambda s: s.update(plant_inputs=["v"]), ".plant_inputs: expected 2 distinct names"),
    (lambda s: s.update(integrators=[0, 0]), ".integrators: expected 2 whole numbers from 0 to 8, not all 0"),
    (lambda s: s.update(integrators=[2, 0]), ".compensator_states: expected the rest of plant.states"),
    (lambda s: s.update(plant_inputs=["v", "turn"]), ".plant_inputs: 'turn' has no integrator and must be the input 'omega'"),
    (lambda s: s.update(start=[]), ".start: expected 1 finite numbers"),
    (lambda s: s.update(plant_input_limits={"v": [1.0, 0.0]}), ".plant_input_limits: expected plant input"),
    (lambda s: s.pop("start"), ": expected a mapping with plant_states"),
])
def test_a_damaged_extension_is_refused_in_one_line(document, change, problem):
    edited = copy.deepcopy(document)
    change(edited["design"]["extension"])
    edited.pop("sha256", None)
    with pytest.raises(ArtifactError, match=re.escape(f"design.extension{problem}")) as caught:
        artifact_from_text(seal(edited))
    assert "\n" not in str(caught.value)


def test_read_extension_fills_missing_limits_with_none():
    section = {"plant_states": ["x"], "plant_inputs": ["u"], "integrators": [1], "compensator_states": ["u_i1"],
               "start": [0.0], "plant_input_limits": {}}
    assert read_extension(section).plant_input_limits == ((-math.inf, math.inf),)


def test_a_speed_floor_names_an_input_of_the_plant():
    with pytest.raises(PlantFileError, match=r"design.watchdog.compensator_floor.speed: 'speed' is not an input"):
        plant_from_text(CART.replace("compensator_floor: {v: 0.05}", "compensator_floor: {speed: 0.05}"), "<test>")
    with pytest.raises(PlantFileError, match=r"design.watchdog.compensator_floor.v: expected a number > 0, got 0"):
        plant_from_text(CART.replace("compensator_floor: {v: 0.05}", "compensator_floor: {v: 0}"), "<test>")
