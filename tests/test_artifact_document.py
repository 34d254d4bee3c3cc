"""The artifact file: round trip, hash, plant-file check, consistency, forbidden content."""

import json
import re
import shutil
from pathlib import Path

import numpy as np
import pytest

from support import BUNDLED, REFERENCE
from linz_ros.artifact import artifact_from_text, content_hash, load_artifact, seal
from linz_ros.codegen import artifact_path, build_document, write_artifact
from linz_ros.errors import ArtifactError
from linz_ros.model import load_plant
from linz_ros.synthesis import synthesise


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    folder = tmp_path_factory.mktemp("artifact")
    plant_file = folder / "khalil_two_state.yaml"
    shutil.copy(REFERENCE / "khalil_two_state.yaml", plant_file)
    design = synthesise(load_plant(plant_file))
    document, verification = build_document(design)
    path = write_artifact(document, artifact_path(folder / "out", design.plant.name))
    return path, plant_file, document


def _rewrite(path, target, change):
    document = json.loads(path.read_text())
    change(document)
    target.write_text(seal(document))
    return target


def test_round_trip_keeps_names_numbers_and_programs(built):
    path, plant_file, document = built
    artifact = load_artifact(path)
    assert artifact.plant_check == "matches"
    assert artifact.states == ["x1", "x2"] and artifact.inputs == ["u"] and artifact.outputs == ["T1"]
    assert artifact.parameter_names == ["a"] and artifact.nominal_parameters.tolist() == [1.5]
    assert artifact.relative_degree == [2] and artifact.kind == "input_state"
    assert set(artifact.programs) == {"law", "dynamics", "transform", "inverse", "singular_set"}
    doc = artifact.document
    assert doc["plant"]["source_sha256"] == load_plant(plant_file).sha256
    assert doc["verification"]["max_relative_residual"] < 1e-12
    assert doc["verification"]["tolerance"] == 1e-9
    assert doc["linz_ros_version"] and doc["created"].endswith("+00:00")
    for key in ("sigma_warn", "sigma_act", "sigma_stop", "damping", "stale_after", "safe_command"):
        assert key in doc["watchdog"]
    # the compiled law gives L_g L_f T1 = a cos x2 and L_f^2 T1 = -a cos(x2) x1^2 (Khalil, ch. 13)
    A, b = artifact.programs["law"].evaluate([0.2, 0.3], [1.5])["A"], artifact.programs["law"].evaluate(
        [0.2, 0.3], [1.5])["b"]
    assert A[0, 0] == pytest.approx(1.5 * np.cos(0.3)) and b[0] == pytest.approx(-1.5 * np.cos(0.3) * 0.04)


def test_the_typed_view_reads_what_the_file_stores(built):
    path, plant_file, document = built
    artifact = load_artifact(path)
    assert artifact.operating_point == [0.0, 0.0]          # none given: the origin
    assert artifact.envelope == {"x1": (-1.0, 1.0), "x2": (-1.2, 1.2)}
    assert artifact.plant_source == document["plant"]["source"] and artifact.plant_source.endswith(".yaml")
    assert artifact.design_reference is None and artifact.design_warnings == document["design"]["warnings"]
    assert artifact.has_program("singular_set") and not artifact.has_program("no_such_program")
    assert artifact.sha256 == json.loads(path.read_text())["sha256"] and len(artifact.sha256) == 64
    assert artifact.created == document["created"] and artifact.built_by == document["linz_ros_version"]
    assert artifact.mechanics_form is None                   # an explicit plant has no mechanical form


def test_signal_units_are_read_and_older_artifacts_without_them_read_as_none(built, tmp_path):
    path, _, _ = built
    units = {"x1": "rad", "u": "N m", "T1": "rad"}           # a state, an input and the design's output
    stated = _rewrite(path, tmp_path / "units.artifact.json", lambda d: d["plant"].__setitem__("signal_units", units))
    assert load_artifact(stated, check_plant=False).signal_units == units
    older = _rewrite(path, tmp_path / "old.artifact.json", lambda d: d["plant"].pop("signal_units", None))
    assert load_artifact(older, check_plant=False).signal_units == {}


