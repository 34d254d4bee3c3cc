"""The whitelisted arithmetic grammar shared by plant files and controller artifacts.

Text is tokenised and parsed by a small recursive-descent parser into a tree of tuples;
nothing is ever handed to ``eval``. The grammar knows numbers, names, ``+ - * /``,
``**`` (or ``^``) for powers, parentheses, and calls of the functions in
:data:`FUNCTIONS`. Names are not interpreted here: the caller decides what each one
means, so a user's state called ``lambda``, ``E`` or ``I`` stays the user's symbol.

Tree nodes
----------
``("num", text)``, ``("name", text)``, ``("neg", a)``,
``("add" | "sub" | "mul" | "div" | "pow", a, b)``, ``("call", fname, (a, ...))``.
"""

from __future__ import annotations

import re
import reprlib
from typing import Callable, Iterator, TypeVar, Union

from linz_ros.errors import ExpressionSyntaxError

__all__ = ["FUNCTIONS", "CONSTANTS", "RESERVED_NAMES", "Node", "parse_expression", "fold", "names_in"]

#: Functions the grammar accepts, with their number of arguments.
FUNCTIONS: dict[str, int] = {
    "sin": 1, "cos": 1, "tan": 1, "asin": 1, "acos": 1, "atan": 1, "atan2": 2,
    "sinh": 1, "cosh": 1, "tanh": 1, "exp": 1, "log": 1, "sqrt": 1, "abs": 1,
    "sign": 1,
}
#: Named constants the grammar accepts.
CONSTANTS: frozenset[str] = frozenset({"pi"})
#: Names a plant may not use for its own symbols.
RESERVED_NAMES: frozenset[str] = frozenset(FUNCTIONS) | CONSTANTS

Node = tuple
T = TypeVar("T")
_MAX_LENGTH = 200_000
_MAX_DEPTH = 100

_TOKEN = re.compile(
    r"""\s*(?:
        (?P<num>(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)
      | (?P<name>[A-Za-z_][A-Za-z0-9_]*)
      | (?P<op>\*\*|[-+*/^(),])
    )""",
    re.VERBOSE,
)


def _tokens(text: str) -> Iterator[tuple[str, str, int]]:
    """Yield ``(kind, text, column)`` and a final ``("end", "", column)``."""
    pos = 0
    end = len(text.rstrip())          # once, not per token: keeps tokenising linear
    while pos < end:
        match = _TOKEN.match(text, pos)
        if match is None or match.end() == pos:
            col = pos + 1
            while text[col - 1].isspace():
                col += 1
            raise ExpressionSyntaxError(text, col, f"unexpected character {text[col - 1]!r}")
        kind = match.lastgroup or "op"
        yield kind, match.group(kind), match.start(kind) + 1
        pos = match.end()
    yield "end", "", len(text) + 1


class _Parser:
    def __init__(self, text: str) -> None:
        self.text = text
        self.tokens = list(_tokens(text))
        self.i = 0
        self.depth = 0

    def peek(self) -> tuple[str, str, int]:
        return self.tokens[self.i]

    def take(self) -> tuple[str, str, int]:
        token = self.tokens[self.i]
        self.i += 1
        return token

    def fail(self, problem: str, column: int | None = None) -> ExpressionSyntaxError:
        return ExpressionSyntaxError(self.text, self.peek()[2] if column is None else column, problem)

    def expect(self, op: str) -> None:
        kind, text, col = self.take()
        if kind != "op" or text != op:
            found = "the end" if kind == "end" else repr(text)
            raise ExpressionSyntaxError(self.text, col, f"expected {op!r}, found {found}")

    def descend(self) -> None:
        """One level deeper; refuses past ``_MAX_DEPTH`` (the parser recurses, as CPython's compiler does)."""
        self.depth += 1
        if self.depth > _MAX_DEPTH:
            raise self.fail("nested too deeply")

    def expression(self) -> Node:
        self.descend()
        node = self.term()
        while self.peek()[0] == "op" and self.peek()[1] in "+-":
            op = self.take()[1]
            node = ("add" if op == "+" else "sub", node, self.term())
        self.depth -= 1
        return node

    def term(self) -> Node:
        node = self.unary()
        while self.peek()[0] == "op" and self.peek()[1] in ("*", "/"):
            op = self.take()[1]
            node = ("mul" if op == "*" else "div", node, self.unary())
        return node

    def unary(self) -> Node:
        kind, text, _ = self.peek()
        if kind == "op" and text in "+-":
            self.take()
            self.descend()
            operand = self.unary()
            self.depth -= 1
            return ("neg", operand) if text == "-" else operand
        return self.power()

    def power(self) -> Node:
        base = self.atom()
        if self.peek()[0] == "op" and self.peek()[1] in ("**", "^"):
            self.take()
            self.descend()
            # right-associative; the exponent may carry its own sign: 2**-x
            exponent = self.unary()
            self.depth -= 1
            return ("pow", base, exponent)
        return base

    def atom(self) -> Node:
        kind, text, col = self.take()
        if kind == "num":
            return ("num", text)
        if kind == "name":
            if self.peek()[0] == "op" and self.peek()[1] == "(":
                return self.call(text, col)
            if text in FUNCTIONS:
                raise ExpressionSyntaxError(self.text, col, f"{text!r} is a function; write {text}(...)")
            return ("name", text)
        if kind == "op" and text == "(":
            node = self.expression()
            self.expect(")")
            return node
        found = "the end" if kind == "end" else repr(text)
        raise ExpressionSyntaxError(self.text, col, f"expected a number, a name or '(', found {found}")

    def call(self, fname: str, col: int) -> Node:
        if fname not in FUNCTIONS:
            raise ExpressionSyntaxError(self.text, col, f"{fname!r} is not a known function")
        self.expect("(")
        args = [self.expression()]
        while self.peek()[0] == "op" and self.peek()[1] == ",":
            self.take()
            args.append(self.expression())
        self.expect(")")
        if len(args) != FUNCTIONS[fname]:
            raise ExpressionSyntaxError(
                self.text, col, f"{fname} takes {FUNCTIONS[fname]} argument(s), got {len(args)}")
        return ("call", fname, tuple(args))


