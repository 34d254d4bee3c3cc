"""The verbs as functions (linz_ros.commands): typed calls, no argv, no redesign in the bench."""

import os
import shutil

import pytest

from support import BUNDLED, REFERENCE
from linz_ros.commands._bringup import render_heard, BringupRun, warn_causes
from linz_ros.commands._options import DesignChoices
from linz_ros.commands.build import build, render_build
from linz_ros.commands.bench import bench
from linz_ros.errors import LinzError
from linz_ros.runtime import REASONS, VERDICTS


def _summary(**changes):
    summary = {"verdict": "tracked", "reasons": {"ok": 2990, "stale": 9}, "diagnostics": [
        {"level": 0, "message": "nominal"}, {"level": 1, "message": "active, but no state received"},
        {"level": 1, "message": "active, but no state received"}, {"level": 1, "message": "saturating"}]}
    summary.update(changes)
    return summary


def test_a_warn_of_the_bringup_is_explained_in_the_runtimes_words():
    simulator = "run: 6.004 s simulated, 47 late ticks; states sent 3002, dropped 0; lockstep timeouts 1"
    why = warn_causes(_summary(), [0, 1, 1, 1], simulator)
    assert "WARN 'active, but no state received' x2" in why and "WARN 'saturating' x1" in why
    assert "steps refused or acted on: stale 9" in why and "stale" in REASONS
    assert "verdict tracked" in why and "tracked" in VERDICTS
    assert "lockstep timeouts 1" in why and "late ticks" not in why     # lockstep: wall-clock lateness is no cause
    assert warn_causes(_summary(), [0, 0], simulator) is None
    wall = warn_causes(_summary(), [0, 1], "run: 47 late ticks; states sent 3002, dropped 0")
    assert "simulator 47 late ticks" in wall


def test_the_heard_line_keeps_its_words_and_adds_the_cause_only_when_not_ok():
    heard = {"commands": 5, "states": 6, "records": 5}
    ok = BringupRun(_summary(diagnostics=[{"level": 0, "message": "nominal"}]), heard, "run: 0 late ticks")
    assert render_heard(ok) == "  heard over DDS: diagnostics OK; 5 commands, 6 states, 5 step records"
    text = render_heard(BringupRun(_summary(reasons={"ok": 5}), heard, "run: 0 late ticks"))
    assert text.splitlines()[0].startswith("  heard over DDS: diagnostics OK, WARN; 5 commands")
    assert text.splitlines()[1] == ("  why not OK: WARN 'active, but no state received' x2; WARN 'saturating' x1; "
                                    "field log: every step ok; verdict tracked")


def test_design_choices_know_when_they_override_nothing():
    assert DesignChoices().is_empty() and not DesignChoices(rate=100.0).is_empty()
    assert DesignChoices(poles=["tool_x=-3,-4"]).options().poles == {"tool_x": [-3, -4]}


@pytest.fixture(scope="module")
def serial_artifact(tmp_path_factory):
    """A joint-space serial arm (computed torque), built to a file beside a copy of its plant file."""
    folder = tmp_path_factory.mktemp("serial")
    text = (REFERENCE / "pick_arm_serial.yaml").read_text().replace(
        "outputs:\n  tool_x: tip_x\n  tool_y: tip_y\n", "").replace(
        "poles: {tool_x: [-6, -7], tool_y: [-6, -7]}", "poles: {y_q1: [-6, -7], y_q2: [-6, -7]}")
    plant = folder / "arm.yaml"
    plant.write_text(text)
    built = build(plant, folder / "out")
    assert "wrote" in render_build(built)
    return plant, built.path


