"""The compiler's ``jet2`` backend: second-order jets as scalar, unrolled straight-line code.

Every value is a triple (c0, c1, c2) of floats, the coefficients of t^0, t^1, t^2 of a
function of t. The entries of the program's first argument vector are such jets; the
other vectors and the numbers are constants (c1 = c2 = 0). The emitter walks the parse
tree once, with the checks of the other backends, and writes a line only for a
coefficient it cannot prove zero: a product with a constant is three multiplications,
a sum with one a single addition. Identical emitted expressions are computed once.

Rules (a, b the operands' coefficients, y the result's):

- ``a*b``: y0 = a0 b0, y1 = a0 b1 + a1 b0, y2 = a0 b2 + a1 b1 + a2 b0
- ``a/b``: y0 = a0/b0, y1 = (a1 - b1 y0)/b0, y2 = (a2 - b1 y1 - b2 y0)/b0
- ``phi(a)``: y0 = phi(a0), y1 = phi'(a0) a1, y2 = phi'(a0) a2 + phi''(a0) a1^2/2, with
  phi' and phi'' of every grammar function in :data:`DERIVATIVES`
- ``a**n``, n an integer literal: by products (squarings), ``1/a**|n|`` for n < 0;
  ``a**c``, c constant: the chain rule with phi = x^c; ``a**b``, b a jet: exp(b log a)
- ``atan2(y, x)``: from d/dt atan2(y, x) = (x y' - y x') / (x^2 + y^2)
- ``abs``, ``sign``: on the branch of a0 (sign's y1 = y2 = 0)

The function runs in three phases, one per order, because order k of the outputs needs
the inputs' coefficients of orders <= k only: it is a generator that yields the outputs'
coefficients of one order and is then sent the inputs' coefficients of the next. A law
that needs an order-1 result (q''') inside its order-2 input, or a Taylor-mode
integrator, uses the phases; :class:`~linz_ros.artifact.compiler.Program` runs all
three for plain triples.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Sequence

from linz_ros.artifact._tokens import MATH_FUNCTIONS, MAX_NESTING, integer_exponent, leaf_text
from linz_ros.artifact.grammar import Node, fold

__all__ = ["DERIVATIVES", "Jet2Emitter", "run_phases"]

#: phi' and phi'' of each grammar function of one argument, as text in a = a0, y = phi(a0)
#: and d = phi'(a0) (None: identically zero).
DERIVATIVES: dict[str, tuple[str | None, str | None]] = {
    "sin": ("_m.cos({a})", "(-{y})"),
    "cos": ("(-_m.sin({a}))", "(-{y})"),
    "tan": ("1.0 + {y} * {y}", "2.0 * {y} * {d}"),
    "asin": ("1.0 / _m.sqrt(1.0 - {a} * {a})", "{a} * {d} * {d} * {d}"),
    "acos": ("-1.0 / _m.sqrt(1.0 - {a} * {a})", "{a} * {d} * {d} * {d}"),
    "atan": ("1.0 / (1.0 + {a} * {a})", "-2.0 * {a} * {d} * {d}"),
    "sinh": ("_m.cosh({a})", "{y}"),
    "cosh": ("_m.sinh({a})", "{y}"),
    "tanh": ("1.0 - {y} * {y}", "-2.0 * {y} * {d}"),
    "exp": ("{y}", "{y}"),
    "log": ("1.0 / {a}", "-{d} * {d}"),
    "sqrt": ("0.5 / {y}", "-0.5 * {d} / {a}"),
    "abs": ("_sign({a})", None),
    "sign": (None, None),
}
_BINARY = {"add": "+", "sub": "-", "mul": "*", "div": "/"}
# emitted text that is cheap and safe as an operand: a name, a number, a negated name
_ATOM = r"(?:[A-Za-z_][A-Za-z0-9_]*|\d[0-9.e+-]*)"
_SIMPLE = re.compile(rf"{_ATOM}|\(-{_ATOM}\)")


@dataclass(frozen=True)
class _Value:
    """One emitted value: c0 always, c1 and c2 None where known to be zero."""

    c0: str
    c1: str | None = None
    c2: str | None = None
    depth: int = 1          # nesting of c0's text (constants are emitted inline)

    @property
    def constant(self) -> bool:
        return self.c1 is None and self.c2 is None


_ONE = _Value("1.0")


def _product(*factors: str | None) -> str | None:
    return None if any(f is None for f in factors) else " * ".join(factors)   # type: ignore[arg-type]


def _sum(plus: Sequence[str | None], minus: Sequence[str | None] = ()) -> str | None:
    """Sum of terms (products or atoms), dropping the known zeros; None when all are."""
    added = [t for t in plus if t is not None]
    taken = [t for t in minus if t is not None]
    if not added:
        if not taken:
            return None
        added = [f"(-{taken[0]})" if _SIMPLE.fullmatch(taken[0]) else f"-{taken[0]}"]
        taken = taken[1:]
    return " - ".join([" + ".join(added)] + taken)


def _negated(text: str | None) -> str | None:
    return None if text is None else f"(-{text})"


class Jet2Emitter:
    """Emits the three phases of a jet2 program, one tree at a time.

    Parameters
    ----------
    local : dict of str -> str
        The compiler's declared names -> slot names (read at each leaf, so later
        declarations are seen by later trees).
    """

    def __init__(self, local: dict[str, str]) -> None:
        self._local = local
        self._phases: tuple[list[str], list[str], list[str]] = ([], [], [])
        self._values: dict[str, _Value] = {}
        self._inputs: list[str] = []
        self._memo: dict[str, tuple[int, str]] = {}
        self._count = 0

    def bind(self, index: int, argument: str, slots: Sequence[str]) -> None:
        """Unpack one argument vector; the first one holds the jets (its order-0 entries here)."""
        if len(slots) == 1:
            self._phases[0].append(f"    {slots[0]} = {argument}[0]")
        elif slots:
            self._phases[0].append(f"    {', '.join(slots)} = {argument}")
        for slot in slots:
            self._values[slot] = _Value(slot, f"{slot}_1", f"{slot}_2") if index == 0 else _Value(slot)
        if index == 0:
            self._inputs = list(slots)

    def temporary(self, slot: str, tree: Node, where: str) -> None:
        """Emit a temporary; its slot then names the value (constants get a line of their own)."""
        value = self._expression(tree, where)
        if value.constant:
            self._phases[0].append(f"    {slot} = {value.c0}")
            value = _Value(slot)
        self._values[slot] = value

    def output(self, tree: Node, where: str) -> tuple[str, str, str]:
        """The source of one output's three coefficients."""
        value = self._expression(tree, where)
        c0 = value.c0 if len(value.c0) < 2000 else self._assign(0, value.c0)
        return c0, value.c1 or "0.0", value.c2 or "0.0"

    def source(self, argument_names: Sequence[str], results: Sequence[tuple[str, str, str]]) -> str:
        """The generator function ``_phases`` that yields the outputs order by order."""
        lines = [f"def _phases({', '.join(argument_names)}):"]
        for order in range(3):
            if order:
                names = [f"{slot}_{order}" for slot in self._inputs]
                if len(names) == 1:
                    lines.append(f"    {names[0]} = _c[0]")
                elif names:
                    lines.append(f"    {', '.join(names)} = _c")
            lines.extend(self._phases[order])
            texts = [r[order] for r in results]
            trailing = "," if len(texts) == 1 else ""
            lines.append(f"    {'_c = ' if order < 2 else ''}yield ({', '.join(texts)}{trailing})")
        return "\n".join(lines) + "\n"

    # -- the tree walk --------------------------------------------------------------------------
    def _expression(self, tree: Node, where: str) -> _Value:
        def leaf(n: Node) -> _Value:
            text = leaf_text(n, self._local, where)
            return self._values.get(text, _Value(text))

        def combine(kind: str, n: Node, parts: list[_Value]) -> _Value:
            parts = [self._shallow(p) for p in parts]
            if all(p.constant for p in parts):
                return self._constant(kind, n, parts)
            parts = [self._atom(p) for p in parts]
            return self._jet(kind, n, parts)

        return fold(tree, leaf, combine)

    def _constant(self, kind: str, n: Node, parts: list[_Value]) -> _Value:
        """A value without jets, emitted inline as for the scalar backend."""
        texts = [p.c0 for p in parts]
        depth = 1 + max(p.depth for p in parts)
        if kind == "call":
            return _Value(f"{MATH_FUNCTIONS[n[1]]}({', '.join(texts)})", depth=depth)
        if kind == "neg":
            return _Value(f"(-{texts[0]})", depth=depth)
        if kind == "pow":
            exponent = integer_exponent(n[2])
            text = f"({texts[0]})**({exponent})" if exponent is not None else f"_m.pow({texts[0]}, {texts[1]})"
            return _Value(text, depth=depth)
        return _Value(f"({texts[0]} {_BINARY[kind]} {texts[1]})", depth=depth)

    def _jet(self, kind: str, n: Node, parts: list[_Value]) -> _Value:
        if kind == "call":
            if n[1] == "atan2":
                return self._atan2(*parts)
            return self._call(n[1], parts[0])
        if kind == "neg":
            a = parts[0]
            return _Value(f"(-{a.c0})", _negated(a.c1), _negated(a.c2))
        a, b = parts
        if kind in ("add", "sub"):
            return self._add(a, b, kind == "sub")
        if kind == "mul":
            return self._mul(a, b)
        if kind == "div":
            return self._div(a, b)
        return self._power(a, b, n[2])

    def _add(self, a: _Value, b: _Value, subtract: bool) -> _Value:
        op = "-" if subtract else "+"
        combine = (lambda x, y: _sum([x], [y])) if subtract else (lambda x, y: _sum([x, y]))
        return _Value(self._assign(0, f"{a.c0} {op} {b.c0}"),
                      self._assign(1, combine(a.c1, b.c1)), self._assign(2, combine(a.c2, b.c2)))

    def _mul(self, a: _Value, b: _Value) -> _Value:
        if a is b:              # a square
            return _Value(self._assign(0, f"{a.c0} * {a.c0}"),
                          self._assign(1, _product("2.0", a.c0, a.c1)),
                          self._assign(2, _sum([_product("2.0", a.c0, a.c2), _product(a.c1, a.c1)])))
        return _Value(self._assign(0, f"{a.c0} * {b.c0}"),
                      self._assign(1, _sum([_product(a.c0, b.c1), _product(a.c1, b.c0)])),
                      self._assign(2, _sum([_product(a.c0, b.c2), _product(a.c1, b.c1), _product(a.c2, b.c0)])))

    def _div(self, a: _Value, b: _Value) -> _Value:
        y0 = self._assign(0, f"{a.c0} / {b.c0}")
        y1 = self._assign(1, self._over(_sum([a.c1], [_product(b.c1, y0)]), b.c0))
        y2 = self._assign(2, self._over(_sum([a.c2], [_product(b.c1, y1), _product(b.c2, y0)]), b.c0))
        return _Value(y0, y1, y2)

    @staticmethod
    def _over(numerator: str | None, denominator: str) -> str | None:
        return None if numerator is None else f"({numerator}) / {denominator}"

    def _chain(self, a: _Value, y0_text: str, prime: str | None, second: str | None) -> _Value:
        """phi(a) by the chain rule; ``prime`` and ``second`` are templates in a, y and d."""
        y0 = self._assign(0, y0_text)
        if a.constant or prime is None:
            return _Value(y0)
        d = self._assign(1, prime.format(a=a.c0, y=y0))
        dd = None if second is None or a.c1 is None else self._assign(2, second.format(a=a.c0, y=y0, d=d))
        y1 = self._assign(1, _product(d, a.c1))
        y2 = self._assign(2, _sum([_product(d, a.c2), _product("0.5", dd, a.c1, a.c1)]))
        return _Value(y0, y1, y2)

    def _call(self, function: str, a: _Value) -> _Value:
        prime, second = DERIVATIVES[function]
        return self._chain(a, f"{MATH_FUNCTIONS[function]}({a.c0})", prime, second)

    def _atan2(self, y: _Value, x: _Value) -> _Value:
        """theta = atan2(y, x): theta1 = w0 and theta2 = w1 / 2 for w = (x y' - y x') / r, r = x^2 + y^2."""
        theta = self._assign(0, f"_m.atan2({y.c0}, {x.c0})")
        r = self._assign(1, f"{x.c0} * {x.c0} + {y.c0} * {y.c0}")
        w0 = self._assign(1, self._over(_sum([_product(x.c0, y.c1)], [_product(y.c0, x.c1)]), r))
        half_r1 = self._assign(2, _sum([_product(x.c0, x.c1), _product(y.c0, y.c1)]))
        numerator = _sum([_product(x.c0, y.c2)], [_product(y.c0, x.c2), _product(w0, half_r1)])
        return _Value(theta, w0, self._assign(2, self._over(numerator, r)))

    def _power(self, a: _Value, b: _Value, exponent_tree: Node) -> _Value:
        if not b.constant:                       # a**b = exp(b log a)
            log_a = self._call("log", a) if not a.constant else _Value(self._assign(0, f"_m.log({a.c0})"))
            return self._call("exp", self._mul(b, log_a))
        exponent = integer_exponent(exponent_tree)
        if exponent is None:                     # a constant real exponent c: phi = x^c
            c = b.c0
            return self._chain(a, f"_m.pow({a.c0}, {c})", f"{c} * _m.pow({{a}}, {c} - 1.0)",
                               f"{c} * ({c} - 1.0) * _m.pow({{a}}, {c} - 2.0)")
        if exponent == 0:
            return _ONE
        result, base, k = None, a, abs(exponent)
        while True:                              # binary powering by jet products
            if k & 1:
                result = base if result is None else self._mul(result, base)
            k >>= 1
            if not k:
                break
            base = self._mul(base, base)
        return result if exponent > 0 else self._div(_ONE, result)

    # -- lines ----------------------------------------------------------------------------------
    def _assign(self, order: int, text: str | None) -> str | None:
        """A name (or simple text) for ``text`` in phase ``order``; one line per distinct text."""
        if text is None or _SIMPLE.fullmatch(text):
            return text
        known = self._memo.get(text)
        if known is not None and known[0] <= order:
            return known[1]
        self._count += 1
        name = f"j{self._count}"
        self._phases[order].append(f"    {name} = {text}")
        self._memo[text] = (order, name)
        return name

    def _atom(self, value: _Value) -> _Value:
        """A constant used with jets gets a name, so its text is not evaluated per coefficient."""
        if not value.constant or _SIMPLE.fullmatch(value.c0):
            return value
        return _Value(self._assign(0, value.c0))     # type: ignore[arg-type]

    def _shallow(self, value: _Value) -> _Value:
        return self._atom(value) if value.depth > MAX_NESTING else value


def run_phases(phases, jets: Sequence[Sequence[float]], *others: Sequence[float]) -> tuple:
    """All three phases at once: jets in, one ``(c0, c1, c2)`` triple per output entry out.

    Parameters
    ----------
    phases : callable
        The compiled generator function.
    jets : sequence of (float, float, float)
        The first argument vector's entries as triples.
    *others : sequence of float
        The other argument vectors.

    Returns
    -------
    tuple of tuple of float
    """
    run = phases([j[0] for j in jets], *others)
    c0 = next(run)
    c1 = run.send([j[1] for j in jets])
    c2 = run.send([j[2] for j in jets])
    return tuple(zip(c0, c1, c2))
