"""The managed controller node: state in, linearizing command out, watchdogs and diagnostics.

Lifecycle: ``configure`` loads and verifies the artifact and builds the core and the
topics (refusing with a logged reason), ``activate`` starts commanding, ``deactivate``
publishes the safe command once and stops, ``cleanup`` releases everything. With
``autostart`` the node configures and activates itself.

Topics (names are parameters): state in (JointState, Odometry or Float64MultiArray),
command out (Float64MultiArray, JointState efforts, Wrench or Twist), reference in
(Float64MultiArray ``[y1, y1', ..., y1^(r1), y2, ...]``) unless a built-in reference is
chosen, ``~/conditioning`` (one labelled Float64MultiArray per step) and
``/diagnostics`` (about once a second).
"""

from __future__ import annotations

import gc
import math
import statistics
import time
from collections import deque
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

import numpy as np
from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus, KeyValue
from rcl_interfaces.msg import SetParametersResult
from rclpy.clock import Clock, ClockType
from rclpy.lifecycle import LifecycleNode, LifecycleState, TransitionCallbackReturn
from std_msgs.msg import Float64MultiArray

from linz_ros.artifact import MAX_WATCHDOG_SECONDS, WATCHDOG_SETTINGS, load_artifact, watchdog_problem
from linz_ros.artifact.watchdog import RUNTIME_SETTINGS, setting_problem
from linz_ros.artifact.watchdog import setting as watchdog_setting
from linz_ros.errors import LinzError
from linz_ros.nodes._common import EXECUTORS, SAFETY_NOTICE, control_qos, declare, spin_node
from linz_ros.nodes.adapters import (COMMAND_TYPES, STATE_TYPES, FieldMap, MessageError, labelled_array,
                                     message_class, set_stamp, stamp_seconds)
from linz_ros.runtime import MODES, ControllerCore, WatchdogConfig, extrapolate_reference, parse_reference
from linz_ros.runtime.closed_loop import initial_outputs
from linz_ros.runtime.fieldlog import (CONDITIONING_FIELDS, FieldLogSettings, FieldLogWriter, conditioning_labels,
                                       conditioning_values, open_field_log)

__all__ = ["ControllerNode", "main", "CONDITIONING_FIELDS", "DiagnosticWindow"]

#: Watchdog settings that may change while the node is active (the table says which).
DYNAMIC = RUNTIME_SETTINGS
_UNSET = -1.0
#: Watchdog settings declared from the table; future_tolerance and safe_command have node rules of their own.
_TABLE_PARAMETERS = tuple(row for row in WATCHDOG_SETTINGS if row.name not in ("future_tolerance", "safe_command"))
#: In simulated time a state may be stamped ahead of the last /clock this node has handled.
SIM_TIME_FUTURE_TOLERANCE = 0.5
#: In simulated time, wall seconds without a state before the safe command, at the least: a slow
#: simulator holds simulated time still, and its next state is not late in it.
SIM_TIME_NO_STATE_TIMEOUT = 0.5