def test_the_writer_keeps_the_plant_files_signal_units(tmp_path):
    plant = load_plant(REFERENCE / "cart_pole.yaml")
    document, _ = build_document(synthesise(plant))
    artifact = artifact_from_text(seal(document))
    assert artifact.signal_units == {"x": "m", "theta": "rad", "v": "m/s", "omega": "rad/s", "F": "N", "y": "rad"}


def test_a_tampered_file_is_refused(built, tmp_path):
    path, _, _ = built
    tampered = tmp_path / "t.artifact.json"
    tampered.write_text(path.read_text().replace('"rate": 100.0', '"rate": 1000.0'))
    with pytest.raises(ArtifactError, match="content does not match its sha256"):
        load_artifact(tampered)


def test_a_changed_plant_file_is_refused_unless_allowed(built, tmp_path):
    path, plant_file, _ = built
    copy_dir = tmp_path / "pair"
    (copy_dir / "out").mkdir(parents=True)
    shutil.copy(plant_file, copy_dir / plant_file.name)
    moved = copy_dir / "out" / path.name
    shutil.copy(path, moved)
    assert load_artifact(moved).plant_check == "matches"      # found through the relative path
    (copy_dir / plant_file.name).write_text(plant_file.read_text().replace("a: 1.5", "a: 1.6"))
    with pytest.raises(ArtifactError, match="has changed since this artifact was built"):
        load_artifact(moved)
    assert load_artifact(moved, allow_plant_change=True).plant_check.endswith("(allowed)")



def test_an_artifact_deployed_without_its_plant_file_loads_and_says_so(tmp_path):
    plant_file = tmp_path / "khalil.yaml"
    shutil.copy(REFERENCE / "khalil_two_state.yaml", plant_file)
    design = synthesise(load_plant(plant_file))
    path = write_artifact(build_document(design, points=8)[0], artifact_path(tmp_path / "robot", "k"))
    plant_file.unlink()
    assert load_artifact(path).plant_check == "plant file not found; not compared"
    with pytest.raises(ArtifactError, match="plant file .* not found"):
        load_artifact(path, plant_path=plant_file)


@pytest.mark.parametrize("change, words", [
    (lambda d: d["programs"]["law"]["temporaries"].append(["_x", "__import__('os').system('true')"]),
     "unexpected character"),
    (lambda d: d["programs"]["law"]["temporaries"].append(["_x", "x1.real"]), "unexpected character"),
    (lambda d: d["programs"]["law"]["temporaries"].append(["_x", "exec(x1)"]), "'exec' is not a known function"),
    (lambda d: d["programs"]["dynamics"]["outputs"][0][2].__setitem__(0, "os"), "unknown name 'os'"),
    (lambda d: d["programs"]["law"]["outputs"][0].__setitem__(1, [2, 2]), "A must have shape \\[1, 1\\]"),
    (lambda d: d["design"]["chains"][0]["gains"].pop(), "gains: expected 2 numbers"),
    (lambda d: d["watchdog"].__setitem__("sigma_act", 99.0), "sigma_warn >= sigma_act"),
    (lambda d: d["watchdog"].__setitem__("rate_limits", [1, 2]), "rate_limits: expected 1 entries"),
    (lambda d: d["watchdog"]["safe_command"].__setitem__("kind", "brake"), "safe_command: expected kind"),
    (lambda d: d["plant"].__setitem__("states", []), "plant.states"),
    (lambda d: d.__setitem__("format_version", 7), "format version 7 is newer"),
    (lambda d: d.pop("programs"), "programs: missing"),
    (lambda d: d["programs"].pop("dynamics"), "programs.dynamics: missing"),
    (lambda d: d["programs"].__setitem__("law", [1, 2]), "programs.law: expected a mapping"),
    (lambda d: d["programs"]["law"]["outputs"][0].__setitem__(1, 5), "programs.law.outputs: expected"),
    (lambda d: d["programs"]["law"]["outputs"][0].__setitem__(1, [None]), "programs.law.outputs: expected"),
    (lambda d: d["programs"]["law"].__setitem__("arguments", list(reversed(d["programs"]["law"]["arguments"]))),
     "programs.law.arguments: expected \\['x'"),
    (lambda d: d["programs"].__setitem__("extra", d["programs"]["law"]), "programs.extra: unknown program"),
    (lambda d: d["design"].__setitem__("rate", 10 ** 40), "whole number 1[0]+ in the file is out of range"),
    (lambda d: d["design"].__setitem__("rate", -5), "design.rate: expected a positive number"),
    (lambda d: d["design"]["chains"].append(d["design"]["chains"][0]), "design.chains: expected one chain per input"),
    (lambda d: d["watchdog"].__setitem__("integral_limit", "x"), "watchdog.integral_limit"),
    (lambda d: d["watchdog"].__setitem__("hold_time", -1), "watchdog.hold_time"),
    (lambda d: d["plant"].__setitem__("operating_point", {}), "plant.operating_point"),
    (lambda d: d["plant"].__setitem__("name", "/tmp/escape"), "plant.name: expected an identifier"),
    (lambda d: d["plant"].__setitem__("states", ["x1", "1234"]), "plant.states"),
    (lambda d: d["design"].__setitem__("outputs", ["../T1"]), "design.outputs"),
    (lambda d: d["plant"].__setitem__("signal_units", ["rad"]), "plant.signal_units: expected a mapping"),
    (lambda d: d["plant"].__setitem__("signal_units", {"x3": "rad"}), "plant.signal_units: 'x3' is not a state"),
    (lambda d: d["plant"].__setitem__("signal_units", {"x1": 3}), "plant.signal_units.x1: expected unit text"),
    (lambda d: d["plant"].__setitem__("signal_units", {"u": ""}), "plant.signal_units.u: expected unit text"),
    (lambda d: d["plant"].__setitem__("signal_units", {"T1": "m\nx"}), "plant.signal_units.T1: expected unit text"),
])
def test_forbidden_or_inconsistent_content_is_refused_even_when_resealed(built, tmp_path, change, words):
    path, _, _ = built
    target = _rewrite(path, tmp_path / "bad.artifact.json", change)
    with pytest.raises(ArtifactError, match=words) as info:
        load_artifact(target, check_plant=False)
    assert str(info.value).startswith(str(target)) and "\n" not in str(info.value)


