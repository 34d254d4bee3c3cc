"""Benchmark of the controller step on every bundled plant (what ``linz bench`` measures).

For each plant: the core step (the native one, ``linz_ros.runtime.native``, watchdogs and
conditioning included) and the Python ``ControllerCore.step`` beside it, the law program
alone, the naive hand-written pipeline (plain lambdify to numpy, numpy solve and svd),
lambdify with CSE to the math module, and the law's expressions compiled from C, all on the
same states in interleaved rounds. Prints microseconds per call and the ratios the goals are
stated in (``linz_ros.bench.GOALS``): core / compiled C (goal <= 2) and naive / core (goal >= 4).
The machine is noisy; only the ratios measured in one run mean anything.

Run:  python benchmarks/step_cost.py [--calls 2000] [--rounds 7]
"""

from __future__ import annotations

import argparse
from pathlib import Path

from linz_ros.artifact import artifact_from_text, seal
from linz_ros.bench import run_bench
from linz_ros.codegen import build_document
from linz_ros.model import load_plant
from linz_ros.synthesis import synthesise

ROOT = Path(__file__).resolve().parent.parent


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--calls", type=int, default=2000)
    parser.add_argument("--rounds", type=int, default=7)
    args = parser.parse_args()
    names = ["core", "law_only", "lambdify_cse_math", "compiled_c", "naive"]
    print(f"{'plant':<14}" + "".join(f"{n:>19}" for n in names) + f"{'core/C':>9}{'naive/core':>12}")
    for path in sorted((ROOT / "config" / "plants").glob("*.yaml")):
        design = synthesise(load_plant(path))
        artifact = artifact_from_text(seal(build_document(design, points=16)[0]))
        result = run_bench(artifact, design.plant, calls=args.calls, rounds=args.rounds)
        us, ratios = result.microseconds, result.ratios()
        cells = "".join(f"{us[n]:>16.2f} us" if n in us else f"{'-':>19}" for n in names)
        print(f"{artifact.name:<14}{cells}{ratios.get('core_over_compiled_c', float('nan')):>9.2f}"
              f"{ratios.get('naive_over_core', float('nan')):>12.2f}")


if __name__ == "__main__":
    main()
