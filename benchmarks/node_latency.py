"""State-to-command latency of the controller node against a bare echo node, over real DDS.

For each state rate (500 Hz, 1 kHz) and executor (rclpy's SingleThreadedExecutor and the
experimental EventsExecutor), this process publishes JointState messages stamped with
the send time and receives the commands (JointState, which the controller stamps with
the state's stamp; the echo node returns the message itself). Latency is receive time
minus stamp, on one clock. The echo node and the controller run side by side and the
driver feeds them in turn, switching every ``--slice`` seconds, so both see the same load
of the machine; the figures that matter are the ratios of their p99 latencies (the
machine is noisy). Goal: the controller adds at most 20 % to the echo node's p99. Each
setting is measured in ``--repeats`` runs with fresh processes; the verdict is the median
of the runs' ratios.

Run:  python benchmarks/node_latency.py [--seconds 4] [--rates 500,1000] [--executors single_threaded,events]
                                        [--repeats 3] [--slice 0.5] [--backend native|python]
"""

from __future__ import annotations

import argparse
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


TOPICS = {"echo": ("/linz_echo/joint_states", "/linz_echo/joint_efforts"),
          "controller": ("/pick_arm/joint_states", "/pick_arm/joint_efforts")}


def _driver(rate: float, seconds: float, slice_seconds: float, context) -> dict[str, tuple[np.ndarray, int]]:
    """Publish states at ``rate``, to the echo node and to the controller in turn.

    The target changes every ``slice_seconds``, so both nodes see the same load of the
    machine over the same minutes; each gets ``seconds`` of states in all.
    """
    import rclpy
    from rclpy.executors import SingleThreadedExecutor
    from sensor_msgs.msg import JointState

    from linz_ros.nodes._common import control_qos
    from linz_ros.nodes.adapters import split_seconds

    node = rclpy.create_node("linz_latency_driver", context=context)
    executor = SingleThreadedExecutor(context=context)
    executor.add_node(node)
    qos = control_qos()
    sent: dict[tuple[int, int], float] = {}
    latencies: dict[str, list[float]] = {kind: [] for kind in TOPICS}
    published = {kind: 0 for kind in TOPICS}
    publishers = {}
    for kind, (state_topic, command_topic) in TOPICS.items():
        publishers[kind] = node.create_publisher(JointState, state_topic, qos)

        def on_command(message: JointState, kind: str = kind) -> None:
            key = (message.header.stamp.sec, message.header.stamp.nanosec)
            if key in sent:
                latencies[kind].append(time.time() - sent.pop(key))

        node.create_subscription(JointState, command_topic, on_command, qos)
    end = time.monotonic() + 20
    while any(p.get_subscription_count() == 0 for p in publishers.values()) and time.monotonic() < end:
        executor.spin_once(timeout_sec=0.05)
    state = {"counting": False, "origin": time.monotonic()}

    def tick() -> None:
        kinds = list(TOPICS)
        kind = kinds[int((time.monotonic() - state["origin"]) / slice_seconds) % 2]
        now = time.time()
        message = JointState(name=["shoulder", "elbow"], position=[0.4, 1.2], velocity=[0.0, 0.0])
        message.header.stamp.sec, message.header.stamp.nanosec = split_seconds(now)
        sent[(message.header.stamp.sec, message.header.stamp.nanosec)] = now
        publishers[kind].publish(message)
        if state["counting"]:
            published[kind] += 1

    node.create_timer(1.0 / rate, tick)
    warm = time.monotonic() + 1.0
    while time.monotonic() < warm:
        executor.spin_once(timeout_sec=0.01)
    sent.clear()
    for values in latencies.values():
        values.clear()
    state.update(counting=True, origin=time.monotonic())
    while time.monotonic() - state["origin"] < 2 * seconds:
        executor.spin_once(timeout_sec=0.01)
    state["counting"] = False
    drain = time.monotonic() + 0.3
    while time.monotonic() < drain:
        executor.spin_once(timeout_sec=0.01)
    executor.shutdown()
    node.destroy_node()
    return {kind: (np.array(latencies[kind]) * 1e6, published[kind]) for kind in TOPICS}


def _figures(latencies: np.ndarray, published: int) -> dict:
    return {"p50": float(np.percentile(latencies, 50)) if len(latencies) else float("nan"),
            "p99": float(np.percentile(latencies, 99)) if len(latencies) else float("nan"),
            "received": len(latencies), "published": published, "dropped": max(published - len(latencies), 0)}


