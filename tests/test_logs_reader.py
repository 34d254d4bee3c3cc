"""Reading field logs and bags: bags written by mcap_ros2 and in the rosbag2 SQLite layout,
and bad input that ends in one clear line."""

import sqlite3

import numpy as np
import pytest

from linz_ros.logs import LogError, log_files, read_logs
from linz_ros.runtime.fieldlog import FLOAT64_MULTIARRAY_DEFINITION

LABELS = "t,sigma_min,condition,mode,reason,damping,compute_time_us,saturated_mask,warn,y.a,ref.a,u.f"


def _row(k: int) -> list[float]:
    return [0.004 * k, 0.5 - 0.001 * k, 2.0, 0.0, 0.0, 0.0, 9.0, 0.0, 0.0, 0.1, 0.1, -1.0]


def _mcap_bag(path, topic="/linz_controller/conditioning", n=50, labels=LABELS):
    # an independent writer: mcap-ros2-support's (PyPI), as a bag of the conditioning topic
    from mcap_ros2.writer import Writer
    with open(path, "wb") as stream:
        writer = Writer(stream)
        schema = writer.register_msgdef("std_msgs/msg/Float64MultiArray", FLOAT64_MULTIARRAY_DEFINITION)
        other = writer.register_msgdef("std_msgs/msg/Float64MultiArray", FLOAT64_MULTIARRAY_DEFINITION)
        for k in range(n):
            message = {"layout": {"dim": [{"label": labels, "size": 12, "stride": 12}], "data_offset": 0},
                       "data": _row(k)}
            writer.write_message(topic, schema, message, log_time=10**18 + k * 4_000_000)
            writer.write_message("/unrelated", other, {"layout": {"dim": [], "data_offset": 0}, "data": [1.0]},
                                 log_time=10**18 + k * 4_000_000)
        writer.finish()
    return path


def test_a_bag_of_the_conditioning_topic_written_by_mcap_ros2_reads(tmp_path):
    log = read_logs([_mcap_bag(tmp_path / "bag.mcap")])
    assert len(log) == 50 and log.labels == LABELS.split(",")
    np.testing.assert_allclose(log.column("sigma_min"), [0.5 - 0.001 * k for k in range(50)])
    assert (log.sequence == -1).all() and log.names("x") == [] and log.names("u") == ["f"]


def test_a_sqlite_bag_reads(tmp_path):
    # rosbag2's SQLite layout, messages serialized by rclpy (the ROS 2 client library)
    from rclpy.serialization import serialize_message
    from std_msgs.msg import Float64MultiArray, MultiArrayDimension
    path = tmp_path / "bag_0.db3"
    db = sqlite3.connect(path)
    db.execute("CREATE TABLE topics(id INTEGER PRIMARY KEY, name TEXT, type TEXT, serialization_format TEXT, "
               "offered_qos_profiles TEXT)")
    db.execute("CREATE TABLE messages(id INTEGER PRIMARY KEY, topic_id INTEGER, timestamp INTEGER, data BLOB)")
    db.execute("INSERT INTO topics VALUES (1, '/linz_controller/conditioning', 'std_msgs/msg/Float64MultiArray', "
               "'cdr', '')")
    db.execute("INSERT INTO topics VALUES (2, '/diagnostics', 'diagnostic_msgs/msg/DiagnosticArray', 'cdr', '')")
    for k in range(30):
        message = Float64MultiArray(data=_row(k))
        message.layout.dim = [MultiArrayDimension(label=LABELS, size=12, stride=12)]
        db.execute("INSERT INTO messages(topic_id, timestamp, data) VALUES (1, ?, ?)",
                   (10**18 + k, serialize_message(message)))
        db.execute("INSERT INTO messages(topic_id, timestamp, data) VALUES (2, ?, ?)", (10**18 + k, b"\x00\x01"))
    db.commit()
    db.close()
    log = read_logs([tmp_path])                 # the bag folder
    assert len(log) == 30
    np.testing.assert_allclose(log.column("t"), 0.004 * np.arange(30))


def test_a_bag_with_no_step_records_is_refused(tmp_path):
    path = _mcap_bag(tmp_path / "other.mcap", labels="a,b,c,d,e,f,g,h,i,j,k,l")
    with pytest.raises(LogError, match="no step records") as caught:
        read_logs([path])
    assert "\n" not in str(caught.value)


def test_files_of_different_layouts_are_refused(tmp_path):
    a = _mcap_bag(tmp_path / "a.mcap")
    b = _mcap_bag(tmp_path / "b.mcap", labels=LABELS.replace("u.f", "u.other"))
    with pytest.raises(LogError, match="another layout"):
        read_logs([a, b])


@pytest.mark.parametrize("make, match", [
    (lambda p: p / "missing.mcap", "no such file"),
    (lambda p: (p / "empty").mkdir() or p / "empty", "no .mcap or .db3"),
    (lambda p: (p / "notes.mcap").write_text("hello") and p / "notes.mcap", "not an MCAP file"),
    (lambda p: (p / "bag.db3").write_bytes(b"garbage" * 10) and p / "bag.db3", "not a readable ROS 2 bag"),
    (lambda p: (p / "head.mcap").write_bytes(b"\x89MCAP0\r\n") and p / "head.mcap", "no step records"),
])
def test_bad_paths_and_files_are_one_line_errors(tmp_path, make, match):
    with pytest.raises(LogError, match=match) as caught:
        read_logs([make(tmp_path)])
    assert "\n" not in str(caught.value)


def test_log_files_searches_folders(tmp_path):
    _mcap_bag(tmp_path / "run" / "a.mcap") if (tmp_path / "run").mkdir() is None else None
    (tmp_path / "run" / "notes.txt").write_text("x")
    assert [p.name for p in log_files([tmp_path])] == ["a.mcap"]
