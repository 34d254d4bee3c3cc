"""The field-log writer: the CDR it writes decodes with mcap_ros2, files rotate, a crash loses
at most one flush period, a full disk stops the recording (never the caller), drops are counted."""

import errno
import io
import math
import shutil
import time

import numpy as np
import pytest
from mcap.reader import make_reader
from mcap.records import Schema
from mcap_ros2.decoder import DecoderFactory

from linz_ros.errors import ConfigError
from linz_ros.logs import read_logs
from linz_ros.runtime.fieldlog import (FIELD_LOG_SCHEMA, FIELD_LOG_TOPIC, FLOAT64_MULTIARRAY_DEFINITION,
                                       FieldLogSettings, FieldLogWriter, encode_labelled_array)

LABELS = ["t", "sigma_min", "condition", "mode", "reason", "damping", "compute_time_us", "saturated_mask", "warn",
          "y.a", "ref.a", "u.f", "x.q", "x.w"]


def _decoder():
    schema = Schema(id=1, name=FIELD_LOG_SCHEMA, encoding="ros2msg", data=FLOAT64_MULTIARRAY_DEFINITION.encode())
    return DecoderFactory().decoder_for("cdr", schema)


@pytest.mark.parametrize("label, values", [("", []), ("a", [1.0]), ("ab,c", [1.5, -2.0, math.inf]),
                                           ("x" * 37, list(np.linspace(-1, 1, 13)))])
def test_the_packed_cdr_decodes_with_mcap_ros2(label, values):
    # reference decoder: mcap-ros2-support's dynamic CDR reader (PyPI mcap-ros2-support)
    message = _decoder()(encode_labelled_array(label, values))
    assert message.layout.dim[0].label == label
    assert message.layout.dim[0].size == len(values) and message.layout.dim[0].stride == len(values)
    assert message.layout.data_offset == 0
    np.testing.assert_array_equal(message.data, values)


def _row(k: int) -> list[float]:
    return [0.002 * k, 0.5, 2.0, 0.0, 0.0, 0.0, 12.0, 0.0, 0.0, 0.1, 0.1, -1.0, 0.01 * k, 0.0]


def _writer(tmp_path, **settings) -> FieldLogWriter:
    clock = iter(range(10**6))
    return FieldLogWriter(FieldLogSettings(tmp_path, prefix="unit", **settings), LABELS,
                          {"linz_watchdog": {"sigma_warn": "0.3", "sigma_act": "0.2", "sigma_stop": "0.1"}},
                          {"artifact.json": b"{}"}, wall_clock=lambda: 1.8e9 + next(clock))


def test_a_closed_log_reads_back_complete_with_its_metadata(tmp_path):
    writer = _writer(tmp_path)
    for k in range(1000):
        assert writer.put(_row(k), log_time_ns=10**18 + k * 2_000_000)
    status = writer.close()
    assert status.state == "closed" and status.written == 1000 and status.dropped == 0
    with open(status.path, "rb") as stream:
        reader = make_reader(stream)
        summary = reader.get_summary()
        assert summary.statistics.message_count == 1000
        (channel,) = summary.channels.values()
        assert channel.topic == FIELD_LOG_TOPIC and summary.schemas[channel.schema_id].name == FIELD_LOG_SCHEMA
        names = {m.name for m in reader.iter_metadata()}
    assert {"linz_watchdog", "linz_recording"} <= names
    log = read_logs([status.path])
    assert log.labels == LABELS and len(log) == 1000
    np.testing.assert_allclose(log.column("x.q"), 0.01 * np.arange(1000))
    np.testing.assert_array_equal(log.sequence, np.arange(1000))
    assert log.clean_close == {str(status.path): True} and log.artifact_text == "{}"
    assert log.metadata["linz_recording"]["dropped_total"] == "0"