@dataclass
class DiagnosticWindow:
    """What happened since the last diagnostics message."""

    started: float
    steps: int = 0
    min_sigma: float = math.inf
    max_condition: float = 0.0
    saturated: int = 0
    warned: int = 0
    modes: dict[str, int] = field(default_factory=lambda: {m: 0 for m in MODES})
    rejected: int = 0
    stale: int = 0
    singular: int = 0
    reference_stale: int = 0
    reference_missing: int = 0
    publish_failures: int = 0
    unstamped: int = 0                 # states whose header stamp was zero (judged by arrival)
    outside_envelope: int = 0          # steps outside the widened envelope (acted on or not)
    diverging: int = 0                 # steps the divergence watchdog flagged
    compute: list[float] = field(default_factory=list)

    def add(self, record) -> None:
        """Count one step's record."""
        self.steps += 1
        self.modes[record.mode] += 1
        self.singular += record.reason == "singular"
        if math.isfinite(record.sigma_min):
            self.min_sigma = min(self.min_sigma, record.sigma_min)
        if math.isfinite(record.condition):
            self.max_condition = max(self.max_condition, record.condition)
        elif record.condition == math.inf:
            self.max_condition = math.inf
        self.saturated += any(record.saturated)
        self.warned += record.warn
        if record.alarms:
            self.outside_envelope += record.alarms & 1
            self.diverging += record.alarms >> 1 & 1
        self.compute.append(record.compute_time)

    def level(self) -> tuple[bytes, str]:
        """OK, WARN or ERROR with a one-line summary.

        ERROR when any step sent the safe (or held) command: singular, stale or rejected
        state; WARN when near singular (damped or under the warn level), saturating, or
        holding because the reference stalled; OK otherwise.
        """
        if self.publish_failures:
            return DiagnosticStatus.ERROR, f"{self.publish_failures} message(s) refused by the middleware"
        if self.modes["stopping"]:
            return DiagnosticStatus.ERROR, (f"controlled stop: outside the envelope {self.outside_envelope}x; "
                                            "holding the outputs until the state is back inside the envelope")
        if self.modes["safe"] or self.modes["held"]:
            why = [f"{label} {count}x" for label, count in (("diverging", self.diverging),
                                                            ("outside the envelope", self.outside_envelope),
                                                            ("singular", self.singular), ("state stale", self.stale),
                                                            ("state rejected", self.rejected)) if count]
            return DiagnosticStatus.ERROR, "safe command sent: " + (", ".join(why) or "safe command")
        why = [f"{label} {count}x (warn only)" for label, count in (("diverging", self.diverging),
                                                                   ("outside the envelope", self.outside_envelope))
               if count]
        if self.modes["damped"]:
            why.append("near singular: damped")
        elif self.warned:
            why.append("sigma_min under the warn level")
        if self.saturated:
            why.append("saturating")
        if self.reference_stale:
            why.append("reference stale: holding")
        if self.reference_missing:
            why.append("no reference received: holding")
        if why:
            return DiagnosticStatus.WARN, ", ".join(why)
        if self.steps == 0:
            return DiagnosticStatus.WARN, "active, but no state received"
        return DiagnosticStatus.OK, "nominal"

    def values(self, now: float) -> list[KeyValue]:
        """Key values of the window."""
        span = max(now - self.started, 1e-9)
        p99 = float(np.percentile(self.compute, 99)) * 1e6 if self.compute else math.nan
        pairs = [("window_min_sigma", self.min_sigma if self.steps else math.nan),
                 ("max_condition", self.max_condition if self.steps else math.nan),
                 ("saturated_fraction", self.saturated / self.steps if self.steps else 0.0),
                 ("stale_count", self.stale), ("rejected_count", self.rejected),
                 ("reference_stale_count", self.reference_stale),
                 ("reference_missing_count", self.reference_missing),
                 ("publish_failures", self.publish_failures), ("unstamped_count", self.unstamped),
                 ("outside_envelope_count", self.outside_envelope), ("diverging_count", self.diverging),
                 ("loop_rate_hz", self.steps / span), ("compute_time_p99_us", p99)]
        pairs += [(f"mode_{m}", c) for m, c in self.modes.items()]
        return [KeyValue(key=k, value=f"{v:.6g}" if isinstance(v, float) else str(v)) for k, v in pairs]


def _table_override(shape: str, value: Any) -> Any:
    """A node parameter's value as a WatchdogConfig override, or None for "the artifact's"."""
    if shape == "scalar":
        return None if value == _UNSET else float(value)
    if shape == "choice":
        return None if value == "artifact" else value
    values = list(value)
    return tuple(math.inf if v == 0 else float(v) for v in values) if values else None


def _parameter_problem(changed: dict[str, Any], values: dict[str, Any]) -> str | None:
    """Why a change of watchdog parameters is refused, by the table's check, or None."""
    rows = {row.name: row for row in _TABLE_PARAMETERS}
    for name, value in changed.items():
        row = rows.get(name)
        if row is None:
            continue
        if row.shape == "scalar" and value != _UNSET and not value >= 0:
            return f"{name} must be -1 (the artifact's value) or >= 0, got {value:g}"
        if row.shape in ("per_input", "per_output") and any(not v >= 0 for v in value):
            return f"{name} must be >= 0 (0: {row.none_means})"
        override = _table_override(row.shape, value)
        canonical = list(override) if isinstance(override, tuple) else override
        problem = None if override is None else setting_problem(name, canonical)
        if problem:
            return f"{name}: {problem}"
    levels = {k: values[k] for k in ("sigma_warn", "sigma_act", "sigma_stop") if values[k] != _UNSET}
    found = watchdog_problem(levels)
    return None if found is None else f"{found[0]}: {found[1]}"


