"""The URDF form: the bundled arm against Pinocchio, a hand-checkable pendulum, fixed-joint merging,
limits, naming, and every refusal of the parser pinned by its wording."""

import shutil

import numpy as np
import pytest
import sympy as sp

from support import BUNDLED, ROOT
from linz_ros.errors import PlantFileError
from linz_ros.model import load_plant, numeric_function, plant_from_text
from linz_ros.model._urdf import FRICTION_VELOCITY, rpy_matrix
from linz_ros.model._mechanics import STANDARD_GRAVITY

URDF = ROOT / "config" / "urdf" / "sorting_arm.urdf"


def _evaluate(plant, *matrices):
    function = numeric_function(list(plant.states) + list(plant.parameters), [list(m) for m in matrices])
    nominal = list(plant.parameters.values())
    return lambda x: [np.asarray(v, dtype=float) for v in function(*x, *nominal)]


# -- the bundled arm against Pinocchio ----------------------------------------------------------------

def test_the_bundled_arm_matches_pinocchio_built_from_the_same_urdf():
    # Pinocchio (Carpentier et al., IEEE/SICE SII 2019; pin on PyPI): its own URDF parser
    # (buildModelFromUrdf, fixed joints merged into their parent body), CRBA for M (upper
    # triangle), RNEA with q'' = 0 for the bias forces, frame Jacobians for the tool point.
    pin = pytest.importorskip("pinocchio")
    plant = load_plant(BUNDLED / "sorting_arm.yaml")
    mech = plant.mechanics
    nq = mech.nq
    tip = sp.Matrix([plant.h[i] for i in range(3)])           # tool_x, tool_y, tool_z
    evaluate = _evaluate(plant, mech.M, mech.F, tip, tip.jacobian(sp.Matrix(mech.coordinates)))
    model = pin.buildModelFromUrdf(str(URDF))
    model.gravity.linear = np.array(plant.urdf.gravity)     # Pinocchio's default is 9.81, ours standard gravity
    data = model.createData()
    gripper = model.getFrameId("suction_gripper")
    tool = model.addFrame(pin.Frame("suction_cup", model.frames[gripper].parentJoint, gripper,
                                    model.frames[gripper].placement * pin.SE3(np.eye(3), np.array([0, 0, 0.09])),
                                    pin.FrameType.OP_FRAME))
    data = model.createData()
    joints = [model.joints[model.getJointId(name)] for name in plant.urdf.joints]
    damping = np.array([j.damping for j in mech.links])
    friction = np.array([j.friction for j in mech.links])
    rng = np.random.default_rng(18)
    worst = {"M": 0.0, "F": 0.0, "J": 0.0, "tip": 0.0}
    for _ in range(25):
        q, v = rng.uniform(-2.5, 2.5, nq), rng.uniform(-2, 2, nq)
        q_pin = np.zeros(model.nq)
        for joint, angle in zip(joints, q):
            if joint.nq == 2:                       # continuous joint: (cos q, sin q)
                q_pin[joint.idx_q:joint.idx_q + 2] = np.cos(angle), np.sin(angle)
            else:
                q_pin[joint.idx_q] = angle
        M, F, point, J = evaluate(np.concatenate([q, v]))
        upper = np.array(pin.crba(model, data, q_pin))
        M_pin = np.triu(upper) + np.triu(upper, 1).T
        bias = np.array(pin.rnea(model, data, q_pin, v, np.zeros(nq)))
        pin.framesForwardKinematics(model, data, q_pin)
        J_pin = pin.computeFrameJacobian(model, data, q_pin, tool, pin.LOCAL_WORLD_ALIGNED)[:3]
        # the plant's base is base_link, 0.75 m above Pinocchio's root link (world)
        point_pin = data.oMf[tool].translation - np.array([0, 0, 0.75])
        friction_force = damping * v + friction * np.tanh(v / FRICTION_VELOCITY)
        worst["M"] = max(worst["M"], np.max(np.abs(M.reshape(nq, nq) - M_pin)))
        worst["F"] = max(worst["F"], np.max(np.abs(F.ravel() + friction_force + bias)))
        worst["J"] = max(worst["J"], np.max(np.abs(J.reshape(3, nq) - J_pin)))
        worst["tip"] = max(worst["tip"], np.max(np.abs(point.ravel() - point_pin)))
    print("pinocchio residuals", worst)
    assert max(worst.values()) < 1e-10, worst


