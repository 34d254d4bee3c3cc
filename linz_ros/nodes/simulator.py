"""The plant simulator node: integrates the artifact's model and publishes its state.

Each tick (``rate`` Hz) advances the plant by one period with fixed-step RK4 sub-steps
under the last command received (zero-order hold, optionally delayed), then publishes
the state. With ``publish_clock`` it owns simulated time: it advances exactly one
period per tick, publishes ``/clock`` and stamps states with it (run the controller with
``use_sim_time``); ``real_time_factor`` sets how fast ticks come at most. With ``lockstep``
as well, simulated time waits for the controller: after publishing a state the simulator
does not advance until a command has come back (or ``lockstep_timeout`` wall seconds have
passed), so a run gives the same result on a loaded machine as on an idle one. Faults for testing the
controller are injected by parameters: sensor noise, dropped messages, a frozen sensor,
a burst of NaN, parameter mismatch, input delay, sensor delay (a state goes out
``state_delay`` after its stamp), a jump of the clock (a simulation reset:
simulated time, ``/clock`` and the state stamps move back or ahead once) and a flood
(for a while every period is sampled and published ``flood_factor`` times).

States and commands are the plant's own (with a dynamic extension, the compensator is the
controller's); ``input_fields`` write the inputs the plant holds into its state message
beside the states, as a wheeled cart's odometry reports its speed and turn rate.
"""

from __future__ import annotations

import gc
import math
import time
from collections import deque
from typing import Any

import numpy as np
from rosgraph_msgs.msg import Clock

from linz_ros.artifact import load_artifact
from linz_ros.errors import ConfigError
from linz_ros.nodes._common import RCLError, control_qos, declare, entry_point
from linz_ros.nodes._extension import echo_map
from linz_ros.nodes._ros2_control import joint_order_problem, order_joints
from linz_ros.nodes.adapters import (COMMAND_TYPES, STATE_TYPES, FieldMap, MessageError, message_class,
                                     set_stamp, split_seconds)
from linz_ros.runtime import mismatched_parameters, parse_assignments
from linz_ros.runtime.native import BACKENDS
from linz_ros.runtime.physics import PHYSICS, make_physics_plant
from rclpy.node import Node

__all__ = ["PlantSimulatorNode", "main"]


