"""``linz bench``: the cost of one control step, against references measured in the same run.

Candidates, all evaluating the same law (A(x), b(x) and the output chains) at the same
states:

- ``core``: :meth:`ControllerCore.step`, watchdogs and conditioning included;
- ``naive``: what one would write by hand: ``sympy.lambdify`` to numpy without common
  subexpression elimination, then the outer loop in numpy, ``numpy.linalg.solve`` for
  the law and ``numpy.linalg.svd`` for the conditioning;
- ``lambdify_numpy``: plain ``sympy.lambdify`` to numpy, no CSE (expressions only);
- ``lambdify_cse_math``: ``sympy.lambdify`` with CSE to the ``math`` module (expressions only);
- ``compiled_c``: the expressions alone, printed by sympy's C code printer with CSE,
  built with the system's C compiler and called through ctypes (the near-limit reference);
- ``law_only``: the artifact's compiled law program alone (expressions only);
- ``pinocchio_computed_torque``: for a serial arm with the ``pin`` package installed,
  the computed-torque step done with an independent rigid-body library: the outer loop
  in numpy, then ``tau = rnea(q, q', v)`` (Pinocchio's recursive Newton-Euler, in C++)
  plus the joint friction.

The machine is noisy, so rounds of the candidates are interleaved and each candidate's
median over rounds is reported; only the ratios mean anything.
"""

from __future__ import annotations

import ctypes
import shutil
import statistics
import subprocess
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import sympy as sp

from linz_ros.artifact import Artifact
from linz_ros.crosscheck import pinocchio_available, pinocchio_reference
from linz_ros.runtime import ControllerCore
from linz_ros.synthesis import Design

__all__ = ["BenchResult", "run_bench", "GOALS"]

#: The goals the ratios are judged against: ratio -> (comparison, bound, label).
GOALS = {"core_over_compiled_c": ("<=", 10.0, "goal <= 10"),
         "naive_over_core": (">=", 4.0, "goal >= 4"),
         "core_over_pinocchio": ("<=", 3.0, "goal <= 3 (serial arms)")}


@dataclass
class BenchResult:
    """Microseconds per call of each candidate (median over rounds) and the ratios."""

    plant: str
    calls: int
    rounds: int
    microseconds: dict[str, float]
    notes: list[str] = field(default_factory=list)

    def ratios(self) -> dict[str, float]:
        """The ratios the goals are stated in.

        Returns
        -------
        dict
            ``core_over_compiled_c`` (goal <= 10) and ``naive_over_core`` (goal >= 4),
            plus ``core_over_law_only``, where the candidates ran.
        """
        us = self.microseconds
        out = {}
        if "compiled_c" in us:
            out["core_over_compiled_c"] = us["core"] / us["compiled_c"]
        if "naive" in us:
            out["naive_over_core"] = us["naive"] / us["core"]
        if "law_only" in us:
            out["core_over_law_only"] = us["core"] / us["law_only"]
        if "lambdify_numpy" in us and "compiled_c" in us:
            out["lambdify_numpy_over_compiled_c"] = us["lambdify_numpy"] / us["compiled_c"]
        if "lambdify_cse_math" in us:
            out["lambdify_cse_math_over_law_only"] = us["lambdify_cse_math"] / us["law_only"]
        if "pinocchio_computed_torque" in us:
            out["core_over_pinocchio"] = us["core"] / us["pinocchio_computed_torque"]
        return out

    def goals(self) -> dict[str, dict]:
        """Each ratio that has a goal: its value, the goal, and whether it was met.

        Returns
        -------
        dict
            Ratio name -> ``{"ratio", "goal", "met"}``.
        """
        out = {}
        for name, value in self.ratios().items():
            if name in GOALS:
                comparison, bound, label = GOALS[name]
                met = value <= bound if comparison == "<=" else value >= bound
                out[name] = {"ratio": value, "goal": label, "met": bool(met)}
        return out

    def to_json(self) -> dict:
        """The ``linz bench --json`` object."""
        return {"plant": self.plant, "calls_per_round": self.calls, "rounds": self.rounds,
                "microseconds_per_call": self.microseconds, "ratios": self.ratios(), "goals": self.goals(),
                "notes": self.notes}

    def render_text(self) -> str:
        """A table of microseconds per call and the ratios."""
        lines = [f"linz bench {self.plant}: {self.calls} calls x {self.rounds} rounds (median of rounds)", ""]
        for name, value in sorted(self.microseconds.items(), key=lambda kv: kv[1]):
            lines.append(f"  {name:<20} {value:9.2f} us")
        lines.append("")
        goals = self.goals()
        for name, value in self.ratios().items():
            verdict = f"({goals[name]['goal']}: {'met' if goals[name]['met'] else 'MISSED'})" if name in goals else ""
            lines.append(f"  {name:<32} {value:7.2f}  {verdict}".rstrip())
        lines.extend(f"  note: {note}" for note in self.notes)
        return "\n".join(lines)


