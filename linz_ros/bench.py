"""``linz bench``: the cost of one control step, against references measured in the same run.

Everything timed is the artifact's own law: each reference that evaluates A(x), b(x) and
the output chains is made from the artifact's ``law`` program, read through the grammar
into sympy (never ``eval``, never a new synthesis), so a bench can never time a law other
than the one the controller runs. Candidates, all at the same states:

- ``core``: the control step of the chosen backend (``native`` by default: compiled C,
  :mod:`linz_ros.runtime.native`), watchdogs and conditioning included;
- ``core_python``: :meth:`ControllerCore.step`, the Python core, when ``core`` is native;
- ``naive``: what one would write by hand: ``sympy.lambdify`` to numpy of the law's
  expressions without common subexpression elimination (the program's temporaries
  substituted back), then the outer loop in numpy, ``numpy.linalg.solve`` for the law
  and ``numpy.linalg.svd`` for the conditioning;
- ``lambdify_numpy``: plain ``sympy.lambdify`` to numpy, no CSE (expressions only);
- ``lambdify_cse_math``: ``sympy.lambdify`` with CSE to the ``math`` module (expressions only);
- ``compiled_c``: the program with its own temporaries, printed by sympy's C code
  printer, built with the system's C compiler and called through ctypes (the near-limit
  reference);
- ``law_only``: the artifact's compiled law program alone (expressions only);
- ``pinocchio_computed_torque``: for a serial arm with the ``pin`` package installed and
  the plant at hand (the plant file just built from, or the recorded plant file when its
  hash matches the artifact's; the notes say which), the computed-torque step done with
  an independent rigid-body library: the outer loop in numpy, then
  ``tau = rnea(q, q', v)`` (Pinocchio's recursive Newton-Euler, in C++) plus the joint
  friction.

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
from linz_ros.artifact.grammar import parse_expression
from linz_ros.crosscheck import pinocchio_available, pinocchio_reference
from linz_ros.model import Plant
from linz_ros.model._symbolic import tree_to_sympy
from linz_ros.errors import ConfigError
from linz_ros.runtime.native import BACKENDS, make_core

__all__ = ["BenchResult", "run_bench", "GOALS", "LawExpressions", "law_expressions", "plant_behind"]

#: The goals the ratios are judged against: ratio -> (comparison, bound, label).
GOALS = {"core_over_compiled_c": ("<=", 2.0, "goal <= 2"),
         "naive_over_core": (">=", 4.0, "goal >= 4"),
         "core_over_pinocchio": ("<=", 1.0, "goal <= 1 (serial arms)")}


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
            ``core_over_compiled_c``, ``naive_over_core`` and ``core_over_pinocchio``
            (:data:`GOALS`), plus ``core_over_law_only`` and ``python_over_core``, where the
            candidates ran.
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
        if "core_python" in us:
            out["python_over_core"] = us["core_python"] / us["core"]
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


#: The law program's outputs that make up A(x) and b(x): explicit, or mechanical (J M^-1 [B F] + [0 c]).
_EXPLICIT_TERMS = ("A", "b")
_MECHANICAL_TERMS = ("M", "F", "B", "J", "c")


@dataclass
class LawExpressions:
    """The artifact's ``law`` program rebuilt as sympy expressions through the grammar (never eval).

    ``states`` and ``parameters`` are the argument symbols; ``outputs`` maps each output
    of the program to its shape and entries with every temporary substituted (what a
    hand-written, CSE-free version computes); ``temporaries`` and ``entries`` keep the
    program's own common subexpressions (for the C reference).
    """

    states: list[sp.Symbol]
    parameters: list[sp.Symbol]
    outputs: dict[str, tuple[tuple[int, ...], list[sp.Expr]]]
    temporaries: list[tuple[sp.Symbol, sp.Expr]]
    entries: list[sp.Expr]

    def flat(self) -> list[sp.Expr]:
        """Every output entry in the program's order, temporaries substituted."""
        return [e for _, exprs in self.outputs.values() for e in exprs]