def test_the_bundled_arm_reads_its_limits_names_and_units():
    plant = load_plant(BUNDLED / "sorting_arm.yaml")
    assert plant.state_names == ["q_turret", "q_shoulder", "q_elbow", "q_wrist",
                                 "qd_turret", "qd_shoulder", "qd_elbow", "qd_wrist"]
    assert plant.input_names == ["tau_turret", "tau_shoulder", "tau_elbow", "tau_wrist"]
    assert plant.envelope["q_turret"] == (-2.6, 2.6)              # from the URDF
    assert plant.envelope["q_elbow"] == (0.6, 1.9)                # the plant file wins
    assert plant.envelope["qd_wrist"] == (-4.0, 4.0)              # velocity limit
    assert plant.input_limits["tau_shoulder"] == (-110.0, 110.0)  # effort
    assert plant.urdf.joints == ("turret", "shoulder", "elbow", "wrist")
    assert plant.urdf.base == "base_link" and plant.urdf.tip == "suction_gripper"
    assert plant.signal_units["tau_elbow"] == "N m" and plant.signal_units["qd_turret"] == "rad/s"
    assert plant.mechanics.form == "urdf" and [j.urdf_type for j in plant.mechanics.links][-1] == "continuous"


# -- small URDFs ---------------------------------------------------------------------------------------

PENDULUM = """\
<?xml version="1.0"?>
<robot name="pendulum">
  <link name="support"/>
  <joint name="hinge" type="continuous">
    <parent link="support"/>
    <child link="bob"/>
    <axis xyz="0 1 0"/>
    <dynamics damping="0.1" friction="0.2"/>
  </joint>
  <link name="bob">
    <inertial>
      <origin xyz="0 0 -0.5"/>
      <mass value="2.0"/>
      <inertia ixx="0.01" ixy="0.001" ixz="0" iyy="0.03" iyz="0" izz="0.025"/>
    </inertial>
  </link>
</robot>
"""

PLANT = """\
plant: swing
urdf: {{file: arm.urdf, base: {base}, tip: {tip}{extra}}}
"""


def _plant(tmp_path, urdf: str, base: str = "support", tip: str = "bob", extra: str = "", more: str = ""):
    (tmp_path / "arm.urdf").write_text(urdf)
    return plant_from_text(PLANT.format(base=base, tip=tip, extra=extra) + more, str(tmp_path / "swing.yaml"))


def test_a_pendulum_has_the_textbook_mass_and_gravity_torque(tmp_path):
    # from memory / common practice: a pendulum of mass m at distance l from its hinge, inertia
    # I about its centre: M = I + m l^2, gravity torque -m g l sin q (q = 0 hanging down);
    # viscous -d q', Coulomb smoothed to -f tanh(q'/v_s)
    plant = _plant(tmp_path, PENDULUM)
    evaluate = _evaluate(plant, plant.mechanics.M, plant.mechanics.F)
    for q, w in [(0.3, 0.0), (-1.2, 0.7), (2.5, -0.01)]:
        M, F = evaluate([q, w])
        assert M.item() == pytest.approx(0.03 + 2.0 * 0.5 ** 2, rel=1e-14)
        expected = -2.0 * STANDARD_GRAVITY * 0.5 * np.sin(q) - 0.1 * w - 0.2 * np.tanh(w / FRICTION_VELOCITY)
        assert F.item() == pytest.approx(expected, rel=1e-13, abs=1e-14)
    assert plant.state_names == ["q_hinge", "qd_hinge"] and plant.input_names == ["tau_hinge"]
    assert plant.envelope == {} and plant.input_limits == {}       # continuous, no limit element


