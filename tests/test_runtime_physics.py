"""MuJoCo as the plant (runtime/physics.py): the engine's rigid-body terms against our model's, closed
loops under both physics, what only the engine models (joint limits, Coulomb friction), refusals.

Outside reference: MuJoCo (``mujoco`` 3.x, its URDF import, ``mj_fullM``, ``qfrc_bias``, ``qfrc_passive``
and its RK4 integrator), fed a URDF written here from the same DH table our model is built from.
Progress is judged in simulated time only.
"""

import math
import sys

import numpy as np
import pytest
import sympy as sp
import yaml

from support import BUNDLED, REFERENCE, built_artifact, sampled_chain_error
from linz_ros.errors import ConfigError
from linz_ros.model._mechanics import STANDARD_GRAVITY
from linz_ros.runtime import ControllerCore, SimSettings, fit_decay_rate, make_reference, simulate
from linz_ros.runtime import physics
from linz_ros.runtime.physics import EngineArm, MujocoPlant, make_physics_plant

PICK_SERIAL = REFERENCE / "pick_arm_serial.yaml"
PICK_JOINTS = ("shoulder", "elbow")
LOADER_JOINTS = ("turret", "shoulder", "elbow", "wrist_roll", "wrist_pitch", "flange")


# --- a URDF from a DH table (standard, distal DH: A_i = Rz(theta_i) Tz(d_i) Tx(a_i) Rx(alpha_i)) ---

def _rotation(axis: str, angle: float) -> np.ndarray:
    c, s = math.cos(angle), math.sin(angle)
    return {"x": np.array([[1, 0, 0], [0, c, -s], [0, s, c]]), "z": np.array([[c, -s, 0], [s, c, 0], [0, 0, 1]])}[axis]


def _rpy(R: np.ndarray) -> tuple[float, float, float]:
    """URDF's roll, pitch, yaw of R = Rz(yaw) Ry(pitch) Rx(roll)."""
    return (math.atan2(R[2, 1], R[2, 2]), -math.asin(max(-1.0, min(1.0, R[2, 0]))), math.atan2(R[1, 0], R[0, 0]))


def _origin(position, R) -> str:
    return (f'<origin xyz="{" ".join(repr(float(v)) for v in position)}" '
            f'rpy="{" ".join(repr(float(v)) for v in _rpy(R))}"/>')


def dh_urdf(plant_file, joints, *, changes=None, friction=0.0, limits=(-10.0, 10.0), damping=True) -> str:
    """The URDF of a serial_arm plant file: link i's frame is frame i-1 turned by the joint, so joint
    i+1 sits at Rz(theta_i) Tz(d_i) Tx(a_i) Rx(alpha_i) of link i, and link i's inertia is written in DH
    frame i (the inertial origin's rpy)."""
    spec = yaml.safe_load(plant_file.read_text())
    values = {k: float(v["value"] if isinstance(v, dict) else v) for k, v in spec["parameters"].items()}
    values.update(changes or {})
    names = {k: sp.Float(v) for k, v in values.items()}

    def number(e):
        return float(sp.sympify(str(e), locals=names).evalf())

    lines = ['<?xml version="1.0"?>', '<robot name="dh_arm">', '<link name="base_link"/>']
    rest_position, rest_rotation = np.zeros(3), np.eye(3)
    for i, (name, link) in enumerate(zip(joints, spec["serial_arm"]["joints"])):
        parent = "base_link" if i == 0 else f"link{i}"
        lines += [f'<joint name="{name}" type="{link["type"]}"><parent link="{parent}"/><child link="link{i + 1}"/>',
                  _origin(rest_position, rest_rotation), '<axis xyz="0 0 1"/>',
                  f'<limit lower="{limits[0]}" upper="{limits[1]}" effort="1000" velocity="100"/>',
                  f'<dynamics damping="{number(link.get("damping", 0)) if damping else 0.0}" friction="{friction}"/>',
                  '</joint>']
        R = _rotation("z", number(link["theta"])) @ _rotation("x", number(link["alpha"]))
        p = _rotation("z", number(link["theta"])) @ np.array([number(link["a"]), 0.0, number(link["d"])])
        inertia = [number(v) for v in link["inertia"]] + [0.0, 0.0, 0.0]
        ixx, iyy, izz, ixy, ixz, iyz = inertia[:6] if len(link["inertia"]) == 6 else inertia[:3] + [0.0] * 3
        lines += [f'<link name="link{i + 1}"><inertial>',
                  _origin(p + R @ np.array([number(c) for c in link["com"]]), R),
                  f'<mass value="{number(link["mass"])}"/>',
                  f'<inertia ixx="{ixx}" iyy="{iyy}" izz="{izz}" ixy="{ixy}" ixz="{ixz}" iyz="{iyz}"/>',
                  '</inertial></link>']
        rest_position, rest_rotation = p, R
    return "\n".join(lines + ["</robot>"]) + "\n"


