"""State-to-command latency of the controller node against a bare echo node, over real DDS.

For each state rate (500 Hz, 1 kHz) and executor (rclpy's SingleThreadedExecutor and the
experimental EventsExecutor), this process publishes JointState messages stamped with
the send time and receives the commands (JointState, which the controller stamps with
the state's stamp; the echo node returns the message itself). Latency is receive time
minus stamp, on one clock. The echo node and the controller run in turn under the same
conditions; the figures that matter are the ratios of their p99 latencies, measured in
the same run (the machine is noisy). Goal: the controller adds at most 20 % to the echo
node's p99. Each setting is measured in ``--repeats`` echo/controller pairs, run back to back
in alternating order; the verdict is the median of the pairs' ratios.

Run:  python benchmarks/node_latency.py [--seconds 4] [--rates 500,1000] [--executors single_threaded,events]
                                        [--repeats 3]
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


def _driver(rate: float, seconds: float, context):
    import rclpy
    from rclpy.executors import SingleThreadedExecutor
    from sensor_msgs.msg import JointState

    from linz_ros.nodes._common import control_qos
    from linz_ros.nodes.adapters import split_seconds

    node = rclpy.create_node("linz_latency_driver", context=context)
    executor = SingleThreadedExecutor(context=context)
    executor.add_node(node)
    sent: dict[tuple[int, int], float] = {}
    latencies: list[float] = []
    qos = control_qos()
    publisher = node.create_publisher(JointState, "/pick_arm/joint_states", qos)

    def on_command(message: JointState) -> None:
        key = (message.header.stamp.sec, message.header.stamp.nanosec)
        if key in sent:
            latencies.append(time.time() - sent.pop(key))

    node.create_subscription(JointState, "/pick_arm/joint_efforts", on_command, qos)

    def tick() -> None:
        now = time.time()
        message = JointState(name=["shoulder", "elbow"], position=[0.4, 1.2], velocity=[0.0, 0.0])
        message.header.stamp.sec, message.header.stamp.nanosec = split_seconds(now)
        key = (message.header.stamp.sec, message.header.stamp.nanosec)
        sent[key] = now
        publisher.publish(message)

    # wait for the peer to match, then warm up, then measure
    end = time.monotonic() + 15
    while publisher.get_subscription_count() == 0 and time.monotonic() < end:
        executor.spin_once(timeout_sec=0.05)
    timer = node.create_timer(1.0 / rate, tick)
    warm = time.monotonic() + 1.0
    while time.monotonic() < warm:
        executor.spin_once(timeout_sec=0.01)
    sent.clear()
    latencies.clear()
    count_start = time.monotonic()
    published = 0
    original = tick

    def counting() -> None:
        nonlocal published
        published += 1
        original()

    node.destroy_timer(timer)
    node.create_timer(1.0 / rate, counting)
    while time.monotonic() - count_start < seconds:
        executor.spin_once(timeout_sec=0.01)
    drain = time.monotonic() + 0.3
    while time.monotonic() < drain:
        executor.spin_once(timeout_sec=0.01)
    executor.shutdown()
    node.destroy_node()
    return np.array(latencies) * 1e6, published


def _measure(kind: str, rate: float, seconds: float, executor: str, artifact: Path, folder: Path) -> dict:
    import rclpy

    env = isolated_environment()
    import os
    os.environ.update({k: env[k] for k in ("ROS_DOMAIN_ID", "ROS_AUTOMATIC_DISCOVERY_RANGE")})
    context = rclpy.Context()
    rclpy.init(args=[], context=context)
    with Bringup(folder / f"{kind}-{int(rate)}-{executor}", env) as bringup:
        if kind == "echo":
            import subprocess
            log = open(bringup.log_dir / "echo.log", "wb")
            process = subprocess.Popen([sys.executable, str(ROOT / "benchmarks" / "echo_node.py"), "--ros-args",
                                        "-p", f"executor:={executor}"], env=env, stdout=log, stderr=log,
                                       start_new_session=True)
        else:
            bringup.start("linz_controller", ROOT / "config" / "pick_arm.yaml",
                          {"artifact": str(artifact), "reference": "hold", "executor": executor,
                           "stale_after": 0.5})
            bringup.wait_for_log("linz_controller", "active: commanding", timeout=30)
        try:
            latencies, published = _driver(rate, seconds, context)
        finally:
            if kind == "echo":
                process.terminate()
                process.wait(timeout=10)
    context.try_shutdown()
    return {"p50": float(np.percentile(latencies, 50)) if len(latencies) else float("nan"),
            "p99": float(np.percentile(latencies, 99)) if len(latencies) else float("nan"),
            "received": len(latencies), "published": published,
            "dropped": published - len(latencies)}


def _row(rate: float, executor: str, name: str, row: dict, ratio: float) -> str:
    return (f"{rate:6.0f} {executor:>16} {name:>11} {row['p50']:9.0f} {row['p99']:9.0f} "
            f"{row['dropped']:5d}/{row['published']:<5d} {ratio:6.2f}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=4.0)
    parser.add_argument("--rates", default="500,1000")
    parser.add_argument("--executors", default="single_threaded,events")
    parser.add_argument("--repeats", type=int, default=3,
                        help="echo/controller pairs per setting, run in turn (order alternating)")
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
                # pairs run back to back, the order alternating, so a drift of the machine's load
                # does not favour one node; each pair's ratio is one measurement
                order = ("echo", "controller") if repeat % 2 == 0 else ("controller", "echo")
                rows = {kind: _measure(kind, rate, args.seconds, executor, artifact, folder / f"r{repeat}")
                        for kind in order}
                echo = rows["echo"]
                ratio = rows["controller"]["p99"] / echo["p99"] if echo["p99"] > 0 else float("nan")
                ratios.append(ratio)
                print(_row(rate, executor, "echo", echo, 1.0))
                print(_row(rate, executor, "controller", rows["controller"], ratio))
            median = float(np.median(ratios))
            verdicts.append((rate, executor, median))
            print(f"{'':6} {'':16} controller adds {100 * (median - 1):+.0f} % to the echo p99, median of "
                  f"{len(ratios)} pairs ({', '.join(f'{100 * (r - 1):+.0f}' for r in ratios)} %; goal <= +20 %)")
    print()
    for rate, executor, median in verdicts:
        print(f"{rate:6.0f} Hz {executor:>16}: p99 ratio {median:.2f} "
              f"({'meets' if median <= 1.2 else 'misses'} the goal of 1.20)")
    print(f"logs in {folder}")


if __name__ == "__main__":
    main()
