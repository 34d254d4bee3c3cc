"""How synthesis and the runtime step grow with the number of joints of a serial arm.

For planar arms of 2..6 revolute joints (generated DH tables) and the bundled six-joint
loader arm: the build time (load, analyse, synthesise, generate and verify the artifact),
the artifact's size, the core step (watchdogs and conditioning included) and the law
program alone, against the computed-torque step done with Pinocchio in the same run
(outer loop in numpy, then its recursive Newton-Euler ``rnea``, plus friction). The
machine is noisy: rounds are interleaved and only the ratios mean anything.

Goals: the six-joint arm builds in under a minute; its core step within 3x of Pinocchio's.

Run:  python benchmarks/arm_scaling.py [--calls 1000] [--rounds 5]
"""

from __future__ import annotations

import argparse
import statistics
import time
from pathlib import Path

import numpy as np

from linz_ros.analysis import analyse
from linz_ros.artifact import artifact_from_text, seal
from linz_ros.bench import _pinocchio_step
from linz_ros.codegen import build_document
from linz_ros.model import load_plant, plant_from_text
from linz_ros.runtime import ControllerCore
from linz_ros.runtime.native import make_core
from linz_ros.synthesis import synthesise

ROOT = Path(__file__).resolve().parent.parent


def planar_arm(joints: int) -> str:
    """A planar arm of ``joints`` revolute links (0.3 m, 1.2 kg, tapering) in serial-arm form."""
    q = [f"q{i + 1}" for i in range(joints)]
    rows = []
    for i in range(joints):
        mass = 1.2 * 0.8 ** i
        rows.append(f"    - {{type: revolute, a: 0.3, alpha: 0, d: 0, theta: 0, mass: {mass:.4f}, "
                    f"com: [-0.15, 0, 0], inertia: [0.001, 0.01, {0.01 * 0.8 ** i:.5f}], damping: 0.2}}")
    envelope = ", ".join(f"{name}: [-1.5, 1.5]" for name in q)
    poles = ", ".join(f"y_{name}: [-8, -9]" for name in q)
    return "\n".join([
        f"plant: planar_{joints}",
        f"coordinates: [{', '.join(q)}]",
        f"inputs: [{', '.join(f'tau{i + 1}' for i in range(joints))}]",
        "serial_arm:",
        "  gravity: [0, -9.81, 0]",
        "  joints:",
        *rows,
        f"envelope: {{{envelope}}}",
        f"design: {{rate: 500, poles: {{{poles}}}}}",
        "",
    ])


def build(text: str | None, path: Path | None):
    start = time.perf_counter()
    plant = load_plant(path) if path is not None else plant_from_text(text, "<generated>")
    design = synthesise(plant, report=analyse(plant, samples=256))
    sealed = seal(build_document(design, points=32)[0])
    return design, artifact_from_text(sealed), time.perf_counter() - start, len(sealed.encode())


def per_call(function, calls: int) -> float:
    start = time.perf_counter_ns()
    for k in range(calls):
        function(k)
    return (time.perf_counter_ns() - start) / calls / 1000.0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--calls", type=int, default=1000)
    parser.add_argument("--rounds", type=int, default=5)
    args = parser.parse_args()
    cases = [(f"planar_{n}", planar_arm(n), None) for n in range(2, 7)]
    cases.append(("loader_arm", None, ROOT / "config" / "plants" / "loader_arm.yaml"))
    print(f"{'arm':<12}{'joints':>7}{'build s':>9}{'artifact kB':>12}{'temporaries':>12}{'law us':>9}"
          f"{'python us':>10}{'native us':>10}{'pin us':>8}{'python/pin':>11}{'native/pin':>11}")
    for name, text, path in cases:
        design, artifact, seconds, size = build(text, path)
        nq = design.plant.mechanics.nq
        rng = np.random.default_rng(1)
        states = [rng.uniform(-1.0, 1.0, 2 * nq).tolist() for _ in range(64)]     # Python floats, as a node passes
        core = ControllerCore(artifact)
        native, note = make_core(artifact)
        if note:
            print(f"  note: {note}")
        refs = [core.hold_reference(s) for s in states]
        law, params = artifact.programs["law"], artifact.nominal_parameters.tolist()
        pin_step = _pinocchio_step(design.plant, artifact)
        np_states, np_refs = [np.asarray(s) for s in states], [np.asarray(r) for r in refs]
        clock = [0.0]

        def core_call(k: int) -> None:
            clock[0] += 0.002
            core.step(states[k & 63], refs[k & 63], clock[0])

        def native_call(k: int) -> None:
            clock[0] += 0.002
            native.step(states[k & 63], refs[k & 63], clock[0])

        candidates = {"law": lambda k: law(states[k & 63], params), "core": core_call, "native": native_call,
                      "pin": lambda k: pin_step(np_states[k & 63], np_refs[k & 63])}
        samples = {key: [] for key in candidates}
        for function in candidates.values():
            per_call(function, 100)
        for _ in range(args.rounds):
            for key, function in candidates.items():
                core.reset()
                native.reset()
                clock[0] = 0.0
                samples[key].append(per_call(function, args.calls))
        us = {key: statistics.median(values) for key, values in samples.items()}
        temporaries = len(artifact.document["programs"]["law"]["temporaries"])
        print(f"{name:<12}{nq:>7}{seconds:>9.2f}{size / 1000:>12.1f}{temporaries:>12}{us['law']:>9.1f}"
              f"{us['core']:>10.1f}{us['native']:>10.2f}{us['pin']:>8.2f}{us['core'] / us['pin']:>11.1f}"
              f"{us['native'] / us['pin']:>11.2f}")


if __name__ == "__main__":
    main()
