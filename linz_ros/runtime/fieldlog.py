"""The field log: every control step's record, written to MCAP files in ROS 2 message encoding.

One channel, ``/linz/field_log``, of ``std_msgs/msg/Float64MultiArray`` messages whose
single layout dimension is labelled with the comma-separated field names (the per-step
record of :mod:`linz_ros.runtime.steprecord`, as on the controller's conditioning topic,
plus the state), so the
ROS 2 bag tools and common MCAP viewers open the file without our code. Each file also
holds, as MCAP metadata, the artifact's metadata, the node's parameters and, when it is
closed cleanly, the counts of records written and dropped; the artifact itself is
attached, so the log analysis can compute the singular set offline. Every file starts
with the recording's identity (:mod:`linz_ros.runtime.recording_identity`: one id for
all the files a writer rotates through, the machine's name, the UTC start), by which a
fleet of logs is grouped.

The writer runs on a thread of its own behind a bounded queue: the control loop never
waits for the disk. A full queue drops the record and counts it (the message sequence
numbers then show the gap in the file as well); a failed disk (unwritable folder, full
disk) stops the recording, never the controller, and the status says why. Chunks are
closed and flushed at least every ``flush_period`` seconds, so after ``kill -9`` the
file reads back up to the last flush, and at least every :data:`CHUNK_RECORDS` records,
so damage inside the file (a flipped bit fails its chunk's checksum) costs at most that
many records, however fast they came (an offline run writes seconds of records at once).
"""

from __future__ import annotations

import json
import math
import os
import queue
import struct
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, TYPE_CHECKING, Any, Callable, Mapping, Sequence

from linz_ros.artifact import Artifact
from linz_ros.errors import ConfigError
from linz_ros.runtime.recording_identity import IDENTITY_RECORD, check_machine, default_machine, new_identity
from linz_ros.runtime.steprecord import record_labels

if TYPE_CHECKING:
    from mcap.writer import Writer

__all__ = ["CHUNK_RECORDS", "FIELD_LOG_TOPIC", "FIELD_LOG_SCHEMA", "FLOAT64_MULTIARRAY_DEFINITION", "FieldLogSettings",
           "FieldLogStatus", "FieldLogWriter", "encode_labelled_array", "metadata_strings", "artifact_metadata",
           "watchdog_metadata", "open_field_log"]

FIELD_LOG_TOPIC = "/linz/field_log"
FIELD_LOG_SCHEMA = "std_msgs/msg/Float64MultiArray"
#: The ros2msg definition of the schema with its dependencies, as ROS 2 bag files carry it.
FLOAT64_MULTIARRAY_DEFINITION = """\
MultiArrayLayout  layout
float64[]         data

================================================================================
MSG: std_msgs/MultiArrayLayout
MultiArrayDimension[] dim
uint32 data_offset

================================================================================
MSG: std_msgs/MultiArrayDimension
string label
uint32 size
uint32 stride
"""
_CDR_LITTLE_ENDIAN = b"\x00\x01\x00\x00"
_SEQUENCE_LIMIT = 2**32 - 1
#: A chunk is closed (and the file flushed) at least every this many records: what one damaged
#: chunk may lose. About 35 kB of LZ4 on disk for a two-state plant; a second at 1 kHz.
CHUNK_RECORDS = 1000


def encode_labelled_array(label: str, values: Sequence[float]) -> bytes:
    """CDR (little endian) of a Float64MultiArray with one dimension labelled ``label``.

    Packed with ``struct`` rather than a generic serializer: it runs at the control rate
    (about 3 us, a tenth of the generic one); the tests decode it with mcap_ros2's reader.

    Parameters
    ----------
    label : str
    values : sequence of float

    Returns
    -------
    bytes
    """
    text = label.encode() + b"\x00"
    n = len(values)
    # offsets are counted from the end of the 4-byte encapsulation header
    head = struct.pack(f"<I I{len(text)}s", 1, len(text), text)
    pad = (-len(head)) % 4
    body = head + b"\x00" * pad + struct.pack("<IIII", n, n, 0, n)
    pad8 = (-len(body)) % 8
    return _CDR_LITTLE_ENDIAN + body + b"\x00" * pad8 + struct.pack(f"<{n}d", *values)


