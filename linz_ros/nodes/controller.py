"""Over 500 lines because the managed node is one class whose lifecycle, loop, timers and callbacks share
its state (its ROS-free parts live in ``runtime``). The managed controller node: state in, linearizing
command out, watchdogs and diagnostics.

Lifecycle: ``configure`` loads and verifies the artifact and builds the core and the
topics (refusing with a logged reason), ``activate`` starts commanding, ``deactivate``
publishes the safe command once and stops, ``cleanup`` releases everything. With
``autostart`` the node configures and activates itself.

Topics (names are parameters): state in (JointState, Odometry or Float64MultiArray),
command out (Float64MultiArray, JointState efforts, Wrench or Twist), reference in
(Float64MultiArray ``[y1, y1', ..., y1^(r1), y2, ...]``, or with ``reference: trajectory`` a
trajectory_msgs/JointTrajectory whose joint_names name the outputs, ``reference_joints``)
unless a built-in reference is chosen, ``~/conditioning`` (one labelled Float64MultiArray per step) and
``/diagnostics`` (about once a second). With a dynamic extension the messages carry the
plant's own states and inputs; ``compensator_fields`` name the state message's fields that
measure the compensator (a cart's speed), from which it restarts.
"""

from __future__ import annotations

import gc
import math
import time
from typing import Any, Sequence

from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus, KeyValue
from rcl_interfaces.msg import SetParametersResult
from rclpy.clock import Clock, ClockType
from rclpy.lifecycle import LifecycleNode, LifecycleState, TransitionCallbackReturn
from std_msgs.msg import Float64MultiArray
from trajectory_msgs.msg import JointTrajectory

from linz_ros.artifact import load_artifact
from linz_ros.errors import LinzError
from linz_ros.nodes._common import EXECUTORS, SAFETY_NOTICE, control_qos, declare, entry_point
from linz_ros.nodes._extension import CompensatorFields, extension_text
from linz_ros.nodes.adapters import (COMMAND_TYPES, STATE_TYPES, FieldMap, MessageError, labelled_array,
                                     message_class, set_stamp, stamp_seconds)
from linz_ros.nodes._ros2_control import trajectory_points
from linz_ros.runtime import WatchdogConfig
from linz_ros.runtime.native import AnyCore, make_core
from linz_ros.runtime.controller_settings import (DYNAMIC, controller_parameters, field_log_settings,
                                                  no_state_timeout, parameter_problem, watchdog_overrides)
from linz_ros.runtime.diagnostics import DiagnosticWindow, field_log_report
from linz_ros.runtime.fieldlog import FieldLogWriter, open_field_log
from linz_ros.runtime.reference_source import TOPIC, TRAJECTORY, ReferenceSource
from linz_ros.runtime.steprecord import encode as conditioning_values, record_labels as conditioning_labels

__all__ = ["ControllerNode", "main"]