def test_a_fixed_joint_merges_its_child_by_the_parallel_axis_theorem(tmp_path):
    # the same two rigidly joined parts as one link written out by hand (common practice:
    # combined centre of mass, each part's inertia moved there by m (|d|^2 E - d d^T))
    split = PENDULUM.replace('<link name="bob">', '''<joint name="clamp" type="fixed">
    <parent link="bob"/><child link="weight"/><origin xyz="0.1 0 -0.3" rpy="0.4 0 0"/>
  </joint>
  <link name="weight"><inertial><origin xyz="0 0.02 0"/><mass value="0.5"/>
    <inertia ixx="0.002" ixy="0" ixz="0" iyy="0.003" iyz="0" izz="0.004"/></inertial></link>
  <link name="bob">''')
    m1, c1 = 2.0, np.array([0, 0, -0.5])
    I1 = np.array([[0.01, 0.001, 0], [0.001, 0.03, 0], [0, 0, 0.025]])
    R = rpy_matrix(0.4, 0, 0)
    m2, c2, I2 = 0.5, R @ np.array([0, 0.02, 0]) + np.array([0.1, 0, -0.3]), R @ np.diag([0.002, 0.003, 0.004]) @ R.T
    m = m1 + m2
    c = (m1 * c1 + m2 * c2) / m
    I = sum(Ik + mk * ((ck - c) @ (ck - c) * np.eye(3) - np.outer(ck - c, ck - c))
            for mk, ck, Ik in ((m1, c1, I1), (m2, c2, I2)))
    merged = PENDULUM.replace('<origin xyz="0 0 -0.5"/>', '<origin xyz="{!r} {!r} {!r}"/>'.format(*map(float, c))).replace(
        '<mass value="2.0"/>', f'<mass value="{float(m)!r}"/>').replace(
        'ixx="0.01" ixy="0.001" ixz="0" iyy="0.03" iyz="0" izz="0.025"',
        'ixx="{!r}" ixy="{!r}" ixz="{!r}" iyy="{!r}" iyz="{!r}" izz="{!r}"'.format(
            *map(float, (I[0, 0], I[0, 1], I[0, 2], I[1, 1], I[1, 2], I[2, 2]))))
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    one, two = _plant(tmp_path / "a", split, tip="weight"), _plant(tmp_path / "b", merged)
    for q, w in [(0.4, 0.3), (-2.0, -1.0)]:
        M1, F1 = _evaluate(one, one.mechanics.M, one.mechanics.F)([q, w])
        M2, F2 = _evaluate(two, two.mechanics.M, two.mechanics.F)([q, w])
        assert M1.item() == pytest.approx(M2.item(), rel=1e-13) and F1.item() == pytest.approx(F2.item(), rel=1e-12)


def test_tool_point_joint_names_and_a_prismatic_joint(tmp_path):
    urdf = PENDULUM.replace('name="hinge" type="continuous"', 'name="slide-1.x" type="prismatic"').replace(
        '<axis xyz="0 1 0"/>', '<axis xyz="0 0 2"/><limit lower="-0.2" upper="0.3" velocity="0.5" effort="40"/>')
    plant = _plant(tmp_path, urdf, extra=", tool: [0, 0, -0.5], gravity: [0, 0, -9.81]",
                   more="outputs: {height: tip_z}\n")
    assert plant.state_names == ["q_slide_1_x", "qd_slide_1_x"]
    assert plant.envelope == {"q_slide_1_x": (-0.2, 0.3), "qd_slide_1_x": (-0.5, 0.5)}
    assert plant.input_limits == {"tau_slide_1_x": (-40.0, 40.0)}
    assert plant.signal_units["q_slide_1_x"] == "m" and plant.signal_units["tau_slide_1_x"] == "N"
    height, M, F = _evaluate(plant, plant.h, plant.mechanics.M, plant.mechanics.F)([0.1, 0.0])
    assert height.item() == pytest.approx(0.1 - 0.5) and M.item() == pytest.approx(2.0)
    assert F.item() == pytest.approx(-2.0 * 9.81)