def _planar_inertias(text: str) -> str:
    """The pick arm's links spin about z only; MuJoCo wants a physical inertia (ixx + iyy >= izz)."""
    return text.replace("inertia: [0, 0, I1]", "inertia: [0.05, 0.05, I1]").replace("inertia: [0, 0, I2]",
                                                                                     "inertia: [0.02, 0.02, I2]")


@pytest.fixture
def pick(tmp_path):
    """The two-link pick arm (DH, gravity along -y) and its URDF."""
    plant_file = tmp_path / "pick_arm_serial.yaml"
    plant_file.write_text(_planar_inertias(PICK_SERIAL.read_text()))
    urdf = tmp_path / "pick_arm.urdf"
    urdf.write_text(dh_urdf(plant_file, PICK_JOINTS))
    return built_artifact(plant_file), EngineArm(urdf, PICK_JOINTS, "base_link", (0.0, -9.81, 0.0)), plant_file


@pytest.fixture
def engine(monkeypatch):
    """Let simulate() find the URDF of a DH artifact (an artifact built from a URDF records its own)."""
    def use(arm):
        monkeypatch.setattr(physics, "engine_arm", lambda artifact, field="physics": arm)
    return use


def _model_terms(artifact, x):
    program = artifact.programs["dynamics"]
    values = program(list(x), artifact.nominal_parameters.tolist())
    nq = artifact.mechanical_coordinates

    def slot(name):
        s = program.slots[name]
        return np.array(values[s.offset:s.offset + s.size])
    return slot("M").reshape(nq, nq), slot("F")


@pytest.mark.parametrize("which", ["pick_arm", "loader_arm"])
def test_mass_matrix_and_bias_forces_equal_mujocos_at_random_states(which, pick, tmp_path):
    # outside reference: MuJoCo's mj_fullM (M) and qfrc_bias (C q' + g) with qfrc_passive (damping),
    # from its own URDF import of the same arm; armature zero in both (compare like with like)
    if which == "pick_arm":
        artifact, arm, _ = pick
    else:
        urdf = tmp_path / "loader_arm.urdf"
        urdf.write_text(dh_urdf(BUNDLED / "loader_arm.yaml", LOADER_JOINTS))
        from linz_ros.model._mechanics import STANDARD_GRAVITY
        artifact = built_artifact(BUNDLED / "loader_arm.yaml")
        arm = EngineArm(urdf, LOADER_JOINTS, "base_link", (0.0, 0.0, -STANDARD_GRAVITY))
    plant = MujocoPlant(artifact, arm)
    assert not plant.model.dof_armature.any()
    nq = len(arm.joints)
    rng = np.random.default_rng(18)
    worst_m = worst_f = 0.0
    for _ in range(25):
        x = rng.uniform(-2.0, 2.0, 2 * nq)
        M, F = _model_terms(artifact, x)
        bias, passive = plant.generalized_forces(x)
        worst_m = max(worst_m, np.max(np.abs(M - plant.mass_matrix(x[:nq]))) / max(1.0, np.max(np.abs(M))))
        worst_f = max(worst_f, np.max(np.abs(F - (passive - bias))) / max(1.0, np.max(np.abs(F))))
    assert worst_m < 1e-10 and worst_f < 1e-10, (worst_m, worst_f)


def _step_run(artifact, physics_name, amplitude=0.03, duration=3.0, **settings):
    core = ControllerCore(artifact)
    base = core.output_values(artifact.operating_point)
    reference = make_reference("step", artifact.relative_degree, base, amplitude, at=0.0)
    return simulate(artifact, SimSettings(duration=duration, reference=reference, physics=physics_name,
                                          backend="python", **settings))