#: diagnostic_msgs levels by the runtime's level numbers (OK, WARN, ERROR).
_LEVELS = (DiagnosticStatus.OK, DiagnosticStatus.WARN, DiagnosticStatus.ERROR)


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
        self.core: AnyCore | None = None
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
        self.params = {spec.name: declare(self, spec.name, spec.default, spec.description, spec.read_only,
                                          spec.minimum, spec.maximum, spec.array_of)
                       for spec in controller_parameters(STATE_TYPES, COMMAND_TYPES, EXECUTORS)}

    def _config(self, artifact: Any, values: dict[str, Any]) -> WatchdogConfig:
        """The watchdog settings of the artifact with the parameters' overrides."""
        sim_time = bool(self.get_parameter("use_sim_time").value)
        return WatchdogConfig.from_artifact(artifact, **watchdog_overrides(values, sim_time))

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
        refusal = parameter_problem(changed, values)
        if refusal is not None:
            return SetParametersResult(successful=False, reason=refusal)
        if self.core is None:
            self.params.update(changed)
            return SetParametersResult(successful=True)
        try:
            config = self._config(self.core.artifact, values)
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
                               f"{a.rate:g} Hz design rate), plant file {a.plant_check}, signature {a.signature_check}, "
                               f"{self.core.backend} step{extension_text(a)}")
        return TransitionCallbackReturn.SUCCESS

    def _configure(self) -> None:
        p = self.params
        if not p["artifact"]:
            raise LinzError("parameter artifact is empty: pass -p artifact:=PATH (from linz build)")
        artifact = load_artifact(p["artifact"], plant_path=p["plant_file"] or None,
                                 allow_plant_change=p["allow_plant_change"],
                                 trusted_keys=[k for k in p["trusted_keys"] if k] or None)
        core, note = make_core(artifact, self._config(artifact, p), backend=p["backend"])
        if note is not None:
            self.get_logger().warning(note)
        message_class(p["state_type"], STATE_TYPES, "state_type")
        message_class(p["command_type"], COMMAND_TYPES, "command_type")
        # messages carry the plant's own states and inputs; a dynamic extension's compensator lives in the core
        self.state_map = FieldMap(p["state_type"], [f for f in p["state_fields"] if f], len(artifact.plant_states),
                                  "state_fields")
        self.command_map = FieldMap(p["command_type"], [f for f in p["command_fields"] if f],
                                    len(artifact.plant_inputs), "command_fields")
        self.compensator_fields = CompensatorFields(artifact, p["state_type"], p["compensator_fields"])
        self.reference = ReferenceSource(core, p["reference"].strip(), p["reference_timeout"], artifact.outputs,
                                         p["reference_extrapolate"], [n for n in p["reference_joints"] if n] or None)
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
        self._stamped_type = self.state_map.stamped
        self._owned_subscriptions = [self.create_subscription(self.state_map.cls, p["state_topic"], self._on_state, qos)]
        if self.reference.spec == TOPIC:
            self._owned_subscriptions.append(self.create_subscription(Float64MultiArray, p["reference_topic"],
                                                                self._on_reference, qos))
        elif self.reference.spec == TRAJECTORY:
            self._owned_subscriptions.append(self.create_subscription(JointTrajectory, p["reference_topic"],
                                                                      self._on_trajectory, qos))
        self._owned_timers = [self._stale_timer(core.config.stale_after)]
        self._no_state = [math.nan] * len(artifact.states)        # x of the field log: with the compensator
        self._extended = artifact.extension is not None
        self._open_field_log()

    def _open_field_log(self) -> None:
        """Start the field log when a folder is set; a failure is reported, never fatal."""
        p = self.params
        self.field_log_error = ""
        if not p["field_log_folder"]:
            return
        try:
            self.field_log = open_field_log(field_log_settings(p, self.get_name()), self.core.artifact,
                                            self.core.config, p, self.get_name())
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
        self._compensator_fresh = self.compensator_fields.map is not None     # restarted again at the first state
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
            self.reference.shift(delta)
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

    def _on_trajectory(self, message: JointTrajectory) -> None:
        """A planned trajectory: converted, checked, followed from its header stamp (zero: from now)."""
        if self.core is None:
            return
        try:
            points, stamp = trajectory_points(message)
            refusal = self.reference.accept_trajectory(points, stamp, self._now())
        except Exception as err:  # noqa: BLE001 - a message must never stop the controller
            self.reference.refused += 1
            refusal = f"{type(err).__name__}: {str(err).splitlines()[0] if str(err) else ''}"
        if refusal is None:
            self.get_logger().info(f"trajectory of {len(points.times)} points accepted, "
                                   f"{points.times[-1]:g} s long", throttle_duration_sec=1.0)
        else:
            self.get_logger().warning(f"trajectory refused ({self.reference.refused} so far): {refusal}",
                                      throttle_duration_sec=1.0)

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
            measured = self.compensator_fields.read(message) if self.compensator_fields.map is not None else None
        except MessageError as err:
            self.window.rejected += 1
            self.get_logger().warning(f"state message rejected ({err.reason}): {err.detail}",
                                      throttle_duration_sec=2.0)
            u, record = self.core.safe_step(now, "bad_message")
            self._publish(u, record, now)
            return
        if measured is not None and self._compensator_fresh:   # the first state since activation: start there
            self._compensator_fresh = False
            self.core.reset(measured)
        elif measured is not None:          # a restart at this step (after a safe command) starts from it
            self.core.observe_compensator(measured)
        ref = self.reference.sample(x, now)
        if self.reference.stale:
            if self.reference.latest is None:
                self.window.reference_missing += 1
            else:
                self.window.reference_stale += 1
        u, record = self.core.step(x, ref, stamp, now)
        logged = self.core.last_extended_state if self._extended else x     # with the compensator this step used
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
        self._publish(u, record, stamp if accepted else now, ref if accepted else None, logged)

    def no_state_timeout(self) -> float:
        """Wall-clock seconds without an accepted state before the stale timer sends the safe command.

        Returns
        -------
        float
            By :func:`linz_ros.runtime.controller_settings.no_state_timeout` (before configure,
            as in simulated time).
        """
        stale_after = self.core.config.stale_after if self.core is not None else 0.0
        return no_state_timeout(self.params["no_state_timeout"], stale_after, self._system_time)

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
                level, status.message = self.window.level()
                status.level = _LEVELS[level]
            else:
                status.level, status.message = DiagnosticStatus.OK, "inactive: not commanding"
            status.values = [KeyValue(key=k, value=v) for k, v in self.window.values(now)]
            if self.reference.spec == TRAJECTORY:
                status.values.append(KeyValue(key="trajectories_refused", value=str(self.reference.refused)))
            self._field_log_diagnostics(status)
        array = DiagnosticArray(status=[status])
        array.header.stamp = self.get_clock().now().to_msg()
        self._diagnostics_pub.publish(array)
        self.window = DiagnosticWindow(now)

    def _field_log_diagnostics(self, status: DiagnosticStatus) -> None:
        """Field-log state in the diagnostics: ERROR when it stopped, WARN when records were dropped."""
        if not self.params["field_log_folder"]:
            return
        s = self.field_log.status if self.field_log is not None else None
        level, notes, values = field_log_report(s, self.field_log_error, self._field_log_reported)
        status.level = max(status.level, _LEVELS[level])
        status.message = "; ".join([status.message, *notes])
        status.values += [KeyValue(key=k, value=v) for k, v in values]
        if s is None:
            return
        if s.dropped > self._field_log_reported[0]:
            self.get_logger().warning(f"field log behind the loop: {s.dropped} records dropped so far (the gaps "
                                      "show in the file's sequence numbers)")
        if s.state == "failed" and s.lost > self._field_log_reported[1]:
            self.get_logger().error(f"field log stopped ({s.error}): {s.lost} records not recorded",
                                    throttle_duration_sec=10.0)
        self._field_log_reported = (s.dropped, s.lost)


#: Console entry point ``linz_controller``.
main = entry_point(ControllerNode, "linz_controller")


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