def test_rotation_by_size_gives_self_contained_files_that_join_in_order(tmp_path):
    writer = _writer(tmp_path, max_bytes=20_000, flush_period=0.01)
    for k in range(3000):
        writer.put(_row(k), log_time_ns=10**18 + k * 2_000_000)
        if k % 200 == 0:
            time.sleep(0.02)                    # let flushes happen, so the size grows on disk
    status = writer.close()
    assert len(status.files) >= 3
    for path in status.files:                   # every file carries its own schema and metadata
        log = read_logs([path])
        assert log.labels == LABELS and "linz_watchdog" in log.metadata
    joined = read_logs(status.files[::-1])      # any order given: joined in time order
    assert len(joined) == 3000
    np.testing.assert_array_equal(joined.sequence, np.arange(3000))


def test_rotation_by_time(tmp_path):
    writer = _writer(tmp_path, max_seconds=0.05, flush_period=0.01)
    for k in range(40):
        writer.put(_row(k))
        time.sleep(0.005)
    status = writer.close()
    assert len(status.files) >= 2 and sum(len(read_logs([f])) for f in status.files) == 40


def test_a_quiet_writer_leaves_no_file_without_records(tmp_path):
    writer = _writer(tmp_path, max_seconds=0.02, flush_period=0.01)
    for k in range(5):
        writer.put(_row(k))
    time.sleep(0.2)                             # ten rotation periods with nothing to write
    writer.put(_row(5))
    status = writer.close()
    assert len(status.files) == 2
    assert [len(read_logs([f])) for f in status.files] == [5, 1]


def test_after_a_crash_the_log_reads_back_up_to_the_last_flush(tmp_path):
    writer = _writer(tmp_path, flush_period=0.05)
    for k in range(500):
        writer.put(_row(k), log_time_ns=10**18 + k * 2_000_000)
    time.sleep(0.3)                             # more than a flush period: all 500 are on disk
    crashed = tmp_path / "crashed.mcap"
    shutil.copyfile(writer.status.path, crashed)        # what a kill -9 now would leave
    writer.close()
    log = read_logs([crashed])
    assert len(log) == 500
    assert log.clean_close == {str(crashed): False}
    assert not log.problems or "truncated" in log.problems[0]