def test_the_bundled_urdf_survives_a_copy_elsewhere(tmp_path):
    shutil.copy(URDF, tmp_path / "arm.urdf")
    plant = plant_from_text("plant: a\nurdf: {file: arm.urdf, base: base_link, tip: wrist_link}\n",
                            str(tmp_path / "a.yaml"))
    assert plant.urdf.joints == ("turret", "shoulder", "elbow", "wrist")
    assert plant.urdf.path == str(tmp_path / "arm.urdf")
    with pytest.raises(PlantFileError, match=r"arm\.urdf: joint 'turret': a revolute joint between the base link "
                                             r"'turret_link' and the root 'world'"):
        plant_from_text("plant: a\nurdf: {file: arm.urdf, base: turret_link, tip: wrist_link}\n", str(tmp_path / "a.yaml"))
    assert plant.urdf.sha256 == __import__("hashlib").sha256(URDF.read_bytes()).hexdigest()
    with pytest.raises(PlantFileError, match=r"arm\.urdf: joint 'wrist': a continuous joint hangs off the chain at "
                                             r"link 'forearm'; only fixed joints may"):
        plant_from_text("plant: a\nurdf: {file: arm.urdf, base: base_link, tip: forearm}\n", str(tmp_path / "a.yaml"))


# -- refusals, each one line naming the file, the element and the problem -------------------------------

def _refused(tmp_path, urdf, match, **kwargs):
    with pytest.raises(PlantFileError, match=match) as info:
        _plant(tmp_path, urdf, **kwargs)
    assert "\n" not in str(info.value)
    return str(info.value)