class _ReferenceSource:
    """The reference vector at time t: from the reference topic, or from a built-in generator."""

    def __init__(self, core: ControllerCore, spec: str, timeout: float, outputs: list[str],
                 extrapolate: bool = True) -> None:
        self.core = core
        self.spec = spec
        self.timeout = timeout
        self.extrapolate = extrapolate
        self.outputs = outputs
        self.latest: list[float] | None = None
        self.latest_at = -math.inf
        self.interval = 0.0            # typical time between reference messages (median of the last few)
        self._intervals: deque[float] = deque(maxlen=9)
        self.generator = None
        self.origin: float | None = 0.0
        self.latched: list[float] | None = None
        self.stale = False
        if spec != "topic":
            # checked now so that configure fails on a bad spec
            parse_reference(spec, core.orders, [0.0] * len(core.orders), outputs)

    def restart(self, now: float) -> None:
        self.generator = None
        # times of a built-in reference count from activation; in simulated time before the
        # first /clock the clock reads zero, so the origin is taken at the first real reading
        self.origin = now if now > 0.0 else None
        self.latched = None

    def accept(self, values: Sequence[float], now: float) -> bool:
        values = list(values)
        if len(values) != self.core.reference_size or not all(math.isfinite(v) for v in values):
            return False
        if math.isfinite(self.latest_at):
            # the median, not the last gap: messages that arrive bunched (a late one, then the next
            # at once) would otherwise stop the extrapolation after almost no time
            self._intervals.append(now - self.latest_at)
            self.interval = statistics.median(self._intervals)
        self.latest, self.latest_at = values, now
        return True

    def sample(self, x: Sequence[float], now: float) -> list[float]:
        if self.spec != "topic":
            if self.generator is None:
                try:
                    base = initial_outputs(self.core, x)
                except LinzError:       # the core refuses this state; the move starts from the next good one
                    return [math.nan] * self.core.reference_size
                self.generator = parse_reference(self.spec, self.core.orders, base, self.outputs)
            if self.origin is None and now > 0.0:
                self.origin = now
            return self.generator.sample(now - (self.origin if self.origin is not None else now))
        if self.latest is not None and now - self.latest_at <= self.timeout:
            self.stale = False
            self.latched = None
            # carried forward at most one typical message interval: a reference that stalls mid-move
            # stops moving after one interval (and is held at the outputs after the timeout)
            ahead = min(now - self.latest_at, self.interval)
            if self.extrapolate and ahead > 0.0:
                return extrapolate_reference(self.latest, self.core.orders, ahead)
            return self.latest
        # no reference, or it stalled: hold the outputs where they were when it stopped
        self.stale = True
        if self.latched is None:
            self.latched = self.core.hold_reference(x)
        return self.latched