def law_expressions(artifact: Artifact) -> LawExpressions:
    """The artifact's law program as sympy expressions, for the references that need them.

    Parameters
    ----------
    artifact : Artifact

    Returns
    -------
    LawExpressions
    """
    arguments, temporaries, outputs = artifact.program_text("law")
    (_, state_names), (_, parameter_names) = arguments
    states = [sp.Symbol(f"x{i}", real=True) for i in range(len(state_names))]
    parameters = [sp.Symbol(f"p{i}", real=True) for i in range(len(parameter_names))]
    full: dict[str, sp.Expr] = {**dict(zip(state_names, states)), **dict(zip(parameter_names, parameters))}
    kept = dict(full)
    kept_temporaries = []
    for i, (name, text) in enumerate(temporaries):
        tree = parse_expression(text)
        full[name] = tree_to_sympy(tree, full)
        symbol = sp.Symbol(f"t_{i}", real=True)
        kept_temporaries.append((symbol, tree_to_sympy(tree, kept)))
        kept[name] = symbol
    rebuilt = {name: (tuple(shape), [tree_to_sympy(parse_expression(e), full) for e in entries])
               for name, shape, entries in outputs}
    kept_entries = [tree_to_sympy(parse_expression(e), kept) for _, _, entries in outputs for e in entries]
    return LawExpressions(states, parameters, rebuilt, kept_temporaries, kept_entries)