@pytest.mark.parametrize("change, match", [
    (lambda t: t.replace("<robot", '<!DOCTYPE r [<!ENTITY a "aaaa">]>\n<robot'),
     r"arm\.urdf: declares a DOCTYPE or ENTITY; refused \(entity expansion\)"),
    (lambda t: t.replace('<robot name="pendulum">', '<robot name="p" xmlns:xacro="http://www.ros.org/wiki/xacro">'),
     r"arm\.urdf: holds xacro .*expand it first: xacro file\.urdf\.xacro > file\.urdf"),
    (lambda t: t.replace('value="2.0"', 'value="${m}"'), r"holds xacro"),
    (lambda t: t.replace("</robot>", "<link"), r"arm\.urdf: not well-formed XML"),
    (lambda t: t.replace('<parent link="support"/>', '<parent link="ground"/>'),
     r"joint 'hinge' <parent> link: 'ground' is not a link of the robot"),
    (lambda t: t.replace('type="continuous"', 'type="ball"'),
     r"joint 'hinge' type: unknown joint type 'ball'; expected revolute, continuous, prismatic or fixed"),
    (lambda t: t.replace('type="continuous"', 'type="floating"'),
     r"joint 'hinge' type: floating refused: a floating joint has six degrees of freedom"),
    (lambda t: t.replace('type="continuous"', 'type="planar"'), r"planar refused: a planar joint has three"),
    (lambda t: t.replace('<origin xyz="0 0 -0.5"/>', '<origin xyz="0 zero -0.5"/>'),
     r"link 'bob' <inertial> <origin> xyz: expected 3 finite numbers, got '0 zero -0.5'"),
    (lambda t: t.replace('<axis xyz="0 1 0"/>', '<axis xyz="0 0 0"/>'),
     r"joint 'hinge' <axis> xyz: is zero; a joint needs a direction"),
    (lambda t: t.replace('iyy="0.03"', 'iyy="-0.03"'),
     r"link 'bob' <inertial> <inertia>: not positive definite \(principal moments"),
    (lambda t: t.replace('izz="0.025"', 'izz="0.1"'), r"break the triangle inequality \(a \+ b >= c\)"),
    (lambda t: t.replace('<mass value="2.0"/>', '<mass value="-2"/>'),
     r"link 'bob' <inertial> <mass> value: must not be negative, got -2"),
    (lambda t: t.replace("</robot>", '<joint name="back" type="fixed"><parent link="bob"/><child link="support"/>'
                                     "</joint></robot>"),
     r"joint '(back|hinge)': closes a loop through link '(bob|support)' \(URDF describes a tree\)"),
    (lambda t: t.replace("</robot>", '<link name="other"/><joint name="again" type="fixed"><parent link="other"/>'
                                     '<child link="bob"/></joint></robot>'),
     r"joint 'again' <child> link: 'bob' is already the child of joint 'hinge' \(a closed loop"),
    (lambda t: t.replace("</robot>", '<link name="finger"/><joint name="grip" type="prismatic"><parent link="bob"/>'
                                     '<child link="finger"/></joint></robot>'),
     r"joint 'grip': a prismatic joint hangs off the chain at link 'bob'; only fixed joints may"),
    (lambda t: t.replace('type="continuous">', 'type="revolute"><limit lower="1" upper="-1" effort="1" velocity="1"/>'),
     r"joint 'hinge' <limit>: lower 1 is not below upper -1"),
    (lambda t: t.replace('type="continuous">', 'type="continuous"><mimic joint="x"/>'),
     r"joint 'hinge' <mimic>: mimic joints are not supported"),
    (lambda t: t.replace("<robot ", "<robo ").replace("</robot>", "</robo>"),
     r"<robo>: expected <robot> as the root element of a URDF"),
    (lambda t: t.replace('<joint name="hinge"', '<joint'), r"<joint>: has no name attribute"),
    (lambda t: t.replace("</robot>", '<link name="bob"/></robot>'), r"link 'bob': defined twice"),
])
def test_urdf_mistakes_are_one_line_naming_the_element(tmp_path, change, match):
    _refused(tmp_path, change(PENDULUM), match)


def test_chain_mistakes_name_the_links(tmp_path):
    _refused(tmp_path, PENDULUM, r"arm\.urdf: no link 'hand' \(the tip named in the plant file\)", tip="hand")
    _refused(tmp_path, PENDULUM, r"tip link 'support' is not reachable from base link 'bob'", base="bob", tip="support")
    _refused(tmp_path, PENDULUM, r"base and tip are the same link 'bob'", base="bob")
    fixed = PENDULUM.replace('type="continuous"', 'type="fixed"')
    _refused(tmp_path, fixed, r"no movable joint between base and tip")
    clash = PENDULUM.replace('<link name="bob">', '''<joint name="a.b" type="continuous"><parent link="bob"/>
      <child link="end"/></joint><link name="end"/><link name="bob">''').replace('name="hinge"', 'name="a-b"')
    _refused(tmp_path, clash, r"joint 'a[-.]b': its name and another's both become q_a_b", tip="end")


def test_xacro_is_found_in_the_parsed_document_and_never_in_comments(tmp_path):
    commented = PENDULUM.replace("<robot name=\"pendulum\">", "<robot name=\"pendulum\">\n  <!-- ${price} $(find arm) "
                                 "<xacro:macro name='x'/> xmlns:xacro -->")
    assert _plant(tmp_path, commented).state_names == ["q_hinge", "qd_hinge"]
    for xacro in (PENDULUM.replace('<link name="support"/>', '<xacro:property name="m" value="2"/><link name="support"/>'),
                  PENDULUM.replace('<robot name="pendulum">', '<robot name="pendulum" xmlns:x="http://www.ros.org/wiki/xacro">'),
                  PENDULUM.replace('<axis xyz="0 1 0"/>', '<axis xyz="$(arg axis)"/>')):
        _refused(tmp_path, xacro, r"arm\.urdf: holds xacro .*expand it first")


