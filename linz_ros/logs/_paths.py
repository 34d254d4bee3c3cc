"""Which files a log reading takes: files as given, folders searched, each file once."""

from __future__ import annotations

from pathlib import Path
from typing import Iterable

from linz_ros.errors import LinzError

__all__ = ["LogError", "log_files"]


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
            found = sorted(p for p in path.rglob("*") if p.suffix in (".mcap", ".db3") and p.is_file())
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