@dataclass(frozen=True)
class FieldLogSettings:
    """Where and how the field log is written.

    Parameters
    ----------
    folder : Path
        Created when missing.
    prefix : str
        File names are ``<prefix>_<UTC start>_<recording id, 8 characters>_<index>.mcap`` (the id
        keeps two writers started in the same second apart).
    max_bytes : int
        Start a new file when the current one reaches this size (0: never).
    max_seconds : float
        Start a new file after this long (0: never).
    flush_period : float
        Close the open chunk and flush at least this often (s, at most 1).
    queue_size : int
        Records that may wait for the writer thread; more are dropped and counted.
    machine : str
        The machine's name recorded in every file (default: :func:`default_machine`).
    """

    folder: Path
    prefix: str = "linz"
    max_bytes: int = 256 * 2**20
    max_seconds: float = 3600.0
    flush_period: float = 0.5
    queue_size: int = 20000
    machine: str = field(default_factory=default_machine)

    def __post_init__(self) -> None:
        if not 0.0 < self.flush_period <= 1.0:
            raise ConfigError("field_log_flush_period", f"{self.flush_period:g} s: expected 0 < period <= 1 s")
        if self.max_bytes < 0 or self.max_seconds < 0:
            raise ConfigError("field_log rotation", "sizes and times must be >= 0 (0: no rotation)")
        if self.queue_size < 1:
            raise ConfigError("field_log_queue", f"{self.queue_size}: expected at least 1")
        if not self.prefix or any(c in self.prefix for c in "/\\\x00"):
            raise ConfigError("field_log_prefix", f"{self.prefix!r}: expected a plain file-name prefix")
        check_machine(self.machine, "field_log_machine")


@dataclass
class FieldLogStatus:
    """What the writer has done so far (read it from any thread)."""

    state: str = "recording"          # recording, failed or closed
    files: list[Path] = field(default_factory=list)
    written: int = 0
    dropped: int = 0                  # the queue was full
    lost: int = 0                     # offered after the recording had failed
    error: str = ""

    @property
    def path(self) -> Path | None:
        """The file being written (or the last one)."""
        return self.files[-1] if self.files else None


def _mcap_writer() -> Callable[[IO[bytes]], Writer]:
    """The MCAP writer (LZ4 chunks of 512 kB), imported only when a field log is opened.

    A ROS 2 distribution has no package for the ``mcap`` library; the nodes run without it
    and only a field log needs it.
    """
    try:
        from mcap.writer import CompressionType, Writer
    except ImportError as err:
        raise ConfigError("field_log_folder", f"a field log needs the Python package mcap ({err}); install it with "
                                              "pip install mcap mcap-ros2-support, or leave the folder empty") from None
    return lambda stream: Writer(stream, chunk_size=512 * 1024, compression=CompressionType.LZ4)