def _mounted(kind: str, extra: str = "") -> str:
    """The pendulum's support hung from a root link ``world`` by a joint of this kind (and more links)."""
    mount = (f'<link name="world"/><joint name="mount" type="{kind}"><parent link="world"/><child link="support"/>'
             '<axis xyz="0 0 1"/><limit lower="-1" upper="1" effort="1" velocity="1"/></joint>')
    return PENDULUM.replace('<link name="support"/>', '<link name="support"/>' + mount + extra)


def test_the_base_must_be_fixed_to_the_root_and_nothing_movable_hangs_off_the_ground(tmp_path):
    # what MuJoCo would move but our plant holds still: a joint above the base, a joint hanging off it
    assert _plant(tmp_path, _mounted("fixed")).state_names == ["q_hinge", "qd_hinge"]
    _refused(tmp_path, _mounted("prismatic"), r"arm\.urdf: joint 'mount': a prismatic joint between the base link "
                                             r"'support' and the root 'world'; the base must be fixed to the world")
    _refused(tmp_path, _mounted("floating"), r"joint 'mount': a floating joint between the base link 'support'")
    side = ('<link name="fan"/><joint name="spin" type="revolute"><parent link="{}"/><child link="fan"/>'
            '<limit lower="-1" upper="1" effort="1" velocity="1"/></joint>')
    for parent in ("support", "world"):
        _refused(tmp_path, _mounted("fixed", side.format(parent)),
                 rf"joint 'spin': a revolute joint hangs off the ground at link '{parent}' \(the base and the links "
                 r"fixed to it\); only fixed joints may")
    plate = '<link name="plate"/><joint name="bolt" type="fixed"><parent link="world"/><child link="plate"/></joint>'
    _refused(tmp_path, _mounted("fixed", plate + side.format("plate")), r"joint 'spin': a revolute joint hangs off "
                                                                        r"the ground at link 'plate'")
    assert _plant(tmp_path, _mounted("fixed", plate)).state_names == ["q_hinge", "qd_hinge"]


def test_plant_file_mistakes_name_the_section(tmp_path):
    (tmp_path / "arm.urdf").write_text(PENDULUM)
    source = str(tmp_path / "p.yaml")

    def refused(text, match):
        with pytest.raises(PlantFileError, match=match):
            plant_from_text(text, source)

    base = "plant: p\nurdf: {file: arm.urdf, base: support, tip: bob"
    refused("plant: p\nurdf: {file: nowhere.urdf, base: a, tip: b}\n", r"p\.yaml: urdf\.file: .*nowhere\.urdf: no such file")
    refused(base + ", colour: red}\n", r"urdf\.colour: unknown key; expected one of file, base, tip")
    refused("plant: p\nurdf: {file: arm.urdf, tip: bob}\n", r"urdf\.base: missing \(required\)")
    refused(base + "}\ninputs: [u]\n", r"p\.yaml: inputs: a URDF plant's states .* come from the URDF's movable joints")
    refused(base + "}\ncoordinates: [q]\n", r"coordinates: a URDF plant's states")
    refused(base + ", joints: [elbow]}\n", r"urdf\.joints\[0\]: 'elbow' is not a movable joint on the chain")
    refused(base + ", tool: [0, 1]}\n", r"urdf\.tool: expected \[x, y, z\]")
    refused(base + ", friction_velocity: 0}\n", r"urdf\.friction_velocity: must be positive")
    refused(base + "}\nenvelope: {q_elbow: [0, 1]}\n", r"envelope\.q_elbow: 'q_elbow' is not a state")


def test_a_urdf_past_the_size_limit_is_refused_unread(tmp_path, monkeypatch):
    import linz_ros.model._reader as reader
    monkeypatch.setattr(reader, "MAX_FILE_BYTES", 200)
    _refused(tmp_path, PENDULUM, r"urdf\.file: .*arm\.urdf: larger than")
