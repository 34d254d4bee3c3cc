"""Benchmark of ``linz check``: analysis time on the bundled plants and on a growing family.

The family is a chain of n pendulums joined by torsion springs, driven by a torque on
the first one only, with the last pendulum's angle as output (relative degree 2n, so
every distribution up to D_(2n-1) is built). Times (analysis, and build: synthesis, printing and verification) are printed as seconds and as
ratios to the smallest chain measured in the same run, with the method that decided
(symbolic, or Taylor-mode jets beyond the symbolic budget) and the growth exponent
fitted by least squares of log t against log states over every chain; the machine is
noisy, so only the ratios and the fitted growth exponent mean anything.

Run:  python benchmarks/check_scaling.py [--max-pendulums 8] [--repeat 1]
"""

from __future__ import annotations

import argparse
import math
import time
from pathlib import Path

import numpy as np

from linz_ros.analysis import analyse
from linz_ros.codegen import build_document
from linz_ros.model import load_plant, plant_from_text
from linz_ros.synthesis import synthesise

ROOT = Path(__file__).resolve().parent.parent


def pendulum_chain(n: int) -> str:
    """Plant-file text of a chain of ``n`` spring-coupled pendulums, input on the first."""
    states = [name for i in range(1, n + 1) for name in (f"th{i}", f"om{i}")]
    lines = [f"plant: chain{n}", f"states: [{', '.join(states)}]", "inputs: [u]",
             "parameters: {a: 9.0, k: 4.0}", "dynamics:"]
    for i in range(1, n + 1):
        coupling = []
        if i > 1:
            coupling.append(f"k*(th{i - 1} - th{i})")
        if i < n:
            coupling.append(f"k*(th{i + 1} - th{i})")
        drive = " + u" if i == 1 else ""
        lines.append(f"  th{i}: om{i}")
        lines.append(f"  om{i}: -a*sin(th{i}){''.join(' + ' + c for c in coupling)}{drive}")
    lines.append(f"outputs: {{y: th{n}}}")
    lines.append("envelope: {" + ", ".join(f"th{i}: [-1, 1]" for i in range(1, n + 1)) + "}")
    return "\n".join(lines) + "\n"


def _time(fn, repeat: int) -> float:
    best = math.inf
    for _ in range(repeat):
        start = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - start)
    return best


def _build_seconds(plant, report, repeat: int) -> tuple[float, str]:
    """Seconds of synthesis, printing and verification (``linz build`` after the analysis), and the law's form."""
    text = plant_from_text(pendulum_chain(plant.n // 2).replace(
        "envelope:", "design: {poles: {y: [%s]}}\nenvelope:" % ", ".join(["-4"] * plant.n)), plant.name)
    result = {}
    seconds = _time(lambda: result.setdefault("d", build_document(synthesise(text, report=report), points=16)),
                    repeat)
    return seconds, result["d"][0]["design"].get("law_form", "expressions")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--max-pendulums", type=int, default=8, help="largest chain (default 8: 16 states)")
    parser.add_argument("--repeat", type=int, default=1)
    parser.add_argument("--samples", type=int, default=256)
    parser.add_argument("--no-build", dest="build", action="store_false", help="time the analysis only")
    args = parser.parse_args()

    print("bundled plants")
    print(f"  {'plant':<18}{'states':>7}{'seconds':>10}")
    for path in sorted((ROOT / "config" / "plants").glob("*.yaml")):
        plant = load_plant(path)
        seconds = _time(lambda: analyse(plant, samples=args.samples), args.repeat)
        print(f"  {plant.name:<18}{plant.n:>7}{seconds:>10.2f}")

    print("\npendulum chain, input on the first, output the last (relative degree 2n)")
    print(f"  {'n':>3}{'states':>7}{'seconds':>10}{'ratio':>9}{'verdict':>9}{'rel.deg':>9}{'build s':>9}"
          f"{'law':>13}  method")
    rows = []
    for n in range(1, args.max_pendulums + 1):
        plant = plant_from_text(pendulum_chain(n), f"chain{n}")
        result = {}
        seconds = _time(lambda: result.setdefault("r", analyse(plant, samples=args.samples)), args.repeat)
        report = result["r"]
        rows.append((plant.n, seconds))
        ratio = seconds / rows[0][1]
        verdict = report.input_state.linearizable
        degree = report.input_output.relative_degree
        method = "jets" if report.input_state.method else "symbolic"
        build, form = _build_seconds(plant, report, args.repeat) if args.build else (math.nan, "-")
        print(f"  {n:>3}{plant.n:>7}{seconds:>10.2f}{ratio:>9.1f}{str(verdict):>9}{str(degree):>9}{build:>9.2f}"
              f"{form:>13}  {method}")
    if len(rows) >= 2:
        states = np.log([r[0] for r in rows])
        seconds = np.log([r[1] for r in rows])
        exponent = np.polyfit(states, seconds, 1)[0]
        print(f"\nfitted growth over {rows[0][0]}..{rows[-1][0]} states (least squares of log t on log states): "
              f"time ~ states^{exponent:.1f}")


if __name__ == "__main__":
    main()