def test_the_closed_loop_under_mujoco_tracks_at_the_designed_rate(pick, engine):
    # outside reference: MuJoCo's RK4 on its URDF import; the design: the sampled Brunovsky chain
    artifact, arm, _ = pick
    engine(arm)
    ours, theirs = _step_run(artifact, "model"), _step_run(artifact, "mujoco")
    assert theirs.diverged_at is None and set(theirs.mode) == {"nominal"}
    # the same rigid body and the same classical RK4: the two physics give one run to rounding
    assert np.max(np.abs(theirs.x - ours.x)) < 1e-9
    summary = theirs.summary()
    assert summary["physics"] == "mujoco" and ours.summary()["physics"] == "model"
    assert any(n.startswith("physics: MuJoCo") for n in summary["notes"])
    for i, (output, gains) in enumerate(zip(artifact.outputs, artifact.gains)):
        expected = sampled_chain_error(gains, 1 / artifact.rate, -0.03, len(theirs.t))
        assert np.max(np.abs(theirs.errors()[:, i] - expected)) < 0.02 * 0.03, output
        assert summary["outputs"][output]["decay_rate"] == pytest.approx(fit_decay_rate(theirs.t, expected),
                                                                          rel=0.03), output


def test_a_link_mass_wrong_in_the_plant_file_shows_as_tracking_error_under_mujoco_only(pick, engine, tmp_path):
    artifact, arm, plant_file = pick
    engine(arm)                                         # the URDF keeps m2 = 1.9 kg: the truth
    wrong = tmp_path / "wrong_mass.yaml"
    wrong.write_text(plant_file.read_text().replace("m2: {value: 1.9", "m2: {value: 2.6"))
    mistaken = built_artifact(wrong)
    ours, theirs = _step_run(mistaken, "model"), _step_run(mistaken, "mujoco")
    sampled = [sampled_chain_error(g, 1 / mistaken.rate, -0.03, len(ours.t)) for g in mistaken.gains]
    ours_off = max(np.max(np.abs(ours.errors()[:, i] - e)) for i, e in enumerate(sampled))
    theirs_off = max(np.max(np.abs(theirs.errors()[:, i] - e)) for i, e in enumerate(sampled))
    # our integrator runs the controller's own (wrong) model: the design holds; the engine runs the arm
    assert ours_off < 0.02 * 0.03
    assert theirs_off > 10 * ours_off and theirs_off > 0.05 * 0.03, (ours_off, theirs_off)
    assert np.max(np.abs(theirs.errors()[-50:])) > 1e-4      # gravity mis-compensated: a steady offset


def test_joint_limits_are_enforced_by_the_engine_and_not_by_our_model(pick, tmp_path):
    artifact, arm, plant_file = pick
    urdf = tmp_path / "limited.urdf"
    urdf.write_text(dh_urdf(plant_file, PICK_JOINTS, limits=(-1.0, 1.5)))
    engine_plant = MujocoPlant(artifact, EngineArm(urdf, PICK_JOINTS, "base_link", (0.0, -9.81, 0.0)))
    model_plant, _ = make_physics_plant(artifact, "model", backend="python")
    x0, push = [0.4, 1.2, 0.0, 0.0], [0.0, 3.0]       # the elbow driven towards its upper limit, 1.5 rad
    x_engine, x_model = list(x0), list(x0)
    for _ in range(200):                               # 1 s of simulated time
        x_engine = engine_plant.rk4(x_engine, push, 0.00125, 4)
        x_model = model_plant.rk4(x_model, push, 0.00125, 4)
    assert x_model[1] > 2.0
    assert 1.4 < x_engine[1] < 1.5 + 0.02             # held at the limit (soft constraint: a little inside it)


def test_coulomb_friction_holds_joints_below_their_breakaway_torque(pick, tmp_path):
    artifact, arm, plant_file = pick
    urdf = tmp_path / "friction.urdf"
    urdf.write_text(dh_urdf(plant_file, PICK_JOINTS, friction=2.0))
    # gravity along the joint axes does no work: only the torque and friction act
    sticky = MujocoPlant(artifact, EngineArm(urdf, PICK_JOINTS, "base_link", (0.0, 0.0, -9.81)))
    (tmp_path / "free.urdf").write_text(dh_urdf(plant_file, PICK_JOINTS))
    free = MujocoPlant(artifact, EngineArm(tmp_path / "free.urdf", PICK_JOINTS, "base_link", (0.0, 0.0, -9.81)))
    x = y = [0.4, 1.2, 0.0, 0.0]
    for _ in range(100):                               # 1 N m against 2 N m of friction, 0.5 s
        x, y = sticky.rk4(x, [0.0, 1.0], 0.0005, 10), free.rk4(y, [0.0, 1.0], 0.0005, 10)
    assert y[1] - 1.2 > 0.5                            # without friction the elbow swings away
    # friction loss is a soft constraint in MuJoCo: below breakaway a joint creeps at a small constant
    # rate (0.04 rad/s here with the engine's default impedance), it does not accelerate
    assert abs(x[1] - 1.2) < 0.03 and abs(x[3]) < 0.06 and abs(x[0] - 0.4) < 1e-3, x
    for _ in range(100):
        x = sticky.rk4(x, [0.0, 4.0], 0.0005, 10)      # past breakaway it moves
    assert x[1] - 1.2 > 0.2


