"""A field log's identity: which recording a file belongs to, which machine wrote it, when.

Every file of a field log starts with the MCAP metadata record :data:`IDENTITY_RECORD`:
``recording`` (a uuid4 hex, the same in every file one writer rotates through),
``machine`` (:func:`default_machine`, or the controller's ``field_log_machine``),
``started`` (the writer's UTC start, ISO 8601) and ``file_index``. ``linz logs --fleet``
groups files into recordings by it; older files without it are each a recording of their
own, on machine :data:`UNKNOWN_MACHINE`.
"""

from __future__ import annotations

import os
import re
import socket
import time
import uuid

from linz_ros.errors import ConfigError

__all__ = ["IDENTITY_RECORD", "MACHINE_ENV", "MACHINE_MAX", "UNKNOWN_MACHINE", "default_machine", "check_machine",
           "new_identity", "checked_identity"]

IDENTITY_RECORD = "linz_identity"
#: The environment variable naming this machine in field logs (else its host name).
MACHINE_ENV = "LINZ_MACHINE"
#: Longest machine name recorded.
MACHINE_MAX = 64
#: The machine of a log without an identity record.
UNKNOWN_MACHINE = "unknown"
#: The shapes accepted when an identity is read back (a uuid4 hex is written; a copy may be edited).
_RECORDING_SHAPE = re.compile(r"[0-9A-Za-z_-]{1,64}")
_STARTED_SHAPE = re.compile(r"\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}Z")
_INDEX_SHAPE = re.compile(r"\d{1,6}")


def check_machine(name: object, option: str) -> str:
    """The machine name, checked: printable, 1 to :data:`MACHINE_MAX` characters.

    Parameters
    ----------
    name : object
    option : str
        Named in the error (the parameter or environment variable it came from).

    Returns
    -------
    str

    Raises
    ------
    ConfigError
    """
    if not (isinstance(name, str) and name.strip() and name.isprintable() and len(name) <= MACHINE_MAX):
        raise ConfigError(option, f"{str(name)!r:.80}: expected a printable machine name of 1 to {MACHINE_MAX} "
                                  "characters")
    return name


def default_machine() -> str:
    """This machine's name for field logs: :data:`MACHINE_ENV` when set, else the host name.

    Returns
    -------
    str
        A host name is cut to :data:`MACHINE_MAX` printable characters.

    Raises
    ------
    ConfigError
        :data:`MACHINE_ENV` set to an empty, unprintable or too long name.
    """
    given = os.environ.get(MACHINE_ENV)
    if given is not None:
        return check_machine(given, MACHINE_ENV)
    name = "".join(c for c in socket.gethostname() if c.isprintable()).strip()[:MACHINE_MAX]
    return name or UNKNOWN_MACHINE


def new_identity(machine: str, started: float) -> dict[str, str]:
    """A new recording's identity (without ``file_index``, added per file).

    Parameters
    ----------
    machine : str
    started : float
        UTC seconds since the epoch.

    Returns
    -------
    dict of str to str
    """
    return {"recording": uuid.uuid4().hex, "machine": machine,
            "started": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(started))}


def _valid_started(text: str) -> bool:
    if not _STARTED_SHAPE.fullmatch(text):
        return False
    try:
        time.strptime(text, "%Y-%m-%dT%H:%M:%SZ")
    except ValueError:
        return False
    return True


def checked_identity(found: dict[str, str]) -> tuple[dict[str, str] | None, list[str]]:
    """An identity read back from a file, each field checked; what fails is said, one line each.

    Parameters
    ----------
    found : dict of str to str
        The identity record's metadata as read.

    Returns
    -------
    tuple of (dict or None, list of str)
        ``recording``, ``machine`` (:data:`UNKNOWN_MACHINE` when not a valid name),
        ``started`` and ``file_index`` (left out when not valid); None when the recording id
        itself is missing or malformed (the file is then a recording of its own). The
        problems quote the bad values escaped (``repr``), never raw.
    """
    problems = []
    recording = found.get("recording", "")
    if not _RECORDING_SHAPE.fullmatch(recording):
        problems.append(f"identity: recording id {recording[:80]!r} is malformed: the file is read on its own")
        return None, problems
    out = {"recording": recording}
    try:
        out["machine"] = check_machine(found.get("machine"), "identity machine")
    except ConfigError:
        out["machine"] = UNKNOWN_MACHINE
        problems.append(f"identity: machine {str(found.get('machine'))[:80]!r} is not a printable name of 1 to "
                        f"{MACHINE_MAX} characters: read as {UNKNOWN_MACHINE}")
    for key, valid in (("started", _valid_started), ("file_index", _INDEX_SHAPE.fullmatch)):
        value = found.get(key)
        if value is not None and valid(value):
            out[key] = value
        elif value is not None:
            problems.append(f"identity: {key} {value[:80]!r} is malformed: left out")
    return out, problems
