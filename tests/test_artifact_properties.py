"""Property tests of the artifact loader: damaged or tampered text gives an Artifact or one ArtifactError line."""

import copy
import json
import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from support import BUNDLED, c_words_not_ours
from linz_ros.artifact import Artifact, artifact_from_text, load_artifact, seal
from linz_ros.artifact.document import canonical_text
from linz_ros.errors import ArtifactError
from linz_ros.runtime.native._build import program_source

SOURCE = "<fuzz>"
HEADER = ("format", "format_version", "sha256")


def _settings(examples: int):
    return settings(max_examples=examples, deadline=None, derandomize=True, database=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])


@pytest.fixture(scope="module")
def built():
    """The mast camera's artifact document (without its hash) and its sealed text."""
    from linz_ros.codegen import build_document
    from linz_ros.model import load_plant
    from linz_ros.synthesis import synthesise

    document = build_document(synthesise(load_plant(BUNDLED / "mast_camera.yaml")), points=4)[0]
    return document, seal(document)


def _outcome(text: str):
    try:
        return artifact_from_text(text, SOURCE)
    except ArtifactError as err:
        return err


def _assert_clean(outcome, source: str = SOURCE) -> None:
    """A usable Artifact, or an error of one line naming the source and a problem."""
    if isinstance(outcome, Artifact):
        _assert_usable(outcome)
        return
    message = str(outcome)
    assert len(message.splitlines()) == 1, message
    assert message.startswith(f"{source}: ") and outcome.problem.strip()


def _assert_usable(artifact: Artifact) -> None:
    """What the runtime relies on after loading: names, numbers, and programs of the declared shapes."""
    n, m = len(artifact.states), len(artifact.inputs)
    assert len(artifact.outputs) == m == len(artifact.gains) == len(artifact.input_limits)
    degrees = artifact.relative_degree
    assert sum(degrees) <= n and all(len(g) == r + artifact.integral for g, r in zip(artifact.gains, degrees))
    assert artifact.rate > 0 and artifact.kind in ("input_output", "input_state")
    assert len(artifact.nominal_parameters) == len(artifact.parameter_names)
    point = [artifact.document["plant"]["operating_point"][s] for s in artifact.states]
    law = artifact.programs["law"].evaluate(point, artifact.nominal_parameters)
    assert law["A"].shape == (m, m) and law["b"].shape == (m,) and law["chain"].shape == (sum(degrees),)
    dynamics = artifact.programs["dynamics"].evaluate(point, artifact.nominal_parameters)
    assert dynamics["f"].shape == (n,) and dynamics["G"].shape == (n, m)
    numpy_law = artifact.numpy_program("law").evaluate(np.array(point), artifact.nominal_parameters)
    assert numpy_law["A"].shape == (m, m)


# -- strategies and mutations -----------------------------------------------------------

ODD_SCALARS = st.sampled_from([0, -0.0, 1e308, -1e308, 5e-324, 10 ** 15, 10 ** 16, -10 ** 40, "", "x", "T1", "_z0",
                               "nan", "Infinity", "1e999", "\u03b8", "a\nb", "__import__('os')", "x" * 5000])
JSON = st.recursive(st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False, allow_infinity=False)
                    | st.text(max_size=12) | ODD_SCALARS,
                    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4),
                    max_leaves=10)
TOKENS = st.sampled_from(["pan", "tilt", "pan_rate", "J_cam", "_t0", "_t1", "_t9", "_z0", "x", "p", "pi", "sin",
                          "atan2", "sqrt", "log", "__import__", "lambda", "os", "exec", "(", ")", "(", ")", "**", "^",
                          "*", "/", "+", "-", ",", ".", ";", "'", "[", "]", "0", "2", "0.5", "1e999", "1e308",
                          "99999999999999999999", " ", "\u0663", "#"])
EXPRESSIONS = st.lists(TOKENS, max_size=30).map("".join) | st.text(max_size=30) | st.builds(
    lambda k, kind: {"nest": "(" * k + "pan" + ")" * k, "tower": "pan**" * k + "pan", "negations": "-" * k + "pan",
                     "calls": "sin(" * k + "pan" + ")" * k, "sum": "+".join(["pan"] * k * 20)}[kind],
    st.integers(0, 300), st.sampled_from(["nest", "tower", "negations", "calls", "sum"]))


def _paths(value, prefix=()):
    if prefix:
        yield prefix
    if isinstance(value, dict):
        for key, item in value.items():
            yield from _paths(item, prefix + (key,))
    elif isinstance(value, list):
        for index, item in enumerate(value):
            yield from _paths(item, prefix + (index,))


def _expression_paths(document):
    """Paths of every expression text in the programs."""
    for name, program in document["programs"].items():
        for i, _ in enumerate(program["temporaries"]):
            yield ("programs", name, "temporaries", i, 1)
        for i, output in enumerate(program["outputs"]):
            for k, _ in enumerate(output[2]):
                yield ("programs", name, "outputs", i, 2, k)


_DELETE = object()


def _changed(document, path, new):
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


def _get(document, path):
    for key in path:
        document = document[key]
    return document



