"""Tests of plant-file loading: the affine split, user-owned names, and every refusal."""

import sympy as sp
import pytest

from support import BUNDLED, MINIMAL, REFERENCE
from linz_ros.errors import PlantFileError
from linz_ros.model import load_plant, plant_from_text


def test_affine_split_of_a_general_right_hand_side():
    plant = plant_from_text("""
plant: p
states: [x1, x2]
inputs: [u1, u2]
parameters: {c: 3}
dynamics:
  x1: x2 + sin(x1)*u1
  x2: c*(x1 + u2)*cos(x2) - u1
""")
    x1, x2 = plant.states
    c = list(plant.parameters)[0]
    assert sp.simplify(plant.f - sp.Matrix([x2, c * x1 * sp.cos(x2)])) == sp.zeros(2, 1)
    assert sp.simplify(plant.G - sp.Matrix([[sp.sin(x1), 0], [-1, c * sp.cos(x2)]])) == sp.zeros(2, 2)


def test_names_that_sympy_would_treat_specially_stay_user_symbols():
    plant = plant_from_text("""
plant: p
states: [E, I, S, N, beta, lambda]
inputs: [Q]
dynamics: {E: I, I: S, S: N, N: beta, beta: lambda, lambda: Q - E}
""")
    E, I, S, N, beta, lam = plant.states
    assert all(isinstance(s, sp.Symbol) for s in plant.states)
    assert plant.f[0] == I and plant.f[5] == -E      # not Euler's number, not sqrt(-1)
    assert plant.G[5, 0] == 1
    assert [s.name for s in plant.states] == ["E", "I", "S", "N", "beta", "lambda"]


def test_decimals_become_exact_rationals_and_definitions_are_inlined():
    plant = plant_from_text("""
plant: p
states: [x]
inputs: [u]
definitions: {half: 0.5*x, twice: 2*half}
dynamics: {x: twice + 1e-3*u}
""")
    assert plant.f[0] == plant.states[0]
    assert plant.G[0, 0] == sp.Rational(1, 1000)


def test_parameters_with_units_and_numeric_strings():
    plant = plant_from_text(MINIMAL.replace("{k: 2.0}", "{k: {value: 2.0, unit: N m/rad}, c: '1e3'}"))
    assert {s.name: v for s, v in plant.parameters.items()} == {"k": 2.0, "c": 1000.0}
    assert plant.units == {"k": "N m/rad"}


def test_signal_units_from_the_units_section_and_outputs_that_are_states():
    plant = plant_from_text(MINIMAL + "outputs: {y: x1, z: 2*x1}\nunits: {x1: rad, x2: ' rad/s ', u: N m}\n")
    assert plant.signal_units == {"x1": "rad", "x2": "rad/s", "u": "N m", "y": "rad"}     # z is not x1 as written
    assert plant_from_text(MINIMAL).signal_units == {}


def test_a_serial_arm_gives_its_joints_units_unless_the_file_says_otherwise():
    text = (REFERENCE / "pick_arm_serial.yaml").read_text()
    plant = plant_from_text(text)
    assert plant.signal_units == {"q1": "rad", "q2": "rad", "w1": "rad/s", "w2": "rad/s", "tau1": "N m",
                                  "tau2": "N m", "tool_x": "m", "tool_y": "m"}
    prismatic = plant_from_text(text.replace("- {type: revolute, a: l2", "- {type: prismatic, a: l2")
                                + "units: {tau1: kN m, tool_y: mm}\n")
    assert prismatic.signal_units == {"q1": "rad", "q2": "m", "w1": "rad/s", "w2": "m/s", "tau1": "kN m",
                                      "tau2": "N", "tool_x": "m", "tool_y": "mm"}


def test_an_input_map_leaves_the_inputs_of_a_serial_arm_without_a_unit():
    text = (REFERENCE / "pick_arm_serial.yaml").read_text().replace(
        "input_limits:", "input_map: [[1, 0], [0, 1]]\ninput_limits:")
    units = plant_from_text(text).signal_units
    assert "tau1" not in units and units["q1"] == "rad"


@pytest.mark.parametrize("path", sorted(BUNDLED.glob("*.yaml")), ids=lambda p: p.stem)
def test_every_signal_of_a_bundled_plant_has_a_unit(path):
    plant = load_plant(path)
    assert set(plant.signal_units) == set(plant.state_names + plant.input_names + list(plant.output_names))


