"""Property tests of the plant-file loader: any input gives a Plant or one line of PlantFileError."""

import copy
import time

import pytest
import sympy as sp
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from support import BUNDLED, MINIMAL, REFERENCE
from linz_ros.errors import PlantFileError
from linz_ros.model import Plant, expression_in, load_plant, plant_from_text

SOURCE = str(BUNDLED / "<fuzz>")   # in the bundled folder: a URDF plant finds its file relative to it
BUNDLED_TEXTS = {path.name: path.read_text() for path in sorted(BUNDLED.glob("*.yaml"))}
# what the fuzzers mutate: every bundled plant that loads in well under a second (the six-joint
# arm's DH table and the URDF arm's chain take a second or more), and the two-link arm in each mechanical form
FUZZED_TEXTS = {**{name: text for name, text in BUNDLED_TEXTS.items()
                   if name not in ("loader_arm.yaml", "flex_loader_arm.yaml", "sorting_arm.yaml")},
                **{path.name: path.read_text() for path in sorted(REFERENCE.glob("*_serial.yaml"))
                   + sorted(REFERENCE.glob("*_mass_matrix.yaml")) + sorted(REFERENCE.glob("*_energy.yaml"))}}
BUNDLED_DOCUMENTS = {name: yaml.safe_load(text) for name, text in BUNDLED_TEXTS.items()}
FUZZED_DOCUMENTS = {name: yaml.safe_load(text) for name, text in FUZZED_TEXTS.items()}