def _structure_terms(design: Design) -> list[sp.Matrix]:
    """The terms the law is made of: A and b, or for a mechanical plant M, F, B, J and J' q'."""
    if not design.mechanical:
        return [design.A, design.b]
    mech = design.plant.mechanics
    h = sp.Matrix([c.expression for c in design.chains])
    return [mech.M, mech.F, mech.B, mech.decoupling_jacobian(h), mech.output_bias(h)]


def _law_expressions(design: Design) -> tuple[list[sp.Symbol], list[sp.Symbol], list[sp.Expr]]:
    plant = design.plant
    chain = [e for c in design.chains for e in c.derivatives]
    terms = [e for matrix in _structure_terms(design) for e in matrix]
    return list(plant.states), list(plant.parameters), terms + chain


def _naive_decoupling(design: Design) -> Callable:
    """A(x), b(x) by plain lambdify to numpy (and numpy.linalg.solve with M for a mechanical plant)."""
    x, p = list(design.plant.states), list(design.plant.parameters)
    m = design.plant.m
    functions = [sp.lambdify([x, p], matrix, modules="numpy") for matrix in _structure_terms(design)]
    if not design.mechanical:
        fA, fb = functions

        def explicit(state: np.ndarray, params: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
            return (np.asarray(fA(state, params), dtype=float).reshape(m, m),
                    np.asarray(fb(state, params), dtype=float).ravel())

        return explicit
    nq = design.plant.mechanics.nq
    fM, fF, fB, fJ, fc = functions

    def mechanical(state: np.ndarray, params: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        M = np.asarray(fM(state, params), dtype=float).reshape(nq, nq)
        J = np.asarray(fJ(state, params), dtype=float).reshape(m, nq)
        F = np.asarray(fF(state, params), dtype=float).ravel()
        B = np.asarray(fB(state, params), dtype=float).reshape(nq, m)
        c = np.asarray(fc(state, params), dtype=float).ravel()
        return J @ np.linalg.solve(M, B), J @ np.linalg.solve(M, F) + c

    return mechanical


def _naive_step(design: Design, artifact: Artifact) -> Callable:
    """The hand-written pipeline: plain lambdify to numpy, numpy solve and svd."""
    decoupling = _naive_decoupling(design)
    x, p = list(design.plant.states), list(design.plant.parameters)
    fchain = sp.lambdify([x, p], sp.Matrix([e for c in design.chains for e in c.derivatives]), modules="numpy")
    K = [np.asarray(g) for g in artifact.gains]
    orders = artifact.relative_degree

    def step(state: np.ndarray, params: np.ndarray, ref: np.ndarray) -> np.ndarray:
        A, b = decoupling(state, params)
        chain = np.asarray(fchain(state, params), dtype=float).ravel()
        v = np.empty(len(orders))
        i = j = 0
        for c, r in enumerate(orders):
            v[c] = ref[j + r] - K[c] @ (chain[i:i + r] - ref[j:j + r])
            i += r
            j += r + 1
        u = np.linalg.solve(A, v - b)
        sigma = np.linalg.svd(A, compute_uv=False)
        _ = sigma[0] / sigma[-1]
        return u

    return step


class _NoCompiledReference(Exception):
    """The compiled-C reference could not be made (the message says why)."""


def _c_library(design: Design, workdir: Path) -> Callable:
    """The law's expressions as one C function, compiled and loaded with ctypes.

    Raises ``_NoCompiledReference`` with the reason when there is no compiler or it fails.
    """
    compiler = shutil.which("cc") or shutil.which("gcc")
    if compiler is None:
        raise _NoCompiledReference("no C compiler found (cc or gcc)")
    x, p, exprs = _law_expressions(design)
    slots = {s: sp.Symbol(f"x[{i}]") for i, s in enumerate(x)}
    slots.update({s: sp.Symbol(f"p[{i}]") for i, s in enumerate(p)})
    exprs = [e.xreplace(slots) for e in exprs]
    temporaries, reduced = sp.cse(exprs, symbols=sp.numbered_symbols("t_"), order="none")
    body = [f"    const double {t} = {sp.ccode(e)};" for t, e in temporaries]
    body += [f"    out[{i}] = {sp.ccode(e)};" for i, e in enumerate(reduced)]
    source = ("#include <math.h>\nvoid law(const double *x, const double *p, double *out) {\n"
              + "\n".join(body) + "\n}\n")
    c_file, library = workdir / "law.c", workdir / "law.so"
    c_file.write_text(source)
    try:
        subprocess.run([compiler, "-O2", "-shared", "-fPIC", "-o", str(library), str(c_file), "-lm"],
                       check=True, capture_output=True, timeout=120)
    except subprocess.CalledProcessError as err:
        first = (err.stderr or b"").decode(errors="replace").strip().splitlines()
        raise _NoCompiledReference(f"{compiler} failed on the printed law ({first[0] if first else err})") from None
    except (subprocess.SubprocessError, OSError) as err:
        raise _NoCompiledReference(f"{compiler} could not be run ({err})") from None
    handle = ctypes.CDLL(str(library))
    handle.law.restype = None
    handle.law.argtypes = [ctypes.POINTER(ctypes.c_double)] * 3
    x_buffer = (ctypes.c_double * len(x))()
    p_buffer = (ctypes.c_double * len(p))(*[float(v) for v in design.plant.parameters.values()])
    out_buffer = (ctypes.c_double * len(exprs))()
    law = handle.law

    def call(state: list[float]) -> None:
        x_buffer[:] = state
        law(x_buffer, p_buffer, out_buffer)

    call._keep = (handle, x_buffer, p_buffer, out_buffer)  # type: ignore[attr-defined]
    return call


def _pinocchio_step(design: Design, artifact: Artifact) -> Callable[[list[float], list[float]], np.ndarray] | None:
    """Computed torque with Pinocchio for joint-space outputs of a serial arm (None otherwise)."""
    mech = design.plant.mechanics
    if mech is None or not mech.links or not artifact.computed_torque or not pinocchio_available():
        return None
    import pinocchio as pin

    reference = pinocchio_reference(design.plant)
    model, data, damping = reference.model, reference.data, reference.damping
    nq = mech.nq
    k0 = np.array([float(g[-2]) for g in artifact.gains])
    k1 = np.array([float(g[-1]) for g in artifact.gains])

    def step(state: np.ndarray, ref: np.ndarray) -> np.ndarray:
        q, qd = state[:nq], state[nq:]
        # ref per chain: y_ref, y_ref', y_ref''
        v = ref[2::3] - k0 * (q - ref[0::3]) - k1 * (qd - ref[1::3])
        return pin.rnea(model, data, q, qd, v) + damping * qd

    return step


def _calls_for(function: Callable[[int], object], calls: int, budget: float = 0.25) -> int:
    """Calls per round so that one round of a slow candidate stays near ``budget`` seconds."""
    start = time.perf_counter()
    function(0)
    once = time.perf_counter() - start
    return max(3, min(calls, int(budget / once) if once > 0 else calls))


def _time_per_call(function: Callable[[int], object], calls: int) -> float:
    start = time.perf_counter_ns()
    for k in range(calls):
        function(k)
    return (time.perf_counter_ns() - start) / calls / 1000.0


def run_bench(artifact: Artifact, design: Design | None, calls: int = 2000, rounds: int = 7,
              seed: int = 3) -> BenchResult:
    """Time the core step and the references on the same states.

    Parameters
    ----------
    artifact : Artifact
    design : Design, optional
        The symbolic design behind the artifact; without it only the artifact's own
        candidates (``core``, ``law_only``) run.
    calls : int
        Calls per candidate per round.
    rounds : int
    seed : int
        Of the states (uniform in the envelope; +-0.5 around the operating point where
        the envelope is silent).

    Returns
    -------
    BenchResult
    """
    rng = np.random.default_rng(seed)
    envelope = artifact.envelope
    bounds = [envelope.get(s, (x - 0.5, x + 0.5)) for s, x in zip(artifact.states, artifact.operating_point)]
    states = [[float(rng.uniform(lo, hi)) for lo, hi in bounds] for _ in range(64)]
    core = ControllerCore(artifact)
    refs = [core.hold_reference(s) for s in states]
    params = artifact.nominal_parameters.tolist()
    law = artifact.programs["law"]
    notes = []
    clock = [0.0]

    def core_call(k: int) -> None:
        clock[0] += 0.001
        core.step(states[k & 63], refs[k & 63], clock[0])

    candidates: dict[str, Callable[[int], object]] = {
        "core": core_call,
        "law_only": lambda k: law(states[k & 63], params),
    }
    with tempfile.TemporaryDirectory() as folder:
        if design is not None:
            naive = _naive_step(design, artifact)
            np_states = [np.asarray(s) for s in states]
            np_refs = [np.asarray(r) for r in refs]
            np_params = np.asarray(params)
            candidates["naive"] = lambda k: naive(np_states[k & 63], np_params, np_refs[k & 63])
            computed_torque = _pinocchio_step(design, artifact)
            if computed_torque is not None:
                candidates["pinocchio_computed_torque"] = lambda k: computed_torque(np_states[k & 63],
                                                                                     np_refs[k & 63])
            x, p, exprs = _law_expressions(design)
            plain_numpy = sp.lambdify([x, p], exprs, modules="numpy")
            candidates["lambdify_numpy"] = lambda k: plain_numpy(np_states[k & 63], np_params)
            cse_math = sp.lambdify([x, p], exprs, modules="math", cse=True)
            candidates["lambdify_cse_math"] = lambda k: cse_math(states[k & 63], params)
            try:
                c_law = _c_library(design, Path(folder))
                candidates["compiled_c"] = lambda k: c_law(states[k & 63])
            except _NoCompiledReference as why:
                notes.append(f"{why}: compiled_c not measured")
        else:
            notes.append("plant file not available, or changed since the build: only the artifact's own "
                         "candidates were timed")
        for function in candidates.values():       # warm up
            _time_per_call(function, min(calls, 200, _calls_for(function, calls, 0.5)))
        per_round = {name: _calls_for(function, calls) for name, function in candidates.items()}
        notes.extend(f"{name}: {count} calls per round (slow candidate)" for name, count in per_round.items()
                     if count < calls)
        samples: dict[str, list[float]] = {name: [] for name in candidates}
        for _ in range(rounds):
            for name, function in candidates.items():
                core.reset()
                clock[0] = 0.0
                samples[name].append(_time_per_call(function, per_round[name]))
    microseconds = {name: statistics.median(values) for name, values in samples.items()}
    return BenchResult(artifact.name, calls, rounds, microseconds, notes)