class PlantSimulatorNode(Node):
    """Simulated plant for bringing up the controller.

    Parameters
    ----------
    node_name : str
    **kwargs
        Passed to :class:`rclpy.node.Node`.

    Raises
    ------
    LinzError
        For a bad artifact or parameter (one line; ``main`` exits with code 2).
    """

    def __init__(self, node_name: str = "linz_plant_sim", **kwargs: Any) -> None:
        super().__init__(node_name, **kwargs)
        p = self._declare_parameters()
        if not p["artifact"]:
            raise ConfigError("artifact", "parameter is empty: pass -p artifact:=PATH (from linz build)")
        artifact = load_artifact(p["artifact"], check_plant=False)
        self.artifact = artifact
        # the plant's own states and inputs (with a dynamic extension the compensator is the controller's)
        states, inputs = artifact.plant_states, artifact.plant_inputs
        n, m = len(states), len(inputs)
        mismatch = [s for s in p["mismatch"] if s]
        params = mismatched_parameters(artifact, parse_assignments(mismatch, "mismatch")) if mismatch else None
        self.plant, note = make_physics_plant(artifact, p["physics"], params, backend=p["backend"], field="physics",
                                              mismatch_field="mismatch")
        if note is not None:
            self.get_logger().warning(note)
        initial = [v for v in p["initial_state"]]
        if initial and len(initial) != n:
            raise ConfigError("initial_state", f"expected {n} values ({', '.join(states)}) or none")
        self.x = [float(v) for v in initial] if initial else artifact.operating_point[:n]
        noise = list(p["noise"])
        if len(noise) not in (0, 1, n) or any(not (v >= 0) for v in noise):
            raise ConfigError("noise", f"expected no value, one, or {n} standard deviations >= 0")
        self.noise = np.array(noise * n if len(noise) == 1 else noise) if noise else None
        message_class(p["state_type"], STATE_TYPES, "state_type")
        message_class(p["command_type"], COMMAND_TYPES, "command_type")
        self.state_map = FieldMap(p["state_type"], [f for f in p["state_fields"] if f], n, "state_fields")
        self.command_map = FieldMap(p["command_type"], [f for f in p["command_fields"] if f], m, "command_fields")
        self.echo_map, self.echoed = echo_map(self.state_map, p["input_fields"], inputs)
        self.joint_order = [j for j in p["joint_order"] if j]
        if self.joint_order and joint_order_problem(self.state_map, self.joint_order):
            raise ConfigError("joint_order", joint_order_problem(self.state_map, self.joint_order))
        self.p = p
        self.period = 1.0 / p["rate"]
        self.u = [0.0] * m
        self.pending: deque[tuple[float, list[float]]] = deque()
        self.delayed_states: deque[tuple[float, Any]] = deque()      # (due, message) of a slow sensor
        self.rng = np.random.default_rng(p["seed"])
        self.sim_time = 0.0
        self.ticks = 0
        self.clock_offset = 0.0         # moved once by clock_jump_by
        self.jumped = False
        self.flooding = False
        self.last_stamp: float | None = None
        self.started = None
        self.frozen: Any = None
        self.last_tick = None
        self.commands = 0
        self.applied = 0
        self.rejected = 0
        self.publish_failures = 0
        self.states_sent = 0
        self.states_dropped = 0          # by the drop_probability fault
        self.late_ticks = 0              # ticks more than 1.5 periods (wall clock) after the previous one
        self.last_steady: float | None = None
        self.awaiting: tuple[int, float] | None = None    # lockstep: (commands then, steady time sent)
        self.owed_tick = False           # lockstep: a tick came while waiting; run it when the command does
        self.lockstep_timeouts = 0
        qos = control_qos()
        self.state_pub = self.create_publisher(self.state_map.cls, p["state_topic"], qos)
        self.create_subscription(self.command_map.cls, p["command_topic"], self._on_command, qos)
        self.clock_pub = self.create_publisher(Clock, "/clock", 10) if p["publish_clock"] else None
        self.timer = self.create_timer(self.period / p["real_time_factor"], self._tick)
        # the garbage collector's passes leave out what lives now (modules, the model): a full
        # pass over it would stall the ticks, and the plant with them
        gc.collect()
        gc.freeze()
        self.get_logger().info(f"simulating {artifact.name} at {p['rate']:g} Hz "
                               f"({p['substeps']} RK4 steps a period, {self.plant.backend} plant"
                               + (f"; {self.plant.description})" if p["physics"] != "model" else ")")
                               + (f", mismatch {', '.join(s for s in p['mismatch'] if s)}" if any(p["mismatch"]) else ""))

    def _declare_parameters(self) -> dict[str, Any]:
        p = {}
        p["artifact"] = declare(self, "artifact", "", "controller artifact carrying the plant's f and G", True)
        p["rate"] = declare(self, "rate", 500.0, "integration and publishing rate (Hz)", True, 1.0, 100000.0)
        p["substeps"] = declare(self, "substeps", 4, "RK4 steps per period", True)
        p["state_topic"] = declare(self, "state_topic", "state", "state topic", True)
        p["state_type"] = declare(self, "state_type", "std_msgs/msg/Float64MultiArray", "state message type", True)
        p["state_fields"] = declare(self, "state_fields", [], "field path of each state", True, array_of=str)
        p["frame_id"] = declare(self, "frame_id", "", "header.frame_id of the state messages (REP 105: odom "
                                "for odometry; '': left empty)", True)
        p["child_frame_id"] = declare(self, "child_frame_id", "", "child_frame_id of Odometry state messages, the "
                                      "twist's frame (REP 105: base_link; '': left empty)", True)
        p["joint_order"] = declare(self, "joint_order", [], "JointState states: the joints in the order the message "
                                   "lists them, as a joint_state_broadcaster lists them in its own (empty: as "
                                   "state_fields first name them)", True, array_of=str)
        p["command_topic"] = declare(self, "command_topic", "command", "command topic", True)
        p["command_type"] = declare(self, "command_type", "std_msgs/msg/Float64MultiArray", "command type", True)
        p["command_fields"] = declare(self, "command_fields", [], "field path of each input", True, array_of=str)
        p["input_fields"] = declare(self, "input_fields", [], "field path of the state message echoing each input "
                                    "the plant holds ('' for one not echoed; empty: none), e.g. a cart's odometry "
                                    "twist.linear.x for its speed", True, array_of=str)
        p["initial_state"] = declare(self, "initial_state", [], "initial state (empty: the operating point)",
                                     True, array_of=float)
        p["mismatch"] = declare(self, "mismatch", [], "parameter=percent changes of the plant", True,
                                array_of=str)
        p["noise"] = declare(self, "noise", [], "sensor noise standard deviation (one, or one per state)",
                             True, array_of=float)
        p["delay"] = declare(self, "delay", 0.0, "input delay (s)", True, 0.0, 10.0)
        p["state_delay"] = declare(self, "state_delay", 0.0, "sensor delay (s): each state message goes out "
                                   "this long after the time it is stamped with", True, 0.0, 10.0)
        p["drop_probability"] = declare(self, "drop_probability", 0.0, "chance of not publishing a state",
                                        True, 0.0, 1.0)
        p["freeze_at"] = declare(self, "freeze_at", -1.0, "from this time (s) repeat the last state message "
                                 "unchanged, stamp included (-1: never)", True, -1.0)
        p["nan_burst_at"] = declare(self, "nan_burst_at", -1.0, "start of a burst of NaN states (s; -1: none)",
                                    True, -1.0)
        p["nan_burst_duration"] = declare(self, "nan_burst_duration", 0.1, "length of the NaN burst (s)", True, 0.0)
        p["publish_clock"] = declare(self, "publish_clock", False, "own simulated time and publish /clock", True)
        p["real_time_factor"] = declare(self, "real_time_factor", 1.0, "simulated seconds per wall second "
                                        "(with publish_clock)", True, 0.01, 100.0)
        p["lockstep"] = declare(self, "lockstep", False, "with publish_clock: after each published state wait "
                                "for a command before advancing simulated time", True)
        p["lockstep_timeout"] = declare(self, "lockstep_timeout", 1.0, "wall seconds to wait for a command in "
                                        "lockstep before advancing without one", True, 0.001, 60.0)
        p["seed"] = declare(self, "seed", 1, "random seed of the faults", True)
        p["backend"] = declare(self, "backend", BACKENDS[0], f"the plant's integrator: {' or '.join(BACKENDS)} "
                               "(native: compiled C, Python with a warning where it cannot be built here)", True)
        p["physics"] = declare(self, "physics", PHYSICS[0], f"the plant: {' or '.join(PHYSICS)} (model: our "
                               "integrator of the artifact's dynamics; mujoco: MuJoCo on the artifact's URDF, "
                               "its own RK4)", True)
        p["brake_until_command"] = declare(self, "brake_until_command", True, "hold the plant still until the "
                                           "first command arrives (a brake released by the controller)", True)
        p["clock_jump_at"] = declare(self, "clock_jump_at", -1.0, "at this time (s from the start) move the "
                                     "clock once by clock_jump_by, as a simulation reset does: with publish_clock "
                                     "simulated time, /clock and the state stamps, else the state stamps only "
                                     "(-1: never)", True, -1.0)
        p["clock_jump_by"] = declare(self, "clock_jump_by", -1.0, "size of the clock jump (s; negative: back in "
                                     "time)", True)
        p["flood_at"] = declare(self, "flood_at", -1.0, "start of a flood of state messages (s; -1: none): each "
                                "period is integrated in flood_factor parts and every part published", True, -1.0)
        p["flood_duration"] = declare(self, "flood_duration", 1.0, "length of the flood (s)", True, 0.0)
        p["flood_factor"] = declare(self, "flood_factor", 10, "state messages per period during the flood", True)
        if p["substeps"] < 1:
            raise ConfigError("substeps", f"expected a whole number >= 1, got {p['substeps']}")
        if p["flood_factor"] < 1:
            raise ConfigError("flood_factor", f"expected a whole number >= 1, got {p['flood_factor']}")
        if p["publish_clock"] and p["clock_jump_at"] >= 0 and p["clock_jump_at"] + p["clock_jump_by"] <= 0:
            raise ConfigError("clock_jump_by", f"{p['clock_jump_by']:g} s at {p['clock_jump_at']:g} s would move "
                                               "simulated time to zero or before")
        if p["seed"] < 0:
            raise ConfigError("seed", f"expected a whole number >= 0, got {p['seed']}")
        if p["lockstep"] and not p["publish_clock"]:
            raise ConfigError("lockstep", "needs publish_clock: true (only simulated time can wait for the "
                                          "controller)")
        if not p["publish_clock"]:
            p["real_time_factor"] = 1.0
        return p

    def _now(self) -> float:
        if self.clock_pub is not None:
            return self.sim_time
        return self.get_clock().now().nanoseconds * 1e-9

    def _on_command(self, message: Any) -> None:
        try:
            u = self.command_map.read(message)
        except MessageError as err:
            self.rejected += 1
            self.get_logger().warning(f"command rejected ({err.reason}): {err.detail}", throttle_duration_sec=2.0)
            return
        if not all(math.isfinite(v) for v in u):
            self.rejected += 1
            self.get_logger().warning("command rejected: not finite", throttle_duration_sec=2.0)
            return
        self.commands += 1
        self.pending.append((self._now() + self.p["delay"], u))
        if self.owed_tick:
            self.owed_tick = False
            self._tick()

    def _waiting_for_command(self) -> bool:
        """Lockstep: True while the state last sent is unanswered and the timeout has not run out."""
        if self.awaiting is None:
            return False
        commands, since = self.awaiting
        if self.commands > commands:
            self.awaiting = None
            return False
        if time.monotonic() - since < self.p["lockstep_timeout"]:
            return True
        self.awaiting = None
        self.lockstep_timeouts += 1
        self.get_logger().warning(f"lockstep: no command for {self.p['lockstep_timeout']:g} s; advancing without "
                                  f"one ({self.lockstep_timeouts} so far)", throttle_duration_sec=2.0)
        return False

    def _apply_due_commands(self, now: float) -> None:
        while self.pending and self.pending[0][0] <= now:
            self.u = self.pending.popleft()[1]
            self.applied += 1

    def _elapsed(self, now: float) -> float:
        """Seconds since the first tick, whatever the clock jump did."""
        if self.clock_pub is not None:
            return self.ticks * self.period
        return now - self.started

    def _parts(self, elapsed: float) -> int:
        """Samples published this period: ``flood_factor`` during the flood, else one."""
        p = self.p
        flooding = 0 <= p["flood_at"] <= elapsed < p["flood_at"] + p["flood_duration"]
        return p["flood_factor"] if flooding else 1

    def _jump_clock(self, elapsed: float) -> None:
        """Move the clock once by ``clock_jump_by`` when ``clock_jump_at`` has come."""
        p = self.p
        if self.jumped or p["clock_jump_at"] < 0 or elapsed < p["clock_jump_at"]:
            return
        self.jumped = True
        by = p["clock_jump_by"]
        self.clock_offset += by
        if self.clock_pub is not None:          # delayed commands fall due in the new timeline
            self.pending = deque((due + by, u) for due, u in self.pending)
        self.get_logger().warning(f"clock jump of {by:+g} s at {elapsed:g} s "
                                  + ("(simulated time, /clock and state stamps)" if self.clock_pub is not None
                                     else "(state stamps)"))

    def _tick(self) -> None:
        if self.p["lockstep"] and self._waiting_for_command():
            self.owed_tick = True
            return
        self.owed_tick = False
        now = self._now()
        if self.started is None:
            self.started = now
        if self.clock_pub is not None:
            dt = self.period
        else:
            dt = self.period if self.last_tick is None else min(max(now - self.last_tick, 0.0), 5 * self.period)
        self.last_tick = now
        steady = time.monotonic()
        if self.last_steady is not None and steady - self.last_steady > 1.5 * self.period / self.p["real_time_factor"]:
            self.late_ticks += 1
        self.last_steady = steady
        sent = self.states_sent
        self._apply_due_commands(now)
        parts = self._parts(self._elapsed(now))
        substeps = -(-self.p["substeps"] // parts)          # per part: at least one RK4 step
        braked = self.p["brake_until_command"] and self.applied == 0     # released by the first applied command
        samples = []
        for _ in range(parts):
            if not braked:
                try:
                    self.x = self.plant.rk4(self.x, self.u, dt / parts / substeps, substeps)
                except (ArithmeticError, ValueError):
                    self.x = [math.nan] * len(self.x)
            samples.append(list(self.x))
        if self.clock_pub is not None:
            self.ticks += 1
            self._jump_clock(self._elapsed(now))
            self.sim_time = self.ticks * self.period + self.clock_offset   # no drift from summing periods
            now = self.sim_time
            clock = Clock()
            clock.clock.sec, clock.clock.nanosec = split_seconds(now)
            self._send(self.clock_pub, clock)
            stamp = now
        else:
            self._jump_clock(self._elapsed(now))
            stamp = now + self.clock_offset
        elapsed = self._elapsed(now)
        if (parts > 1) != self.flooding:       # logged with the stamps, so that a test can find the flood
            self.flooding = parts > 1
            if self.flooding:
                self.get_logger().info(f"flood: {parts} state messages a period from stamp "
                                       f"{stamp - dt * (parts - 1) / parts:.6f} s")
            else:
                self.get_logger().info(f"flood over: last stamp {self.last_stamp:.6f} s")
        for k, x in enumerate(samples):        # each part stamped at the end of its share of the period
            self._publish_state(stamp - dt * (parts - 1 - k) / parts, x, elapsed)
        self._send_due_states(self._now())
        self.last_stamp = stamp
        if self.p["lockstep"] and self.states_sent > sent:
            self.awaiting = (self.commands, time.monotonic())

    def _publish_state(self, stamp: float, x: list[float], elapsed: float) -> None:
        p = self.p
        if p["freeze_at"] >= 0 and elapsed >= p["freeze_at"] and self.frozen is not None:
            self._send(self.state_pub, self.frozen)     # a stuck sensor: same values, same stamp
            return
        if p["drop_probability"] > 0 and self.rng.random() < p["drop_probability"]:
            self.states_dropped += 1
            return
        measured = list(x)
        if self.noise is not None:
            measured = (np.asarray(measured) + self.rng.normal(0.0, self.noise)).tolist()
        burst = p["nan_burst_at"]
        if burst >= 0 and burst <= elapsed < burst + p["nan_burst_duration"]:
            measured = [math.nan] * len(measured)
        if self.echo_map is None:
            message = self.state_map.write(measured)
        else:           # the inputs held over the period just integrated, beside the states
            message = self.echo_map.write(measured + [self.u[j] for j in self.echoed])
        if self.joint_order:
            order_joints(message, self.joint_order)
        set_stamp(message, stamp)
        self._set_frames(message)
        self.frozen = message
        if p["state_delay"] > 0.0:
            self.delayed_states.append((self._now() + p["state_delay"], message))
            return
        self._send(self.state_pub, message)

    def _set_frames(self, message: Any) -> None:
        """The frames of the parameters, where the message has them."""
        if self.p["frame_id"] and hasattr(message, "header"):
            message.header.frame_id = self.p["frame_id"]
        if self.p["child_frame_id"] and hasattr(message, "child_frame_id"):
            message.child_frame_id = self.p["child_frame_id"]

    def _send_due_states(self, now: float) -> None:
        """Publish the delayed state messages whose time has come (stamps unchanged)."""
        while self.delayed_states and self.delayed_states[0][0] <= now + 1e-9:
            self._send(self.state_pub, self.delayed_states.popleft()[1])

    def summary(self) -> str:
        """One line of what the run did: time, ticks, states and commands (logged at shut-down)."""
        simulated = f"{self.ticks * self.period:.3f} s simulated, " if self.clock_pub is not None else ""
        return (f"run: {simulated}{self.late_ticks} late ticks; states sent {self.states_sent}, dropped {self.states_dropped}, "
                f"not published {self.publish_failures}; commands received {self.commands}, applied "
                f"{self.applied}, rejected {self.rejected}"
                + (f"; lockstep timeouts {self.lockstep_timeouts}" if self.p["lockstep"] else ""))

    def shutdown_safely(self) -> None:
        """Log :meth:`summary` (called by ``spin_node`` before the node is destroyed)."""
        self.get_logger().info(self.summary())

    def _send(self, publisher: Any, message: Any) -> None:
        """Publish; a message DDS refuses is lost, as a sensor's would be, not the end of the node.

        Fast DDS can refuse a write (``cannot publish data``) when a reliable reader falls far
        behind, as the controller does in a flood; rclpy raises it from the timer callback,
        which would end the process.
        """
        try:
            publisher.publish(message)
            if publisher is self.state_pub:
                self.states_sent += 1
        except RCLError as err:
            self.publish_failures += 1
            self.get_logger().warning(f"message not published ({self.publish_failures} so far): "
                                      f"{str(err).splitlines()[0]}", throttle_duration_sec=2.0)


#: Console entry point ``linz_plant_sim``.
main = entry_point(PlantSimulatorNode, "linz_plant_sim")


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
