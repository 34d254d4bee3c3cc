"""An in-process recorder of a bringup: states, commands, references, conditioning, diagnostics.

Used by ``linz demo`` and by the integration tests to watch the nodes over real DDS. It
keeps every message with its receive time; :meth:`BringupRecorder.run` turns the
recording into a :class:`linz_ros.runtime.SimResult` so the same summary, CSV and plots
as ``linz sim`` apply.
"""

from __future__ import annotations

import contextlib
import math
import time
from dataclasses import dataclass, field
from typing import Any, Callable, Iterator

import numpy as np
import rclpy
from diagnostic_msgs.msg import DiagnosticArray
from rclpy.executors import SingleThreadedExecutor
from rclpy.node import Node
from std_msgs.msg import Float64MultiArray

from linz_ros.artifact import Artifact
from linz_ros.nodes._common import control_qos
from linz_ros.nodes._extension import CompensatorFields
from linz_ros.nodes.adapters import FieldMap, MessageError, stamp_seconds
from linz_ros.runtime import Reference, SimResult
from linz_ros.runtime.steprecord import decode, record_labels

__all__ = ["BringupRecorder", "Recording", "TopicMap", "recording"]


@dataclass
class TopicMap:
    """Topics and message layouts of one bringup (as in its parameter file)."""

    state_topic: str
    state_type: str
    state_fields: list[str]
    command_topic: str
    command_type: str
    command_fields: list[str]
    reference_topic: str
    conditioning_topic: str = "/linz_controller/conditioning"
    compensator_fields: list[str] = field(default_factory=list)   # as the controller's, with a dynamic extension


@dataclass
class Recording:
    """Everything received, each entry ``(receive_time, payload)``."""

    states: list[tuple[float, float | None, list[float]]] = field(default_factory=list)
    commands: list[tuple[float, float | None, list[float]]] = field(default_factory=list)
    references: list[tuple[float, list[float]]] = field(default_factory=list)
    conditioning: list[tuple[float, list[float]]] = field(default_factory=list)
    diagnostics: list[tuple[float, int, str, dict[str, str]]] = field(default_factory=list)
    conditioning_labels: list[str] = field(default_factory=list)   # as the layout of the last record says


