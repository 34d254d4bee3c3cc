"""Helpers shared by the nodes: parameter declaration, the safety notice, spinning, entry points."""

from __future__ import annotations

import signal
import sys
import threading
from typing import Any, Callable, Sequence

import rclpy
from rclpy.signals import SignalHandlerOptions
from rcl_interfaces.msg import FloatingPointRange, IntegerRange, ParameterDescriptor, ParameterType
from rclpy.executors import ExternalShutdownException, SingleThreadedExecutor
from rclpy.exceptions import (InvalidParameterTypeException, InvalidParameterValueException, NameValidationException,
                              ParameterException)
from rclpy.impl.implementation_singleton import rclpy_implementation as _rclpy
from rclpy.node import Node
from rclpy.parameter import Parameter
from rclpy.qos import HistoryPolicy, QoSProfile, ReliabilityPolicy

from linz_ros.errors import ConfigError, LinzError

__all__ = ["SAFETY_NOTICE", "declare", "control_qos", "spin_node", "entry_point", "EXECUTORS"]

SAFETY_NOTICE = (
    "SAFETY: a feedback-linearizing law cancels the dynamics it was told about; model error, saturation "
    "and singularities can make it push hard in the wrong direction. Run it in simulation first, keep a "
    "hardware emergency stop that does not depend on this software, and follow the machine's risk "
    "assessment, its safety functions, local codes and licensed engineering practice.")

EXECUTORS = ("single_threaded", "events")
RCLError = _rclpy.RCLError
#: What a user's mistake in parameters, names or files raises while a node is built.
_STARTUP_MISTAKES = (LinzError, RCLError, NameValidationException, ParameterException)

_TYPES = {bool: ParameterType.PARAMETER_BOOL, int: ParameterType.PARAMETER_INTEGER,
          float: ParameterType.PARAMETER_DOUBLE, str: ParameterType.PARAMETER_STRING}


def declare(node: Node, name: str, default: Any, description: str, read_only: bool = False,
            minimum: float | None = None, maximum: float | None = None, array_of: type | None = None) -> Any:
    """Declare one parameter with a descriptor (type, description, range) and return its value.

    Parameters
    ----------
    node : rclpy.node.Node
    name : str
    default : object
        Its type fixes the parameter's type (lists need ``array_of``).
    description : str
    read_only : bool
        May not change after start-up (topics, the artifact).
    minimum, maximum : float, optional
        Range of a double or integer parameter.
    array_of : type, optional
        Element type of an array parameter (float or str).

    Returns
    -------
    object
        The value after overrides from the parameter file and the command line.
    """
    descriptor = ParameterDescriptor(description=description, read_only=read_only)
    value: Any = default
    if array_of is not None:
        descriptor.type = {float: ParameterType.PARAMETER_DOUBLE_ARRAY,
                           str: ParameterType.PARAMETER_STRING_ARRAY}[array_of]
        if not default:
            # an empty list would be typed as a byte array: declare the type, unset
            value = {float: Parameter.Type.DOUBLE_ARRAY, str: Parameter.Type.STRING_ARRAY}[array_of]
    else:
        descriptor.type = _TYPES[type(default)]
    if (minimum is not None or maximum is not None) and type(default) is int:
        descriptor.integer_range = [IntegerRange(
            from_value=int(minimum) if minimum is not None else -2**63,
            to_value=int(maximum) if maximum is not None else 2**63 - 1, step=1)]
    elif minimum is not None or maximum is not None:
        descriptor.floating_point_range = [FloatingPointRange(
            from_value=float(minimum if minimum is not None else -1e308),
            to_value=float(maximum if maximum is not None else 1e308), step=0.0)]
    try:
        result = node.declare_parameter(name, value, descriptor).value
    except (InvalidParameterTypeException, InvalidParameterValueException) as err:
        raise ConfigError(name, _first_line(err)) from None
    if result is None:
        return list(default)
    return list(result) if array_of is not None else result