def test_bench_of_an_artifact_never_synthesises(serial_artifact, monkeypatch):
    import linz_ros.synthesis as synthesis

    def refuse(*args, **kwargs):
        raise AssertionError("bench ran a synthesis")

    monkeypatch.setattr(synthesis, "synthesise", refuse)
    _, artifact = serial_artifact
    result = bench(str(artifact), calls=20, rounds=1)
    expected = {"core", "law_only", "naive", "lambdify_numpy", "lambdify_cse_math"}
    assert expected <= set(result.microseconds)
    from linz_ros.crosscheck import pinocchio_available
    if pinocchio_available():
        assert "pinocchio_computed_torque" in result.microseconds
        assert any("whose hash matches the artifact's" in note for note in result.notes), result.notes


def test_bench_of_an_artifact_whose_plant_changed_leaves_the_plant_out_and_says_so(serial_artifact, tmp_path):
    plant, artifact = serial_artifact
    copy = tmp_path / "out" / artifact.name
    copy.parent.mkdir()
    shutil.copy(artifact, copy)
    moved = tmp_path / plant.name        # the recorded plant file, beside the copy as at build time
    moved.write_text(plant.read_text().replace("damping: 0.", "damping: 0.0") + "\n# changed\n")
    result = bench(str(copy), calls=20, rounds=1, allow_plant_change=True)
    assert "pinocchio_computed_torque" not in result.microseconds
    assert any(note.startswith("pinocchio_computed_torque not measured:") for note in result.notes), result.notes


def test_the_cli_leaves_the_environment_alone(capsys, tmp_path):
    from linz_ros.cli import main

    before = dict(os.environ)
    assert main(["build", str(BUNDLED / "mast_camera.yaml"), "-o", str(tmp_path)]) == 0
    assert dict(os.environ) == before


def test_outputs_undefined_at_the_artifacts_operating_point_name_the_artifact_not_an_option(tmp_path):
    import json

    from support import built_artifact
    from linz_ros.artifact import seal
    from linz_ros.commands.sim import SimRequest, simulate_run
    from linz_ros.errors import ConfigError

    plant = ("plant: p\nstates: [x1, x2]\ninputs: [u]\ndynamics: {x1: x2, x2: u}\noutputs: {y: sqrt(x1)}\n"
             "operating_point: {x1: 1.0, x2: 0.0}\ndesign: {poles: {y: [-2, -3]}}\n")
    document = json.loads(json.dumps(built_artifact(plant).document))
    document["plant"]["operating_point"]["x1"] = -1.0         # sqrt undefined there
    path = tmp_path / "p.artifact.json"
    path.write_text(seal({k: v for k, v in document.items() if k != "sha256"}))
    with pytest.raises(ConfigError, match=r"the operating point") as err:
        simulate_run(SimRequest(source=str(path), out=str(tmp_path / "out"), plots=False, force_initial=True))
    assert "--initial" not in str(err.value) and "not defined at this state" in str(err.value)


_SMALL_PLANT = """plant: tank_pair
states: [h1, h2]
inputs: [q1, q2]
parameters: {a: 0.5}
dynamics:
  h1: -a*h1 + q1
  h2: a*h1 - a*h2 + q2
outputs: {y1: h1, y2: h2}
design:
  rate: 80
  poles: {y1: [-3], y2: [-4]}
  reference: "smooth:y1=0.2,duration=1,at=0.1"
"""


def test_linz_wire_writes_the_three_nodes_parameters_beside_the_plant_named_after_it(tmp_path):
    from linz_ros.bringup import node_parameters
    from linz_ros.commands.wire import render_wire, wire
    plant = tmp_path / "tanks.yaml"
    plant.write_text(_SMALL_PLANT)
    result = wire(str(plant))
    assert result.path == tmp_path / "tanks.bringup.yaml" and result.layout == "Float64MultiArray"
    controller = node_parameters(result.path, "linz_controller")
    simulator = node_parameters(result.path, "linz_plant_sim")
    reference = node_parameters(result.path, "linz_reference")
    assert controller["state_topic"] == simulator["state_topic"] == "/tank_pair/state"
    assert controller["command_topic"] == simulator["command_topic"] == "/tank_pair/command"
    assert controller["reference_topic"] == reference["topic"] == "/tank_pair/reference"
    assert controller["state_type"] == "std_msgs/msg/Float64MultiArray" and controller["state_fields"] == []
    assert simulator["rate"] == 80.0 and controller["stale_after"] == pytest.approx(25 / 80)
    assert reference["reference"] == "smooth:y1=0.2,duration=1,at=0.1" and reference["rate"] == 80.0
    assert "wrote " + str(result.path) in render_wire(result)
    with pytest.raises(LinzError, match="tanks.bringup.yaml exists; pass --force to replace it"):
        wire(str(plant))
    assert wire(str(plant), force=True).path == result.path


