"""The URDF an artifact records (plant.urdf): written by codegen, checked on load, found and hashed by
``Artifact.urdf.path``."""

import json

import pytest

from support import MINIMAL, built_artifact
from linz_ros.artifact import load_artifact, seal
from linz_ros.artifact.urdf import joint_identifier, urdf_names
from linz_ros.codegen import build_document, write_artifact
from linz_ros.errors import ArtifactError
from linz_ros.model._mechanics import STANDARD_GRAVITY
from linz_ros.model import load_plant
from linz_ros.synthesis import synthesise

URDF = """\
<?xml version="1.0"?>
<robot name="pendulum">
  <link name="support"/>
  <joint name="hinge" type="revolute">
    <parent link="support"/>
    <child link="bob"/>
    <axis xyz="0 1 0"/>
    <limit lower="-1.5" upper="1.5" velocity="3" effort="20"/>
    <dynamics damping="0.1"/>
  </joint>
  <link name="bob">
    <inertial>
      <origin xyz="0 0 -0.5"/>
      <mass value="2.0"/>
      <inertia ixx="0.01" ixy="0" ixz="0" iyy="0.03" iyz="0" izz="0.025"/>
    </inertial>
  </link>
</robot>
"""

PLANT = """\
plant: swing
urdf: {file: ../urdf/swing.urdf, base: support, tip: bob}
design: {rate: 200, poles: {y_q_hinge: [-4, -5]}}
"""


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    """A plant file and its URDF in sibling folders, and the artifact built from them in a third."""
    root = tmp_path_factory.mktemp("urdf")
    (root / "urdf").mkdir()
    (root / "plants").mkdir()
    (root / "urdf" / "swing.urdf").write_text(URDF)
    plant_file = root / "plants" / "swing.yaml"
    plant_file.write_text(PLANT)
    document, _ = build_document(synthesise(load_plant(plant_file)), points=8)
    path = write_artifact(document, root / "out" / "swing.artifact.json")
    return root, path


def test_the_artifact_records_the_urdf_and_finds_it_beside_the_plant_file(built):
    root, path = built
    artifact = load_artifact(path)
    record = artifact.urdf
    assert (record.file, record.base, record.tip, record.joints) == ("../urdf/swing.urdf", "support", "bob", ("hinge",))
    assert record.sha256 == __import__("hashlib").sha256(URDF.encode()).hexdigest()
    assert record.gravity == (0.0, 0.0, -STANDARD_GRAVITY)          # the plant file names none: the one default
    assert record.path(artifact) == (root / "urdf" / "swing.urdf").resolve()
    assert artifact.states == ["q_hinge", "qd_hinge"] and artifact.inputs == ["tau_hinge"]
    assert artifact.envelope == {"q_hinge": (-1.5, 1.5), "qd_hinge": (-3.0, 3.0)}
    assert artifact.input_limits == [(-20.0, 20.0)]


def test_a_changed_or_missing_urdf_is_one_line(built, tmp_path):
    root, path = built
    urdf = root / "urdf" / "swing.urdf"
    artifact = load_artifact(path)
    try:
        urdf.write_text(URDF.replace("0.1", "0.2"))
        with pytest.raises(ArtifactError, match=r"plant\.urdf: .*swing\.urdf has changed since this artifact was "
                                                r"built \(its sha256 differs\); rebuild with linz build"):
            artifact.urdf.path(artifact)
        urdf.unlink()
        with pytest.raises(ArtifactError, match=r"plant\.urdf: .*swing\.urdf: no such file"):
            artifact.urdf.path(artifact)
    finally:
        urdf.write_text(URDF)
    moved = tmp_path / "alone.artifact.json"
    document = json.loads(path.read_text())
    for key in ("source_from_artifact", "source_absolute"):
        document["plant"].pop(key)
    document["plant"]["source"] = str(tmp_path / "gone" / "swing.yaml")
    moved.write_text(seal({k: v for k, v in document.items() if k != "sha256"}))
    alone = load_artifact(moved)
    with pytest.raises(ArtifactError, match=r"plant\.urdf: the plant file is not found, so the URDF "
                                            r"'\.\./urdf/swing\.urdf' \(relative to it\) cannot be located"):
        alone.urdf.path(alone)


@pytest.mark.parametrize("change, words", [
    (lambda u: u.update(sha256="abc"), r"plant\.urdf\.sha256: expected 64 lowercase hexadecimal digits"),
    (lambda u: u.update(joints=["elbow"]), r"plant\.urdf\.joints: the plant's states are not q_<joint> then qd_<joint>"),
    (lambda u: u.update(joints=[]), r"plant\.urdf\.joints: expected a non-empty list of distinct joint names"),
    (lambda u: u.update(base=7), r"plant\.urdf\.base: expected a link name"),
    (lambda u: u.pop("tip"), r"plant\.urdf: expected exactly the keys file, sha256, base, tip, joints, gravity"),
    (lambda u: u.pop("gravity"), r"plant\.urdf: expected exactly the keys .* \('gravity' differs\)"),
    (lambda u: u.update(gravity=[0, 0]), r"plant\.urdf\.gravity: expected \[gx, gy, gz\] \(finite numbers, m/s\^2\)"),
    (lambda u: u.update(gravity=[0, "0", -9.8]), r"plant\.urdf\.gravity: expected \[gx, gy, gz\]"),
    (lambda u: u.update(file=""), r"plant\.urdf\.file: expected the URDF file name"),
])
def test_an_inconsistent_urdf_record_is_refused_even_when_resealed(built, tmp_path, change, words):
    _, path = built
    document = json.loads(path.read_text())
    change(document["plant"]["urdf"])
    target = tmp_path / "bad.artifact.json"
    target.write_text(seal({k: v for k, v in document.items() if k != "sha256"}))
    with pytest.raises(ArtifactError, match=words):
        load_artifact(target)


def test_an_artifact_without_a_urdf_says_none():
    assert built_artifact(MINIMAL).urdf is None


def test_joint_names_become_identifiers():
    assert joint_identifier("arm/joint-2.a") == "arm_joint_2_a"
    assert urdf_names(["j1"]) == (["q_j1"], ["qd_j1"], ["tau_j1"])