def test_a_file_cut_in_the_middle_reads_up_to_the_damage(tmp_path):
    writer = _writer(tmp_path, flush_period=0.01)
    for k in range(2000):
        writer.put(_row(k))
        if k % 100 == 0:
            time.sleep(0.015)
    path = writer.close().path
    data = path.read_bytes()
    cut = tmp_path / "cut.mcap"
    cut.write_bytes(data[: len(data) * 2 // 3])
    log = read_logs([cut])
    assert 0 < len(log) < 2000
    np.testing.assert_array_equal(log.sequence, np.arange(len(log)))      # a clean prefix
    assert len(log.problems) == 1 and "read up to the damage" in log.problems[0]
    assert "\n" not in log.problems[0]


class _FillingDisk(io.RawIOBase):
    """A file on a disk that fills after ``room`` bytes."""

    def __init__(self, room: int) -> None:
        self.room, self.size = room, 0

    def writable(self) -> bool:
        return True

    def write(self, data) -> int:
        if self.size + len(data) > self.room:
            raise OSError(errno.ENOSPC, "No space left on device")
        self.size += len(data)
        return len(data)

    def tell(self) -> int:
        return self.size

    def fileno(self) -> int:
        raise OSError(errno.EBADF, "not a real file")


def test_a_full_disk_stops_the_recording_and_counts_what_was_lost(tmp_path):
    disk = _FillingDisk(room=60_000)
    writer = FieldLogWriter(FieldLogSettings(tmp_path, flush_period=0.01), LABELS, {}, opener=lambda path: disk)
    accepted = 0
    for k in range(20000):
        accepted += writer.put(_row(k))
        if k % 500 == 0:
            time.sleep(0.02)
    writer.close()
    status = writer.status
    assert status.state == "failed" and "No space left on device" in status.error
    assert status.written > 0 and status.lost > 0
    # nothing vanishes unaccounted: every offered record was written, dropped or lost
    assert status.written + status.dropped + status.lost >= 20000 - 1
    assert accepted <= 20000


def test_an_unwritable_folder_is_a_one_line_error(tmp_path):
    blocker = tmp_path / "file"
    blocker.write_text("")
    with pytest.raises(ConfigError, match="field_log_folder") as caught:
        FieldLogWriter(FieldLogSettings(blocker / "logs"), LABELS, {})
    assert "\n" not in str(caught.value)


def test_a_full_queue_drops_and_counts_and_the_file_shows_the_gap(tmp_path):
    writer = _writer(tmp_path, queue_size=10)
    write = writer._write

    def slow_disk(*item):
        time.sleep(0.001)
        write(*item)
    writer._write = slow_disk
    results = [writer.put(_row(k)) for k in range(2000)]
    status = writer.close(timeout=30)
    log = read_logs([status.path])
    assert status.dropped > 1000 and status.written + status.dropped == 2000
    assert len(log) == status.written and results.count(False) == status.dropped
    # the dropped records are the gaps in the sequence numbers of the file
    seq = log.sequence
    assert int(np.sum(np.diff(seq) - 1)) + int(seq[0]) + (1999 - int(seq[-1])) == status.dropped


@pytest.mark.parametrize("settings, option", [({"flush_period": 0.0}, "flush_period"),
                                              ({"flush_period": 2.0}, "flush_period"),
                                              ({"max_bytes": -1}, "rotation"), ({"queue_size": 0}, "queue"),
                                              ({"prefix": "a/b"}, "prefix")])
def test_settings_out_of_range_are_refused(tmp_path, settings, option):
    with pytest.raises(ConfigError, match=option):
        FieldLogSettings(tmp_path, **settings)


def test_the_packed_cdr_is_byte_for_byte_what_mcap_ros2_writes(tmp_path):
    # reference encoder: mcap-ros2-support's Writer (public API); its message bytes read back raw
    from mcap.reader import make_reader
    from mcap_ros2.writer import Writer
    label, values = "t,sigma_min,x.q", [0.25, 1e-3, -2.5]
    with open(tmp_path / "ref.mcap", "wb") as stream:
        writer = Writer(stream)
        schema = writer.register_msgdef(FIELD_LOG_SCHEMA, FLOAT64_MULTIARRAY_DEFINITION)
        writer.write_message("/x", schema, {"layout": {"dim": [{"label": label, "size": 3, "stride": 3}],
                                                       "data_offset": 0}, "data": values})
        writer.finish()
    with open(tmp_path / "ref.mcap", "rb") as stream:
        (_, _, message), = make_reader(stream).iter_messages()
    assert message.data == encode_labelled_array(label, values)


def test_a_damaged_chunk_is_skipped_and_named_and_the_rest_reads(tmp_path):
    writer = _writer(tmp_path, flush_period=0.01)
    for k in range(2000):
        writer.put(_row(k))
        if k % 100 == 0:
            time.sleep(0.015)
    log = read_logs([_flipped_copy(writer.close().path, tmp_path, 0xFF)])    # one byte flipped mid-data
    assert 800 < len(log) < 2000                     # a chunk lost, or the rest after a broken length
    assert any("damaged chunk" in p or "read up to the damage" in p for p in log.problems), log.problems
    assert all("\n" not in p for p in log.problems)


_WITHOUT_MCAP = """
import sys
from pathlib import Path

class _Blocked:                                  # as on a ROS 2 distribution: no mcap package
    def find_spec(self, name, path=None, target=None):
        if name.split(".")[0] in ("mcap", "mcap_ros2"):
            raise ImportError(f"No module named {name!r}")

sys.meta_path.insert(0, _Blocked())
from linz_ros.errors import ConfigError
from linz_ros.runtime.fieldlog import FieldLogSettings, FieldLogWriter
try:
    import linz_ros.nodes.controller, linz_ros.nodes.simulator, linz_ros.nodes.reference
    print("nodes import")
except ImportError as err:
    print("nodes need", err.name)
try:
    FieldLogWriter(FieldLogSettings(Path(sys.argv[1])), ["t"], {})
except ConfigError as err:
    print("refused:", err)
"""


def test_without_the_mcap_package_the_nodes_run_and_a_field_log_is_refused_by_name(tmp_path):
    import subprocess
    import sys

    pytest.importorskip("rclpy", reason="rclpy is not installed (pip install '.[ros]')")
    done = subprocess.run([sys.executable, "-c", _WITHOUT_MCAP, str(tmp_path / "log")], capture_output=True,
                          text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    lines = done.stdout.splitlines()
    assert lines[0] == "nodes import"
    assert lines[1].startswith("refused: field_log_folder: a field log needs the Python package mcap ") and \
        "pip install mcap mcap-ros2-support" in lines[1], lines
    assert not (tmp_path / "log").exists() or not any((tmp_path / "log").iterdir())


def test_a_fast_run_is_cut_into_chunks_by_record_count_so_one_flipped_byte_loses_one_chunk(tmp_path):
    from linz_ros.runtime.fieldlog import CHUNK_RECORDS
    writer = _writer(tmp_path)                       # the default flush period: 5000 records come far faster
    for k in range(5000):
        assert writer.put(_row(k), log_time_ns=10**18 + k * 2_000_000)
    log = read_logs([_flipped_copy(writer.close().path, tmp_path, 0x10)])    # one bit flipped mid-file
    assert 5000 - CHUNK_RECORDS <= len(log) < 5000
    assert any("1 damaged chunk(s) skipped" in p for p in log.problems), log.problems
    kept = set(log.sequence.tolist())                # what is lost is one run of consecutive records
    lost = sorted(set(range(5000)) - kept)
    assert lost == list(range(lost[0], lost[0] + len(lost)))


def test_the_watchdog_metadata_holds_every_setting_of_the_table():
    from support import BUNDLED, built_artifact
    from linz_ros.artifact.watchdog import WATCHDOG_SETTINGS
    from linz_ros.runtime import WatchdogConfig
    from linz_ros.runtime.fieldlog import watchdog_metadata

    artifact = built_artifact(BUNDLED / "pick_arm.yaml")
    metadata = watchdog_metadata(WatchdogConfig.from_artifact(artifact, integral_limit=2.5))
    assert {row.name for row in WATCHDOG_SETTINGS} <= set(metadata)
    assert metadata["integral_limit"] == "2.5" and metadata["envelope_action"] == "stop"


def _flipped_copy(path, folder, mask: int):
    """A copy of ``path`` in ``folder`` with the byte in the middle XORed with ``mask``."""
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= mask
    damaged = folder / "flipped.mcap"
    damaged.write_bytes(bytes(data))
    return damaged


def test_two_writers_started_in_the_same_second_on_one_folder_each_keep_their_own_files(tmp_path):
    """File names carry the recording id beside the start second: two controllers (or a controller and
    a linz sim run) logging into one folder never collide."""
    clock = lambda: 1_764_900_000.0              # noqa: E731 - one second for both
    first = FieldLogWriter(FieldLogSettings(tmp_path, prefix="cell"), LABELS, {}, wall_clock=clock)
    second = FieldLogWriter(FieldLogSettings(tmp_path, prefix="cell"), LABELS, {}, wall_clock=clock)
    for writer in (first, second):
        writer.put([0.0] * len(LABELS))
    done = [first.close(), second.close()]
    assert [s.state for s in done] == ["closed", "closed"]
    names = sorted(p.name for p in tmp_path.glob("*.mcap"))
    assert len(names) == 2 and names[0] != names[1]
    assert {n.split("_")[2] for n in names} == {first.identity["recording"][:8], second.identity["recording"][:8]}
