"""Reading field logs and bags of the conditioning topic into one table of step records.

Accepted: the controller's field-log files (MCAP), ROS 2 bags holding the controller's
conditioning topic (a bag folder, or its ``.mcap`` or ``.db3`` files), and several of
either, which are joined in time order when they record the same layout. A damaged or
truncated file is read up to the damage; what was lost is said in
:attr:`StepLog.problems`, one line each. Every MCAP record's length is checked against
the rest of the file before it is read, so zeros after a crash or a broken length end
the reading at once, whatever the file's size; a chunk that fails its checksum, a
message or schema that does not decode and a bag row without data are skipped and
counted, and the reading goes on.
"""

from __future__ import annotations

import contextlib
import io
import json
import math
import os
import sqlite3
import struct
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any, Callable, Iterable, Iterator

import numpy as np
from mcap.data_stream import ReadDataStream
from mcap.exceptions import McapError
from mcap.opcode import Opcode
from mcap.records import Attachment, Channel, Chunk, Message, Metadata, Schema
from mcap.stream_reader import breakup_chunk
from mcap_ros2.decoder import DecoderFactory

from linz_ros.logs._paths import LogError, log_files
from linz_ros.runtime.fieldlog import FIELD_LOG_TOPIC, FLOAT64_MULTIARRAY_DEFINITION
from linz_ros.runtime.steprecord import FIELDS, StepColumns, decode

__all__ = ["LogError", "StepLog", "read_logs", "log_files", "first_metadata"]

#: A labelled array is a step record when its labels start with these (every layout so far has).
_RECORD_HEAD = FIELDS[:5]
_ARRAY_TYPES = ("std_msgs/msg/Float64MultiArray", "std_msgs/Float64MultiArray")
_ARTIFACT_ATTACHMENT = "artifact.json"
_READ_ERRORS = (McapError, struct.error, EOFError, ValueError, KeyError, IndexError, RuntimeError, OSError,
                MemoryError)
_MCAP_MAGIC = b"\x89MCAP0\r\n"
#: Largest MCAP record read into memory (bytes). Our chunks are 512 kB and rosbag2's a few MB; a
#: longer length is damage, and is refused before anything is read.
RECORD_SIZE_LIMIT = 256 * 2**20
#: The records the reader parses; every other opcode is stepped over unread.
_PARSED = {Opcode.SCHEMA: Schema.read, Opcode.CHANNEL: Channel.read, Opcode.CHUNK: Chunk.read,
           Opcode.METADATA: Metadata.read, Opcode.ATTACHMENT: Attachment.read}


@dataclass
class StepLog:
    """Step records of one or more files, in time order.

    Attributes
    ----------
    labels : list of str
        Field names, as in the controller's conditioning record (``t, sigma_min, ...,
        y.<out>, ref.<out>, u.<in>``), then ``x.<state>`` in a field log.
    values : numpy.ndarray
        One row per record.
    log_time : numpy.ndarray
        When each record was written (s since the epoch).
    sequence : numpy.ndarray
        The writer's sequence number of each record (field logs; -1 in bags).
    files : list of str
    metadata : dict of str to dict of str to str
        The MCAP metadata records (later files overwrite earlier ones of the same name).
    artifact_text : str or None
        The attached artifact.
    problems : list of str
        What could not be read, one line each.
    clean_close : dict of str to bool
        Per file: whether it was closed cleanly (a crash or ``kill -9`` leaves False).
    """

    labels: list[str]
    values: np.ndarray
    log_time: np.ndarray
    sequence: np.ndarray
    files: list[str] = field(default_factory=list)
    metadata: dict[str, dict[str, str]] = field(default_factory=dict)
    artifact_text: str | None = None
    problems: list[str] = field(default_factory=list)
    clean_close: dict[str, bool] = field(default_factory=dict)

    def __len__(self) -> int:
        return len(self.values)

    def column(self, name: str) -> np.ndarray:
        """The values of one field.

        Parameters
        ----------
        name : str

        Returns
        -------
        numpy.ndarray
        """
        return self.values[:, self.labels.index(name)]

    def names(self, prefix: str) -> list[str]:
        """Names of the fields ``<prefix>.<name>`` (``x``, ``u``, ``y``, ``ref``), in order."""
        return [label.split(".", 1)[1] for label in self.labels if label.startswith(prefix + ".")]

    def block(self, prefix: str) -> np.ndarray:
        """The columns of ``<prefix>.*`` as a (records, fields) array."""
        index = [i for i, label in enumerate(self.labels) if label.startswith(prefix + ".")]
        return self.values[:, index]

    def decoded(self) -> StepColumns:
        """The records as typed columns, each found by its label (``steprecord.decode``: older logs filled).

        Returns
        -------
        StepColumns
        """
        return decode(self.values, self.labels)