def test_the_engine_takes_the_plant_files_gravity_in_the_base_frame(pick, tmp_path):
    artifact, arm, plant_file = pick
    text = dh_urdf(plant_file, PICK_JOINTS).replace(
        '<link name="base_link"/>', '<link name="world"/><joint name="mount" type="fixed"><parent link="world"/>'
        '<child link="base_link"/><origin xyz="0.3 0.1 0.2" rpy="0.4 -0.2 0.7"/></joint><link name="base_link"/>')
    urdf = tmp_path / "mounted.urdf"
    urdf.write_text(text)
    plant = MujocoPlant(artifact, EngineArm(urdf, PICK_JOINTS, "base_link", (0.0, -9.81, 0.0)))
    x = [0.3, 0.9, 0.2, -0.1]
    bias, passive = plant.generalized_forces(x)
    np.testing.assert_allclose(passive - bias, _model_terms(artifact, x)[1], atol=1e-10)


# --- refusals: one line each ---

def test_an_artifact_without_a_urdf_is_refused_for_mujoco():
    artifact = built_artifact(BUNDLED / "pick_arm.yaml")
    with pytest.raises(ConfigError, match=r"--physics: mujoco needs an arm described by a URDF; pick_arm has none"):
        simulate(artifact, SimSettings(duration=0.1, physics="mujoco"))


def test_mujoco_missing_is_one_line_naming_the_extra(pick, monkeypatch):
    monkeypatch.setitem(sys.modules, "mujoco", None)        # import mujoco raises ImportError
    with pytest.raises(ConfigError, match=r"mujoco needs an arm described by a URDF; pick_arm has none"):
        MujocoPlant(built_artifact(BUNDLED / "pick_arm.yaml"))   # the artifact's problem first, not the install
    with pytest.raises(ConfigError, match=r"physics: mujoco physics needs MuJoCo, which is not installed here: "
                                          r"pip install 'linz_ros\[physics\]'"):
        MujocoPlant(pick[0], pick[1])


def test_joints_that_do_not_match_the_artifacts_are_refused(pick, tmp_path):
    artifact, arm, plant_file = pick
    with pytest.raises(ConfigError, match=r"joint\(s\) wrist of the artifact are not movable joints of the URDF"):
        MujocoPlant(artifact, EngineArm(arm.urdf, ("shoulder", "wrist"), "base_link", arm.gravity))
    extra = tmp_path / "extra.urdf"
    extra.write_text(dh_urdf(BUNDLED / "loader_arm.yaml", LOADER_JOINTS))
    with pytest.raises(ConfigError, match=r"the URDF's 6 joints .* do not match the artifact's 4 states"):
        MujocoPlant(artifact, EngineArm(extra, LOADER_JOINTS, "base_link", arm.gravity))
    with pytest.raises(ConfigError, match=r"the URDF has movable joint\(s\) elbow, wrist_roll, wrist_pitch, flange "
                                          r"the artifact does not know"):
        MujocoPlant(artifact, EngineArm(extra, ("turret", "shoulder"), "base_link", arm.gravity))
    broken = tmp_path / "broken.urdf"
    broken.write_text("<robot name='x'><link name='a'>")
    with pytest.raises(ConfigError, match=r"physics: MuJoCo cannot load .*broken.urdf"):
        MujocoPlant(artifact, EngineArm(broken, PICK_JOINTS, "base_link", arm.gravity))


def test_mismatch_and_the_adaptive_integrator_are_model_physics_only(pick, engine):
    artifact, arm, _ = pick
    engine(arm)
    changed = [1.1 * v for v in artifact.nominal_parameters.tolist()]
    with pytest.raises(ConfigError, match=r"^--mismatch: applies to --physics model only: mujoco simulates the URDF "
                                          r"as written \(edit the URDF, or the plant file, to make them differ\)$"):
        simulate(artifact, SimSettings(duration=0.1, physics="mujoco", plant_parameters=changed))
    with pytest.raises(ConfigError, match=r"--integrator: scipy integrates the model physics only"):
        simulate(artifact, SimSettings(duration=0.1, physics="mujoco", integrator="scipy"))
    with pytest.raises(ConfigError, match=r"--physics: expected one of model, mujoco, got 'bullet'"):
        simulate(artifact, SimSettings(duration=0.1, physics="bullet"))


