"""The compiler's ``taylor`` backend: truncated Taylor arithmetic of any order, as calls of
:mod:`linz_ros.artifact.taylor` emitted from the parse tree.

The entries of the program's first argument vector are jets (numpy arrays of shape
``(K + 1, *batch)``, real or complex); the other vectors hold numbers. The emitter walks each
tree once, with the checks of the other backends, and writes one line per node: a node that
depends on no jet is scalar ``math`` code, one that does is a call of a ``taylor`` function
(``_t``) or numpy's ``+``/``-`` on two jets. Numbers are re-printed from ``float`` and names
are the compiler's slot names, so the file's text never reaches ``compile``. Identical lines
are computed once. The program returns one jet (or, for an output that depends on no jet, one
number) per output entry; :class:`~linz_ros.artifact.chainlaw.ChainLaw` runs f and h of an
artifact through it to evaluate Lie-derivative chains at run time.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

from linz_ros.artifact._tokens import MATH_FUNCTIONS, integer_exponent, leaf_text
from linz_ros.artifact.grammar import Node, fold

__all__ = ["TAYLOR_FUNCTIONS", "TaylorEmitter"]

#: Grammar function -> the jet function of :mod:`linz_ros.artifact.taylor` (``_t``).
TAYLOR_FUNCTIONS = {
    "sin": "_t.sin", "cos": "_t.cos", "tan": "_t.tan", "asin": "_t.asin", "acos": "_t.acos",
    "atan": "_t.atan", "atan2": "_t.atan2", "sinh": "_t.sinh", "cosh": "_t.cosh",
    "tanh": "_t.tanh", "exp": "_t.exp", "log": "_t.log", "sqrt": "_t.sqrt", "abs": "_t.abs_",
    "sign": "_t.sign",
}
_BINARY = {"add": "+", "sub": "-", "mul": "*", "div": "/"}


@dataclass(frozen=True)
class _Value:
    """An emitted value: a slot name or a number's text, and whether it is a jet."""

    text: str
    jet: bool


class TaylorEmitter:
    """Emits one function ``_program(v0, *others)`` of jets, one line per tree node.

    Parameters
    ----------
    local : dict of str -> str
        The compiler's declared names -> slot names.
    """

    def __init__(self, local: dict[str, str]) -> None:
        self._local = local
        self._lines: list[str] = []
        self._jets: set[str] = set()
        self._memo: dict[str, _Value] = {}
        self._count = 0

    def bind(self, index: int, argument: str, slots: Sequence[str]) -> None:
        """Unpack one argument vector; the entries of the first one are jets."""
        self._lines.extend(f"    {s} = {argument}[{k}]" for k, s in enumerate(slots))
        if index == 0:
            self._jets.update(slots)

    def temporary(self, slot: str, tree: Node, where: str) -> None:
        """Emit a temporary under its slot name."""
        value = self._expression(tree, where)
        self._lines.append(f"    {slot} = {value.text}")
        if value.jet:
            self._jets.add(slot)

    def output(self, tree: Node, where: str) -> str:
        """The text of one output entry (a slot name or a number)."""
        return self._expression(tree, where).text

    def source(self, argument_names: Sequence[str], results: Sequence[str]) -> str:
        """The function, returning every output entry in a tuple."""
        body = "\n".join(self._lines) or "    pass"
        trailing = "," if len(results) == 1 else ""
        return (f"def _program({', '.join(argument_names)}):\n{body}\n"
                f"    return ({', '.join(results)}{trailing})\n")

    # -- the tree walk --------------------------------------------------------------------------
    def _expression(self, tree: Node, where: str) -> _Value:
        def leaf(n: Node) -> _Value:
            text = leaf_text(n, self._local, where)
            return _Value(text, text in self._jets)

        def combine(kind: str, n: Node, parts: list[_Value]) -> _Value:
            if not any(p.jet for p in parts):
                return self._line(self._scalar(kind, n, [p.text for p in parts]), False)
            return self._line(self._jet(kind, n, parts), True)

        return fold(tree, leaf, combine)

    @staticmethod
    def _scalar(kind: str, n: Node, texts: list[str]) -> str:
        """A node of numbers only, as the scalar backend writes it."""
        if kind == "call":
            return f"{MATH_FUNCTIONS[n[1]]}({', '.join(texts)})"
        if kind == "neg":
            return f"-{texts[0]}"
        if kind == "pow":
            exponent = integer_exponent(n[2])
            return f"{texts[0]}**({exponent})" if exponent is not None else f"_m.pow({texts[0]}, {texts[1]})"
        return f"{texts[0]} {_BINARY[kind]} {texts[1]}"

    @staticmethod
    def _jet(kind: str, n: Node, parts: list[_Value]) -> str:
        """A node with at least one jet operand: a call of a taylor function, or numpy's + and -."""
        texts = [p.text for p in parts]
        if kind == "neg":
            return f"-{texts[0]}"
        if kind == "call":
            if n[1] == "atan2":       # both operands as jets
                y, x = parts
                return (f"_t.atan2({y.text if y.jet else f'_t.constant({y.text}, {x.text})'}, "
                        f"{x.text if x.jet else f'_t.constant({x.text}, {y.text})'})")
            return f"{TAYLOR_FUNCTIONS[n[1]]}({texts[0]})"
        a, b = parts
        if kind in ("add", "sub"):
            if a.jet and b.jet:
                return f"{a.text} {_BINARY[kind]} {b.text}"
            if a.jet:                 # a number is added at order 0 only
                return f"_t.add_constant({a.text}, {'-' if kind == 'sub' else ''}{b.text})"
            return f"_t.add_constant({'-' if kind == 'sub' else ''}{b.text}, {a.text})"
        if kind == "mul":
            return f"_t.mul({a.text}, {b.text})"
        if kind == "div":
            return f"_t.div({a.text}, {b.text})"
        if b.jet:                     # a**b = exp(b log a)
            log_a = f"_t.log({a.text})" if a.jet else f"_m.log({a.text})"
            return f"_t.exp(_t.mul({b.text}, {log_a}))"
        exponent = integer_exponent(n[2])
        if exponent is not None:
            return f"_t.integer_power({a.text}, {exponent})"
        return f"_t.power({a.text}, {b.text})"

    def _line(self, text: str, jet: bool) -> _Value:
        """A slot for ``text`` (one line per distinct text)."""
        known = self._memo.get(text)
        if known is not None:
            return known
        self._count += 1
        value = _Value(f"j{self._count}", jet)
        self._lines.append(f"    {value.text} = {text}")
        self._memo[text] = value
        if jet:
            self._jets.add(value.text)
        return value
