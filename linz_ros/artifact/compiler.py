"""Compile programs of the shared grammar into fast Python functions, without sympy.

A *program* is a list of named temporaries followed by named outputs, every one an
expression of the grammar (:mod:`linz_ros.artifact.grammar`) over declared argument
names. Compilation parses each expression into a tree, checks every name against the
declarations, and then *emits* Python source from the tree using only tokens of its
own: local slot names, numbers re-printed from ``float``, operators, and calls of the
whitelisted functions. The artifact's text never reaches ``compile``; only code written
by this module does, so loading an artifact cannot run anything but arithmetic.

Four backends: ``"math"`` (scalars, the fastest for one control step in CPython),
``"numpy"`` (element-wise on arrays, for sweeps and plots) and ``"jet2"``
(:mod:`linz_ros.artifact._jet2`): the first argument vector's entries are second-order
jets, triples of the Taylor coefficients of t^0, t^1, t^2 along a curve, and the program
returns the triples of its outputs, so time derivatives of M(q(t)) come out of the same
program without symbolic derivatives; it is emitted as scalar straight-line code from
the same parse tree, in three phases (``Program.phases``), one per order; and ``"taylor"``
(:mod:`linz_ros.artifact._taylor_backend`): jets of any order, as calls of
:mod:`linz_ros.artifact.taylor`, for Lie-derivative chains evaluated at run time.

Public names
------------
Program            a compiled program: call it with argument vectors, get a flat tuple
compile_program    build a Program from declarations, temporaries and outputs
c_source           the same program as C source, for the native control step
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from functools import partial
from typing import Any, Callable, Sequence

import numpy as np

from linz_ros.artifact import taylor
from linz_ros.artifact._c_backend import CEmitter, CJet2Emitter, LineEmitter
from linz_ros.artifact._jet2 import Jet2Emitter, run_phases
from linz_ros.artifact._taylor_backend import TaylorEmitter
from linz_ros.artifact._tokens import MATH_FUNCTIONS, MAX_NESTING, integer_exponent, leaf_text, sign
from linz_ros.artifact.grammar import CONSTANTS, Node, fold, parse_expression
from linz_ros.errors import ArtifactError, ExpressionSyntaxError

__all__ = ["Program", "compile_program", "c_source", "OutputSlot"]

_NUMPY_FUNCTIONS = {
    "sin": "_n.sin", "cos": "_n.cos", "tan": "_n.tan", "asin": "_n.arcsin", "acos": "_n.arccos",
    "atan": "_n.arctan", "atan2": "_n.arctan2", "sinh": "_n.sinh", "cosh": "_n.cosh",
    "tanh": "_n.tanh", "exp": "_n.exp", "log": "_n.log", "sqrt": "_n.sqrt", "abs": "_n.abs",
    "sign": "_n.sign",
}
_BACKENDS = ("math", "numpy", "jet2", "taylor")
# precedence of emitted Python: sums < products < unary minus < powers < atoms
_PREC = {"add": 1, "sub": 1, "mul": 2, "div": 2, "neg": 3, "pow": 4}
_ATOM = 5
_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")      # used with fullmatch: no trailing newline


@dataclass(frozen=True)
class OutputSlot:
    """Where one named output sits in the flat result: ``result[offset:offset+size]``."""

    name: str
    shape: tuple[int, ...]
    offset: int

    @property
    def size(self) -> int:
        """Number of entries."""
        return int(np.prod(self.shape)) if self.shape else 1


class Program:
    """A compiled program: ``program(*vectors)`` returns a flat tuple of all outputs.

    Attributes
    ----------
    name : str
        What the program computes (for messages).
    arguments : tuple of (str, tuple of str)
        Each argument vector's name and the names of its entries, in order.
    slots : dict of str -> OutputSlot
        Layout of the flat result.
    source : str
        The emitted Python, for inspection.
    backend : str
        ``"math"``, ``"numpy"`` or ``"jet2"``.
    phases : callable or None
        jet2 only: the generator function ``phases(c0, *others)`` that yields the
        outputs' coefficients of order 0, then of order 1 and 2 after each ``send`` of the
        first argument vector's coefficients of that order (:mod:`linz_ros.artifact._jet2`).
    """

    def __init__(self, name: str, arguments: tuple[tuple[str, tuple[str, ...]], ...],
                 slots: dict[str, OutputSlot], function: Callable, source: str, backend: str,
                 phases: Callable | None = None) -> None:
        self.name = name
        self.arguments = arguments
        self.slots = slots
        self.source = source
        self.backend = backend
        self.phases = phases
        self._function = function
        self.size = sum(s.size for s in slots.values())

    def __call__(self, *vectors: Sequence[float]) -> tuple:
        """Evaluate; raises ArithmeticError or ValueError on a domain error (math backend)."""
        return self._function(*vectors)

    @property
    def function(self) -> Callable:
        """The compiled function itself, as :meth:`__call__` without the call through it (hot loops)."""
        return self._function

    def evaluate(self, *vectors: Sequence[float]) -> dict[str, np.ndarray]:
        """Evaluate and reshape every output; domain errors give nan instead of raising.

        Parameters
        ----------
        *vectors : sequence of float
            One vector per declared argument, in order.

        Returns
        -------
        dict of str -> numpy.ndarray
            Each output in its declared shape (with a trailing sample axis on the numpy
            backend when the arguments are arrays of samples).
        """
        try:
            with np.errstate(all="ignore"):
                flat = self._function(*vectors)
        except (ArithmeticError, ValueError):
            flat = (math.nan,) * self.size
        result = {}
        for slot in self.slots.values():
            values = [np.asarray(v, dtype=float) for v in flat[slot.offset: slot.offset + slot.size]]
            stacked = np.stack(np.broadcast_arrays(*values)) if values else np.zeros(0)
            result[slot.name] = stacked.reshape(slot.shape + stacked.shape[1:])
        return result


def _emit(node: Node, local: dict[str, str], functions: dict[str, str], backend: str, where: str,
          hoist: Callable[[str], str]) -> str:
    """Python source of one tree, with parentheses only where precedence needs them.

    Subtrees nested deeper than :data:`MAX_NESTING` are moved into their own local
    variable (``hoist``), because CPython's compiler recurses over nested operators.
    """

    def wrap(part: tuple[str, int, int], needed: bool) -> str:
        return f"({part[0]})" if needed else part[0]

    def leaf(n: Node) -> tuple[str, int, int]:
        return leaf_text(n, local, where), _ATOM, 1

    def shallow(part: tuple[str, int, int]) -> tuple[str, int, int]:
        return (hoist(part[0]), _ATOM, 1) if part[2] > MAX_NESTING else part

    def combine(kind: str, n: Node, parts: list[tuple[str, int, int]]) -> tuple[str, int, int]:
        parts = [shallow(p) for p in parts]
        depth = 1 + max(p[2] for p in parts)
        if kind == "call":
            return f"{functions[n[1]]}({', '.join(p[0] for p in parts)})", _ATOM, depth
        prec = _PREC[kind]
        if kind == "neg":
            return "-" + wrap(parts[0], parts[0][1] < prec), prec, depth
        left, right = parts
        if kind == "pow":
            exponent = integer_exponent(n[2])
            if exponent is not None:
                power = str(exponent) if exponent >= 0 else f"({exponent})"
                return f"{wrap(left, left[1] <= prec)}**{power}", prec, depth
            # non-integer powers: math.pow raises on a negative base instead of going complex
            pow_name = "_m.pow" if backend == "math" else "_n.power"
            return f"{pow_name}({left[0]}, {right[0]})", _ATOM, depth
        symbol = {"add": "+", "sub": "-", "mul": "*", "div": "/"}[kind]
        # keep the tree's association exactly: a right operand of equal precedence is wrapped
        return f"{wrap(left, left[1] < prec)} {symbol} {wrap(right, right[1] <= prec)}", prec, depth

    return fold(node, leaf, combine)[0]


class _PlainEmitter(LineEmitter):
    """The ``math`` and ``numpy`` backends: one function returning every output entry."""

    def __init__(self, local: dict[str, str], backend: str) -> None:
        super().__init__(local)
        self._backend = backend
        self._functions = MATH_FUNCTIONS if backend == "math" else _NUMPY_FUNCTIONS

    def bind(self, index: int, argument: str, slots: Sequence[str]) -> None:
        if self._backend == "numpy":
            self._lines.extend(f"    {s} = {argument}[{k}]" for k, s in enumerate(slots))
        elif len(slots) == 1:
            self._lines.append(f"    {slots[0]} = {argument}[0]")
        elif slots:
            self._lines.append(f"    {', '.join(slots)} = {argument}")

    def _text(self, tree: Node, where: str) -> str:
        return _emit(tree, self._local, self._functions, self._backend, where, self._hoist)

    def output(self, tree: Node, where: str) -> str:
        source = self._text(tree, where)
        return source if len(source) < 2000 else self._hoist(source)

    def source(self, argument_names: Sequence[str], results: Sequence[str]) -> str:
        body = "\n".join(self._lines) or "    pass"
        trailing = "," if len(results) == 1 else ""
        return (f"def _program({', '.join(argument_names)}):\n{body}\n"
                f"    return ({', '.join(results)}{trailing})\n")


def compile_program(name: str, arguments: Sequence[tuple[str, Sequence[str]]],
                    temporaries: Sequence[tuple[str, str]],
                    outputs: Sequence[tuple[str, Sequence[int], Sequence[str]]],
                    backend: str = "math") -> Program:
    """Compile a program of the grammar into a Python function.

    Parameters
    ----------
    name : str
        Used in error messages, e.g. ``"pick_arm.artifact.json: law"``.
    arguments : sequence of (str, sequence of str)
        Argument vectors and the names of their entries, e.g.
        ``[("x", ["q1", "q2"]), ("p", ["l1"])]``.
    temporaries : sequence of (str, str)
        ``(name, expression)`` pairs evaluated in order; each may use the arguments and
        the earlier temporaries.
    outputs : sequence of (str, shape, sequence of str)
        Named outputs, each a shape and its entries in row-major order.
    backend : {"math", "numpy", "jet2", "taylor"}
        With ``"jet2"``, the entries of the first argument vector are triples
        ``(c0, c1, c2)`` (Taylor coefficients of t^0, t^1, t^2), the other vectors hold
        numbers, and the program returns one triple per output entry. With ``"taylor"``
        they are jets of any order (:mod:`linz_ros.artifact.taylor`) and the program
        returns one jet (or number) per output entry.

    Returns
    -------
    Program

    Raises
    ------
    ArtifactError
        For text outside the grammar, an unknown or duplicate name, or a bad shape.

    Examples
    --------
    >>> prog = compile_program("demo", [("x", ["a", "b"])], [("_t0", "a*b")],
    ...                        [("y", [2], ["_t0 + 1", "sin(_t0)**2"])])
    >>> [round(v, 6) for v in prog([1.0, 2.0])]
    [3.0, 0.826822]
    """
    if backend not in _BACKENDS:
        raise ValueError(f"backend must be one of {', '.join(_BACKENDS)}, got {backend!r}")
    local: dict[str, str] = {}
    emitter = (Jet2Emitter(local) if backend == "jet2" else TaylorEmitter(local) if backend == "taylor"
               else _PlainEmitter(local, backend))
    argument_names, declared, results, slots_out = _walk(name, arguments, temporaries, outputs, local, emitter)
    source = emitter.source(argument_names, results)
    namespace = {"_m": math, "_n": np, "_t": taylor, "_abs": abs, "_sign": sign, "__builtins__": {}}
    try:
        code = compile(source, f"<{name}>", "exec")
    except (SyntaxError, RecursionError, MemoryError) as err:
        raise ArtifactError(name, f"expressions too large or too deeply nested to compile ({type(err).__name__})") \
            from None
    exec(code, namespace)  # noqa: S102 - source emitted above from whitelisted tree nodes only
    if backend == "jet2":
        phases = namespace["_phases"]
        return Program(name, tuple(declared), slots_out, partial(run_phases, phases), source, backend, phases)
    return Program(name, tuple(declared), slots_out, namespace["_program"], source, backend)


def _walk(name: str, arguments: Sequence[tuple[str, Sequence[str]]], temporaries: Sequence[tuple[str, str]],
          outputs: Sequence[tuple[str, Sequence[int], Sequence[str]]], local: dict[str, str], emitter: Any
          ) -> tuple[list[str], list[tuple[str, tuple[str, ...]]], list, dict[str, OutputSlot]]:
    """Declare the arguments, parse every temporary and output and hand each tree to ``emitter``.

    The one front end of every backend: names checked against the declarations, text parsed
    by the grammar, nothing of the file's text passed on but through the emitter's own tokens.
    Returns the argument vectors' names, their declarations, the emitted outputs and the layout.
    """
    argument_names = []
    declared: list[tuple[str, tuple[str, ...]]] = []
    for index, (vector, names) in enumerate(arguments):
        names = tuple(names)
        slots = []
        for k, entry in enumerate(names):
            _declare(local, entry, f"a{index}_{k}", name)
            slots.append(local[entry])
        argument_names.append(f"v{index}")
        declared.append((vector, names))
        emitter.bind(index, argument_names[-1], slots)
    for k, (temp, text) in enumerate(temporaries):
        where = f"{name}: temporary {temp}"
        emitter.temporary(f"t{k}", _parse(text, where), where)
        _declare(local, temp, f"t{k}", name)
    results: list = []
    slots_out: dict[str, OutputSlot] = {}
    offset = 0
    for out_name, shape, entries in outputs:
        shape = tuple(int(s) for s in shape)
        expected = int(np.prod(shape)) if shape else 1
        if len(entries) != expected:
            raise ArtifactError(name, f"output {out_name!r} has {len(entries)} entries, shape {list(shape)} "
                                      f"needs {expected}")
        if out_name in slots_out:
            raise ArtifactError(name, f"output {out_name!r} appears twice")
        for i, text in enumerate(entries):
            where = f"{name}: {out_name}[{i}]"
            results.append(emitter.output(_parse(text, where), where))
        slots_out[out_name] = OutputSlot(out_name, shape, offset)
        offset += expected
    return argument_names, declared, results, slots_out


def c_source(name: str, arguments: Sequence[tuple[str, Sequence[str]]], temporaries: Sequence[tuple[str, str]],
             outputs: Sequence[tuple[str, Sequence[int], Sequence[str]]], symbol: str, jets: bool = False
             ) -> tuple[str, dict[str, OutputSlot]]:
    """C source of a program: ``void symbol(const double *v0, ..., double *out)``.

    With ``jets``, the program's ``jet2`` form instead (:class:`~linz_ros.artifact._c_backend.CJet2Emitter`):
    ``void symbol(const double *v0, ..., double *out0, double *out1, double *out2, void *between)``.

    Emitted, like every backend, from the parsed and checked trees only
    (:mod:`linz_ros.artifact._c_backend`); the caller compiles it. Domain errors do not
    raise in C: they set the floating-point exception flags, which the caller tests.

    Parameters
    ----------
    name : str
        For messages.
    arguments, temporaries, outputs
        As for :func:`compile_program`.
    symbol : str
        The C function's name (a plain identifier).

    Returns
    -------
    source : str
    slots : dict of str -> OutputSlot
        Layout of ``out``.

    Examples
    --------
    >>> text, slots = c_source("demo", [("x", ["a"])], [], [("y", [1], ["a**2"])], "demo")
    >>> "out[0] = pow(a0_0, 2.0);" in text, slots["y"].offset
    (True, 0)
    """
    if not _NAME.fullmatch(symbol):
        raise ValueError(f"{symbol!r} is not a C identifier")
    local: dict[str, str] = {}
    emitter = CJet2Emitter(local) if jets else CEmitter(local)
    argument_names, _, results, slots_out = _walk(name, arguments, temporaries, outputs, local, emitter)
    if jets:
        return emitter.c_source(symbol, argument_names, results), slots_out
    return emitter.source(symbol, argument_names, results), slots_out


def _parse(text: str, where: str) -> Node:
    if not isinstance(text, str):
        raise ArtifactError(where, f"expected an expression as text, got {type(text).__name__}")
    try:
        return parse_expression(text)
    except ExpressionSyntaxError as err:
        raise ArtifactError(where, str(err)) from None


def _declare(local: dict[str, str], name: str, slot: str, where: str) -> None:
    if not isinstance(name, str) or not _NAME.fullmatch(name):
        raise ArtifactError(where, f"{name!r} is not a valid name")
    if name in local:
        raise ArtifactError(where, f"name {name!r} is declared twice")
    if name in CONSTANTS:
        raise ArtifactError(where, f"name {name!r} is a reserved constant")
    local[name] = slot