class BringupRecorder(Node):
    """Subscribes to a bringup's topics and records them.

    Parameters
    ----------
    artifact : Artifact
        For the vector sizes and names.
    topics : TopicMap
    node_name : str
    """

    def __init__(self, artifact: Artifact, topics: TopicMap, node_name: str = "linz_recorder",
                 context: Any = None, states: bool = True) -> None:
        super().__init__(node_name, context=context)
        self.executor_ = SingleThreadedExecutor(context=context)
        self.executor_.add_node(self)
        self.artifact = artifact
        self.topics = topics
        # messages carry the plant's own states and inputs; a state row is the artifact's states (with a dynamic
        # extension, the compensator's as far as compensator_fields measure them, else nan)
        self.state_map = FieldMap(topics.state_type, topics.state_fields, len(artifact.plant_states), "state_fields")
        self.command_map = FieldMap(topics.command_type, topics.command_fields, len(artifact.plant_inputs),
                                    "command_fields")
        self.compensator = CompensatorFields(artifact, topics.state_type, topics.compensator_fields)
        self.recording = Recording()
        self.callbacks: list[Callable[[str, Any], None]] = []
        qos = control_qos(1000)         # a deep reader queue: a recorder that falls behind loses nothing
        if states:       # the per-step record has outputs, reference and command; these add x for the CSV
            self.create_subscription(self.state_map.cls, topics.state_topic, self._on_state, qos)
            self.create_subscription(self.command_map.cls, topics.command_topic, self._on_command, qos)
            self.create_subscription(Float64MultiArray, topics.reference_topic, self._on_reference, qos)
        self.create_subscription(Float64MultiArray, topics.conditioning_topic, self._on_conditioning, qos)
        self.create_subscription(DiagnosticArray, "/diagnostics", self._on_diagnostics, 50)

    @staticmethod
    def _now() -> float:
        return time.monotonic()

    def _on_state(self, message: Any) -> None:
        self._keep_vector("state", message, self.state_map, self.recording.states, self.compensator)

    def _on_command(self, message: Any) -> None:
        self._keep_vector("command", message, self.command_map, self.recording.commands)

    def _keep_vector(self, kind: str, message: Any, field_map: FieldMap,
                     kept: list[tuple[float, float | None, list[float]]], more: Any = None) -> None:
        """Keep the vector a state or command message carries (nan where it does not read) with its stamp."""
        values = []
        for reader in (field_map, more) if more is not None and more.size else (field_map,):
            try:
                values += reader.read(message)
            except MessageError:
                values += [math.nan] * reader.size
        kept.append((self._now(), stamp_seconds(message), values))
        self._notify(kind, message)

    def _on_reference(self, message: Float64MultiArray) -> None:
        self.recording.references.append((self._now(), list(message.data)))

    def _on_conditioning(self, message: Float64MultiArray) -> None:
        if not self.recording.conditioning and message.layout.dim:
            self.recording.conditioning_labels = message.layout.dim[0].label.split(",")
        self.recording.conditioning.append((self._now(), list(message.data)))
        self._notify("conditioning", message)

    def _on_diagnostics(self, message: DiagnosticArray) -> None:
        for status in message.status:
            if status.name.startswith("linz_ros:"):
                level = status.level[0] if isinstance(status.level, bytes) else int(status.level)
                values = {kv.key: kv.value for kv in status.values}
                self.recording.diagnostics.append((self._now(), level, status.message, values))
                self._notify("diagnostics", status)

    def _notify(self, kind: str, message: Any) -> None:
        for callback in self.callbacks:
            callback(kind, message)

    def spin_for(self, seconds: float, until: Callable[[], bool] | None = None) -> bool:
        """Spin this node for up to ``seconds``; stop early when ``until()`` becomes true.

        Parameters
        ----------
        seconds : float
        until : callable, optional

        Returns
        -------
        bool
            Whether ``until`` became true (True when no condition was given).
        """
        end = time.monotonic() + seconds
        while (left := end - time.monotonic()) > 0:
            self.spin_once(min(0.02, left))
            if until is not None and until():
                return True
        return until is None

    def spin_once(self, timeout: float) -> None:
        """Handle what has arrived, waiting at most ``timeout`` seconds.

        Parameters
        ----------
        timeout : float
        """
        self.executor_.spin_once(timeout_sec=timeout)

    def to_result(self, reference: Reference | None = None) -> SimResult:
        """The recording as a SimResult: one row per conditioning record (one per control step).

        Outputs, reference (``y_ref`` only: its derivatives are nan) and command come from
        the controller's own per-step record, decoded by the labels its layout carries; the
        state is the recorded state message with that stamp (or the latest one received
        before it; nan when states are not recorded).

        Parameters
        ----------
        reference : Reference, optional
            Kept on the result for its description.

        Returns
        -------
        SimResult
        """
        a = self.artifact
        labels = self.recording.conditioning_labels or record_labels(a)
        kept = [(received, data) for received, data in self.recording.conditioning if len(data) == len(labels)]
        steps = decode([data for _, data in kept], labels)
        states = self.recording.states
        stamps = {s[1]: s[2] for s in states if s[1] is not None}
        si = 0
        latest_x = [math.nan] * len(a.states)
        xs = []
        for (received, _), t in zip(kept, steps.t):
            while si < len(states) and states[si][0] <= received:
                latest_x = states[si][2]
                si += 1
            xs.append(list(stamps.get(t, latest_x)))
        x = np.array(xs, dtype=float).reshape(-1, len(a.states))
        return SimResult(artifact=a, reference=reference, notes=["recorded over DDS from the running nodes"],
                         **steps.result_fields(a.relative_degree, x=x))


@contextlib.contextmanager
def recording(artifact: Artifact, topics: TopicMap) -> Iterator[BringupRecorder]:
    """A private rclpy context, a recorder node in it, and a clean shutdown after.

    Parameters
    ----------
    artifact : Artifact
    topics : TopicMap

    Yields
    ------
    BringupRecorder
    """
    context = rclpy.Context()          # its own context: whatever else this process runs is left alone
    rclpy.init(args=[], context=context)
    recorder = BringupRecorder(artifact, topics, context=context)
    try:
        yield recorder
    finally:
        recorder.executor_.shutdown()
        recorder.destroy_node()
        context.try_shutdown()
