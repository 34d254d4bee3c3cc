"""The artifact file: round trip, hash, plant-file check, consistency, forbidden content."""

import json
import shutil

import numpy as np
import pytest

from conftest import BUNDLED, REFERENCE
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
])
def test_forbidden_or_inconsistent_content_is_refused_even_when_resealed(built, tmp_path, change, words):
    path, _, _ = built
    target = _rewrite(path, tmp_path / "bad.artifact.json", change)
    with pytest.raises(ArtifactError, match=words) as info:
        load_artifact(target, check_plant=False)
    assert str(info.value).startswith(str(target)) and "\n" not in str(info.value)


@pytest.mark.parametrize("text, words", [
    ("", "not valid JSON at line 1"),
    ("{\"format\": \"something else\"}", "not a linz_ros controller artifact"),
    ("[1, 2]", "not a linz_ros controller artifact"),
    ("{\"x\": NaN}", "non-finite number NaN"),
])
def test_files_that_are_not_artifacts_get_one_line(tmp_path, text, words):
    path = tmp_path / "x.json"
    path.write_text(text)
    with pytest.raises(ArtifactError, match=words):
        load_artifact(path)


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