@pytest.mark.parametrize("text, words", [
    ("", "not valid JSON at line 1"),
    ('{"format": "linz_ros controller artifact", "rate": 1e400}', "number 1e400 in the file is out of range"),
    ('{"n": 1' + "0" * 400 + "}", "whole number 1[0]+ in the file is out of range"),
    ("{\"format\": \"something else\"}", "not a linz_ros controller artifact"),
    ("[1, 2]", "not a linz_ros controller artifact"),
    ("{\"x\": NaN}", "non-finite number NaN"),
])
def test_files_that_are_not_artifacts_get_one_line(tmp_path, text, words):
    path = tmp_path / "x.json"
    path.write_text(text)
    with pytest.raises(ArtifactError, match=words):
        load_artifact(path)


def test_a_special_file_is_not_read(tmp_path):
    link = tmp_path / "zero.artifact.json"
    link.symlink_to("/dev/zero")
    with pytest.raises(ArtifactError, match="is not a regular file"):
        load_artifact(link)


def test_the_plant_check_does_not_depend_on_the_current_folder(tmp_path, monkeypatch):
    (tmp_path / "work" / "plants").mkdir(parents=True)
    shutil.copy(REFERENCE / "khalil_two_state.yaml", tmp_path / "work" / "plants" / "k.yaml")
    monkeypatch.chdir(tmp_path / "work")
    design = synthesise(load_plant("plants/k.yaml"))                 # recorded as a relative path
    path = write_artifact(build_document(design, points=8)[0], artifact_path("out", "k"))
    deployed = tmp_path / "deploy" / "a" / "b"
    deployed.mkdir(parents=True)
    shutil.copy(path, deployed / "k.artifact.json")
    (tmp_path / "decoy" / "plants").mkdir(parents=True)
    (tmp_path / "decoy" / "plants" / "k.yaml").write_text("an unrelated file with the same relative name\n")
    monkeypatch.chdir(tmp_path / "decoy")
    assert load_artifact(deployed / "k.artifact.json").plant_check == "matches"   # by its absolute path


def _sparse(path, size):
    with open(path, "wb") as stream:
        stream.truncate(size)                         # no blocks on disk: reading it whole would take minutes
    return path