@dataclass
class _FileRecords:
    labels: list[str] | None = None
    rows: list[tuple] = field(default_factory=list)
    log_time: list[float] = field(default_factory=list)
    sequence: list[int] = field(default_factory=list)
    metadata: dict[str, dict[str, str]] = field(default_factory=dict)
    artifact_text: str | None = None
    problems: list[str] = field(default_factory=list)
    clean: bool = False
    foreign_layouts: int = 0
    wrong_length: int = 0
    bytes_read: int = 0           # from the file itself (the bounded-work tests read these two)
    records_scanned: int = 0

    def add(self, label: str, data: Any, log_time_ns: int, sequence: int) -> None:
        labels = label.split(",")
        if tuple(labels[:len(_RECORD_HEAD)]) != _RECORD_HEAD:
            return
        if self.labels is None:
            self.labels = labels
        elif labels != self.labels:
            self.foreign_layouts += 1
            return
        if len(data) != len(labels):
            self.wrong_length += 1
            return
        self.rows.append(tuple(data))
        self.log_time.append(log_time_ns * 1e-9)
        self.sequence.append(sequence)


#: What decoding one message may raise (the decoder is generated from the file's schema text).
_DECODE_ERRORS = _READ_ERRORS + (TypeError, AttributeError)
_TRUNCATED = "the file ends in the middle of a record or before its closing records (truncated, e.g. cut by a crash)"


class _Damage(Exception):
    """The file's records cannot be followed past this point; the message says why."""


def _first_line(err: BaseException) -> str:
    text = str(err).strip()
    return text.splitlines()[0][:200] if text else type(err).__name__


def _framed_records(stream: IO[bytes], size: int, out: _FileRecords) -> Iterator[tuple[int, Any]]:
    """The data section's records in file order, as ``(opcode, record)``; record None when its body is damaged.

    Every record's length is checked against what is left of the file (and
    :data:`RECORD_SIZE_LIMIT`) before its body is read, so a damaged length or a run of
    zeros (opcode 0 is no MCAP record) stops the scan at once, and records that are not
    needed are stepped over unread. Data End or the Footer ends the scan.
    """
    position = len(_MCAP_MAGIC)
    while True:
        head = stream.read(9)
        out.bytes_read += len(head)
        if len(head) < 9:
            raise _Damage(_TRUNCATED)
        opcode, length = head[0], struct.unpack_from("<Q", head, 1)[0]
        start, position = position, position + 9
        if opcode == 0:
            raise _Damage(f"no MCAP record at byte {start} (opcode 0): the rest of the file, {size - start} bytes, "
                          "is not read (zeros or garbage: space preallocated, or damage)")
        if length > size - position:
            raise _Damage(f"the record at byte {start} claims {length} bytes, more than the {size - position} left "
                          "(truncated, e.g. cut by a crash, or a damaged length)")
        if length > RECORD_SIZE_LIMIT:
            raise _Damage(f"the record at byte {start} claims {length} bytes, more than the "
                          f"{RECORD_SIZE_LIMIT >> 20} MiB a record may hold (a damaged length)")
        out.records_scanned += 1
        if opcode in (Opcode.DATA_END, Opcode.FOOTER):
            return
        position += length
        if opcode not in _PARSED and opcode != Opcode.MESSAGE:
            stream.seek(position)
            continue
        body = stream.read(length)
        out.bytes_read += len(body)
        if len(body) < length:
            raise _Damage(_TRUNCATED)
        data = ReadDataStream(io.BytesIO(body))
        try:
            record = Message.read(data, length) if opcode == Opcode.MESSAGE else _PARSED[opcode](data)
        except _READ_ERRORS:
            record = None
        yield opcode, record


def _chunk_records(chunk: Chunk) -> list[Any] | None:
    """The records inside a chunk, None when it is damaged (checksum, compression, size)."""
    if chunk.uncompressed_size > RECORD_SIZE_LIMIT:
        return None
    try:
        return breakup_chunk(chunk, validate_crc=True)
    except _READ_ERRORS:
        return None