def test_linz_sim_names_the_physics_and_refuses_a_mismatch_under_mujoco(pick, engine, tmp_path):
    from linz_ros.commands.sim import SimRequest, render_sim, simulate_run

    artifact, arm, plant_file = pick
    engine(arm)
    run = simulate_run(SimRequest(str(plant_file), out=str(tmp_path / "out"), duration=0.2, plots=False,
                                  physics="mujoco", backend="python"))
    assert run.summary["physics"] == "mujoco" and run.summary["backend"]["plant"] == "mujoco"
    text = render_sim(run.summary)
    assert "  physics: mujoco" in text and "note: physics: MuJoCo" in text
    with pytest.raises(ConfigError, match=r"--mismatch: applies to --physics model only"):
        simulate_run(SimRequest(str(plant_file), out=str(tmp_path / "out"), duration=0.2, plots=False,
                                physics="mujoco", mismatch=["m2=10"]))


# --- the URDF form: the artifact records its URDF, which the engine reads ---

SORTING_URDF = BUNDLED.parent / "urdf" / "sorting_arm.urdf"
SORTING_JOINTS = ("turret", "shoulder", "elbow", "wrist")


def _sorting_artifact(folder, friction=True, gravity="", meshes=False):
    """The bundled sorting arm's URDF (optionally without its Coulomb friction, or with ROS-style
    ``package://`` meshes on every link) behind a plant file."""
    from support import built_artifact_file
    from linz_ros.artifact import load_artifact

    text = SORTING_URDF.read_text()
    if meshes:
        shape = '<geometry><mesh filename="package://sorting_arm_description/meshes/part.stl"/></geometry>'
        text = text.replace('<link name="upper_arm">', f'<link name="upper_arm"><visual>{shape}</visual>'
                                                      f'<collision>{shape}</collision>')
    if not friction:
        import re
        text = re.sub(r'friction="[^"]*"', 'friction="0"', text)
    (folder / "sorting_arm.urdf").write_text(text)
    plant_file = folder / f"sorting_{'friction' if friction else 'frictionless'}{len(gravity)}.yaml"
    plant_file.write_text(
        f"plant: sorting_{'friction' if friction else 'frictionless'}\n"
        f"urdf: {{file: sorting_arm.urdf, base: base_link, tip: suction_gripper{gravity}}}\n"
        "operating_point: {q_turret: 0.0, q_shoulder: -0.4, q_elbow: 1.0, q_wrist: 0.0}\n"
        "design:\n  rate: 500\n"
        "  poles: {y_q_turret: [-8, -9], y_q_shoulder: [-8, -9], y_q_elbow: [-8, -9], y_q_wrist: [-10, -11]}\n")
    return load_artifact(built_artifact_file(plant_file, folder))


def test_a_urdf_arms_mass_matrix_bias_damping_and_friction_equal_mujocos(tmp_path):
    # outside reference: MuJoCo's URDF import of the bundled sorting arm (mj_fullM, qfrc_bias, qfrc_passive,
    # dof_frictionloss); our F smooths Coulomb friction f to f tanh(q'/v_s), MuJoCo's is a constraint: the
    # smoothed term is compared with MuJoCo's friction coefficients, the rest term by term
    from linz_ros.model._urdf import FRICTION_VELOCITY

    artifact = _sorting_artifact(tmp_path)
    plant = MujocoPlant(artifact)
    assert plant.arm.joints == SORTING_JOINTS and tuple(plant.model.opt.gravity) == (0.0, 0.0, -STANDARD_GRAVITY)
    assert not plant.model.dof_armature.any()
    rng = np.random.default_rng(4)
    worst_m = worst_f = 0.0
    for _ in range(25):
        x = rng.uniform(-2.0, 2.0, 8)
        M, F = _model_terms(artifact, x)
        bias, passive = plant.generalized_forces(x)
        friction = -plant.model.dof_frictionloss * np.tanh(x[4:] / FRICTION_VELOCITY)
        worst_m = max(worst_m, np.max(np.abs(M - plant.mass_matrix(x[:4]))) / max(1.0, np.max(np.abs(M))))
        worst_f = max(worst_f, np.max(np.abs(F - (passive - bias + friction))) / max(1.0, np.max(np.abs(F))))
    assert worst_m < 1e-10 and worst_f < 1e-10, (worst_m, worst_f)
    np.testing.assert_allclose(plant.model.jnt_range[:3], [[-2.6, 2.6], [-1.2, 0.9], [-0.3, 2.5]])
    assert list(plant.model.jnt_limited) == [1, 1, 1, 0]          # the continuous wrist has no limit