@pytest.mark.parametrize("make, words", [
    (lambda p: Path("/proc/self/mem"), "cannot read: Input/output error"),
    (lambda p: _sparse(p / "huge.yaml", 8 * 2**30), "larger than 64 MB"),
    (lambda p: Path("/dev/zero"), "is not a regular file"),
    (lambda p: p, "is a folder"),
])
def test_a_recorded_plant_path_that_cannot_be_read_is_not_compared(built, tmp_path, make, words):
    path, _, _ = built
    target = make(tmp_path)
    resealed = _rewrite(path, tmp_path / "r.artifact.json", lambda d: d["plant"].update(
        source_absolute=str(target), source_from_artifact="no/such/plant.yaml"))
    check = load_artifact(resealed).plant_check
    assert check.startswith(f"plant file {target} cannot be read (") and words in check
    assert check.endswith("; not compared") and "\n" not in check


@pytest.mark.parametrize("make, words", [
    (lambda p: Path("/proc/self/mem"), "cannot read: Input/output error"),
    (lambda p: _sparse(p / "huge.yaml", 8 * 2**30), "larger than 64 MB"),
    (lambda p: Path("/dev/zero"), "is not a regular file"),
    (lambda p: p / "missing.yaml", "not found"),
])
def test_a_given_plant_path_that_cannot_be_read_is_one_line(built, tmp_path, make, words):
    path, _, _ = built
    target = make(tmp_path)
    with pytest.raises(ArtifactError, match=f"plant file {re.escape(str(target))}:? {words}") as caught:
        load_artifact(path, plant_path=target)
    assert "\n" not in str(caught.value)


def test_odd_recorded_plant_paths_are_hints_only(built, tmp_path):
    path, _, _ = built
    resealed = _rewrite(path, tmp_path / "r.artifact.json", lambda d: d["plant"].update(
        source_absolute="/tmp/a\u0000b", source_from_artifact="x" * 5000))
    check = load_artifact(resealed).plant_check
    assert "cannot be read" in check and check.endswith("not compared")


def test_missing_file_and_folder(tmp_path):
    with pytest.raises(ArtifactError, match="no such file"):
        load_artifact(tmp_path / "missing.json")
    with pytest.raises(ArtifactError, match="is a folder"):
        load_artifact(tmp_path)


def test_unsealed_document_is_refused(built, tmp_path):
    path, _, _ = built
    document = json.loads(path.read_text())
    document.pop("sha256")
    (tmp_path / "u.json").write_text(json.dumps(document))
    with pytest.raises(ArtifactError, match="not sealed"):
        load_artifact(tmp_path / "u.json")


def test_seal_and_hash_cover_everything_but_the_hash(built):
    _, _, document = built
    text = seal(document)
    sealed = json.loads(text)
    assert sealed["sha256"] == content_hash(document)
    assert artifact_from_text(text).name == "khalil_two_state"
    changed = dict(document, created="2000-01-01T00:00:00+00:00")
    assert content_hash(changed) != content_hash(document)


def test_unwritable_target_is_one_line(built, tmp_path):
    _, _, document = built
    blocker = tmp_path / "file"
    blocker.write_text("")
    with pytest.raises(ArtifactError, match="cannot write"):
        write_artifact(document, blocker / "sub" / "a.artifact.json")


def test_bundled_plants_build_and_load(tmp_path):
    for plant_file in sorted(BUNDLED.glob("*.yaml")):
        design = synthesise(load_plant(plant_file))
        path = write_artifact(build_document(design, points=16)[0], artifact_path(tmp_path, design.plant.name))
        artifact = load_artifact(path)
        assert artifact.plant_check == "matches"
        assert artifact.document["verification"]["max_relative_residual"] < 1e-12


# -- property: any edit of a sealed artifact loads and runs, or is refused with one line ------------
from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from linz_ros.errors import ConfigError  # noqa: E402
from linz_ros.runtime import ControllerCore  # noqa: E402

_JUNK = st.recursive(st.none() | st.booleans() | st.integers(-10 ** 6, 10 ** 6) | st.floats(-1e6, 1e6)
                     | st.text(max_size=12) | st.sampled_from(["x1", "_t0", "1/0", "sqrt(-1)", "T1", "u", "a"]),
                     lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=5), inner, max_size=2),
                     max_leaves=6)