def _mutate(data, document, rounds: int = 2):
    """One or more random changes at random places: replace, delete, retype, stringify, rescale, rewrite."""
    for _ in range(data.draw(st.integers(1, rounds), label="rounds")):
        paths = list(_paths(document))
        if not paths:
            break
        path = data.draw(st.sampled_from(paths), label="path")
        old = _get(document, path)
        kind = data.draw(st.sampled_from(["replace", "delete", "stringify", "rescale", "wrap", "reshape", "append",
                                          "shorten"]), label="kind")
        if kind == "replace":
            new = data.draw(JSON, label="value")
        elif kind == "delete":
            new = _DELETE
        elif kind == "stringify":
            new = old if isinstance(old, str) else json.dumps(old)
        elif kind == "rescale":
            factor = data.draw(st.sampled_from([0, -1, 1e300, -1e-300, 10 ** 20]), label="factor")
            new = old * factor if isinstance(old, (int, float)) and not isinstance(old, bool) else old
            new = 1e308 if isinstance(new, float) and not math.isfinite(new) else new
        elif kind == "wrap":
            new = [old]
        elif kind == "reshape":
            new = ({str(i): v for i, v in enumerate(old)} if isinstance(old, list)
                   else list(old.values()) if isinstance(old, dict) else old)
        elif kind == "append":
            new = old + [data.draw(JSON, label="item")] if isinstance(old, list) else old
        else:
            new = old[:-1] if isinstance(old, (list, str)) else old
        document = _changed(document, path, new)
    return document


# -- properties -----------------------------------------------------------------------

def test_the_unmutated_artifact_loads_and_is_usable(built):
    document, text = built
    artifact = artifact_from_text(text, SOURCE)
    _assert_usable(artifact)
    assert artifact.states == ["pan", "tilt", "pan_rate", "tilt_rate"] and artifact.inputs == ["tau_pan", "tau_tilt"]
    assert artifact.document == json.loads(text)


@_settings(200)
@given(st.data())
def test_a_mutation_without_a_new_seal_is_refused(built, data):
    document, text = built
    original = json.loads(text)
    mutated = _mutate(data, original)
    outcome = _outcome(json.dumps(mutated, indent=1))
    if canonical_text(mutated) == canonical_text(original):
        assert isinstance(outcome, Artifact)
        return
    assert isinstance(outcome, ArtifactError)
    _assert_clean(outcome)
    if all(mutated.get(k) == original[k] for k in HEADER):
        assert "sha256" in outcome.problem or outcome.problem.startswith("not valid JSON")


@_settings(400)
@given(st.data())
def test_a_resealed_mutation_loads_or_names_the_problem(built, data):
    document, _ = built
    _assert_clean(_outcome(seal(_mutate(data, document, rounds=3))))


@_settings(300)
@given(st.data(), EXPRESSIONS)
def test_a_resealed_random_expression_compiles_or_names_the_program(built, data, expression):
    document, _ = built
    path = data.draw(st.sampled_from(list(_expression_paths(document))), label="path")
    outcome = _outcome(seal(_changed(document, path, expression)))
    _assert_clean(outcome)
    if isinstance(outcome, ArtifactError):
        assert path[1] in outcome.problem or path[1] in outcome.source
    else:
        # the native step is written from the same parse trees, with nothing of the text but numbers
        for program, symbol in (("law", "linz_law"), ("dynamics", "linz_dynamics")):
            assert not c_words_not_ours(program_source(outcome, program, symbol))


@_settings(40)
@given(st.floats(0.0, 1.0, exclude_max=True))
def test_truncated_text_is_refused(built, fraction):
    _, text = built
    outcome = _outcome(text[:int(len(text.rstrip()) * fraction)])
    assert isinstance(outcome, ArtifactError)
    _assert_clean(outcome)


@_settings(40)
@given(st.integers(0, 10 ** 6), st.integers(1, 255))
def test_flipped_bytes_in_a_file_load_or_name_the_file(built, folder, position, flip):
    _, text = built
    raw = bytearray(text.encode())
    raw[position % len(raw)] ^= flip
    path = folder / "flipped.artifact.json"
    path.write_bytes(bytes(raw))
    try:
        outcome = load_artifact(path, check_plant=False)
    except ArtifactError as err:
        outcome = err
    _assert_clean(outcome, str(path))


@_settings(40)
@given(JSON | st.dictionaries(st.sampled_from(["format", "format_version", "sha256", "plant", "design", "programs",
                                                "watchdog", "analysis", "verification"]), JSON))
def test_random_json_is_refused(document):
    outcome = _outcome(json.dumps(document))
    assert isinstance(outcome, ArtifactError)
    _assert_clean(outcome)


@_settings(30)
@given(st.text(max_size=200) | st.sampled_from(["NaN", "[Infinity]", "-Infinity", "1e999", "9" * 5000, "[1,]", "{",
                                                '"\\ud800"', "\ufeff{}", "\x00"]))
def test_random_text_is_refused(text):
    outcome = _outcome(text)
    assert isinstance(outcome, ArtifactError)
    _assert_clean(outcome)


@_settings(20)
@given(st.sampled_from(["[", '{"a":', '{"format":']), st.integers(1, 200_000))
def test_deeply_nested_json_is_refused(opening, depth):
    closing = "]" if opening == "[" else "}"
    outcome = _outcome(opening * depth + "1" + closing * depth)
    assert isinstance(outcome, ArtifactError)
    _assert_clean(outcome)


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    return tmp_path_factory.mktemp("artifacts")
