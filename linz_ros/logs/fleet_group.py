"""Which files of a fleet make one recording, and what is wrong with the set (:mod:`linz_ros.logs.fleet`).

A recording is the set of files one field-log writer rotated through: those sharing the
machine and the ``recording`` id of their identity record
(:mod:`linz_ros.runtime.recording_identity`). Each identity is checked field by field;
the same file index found twice is read once (identical copies) or said to conflict
(differing copies); missing indexes, files disagreeing on the start and one id on two
machines are problems of the recording. A file without a valid identity (an older log,
a bag) is a recording of its own on machine ``unknown``; the files of one rosbag2 folder
(beside its ``metadata.yaml``) are one.
"""

from __future__ import annotations

import hashlib
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

from linz_ros.logs.reader import first_metadata, log_files
from linz_ros.runtime.recording_identity import IDENTITY_RECORD, UNKNOWN_MACHINE, checked_identity

__all__ = ["Recording", "read_identity", "group_recordings", "UNKNOWN_DAY"]

#: Records read from a file's start in search of its identity (it comes before any message).
IDENTITY_SCAN = 32
#: The day of a recording whose time is not known.
UNKNOWN_DAY = "unknown"
#: Lines listed per kind of problem at most (the rest counted).
_LISTED = 10


@dataclass(frozen=True)
class Recording:
    """One recording of the fleet: what a worker is given.

    Attributes
    ----------
    name : str
        Unique in the fleet; the folder of its reports.
    files : tuple of str
        Absolute paths (a Dask worker must see them at the same paths).
    recording : str or None
        The recording id (None: a file or bag without a valid identity record).
    machine : str
    started : str or None
        The writer's UTC start (ISO 8601), when recorded.
    problems : tuple of str
        What is wrong with the set of files (copies, gaps, identity fields), one line each.
    """

    name: str
    files: tuple[str, ...]
    recording: str | None
    machine: str
    started: str | None
    problems: tuple[str, ...] = ()

    @property
    def day(self) -> str:
        """The UTC day it started (identity ``started``), else :data:`UNKNOWN_DAY`."""
        return self.started[:10] if self.started else UNKNOWN_DAY


def read_identity(path: str | Path) -> dict[str, str] | None:
    """The identity record at the start of a field-log file, as written (None: none, not MCAP, unreadable).

    Parameters
    ----------
    path : str or pathlib.Path

    Returns
    -------
    dict of str to str or None
        Unchecked (see :func:`~linz_ros.runtime.recording_identity.checked_identity`).
    """
    found = first_metadata(path, IDENTITY_RECORD, IDENTITY_SCAN)
    return found if found and found.get("recording") else None


def _safe_name(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]+", "_", text).strip("._")[:80] or "recording"


def _content(path: Path) -> tuple[int, str]:
    digest = hashlib.sha256()
    with open(path, "rb") as stream:
        for block in iter(lambda: stream.read(1 << 20), b""):
            digest.update(block)
    return path.stat().st_size, digest.hexdigest()


def _one_per_index(files: list[tuple[Path, dict[str, str]]]) -> tuple[list[tuple[Path, dict[str, str]]], list[str]]:
    """One file per ``file_index``: identical copies read once, differing ones said to conflict."""
    by_index: dict[str, list[tuple[Path, dict[str, str]]]] = {}
    kept, problems = [], []
    for item in files:
        index = item[1].get("file_index")
        if index is None:
            kept.append(item)
        else:
            by_index.setdefault(index, []).append(item)
    for index, copies in by_index.items():
        if len(copies) > 1:
            contents = {path: _content(path) for path, _ in copies}
            first = max(copies, key=lambda c: (contents[c[0]][0], -len(str(c[0])), str(c[0])))
            copies.sort(key=lambda c: c[0] != first[0])
            for path, _ in copies[1:]:
                if contents[path] == contents[first[0]]:
                    problems.append(f"{path}: an identical copy of {first[0]} (file_index {index}): read once")
                else:
                    problems.append(f"conflicting copies of file_index {index}: {path} ({contents[path][0]} bytes) "
                                    f"differs from {first[0]} ({contents[first[0]][0]} bytes): only the larger read")
        kept.append(copies[0])
    return kept, problems