def test_defaults_and_hash():
    plant = plant_from_text(MINIMAL)
    assert plant.operating_point == {"x1": 0.0, "x2": 0.0}
    assert plant.h.shape == (0, 1) and plant.output_names == ()
    assert len(plant.sha256) == 64
    assert plant_from_text(MINIMAL + "# comment\n").sha256 != plant.sha256


@pytest.mark.parametrize("path", sorted(BUNDLED.glob("*.yaml")), ids=lambda p: p.stem)
def test_bundled_plants_load(path):
    plant = load_plant(path)
    if plant.mechanics is None:
        assert plant.n == len(plant.f) and plant.G.shape == (plant.n, plant.m)
    else:
        assert plant.n == (4 if plant.mechanics.elastic else 2) * plant.mechanics.nq and plant.mechanics.B.shape == (plant.mechanics.nq, plant.m)
    assert plant.h.shape[0] == len(plant.output_names) > 0
    assert plant.design["rate"] > 0
    assert plant.source == str(path)


# -- every refusal: (change to the minimal file, field named, words of the problem) --
BAD = [
    ("unknown symbol", MINIMAL.replace("-k*sin(x1)", "-q*sin(x1)"), "dynamics.x2", "unknown symbol 'q'"),
    ("missing dynamics", MINIMAL.replace("  x1: x2\n", ""), "dynamics", "missing an entry for state(s) x1"),
    ("extra dynamics", MINIMAL + "  x3: x1\n", "dynamics", "'x3' is not a state"),
    ("non-affine term", MINIMAL.replace("+ u", "+ x1*u**2"), "dynamics.x2", "term 'u**2*x1' is nonlinear in u"),
    ("input inside a function", MINIMAL.replace("+ u", "+ sin(u)"), "dynamics.x2", "term 'sin(u)' is nonlinear in u"),
    ("duplicate state", MINIMAL.replace("[x1, x2]", "[x1, x1]"), "states[1]", "duplicate name 'x1' (already a state)"),
    ("input named like a state", MINIMAL.replace("inputs: [u]", "inputs: [x2]"), "inputs[0]", "duplicate name 'x2'"),
    ("duplicate YAML key", MINIMAL + "  x2: u\n", "", "duplicate key 'x2'"),
    ("name is a function", MINIMAL.replace("{k: 2.0}", "{sin: 2.0}"), "parameters.sin", "'sin' is the name of a function"),
    ("state is a function", MINIMAL.replace("[x1, x2]", "[x1, exp]"), "states[1]", "'exp' is the name of a function"),
    ("reserved constant", MINIMAL.replace("{k: 2.0}", "{pi: 3.0}"), "parameters.pi", "reserved constant"),
    ("lower above upper", MINIMAL + "input_limits: {u: [2.0, -2.0]}\n", "input_limits.u", "lower bound 2 is not below upper bound -2"),
    ("limit of a non-input", MINIMAL + "input_limits: {w: [-1, 1]}\n", "input_limits.w", "'w' is not an input"),
    ("non-numeric parameter", MINIMAL.replace("{k: 2.0}", "{k: fast}"), "parameters.k", "expected a number, got 'fast'"),
    ("boolean parameter", MINIMAL.replace("{k: 2.0}", "{k: true}"), "parameters.k", "expected a number, got true/false"),
    ("infinite parameter", MINIMAL.replace("{k: 2.0}", "{k: .inf}"), "parameters.k", "expected a finite number"),
    ("envelope bound not a number", MINIMAL + "envelope: {x1: [-1, wide]}\n", "envelope.x1[1]", "expected a number, got 'wide'"),
    ("envelope not a pair", MINIMAL + "envelope: {x1: 3}\n", "envelope.x1", "expected [lower, upper], got 3"),
    ("envelope of a non-state", MINIMAL + "envelope: {u: [-1, 1]}\n", "envelope.u", "'u' is not a state"),
    ("operating point outside envelope", MINIMAL + "envelope: {x1: [-1, 1]}\noperating_point: {x1: 2}\n",
     "operating_point.x1", "2 lies outside the envelope [-1, 1]"),
    ("syntax error", MINIMAL.replace("-k*sin(x1)", "-k*sin(x1"), "dynamics.x2", "expected ')'"),
    ("forbidden construct", MINIMAL.replace("-k*sin(x1)", "x1.__class__"), "dynamics.x2", "unexpected character '.'"),
    ("unknown function", MINIMAL.replace("sin(x1)", "system(x1)"), "dynamics.x2", "'system' is not a known function"),
    ("division by zero", MINIMAL.replace("-k*sin(x1)", "1/0"), "dynamics.x2", "infinite or undefined"),
    ("output with feedthrough", MINIMAL + "outputs: {y: x1 + u}\n", "outputs.y", "depends on input 'u'"),
    ("unknown top-level field", MINIMAL + "dynamic: {}\n", "dynamic", "unknown field"),
    ("missing inputs", MINIMAL.replace("inputs: [u]\n", ""), "inputs", "missing (required)"),
    ("states not a list", MINIMAL.replace("[x1, x2]", "x1"), "states", "expected a non-empty list of names"),
    ("invalid name", MINIMAL.replace("[x1, x2]", "[x1, 2x]"), "states[1]", "'2x' is not a valid name"),
    ("top level not a mapping", "- just\n- a list\n", "", "expected a mapping at the top level"),
    ("YAML syntax", "plant: [unclosed\n", "", "not valid YAML at line"),
    ("pole in right half-plane", MINIMAL + "outputs: {y: x1}\ndesign: {poles: {y: [-1, 2]}}\n",
     "design.poles.y[1]", "not in the open left half-plane"),
    ("pole for unknown output", MINIMAL + "outputs: {y: x1}\ndesign: {poles: {z: [-1, -2]}}\n",
     "design.poles.z", "'z' is not an output"),
    ("negative rate", MINIMAL + "design: {rate: -5}\n", "design.rate", "must be positive"),
    ("pole list with two outputs", MINIMAL + "outputs: {y: x1, z: x2}\ndesign: {poles: [-1, -2]}\n",
     "design.poles", "with several outputs, give a mapping"),
    ("unknown watchdog key", MINIMAL + "design: {watchdog: {sigma_wran: 1}}\n", "design.watchdog.sigma_wran",
     "unknown key; expected one of sigma_warn"),
    ("watchdog levels out of order", MINIMAL + "design: {watchdog: {sigma_warn: 0.1, sigma_act: 0.2}}\n",
     "design.watchdog.sigma_act", "0.2 is above sigma_warn 0.1"),
    ("negative stale time", MINIMAL + "design: {watchdog: {stale_after: -1}}\n", "design.watchdog.stale_after",
     "expected a number > 0, got -1"),
    ("stale time past an hour", MINIMAL + "design: {watchdog: {hold_time: 1e12}}\n", "design.watchdog.hold_time",
     "expected at most 3600 s, got 1e+12"),
    ("rate limit of a non-input", MINIMAL + "design: {watchdog: {rate_limits: {w: 1}}}\n",
     "design.watchdog.rate_limits.w", "'w' is not an input"),
    ("zero rate limit", MINIMAL + "design: {watchdog: {rate_limits: {u: 0}}}\n",
     "design.watchdog.rate_limits.u", "expected a number > 0, got 0"),
    ("safe command of a non-input", MINIMAL + "design: {watchdog: {safe_command: {w: 0}}}\n",
     "design.watchdog.safe_command.w", "'w' is not an input"),
    ("safe command word", MINIMAL + "design: {watchdog: {safe_command: brake}}\n",
     "design.watchdog.safe_command", "expected zero, hold, or a mapping"),
    ("reference not text", MINIMAL + "design: {reference: 5}\n", "design.reference", "expected text"),
    ("units not a mapping", MINIMAL + "units: [rad]\n", "units", "expected a mapping of state, input or output"),
    ("unit of an unknown name", MINIMAL + "units: {x3: rad}\n", "units.x3", "'x3' is not a state, input or output"),
    ("unit of a misspelled state", MINIMAL + "units: {x11: rad}\n", "units.x11", "(did you mean 'x1'?)"),
    ("unit of a parameter", MINIMAL + "units: {k: N m/rad}\n", "units.k", "'k' is a parameter; its unit goes in"),
    ("unit that is a number", MINIMAL + "units: {x1: 1}\n", "units.x1", "expected unit text (such as rad/s or N m), "
                                                                     "got the number 1"),
    ("unit that is a list", MINIMAL + "units: {u: [N, m]}\n", "units.u", "expected unit text"),
    ("empty unit", MINIMAL + "units: {x2: ''}\n", "units.x2", "empty unit; leave x2 out"),
    ("unit on two lines", MINIMAL + "units: {x2: \"rad\\ns\"}\n", "units.x2", "printable characters on one line"),
]


