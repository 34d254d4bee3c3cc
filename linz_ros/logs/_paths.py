"""Which files a log reading takes: files as given, folders searched, each file once."""

from __future__ import annotations

import os
import stat
from pathlib import Path
from typing import Iterable

from linz_ros.errors import LinzError

__all__ = ["LogError", "log_files", "irregular_entries"]

#: What a log file is named like.
LOG_SUFFIXES = (".mcap", ".db3")


class LogError(LinzError):
    """A log file or folder that cannot be read at all (nothing usable in it)."""

    def __init__(self, source: str, problem: str) -> None:
        self.source, self.problem = source, problem
        super().__init__(f"{source}: {problem}")



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
            found = sorted(p for p in path.rglob("*") if p.suffix in LOG_SUFFIXES and p.is_file())
            if not found:
                raise LogError(str(path), "no .mcap or .db3 files in this folder")
            files.extend(found)
        elif path.is_file():
            files.append(path)
        elif path.exists():
            raise LogError(str(path), "not a regular file or folder")
        else:
            raise LogError(str(path), "no such file or folder")
    seen: dict[Path, Path] = {}
    for path in files:
        if seen.setdefault(path.resolve(), path) is not path:
            raise LogError(str(path), f"given twice (also as {seen[path.resolve()]}): each file is read once")
    return files


def _what_it_is(path: Path) -> str:
    """What an entry that is not a regular file is, told from its status alone (never opened)."""
    try:
        mode = os.stat(path).st_mode
    except OSError:
        return "a broken symbolic link" if path.is_symlink() else "not readable"
    kinds = ((stat.S_ISFIFO, "a named pipe (FIFO)"), (stat.S_ISSOCK, "a socket"), (stat.S_ISCHR, "a device"),
             (stat.S_ISBLK, "a device"))
    return next((word for test, word in kinds if test(mode)), "not a regular file")


def irregular_entries(paths: Iterable[str | Path]) -> list[tuple[Path, str]]:
    """Entries named like logs in the folders of ``paths`` that :func:`log_files` leaves out.

    Broken symbolic links, named pipes, sockets and devices ending in ``.mcap`` or
    ``.db3`` are told apart by their status only: none is opened (a pipe would block).

    Parameters
    ----------
    paths : iterable of path

    Returns
    -------
    list of (pathlib.Path, str)
        Each entry and what it is, in path order.
    """
    found = []
    for raw in paths:
        path = Path(raw).expanduser()
        if path.is_dir():
            found += [(p, _what_it_is(p)) for p in sorted(path.rglob("*"))
                      if p.suffix in LOG_SUFFIXES and not p.is_file() and not p.is_dir()]
    return found