def _first_line(err: Exception) -> str:
    return str(err).splitlines()[0] if str(err) else type(err).__name__


def control_qos(depth: int = 10) -> QoSProfile:
    """Reliable, keep-last QoS for state, command and reference topics.

    Parameters
    ----------
    depth : int

    Returns
    -------
    rclpy.qos.QoSProfile
    """
    return QoSProfile(depth=depth, reliability=ReliabilityPolicy.RELIABLE, history=HistoryPolicy.KEEP_LAST)


def _program() -> str:
    import os

    return os.path.basename(sys.argv[0]) or "linz_ros"


def spin_node(make_node: Callable[[], Node], args: Sequence[str] | None, executor_name: str | None = None) -> int:
    """Initialise rclpy, spin one node until SIGINT or SIGTERM, and shut down cleanly.

    rclpy's own signal handlers are replaced by ours, which only ask the spin loop to
    stop: the context stays valid, so the node can still publish its safe command in
    ``shutdown_safely`` before rclpy shuts down.

    Parameters
    ----------
    make_node : callable
        Builds the node (after ``rclpy.init``); a :class:`LinzError` from it is printed
        as one line and gives exit code 2.
    args : sequence of str, optional
        Command-line arguments (``--ros-args ...`` is parsed by rclpy).
    executor_name : str, optional
        ``single_threaded`` (default) or ``events``; overrides the node's ``executor`` parameter.

    Returns
    -------
    int
        The exit code.
    """
    stop = threading.Event()
    try:
        rclpy.init(args=list(args) if args is not None else sys.argv, signal_handler_options=SignalHandlerOptions.NO)
    except RCLError as err:                 # e.g. a parameter file that cannot be parsed
        print(f"{_program()}: {_first_line(err)}", file=sys.stderr)
        return 2
    previous = {sig: signal.signal(sig, lambda *_: stop.set()) for sig in (signal.SIGINT, signal.SIGTERM)}
    node = None
    try:
        try:
            node = make_node()
        except _STARTUP_MISTAKES as err:    # a bad parameter, topic name or artifact: one line, exit 2
            print(f"{_program()}: {_first_line(err)}", file=sys.stderr)
            return 2
        choice = executor_name or (node.get_parameter("executor").value if node.has_parameter("executor")
                                   else "single_threaded")
        if choice not in EXECUTORS:
            print(f"{_program()}: executor: expected one of {', '.join(EXECUTORS)}, got {choice!r}", file=sys.stderr)
            return 2
        if choice == "events":
            from rclpy.experimental import EventsExecutor

            executor = EventsExecutor()
        else:
            executor = SingleThreadedExecutor()
        executor.add_node(node)
        while not stop.is_set() and rclpy.ok():
            executor.spin_once(timeout_sec=0.1)
    except (KeyboardInterrupt, ExternalShutdownException):
        pass
    finally:
        if node is not None:
            shutdown = getattr(node, "shutdown_safely", None)
            if shutdown is not None and rclpy.ok():
                shutdown()
            node.destroy_node()
        if rclpy.ok():
            rclpy.shutdown()
        for sig, handler in previous.items():
            signal.signal(sig, handler)
    return 0


def entry_point(make_node: Callable[[], Node], command: str) -> Callable[[Sequence[str] | None], int]:
    """The console entry point ``main(args=None)`` of a node's executable: :func:`spin_node` on it.

    Parameters
    ----------
    make_node : callable
        Builds the node (its class).
    command : str
        The executable's name, for the entry point's docstring.

    Returns
    -------
    callable
        ``main(args: sequence of str or None) -> int``, the exit code (``--ros-args ...`` accepted).
    """

    def main(args: Sequence[str] | None = None) -> int:
        return spin_node(make_node, args)

    main.__doc__ = (f"Console entry point ``{command}`` (accepts ``--ros-args ...``); returns the exit code "
                    "(see :func:`linz_ros.nodes._common.spin_node`).")
    return main
