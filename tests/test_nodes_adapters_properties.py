"""Property tests of the message adapters: any message gives the vector or one MessageError line."""

import math

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

pytest.importorskip("rclpy", reason="the ROS 2 message packages are not installed (pip install '.[ros]')")

from nav_msgs.msg import Odometry  # noqa: E402
from sensor_msgs.msg import JointState  # noqa: E402
from std_msgs.msg import Float64MultiArray  # noqa: E402

from linz_ros.errors import ConfigError  # noqa: E402
from linz_ros.nodes.adapters import (COMMAND_TYPES, STATE_TYPES, FieldMap, MessageError, set_stamp,  # noqa: E402
                                     split_seconds, stamp_seconds)

LAST_STAMP = 2_147_483_647
REASONS = {"wrong_length", "unknown_joint", "bad_message"}
ODOMETRY_FIELDS = ["pose.position.x", "pose.position.y", "pose.position.z", "pose.orientation.roll",
                   "pose.orientation.pitch", "pose.orientation.yaw", "twist.linear.x", "twist.linear.y",
                   "twist.linear.z", "twist.angular.x", "twist.angular.y", "twist.angular.z"]
ANGLES = ("roll", "pitch", "yaw")


def _settings(examples: int):
    return settings(max_examples=examples, deadline=None, derandomize=True, database=None,
                    suppress_health_check=[HealthCheck.too_slow])


def _read(mapping: FieldMap, message):
    try:
        return mapping.read(message)
    except MessageError as err:
        return err


def _assert_one_line(err: Exception) -> None:
    message = str(err)
    assert len(message.splitlines()) == 1 and message.strip(), message


def _same(a: float, b: float) -> bool:
    """Equal, with nan equal to nan (non-finite values are the runtime watchdog's to refuse)."""
    return (math.isnan(a) and math.isnan(b)) or a == b


VALUES = st.floats(width=64) | st.sampled_from([0.0, -0.0, 1e308, -1e308, 5e-324, math.inf, -math.inf, math.nan])
JOINT_NAMES = st.sampled_from(["a", "b", "shoulder", "elbow", "", " ", "a b", "\u00e9paule", "j\n1", "x" * 300])
SIGNS = st.sampled_from(["", "-", " -", "- "])


@st.composite
def joint_maps(draw):
    """A JointState field map over a few joints, with signs, and the paths it was built from."""
    joints = draw(st.lists(st.sampled_from(["a", "b", "shoulder", "elbow", "j\n1", "\u00e9paule"]), min_size=1,
                           max_size=4, unique=True))
    pairs = draw(st.lists(st.tuples(st.sampled_from(["position", "velocity", "effort"]), st.sampled_from(joints)),
                          min_size=1, max_size=6, unique=True))
    signs = draw(st.lists(SIGNS, min_size=len(pairs), max_size=len(pairs)))
    fields = [f"{s}{head}.{joint}" for s, (head, joint) in zip(signs, pairs)]
    return FieldMap("sensor_msgs/msg/JointState", fields, len(fields), "state_fields"), pairs, signs


@st.composite
def joint_messages(draw, joints):
    """A JointState whose names are a shuffled, possibly incomplete or repeated set, arrays of any length."""
    names = draw(st.lists(st.sampled_from(sorted(joints)) | JOINT_NAMES, max_size=6))
    if draw(st.booleans()):
        names = draw(st.permutations(sorted(set(joints) | set(names))))
    count = len(names)
    lengths = [draw(st.sampled_from([count, count, count, 0, count + 1, max(count - 1, 0)])) for _ in range(3)]
    arrays = [draw(st.lists(VALUES, min_size=k, max_size=k)) for k in lengths]
    return JointState(name=list(names), position=arrays[0], velocity=arrays[1], effort=arrays[2])


def _expected_joint_reading(message: JointState, pairs, signs):
    """The reason the adapter must give, or the vector it must return."""
    names = list(message.name)
    if len(set(names)) != len(names):
        return "bad_message"
    if any(joint not in names for _, joint in pairs):
        return "unknown_joint"
    arrays = {"position": message.position, "velocity": message.velocity, "effort": message.effort}
    values = []
    for (head, joint), sign in zip(pairs, signs):
        if len(arrays[head]) != len(names):
            return "wrong_length"
        values.append((-1.0 if sign.strip() else 1.0) * arrays[head][names.index(joint)])
    return values


