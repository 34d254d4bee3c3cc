"""The ``c`` emitter of the grammar compiler: a program as one C function (numpy only, no compiling here).

Like the Python backends, the text is written from the parse tree with tokens of our own:
slot names (``a0_3``, ``t12``, ``h4``), numbers re-printed from ``float`` (``repr``
round-trips, and C's ``strtod`` rounds correctly), fully parenthesised operators that keep
the tree's association, and calls of the whitelisted functions of ``<math.h>``. Nothing of
the artifact's text reaches the C compiler.

Each operation is the IEEE operation CPython performs for the ``math`` backend (``a ** k``
is C's ``pow`` in both, ``math.sin`` is the C library's ``sin``), so with
``-ffp-contract=off`` and without fast-math the results are equal. Where CPython raises
(a zero divisor, ``math.log(0)``, ``math.exp(1000)``) C sets the divide-by-zero, invalid
or overflow flag instead; the native step tests those flags after the call.
"""

from __future__ import annotations

import re
from typing import Sequence

from linz_ros.artifact._jet2 import Jet2Emitter, _Value
from linz_ros.artifact._tokens import MAX_NESTING, integer_exponent, leaf_text
from linz_ros.artifact.grammar import Node, fold

__all__ = ["LineEmitter", "CEmitter", "CJet2Emitter", "C_PRELUDE"]

_C_FUNCTIONS = {
    "sin": "sin", "cos": "cos", "tan": "tan", "asin": "asin", "acos": "acos", "atan": "atan",
    "atan2": "atan2", "sinh": "sinh", "cosh": "cosh", "tanh": "tanh", "exp": "exp", "log": "log",
    "sqrt": "sqrt", "abs": "fabs", "sign": "linz_sign",
}
_OPERATORS = {"add": "+", "sub": "-", "mul": "*", "div": "/"}

#: What every emitted program starts with: the grammar's sign (0 at 0, nan stays nan), with
#: quiet comparisons so a nan raises no invalid flag of its own.
C_PRELUDE = """#include <math.h>

static inline double linz_sign(double v) {
    if (isgreater(v, 0.0)) return 1.0;
    if (isless(v, 0.0)) return -1.0;
    return v == v ? 0.0 : v;
}
"""


class LineEmitter:
    """The statements of one straight-line program, one assignment a line, shared by this C emitter
    and the compiler's Python one: a subclass gives its assignment's spelling and ``_text``."""

    #: One assignment, ``str.format``-ed with ``slot`` and ``text``.
    ASSIGNMENT = "    {slot} = {text}"

    def __init__(self, local: dict[str, str]) -> None:
        self._local = local
        self._lines: list[str] = []
        self._hoisted = 0

    def temporary(self, slot: str, tree: Node, where: str) -> None:
        self._assign(slot, self._text(tree, where))

    def _text(self, tree: Node, where: str) -> str:
        raise NotImplementedError

    def _assign(self, slot: str, text: str) -> None:
        self._lines.append(self.ASSIGNMENT.format(slot=slot, text=text))

    def _hoist(self, text: str) -> str:
        """A local of its own for ``text`` (too deep or too long for one expression); returns its name."""
        self._hoisted += 1
        slot = f"h{self._hoisted}"
        self._assign(slot, text)
        return slot


