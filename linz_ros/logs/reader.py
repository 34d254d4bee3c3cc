"""Reading field logs and bags of the conditioning topic into one table of step records.

Accepted: the controller's field-log files (MCAP), ROS 2 bags holding the controller's
conditioning topic (a bag folder, or its ``.mcap`` or ``.db3`` files), and several of
either, which are joined in time order when they record the same layout. A damaged or
truncated file is read up to the damage; what was lost is said in
:attr:`StepLog.problems`, one line each.
"""

from __future__ import annotations

import json
import math
import sqlite3
import struct
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Iterator

import numpy as np
from mcap.exceptions import McapError
from mcap.records import Attachment, Channel, Chunk, Message, Metadata, Schema
from mcap.stream_reader import StreamReader, breakup_chunk
from mcap_ros2.decoder import DecoderFactory

from linz_ros.errors import LinzError
from linz_ros.runtime.fieldlog import FIELD_LOG_TOPIC, FLOAT64_MULTIARRAY_DEFINITION

__all__ = ["LogError", "StepLog", "read_logs", "log_files"]

#: A labelled array is a step record when its labels start with these.
_RECORD_HEAD = ("t", "sigma_min", "condition", "mode", "reason")
_ARRAY_TYPES = ("std_msgs/msg/Float64MultiArray", "std_msgs/Float64MultiArray")
_ARTIFACT_ATTACHMENT = "artifact.json"
_READ_ERRORS = (McapError, struct.error, EOFError, ValueError, KeyError, IndexError, RuntimeError, OSError,
                MemoryError)


class LogError(LinzError):
    """A log file or folder that cannot be read at all (nothing usable in it)."""

    def __init__(self, source: str, problem: str) -> None:
        self.source, self.problem = source, problem
        super().__init__(f"{source}: {problem}")


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


def log_files(paths: Iterable[str | Path]) -> list[Path]:
    """The log files named by ``paths``: files as given, folders searched for .mcap and .db3.

    Parameters
    ----------
    paths : iterable of path

    Returns
    -------
    list of Path

    Raises
    ------
    LogError
        A path that does not exist, or a folder with no log files in it.
    """
    files: list[Path] = []
    for raw in paths:
        path = Path(raw).expanduser()
        if path.is_dir():
            found = sorted(p for p in path.rglob("*") if p.suffix in (".mcap", ".db3") and p.is_file())
            if not found:
                raise LogError(str(path), "no .mcap or .db3 files in this folder")
            files.extend(found)
        elif path.is_file():
            files.append(path)
        else:
            raise LogError(str(path), "no such file or folder")
    return files


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
            self.problems.append(f"a record of {len(data)} values for {len(labels)} labels skipped")
            return
        self.rows.append(tuple(data))
        self.log_time.append(log_time_ns * 1e-9)
        self.sequence.append(sequence)


def _read_mcap(path: Path) -> _FileRecords:
    out = _FileRecords()
    schemas: dict[int, Schema] = {}
    channels: dict[int, tuple[Channel, Any]] = {}
    factory = DecoderFactory()
    count = 0
    damaged_chunks = 0

    def records(stream) -> Iterator[Any]:
        nonlocal damaged_chunks
        for record in StreamReader(stream, emit_chunks=True, record_size_limit=2**30).records:
            if not isinstance(record, Chunk):
                yield record
                continue
            try:
                inner = breakup_chunk(record, validate_crc=True)
            except _READ_ERRORS:       # a damaged chunk whose length is intact: skip it, read on
                damaged_chunks += 1
                continue
            yield from inner

    try:
        with open(path, "rb") as stream:
            for record in records(stream):
                if isinstance(record, Schema):
                    schemas[record.id] = record
                elif isinstance(record, Channel):
                    schema = schemas.get(record.schema_id)
                    decoder = None
                    if schema is not None and schema.name in _ARRAY_TYPES:
                        decoder = factory.decoder_for(record.message_encoding, schema)
                    channels[record.id] = (record, decoder)
                elif isinstance(record, Message):
                    channel, decoder = channels.get(record.channel_id, (None, None))
                    if decoder is None:
                        continue
                    message = decoder(record.data)
                    dims = message.layout.dim
                    if dims:
                        sequence = record.sequence if channel.topic == FIELD_LOG_TOPIC else -1
                        out.add(dims[0].label, message.data, record.log_time, sequence)
                        count += 1
                elif isinstance(record, Metadata):
                    out.metadata[record.name] = dict(record.metadata)
                    if record.name == "linz_recording" and record.metadata.get("closed") == "clean":
                        out.clean = True
                elif isinstance(record, Attachment) and record.name == _ARTIFACT_ATTACHMENT:
                    out.artifact_text = record.data.decode("utf-8", errors="replace")
    except _READ_ERRORS as err:
        what = str(err).splitlines()[0] if str(err) else type(err).__name__
        if isinstance(err, (EOFError, struct.error)) or "EndOfFile" in type(err).__name__:
            what = "the file ends in the middle of a record (truncated, e.g. cut by a crash)"
        out.problems.append(f"{path}: read up to the damage, {count} messages before it: {what}")
    if damaged_chunks:
        out.problems.append(f"{path}: {damaged_chunks} damaged chunk(s) skipped (checksum mismatch); "
                            "the records in them are missing")
    return out


def _read_db3(path: Path) -> _FileRecords:
    out = _FileRecords(clean=True)
    schema = Schema(id=1, name=_ARRAY_TYPES[0], encoding="ros2msg", data=FLOAT64_MULTIARRAY_DEFINITION.encode())
    decoder = DecoderFactory().decoder_for("cdr", schema)
    count = 0
    try:
        connection = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
        try:
            topics = {row[0]: row[1] for row in connection.execute("SELECT id, type FROM topics")}
            wanted = [tid for tid, kind in topics.items() if kind in _ARRAY_TYPES]
            for topic_id, stamp, data in connection.execute(
                    "SELECT topic_id, timestamp, data FROM messages ORDER BY timestamp"):
                if topic_id not in wanted:
                    continue
                try:
                    message = decoder(bytes(data))
                except _READ_ERRORS:
                    out.problems.append(f"{path}: a message that does not decode was skipped")
                    continue
                if message.layout.dim:
                    out.add(message.layout.dim[0].label, message.data, int(stamp), -1)
                    count += 1
        finally:
            connection.close()
    except sqlite3.Error as err:
        out.problems.append(f"{path}: not a readable ROS 2 bag database ({err}); {count} messages read")
    return out


def _read_file(path: Path) -> _FileRecords:
    if path.suffix == ".db3":
        return _read_db3(path)
    with open(path, "rb") as stream:
        magic = stream.read(8)
    if magic != b"\x89MCAP0\r\n":
        raise LogError(str(path), "not an MCAP file (no MCAP magic at its start) nor a .db3 bag")
    return _read_mcap(path)


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
    except json.JSONDecodeError:
        return text


def iter_rows(log: StepLog) -> Iterator[dict[str, float]]:
    """Each record as a mapping of label to value."""
    for row in log.values:
        yield dict(zip(log.labels, row))