def _paths(node, prefix=()):
    yield prefix
    if isinstance(node, dict):
        for key, value in node.items():
            if key != "sha256":
                yield from _paths(value, prefix + (key,))
    elif isinstance(node, list):
        for index, value in enumerate(node):
            yield from _paths(value, prefix + (index,))


@settings(max_examples=250, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_any_edit_of_a_sealed_artifact_loads_and_steps_or_is_refused(built, data):
    _, _, document = built
    edited = json.loads(json.dumps(document))
    paths = [p for p in _paths(edited) if p]
    path = data.draw(st.sampled_from(paths))
    parent = edited
    for key in path[:-1]:
        parent = parent[key]
    parent[path[-1]] = data.draw(_JUNK)
    try:
        artifact = artifact_from_text(seal(edited))
    except ArtifactError as err:
        assert "\n" not in str(err)
        return
    try:
        core = ControllerCore(artifact)
    except ConfigError:
        return
    u, record = core.step([0.1, 0.2], [0.0, 0.0, 0.0], t=0.0)
    assert len(u) == 1


@pytest.fixture(scope="module")
def mechanical(tmp_path_factory):
    folder = tmp_path_factory.mktemp("mechanical")
    design = synthesise(load_plant(BUNDLED / "loader_arm.yaml"))
    document, _ = build_document(design, points=8)
    return write_artifact(document, artifact_path(folder, "loader_arm")), document


def test_a_mechanical_artifact_carries_its_structure_not_a_and_b(mechanical):
    path, document = mechanical
    artifact = load_artifact(path)
    assert artifact.mechanical_coordinates == 6 and artifact.computed_torque
    assert artifact.mechanics_form == "serial_arm"
    law = {out[0]: out[1] for out in document["programs"]["law"]["outputs"]}
    assert law == {"M": [6, 6], "F": [6], "B": [6, 6], "J": [6, 6], "c": [6], "chain": [12]}
    dynamics = {out[0]: out[1] for out in document["programs"]["dynamics"]["outputs"]}
    assert dynamics == {"M": [6, 6], "F": [6], "B": [6, 6], "qdot": [6]}
    assert document["design"]["mechanics"] == {"form": "serial_arm", "coordinates": 6, "computed_torque": True}


@pytest.mark.parametrize("change, words", [
    (lambda d: d["design"]["mechanics"].update(coordinates=5), "design.mechanics: expected null or {coordinates: nq}"),
    (lambda d: d["design"]["mechanics"].update(computed_torque="yes"), "design.mechanics.computed_torque"),
    (lambda d: d["design"].update(mechanics=None), "programs.law: A must have shape [6, 6]"),
    (lambda d: d["programs"]["dynamics"]["outputs"].pop(), "programs.dynamics: qdot must have shape [6]"),
])
def test_an_inconsistent_mechanical_artifact_is_refused_even_when_resealed(mechanical, tmp_path, change, words):
    path, _ = mechanical
    with pytest.raises(ArtifactError) as caught:
        load_artifact(_rewrite(path, tmp_path / "m.artifact.json", change), check_plant=False)
    assert words in str(caught.value) and "\n" not in str(caught.value)


@pytest.mark.parametrize("name, value, words", [
    ("stiffness", "-31", r"programs.law: stiffness\[0\] must be positive at the stored parameters, got -31"),
    ("stiffness", "0", r"stiffness\[0\] must be positive at the stored parameters, got 0"),
    ("motor_inertia", "0", r"motor_inertia\[0\] must be positive"),
    ("motor_damping", "-1", r"motor_damping\[0\] must be not negative"),
    ("stiffness", "1/0", r"programs.law: stiffness\[0\] must be positive at the stored parameters, got nan"),
])
def test_a_resealed_elastic_artifact_with_a_spring_of_zero_or_less_is_refused(name, value, words):
    from support import built_artifact

    document = json.loads(json.dumps(built_artifact(REFERENCE / "elastic_joint.yaml").document))
    outputs = document["programs"]["law"]["outputs"]
    slot = next(o for o in outputs if o[0] == name)
    slot[2] = [value]
    with pytest.raises(ArtifactError, match=words):
        artifact_from_text(seal({k: v for k, v in document.items() if k != "sha256"}))