class _McapContent:
    """Turns an MCAP file's records into step records, counting what cannot be used."""

    def __init__(self, out: _FileRecords) -> None:
        self.out = out
        self.schemas: dict[int, Schema] = {}
        self.channels: dict[int, tuple[Channel, Callable[[bytes], Any] | None]] = {}
        self.unparsed: dict[int, list] = {}       # channel id -> [topic, schema, problem, messages skipped]
        self.factory = DecoderFactory()
        self.messages = 0
        self.undecodable = 0
        self.damaged: dict[str, int] = {}

    def take(self, opcode: int, record: Any) -> None:
        if record is None:
            self._count_damage(f"damaged {Opcode(opcode).name.lower()} record")
        elif isinstance(record, Chunk):
            inner = _chunk_records(record)
            if inner is None:
                self._count_damage("damaged chunk")
            for item in inner or ():
                self._one(item)
        else:
            self._one(record)

    def _count_damage(self, what: str) -> None:
        self.damaged[what] = self.damaged.get(what, 0) + 1

    def _one(self, record: Any) -> None:
        if isinstance(record, Schema):
            self.schemas[record.id] = record
        elif isinstance(record, Channel):
            self._channel(record)
        elif isinstance(record, Message):
            self._message(record)
        elif isinstance(record, Metadata):
            self.out.metadata[record.name] = dict(record.metadata)
            if record.name == "linz_recording" and record.metadata.get("closed") == "clean":
                self.out.clean = True
        elif isinstance(record, Attachment) and record.name == _ARTIFACT_ATTACHMENT:
            self.out.artifact_text = record.data.decode("utf-8", errors="replace")

    def _channel(self, channel: Channel) -> None:
        schema = self.schemas.get(channel.schema_id)
        decoder = None
        if schema is not None and schema.name in _ARRAY_TYPES:
            try:
                with contextlib.redirect_stderr(io.StringIO()):     # the parser prints what it refuses
                    decoder = self.factory.decoder_for(channel.message_encoding, schema)
            except Exception as err:       # noqa: BLE001 - the vendored ROS IDL parser raises classes of its own
                self.unparsed[channel.id] = [channel.topic, schema.name, _first_line(err), 0]
        self.channels[channel.id] = (channel, decoder)

    def _message(self, record: Message) -> None:
        if record.channel_id in self.unparsed:
            self.unparsed[record.channel_id][3] += 1
            return
        channel, decoder = self.channels.get(record.channel_id, (None, None))
        if decoder is None:
            return
        try:
            message = decoder(record.data)
            dims = message.layout.dim
            label, values = (dims[0].label, message.data) if dims else (None, None)
        except _DECODE_ERRORS:
            self.undecodable += 1
            return
        if label is not None:
            sequence = record.sequence if channel.topic == FIELD_LOG_TOPIC else -1
            self.out.add(label, values, record.log_time, sequence)
            self.messages += 1

    def notes(self, path: Path) -> list[str]:
        notes = [f"{path}: {n} damaged chunk(s) skipped (checksum mismatch); the records in them are missing"
                 if what == "damaged chunk" else f"{path}: {n} {what}(s) skipped" for what, n in self.damaged.items()]
        notes += [f"{path}: channel {topic}: its schema {name} does not parse ({problem}); its {n} message(s) "
                  "skipped" for topic, name, problem, n in self.unparsed.values()]
        if self.undecodable:
            notes.append(f"{path}: {self.undecodable} message(s) that do not decode as their schema skipped")
        return notes


def _read_mcap(path: Path) -> _FileRecords:
    out = _FileRecords()
    content = _McapContent(out)
    damage = None
    try:
        with open(path, "rb") as stream:
            size = os.fstat(stream.fileno()).st_size
            stream.seek(len(_MCAP_MAGIC))
            for opcode, record in _framed_records(stream, size, out):
                content.take(opcode, record)
    except _Damage as err:
        damage = str(err)
    except OSError as err:
        damage = f"cannot read on ({err.strerror or err})"
    out.problems.extend(content.notes(path))
    if damage is not None:
        out.problems.append(f"{path}: read up to the damage, {content.messages} messages before it: {damage}")
    return out


def _read_db3(path: Path) -> _FileRecords:
    out = _FileRecords(clean=True)
    schema = Schema(id=1, name=_ARRAY_TYPES[0], encoding="ros2msg", data=FLOAT64_MULTIARRAY_DEFINITION.encode())
    decoder = DecoderFactory().decoder_for("cdr", schema)
    count = 0
    skipped: dict[str, int] = {}
    try:
        connection = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
        try:
            topics = {row[0]: row[1] for row in connection.execute("SELECT id, type FROM topics")}
            wanted = {tid for tid, kind in topics.items() if kind in _ARRAY_TYPES}
            for topic_id, stamp, data in connection.execute(
                    "SELECT topic_id, timestamp, data FROM messages ORDER BY timestamp"):
                if topic_id not in wanted:
                    continue
                problem = _db3_row_problem(stamp, data)
                if problem is None:
                    try:
                        message = decoder(bytes(data))
                        dims = message.layout.dim
                        label, values = (dims[0].label, message.data) if dims else (None, None)
                    except _DECODE_ERRORS:
                        problem = "do not decode"
                if problem is not None:
                    skipped[problem] = skipped.get(problem, 0) + 1
                    continue
                if label is not None:
                    out.add(label, values, stamp, -1)
                    count += 1
        finally:
            connection.close()
    except sqlite3.Error as err:
        out.problems.append(f"{path}: not a readable ROS 2 bag database ({err}); {count} messages read")
    out.problems.extend(f"{path}: {n} message(s) of the conditioning topic skipped: they {problem}"
                        for problem, n in skipped.items())
    return out


