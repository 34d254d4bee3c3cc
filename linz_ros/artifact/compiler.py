"""Compile programs of the shared grammar into fast Python functions, without sympy.

A *program* is a list of named temporaries followed by named outputs, every one an
expression of the grammar (:mod:`linz_ros.artifact.grammar`) over declared argument
names. Compilation parses each expression into a tree, checks every name against the
declarations, and then *emits* Python source from the tree using only tokens of its
own: local slot names, numbers re-printed from ``float``, operators, and calls of the
whitelisted functions. The artifact's text never reaches ``compile``; only code written
by this module does, so loading an artifact cannot run anything but arithmetic.

Two backends: ``"math"`` (scalars, the fastest for one control step in CPython) and
``"numpy"`` (element-wise on arrays, for sweeps and plots).

Public names
------------
Program            a compiled program: call it with argument vectors, get a flat tuple
compile_program    build a Program from declarations, temporaries and outputs
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np

from linz_ros.artifact.grammar import CONSTANTS, Node, fold, parse_expression
from linz_ros.errors import ArtifactError, ExpressionSyntaxError

__all__ = ["Program", "compile_program", "OutputSlot"]

_MATH_FUNCTIONS = {
    "sin": "_m.sin", "cos": "_m.cos", "tan": "_m.tan", "asin": "_m.asin", "acos": "_m.acos",
    "atan": "_m.atan", "atan2": "_m.atan2", "sinh": "_m.sinh", "cosh": "_m.cosh",
    "tanh": "_m.tanh", "exp": "_m.exp", "log": "_m.log", "sqrt": "_m.sqrt", "abs": "_abs",
    "sign": "_sign",
}
_NUMPY_FUNCTIONS = {
    "sin": "_n.sin", "cos": "_n.cos", "tan": "_n.tan", "asin": "_n.arcsin", "acos": "_n.arccos",
    "atan": "_n.arctan", "atan2": "_n.arctan2", "sinh": "_n.sinh", "cosh": "_n.cosh",
    "tanh": "_n.tanh", "exp": "_n.exp", "log": "_n.log", "sqrt": "_n.sqrt", "abs": "_n.abs",
    "sign": "_n.sign",
}
_CONSTANT_VALUES = {"pi": math.pi}
# precedence of emitted Python: sums < products < unary minus < powers < atoms
_PREC = {"add": 1, "sub": 1, "mul": 2, "div": 2, "neg": 3, "pow": 4}
_ATOM = 5
_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")      # used with fullmatch: no trailing newline
#: Integer exponents up to this size are emitted as ``a**k`` (exact and fast).
_INT_EXPONENT = 64
#: Deeper subtrees go into a local variable of their own (CPython's compiler recurses).
_MAX_NESTING = 40


def _sign(value: float) -> float:
    if value != value:          # nan stays nan, as in numpy
        return value
    return 0.0 if value == 0 else math.copysign(1.0, value)


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
        ``"math"`` or ``"numpy"``.
    """

    def __init__(self, name: str, arguments: tuple[tuple[str, tuple[str, ...]], ...],
                 slots: dict[str, OutputSlot], function: Callable, source: str, backend: str) -> None:
        self.name = name
        self.arguments = arguments
        self.slots = slots
        self.source = source
        self.backend = backend
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


def _number_text(text: str, where: str) -> str:
    value = float(text)
    if not math.isfinite(value):
        raise ArtifactError(where, f"number {text!r} is out of range")
    return repr(value)


def _emit(node: Node, local: dict[str, str], functions: dict[str, str], backend: str, where: str,
          hoist: Callable[[str], str]) -> str:
    """Python source of one tree, with parentheses only where precedence needs them.

    Subtrees nested deeper than :data:`_MAX_NESTING` are moved into their own local
    variable (``hoist``), because CPython's compiler recurses over nested operators.
    """

    def wrap(part: tuple[str, int, int], needed: bool) -> str:
        return f"({part[0]})" if needed else part[0]

    def leaf(n: Node) -> tuple[str, int, int]:
        if n[0] == "num":
            return _number_text(n[1], where), _ATOM, 1
        name = n[1]
        if name in local:
            return local[name], _ATOM, 1
        if name in CONSTANTS:
            return repr(_CONSTANT_VALUES[name]), _ATOM, 1
        raise ArtifactError(where, f"unknown name {name!r}")

    def shallow(part: tuple[str, int, int]) -> tuple[str, int, int]:
        return (hoist(part[0]), _ATOM, 1) if part[2] > _MAX_NESTING else part

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
            exponent = _integer_exponent(n[2])
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


def _integer_exponent(node: Node) -> int | None:
    """The exponent as a small int when it is an integer literal (possibly negated)."""
    negative = node[0] == "neg"
    inner = node[1] if negative else node
    if inner[0] != "num":
        return None
    value = float(inner[1])
    if not value.is_integer() or abs(value) > _INT_EXPONENT:
        return None
    return -int(value) if negative else int(value)


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
    backend : {"math", "numpy"}

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
    if backend not in ("math", "numpy"):
        raise ValueError(f"backend must be 'math' or 'numpy', got {backend!r}")
    functions = _MATH_FUNCTIONS if backend == "math" else _NUMPY_FUNCTIONS
    local: dict[str, str] = {}
    lines: list[str] = []
    argument_names = []
    declared: list[tuple[str, tuple[str, ...]]] = []
    for index, (vector, names) in enumerate(arguments):
        names = tuple(names)
        slots = []
        for k, entry in enumerate(names):
            _declare(local, entry, f"a{index}_{k}", name)
            slots.append(local[entry])
        argument = f"v{index}"
        argument_names.append(argument)
        declared.append((vector, names))
        if backend == "math":
            if len(slots) == 1:
                lines.append(f"    {slots[0]} = {argument}[0]")
            elif slots:
                lines.append(f"    {', '.join(slots)} = {argument}")
        else:
            lines.extend(f"    {s} = {argument}[{k}]" for k, s in enumerate(slots))
    hoisted = [0]

    def hoist(text: str) -> str:
        hoisted[0] += 1
        slot = f"h{hoisted[0]}"
        lines.append(f"    {slot} = {text}")
        return slot

    for k, (temp, text) in enumerate(temporaries):
        tree = _parse(text, f"{name}: temporary {temp}")
        source = _emit(tree, local, functions, backend, f"{name}: temporary {temp}", hoist)
        _declare(local, temp, f"t{k}", name)
        lines.append(f"    {local[temp]} = {source}")
    results: list[str] = []
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
            source = _emit(_parse(text, where), local, functions, backend, where, hoist)
            results.append(source if len(source) < 2000 else hoist(source))
        slots_out[out_name] = OutputSlot(out_name, shape, offset)
        offset += expected
    body = "\n".join(lines) or "    pass"
    trailing = "," if len(results) == 1 else ""
    source = (f"def _program({', '.join(argument_names)}):\n{body}\n"
              f"    return ({', '.join(results)}{trailing})\n")
    namespace = {"_m": math, "_n": np, "_abs": abs, "_sign": _sign, "__builtins__": {}}
    try:
        code = compile(source, f"<{name}>", "exec")
    except (SyntaxError, RecursionError, MemoryError) as err:
        raise ArtifactError(name, f"expressions too large or too deeply nested to compile ({type(err).__name__})") \
            from None
    exec(code, namespace)  # noqa: S102 - source emitted above from whitelisted tree nodes only
    return Program(name, tuple(declared), slots_out, namespace["_program"], source, backend)


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