def parse_expression(text: Union[str, int, float]) -> Node:
    """Parse one arithmetic expression into a tree of tuples, without evaluating anything.

    Parameters
    ----------
    text : str, int or float
        The expression, e.g. ``"-k*sin(x1) + u1/m"``. Numbers are accepted as such.

    Returns
    -------
    tuple
        The parse tree (see the module docstring for its nodes).

    Raises
    ------
    ExpressionSyntaxError
        With the column of the first character that does not fit the grammar.

    Examples
    --------
    >>> parse_expression("-x**2")
    ('neg', ('pow', ('name', 'x'), ('num', '2')))
    """
    if isinstance(text, bool) or not isinstance(text, (str, int, float)):
        # reprlib: bounded in depth and length (str() of a YAML alias bomb would never finish)
        raise ExpressionSyntaxError(reprlib.repr(text), 0, "expected an expression as text or a number")
    text = repr(text) if isinstance(text, float) else str(text)
    if len(text) > _MAX_LENGTH:
        raise ExpressionSyntaxError(text[:40] + "...", 0, f"longer than {_MAX_LENGTH} characters")
    if text.strip() == "":
        raise ExpressionSyntaxError(text, 0, "empty expression")
    parser = _Parser(text)
    node = parser.expression()
    kind, token, col = parser.peek()
    if kind != "end":
        raise ExpressionSyntaxError(text, col, f"unexpected {token!r}")
    return node


def fold(node: Node, leaf: Callable[[Node], T], combine: Callable[[str, Node, list[T]], T]) -> T:
    """Evaluate a parse tree bottom-up without recursion (long sums make deep trees).

    Parameters
    ----------
    node : tuple
        A tree from :func:`parse_expression`.
    leaf : callable
        Called with each ``num`` or ``name`` node; returns its value.
    combine : callable
        Called as ``combine(kind, node, child_values)`` for every other node (for
        ``call`` nodes the function name is ``node[1]``).

    Returns
    -------
    object
        The value of the root.

    Examples
    --------
    >>> fold(parse_expression("1+2*3"), lambda n: int(n[1]),
    ...      lambda k, n, v: v[0] + v[1] if k == "add" else v[0] * v[1])
    7
    """
    stack: list[tuple[Node, bool]] = [(node, False)]
    values: list[T] = []
    while stack:
        current, expanded = stack.pop()
        kind = current[0]
        if kind in ("num", "name"):
            values.append(leaf(current))
            continue
        children = current[2] if kind == "call" else current[1:]
        if not expanded:
            stack.append((current, True))
            stack.extend((child, False) for child in reversed(children))
            continue
        count = len(children)
        args = values[len(values) - count:]
        del values[len(values) - count:]
        values.append(combine(kind, current, args))
    return values[0]


def names_in(node: Node) -> set[str]:
    """Return the set of plain names (not function names) used in a parse tree.

    Examples
    --------
    >>> sorted(names_in(parse_expression("a*sin(x) + pi")))
    ['a', 'pi', 'x']
    """
    return fold(node, lambda n: {n[1]} if n[0] == "name" else set(),
                lambda kind, n, parts: set().union(*parts))