@_settings(250)
@given(st.data())
def test_joint_states_give_the_named_joints_or_the_reason(data):
    mapping, pairs, signs = data.draw(joint_maps(), label="map")
    joints = {joint for _, joint in pairs}
    for _ in range(data.draw(st.integers(1, 3), label="messages")):
        message = data.draw(joint_messages(joints), label="message")
        outcome, expected = _read(mapping, message), _expected_joint_reading(message, pairs, signs)
        if isinstance(expected, str):
            assert isinstance(outcome, MessageError) and outcome.reason == expected
            _assert_one_line(outcome)
        else:
            assert isinstance(outcome, list) and len(outcome) == mapping.size
            assert all(_same(a, b) for a, b in zip(outcome, expected))


@_settings(60)
@given(st.lists(st.integers(0, 12), min_size=1, max_size=6, unique=True), st.data())
def test_arrays_give_the_indexed_entries_or_wrong_length(indices, data):
    mapping = FieldMap("std_msgs/msg/Float64MultiArray", [f"data.{i}" for i in indices], len(indices), "f")
    values = data.draw(st.lists(VALUES, max_size=15), label="data")
    outcome = _read(mapping, Float64MultiArray(data=values))
    if len(values) <= max(indices):
        assert isinstance(outcome, MessageError) and outcome.reason == "wrong_length"
        _assert_one_line(outcome)
    else:
        assert len(outcome) == len(indices) and all(_same(a, values[i]) for a, i in zip(outcome, indices))


QUATERNION_PARTS = st.floats(-2.0, 2.0) | st.sampled_from([0.0, 1e-200, 1e200, -1e200, math.inf, math.nan])


@_settings(200)
@given(st.lists(st.sampled_from(ODOMETRY_FIELDS), min_size=1, max_size=12, unique=True),
       st.tuples(QUATERNION_PARTS, QUATERNION_PARTS, QUATERNION_PARTS, QUATERNION_PARTS),
       st.lists(VALUES, min_size=9, max_size=9))