def _naive_decoupling(law: LawExpressions, artifact: Artifact) -> Callable:
    """A(x), b(x) by plain lambdify to numpy (and numpy.linalg.solve with M for a mechanical plant)."""
    terms = _MECHANICAL_TERMS if artifact.mechanical_coordinates is not None else _EXPLICIT_TERMS
    functions = []
    for name in terms:
        shape, exprs = law.outputs[name]
        fn = sp.lambdify([law.states, law.parameters], exprs, modules="numpy")
        functions.append(lambda s, p, fn=fn, shape=shape: np.asarray(fn(s, p), dtype=float).reshape(shape))
    if artifact.mechanical_coordinates is None:
        fA, fb = functions
        return lambda state, params: (fA(state, params), fb(state, params))
    fM, fF, fB, fJ, fc = functions

    def mechanical(state: np.ndarray, params: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        M, J = fM(state, params), fJ(state, params)
        return J @ np.linalg.solve(M, fB(state, params)), J @ np.linalg.solve(M, fF(state, params)) + fc(state, params)

    return mechanical


def _naive_step(law: LawExpressions, artifact: Artifact) -> Callable:
    """The hand-written pipeline on the artifact's law: plain lambdify to numpy, numpy solve and svd."""
    decoupling = _naive_decoupling(law, artifact)
    fchain = sp.lambdify([law.states, law.parameters], law.outputs["chain"][1], modules="numpy")
    K = [np.asarray(g) for g in artifact.gains]
    orders = artifact.relative_degree

    def step(state: np.ndarray, params: np.ndarray, ref: np.ndarray) -> np.ndarray:
        A, b = decoupling(state, params)
        chain = np.asarray(fchain(state, params), dtype=float).ravel()
        v = np.empty(len(orders))
        i = j = 0
        for c, r in enumerate(orders):
            v[c] = ref[j + r] - K[c][-r:] @ (chain[i:i + r] - ref[j:j + r])   # no integral action here
            i += r
            j += r + 1
        u = np.linalg.solve(A, v - b)
        sigma = np.linalg.svd(A, compute_uv=False)
        _ = sigma[0] / sigma[-1]
        return u

    return step


class _NoCompiledReference(Exception):
    """The compiled-C reference could not be made (the message says why)."""


def _c_library(law: LawExpressions, artifact: Artifact, workdir: Path) -> Callable:
    """The artifact's law program (its own temporaries) as one C function, compiled and loaded with ctypes.

    Raises ``_NoCompiledReference`` with the reason when there is no compiler or it fails.
    """
    compiler = shutil.which("cc") or shutil.which("gcc")
    if compiler is None:
        raise _NoCompiledReference("no C compiler found (cc or gcc)")
    slots = {s: sp.Symbol(f"x[{i}]") for i, s in enumerate(law.states)}
    slots.update({s: sp.Symbol(f"p[{i}]") for i, s in enumerate(law.parameters)})
    body = [f"    const double {t} = {sp.ccode(e.xreplace(slots))};" for t, e in law.temporaries]
    body += [f"    out[{i}] = {sp.ccode(e.xreplace(slots))};" for i, e in enumerate(law.entries)]
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
    x_buffer = (ctypes.c_double * len(law.states))()
    p_buffer = (ctypes.c_double * len(law.parameters))(*artifact.nominal_parameters.tolist())
    out_buffer = (ctypes.c_double * len(law.entries))()
    function = handle.law

    def call(state: list[float]) -> None:
        x_buffer[:] = state
        function(x_buffer, p_buffer, out_buffer)

    call._keep = (handle, x_buffer, p_buffer, out_buffer)  # type: ignore[attr-defined]
    return call


def _pinocchio_step(plant: Plant | None, artifact: Artifact) -> Callable[[np.ndarray, np.ndarray], np.ndarray] | None:
    """Computed torque with Pinocchio for joint-space outputs of a serial arm (None otherwise)."""
    mech = plant.mechanics if plant is not None else None
    if mech is None or mech.form != "serial_arm" or not artifact.computed_torque or not pinocchio_available():
        return None
    import pinocchio as pin

    reference = pinocchio_reference(plant)
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


def plant_behind(artifact: Artifact) -> tuple[Plant | None, str]:
    """The plant file an artifact was built from, when its hash still matches the artifact's.

    Parameters
    ----------
    artifact : Artifact

    Returns
    -------
    tuple
        The loaded plant (None when there is none to trust) and a note on where it came
        from, or why there is none.
    """
    from linz_ros.model import load_plant

    if artifact.plant_check != "matches":      # a changed plant file is another machine
        return None, f"pinocchio_computed_torque not measured: {artifact.plant_check}"
    path = next((p for p in artifact.recorded_plant_files() if p.is_file()), None)
    if path is None:
        return None, "pinocchio_computed_torque not measured: the plant file was not found"
    return load_plant(path), f"pinocchio_computed_torque: the robot of {path}, whose hash matches the artifact's"


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


def run_bench(artifact: Artifact, plant: Plant | None = None, calls: int = 2000, rounds: int = 7,
              seed: int = 3, notes: list[str] | None = None, backend: str = "native") -> BenchResult:
    """Time the core step and the references on the same states, all on the artifact's own law.

    Parameters
    ----------
    artifact : Artifact
        What is timed; every reference that evaluates the law is made from its ``law``
        program (never from a new synthesis).
    plant : Plant, optional
        The plant the artifact was built from (the one just built, or a plant file whose
        hash matches the artifact's), for the Pinocchio reference of a serial arm only.
    calls : int
        Calls per candidate per round.
    rounds : int
    seed : int
        Of the states (uniform in the envelope; +-0.5 around the operating point where
        the envelope is silent).
    notes : list of str, optional
        Notes to start the result's notes with (where the plant came from).
    backend : {"native", "python"}
        Of the step timed as ``core``.

    Returns
    -------
    BenchResult
    """
    rng = np.random.default_rng(seed)
    envelope = artifact.envelope
    bounds = [envelope.get(s, (x - 0.5, x + 0.5)) for s, x in zip(artifact.states, artifact.operating_point)]
    states = [[float(rng.uniform(lo, hi)) for lo, hi in bounds] for _ in range(64)]
    notes = list(notes or [])
    core, fallback = make_core(artifact, backend=_checked_backend(backend))
    notes.append(fallback or f"core: the {core.backend} step")
    python_core = make_core(artifact, backend="python")[0] if core.backend != "python" else None
    own = [s[:core.n] for s in states]     # a dynamic extension's core keeps its compensator itself
    if core.n < len(artifact.states):
        notes.append("dynamic extension: core steps the plant's own state and integrates its compensator; "
                     "the references evaluate the extended law")
    refs = [core.hold_reference(s) for s in own]
    params = artifact.nominal_parameters.tolist()
    law_program = artifact.programs["law"]
    clock = [0.0]

    def core_call(k: int) -> None:
        clock[0] += 0.001
        core.step(own[k & 63], refs[k & 63], clock[0])

    def python_call(k: int) -> None:
        clock[0] += 0.001
        python_core.step(own[k & 63], refs[k & 63], clock[0])

    extra = {"core_python": python_call} if python_core is not None else {}

    if artifact.elastic or artifact.law_form == "chain":
        notes.append(("elastic joints: the core assembles A and b from jets of the law program" if artifact.elastic
                      else "chain form: the core forms the chains, A and b by Taylor-mode jets of f, G and h")
                     + " each step, which the lambdify and C references do not reproduce; timed: core and law_only")
        candidates = {"core": core_call, **extra, "law_only": lambda k: law_program(states[k & 63], params)}
        samples = _interleaved_rounds(candidates, calls, rounds, (core, python_core), clock, notes)
        return BenchResult(artifact.name, calls, rounds,
                           {name: statistics.median(values) for name, values in samples.items()}, notes)
    law = law_expressions(artifact)
    naive = _naive_step(law, artifact)
    np_states = [np.asarray(s) for s in states]
    np_refs = [np.asarray(r) for r in refs]
    np_params = np.asarray(params)
    plain_numpy = sp.lambdify([law.states, law.parameters], law.flat(), modules="numpy")
    cse_math = sp.lambdify([law.states, law.parameters], law.flat(), modules="math", cse=True)
    candidates: dict[str, Callable[[int], object]] = {
        "core": core_call,
        **extra,
        "law_only": lambda k: law_program(states[k & 63], params),
        "naive": lambda k: naive(np_states[k & 63], np_params, np_refs[k & 63]),
        "lambdify_numpy": lambda k: plain_numpy(np_states[k & 63], np_params),
        "lambdify_cse_math": lambda k: cse_math(states[k & 63], params),
    }
    computed_torque = _pinocchio_step(plant, artifact)
    if computed_torque is not None:
        candidates["pinocchio_computed_torque"] = lambda k: computed_torque(np_states[k & 63], np_refs[k & 63])
    with tempfile.TemporaryDirectory() as folder:
        try:
            c_law = _c_library(law, artifact, Path(folder))
            candidates["compiled_c"] = lambda k: c_law(states[k & 63])
        except _NoCompiledReference as why:
            notes.append(f"{why}: compiled_c not measured")
        samples = _interleaved_rounds(candidates, calls, rounds, (core, python_core), clock, notes)
    microseconds = {name: statistics.median(values) for name, values in samples.items()}
    return BenchResult(artifact.name, calls, rounds, microseconds, notes)


def _checked_backend(backend: str) -> str:
    if backend not in BACKENDS:
        raise ConfigError("--backend", f"expected one of {', '.join(BACKENDS)}, got {backend!r}")
    return backend


def _interleaved_rounds(candidates: dict[str, Callable[[int], object]], calls: int, rounds: int,
                        cores: tuple, clock: list[float], notes: list[str]) -> dict[str, list[float]]:
    """Microseconds per call of every candidate, one sample per round, rounds interleaved."""
    for function in candidates.values():       # warm up
        _time_per_call(function, min(calls, 200, _calls_for(function, calls, 0.5)))
    per_round = {name: _calls_for(function, calls) for name, function in candidates.items()}
    notes.extend(f"{name}: {count} calls per round (slow candidate)" for name, count in per_round.items()
                 if count < calls)
    samples: dict[str, list[float]] = {name: [] for name in candidates}
    for _ in range(rounds):
        for name, function in candidates.items():
            for core in cores:
                if core is not None:
                    core.reset()
            clock[0] = 0.0
            samples[name].append(_time_per_call(function, per_round[name]))
    return samples