@pytest.mark.parametrize("text, field, problem", [b[1:] for b in BAD], ids=[b[0] for b in BAD])
def test_bad_plant_files_name_file_field_and_problem(write_plant, text, field, problem):
    path = write_plant(text)
    with pytest.raises(PlantFileError) as info:
        load_plant(path)
    message = str(info.value)
    assert "\n" not in message
    assert message.startswith(str(path) + ": ")
    assert info.value.field == field
    assert problem in message


def test_design_section_reads_poles_lists_watchdog_and_reference():
    plant = plant_from_text(MINIMAL + "outputs: {y: x1}\ndesign:\n  poles: [-1, -2+1j, -2-1j]\n"
                            "  reference: ' step:amplitude=1 '\n  watchdog: {sigma_warn: 0.5, sigma_stop: 0,"
                            " safe_command: {u: 0.25}, rate_limits: {u: 10}, hold_time: 0.2}\n")
    assert plant.design["poles"] == [-1, complex(-2, 1), complex(-2, -1)]
    assert plant.design["reference"] == "step:amplitude=1"
    assert plant.design["watchdog"] == {"sigma_warn": 0.5, "sigma_stop": 0.0, "hold_time": 0.2,
                                        "safe_command": {"kind": "fixed", "value": [0.25]},
                                        "rate_limits": [10.0]}