def test_odometry_gives_the_fields_or_refuses_the_quaternion(fields, quaternion, others):
    mapping = FieldMap("nav_msgs/msg/Odometry", fields, len(fields), "f")
    message = Odometry()
    pose, twist = message.pose.pose, message.twist.twist
    q = pose.orientation
    q.x, q.y, q.z, q.w = quaternion
    vectors = [pose.position, twist.linear, twist.angular]
    for k, value in enumerate(others):
        setattr(vectors[k // 3], "xyz"[k % 3], value)
    outcome = _read(mapping, message)
    with_angles = any(f.startswith("pose.orientation.") for f in fields)
    norm = math.sqrt(sum(v * v for v in quaternion)) if all(map(math.isfinite, quaternion)) else math.nan
    if with_angles and not abs(norm - 1.0) <= 0.05:
        assert isinstance(outcome, MessageError) and outcome.reason == "bad_message"
        _assert_one_line(outcome)
        return
    assert isinstance(outcome, list) and len(outcome) == len(fields)
    for field, value in zip(fields, outcome):
        if field.startswith("pose.orientation."):
            assert math.isfinite(value) and abs(value) <= math.pi + 1e-12
        else:
            k = ["pose.position", "twist.linear", "twist.angular"].index(field.rsplit(".", 1)[0])
            assert _same(value, others[3 * k + "xyz".index(field[-1])])


@_settings(60)
@given(st.floats(-math.pi, math.pi), st.floats(-1.5, 1.5), st.floats(-math.pi, math.pi))
def test_written_orientation_reads_back(roll, pitch, yaw):
    fields = ["pose.orientation.roll", "pose.orientation.pitch", "pose.orientation.yaw"]
    mapping = FieldMap("nav_msgs/msg/Odometry", fields, 3, "f")
    r, p, y = mapping.read(mapping.write([roll, pitch, yaw]))
    assert p == pytest.approx(pitch, abs=1e-9)
    assert math.cos(r - roll) == pytest.approx(1.0, abs=1e-9) and math.cos(y - yaw) == pytest.approx(1.0, abs=1e-9)


WRITE_CASES = [
    ("sensor_msgs/msg/JointState", ["position.a", "-velocity.a", "effort.b", "position.b"]),
    ("std_msgs/msg/Float64MultiArray", ["data.3", "-data.0", "data.1"]),
    ("nav_msgs/msg/Odometry", ["pose.position.x", "-twist.angular.z", "pose.orientation.yaw", "pose.orientation.roll"]),
    ("geometry_msgs/msg/Wrench", ["force.x", "-torque.z", "force.y"]),
    ("geometry_msgs/msg/Twist", ["linear.x", "-angular.z"]),
]


@_settings(200)
@given(st.sampled_from(WRITE_CASES), st.lists(VALUES, min_size=4, max_size=4))
def test_any_values_are_written_and_read_back(case, values):
    type_name, fields = case
    mapping = FieldMap(type_name, fields, len(fields), "fields")
    values = values[:len(fields)]
    outcome = _read(mapping, mapping.write(values))
    angles = [v for f, v in zip(fields, values) if f.startswith("pose.orientation.")]
    if not all(map(math.isfinite, angles)):
        assert isinstance(outcome, MessageError) and outcome.reason == "bad_message"
        _assert_one_line(outcome)
        return
    assert len(outcome) == len(fields)
    for field, written, read in zip(fields, values, outcome):
        if field.startswith("pose.orientation."):
            assert math.isfinite(read)
        else:
            assert _same(read, written)


FIELD_TEXT = (st.text(max_size=20) | st.sampled_from(["data.0", "data.17", "data.\u00b2", "data.\u0663", "data.-1",
                                                       "data.99999999999", "data." + "9" * 5000, "-data.1",
                                                       "position.a", "velocity.", "position.a\nb", "effort.\u00e9",
                                                       "pose.orientation.yaw", "twist.linear.w", "force.x",
                                                       "torque.z", "linear.x", "angular.y", "--linear.x", "-", " "]))


@_settings(300)
@given(st.sampled_from(sorted(set(STATE_TYPES) | set(COMMAND_TYPES))), st.lists(FIELD_TEXT, max_size=4),
       st.integers(0, 5))
def test_field_maps_are_built_or_refused_with_one_line(type_name, fields, size):
    try:
        mapping = FieldMap(type_name, fields, size, "state_fields")
    except ConfigError as err:
        _assert_one_line(err)
        assert str(err).startswith("state_fields: ")
        return
    assert mapping.size == size == len(mapping.fields)
    values = [0.25 * (i + 1) for i in range(size)]
    assert mapping.read(mapping.write(values)) == pytest.approx(values)


@_settings(100)
@given(st.floats() | st.integers(-10 ** 12, 10 ** 12).map(float))
def test_written_stamps_are_valid_and_read_back(seconds):
    message = JointState()
    set_stamp(message, 7.0)
    set_stamp(message, seconds)
    stamp = message.header.stamp
    assert 0 <= stamp.sec <= LAST_STAMP and 0 <= stamp.nanosec < 1_000_000_000
    read = stamp_seconds(message)
    expected = min(seconds, LAST_STAMP) if math.isfinite(seconds) and seconds >= 0 else 0.0
    if stamp.sec == 0 and stamp.nanosec == 0:
        assert read is None and expected < 1e-9
    else:
        assert read == pytest.approx(expected, abs=1e-9, rel=1e-15)


@_settings(60)
@given(st.integers(-2 ** 31, 2 ** 31 - 1), st.integers(0, 2 ** 32 - 1))
def test_received_stamps_of_any_range_give_a_finite_time_or_none(sec, nanosec):
    message = Odometry()
    message.header.stamp.sec, message.header.stamp.nanosec = sec, nanosec
    seconds = stamp_seconds(message)
    assert (seconds is None) == (sec == 0 and nanosec == 0)
    assert seconds is None or (math.isfinite(seconds) and seconds == pytest.approx(sec + nanosec * 1e-9))


@_settings(60)
@given(st.floats(0.0, float(LAST_STAMP)))
def test_split_seconds_gives_whole_seconds_and_nanoseconds(seconds):
    sec, nanosec = split_seconds(seconds)
    assert 0 <= nanosec < 1_000_000_000 and sec >= 0
    assert abs(sec + nanosec * 1e-9 - seconds) <= 1e-9 + seconds * 1e-15