def _set_problems(files: list[tuple[Path, dict[str, str]]]) -> list[str]:
    """Missing file indexes and files that disagree on the start."""
    indexes = {int(i["file_index"]) for _, i in files if "file_index" in i}
    missing = sorted(set(range(max(indexes) + 1)) - indexes) if indexes else []
    problems = [f"file_index {k} of this recording is missing (not among the files read)" for k in missing[:_LISTED]]
    if len(missing) > _LISTED:
        problems.append(f"... and {len(missing) - _LISTED} more file indexes missing")
    starts = sorted({i["started"] for _, i in files if "started" in i})
    if len(starts) > 1:
        problems.append(f"its files disagree on the start ({', '.join(starts[:3])}): the earliest is used")
    return problems


def _identity_of(path: Path) -> tuple[dict[str, str] | None, list[str]]:
    found = read_identity(path) if path.suffix == ".mcap" else None
    if found is None:
        return None, []
    identity, problems = checked_identity(found)
    return identity, [f"{path}: {p}" for p in problems]


def _group(paths: Sequence[str | Path]) -> tuple[dict[tuple[str, ...], list], dict[tuple[str, ...], list[str]]]:
    groups: dict[tuple[str, ...], list[tuple[Path, dict[str, str]]]] = {}
    notes: dict[tuple[str, ...], list[str]] = {}
    for path in log_files(paths):
        path = path.absolute()
        identity, problems = _identity_of(path)
        if identity is not None:
            key: tuple[str, ...] = ("id", identity["machine"], identity["recording"])
        elif (path.parent / "metadata.yaml").is_file():
            key, identity = ("bag", str(path.parent)), {}
        else:
            key, identity = ("file", str(path)), {}
        groups.setdefault(key, []).append((path, identity))
        notes.setdefault(key, []).extend(problems)
    machines: dict[str, set[str]] = {}
    for key in groups:
        if key[0] == "id":
            machines.setdefault(key[2], set()).add(key[1])
    for key, files in groups.items():
        if key[0] != "id":
            continue
        files[:], copies = _one_per_index(files)
        others = sorted(machines[key[2]] - {key[1]})
        if others:
            copies.append(f"recording id {key[2][:8]} also on machine(s) {', '.join(others)}: kept apart per machine")
        notes[key] += copies + _set_problems(files)
    return groups, notes


def group_recordings(paths: Sequence[str | Path]) -> list[Recording]:
    """The recordings in the log files under ``paths`` (see :func:`~linz_ros.logs.log_files`).

    Parameters
    ----------
    paths : sequence of path

    Returns
    -------
    list of Recording
        In the order of their first file's path; names unique; problems of each set said.

    Raises
    ------
    LogError
        A path that does not exist, a folder without logs, a file given twice.
    """
    groups, notes = _group(paths)
    recordings, taken = [], set()
    for key, files in sorted(groups.items(), key=lambda item: str(min(p for p, _ in item[1]))):
        if key[0] == "id":
            starts = sorted(i["started"] for _, i in files if "started" in i)
            started = starts[0] if starts else None
            stamp = (started or "").replace("-", "").replace(":", "")
            base = _safe_name(f"{key[1]}_{stamp}_{key[2][:8]}")
        else:
            started = None
            base = _safe_name(Path(key[1]).name if key[0] == "bag" else files[0][0].stem)
        name, n = base, 1
        while name in taken:
            n += 1
            name = f"{base}-{n}"
        taken.add(name)
        recordings.append(Recording(name, tuple(sorted(str(p) for p, _ in files)),
                                    key[2] if key[0] == "id" else None,
                                    key[1] if key[0] == "id" else UNKNOWN_MACHINE, started, tuple(notes[key])))
    return recordings
