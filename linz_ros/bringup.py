"""Start and stop the package's nodes as OS processes, without ``ros2 launch``.

What the launch files do for users with a ROS 2 distribution, this does anywhere rclpy
runs: the same executables with the same parameter files and ``--ros-args``, each with
its own log file, an isolated DDS domain by default (a random ``ROS_DOMAIN_ID`` and
localhost-only discovery, so a demo never talks to a robot on the network), and
cleanup by process group (SIGINT, then SIGTERM, then SIGKILL). ``linz demo`` and the
integration tests use it.
"""

from __future__ import annotations

import os
import random
import shutil
import signal
import subprocess
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping, Sequence

from linz_ros.errors import ConfigError

__all__ = ["EXECUTABLES", "NodeProcess", "Bringup", "executable", "isolated_environment", "node_parameters"]

#: Console scripts of the package and the modules behind them.
EXECUTABLES = {"linz_controller": "linz_ros.nodes.controller", "linz_plant_sim": "linz_ros.nodes.simulator",
               "linz_reference": "linz_ros.nodes.reference"}


def executable(name: str) -> list[str]:
    """The command that starts one of the package's executables.

    The console script beside this Python (a venv's ``bin``, or colcon's
    ``lib/linz_ros``), then one on PATH, then ``python -m`` of its module.

    Parameters
    ----------
    name : str
        One of :data:`EXECUTABLES`.

    Returns
    -------
    list of str
    """
    if name not in EXECUTABLES:
        raise ConfigError("executable", f"unknown executable {name!r}; expected one of {', '.join(EXECUTABLES)}")
    here = Path(sys.executable).parent
    for candidate in (here / name, here.parent / "lib" / "linz_ros" / name):
        if candidate.is_file() and os.access(candidate, os.X_OK):
            return [str(candidate)]
    found = shutil.which(name)
    if found:
        return [found]
    return [sys.executable, "-m", EXECUTABLES[name]]


def isolated_environment(domain_id: int | None = None, base: Mapping[str, str] | None = None,
                         loopback_only: bool = True) -> dict[str, str]:
    """An environment with its own DDS domain and localhost-only discovery.

    Parameters
    ----------
    domain_id : int, optional
        0..101; random when not given.
    base : mapping, optional
        Start from this environment (``os.environ`` by default).
    loopback_only : bool
        Use Fast DDS's UDP transport only (no shared memory), which survives killed nodes.

    Returns
    -------
    dict of str -> str
    """
    env = dict(os.environ if base is None else base)
    if domain_id is None:
        domain_id = random.SystemRandom().randint(1, 101)
    if not 0 <= domain_id <= 101:
        raise ConfigError("domain_id", f"expected 0..101, got {domain_id}")
    env["ROS_DOMAIN_ID"] = str(domain_id)
    env["ROS_AUTOMATIC_DISCOVERY_RANGE"] = "LOCALHOST"
    if loopback_only:
        # UDP over loopback only: Fast DDS's shared-memory segments outlive a node killed with
        # SIGKILL, and a later participant that lands on such a stale port can miss a topic entirely
        env["FASTDDS_BUILTIN_TRANSPORTS"] = "UDPv4"
    env.setdefault("RCUTILS_LOGGING_BUFFERED_STREAM", "1")
    env["PYTHONUNBUFFERED"] = "1"
    return env


@dataclass
class NodeProcess:
    """One started node: its name, command line, process, log file and where its part of the log starts."""

    name: str
    argv: list[str]
    process: subprocess.Popen
    log: Path
    log_start: int = 0

    def alive(self) -> bool:
        """Whether the process still runs."""
        return self.process.poll() is None

    def log_text(self) -> str:
        """Everything this run of the node wrote so far (not earlier runs into the same file)."""
        try:
            with self.log.open("rb") as handle:
                handle.seek(self.log_start)
                return handle.read().decode(errors="replace")
        except OSError:
            return ""


