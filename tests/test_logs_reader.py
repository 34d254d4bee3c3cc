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
    rows = []
    for k in range(30):
        message = Float64MultiArray(data=_row(k))
        message.layout.dim = [MultiArrayDimension(label=LABELS, size=12, stride=12)]
        rows.append((10**18 + k, serialize_message(message)))
    _sqlite_bag(tmp_path / "bag_0.db3", rows, other_topic=[(10**18 + k, b"\x00\x01") for k in range(30)])
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


def test_a_file_given_twice_is_refused_in_one_line(tmp_path):
    (tmp_path / "a.mcap").write_bytes(b"x")
    with pytest.raises(LogError, match=r"a.mcap: given twice \(also as .*a.mcap\): each file is read once"):
        log_files([tmp_path / "a.mcap", tmp_path])


def test_log_files_searches_folders(tmp_path):
    _mcap_bag(tmp_path / "run" / "a.mcap") if (tmp_path / "run").mkdir() is None else None
    (tmp_path / "run" / "notes.txt").write_text("x")
    assert [p.name for p in log_files([tmp_path])] == ["a.mcap"]


def _sqlite_bag(path, rows, other_topic=()):
    """rosbag2's SQLite layout: ``rows`` (timestamp, data) on the conditioning topic, ``other_topic`` on /diagnostics."""
    db = sqlite3.connect(path)
    db.execute("CREATE TABLE topics(id INTEGER PRIMARY KEY, name TEXT, type TEXT, serialization_format TEXT, "
               "offered_qos_profiles TEXT)")
    db.execute("CREATE TABLE messages(id INTEGER PRIMARY KEY, topic_id INTEGER, timestamp INTEGER, data BLOB)")
    db.execute("INSERT INTO topics VALUES (1, '/linz_controller/conditioning', 'std_msgs/msg/Float64MultiArray', "
               "'cdr', '')")
    db.execute("INSERT INTO topics VALUES (2, '/diagnostics', 'diagnostic_msgs/msg/DiagnosticArray', 'cdr', '')")
    db.executemany("INSERT INTO messages(topic_id, timestamp, data) VALUES (1, ?, ?)", rows)
    db.executemany("INSERT INTO messages(topic_id, timestamp, data) VALUES (2, ?, ?)", other_topic)
    db.commit()
    db.close()
    return path


def test_a_sqlite_bag_with_null_message_data_reads_the_rest_and_says_so(tmp_path):
    from linz_ros.runtime.fieldlog import encode_labelled_array
    rows = [(10**18 + k, None if k in (3, 7) else encode_labelled_array(LABELS, _row(k))) for k in range(20)]
    rows.append((10**18 + 99, "text, not bytes"))
    log = read_logs([_sqlite_bag(tmp_path / "bag_0.db3", rows)])
    assert len(log) == 18
    assert any("2 message(s) of the conditioning topic skipped: they have no data (NULL)" in p for p in log.problems)
    assert any("1 message(s)" in p and "hold str instead of bytes" in p for p in log.problems)


def _field_log_prefix(path, n, schema_text=FLOAT64_MULTIARRAY_DEFINITION, finish=False):
    """An MCAP field log as a crash leaves it: records flushed, never finished (no closing records)."""
    from mcap.writer import Writer
    from linz_ros.runtime.fieldlog import FIELD_LOG_SCHEMA, FIELD_LOG_TOPIC, encode_labelled_array
    stream = open(path, "wb")
    writer = Writer(stream)
    writer.start(profile="ros2", library="test")
    schema = writer.register_schema(FIELD_LOG_SCHEMA, "ros2msg", schema_text.encode())
    channel = writer.register_channel(FIELD_LOG_TOPIC, "cdr", schema)
    for k in range(n):
        writer.add_message(channel, 10**18 + k, encode_labelled_array(LABELS, _row(k)), 10**18 + k, sequence=k)
    writer.finish() if finish else writer.flush()
    stream.close()
    return path


def test_a_schema_that_does_not_parse_is_one_line_naming_the_channel(tmp_path, capfd):
    path = _field_log_prefix(tmp_path / "garbage.mcap", 5, schema_text="\x01 !!! not a message ::: 9", finish=True)
    with pytest.raises(LogError, match=r"garbage.mcap: .*channel /linz/field_log: its schema "
                                       r"std_msgs/msg/Float64MultiArray does not parse .*its 5 message\(s\) skipped"
                       ) as caught:
        read_logs([path])
    assert "\n" not in str(caught.value)
    assert capfd.readouterr().err == ""           # the schema parser's own complaint is not printed
    good = _mcap_bag(tmp_path / "good.mcap")      # beside a usable file: that one is read, the other named
    log = read_logs([good, path])
    assert len(log) == 50 and any("does not parse" in p for p in log.problems)


def test_a_log_followed_by_a_long_run_of_zeros_stops_at_the_zeros_without_reading_them(tmp_path):
    from linz_ros.logs.reader import _read_mcap
    path = _field_log_prefix(tmp_path / "prealloc.mcap", 300)
    written = path.stat().st_size
    with open(path, "r+b") as stream:
        stream.truncate(200 * 2**20)              # sparse: 200 MB of zeros after the records
    records = _read_mcap(path)
    assert len(records.rows) == 300
    assert records.bytes_read < written + 64 and records.records_scanned < 20
    (problem,) = records.problems
    assert f"no MCAP record at byte {written} (opcode 0)" in problem and "read up to the damage, 300 messages" \
        in problem
    assert len(read_logs([path])) == 300


def test_a_record_longer_than_the_rest_of_the_file_is_not_read(tmp_path):
    from linz_ros.logs.reader import _read_mcap
    path = _field_log_prefix(tmp_path / "long.mcap", 10)
    written = path.stat().st_size
    with open(path, "ab") as stream:                # a chunk record claiming a terabyte
        stream.write(b"\x06" + (2**40).to_bytes(8, "little") + b"\x00" * 100)
    records = _read_mcap(path)
    assert len(records.rows) == 10 and records.bytes_read < written + 64
    assert "claims 1099511627776 bytes, more than the 100 left" in records.problems[0]


def test_metadata_json_nested_too_deeply_is_kept_as_text():
    """A parameters record nested 10 000 deep raised RecursionError out of ``linz logs``."""
    from linz_ros.logs import StepLog
    from linz_ros.logs.reader import metadata_json

    deep = "[" * 10_000 + "]" * 10_000
    log = StepLog(["t"], np.zeros((0, 1)), np.zeros(0), np.zeros(0, dtype=np.int64), [],
                  {"linz_parameters": {"parameters": deep}})
    assert metadata_json(log, "linz_parameters", "parameters") == deep