def test_a_urdf_arm_under_mujoco_tracks_a_step_at_the_designed_rate(tmp_path):
    artifact = _sorting_artifact(tmp_path, friction=False)
    ours, theirs = _step_run(artifact, "model", 0.02), _step_run(artifact, "mujoco", 0.02)
    assert np.max(np.abs(theirs.x - ours.x)) < 1e-9
    summary, own = theirs.summary(), ours.summary()
    for i, (output, gains) in enumerate(zip(artifact.outputs, artifact.gains)):
        expected = sampled_chain_error(gains, 1 / artifact.rate, -0.02, len(theirs.t))
        assert np.max(np.abs(theirs.errors()[:, i] - expected)) < 0.02 * 0.02, output
        # the fitted rate of the coupled arm is our integrator's, and near the slowest designed pole
        rate = summary["outputs"][output]["decay_rate"]
        assert rate == pytest.approx(own["outputs"][output]["decay_rate"], rel=1e-6), output
        assert rate == pytest.approx(-max(np.real(np.roots(np.r_[1.0, gains[::-1]]))), rel=0.15), output


def test_stiction_leaves_an_offset_under_mujoco_that_the_smoothed_model_does_not_show(tmp_path):
    # the bundled arm's Coulomb friction: our model compensates f tanh(q'/v_s), which vanishes at rest;
    # the engine's friction holds a joint wherever the outer loop's torque M Kp e stays below f
    artifact = _sorting_artifact(tmp_path, friction=True)
    ours, theirs = _step_run(artifact, "model", 0.02), _step_run(artifact, "mujoco", 0.02)
    assert ours.summary()["verdict"] == "tracked" and np.max(np.abs(ours.errors()[-10:])) < 1e-3
    offsets = np.abs(theirs.errors()[-10:]).max(axis=0)
    assert offsets[3] > 5e-3 and theirs.summary()["verdict"] != "tracked", offsets   # the light wrist sticks


def test_the_engine_takes_a_urdf_plant_files_gravity(tmp_path):
    # the artifact records the plant file's urdf.gravity; the engine takes it from there, never from the file
    artifact = _sorting_artifact(tmp_path, gravity=", gravity: [1.5, 0, -9.7]")
    assert artifact.urdf.gravity == (1.5, 0.0, -9.7)
    for plant_file in tmp_path.glob("*.yaml"):
        plant_file.write_text(plant_file.read_text().replace("gravity: [1.5, 0, -9.7]", "gravity: [0, 0, 9.7]"))
    plant = MujocoPlant(artifact)
    assert tuple(plant.model.opt.gravity) == (1.5, 0.0, -9.7)      # base_link is not turned against world
    x = [0.3, -0.5, 1.1, 0.2, 0.0, 0.0, 0.0, 0.0]
    bias, passive = plant.generalized_forces(x)
    np.testing.assert_allclose(passive - bias, _model_terms(artifact, x)[1], atol=1e-12)


def test_a_urdf_with_package_meshes_loads_and_its_inertias_come_from_inertial_only(tmp_path):
    # an ordinary ROS URDF: meshes the engine cannot open (package://) on a link; contacts are off, so the
    # geometry is dropped before MuJoCo reads the file, and M is still the <inertial> one
    (tmp_path / "plain").mkdir()
    (tmp_path / "meshes").mkdir()
    plain = MujocoPlant(_sorting_artifact(tmp_path / "plain"))
    artifact = _sorting_artifact(tmp_path / "meshes", meshes=True)
    plant = MujocoPlant(artifact)
    q = [0.3, -0.5, 1.1, 0.2]
    np.testing.assert_allclose(plant.mass_matrix(q), plain.mass_matrix(q), rtol=0, atol=1e-14)
    np.testing.assert_allclose(plant.mass_matrix(q), _model_terms(artifact, q + [0.0] * 4)[0], atol=1e-10)