def test_missing_file_and_folder(tmp_path):
    with pytest.raises(PlantFileError, match="no such file"):
        load_plant(tmp_path / "absent.yaml")
    with pytest.raises(PlantFileError, match="is a folder"):
        load_plant(tmp_path)


def test_binary_file_is_refused(write_plant, tmp_path):
    path = tmp_path / "blob.yaml"
    path.write_bytes(b"\xff\xfe\x00garbage")
    with pytest.raises(PlantFileError, match="not UTF-8"):
        load_plant(path)


# -- property: whatever the text, the loader answers with a Plant or a PlantFileError -----------
from hypothesis import given, settings, strategies as st  # noqa: E402

_EXPRESSION_TEXT = st.text(alphabet="x12u+-*/^().,k sincoexp_E", max_size=30)


@settings(max_examples=150, deadline=None)
@given(rhs=_EXPRESSION_TEXT)
def test_any_right_hand_side_loads_or_is_refused_cleanly(rhs):
    text = MINIMAL.replace("-k*sin(x1) + u", rhs.replace("\n", " ") or "0")
    try:
        plant = plant_from_text(text)
    except PlantFileError as err:
        assert "\n" not in str(err) and str(err).startswith("<string>")
    else:
        assert plant.f.shape == (2, 1)


@settings(max_examples=150, deadline=None)
@given(doc=st.recursive(st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=8),
                        lambda inner: st.lists(inner, max_size=3)
                        | st.dictionaries(st.sampled_from(["plant", "states", "inputs", "dynamics",
                                                           "x1", "u", "parameters", "envelope"]),
                                          inner, max_size=4),
                        max_leaves=12))
def test_any_yaml_document_loads_or_is_refused_cleanly(doc):
    import yaml
    try:
        plant_from_text(yaml.safe_dump(doc))
    except PlantFileError as err:
        assert "\n" not in str(err)


# -- values that parse but cannot be meant; bounded reading --------------------------------
ZERO_INERTIA = """
plant: p
states: [th, w]
inputs: [u]
parameters:
  J: {value: 0.0}
dynamics:
  th: w
  w: (u - th) / J
"""


def test_a_parameter_that_is_zero_and_divides_is_named_with_the_expression():
    with pytest.raises(PlantFileError, match=r"parameters\.J: is 0, and dynamics\.w divides by it \(\(u - th\) / J\)"):
        plant_from_text(ZERO_INERTIA)
    with pytest.raises(PlantFileError, match=r"parameters\.J: is 0, and definitions\.k divides by it"):
        plant_from_text(ZERO_INERTIA.replace("dynamics:", "definitions: {k: 1/J}\ndynamics:"))


def test_a_constant_beyond_a_float_is_refused_at_load_naming_the_field():
    text = MINIMAL.replace("  x2: -k*sin(x1) + u\n", "  x2: 1e308*1e308*x1 + u\n")
    assert "1e308*1e308" in text
    with pytest.raises(PlantFileError, match=r"dynamics\.x2: .* beyond the range of a float .*1\.00e\+616"):
        plant_from_text(text)


