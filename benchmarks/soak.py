"""Soak run: the controller node at a 1 kHz state rate for minutes, field log on.

This process publishes JointState states at the rate (stamped with the send time) and
receives the controller's commands, which carry the state's stamp. It reports messages
dropped (states without a command), state-to-command latency percentiles, the field
log's own count of records written and dropped, and the resident memory of the
controller process sampled every few seconds: its growth after the first 20 % of the
run, per minute, with a linear fit. The same driver against the bare echo node for a
short window gives the reference latency, measured in the same run.

Run:  python benchmarks/soak.py [--seconds 180] [--rate 1000] [--reference-seconds 20]
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from linz_ros.bringup import Bringup, isolated_environment  # noqa: E402
from linz_ros.codegen import artifact_path, build_document, write_artifact  # noqa: E402
from linz_ros.model import load_plant  # noqa: E402
from linz_ros.synthesis import synthesise  # noqa: E402


def rss_kib(pid: int) -> int:
    """Resident set size of a process (KiB), from /proc."""
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    return -1


def drive(rate: float, seconds: float, context, pid: int | None, sample_every: float = 2.0) -> dict:
    """Publish states at ``rate`` for ``seconds``; measure latency, drops and the peer's memory."""
    from rclpy.executors import SingleThreadedExecutor
    from rclpy.node import Node
    from sensor_msgs.msg import JointState

    from linz_ros.nodes._common import control_qos
    from linz_ros.nodes.adapters import split_seconds

    node = Node("linz_soak_driver", context=context)
    executor = SingleThreadedExecutor(context=context)
    executor.add_node(node)
    sent: dict[tuple[int, int], float] = {}
    latencies: list[float] = []
    qos = control_qos(1000)
    publisher = node.create_publisher(JointState, "/pick_arm/joint_states", qos)
    counts = {"published": 0}
    measuring = {"on": False}

    def on_command(message: JointState) -> None:
        key = (message.header.stamp.sec, message.header.stamp.nanosec)
        sent_at = sent.pop(key, None)
        if sent_at is not None and measuring["on"]:
            latencies.append(time.time() - sent_at)

    node.create_subscription(JointState, "/pick_arm/joint_efforts", on_command, qos)
    message = JointState(name=["shoulder", "elbow"], position=[0.4, 1.2], velocity=[0.0, 0.0])

    def tick() -> None:
        now = time.time()
        phase = 2 * np.pi * 0.5 * now
        message.position = [0.4 + 0.1 * np.sin(phase), 1.2 + 0.1 * np.cos(phase)]
        message.header.stamp.sec, message.header.stamp.nanosec = split_seconds(now)
        if measuring["on"]:
            sent[(message.header.stamp.sec, message.header.stamp.nanosec)] = now
            counts["published"] += 1
        publisher.publish(message)

    end = time.monotonic() + 15
    while publisher.get_subscription_count() == 0 and time.monotonic() < end:
        executor.spin_once(timeout_sec=0.05)
    node.create_timer(1.0 / rate, tick)
    warm = time.monotonic() + 2.0
    while time.monotonic() < warm:
        executor.spin_once(timeout_sec=0.01)
    measuring["on"] = True
    start = time.monotonic()
    memory: list[tuple[float, int]] = []
    next_sample = start
    while (elapsed := time.monotonic() - start) < seconds:
        executor.spin_once(timeout_sec=0.01)
        if pid is not None and time.monotonic() >= next_sample:
            memory.append((elapsed, rss_kib(pid)))
            next_sample += sample_every
    measuring["on"] = False
    drain = time.monotonic() + 0.5
    while time.monotonic() < drain:
        executor.spin_once(timeout_sec=0.01)
    executor.shutdown()
    node.destroy_node()
    lat = np.array(latencies) * 1e6
    return {"published": counts["published"], "received": len(lat), "dropped": counts["published"] - len(lat),
            "p50": float(np.percentile(lat, 50)) if len(lat) else float("nan"),
            "p99": float(np.percentile(lat, 99)) if len(lat) else float("nan"),
            "p99.9": float(np.percentile(lat, 99.9)) if len(lat) else float("nan"),
            "max": float(lat.max()) if len(lat) else float("nan"), "memory": memory, "seconds": seconds}