class CEmitter(LineEmitter):
    """Collects the C statements of one program (the compiler's emitter protocol)."""

    ASSIGNMENT = "    const double {slot} = {text};"

    def bind(self, index: int, argument: str, slots: Sequence[str]) -> None:
        for k, s in enumerate(slots):
            self._assign(s, f"{argument}[{k}]")

    def output(self, tree: Node, where: str) -> str:
        return self._text(tree, where)

    def source(self, symbol: str, argument_names: Sequence[str], results: Sequence[str]) -> str:
        """The whole translation unit: the prelude and ``void symbol(const double *v0, ..., double *out)``."""
        parameters = ", ".join([f"const double *{a}" for a in argument_names] + ["double *out"])
        stores = [f"    out[{i}] = {text};" for i, text in enumerate(results)]
        body = "\n".join(self._lines + stores)
        return f"{C_PRELUDE}\nvoid {symbol}({parameters}) {{\n{body}\n}}\n"

    def _text(self, tree: Node, where: str) -> str:
        """C text of one tree; subtrees nested deeper than MAX_NESTING get their own local."""

        def leaf(n: Node) -> tuple[str, int]:
            return leaf_text(n, self._local, where), 1

        def combine(kind: str, n: Node, parts: list[tuple[str, int]]) -> tuple[str, int]:
            parts = [(self._hoist(p[0]), 1) if p[1] > MAX_NESTING else p for p in parts]
            depth = 1 + max(p[1] for p in parts)
            texts = [p[0] for p in parts]
            if kind == "call":
                return f"{_C_FUNCTIONS[n[1]]}({', '.join(texts)})", depth
            if kind == "neg":
                return f"(-{texts[0]})", depth
            if kind == "pow":
                exponent = integer_exponent(n[2])
                right = f"{float(exponent)!r}" if exponent is not None else texts[1]
                return f"pow({texts[0]}, {right})", depth
            return f"({texts[0]} {_OPERATORS[kind]} {texts[1]})", depth

        return fold(tree, leaf, combine)[0]


class CJet2Emitter(Jet2Emitter):
    """The ``jet2`` emitter's three phases as one C function (the native elastic-joint law).

    The phases, their lines and their rules are :class:`Jet2Emitter`'s; only the spelling
    changes: each line becomes a ``const double``, the calls of ``math`` their C names, and
    between two orders the function calls ``linz_next_order`` (fixed code, not emitted),
    which forms the first argument vector's coefficients of the next order from the
    outputs so far. Every local lives in one scope, so later orders read earlier ones.
    """

    def bind(self, index: int, argument: str, slots: Sequence[str]) -> None:
        self._phases[0].extend(f"    {s} = {argument}[{k}]" for k, s in enumerate(slots))
        for slot in slots:
            self._values[slot] = _Value(slot, f"{slot}_1", f"{slot}_2") if index == 0 else _Value(slot)
        if index == 0:
            self._inputs = list(slots)

    def _constant(self, kind: str, n: Node, parts: list) -> _Value:
        if kind == "pow" and integer_exponent(n[2]) is not None:
            depth = 1 + max(p.depth for p in parts)
            return _Value(f"pow({parts[0].c0}, {float(integer_exponent(n[2]))!r})", depth=depth)
        return super()._constant(kind, n, parts)

    def c_source(self, symbol: str, argument_names: Sequence[str], results: Sequence[tuple[str, str, str]]) -> str:
        """``void symbol(const double *v0, ..., double *out0, double *out1, double *out2, void *between)``."""
        count = len(self._inputs)
        parameters = ", ".join([f"const double *{a}" for a in argument_names]
                               + ["double *out0", "double *out1", "double *out2", "void *between"])
        lines = [C_PRELUDE, "void linz_next_order(int order, const double *outputs, double *inputs, void *between);",
                 "", f"void {symbol}({parameters}) {{", f"    double next[{max(1, count)}];"]
        for order in range(3):
            if order:
                lines.append(f"    linz_next_order({order}, out{order - 1}, next, between);")
                lines.extend(f"    const double {slot}_{order} = next[{k}];" for k, slot in enumerate(self._inputs))
            lines.extend(_c_line(line) for line in self._phases[order])
            lines.extend(f"    out{order}[{i}] = {_c_text(r[order])};" for i, r in enumerate(results))
        lines.append("}")
        return "\n".join(lines) + "\n"


_PYTHON_CALL = re.compile(r"_m\.([a-z0-9]+)\(")


def _c_text(text: str) -> str:
    """The jet2 emitter's own Python spelling in C: ``_m.sin(`` -> ``sin(``, ``_sign(`` and ``_abs(``."""
    return _PYTHON_CALL.sub(r"\1(", text).replace("_sign(", "linz_sign(").replace("_abs(", "fabs(")


def _c_line(line: str) -> str:
    name, text = line.strip().split(" = ", 1)
    return f"    const double {name} = {_c_text(text)};"