def test_linz_wire_gives_an_arm_its_joints_in_a_joint_state_and_their_efforts():
    from linz_ros.commands.wire import bringup_text
    import yaml
    from support import built_artifact
    document = yaml.safe_load(bringup_text(built_artifact(BUNDLED / "loader_arm.yaml"), "loader_arm.yaml"))
    c = document["/linz_controller"]["ros__parameters"]
    # the ros2_control layout: a joint_state_broadcaster's JointState in, an effort forward command
    # controller's Float64MultiArray out (in the artifact's input order)
    assert c["state_type"] == "sensor_msgs/msg/JointState" and c["command_type"] == "std_msgs/msg/Float64MultiArray"
    assert c["state_fields"][:2] == ["position.q1", "position.q2"] and c["state_fields"][6] == "velocity.q1"
    assert c["command_fields"] == []
    assert (c["state_topic"], c["command_topic"]) == ("/loader_arm/joint_states", "/loader_arm/effort_controller/commands")
    assert document["/linz_plant_sim"]["ros__parameters"]["command_type"] == "std_msgs/msg/Float64MultiArray"


def test_the_demo_takes_its_bringup_from_the_option_the_package_beside_the_plant_or_linz_wire(tmp_path):
    from linz_ros.commands.demo import choose_bringup
    plant = tmp_path / "tanks.yaml"
    plant.write_text(_SMALL_PLANT)
    artifact = build(plant, tmp_path / "built").path
    out = tmp_path / "demo"
    path, why = choose_bringup(plant, "tank_pair", None, artifact, out)
    assert path == out / "tank_pair.bringup.yaml" and path.is_file() and why.startswith("written by `linz wire`")
    beside = tmp_path / "tanks.bringup.yaml"
    beside.write_text(path.read_text())
    assert choose_bringup(plant, "tank_pair", None, artifact, out) == (beside, "beside the plant file")
    assert choose_bringup(BUNDLED / "pick_arm.yaml", "pick_arm", None, artifact, out) == \
        (BUNDLED.parent / "pick_arm.yaml", "the package's, for the bundled plant")
    given = choose_bringup(BUNDLED / "pick_arm.yaml", "pick_arm", str(beside), artifact, out)
    assert given == (beside, "named by --bringup")
    with pytest.raises(LinzError, match="--bringup: .*nowhere.yaml: no such file"):
        choose_bringup(plant, "tank_pair", str(tmp_path / "nowhere.yaml"), artifact, out)


def test_linz_demo_refuses_a_missing_bringup_file_at_once_in_one_line(tmp_path, capsys):
    from linz_ros.cli import main
    assert main(["demo", str(BUNDLED / "pick_arm.yaml"), "-o", str(tmp_path), "--bringup",
                 str(tmp_path / "none.yaml")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--bringup" in err and "none.yaml: no such file" in err
    assert not any(tmp_path.iterdir())                                # nothing ran


def test_a_bringup_summary_names_the_physics_its_simulator_ran(tmp_path):
    from linz_ros.commands._bringup import _simulator_physics
    params = tmp_path / "bringup.yaml"
    params.write_text("/linz_plant_sim:\n  ros__parameters:\n    physics: mujoco\n")
    assert _simulator_physics(params) == "mujoco"
    params.write_text("/linz_plant_sim:\n  ros__parameters:\n    rate: 100.0\n")
    assert _simulator_physics(params) == "model"