@dataclass
class Bringup:
    """A set of node processes sharing one environment; use as a context manager.

    Parameters
    ----------
    log_dir : str or pathlib.Path
        One ``<name>.log`` per node.
    env : mapping, optional
        Default: :func:`isolated_environment`.
    """

    log_dir: Path
    env: dict[str, str] = field(default_factory=isolated_environment)
    nodes: dict[str, NodeProcess] = field(default_factory=dict)

    def __post_init__(self) -> None:
        self.log_dir = Path(self.log_dir)
        self.log_dir.mkdir(parents=True, exist_ok=True)

    def start(self, name: str, params_file: str | Path | None = None, parameters: Mapping[str, object] | None = None,
              remaps: Mapping[str, str] | None = None, node_name: str | None = None,
              extra: Sequence[str] = ()) -> NodeProcess:
        """Start one executable with ``--ros-args``.

        Parameters
        ----------
        name : str
            Executable (one of :data:`EXECUTABLES`).
        params_file : path, optional
            ``--params-file``.
        parameters : mapping, optional
            ``-p name:=value`` each (lists as YAML, e.g. ``[1.0, 2.0]``).
        remaps : mapping, optional
            ``-r from:=to`` each.
        node_name : str, optional
            ``-r __node:=NAME`` (the key in the parameter file then changes too).
        extra : sequence of str
            More ``--ros-args`` arguments.

        Returns
        -------
        NodeProcess
        """
        argv = executable(name) + ["--ros-args"]
        if params_file is not None:
            argv += ["--params-file", str(params_file)]
        for key, value in (parameters or {}).items():
            argv += ["-p", f"{key}:={_ros_value(value)}"]
        for source, target in (remaps or {}).items():
            argv += ["-r", f"{source}:={target}"]
        if node_name:
            argv += ["-r", f"__node:={node_name}"]
        argv += list(extra)
        return self._spawn(node_name or name, argv)

    def start_module(self, label: str, module: str, arguments: Sequence[str] = ()) -> NodeProcess:
        """Start ``python -m MODULE ARGUMENTS`` with this bringup's environment, log and cleanup.

        For helpers that join the bringup's DDS domain (the demo's listener): they get the
        environment given here, never the starting process's own.

        Parameters
        ----------
        label : str
            The process's name here and of its log file.
        module : str
        arguments : sequence of str

        Returns
        -------
        NodeProcess
        """
        return self._spawn(label, [sys.executable, "-m", module, *arguments])

    def _spawn(self, label: str, argv: list[str]) -> NodeProcess:
        if label in self.nodes and self.nodes[label].alive():
            raise ConfigError("bringup", f"{label} is already running")
        log = self.log_dir / f"{label}.log"
        handle = log.open("ab")
        start = handle.tell()
        process = subprocess.Popen(argv, stdout=handle, stderr=subprocess.STDOUT, env=self.env,
                                   start_new_session=True, preexec_fn=_end_with_parent)
        handle.close()
        node = NodeProcess(label, argv, process, log, start)
        self.nodes[label] = node
        return node

    def stop(self, label: str, timeout: float = 5.0, hard: bool = False) -> int | None:
        """Stop one node: SIGINT (or SIGKILL when ``hard``), then SIGTERM, then SIGKILL.

        Parameters
        ----------
        label : str
        timeout : float
            Seconds to wait after each signal.
        hard : bool
            Kill at once (``kill -9``), as a crash would.

        Returns
        -------
        int or None
            The exit code.
        """
        node = self.nodes.get(label)
        if node is None:
            return None
        for sig in ([signal.SIGKILL] if hard else [signal.SIGINT, signal.SIGTERM, signal.SIGKILL]):
            if not node.alive():
                break
            try:
                os.killpg(node.process.pid, sig)
            except ProcessLookupError:
                break
            try:
                node.process.wait(timeout=timeout)
            except subprocess.TimeoutExpired:
                continue
        return node.process.poll()

    def stop_all(self, timeout: float = 5.0) -> None:
        """Stop every node, the last started first."""
        for label in reversed(list(self.nodes)):
            self.stop(label, timeout)

    def wait_for_log(self, label: str, text: str, timeout: float = 20.0) -> bool:
        """Wait until a node's log contains ``text`` (or it exits, or time runs out).

        Parameters
        ----------
        label : str
        text : str
        timeout : float

        Returns
        -------
        bool
        """
        node = self.nodes[label]
        end = time.monotonic() + timeout
        while time.monotonic() < end:
            if text in node.log_text():
                return True
            if not node.alive():
                return text in node.log_text()
            time.sleep(0.05)
        return False

    def __enter__(self) -> "Bringup":
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop_all()


def node_parameters(params_file: str | Path, node_name: str) -> dict[str, object]:
    """The ``ros__parameters`` of one node in a parameter file (``/name``, ``name`` or ``/**``).

    Parameters
    ----------
    params_file : str or pathlib.Path
    node_name : str

    Returns
    -------
    dict
        The wildcard section's values, overridden by the node's own.

    Raises
    ------
    ConfigError
        For a file that is missing or not a parameter file.
    """
    import yaml

    try:
        document = yaml.safe_load(Path(params_file).read_text())
    except OSError as err:
        raise ConfigError(str(params_file), f"cannot read: {err.strerror}") from None
    except yaml.YAMLError as err:
        raise ConfigError(str(params_file), f"not valid YAML: {str(err).splitlines()[0]}") from None
    if not isinstance(document, dict):
        raise ConfigError(str(params_file), "expected a mapping of /node_name: {ros__parameters: ...}")
    values: dict[str, object] = {}
    for key in ("/**", node_name, f"/{node_name}"):
        section = document.get(key)
        if isinstance(section, dict) and isinstance(section.get("ros__parameters"), dict):
            values.update(section["ros__parameters"])
    return values


def _end_with_parent() -> None:
    """In the child: ask Linux for SIGTERM when the starting thread dies (no orphan nodes).

    Linux ties this to the *thread* that started the child, so start nodes from the main
    thread (or one that lives as long as they should).
    """
    try:
        import ctypes

        libc = ctypes.CDLL("libc.so.6", use_errno=True)
        libc.prctl(1, signal.SIGTERM)      # PR_SET_PDEATHSIG
    except OSError:                        # not Linux: the context manager still stops them
        pass


def _ros_value(value: object) -> str:
    """A value as ``-p name:=VALUE`` text; rclpy reads it as YAML, so strings are quoted."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_ros_value(v) for v in value) + "]"
    if isinstance(value, str):
        return "'" + value.replace("'", "''") + "'"
    return repr(value) if isinstance(value, float) else str(value)
