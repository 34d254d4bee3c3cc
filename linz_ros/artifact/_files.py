"""The files an artifact is read from or names, read safely: only regular files, never more than
the size limit, in blocks; JSON with every number finite; and the comparison of the plant file
recorded at build time, which is only a hint (a resealed artifact may name any path)."""

from __future__ import annotations

import hashlib
import json
import math
import os
import stat
from pathlib import Path
from typing import Any, Iterator

from linz_ros.errors import ArtifactError

__all__ = ["parse_json", "read_bounded", "bounded_sha256", "check_plant_file", "recorded_plant_paths"]

_MAX_BYTES = 64_000_000       # an artifact, a plant file compared with it
_BLOCK = 1 << 20


def _refuse_constant(name: str) -> float:
    raise ValueError(f"non-finite number {name} in the file")


def _finite_float(text: str) -> float:
    value = float(text)
    if not math.isfinite(value):
        raise ValueError(f"number {text} in the file is out of range")
    return value


def _bounded_int(text: str) -> int:
    if len(text.lstrip("-")) > 15:
        raise ValueError(f"whole number {text[:20]} in the file is out of range")
    return int(text)


def parse_json(text: str) -> Any:
    """JSON with every number finite and every whole number of at most 15 digits."""
    try:
        return json.loads(text, parse_constant=_refuse_constant, parse_float=_finite_float, parse_int=_bounded_int)
    except RecursionError:
        raise ValueError("arrays or mappings nested too deeply") from None


def _open_regular(path: Path, source: str) -> int:
    """A descriptor of ``path``, refusing anything but a regular file of at most the size limit.

    Opened without blocking (a FIFO or a device put in a file's place never hangs the
    load) and checked on the open descriptor, so the file cannot be swapped in between.
    """
    try:
        mode = path.stat().st_mode
        if stat.S_ISREG(mode):                          # devices are never opened: opening some acts
            descriptor = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_NOCTTY", 0))
    except FileNotFoundError:
        raise ArtifactError(source, "no such file") from None
    except OSError as err:
        raise ArtifactError(source, f"cannot read: {err.strerror or err}") from None
    except ValueError as err:                           # a NUL byte in the name
        raise ArtifactError(source, f"cannot read: {err}") from None
    if not stat.S_ISREG(mode):
        raise ArtifactError(source, "is a folder, not a file" if stat.S_ISDIR(mode) else "is not a regular file")
    info = os.fstat(descriptor)
    if not stat.S_ISREG(info.st_mode) or info.st_size > _MAX_BYTES:
        os.close(descriptor)
        raise ArtifactError(source, "is not a regular file" if not stat.S_ISREG(info.st_mode)
                            else f"larger than {_MAX_BYTES // 1_000_000} MB")
    return descriptor


def _bounded_blocks(path: Path, source: str) -> Iterator[bytes]:
    """The file's bytes in blocks (see :func:`_open_regular`); at most the size limit, whatever the
    file says its size is (files under /proc say 0)."""
    with os.fdopen(_open_regular(path, source), "rb", buffering=0) as handle:
        total = 0
        while True:
            try:
                block = handle.read(_BLOCK)
            except OSError as err:
                raise ArtifactError(source, f"cannot read: {err.strerror or err}") from None
            if not block:
                return
            total += len(block)
            if total > _MAX_BYTES:
                raise ArtifactError(source, f"larger than {_MAX_BYTES // 1_000_000} MB")
            yield block


def read_bounded(path: Path, source: str) -> bytes:
    """The file's bytes, refusing anything but a regular file of at most the size limit."""
    return b"".join(_bounded_blocks(path, source))


def bounded_sha256(path: Path, source: str) -> str:
    """SHA-256 of a regular file of at most the size limit, read in blocks (never whole)."""
    digest = hashlib.sha256()
    for block in _bounded_blocks(path, source):
        digest.update(block)
    return digest.hexdigest()


def check_plant_file(document: dict[str, Any], source: str, plant_path: str | Path | None,
                      allow_plant_change: bool) -> str:
    """Compare the plant file with the hash recorded at build time.

    A plant file given by the caller must be readable: anything else is an
    ``ArtifactError``. The recorded locations are only hints (a deployed artifact travels
    without its plant file, and a resealed one may name any path): the first that exists
    is compared, and one that cannot be read (not a regular file, too large, an I/O error)
    is reported as "cannot be read (...); not compared", never read whole or followed
    into a device.
    """
    plant = document["plant"]
    recorded = plant.get("source_sha256")
    if plant_path is not None:
        where = str(plant_path)
        try:
            digest = bounded_sha256(Path(plant_path), where)
        except ArtifactError as err:
            problem = " not found" if err.problem == "no such file" else f": {err.problem}"
            raise ArtifactError(source, f"plant file {where}{problem}") from None
        return _compare_plant(digest, recorded, where, source, allow_plant_change)
    for candidate in recorded_plant_paths(plant, source):
        try:
            digest = bounded_sha256(candidate, str(candidate))
        except ArtifactError as err:
            if err.problem == "no such file":
                continue
            return f"plant file {candidate} cannot be read ({err.problem}); not compared"
        return _compare_plant(digest, recorded, str(candidate), source, allow_plant_change)
    return "plant file not found; not compared"


def recorded_plant_paths(plant: dict[str, Any], source: str) -> list[Path]:
    # beside the artifact as it was at build time, then where it was built; never
    # relative to the current folder, which may hold an unrelated file of that name
    candidates: list[Path] = []
    relative = plant.get("source_from_artifact")
    if isinstance(relative, str) and relative:
        candidates.append(Path(source).resolve().parent / relative)    # the artifact was read: it resolves
    absolute = plant.get("source_absolute")
    if isinstance(absolute, str) and os.path.isabs(absolute):
        candidates.append(Path(absolute))
    return candidates


def _compare_plant(digest: str, recorded: Any, where: str, source: str, allow_plant_change: bool) -> str:
    if digest == recorded:
        return "matches"
    if allow_plant_change:
        return f"plant file {where} changed since the build (allowed)"
    raise ArtifactError(source, f"the plant file {where} has changed since this artifact was built; "
                                "rebuild with linz build, or accept it with --allow-plant-change")