def _db3_row_problem(stamp: Any, data: Any) -> str | None:
    """What makes a row of a bag's messages table unusable (SQLite columns hold any type), or None."""
    if data is None:
        return "have no data (NULL)"
    if not isinstance(data, (bytes, bytearray, memoryview)):
        return f"hold {type(data).__name__} instead of bytes"
    if isinstance(stamp, bool) or not isinstance(stamp, int):
        return "have no whole-number timestamp"
    return None


def _read_file(path: Path) -> _FileRecords:
    if path.suffix == ".db3":
        return _read_db3(path)
    try:
        with open(path, "rb") as stream:
            magic = stream.read(len(_MCAP_MAGIC))
    except OSError as err:
        raise LogError(str(path), f"cannot read: {err.strerror or err}") from None
    if magic != _MCAP_MAGIC:
        raise LogError(str(path), "not an MCAP file (no MCAP magic at its start) nor a .db3 bag")
    return _read_mcap(path)


def first_metadata(path: str | Path, name: str, scan: int = 32) -> dict[str, str] | None:
    """The metadata record ``name`` among the first ``scan`` records of an MCAP file.

    Only the file's start is read (a field-log writer puts its identity before any
    message), with the same length checks as :func:`read_logs`.

    Parameters
    ----------
    path : str or pathlib.Path
        A regular file (a FIFO would block: callers list files with :func:`log_files`).
    name : str
        The metadata record's name.
    scan : int
        Records read at most.

    Returns
    -------
    dict of str to str or None
        None: not found, not MCAP, damaged before it or unreadable.
    """
    try:
        with open(path, "rb") as stream:
            if stream.read(len(_MCAP_MAGIC)) != _MCAP_MAGIC:
                return None
            size = os.fstat(stream.fileno()).st_size
            for count, (_, record) in enumerate(_framed_records(stream, size, _FileRecords())):
                if isinstance(record, Metadata) and record.name == name:
                    return dict(record.metadata)
                if count >= scan:
                    return None
    except (_Damage, OSError):
        return None
    return None


def read_logs(paths: Iterable[str | Path]) -> StepLog:
    """Read step records from field logs and bags, joined in time order.

    Parameters
    ----------
    paths : iterable of path
        Files or folders (see :func:`log_files`).

    Returns
    -------
    StepLog

    Raises
    ------
    LogError
        Nothing readable at all, or files recording different layouts (different plants
        or designs: summarise them separately).
    """
    files = log_files(paths)
    parts: list[tuple[Path, _FileRecords]] = []
    problems: list[str] = []
    for path in files:
        records = _read_file(path)
        problems.extend(records.problems)
        if records.foreign_layouts:
            problems.append(f"{path}: {records.foreign_layouts} records of another layout skipped")
        if records.wrong_length:
            problems.append(f"{path}: {records.wrong_length} record(s) with more or fewer values than labels skipped")
        if records.labels is None:
            problems.append(f"{path}: no step records in it")
            continue
        parts.append((path, records))
    if not parts:
        raise LogError(", ".join(str(f) for f in files), "no step records could be read"
                       + (f" ({problems[0]})" if problems else ""))
    labels = parts[0][1].labels
    for path, records in parts[1:]:
        if records.labels != labels:
            raise LogError(str(path), f"records another layout than {parts[0][0]} ({len(records.labels)} vs "
                                      f"{len(labels)} fields); summarise them separately")
    parts.sort(key=lambda item: item[1].log_time[0] if item[1].log_time else math.inf)
    values = np.array([row for _, r in parts for row in r.rows], dtype=float).reshape(-1, len(labels))
    log_time = np.array([v for _, r in parts for v in r.log_time], dtype=float)
    sequence = np.array([v for _, r in parts for v in r.sequence], dtype=np.int64)
    metadata: dict[str, dict[str, str]] = {}
    artifact_text = None
    for _, records in parts:
        metadata.update(records.metadata)
        artifact_text = records.artifact_text or artifact_text
    return StepLog(list(labels), values, log_time, sequence, [str(p) for p, _ in parts], metadata, artifact_text,
                   problems, {str(p): r.clean for p, r in parts})


def metadata_json(log: StepLog, record: str, key: str) -> Any:
    """A metadata value that was written as JSON (None when missing or not JSON)."""
    text = log.metadata.get(record, {}).get(key)
    if text is None:
        return None
    try:
        return json.loads(text)
    except (json.JSONDecodeError, RecursionError):      # nested deeper than the parser goes: kept as text
        return text


def iter_rows(log: StepLog) -> Iterator[dict[str, float]]:
    """Each record as a mapping of label to value."""
    for row in log.values:
        yield dict(zip(log.labels, row))