def _measure(rate: float, seconds: float, slice_seconds: float, executor: str, artifact: Path,
             folder: Path, backend: str = "native") -> dict[str, dict]:
    """Echo node and controller running side by side, the driver feeding one at a time."""
    import os
    import subprocess

    import rclpy

    env = isolated_environment()
    os.environ.update({k: env[k] for k in ("ROS_DOMAIN_ID", "ROS_AUTOMATIC_DISCOVERY_RANGE")})
    context = rclpy.Context()
    rclpy.init(args=[], context=context)
    with Bringup(folder / f"{int(rate)}-{executor}", env) as bringup:
        log = open(bringup.log_dir / "echo.log", "wb")
        state_topic, command_topic = TOPICS["echo"]
        echo = subprocess.Popen([sys.executable, str(ROOT / "benchmarks" / "echo_node.py"), "--ros-args",
                                 "-p", f"executor:={executor}", "-p", f"state_topic:={state_topic}",
                                 "-p", f"command_topic:={command_topic}"],
                                env=env, stdout=log, stderr=log, start_new_session=True)
        bringup.start("linz_controller", ROOT / "config" / "pick_arm.yaml",
                      {"artifact": str(artifact), "reference": "hold", "executor": executor, "stale_after": 0.5,
                       "backend": backend})
        if not bringup.wait_for_log("linz_controller", "active: commanding", timeout=30):
            echo.terminate()
            raise SystemExit(f"the controller did not become active; see {bringup.log_dir}")
        try:
            results = _driver(rate, seconds, slice_seconds, context)
        finally:
            echo.terminate()
            echo.wait(timeout=10)
            log.close()
    context.try_shutdown()
    return {kind: _figures(*values) for kind, values in results.items()}


def _row(rate: float, executor: str, name: str, row: dict, ratio: float) -> str:
    return (f"{rate:6.0f} {executor:>16} {name:>11} {row['p50']:9.0f} {row['p99']:9.0f} "
            f"{row['dropped']:5d}/{row['published']:<5d} {ratio:6.2f}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=4.0)
    parser.add_argument("--rates", default="500,1000")
    parser.add_argument("--executors", default="single_threaded,events")
    parser.add_argument("--repeats", type=int, default=3, help="runs per setting, each with fresh processes")
    parser.add_argument("--backend", default="native", help="the controller's step: native or python")
    parser.add_argument("--slice", type=float, default=0.5,
                        help="seconds of states to one node before the driver switches to the other")
    args = parser.parse_args()
    folder = Path(tempfile.mkdtemp(prefix="linz_latency_"))
    design = synthesise(load_plant(ROOT / "config" / "plants" / "pick_arm.yaml"))
    artifact = write_artifact(build_document(design, points=8)[0], artifact_path(folder, "pick_arm"))
    print(f"{'rate':>6} {'executor':>16} {'node':>11} {'p50 us':>9} {'p99 us':>9} {'dropped':>8}   p99 ratio")
    verdicts = []
    for rate in (float(r) for r in args.rates.split(",")):
        for executor in args.executors.split(","):
            ratios = []
            for repeat in range(args.repeats):
                rows = _measure(rate, args.seconds, args.slice, executor, artifact, folder / f"r{repeat}",
                                args.backend)
                echo = rows["echo"]
                ratio = rows["controller"]["p99"] / echo["p99"] if echo["p99"] > 0 else float("nan")
                ratios.append(ratio)
                print(_row(rate, executor, "echo", echo, 1.0))
                print(_row(rate, executor, "controller", rows["controller"], ratio))
            median = float(np.median(ratios))
            verdicts.append((rate, executor, median))
            print(f"{'':6} {'':16} controller adds {100 * (median - 1):+.0f} % to the echo p99, median of "
                  f"{len(ratios)} runs ({', '.join(f'{100 * (r - 1):+.0f}' for r in ratios)} %; goal <= +20 %)")
    print()
    for rate, executor, median in verdicts:
        print(f"{rate:6.0f} Hz {executor:>16}: p99 ratio {median:.2f} "
              f"({'meets' if median <= 1.2 else 'misses'} the goal of 1.20)")
    print(f"logs in {folder}")


if __name__ == "__main__":
    main()