class ControllerNode(LifecycleNode):
    """The feedback-linearizing controller as a managed ROS 2 node.

    Parameters
    ----------
    node_name : str
    **kwargs
        Passed to :class:`rclpy.lifecycle.LifecycleNode`.
    """

    def __init__(self, node_name: str = "linz_controller", **kwargs: Any) -> None:
        super().__init__(node_name, **kwargs)
        self.get_logger().warning(SAFETY_NOTICE)
        self._declare_parameters()
        self._system_time = False          # True once configured without simulated time (see _configure)
        self.core: ControllerCore | None = None
        self.active = False
        self.configure_error = ""
        self._owned_subscriptions: list[Any] = []
        self._owned_timers: list[Any] = []
        self._command_pub = None
        self._conditioning_pub = None
        self.field_log: FieldLogWriter | None = None
        self.field_log_error = ""
        self._field_log_reported = (0, 0)
        self.window = DiagnosticWindow(self._now())
        self._diagnostics_pub = self.create_publisher(DiagnosticArray, "/diagnostics", 10)
        self._steady = Clock(clock_type=ClockType.STEADY_TIME)
        self._diagnostics_timer = self.create_timer(self.params["diagnostics_period"], self._publish_diagnostics,
                                                    clock=self._steady)
        self._last_state_steady: float | None = None
        self._clock_jump_handle = self._watch_clock_jumps()
        self._autostarted = False
        self.add_on_set_parameters_callback(self._on_set_parameters)
        if self.params["autostart"]:
            self._autostart_timer = self.create_timer(0.0, self._autostart)

    # -- parameters ----------------------------------------------------------------------
    def _declare_parameters(self) -> None:
        p = {}
        p["artifact"] = declare(self, "artifact", "", "controller artifact file (from linz build)", read_only=True)
        p["plant_file"] = declare(self, "plant_file", "", "plant file to compare with the artifact's hash "
                                  "(default: the one recorded at build time)", read_only=True)
        p["allow_plant_change"] = declare(self, "allow_plant_change", False, "accept a changed plant file",
                                          read_only=True)
        p["trusted_keys"] = declare(self, "trusted_keys", [], "public keys (PEM files): accept only an artifact "
                                    "signed with one of them (empty: signatures not required)", read_only=True,
                                    array_of=str)
        p["state_topic"] = declare(self, "state_topic", "state", "state topic", read_only=True)
        p["state_type"] = declare(self, "state_type", "std_msgs/msg/Float64MultiArray",
                                  f"one of {', '.join(STATE_TYPES)}", read_only=True)
        p["state_fields"] = declare(self, "state_fields", [], "field path of each state, in the artifact's "
                                    "order (empty: data.0, data.1, ...)", read_only=True, array_of=str)
        p["command_topic"] = declare(self, "command_topic", "command", "command topic", read_only=True)
        p["command_type"] = declare(self, "command_type", "std_msgs/msg/Float64MultiArray",
                                    f"one of {', '.join(COMMAND_TYPES)}", read_only=True)
        p["command_fields"] = declare(self, "command_fields", [], "field path of each input, in the "
                                      "artifact's order (empty: data.0, ...)", read_only=True, array_of=str)
        p["reference_topic"] = declare(self, "reference_topic", "reference", "reference topic", read_only=True)
        p["reference"] = declare(self, "reference", "topic", "'topic', or a built-in reference such as "
                                 "'smooth:tool_x=0.05,duration=2' (starts at activation)", read_only=True)
        p["reference_timeout"] = declare(self, "reference_timeout", 0.5, "hold the outputs when the reference "
                                         "topic is older than this (s)", read_only=True, minimum=0.0)
        p["reference_extrapolate"] = declare(self, "reference_extrapolate", True, "carry the latest topic "
                                             "reference forward along its derivatives until the next one",
                                             read_only=True)
        p["conditioning_topic"] = declare(self, "conditioning_topic", "~/conditioning", "per-step record topic",
                                          read_only=True)
        p["diagnostics_period"] = declare(self, "diagnostics_period", 1.0, "seconds between diagnostics",
                                          read_only=True, minimum=0.01, maximum=60.0)
        p["autostart"] = declare(self, "autostart", False, "configure and activate at start-up", read_only=True)
        p["executor"] = declare(self, "executor", "single_threaded", f"one of {', '.join(EXECUTORS)}",
                                read_only=True)
        for row in _TABLE_PARAMETERS:
            text = f"{row.help} ({row.unit})"
            if row.shape == "scalar":
                p[row.name] = declare(self, row.name, _UNSET, f"{text}; -1: the artifact's value", minimum=-1.0,
                                      maximum=row.upper if row.upper <= MAX_WATCHDOG_SECONDS else None,
                                      read_only=not row.runtime)
            elif row.shape == "choice":
                p[row.name] = declare(self, row.name, "artifact", f"{text}: artifact or one of "
                                      f"{', '.join(row.choices)}", read_only=not row.runtime)
            else:
                p[row.name] = declare(self, row.name, [], f"{text}; one per {row.shape[4:]} (0: {row.none_means}); "
                                      "empty: the artifact's", array_of=float, read_only=not row.runtime)
        p["future_tolerance"] = declare(self, "future_tolerance", _UNSET, f"{watchdog_setting('future_tolerance').help} "
                                        "(s); -1: stale_after, or 0.5 s in simulated time, where /clock and the "
                                        "states travel apart", read_only=True, minimum=-1.0,
                                        maximum=MAX_WATCHDOG_SECONDS)
        p["no_state_timeout"] = declare(self, "no_state_timeout", _UNSET, "wall-clock seconds without an "
                                        "accepted state before the safe command, whatever time says (a dead "
                                        "simulator stops /clock too); -1: stale_after, or the larger of stale_after "
                                        "and 0.5 s in simulated time, where a slow simulator holds time still",
                                        read_only=True, minimum=-1.0, maximum=MAX_WATCHDOG_SECONDS)
        p["field_log_folder"] = declare(self, "field_log_folder", "", "write every step's record to MCAP field "
                                        "logs in this folder ('': no field log)", read_only=True)
        p["field_log_max_mb"] = declare(self, "field_log_max_mb", 256.0, "start a new log file at this size (MB; "
                                        "0: never)", read_only=True, minimum=0.0)
        p["field_log_max_minutes"] = declare(self, "field_log_max_minutes", 60.0, "start a new log file after "
                                             "this long (min; 0: never)", read_only=True, minimum=0.0)
        p["field_log_flush_period"] = declare(self, "field_log_flush_period", 0.5, "close and flush a chunk at "
                                              "least this often (s; a crash loses at most this much)",
                                              read_only=True, minimum=0.01, maximum=1.0)
        p["field_log_queue"] = declare(self, "field_log_queue", 20000, "records that may wait for the disk; more "
                                       "are dropped and counted", read_only=True, minimum=1)
        p["safe_command"] = declare(self, "safe_command", "artifact", f"{watchdog_setting('safe_command').help}: "
                                    "artifact (the artifact's), zero, hold or fixed (with safe_value)", read_only=True)
        p["safe_value"] = declare(self, "safe_value", [], "the fixed safe command, per input", read_only=True,
                                  array_of=float)
        self.params = p

    def _watchdog_overrides(self, values: dict[str, Any]) -> dict[str, Any]:
        overrides: dict[str, Any] = {}
        for row in _TABLE_PARAMETERS:
            value = _table_override(row.shape, values[row.name])
            if value is not None:
                overrides[row.name] = value
        if values.get("future_tolerance", _UNSET) >= 0:
            overrides["future_tolerance"] = float(values["future_tolerance"])
        elif self.get_parameter("use_sim_time").value:
            overrides["future_tolerance"] = SIM_TIME_FUTURE_TOLERANCE
        if values.get("safe_command", "artifact") != "artifact":
            overrides["safe_kind"] = values["safe_command"]
            if values["safe_command"] == "fixed":
                overrides["safe_value"] = tuple(float(v) for v in values["safe_value"])
        return overrides

    def _on_set_parameters(self, parameters) -> SetParametersResult:
        """Watchdog settings may change at any time; topics, the artifact and the clock may not.

        Every call is checked as a whole (the ordering of the sigma levels included); to
        change several settings that depend on each other, set them in one atomic call
        (``set_parameters_atomically``), or in an order that keeps every step valid.
        """
        changed = {p.name: p.value for p in parameters}
        if "use_sim_time" in changed and self.core is not None:
            return SetParametersResult(successful=False, reason="use_sim_time can change only while unconfigured")
        static = [n for n in changed if n not in DYNAMIC and n in self.params]
        if static:
            return SetParametersResult(successful=False, reason=f"{static[0]} cannot change while the node runs")
        values = dict(self.params, **changed)
        refusal = _parameter_problem(changed, values)
        if refusal is not None:
            return SetParametersResult(successful=False, reason=refusal)
        if self.core is None:
            self.params.update(changed)
            return SetParametersResult(successful=True)
        try:
            config = WatchdogConfig.from_artifact(self.core.artifact, **self._watchdog_overrides(values))
            # the staleness check at the new period, made before anything changes
            rearmed = [self._stale_timer(config.stale_after)] \
                if config.stale_after != self.core.config.stale_after and self._owned_timers else None
        except (LinzError, ValueError, OverflowError) as err:
            return SetParametersResult(successful=False, reason=str(err).splitlines()[0] if str(err) else
                                       type(err).__name__)
        self.params.update(changed)
        self.core.config = config
        if rearmed is not None:
            for timer in self._owned_timers:
                self.destroy_timer(timer)
            self._owned_timers = rearmed
        self.get_logger().info(f"watchdog settings changed: {', '.join(sorted(changed))}")
        return SetParametersResult(successful=True)

    # -- lifecycle -------------------------------------------------------------------------
    def _autostart(self) -> None:
        self.destroy_timer(self._autostart_timer)
        if self._autostarted:        # a zero-period timer can fire twice before it is destroyed
            return
        self._autostarted = True
        if self.trigger_configure() == TransitionCallbackReturn.SUCCESS:
            self.trigger_activate()

    def on_configure(self, state: LifecycleState) -> TransitionCallbackReturn:
        try:
            self._configure()
        except Exception as err:  # noqa: BLE001 - a bad parameter (topic name, ...) must be refused, not lost
            detail = str(err).splitlines()[0] if str(err) else type(err).__name__
            self.configure_error = detail if isinstance(err, (LinzError, OSError)) else f"{type(err).__name__}: {detail}"
            self.get_logger().error(f"configure refused: {self.configure_error}")
            self._release()
            return TransitionCallbackReturn.FAILURE
        self.configure_error = ""
        a = self.core.artifact
        self.get_logger().info(f"configured: {a.name} ({a.kind}, relative degree {a.relative_degree}, "
                               f"{a.rate:g} Hz design rate), plant file {a.plant_check}, signature {a.signature_check}")
        return TransitionCallbackReturn.SUCCESS

    def _configure(self) -> None:
        p = self.params
        if not p["artifact"]:
            raise LinzError("parameter artifact is empty: pass -p artifact:=PATH (from linz build)")
        artifact = load_artifact(p["artifact"], plant_path=p["plant_file"] or None,
                                 allow_plant_change=p["allow_plant_change"],
                                 trusted_keys=[k for k in p["trusted_keys"] if k] or None)
        config = WatchdogConfig.from_artifact(artifact, **self._watchdog_overrides(p))
        core = ControllerCore(artifact, config)
        message_class(p["state_type"], STATE_TYPES, "state_type")
        message_class(p["command_type"], COMMAND_TYPES, "command_type")
        self.state_map = FieldMap(p["state_type"], [f for f in p["state_fields"] if f], len(artifact.states),
                                  "state_fields")
        self.command_map = FieldMap(p["command_type"], [f for f in p["command_fields"] if f], len(artifact.inputs),
                                    "command_fields")
        self.reference = _ReferenceSource(core, p["reference"].strip(), p["reference_timeout"], artifact.outputs,
                                          p["reference_extrapolate"])
        self.core = core
        # without simulated time the node's clock is the system clock: read it directly in the
        # loop (rclpy's Clock.now costs about ten microseconds); use_sim_time is fixed from here on
        self._system_time = not self.get_parameter("use_sim_time").value
        qos = control_qos()
        self._command_pub = self.create_lifecycle_publisher(self.command_map.cls, p["command_topic"], qos)
        self._conditioning_pub = self.create_lifecycle_publisher(Float64MultiArray, p["conditioning_topic"], qos)
        self._conditioning_labels = conditioning_labels(artifact)
        self._ref_offsets = [sum(r + 1 for r in core.orders[:i]) for i in range(len(core.orders))]
        self._no_ref = [math.nan] * len(core.orders)
        self._conditioning_message = labelled_array([0.0] * len(self._conditioning_labels), self._conditioning_labels)
        self._command_message = self.command_map.cls()
        self._stamped_type = hasattr(self.state_map.cls, "header")
        self._owned_subscriptions = [self.create_subscription(self.state_map.cls, p["state_topic"], self._on_state, qos)]
        if self.reference.spec == "topic":
            self._owned_subscriptions.append(self.create_subscription(Float64MultiArray, p["reference_topic"],
                                                                self._on_reference, qos))
        self._owned_timers = [self._stale_timer(core.config.stale_after)]
        self._no_state = [math.nan] * len(artifact.states)
        self._open_field_log()

    def _open_field_log(self) -> None:
        """Start the field log when a folder is set; a failure is reported, never fatal."""
        p = self.params
        self.field_log_error = ""
        if not p["field_log_folder"]:
            return
        try:
            settings = FieldLogSettings(Path(p["field_log_folder"]), prefix=self.get_name(),
                                        max_bytes=int(p["field_log_max_mb"] * 2**20),
                                        max_seconds=60.0 * p["field_log_max_minutes"],
                                        flush_period=p["field_log_flush_period"], queue_size=p["field_log_queue"])
            self.field_log = open_field_log(settings, self.core.artifact, self.core.config, p, self.get_name())
        except LinzError as err:
            self.field_log_error = str(err)
            self.get_logger().error(f"field log not recording (controlling goes on): {err}")
            return
        self._field_log_reported = (0, 0)
        self.get_logger().info(f"field log: {self.field_log.status.path}")

    def _close_field_log(self) -> None:
        if self.field_log is None:
            return
        status = self.field_log.close()
        self.field_log = None
        files = ", ".join(str(f) for f in status.files)
        text = (f"field log {status.state}: {status.written} records in {files}; {status.dropped} dropped, "
                f"{status.lost} lost")
        if status.state == "closed" and not status.dropped and not status.lost:
            self.get_logger().info(text)
        else:
            self.get_logger().error(text + (f" ({status.error})" if status.error else ""))

    def _stale_timer(self, stale_after: float):
        """The staleness check, every stale_after / 4 on a steady clock (it must run when time stops).

        rclpy's executor runs ready timers before ready subscriptions, so after the process
        was held up the check would see an old state while newer ones wait in the queue;
        two checks in a row must find the state stale before the safe command goes out
        (at most 1.5 stale_after after the last state).
        """
        self._stale_suspect = False
        return self.create_timer(max(stale_after / 4.0, 1e-3), self._check_stale, clock=self._steady)

    def on_activate(self, state: LifecycleState) -> TransitionCallbackReturn:
        self.core.reset()
        self.reference.restart(self._now())
        # everything alive now (modules, the artifact, rclpy) stays out of the cyclic garbage
        # collector's passes: a full pass over it takes tens of milliseconds, in the control loop
        gc.collect()
        gc.freeze()
        self.active = True
        self.get_logger().info("active: commanding")
        return super().on_activate(state)

    def on_deactivate(self, state: LifecycleState) -> TransitionCallbackReturn:
        self._publish_safe("deactivated")
        self.active = False
        self.get_logger().info("inactive: safe command sent once, not commanding")
        return super().on_deactivate(state)

    def on_cleanup(self, state: LifecycleState) -> TransitionCallbackReturn:
        self._release()
        gc.unfreeze()                  # the released artifact and core may be collected again
        return TransitionCallbackReturn.SUCCESS

    def on_error(self, state: LifecycleState) -> TransitionCallbackReturn:
        self.get_logger().error("lifecycle error: safe command, releasing everything")
        self.shutdown_safely()
        return TransitionCallbackReturn.SUCCESS

    def on_shutdown(self, state: LifecycleState) -> TransitionCallbackReturn:
        self.shutdown_safely()
        return TransitionCallbackReturn.SUCCESS

    def shutdown_safely(self) -> None:
        """Send the safe command once if active, then release everything (also on Ctrl-C)."""
        if self.active:
            self._publish_safe("shutdown")
            self.active = False
        self._release()

    def _release(self) -> None:
        self._close_field_log()
        for subscription in self._owned_subscriptions:
            self.destroy_subscription(subscription)
        for timer in self._owned_timers:
            self.destroy_timer(timer)
        for publisher in (self._command_pub, self._conditioning_pub):
            if publisher is not None:
                self.destroy_lifecycle_publisher(publisher)
        self._owned_subscriptions, self._owned_timers = [], []
        self._command_pub = self._conditioning_pub = None
        self.core = None
        self._system_time = False

    # -- the loop -------------------------------------------------------------------------
    def _now(self) -> float:
        if self._system_time:
            return time.time()
        return self.get_clock().now().nanoseconds * 1e-9

    def _steady_now(self) -> float:
        return self._steady.now().nanoseconds * 1e-9

    def _watch_clock_jumps(self) -> Any:
        """Have :meth:`_on_clock_jump` called when this node's clock jumps back by more than 1 ms.

        Only simulated time jumps (a ``/clock`` earlier than the last); the handle must be kept.
        """
        from rclpy.clock import JumpThreshold
        from rclpy.duration import Duration

        threshold = JumpThreshold(min_forward=None, min_backward=Duration(nanoseconds=-1_000_000),
                                  on_clock_change=False)
        return self.get_clock().create_jump_callback(threshold, post_callback=self._on_clock_jump)

    def _on_clock_jump(self, jump: Any) -> None:
        """Time went back (a simulation reset, a restarted simulator): forget the old timeline.

        Every state of the new timeline is stamped before the last one used and would be
        refused as out of order until the new time caught up with the old; instead the core's
        time history is reset (with a warning), the safe command is sent once (the last
        picture belongs to a timeline that is gone) and the reference's ages move with the
        clock. rcl calls this inside the ``/clock`` callback: it must not raise (the jump
        callbacks registered after it would be skipped).
        """
        try:
            delta = jump.delta.nanoseconds * 1e-9
            self.get_logger().warning(f"time jumped back by {-delta:.3f} s: time history reset, states of the "
                                      "new timeline are accepted")
            self.window.started += delta
            if self.core is None:
                return
            self.core.reset()
            self._stale_suspect = False
            self.reference.latest_at += delta
            if self.reference.origin is not None:
                self.reference.origin += delta
            if self.active:
                now = self._now()
                u, record = self.core.safe_step(now, "stale")
                self._publish(u, record, now)
        except Exception as err:  # noqa: BLE001 - see above
            self.get_logger().error(f"clock jump not handled ({type(err).__name__}: {err})")

    def _on_reference(self, message: Float64MultiArray) -> None:
        if not self.reference.accept(message.data, self._now()):
            self.get_logger().warning(f"reference message refused: expected {self.core.reference_size} finite "
                                      "numbers", throttle_duration_sec=2.0)

    def _on_state(self, message: Any) -> None:
        if not self.active or self.core is None:
            return
        try:
            self._step(message)
        except Exception as err:  # noqa: BLE001 - a message must never stop the controller
            self.get_logger().error(f"unexpected failure on a state message ({type(err).__name__}: {err}); "
                                    "safe command", throttle_duration_sec=2.0)
            u, record = self.core.safe_step(self._now(), "bad_message")
            self._publish(u, record, self._now())

    def _step(self, message: Any) -> None:
        now = self._now()
        stamp = stamp_seconds(message)
        if stamp is None:
            stamp = now
            if self._stamped_type:         # a header left at zero: staleness by arrival only
                self.window.unstamped += 1
                self.get_logger().warning("state message with a zero header stamp: taken as received now; "
                                          "staleness is then judged by arrival only", throttle_duration_sec=10.0)
        if now == 0.0:
            # simulated time before the first /clock message: the stamp is the only time there is
            now = stamp
        try:
            x = self.state_map.read(message)
        except MessageError as err:
            self.window.rejected += 1
            self.get_logger().warning(f"state message rejected ({err.reason}): {err.detail}",
                                      throttle_duration_sec=2.0)
            u, record = self.core.safe_step(now, "bad_message")
            self._publish(u, record, now)
            return
        ref = self.reference.sample(x, now)
        if self.reference.stale:
            if self.reference.latest is None:
                self.window.reference_missing += 1
            else:
                self.window.reference_stale += 1
        u, record = self.core.step(x, ref, stamp, now)
        accepted = record.reason in ("ok", "near_singular", "singular")
        if accepted:
            self._last_state_steady = self._steady_now()
            self._stale_suspect = False
        else:
            self.window.rejected += record.reason != "stale"
            self.window.stale += record.reason == "stale"
            self.get_logger().warning(f"state refused ({record.reason}): stamp {stamp:.6f} s, now {now:.6f} s; "
                                      "safe command", throttle_duration_sec=2.0)
        # a command computed from a state carries its stamp (traceable); a refusal is stamped now
        self._publish(u, record, stamp if accepted else now, ref if accepted else None, x)

    def no_state_timeout(self) -> float:
        """Wall-clock seconds without an accepted state before the stale timer sends the safe command.

        Returns
        -------
        float
            ``no_state_timeout`` when set; otherwise ``stale_after``, and in simulated time
            (or before configure) at least :data:`SIM_TIME_NO_STATE_TIMEOUT` (staleness proper is judged on the
            stamps against simulated time, which stands still while the simulator is slow).
        """
        if self.params["no_state_timeout"] != _UNSET:
            return float(self.params["no_state_timeout"])
        stale_after = self.core.config.stale_after if self.core is not None else 0.0
        return stale_after if self._system_time else max(stale_after, SIM_TIME_NO_STATE_TIMEOUT)

    def _check_stale(self) -> None:
        if not self.active or self.core is None:
            return
        now = self._now()
        steady_gap = (self._steady_now() - self._last_state_steady) if self._last_state_steady is not None else 0.0
        stale_by_stamp = now != 0.0 and self.core.is_stale(now)     # now == 0: simulated time not started
        stale = self.core.last_t is not None and (stale_by_stamp or steady_gap > self.no_state_timeout())
        if not stale:
            self._stale_suspect = False
            return
        if not self._stale_suspect:          # confirm on the next tick, after the queued states ran
            self._stale_suspect = True
            return
        if stale:
            self.window.stale += 1
            u, record = self.core.safe_step(now, "stale")
            self._publish(u, record, now)
            self.get_logger().warning("no fresh state: safe command", throttle_duration_sec=2.0)

    def _publish(self, u: list[float], record, stamp: float, ref: Sequence[float] | None = None,
                 x: Sequence[float] | None = None) -> None:
        # the command first (it is what the robot waits for); messages are reused, publish copies them
        command = self.command_map.write(u, self._command_message)
        set_stamp(command, stamp)
        self._send(self._command_pub, command, "command")
        self.window.add(record)
        y_ref = [ref[k] for k in self._ref_offsets] if ref is not None else self._no_ref
        values = conditioning_values(record, y_ref, u, self._no_ref)
        self._conditioning_message.data = values
        self._send(self._conditioning_pub, self._conditioning_message, "conditioning record")
        if self.field_log is not None:
            self.field_log.put(values + list(x if x is not None and len(x) == len(self._no_state) else self._no_state))

    def _send(self, publisher: Any, message: Any, what: str) -> None:
        """Publish; a refused write (the middleware can refuse one under load) is logged, never fatal."""
        try:
            publisher.publish(message)
        except Exception as err:  # noqa: BLE001 - the loop must outlive a refused write
            self.window.publish_failures += 1
            self.get_logger().error(f"{what} not published ({type(err).__name__}: {err})",
                                    throttle_duration_sec=2.0)

    def _publish_safe(self, why: str) -> None:
        if self.core is None or self._command_pub is None:
            return
        u, record = self.core.safe_step(self._now(), "no_state", final=True)
        command = self.command_map.write(u, self.command_map.cls())
        set_stamp(command, self._now())
        self._send(self._command_pub, command, "safe command")
        self.get_logger().info(f"safe command {u} sent ({why})")

    def _publish_diagnostics(self) -> None:
        now = self._now()
        status = DiagnosticStatus(name=f"linz_ros: {self.get_name()}")
        if self.core is None:
            status.level = DiagnosticStatus.ERROR if self.configure_error else DiagnosticStatus.OK
            status.message = f"not configured: {self.configure_error}" if self.configure_error else "unconfigured"
        else:
            status.hardware_id = self.core.artifact.name
            if self.active:
                status.level, status.message = self.window.level()
            else:
                status.level, status.message = DiagnosticStatus.OK, "inactive: not commanding"
            status.values = self.window.values(now)
            self._field_log_diagnostics(status)
        array = DiagnosticArray(status=[status])
        array.header.stamp = self.get_clock().now().to_msg()
        self._diagnostics_pub.publish(array)
        self.window = DiagnosticWindow(now)


    def _field_log_diagnostics(self, status: DiagnosticStatus) -> None:
        """Field-log state in the diagnostics: ERROR when it stopped, WARN when records were dropped."""
        folder = self.params["field_log_folder"]
        if not folder:
            return
        log = self.field_log
        if log is None or log.status.state == "failed":
            why = f"field log not recording: {self.field_log_error}" if log is None else \
                f"field log stopped: {log.status.error}"
            status.level = DiagnosticStatus.ERROR
            status.message = f"{status.message}; {why}"
        if log is None:
            status.values.append(KeyValue(key="field_log", value="not recording"))
            return
        s = log.status
        if s.dropped > self._field_log_reported[0]:
            status.level = max(status.level, DiagnosticStatus.WARN)
            status.message = f"{status.message}; field log dropped {s.dropped - self._field_log_reported[0]} records"
            self.get_logger().warning(f"field log behind the loop: {s.dropped} records dropped so far (the gaps "
                                      "show in the file's sequence numbers)")
        if s.state == "failed" and s.lost > self._field_log_reported[1]:
            self.get_logger().error(f"field log stopped ({s.error}): {s.lost} records not recorded",
                                    throttle_duration_sec=10.0)
        self._field_log_reported = (s.dropped, s.lost)
        status.values += [KeyValue(key="field_log", value=str(s.path)), KeyValue(key="field_log_state", value=s.state),
                          KeyValue(key="field_log_written", value=str(s.written)),
                          KeyValue(key="field_log_dropped", value=str(s.dropped)),
                          KeyValue(key="field_log_lost", value=str(s.lost))]


def main(args: Sequence[str] | None = None) -> int:
    """Console entry point ``linz_controller`` (accepts ``--ros-args ...``).

    Parameters
    ----------
    args : sequence of str, optional

    Returns
    -------
    int
    """
    return spin_node(ControllerNode, args)


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