@pytest.mark.parametrize("unit", ["kg", "kg m^2", "kg*m^2", "kg m2", "kg·m²"])
def test_a_mass_or_inertia_that_is_not_positive_is_refused(unit):
    text = ZERO_INERTIA.replace("{value: 0.0}", f"{{value: -1, unit: '{unit}'}}")
    with pytest.raises(PlantFileError, match=r"parameters\.J: (a mass|an inertia) \(unit .*\) must be positive, got -1"):
        plant_from_text(text)
    assert plant_from_text(text.replace("-1", "2")).parameters


def test_a_misspelled_state_key_in_dynamics_is_named_with_the_missing_one():
    text = MINIMAL.replace("  x2: -k*sin(x1) + u\n", "  x3: u\n")
    assert "x3: u" in text
    with pytest.raises(PlantFileError, match=r"dynamics: 'x3' is not a state \(did you mean 'x2'\?\); "
                                             r"no equation for x2"):
        plant_from_text(text)


def test_definitions_that_double_each_other_are_refused_naming_the_definition():
    chain = "\n".join(["  d1: x1*x1 + x1"] + [f"  d{i}: d{i - 1}*d{i - 1} + d{i - 1}" for i in range(2, 31)])
    text = f"plant: p\nstates: [x1]\ninputs: [u]\ndefinitions:\n{chain}\ndynamics:\n  x1: d30 + u\n"
    with pytest.raises(PlantFileError, match=r"definitions\.d\d+: expression too large: more than 20000 nodes"):
        plant_from_text(text)


def test_names_with_a_trailing_newline_are_refused():
    with pytest.raises(PlantFileError, match=r"plant: 'p\\n' is not a valid identifier"):
        plant_from_text(MINIMAL.replace("plant: demo", 'plant: "p\\n"', 1))
    with pytest.raises(PlantFileError, match=r"states\[0\]: 'x1\\n' is not a valid name"):
        plant_from_text(MINIMAL.replace("states: [x1, x2]", 'states: ["x1\\n", x2]', 1))


def test_only_regular_files_are_read(tmp_path):
    import os
    fifo = tmp_path / "pipe.yaml"
    os.mkfifo(fifo)                     # opening it would block forever
    with pytest.raises(PlantFileError, match=r"pipe\.yaml: is not a regular file"):
        load_plant(fifo)
    with pytest.raises(PlantFileError, match=r"/dev/zero: is not a regular file"):
        load_plant("/dev/zero")         # would be read without end
    with pytest.raises(PlantFileError, match=r"is a folder, not a plant file"):
        load_plant(tmp_path)
    with pytest.raises(PlantFileError, match=r"cannot read: Not a directory"):
        load_plant(tmp_path / "pipe.yaml" / "x.yaml")


def test_a_serial_arm_link_mass_that_is_not_positive_is_refused_naming_the_joint():
    text = (REFERENCE / "pick_arm_serial.yaml").read_text()
    bad = text.replace("m2: {value: 1.9, unit: kg}", "m2: {value: -1.9, unit: kg}")
    assert bad != text
    with pytest.raises(PlantFileError, match=r"serial_arm\.joints\[1\]\.mass: the mass of joint 2's link must be "
                                             r"positive, got -1\.9"):
        plant_from_text(bad)


def test_a_serial_arm_beyond_the_joint_limit_is_refused_at_once():
    from linz_ros.model._mechanics import MAX_JOINTS
    n = MAX_JOINTS + 1
    joint = "    - {type: revolute, a: 0.1, alpha: 0, d: 0, theta: 0, mass: 1, com: [0, 0, 0], inertia: [1, 1, 1]}"
    text = (f"plant: arm\ncoordinates: [{', '.join(f'q{i}' for i in range(n))}]\n"
            f"inputs: [{', '.join(f't{i}' for i in range(n))}]\nserial_arm:\n  joints:\n" + "\n".join([joint] * n))
    with pytest.raises(PlantFileError, match=rf"serial_arm\.joints: too large: {n} joints, at most {MAX_JOINTS}"):
        plant_from_text(text)


def test_a_plant_name_too_long_for_a_file_name_is_refused():
    """The plant name names the artifact and output files: a 1 MB name failed only at writing, after synthesis."""
    with pytest.raises(PlantFileError, match=r"<string>: plant: a name of 300 characters; at most 100"):
        plant_from_text(MINIMAL.replace("plant: demo", "plant: " + "d" * 300))


def test_an_empty_plant_path_is_refused_as_empty_not_as_the_current_folder():
    with pytest.raises(PlantFileError, match=r"^'': expected a plant file name, got an empty one$"):
        load_plant("")