class FieldLogWriter:
    """Writes field-log records to rotating MCAP files from a thread of its own.

    Parameters
    ----------
    settings : FieldLogSettings
    labels : sequence of str
        Field names of every record, in order.
    metadata : mapping of str to mapping of str to str
        MCAP metadata records written at the start of every file (artifact metadata,
        node parameters ...).
    attachments : mapping of str to bytes, optional
        Files attached to every log file (the artifact).
    wall_clock : callable, optional
        UTC seconds for file names (tests pass a fixed clock).
    opener : callable, optional
        Opens a new file for binary writing (tests pass one that fails like a full disk).

    Raises
    ------
    ConfigError
        When the first file cannot be created (the message names the folder and why).
    """

    def __init__(self, settings: FieldLogSettings, labels: Sequence[str],
                 metadata: Mapping[str, Mapping[str, str]], attachments: Mapping[str, bytes] | None = None,
                 wall_clock: Callable[[], float] = time.time,
                 opener: Callable[[Path], IO[bytes]] = lambda path: open(path, "xb")) -> None:
        self.settings = settings
        self.labels = list(labels)
        self._label = ",".join(self.labels)
        self._metadata = {k: {str(a): str(b) for a, b in v.items()} for k, v in metadata.items()}
        self._attachments = dict(attachments or {})
        self._wall_clock = wall_clock
        self._opener = opener
        self._queue: queue.Queue = queue.Queue(maxsize=settings.queue_size)
        self.status = FieldLogStatus()
        self._sequence = 0
        self._file_index = 0
        self._writer: Writer | None = None
        self._stream = None
        self._opened_at = 0.0
        self._file_written = 0
        self._new_writer = _mcap_writer()
        self.identity = new_identity(settings.machine, wall_clock())
        try:
            self._open_next()
        except OSError as err:
            raise ConfigError("field_log_folder", f"cannot write a log in {settings.folder}: "
                                                  f"{err.strerror or err}") from None
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, name="linz-field-log", daemon=True)
        self._thread.start()

    # -- the control thread's side ---------------------------------------------------------
    def put(self, values: Sequence[float], log_time_ns: int | None = None) -> bool:
        """Queue one record; never blocks.

        Parameters
        ----------
        values : sequence of float
            One value per label.
        log_time_ns : int, optional
            When the record was made (ns since the epoch); now when None.

        Returns
        -------
        bool
            False when the record was not queued (queue full: dropped, or recording
            failed or closed: lost); both are counted in :attr:`status`.
        """
        sequence = self._sequence
        self._sequence = (sequence + 1) % (_SEQUENCE_LIMIT + 1)
        if self.status.state != "recording":
            self.status.lost += 1
            return False
        try:
            self._queue.put_nowait((sequence, time.time_ns() if log_time_ns is None else log_time_ns,
                                    tuple(values)))
        except queue.Full:
            self.status.dropped += 1
            return False
        return True

    def close(self, timeout: float = 5.0) -> FieldLogStatus:
        """Write what is queued, finish the file (summary, counts) and stop the thread.

        Parameters
        ----------
        timeout : float
            How long to wait for the queue to drain (s).

        Returns
        -------
        FieldLogStatus
        """
        self._stop.set()
        self._thread.join(timeout)
        return self.status

    # -- the writer thread ------------------------------------------------------------------
    def _run(self) -> None:
        last_flush = time.monotonic()
        period = self.settings.flush_period
        while True:
            try:
                item = self._queue.get(timeout=max(period - (time.monotonic() - last_flush), 1e-3))
            except queue.Empty:
                item = None
            try:
                if item is not None:
                    self._write(*item)
                    while True:                  # drain what is there before flushing
                        try:
                            self._write(*self._queue.get_nowait())
                        except queue.Empty:
                            break
                now = time.monotonic()
                if now - last_flush >= period:
                    if self._writer is not None:
                        self._writer.flush()
                        self._chunk_written = 0
                    last_flush = now
                    self._rotate_if_due(now)
                if self._stop.is_set() and self._queue.empty():
                    self._finish_file()
                    self.status.state = "closed"
                    return
            except (OSError, ValueError) as err:       # ValueError: write to a closed stream
                self._fail(err)
                return

    def _write(self, sequence: int, log_time_ns: int, values: tuple) -> None:
        if len(values) != len(self.labels):
            raise ValueError(f"record of {len(values)} values for {len(self.labels)} labels")
        data = encode_labelled_array(self._label, values)
        if self._writer is None:                 # the last file was finished by a rotation
            self._open_next()
        self._writer.add_message(channel_id=self._channel, log_time=log_time_ns, publish_time=log_time_ns,
                                 sequence=sequence, data=data)
        self.status.written += 1
        self._file_written += 1
        self._chunk_written += 1
        if self._chunk_written >= CHUNK_RECORDS:
            self._writer.flush()
            self._chunk_written = 0
        if self.settings.max_bytes and self._stream.tell() >= self.settings.max_bytes:
            self._finish_file()

    def _rotate_if_due(self, now: float) -> None:
        # a rotation finishes the file; the next one opens with the next record, so a quiet
        # node never leaves files without records (the first file is opened at start-up)
        if self.settings.max_seconds and self._writer is not None and self._file_written \
                and now - self._opened_at >= self.settings.max_seconds:
            self._finish_file()

    def _open_next(self) -> None:
        folder = Path(self.settings.folder).expanduser()
        folder.mkdir(parents=True, exist_ok=True)
        started = time.strftime("%Y%m%d-%H%M%S", time.gmtime(self._wall_clock()))
        path = folder / f"{self.settings.prefix}_{started}_{self.identity['recording'][:8]}_{self._file_index:03d}.mcap"
        self._file_index += 1
        stream = self._opener(path)               # "xb": never overwrite an earlier log
        writer = self._new_writer(stream)
        writer.start(profile="ros2", library="linz_ros field log")
        schema = writer.register_schema(FIELD_LOG_SCHEMA, "ros2msg", FLOAT64_MULTIARRAY_DEFINITION.encode())
        self._channel = writer.register_channel(FIELD_LOG_TOPIC, "cdr", schema,
                                                {"labels": self._label, "file_index": str(self._file_index - 1)})
        writer.add_metadata(IDENTITY_RECORD, {**self.identity, "file_index": str(self._file_index - 1)})
        for name, data in self._metadata.items():
            writer.add_metadata(name, data)
        stamp = time.time_ns()
        for name, data in self._attachments.items():
            writer.add_attachment(stamp, stamp, name, "application/json", data)
        writer.flush()
        self._writer, self._stream = writer, stream
        self._opened_at = time.monotonic()
        self._file_written = 0
        self._chunk_written = 0
        self.status.files.append(path)

    def _finish_file(self) -> None:
        if self._writer is None:
            return
        writer, stream = self._writer, self._stream
        self._writer = self._stream = None
        writer.add_metadata("linz_recording", {"records_in_file": str(self._file_written),
                                               "written_total": str(self.status.written),
                                               "dropped_total": str(self.status.dropped),
                                               "closed": "clean"})
        writer.finish()
        stream.flush()
        os.fsync(stream.fileno())
        stream.close()

    def _fail(self, err: Exception) -> None:
        reason = getattr(err, "strerror", None) or str(err)
        self.status.error = f"{self.status.path}: {reason}"
        self.status.state = "failed"
        if self._stream is not None:
            try:
                self._stream.close()
            except OSError:
                pass
        self._writer = self._stream = None
        while True:                            # what was queued is lost with the disk: count it
            try:
                self._queue.get_nowait()
                self.status.lost += 1
            except queue.Empty:
                return