def memory_growth(memory: list[tuple[float, int]], seconds: float) -> dict:
    """Growth of RSS after the first 20 % of the run: total, and the slope of a linear fit."""
    points = [(t, kib) for t, kib in memory if t >= 0.2 * seconds]
    if len(points) < 3:
        return {"start_kib": None, "end_kib": None, "growth_kib": None, "slope_kib_per_min": None}
    t, kib = np.array(points, dtype=float).T
    slope = np.polyfit(t, kib, 1)[0] * 60.0
    return {"start_kib": int(kib[0]), "end_kib": int(kib[-1]), "growth_kib": int(kib[-1] - kib[0]),
            "slope_kib_per_min": float(slope)}


def _context(env: dict):
    import rclpy

    os.environ.update({k: env[k] for k in ("ROS_DOMAIN_ID", "ROS_AUTOMATIC_DISCOVERY_RANGE",
                                           "FASTDDS_BUILTIN_TRANSPORTS")})
    context = rclpy.Context()
    rclpy.init(args=[], context=context)
    return context


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=180.0)
    parser.add_argument("--rate", type=float, default=1000.0)
    parser.add_argument("--reference-seconds", type=float, default=20.0)
    args = parser.parse_args()
    from linz_ros.logs import read_logs, summarise

    folder = Path(tempfile.mkdtemp(prefix="linz_soak_"))
    design = synthesise(load_plant(ROOT / "config" / "plants" / "pick_arm.yaml"))
    artifact = write_artifact(build_document(design, points=8)[0], artifact_path(folder, "pick_arm"))

    env = isolated_environment(loopback_only=True)
    context = _context(env)
    with Bringup(folder / "echo", env):
        log = open(folder / "echo.log", "wb")
        echo = subprocess.Popen([sys.executable, str(ROOT / "benchmarks" / "echo_node.py")], env=env, stdout=log,
                                stderr=log, start_new_session=True)
        try:
            reference = drive(args.rate, args.reference_seconds, context, echo.pid)
        finally:
            echo.terminate()
            echo.wait(timeout=10)
    context.try_shutdown()

    env = isolated_environment(loopback_only=True)
    context = _context(env)
    field_log = folder / "field_log"
    with Bringup(folder / "controller", env) as bringup:
        node = bringup.start("linz_controller", ROOT / "config" / "pick_arm.yaml",
                             {"artifact": str(artifact), "reference": "hold", "stale_after": 0.5,
                              "field_log_folder": str(field_log)})
        if not bringup.wait_for_log("linz_controller", "active: commanding", timeout=30):
            raise SystemExit(f"the controller did not become active; see {bringup.log_dir}")
        controller = drive(args.rate, args.seconds, context, node.process.pid)
    context.try_shutdown()

    summary = summarise(read_logs([field_log]))
    growth = memory_growth(controller["memory"], args.seconds)
    reference_growth = memory_growth(reference["memory"], args.reference_seconds)
    print(f"soak: {args.seconds:g} s at {args.rate:g} Hz states, field log on (reference: echo node, "
          f"{args.reference_seconds:g} s)")
    print(f"{'node':>11} {'published':>10} {'dropped':>8} {'p50 us':>8} {'p99 us':>8} {'p99.9 us':>9} {'max us':>8}")
    for name, row in (("echo", reference), ("controller", controller)):
        print(f"{name:>11} {row['published']:10d} {row['dropped']:8d} {row['p50']:8.0f} {row['p99']:8.0f} "
              f"{row['p99.9']:9.0f} {row['max']:8.0f}")
    print(f"  p99 ratio controller/echo: {controller['p99'] / reference['p99']:.2f}; "
          f"p50 ratio {controller['p50'] / reference['p50']:.2f}")
    print(f"  field log: {summary['records']} records, {summary['missing_records']} missing in the file, "
          f"{summary['dropped_by_writer']} dropped by the writer; refused steps: "
          f"{ {k: v['records'] for k, v in summary['refused'].items()} }")
    print(f"  controller RSS: {growth['start_kib']} KiB at 20 % -> {growth['end_kib']} KiB at the end "
          f"({growth['growth_kib']:+d} KiB; fitted {growth['slope_kib_per_min']:+.1f} KiB/min)")
    if reference_growth["start_kib"] is not None:
        print(f"  echo RSS over its window: {reference_growth['growth_kib']:+d} KiB "
              f"(fitted {reference_growth['slope_kib_per_min']:+.1f} KiB/min)")
    print(f"logs in {folder}")


if __name__ == "__main__":
    main()
