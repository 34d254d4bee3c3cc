"""What the executor costs and how a campaign scales with worker processes.

The same campaign cases of the pick arm (initial states over the envelope, a mass
mismatch range) are run three ways in one session, interleaved over rounds:

- a plain loop in one fresh process: each case as ``linz sim`` runs it (``run_case``:
  ``run_settings`` + ``simulate``), no executor;
- the local executor with 1 worker process;
- the local executor with 2 worker processes.

Printed: runs per second of each, the executor's overhead per run against the plain loop
(goal <= 10 %: worker start-up, shipping the artifact and the results included), and the
scaling efficiency rate(2) / (2 rate(1)) (goal >= 0.8 on a 2-core machine). Ratios within
a round only mean anything: the machine is shared and noisy. Medians over rounds.

Worker processes are spawned: each imports this module (as every multiprocessing main module
is) without running ``main``; the offline tower (sympy) is imported inside ``main`` only, so
a worker's start-up is what ``linz campaign``'s is.

Run:  python benchmarks/campaign_scaling.py [--runs 400] [--rounds 3] [--duration 2]
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from pathlib import Path

from linz_ros.artifact import load_artifact
from linz_ros.campaign.spec import draw_cases, read_campaign
from linz_ros.commands.campaign import CaseItem, prepare_case_context, run_case
from linz_ros.commands.sim import SimRequest
from linz_ros.executor import ExecutorSettings, Shipment, run_tasks

ROOT = Path(__file__).resolve().parent.parent


def _items(artifact_path: Path, runs: int, duration: float) -> list[CaseItem]:
    artifact = load_artifact(artifact_path)
    spec = read_campaign({"runs": runs, "seed": 5, "duration": duration, "mismatch": {"m2": [-15, 15]}},
                         artifact, "benchmark")
    base = SimRequest(str(artifact_path))
    return [CaseItem(spec, case, base) for case in draw_cases(spec)]


def _plain_loop(artifact_path: Path, items: list[CaseItem]) -> tuple[float, list]:
    started = time.perf_counter()
    artifact = prepare_case_context(artifact_path.read_text())
    results = [run_case(artifact, item) for item in items]
    return time.perf_counter() - started, results


def _plain_loop_fresh(artifact_path: Path, items: list[CaseItem]) -> tuple[float, list]:
    """The plain loop in a fresh process of its own (timed inside it), like a worker: not beside the
    offline tower this process loaded to build the artifact (a larger heap slows the collector)."""
    import multiprocessing

    with multiprocessing.get_context("spawn").Pool(1) as pool:
        return pool.apply(_plain_loop, (artifact_path, items))


def _executor(artifact_path: Path, items: list[CaseItem], workers: int) -> tuple[float, list]:
    started = time.perf_counter()
    execution = run_tasks(prepare_case_context, run_case, Shipment.of(artifact_path.read_text()), items,
                          ExecutorSettings(workers=workers))
    seconds = time.perf_counter() - started
    return seconds, [execution.outcomes[k].value for k in range(len(items))]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=400)
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--duration", type=float, default=2.0, help="seconds of each run")
    args = parser.parse_args()
    from linz_ros.codegen import write_artifact
    from linz_ros.commands._options import DesignChoices
    from linz_ros.commands.build import synthesise_and_generate

    with tempfile.TemporaryDirectory() as scratch:
        made = synthesise_and_generate(str(ROOT / "config/plants/pick_arm.yaml"), DesignChoices())
        artifact_path = write_artifact(made.document, Path(scratch) / "pick_arm.artifact.json")
        items = _items(artifact_path, args.runs, args.duration)
        _plain_loop_fresh(artifact_path, items[:4])            # compile the native step once (cached on disk)
        rows = []
        for _ in range(args.rounds):
            plain, reference = _plain_loop_fresh(artifact_path, items)
            one, results_one = _executor(artifact_path, items, 1)
            two, results_two = _executor(artifact_path, items, 2)
            if results_one != reference or results_two != reference:
                raise SystemExit("the executor's results differ from the plain loop's: not comparable")
            rows.append((plain, one, two))
            print(f"round: plain {args.runs / plain:6.1f} runs/s, 1 worker {args.runs / one:6.1f}, "
                  f"2 workers {args.runs / two:6.1f}  (overhead {one / plain - 1:+.1%}, "
                  f"scaling {one / (2 * two):.2f})")
    plain, one, two = (statistics.median(r[i] for r in rows) for i in range(3))
    overhead = statistics.median(r[1] / r[0] - 1 for r in rows)
    scaling = statistics.median(r[1] / (2 * r[2]) for r in rows)
    print(f"\n{args.runs} runs of {args.duration:g} s (pick arm, 500 Hz), median of {args.rounds} rounds:")
    print(f"  plain loop in one process: {args.runs / plain:7.1f} runs/s")
    print(f"  executor, 1 worker:        {args.runs / one:7.1f} runs/s")
    print(f"  executor, 2 workers:       {args.runs / two:7.1f} runs/s")
    print(f"  executor overhead per run: {overhead:+.1%}  (goal <= +10 %: {'met' if overhead <= 0.10 else 'MISSED'})")
    print(f"  scaling efficiency 1 -> 2: {scaling:.2f}    (goal >= 0.80: {'met' if scaling >= 0.8 else 'MISSED'})")


if __name__ == "__main__":
    main()