def metadata_strings(values: Mapping[str, object]) -> dict[str, str]:
    """Flatten a mapping to MCAP metadata strings (lists and dicts as JSON).

    Parameters
    ----------
    values : mapping

    Returns
    -------
    dict of str to str
    """
    out = {}
    for key, value in values.items():
        if isinstance(value, (list, tuple, dict)):
            out[str(key)] = json.dumps(value, default=str)
        elif isinstance(value, float) and not math.isfinite(value):
            out[str(key)] = repr(value)
        else:
            out[str(key)] = str(value)
    return out


def artifact_metadata(artifact: Artifact) -> dict[str, str]:
    """What a field log records of the artifact it ran (MCAP metadata ``linz_artifact``).

    Parameters
    ----------
    artifact : Artifact

    Returns
    -------
    dict of str to str
    """
    return metadata_strings({
        "plant": artifact.name, "artifact_file": artifact.source, "sha256": artifact.sha256,
        "created": artifact.created, "linz_ros_version": artifact.built_by,
        "kind": artifact.kind, "relative_degree": artifact.relative_degree, "rate_hz": artifact.rate,
        "states": artifact.states, "inputs": artifact.plant_inputs, "outputs": artifact.outputs,
        "plant_check": artifact.plant_check,
    })


def watchdog_metadata(config: Any) -> dict[str, str]:
    """The watchdog levels in force when a log file was opened (MCAP metadata ``linz_watchdog``).

    Parameters
    ----------
    config : WatchdogConfig

    Returns
    -------
    dict of str to str
    """
    values = config.table_values()
    values["input_limits"] = config.input_limits
    values["safe_kind"] = config.safe_kind          # read by older log readers
    return metadata_strings(values)


def open_field_log(settings: FieldLogSettings, artifact: Artifact, config: Any,
                   parameters: Mapping[str, object] | None = None, source: str = "linz_controller") -> FieldLogWriter:
    """A field-log writer for one controller: its layout, metadata and the artifact attached.

    Parameters
    ----------
    settings : FieldLogSettings
    artifact : Artifact
    config : WatchdogConfig
        The levels in force (recorded, and read back by the analysis).
    parameters : mapping, optional
        The node's parameters (recorded as JSON).
    source : str
        Who writes the log (a node name, or ``linz sim``).

    Returns
    -------
    FieldLogWriter

    Raises
    ------
    ConfigError
        When the log cannot be created.
    """
    labels = record_labels(artifact, states=True)
    metadata = {"linz_artifact": artifact_metadata(artifact), "linz_watchdog": watchdog_metadata(config),
                "linz_parameters": {"source": source,
                                    "parameters": json.dumps(dict(parameters or {}), default=str, sort_keys=True)}}
    path = Path(artifact.source)
    try:
        attached = path.read_bytes() if path.is_file() else json.dumps(artifact.document).encode()
    except OSError:
        attached = json.dumps(artifact.document).encode()
    return FieldLogWriter(settings, labels, metadata, {"artifact.json": attached})