def _settings(examples: int):
    return settings(max_examples=examples, deadline=None, derandomize=True, database=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


def _outcome(text: str):
    """The plant, or the PlantFileError; any other exception fails the test."""
    try:
        return plant_from_text(text, SOURCE)
    except PlantFileError as err:
        return err


def _assert_clean(outcome, source: str = SOURCE) -> None:
    """A consistent Plant, or an error of one line naming the source and a problem."""
    if isinstance(outcome, Plant):
        mech = outcome.mechanics
        if mech is None:
            model = [outcome.f, outcome.G]
            assert outcome.f.shape == (outcome.n, 1) and outcome.G.shape == (outcome.n, outcome.m)
        else:
            model = [mech.M, mech.F, mech.B, mech.coordinate_rates]
            assert outcome.f is None and 2 * mech.nq == outcome.n
            assert mech.M.shape == (mech.nq, mech.nq) and mech.B.shape == (mech.nq, outcome.m)
            assert mech.F.shape == (mech.nq, 1) and mech.coordinate_rates.shape == (mech.nq, 1)
        assert outcome.h.shape[0] == len(outcome.output_names)
        names = outcome.state_names + outcome.input_names + [p.name for p in outcome.parameters]
        assert len(set(names)) == len(names)
        assert set(outcome.operating_point) == set(outcome.state_names)
        assert not any(matrix.has(sp.zoo, sp.nan) for matrix in model)
        assert all(str(matrix) for matrix in model) and str(outcome.h)
        return
    message = str(outcome)
    assert len(message.splitlines()) == 1, message
    assert message.startswith(f"{source}: ") and outcome.source == source
    assert outcome.problem.strip()


# -- strategies -------------------------------------------------------------------------

ODD_NUMBERS = st.sampled_from([0, -0.0, 1e308, -1e308, 1e-320, 10 ** 30, 10 ** 400, float("nan"), float("inf"),
                               float("-inf"), "1e999", "-1e-999", "nan", ".inf", "1_000", "0x1F", "1e3"])
ODD_TEXT = st.sampled_from(["", " ", "x", "u", "k", "x1", "\u00e9t\u00e4t", "\u03b8", "a\nb", "a: b", "- x", "[x]",
                            "{x: 1}", "*alias", "&anchor", "!!python/object:os.system", "__import__('os')",
                            "lambda: 0", "x" * 3000, "pi", "sin", "zero", "hold", "\x00", "\ufeff", "\u2028"])
SCALARS = (st.none() | st.booleans() | st.integers(-10 ** 20, 10 ** 20) | st.floats() | ODD_NUMBERS
           | st.text(max_size=20) | ODD_TEXT)
VALUES = st.recursive(SCALARS, lambda inner: st.lists(inner, max_size=4)
                      | st.dictionaries(st.text(max_size=8) | ODD_TEXT, inner, max_size=4), max_leaves=12)

TOKENS = st.sampled_from(["x1", "x2", "u", "k", "pi", "sin", "atan2", "sqrt", "log", "exp", "__import__", "lambda",
                          "os", "E", "I", "(", ")", "(", ")", "**", "^", "*", "/", "+", "-", ",", ".", ";", "'",
                          "[", "]", "=", "0", "2", "9", "0.5", "1e999", "1e-999", "1e308", "99999999999999999999",
                          "\u0663", "\u00b2", " ", "\t", "#", "@", "x1**x1", "1/0", "0**-1", "log(0)"])
TOKEN_EXPRESSIONS = st.lists(TOKENS, max_size=25).map("".join)


@st.composite
def _shaped_expressions(draw):
    """Expressions at the grammar's edges: nesting, power towers, long sums, huge constants."""
    k = draw(st.integers(0, 260))
    kind = draw(st.sampled_from(["nest", "tower", "numeric tower", "sum", "product", "negations", "long name",
                                 "calls"]))
    if kind == "nest":
        return "(" * k + "x1" + ")" * draw(st.sampled_from([k, k + 1, max(k - 1, 0)]))
    if kind == "tower":
        return "x1**" * k + "x1"
    if kind == "numeric tower":
        return "**".join([draw(st.sampled_from(["9", "2", "10", "0.5", "1", "1e300", "-3"]))] * (k % 8 + 2))
    if kind == "sum":
        return "+".join(f"{i}*x1**{i}" for i in range(k))
    if kind == "product":
        return "*".join(["1e300"] * (k % 40 + 1)) + "*x1"
    if kind == "negations":
        return "-" * k + "x1"
    if kind == "long name":
        return "x" * (k * 100 + 1)
    return "sin(" * k + "x1" + ")" * k


EXPRESSIONS = TOKEN_EXPRESSIONS | _shaped_expressions() | st.text(max_size=40) | st.integers() | st.floats()


def _paths(value, prefix=()):
    """Every path into a document (keys of mappings, indices of lists), the root included."""
    yield prefix
    if isinstance(value, dict):
        for key, item in value.items():
            yield from _paths(item, prefix + (key,))
    elif isinstance(value, list):
        for index, item in enumerate(value):
            yield from _paths(item, prefix + (index,))


PATHS = [(name, path) for name, document in FUZZED_DOCUMENTS.items() for path in _paths(document) if path]


_DELETE = object()


def _replace(document, path, new):
    """A deep copy of the document with the value at ``path`` replaced by ``new`` (or deleted)."""
    copied = copy.deepcopy(document)
    parent = copied
    for key in path[:-1]:
        parent = parent[key]
    if new is _DELETE:
        del parent[path[-1]]
    else:
        parent[path[-1]] = new
    return copied


def _mutation(draw, old):
    """A replacement for one value: deleted, random, an odd expression, wrapped, reshaped, duplicated, as text."""
    kind = draw(st.sampled_from(["delete", "value", "expression", "wrap", "reshape", "duplicate", "stringify"]))
    if kind == "delete":
        return _DELETE
    if kind == "value":
        return draw(VALUES)
    if kind == "expression":
        return draw(EXPRESSIONS)
    if kind == "wrap":
        return [old]
    if kind == "reshape":
        if isinstance(old, list):
            return {f"k{i}": v for i, v in enumerate(old)}
        return list(old.values()) if isinstance(old, dict) else {"value": old}
    if kind == "duplicate":
        return old + old[:1] if isinstance(old, list) else old
    return str(old)


@st.composite
def mutated_documents(draw):
    """A bundled plant with one or two fields deleted, retyped, reshaped or rewritten."""
    name, path = draw(st.sampled_from(PATHS))
    document = FUZZED_DOCUMENTS[name]
    for _ in range(draw(st.integers(1, 2))):
        old = document
        for key in path:
            old = old[key]
        document = _replace(document, path, _mutation(draw, old))
        candidates = [p for p in _paths(document) if p]
        if not candidates:
            break
        path = draw(st.sampled_from(candidates))
    return document


def _dump(document) -> str:
    return yaml.safe_dump(document, allow_unicode=True, sort_keys=False, width=10 ** 6)


YAMLISH = st.text(alphabet=st.sampled_from(list(":-[]{},&*!|>'\"#?%@`\n \t") + list("abxu1.e+") + ["\u00e9", "\x85"]),
                  max_size=80)


# -- properties -----------------------------------------------------------------------

@pytest.mark.parametrize("name", sorted(BUNDLED_TEXTS))
def test_the_unmutated_bundled_plants_load_and_survive_a_yaml_round_trip(name):
    plant = _outcome(BUNDLED_TEXTS[name])
    assert isinstance(plant, Plant)
    again = _outcome(_dump(BUNDLED_DOCUMENTS[name]))
    assert isinstance(again, Plant)
    assert again.state_names == plant.state_names and again.output_names == plant.output_names
    if plant.mechanics is None:
        assert sp.simplify(again.f - plant.f) == sp.zeros(plant.n, 1)
    else:
        assert again.mechanics.M == plant.mechanics.M and again.mechanics.F == plant.mechanics.F


@_settings(300)
@given(mutated_documents())
def test_mutated_bundled_plants_load_or_name_the_problem(document):
    _assert_clean(_outcome(_dump(document)))


@_settings(150)
@given(st.sampled_from(["x1", "x2"]), EXPRESSIONS)
def test_any_expression_in_the_dynamics_loads_or_names_the_field(state, expression):
    document = yaml.safe_load(MINIMAL)
    document["dynamics"][state] = expression
    outcome = _outcome(_dump(document))
    _assert_clean(outcome)
    if isinstance(outcome, PlantFileError):
        assert outcome.field.startswith(f"dynamics.{state}") or outcome.field == "dynamics"


@_settings(100)
@given(_shaped_expressions())
def test_expressions_at_the_grammar_limits_load_or_name_the_field(expression):
    document = yaml.safe_load(MINIMAL)
    document["dynamics"]["x2"] = expression + " + u"
    outcome = _outcome(_dump(document))
    _assert_clean(outcome)
    assert isinstance(outcome, Plant) or outcome.field in ("dynamics.x2", "dynamics")


def test_long_sums_load_in_linear_time():
    terms = [f"{i}*x1**{i}" for i in range(1, 1601)]
    document = yaml.safe_load(MINIMAL)
    document["dynamics"]["x2"] = " + ".join(terms) + " + u"
    start = time.process_time()          # this process's CPU time: not the shared cores' load
    plant = _outcome(_dump(document))
    assert isinstance(plant, Plant) and len(sp.Add.make_args(plant.f[1])) == len(terms)
    assert time.process_time() - start < 10.0


@_settings(150)
@given(st.dictionaries(st.sampled_from(["plant", "states", "inputs", "parameters", "definitions", "dynamics",
                                        "outputs", "input_limits", "envelope", "operating_point", "design"])
                       | st.text(max_size=6) | ODD_TEXT, VALUES, max_size=8) | VALUES)
def test_random_documents_are_refused_with_one_line(document):
    _assert_clean(_outcome(_dump(document)))


@_settings(200)
@given(YAMLISH | st.text(max_size=200))
def test_random_text_is_refused_with_one_line(text):
    _assert_clean(_outcome(text))


@_settings(40)
@given(st.sampled_from(sorted(FUZZED_TEXTS)), st.floats(0.0, 1.0, exclude_max=True))
def test_truncated_plant_files_load_or_name_the_problem(name, fraction):
    text = FUZZED_TEXTS[name]
    _assert_clean(_outcome(text[:int(len(text) * fraction)]))


@_settings(15)
@given(st.sampled_from(["flow list", "flow mapping", "block list", "tagged"]), st.integers(1, 1500))
def test_deeply_nested_yaml_is_refused_with_one_line(kind, depth):
    if kind == "block list":
        nested = "\n" + "".join("  " * i + "-" + ("\n" if i < depth % 300 else " x\n") for i in range(depth % 300 + 1))
    else:
        opening, closing = {"flow list": ("[", "]"), "flow mapping": ("{a: ", "}"), "tagged": ("!!seq [", "]")}[kind]
        nested = opening * depth + closing * depth + "\n"
    _assert_clean(_outcome(MINIMAL + "description: " + nested))


TAGGED_FIELDS = {"plant": "plant: demo", "states": "states: [x1, x2]", "parameter": "{k: 2.0}",
                 "dynamics": "x2: -k*sin(x1) + u"}


YAML_TAGS = ["!!int", "!!float", "!!bool", "!!timestamp", "!!binary", "!!null", "!!str", "!!seq", "!!map", "!!set",
             "!!omap", "!!pairs", "!!python/name:os.system", "!!python/object/apply:os.system", "!!merge", "!!value",
             "!<tag:yaml.org,2002:int>", "!local", ""]
YAML_SCALARS = ["abc", "maybe", "2020-13-45", "2020-02-30 25:61:61", "0x", "0o9", "0b2", "1:2:3", "1:99", "=", "<<",
                "[1, 2]", "{a: 1}", "'x'", "''", "~", "9" * 5000, "1e99999", "-.inf", ".nan", "+", "-", "_", "0x_"]


@pytest.mark.parametrize("field", sorted(TAGGED_FIELDS))
def test_every_yaml_tag_with_odd_scalars_is_refused_or_loaded_cleanly(field):
    original = TAGGED_FIELDS[field]
    for tag in YAML_TAGS:
        for value in YAML_SCALARS:
            replacement = {"plant": f"plant: {tag} {value}", "states": f"states: [x1, {tag} {value}]",
                           "parameter": f"{{k: {tag} {value}}}", "dynamics": f"x2: {tag} {value}"}[field]
            _assert_clean(_outcome(MINIMAL.replace(original, replacement)))


ODD_KEYS = ["1" * 5000, "9" * 400, "2020-13-45", "[1, 2]", "{a: b}", '"a\\nb"', '"a\\u2028b"', "? [x]",
            "!!binary aGVsbG8=", "null", "true", ".nan"]


@pytest.mark.parametrize("where", ["top", "parameters", "dynamics", "envelope", "design", "poles"])
def test_odd_keys_are_refused_with_one_line(where):
    base = MINIMAL + "outputs: {y: x1}\n"
    for key in ODD_KEYS:
        text = {"top": base + f"{key}: 1\n",
                "parameters": base.replace("{k: 2.0}", f"{{k: 2.0, {key}: 1}}"),
                "dynamics": base.replace("  x1: x2\n", f"  x1: x2\n  {key}: x1\n"),
                "envelope": base + f"envelope: {{{key}: [0, 1]}}\n",
                "design": base + f"design: {{{key}: 1}}\n",
                "poles": base + f"design: {{poles: {{{key}: [-1]}}}}\n"}[where]
        outcome = _outcome(text)
        assert isinstance(outcome, PlantFileError)
        _assert_clean(outcome)


def _alias_bomb(levels: int, width: int) -> str:
    """A flow list whose last entry expands to width**levels items (anchors defined inside it)."""
    items = [f"&l0 [{', '.join(['lol'] * width)}]"]
    items += [f"&l{i} [{', '.join([f'*l{i - 1}'] * width)}]" for i in range(1, levels)]
    return "[" + ", ".join(items) + "]"


@pytest.mark.parametrize("where", ["description", "unit", "reference", "safe_command", "poles", "states",
                                   "parameter"])
def test_alias_bombs_are_refused_quickly(where):
    base = MINIMAL + "outputs: {y: x1}\n"
    for levels in (6, 7, 8):
        bomb = _alias_bomb(levels, 8)
        text = {"description": base + f"description: {bomb}\n",
                "unit": base.replace("{k: 2.0}", f"{{k: {{value: 2.0, unit: {bomb}}}}}"),
                "parameter": base.replace("{k: 2.0}", f"{{k: {bomb}}}"),
                "reference": base + f"design: {{reference: {bomb}}}\n",
                "safe_command": base + f"design: {{watchdog: {{safe_command: {bomb}}}}}\n",
                "poles": base + f"design: {{poles: {bomb}}}\n",
                "states": base.replace("states: [x1, x2]", f"states: {bomb}")}[where]
        start = time.process_time()      # this process's CPU time: not the shared cores' load
        outcome = _outcome(text)
        assert time.process_time() - start < 1.0
        assert isinstance(outcome, PlantFileError)
        _assert_clean(outcome)


@st.composite
def damaged_bytes(draw):
    """A bundled plant file with one byte replaced."""
    raw = FUZZED_TEXTS[draw(st.sampled_from(sorted(FUZZED_TEXTS)))].encode()
    position = draw(st.integers(0, len(raw) - 1))
    return raw[:position] + bytes([draw(st.integers(0, 255))]) + raw[position + 1:]


@_settings(100)
@given(st.binary(max_size=300) | damaged_bytes())
def test_random_and_flipped_bytes_load_or_name_the_file(folder, data):
    path = folder / "fuzz.yaml"
    path.write_bytes(data)
    try:
        outcome = load_plant(path)
    except PlantFileError as err:
        outcome = err
    _assert_clean(outcome, str(path))


@_settings(100)
@given(EXPRESSIONS)
def test_expression_in_gives_an_expression_or_names_the_field(expression):
    plant = plant_from_text(MINIMAL)
    try:
        result = expression_in(plant, expression, "<command line>", "--linearizing-output")
    except PlantFileError as err:
        assert len(str(err).splitlines()) == 1 and str(err).startswith("<command line>: --linearizing-output: ")
    else:
        assert isinstance(result, sp.Expr) and not result.has(sp.zoo, sp.nan)
        assert result.free_symbols <= set(plant.states) | set(plant.parameters)


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    return tmp_path_factory.mktemp("plants")
