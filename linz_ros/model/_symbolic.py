"""Turn parse trees of the shared grammar into sympy expressions, with user-owned names."""

from __future__ import annotations

import math
from typing import Mapping

import sympy as sp

from linz_ros.artifact.grammar import Node, fold

_SYMPY_FUNCTIONS = {
    "sin": sp.sin, "cos": sp.cos, "tan": sp.tan, "asin": sp.asin, "acos": sp.acos,
    "atan": sp.atan, "atan2": sp.atan2, "sinh": sp.sinh, "cosh": sp.cosh, "tanh": sp.tanh,
    "exp": sp.exp, "log": sp.log, "sqrt": sp.sqrt, "abs": sp.Abs, "sign": sp.sign,
}
_CONSTANTS = {"pi": sp.pi}
#: Exact constants need at most this many bits (a float holds 1024): larger ones are refused
#: before sympy spends minutes computing them (``9**9**9``) or cannot print them.
MAX_BITS = 4096


class _Sum(list):
    """The terms of a sum still being collected: one ``sp.Add`` at the end keeps long sums linear."""


class UnknownName(KeyError):
    """A name in an expression that the symbol table does not hold."""


def tree_to_sympy(node: Node, table: Mapping[str, sp.Expr]) -> sp.Expr:
    """Build the sympy expression of a parse tree.

    Parameters
    ----------
    node : tuple
        Parse tree from :func:`linz_ros.artifact.grammar.parse_expression`.
    table : mapping
        What each name means (symbols, or expressions for definitions). Entries here
        take precedence over the grammar's constants.

    Returns
    -------
    sympy.Expr

    Raises
    ------
    UnknownName
        For the first name that is neither in ``table`` nor a constant.
    ValueError
        For a number, or a constant power, beyond :data:`MAX_BITS`.
    """

    def leaf(n: Node) -> sp.Expr:
        if n[0] == "num":
            # decimal text becomes an exact rational, so simplification stays exact
            return _rational(n[1])
        name = n[1]
        if name in table:
            return table[name]
        if name in _CONSTANTS:
            return _CONSTANTS[name]
        raise UnknownName(name)

    def combine(kind: str, n: Node, v: list) -> sp.Expr | _Sum:
        if kind in ("add", "sub"):
            terms = v[0] if isinstance(v[0], _Sum) else _Sum([v[0]])
            right = _value(v[1])
            terms.append(right if kind == "add" else -right)
            return terms
        v = [_value(a) for a in v]
        if kind == "neg":
            return -v[0]
        if kind == "mul":
            return _checked(v[0] * v[1])
        if kind == "div":
            return _checked(v[0] / v[1])
        if kind == "pow":
            return _checked(_power(v[0], v[1]))
        return _SYMPY_FUNCTIONS[n[1]](*v)

    return _value(fold(node, leaf, combine))


def _rational(text: str) -> sp.Rational:
    value = float(text)
    if not math.isfinite(value) or (value == 0 and float(text.lower().partition("e")[0]) != 0):
        raise ValueError(f"number {text[:20]} is out of range")
    return sp.Rational(text)


def _value(value: sp.Expr | _Sum) -> sp.Expr:
    return _checked(sp.Add(*value)) if isinstance(value, _Sum) else value


def _bits(number: sp.Rational) -> int:
    return max(abs(number.p), number.q).bit_length()


def _checked(value: sp.Expr) -> sp.Expr:
    """The value, unless its numeric coefficient needs more than MAX_BITS."""
    number = value.args[0] if value.is_Add or value.is_Mul else value
    if number.is_Rational and _bits(number) > MAX_BITS:
        raise ValueError("a constant in it is out of range")
    return value


def _power(base: sp.Expr, exponent: sp.Expr) -> sp.Expr:
    """``base**exponent``, refused when a constant factor of the base would grow beyond MAX_BITS."""
    if exponent.is_Rational and abs(exponent) > 1:
        factors = [f for f in sp.Mul.make_args(base) if f.is_number and f not in (0, 1, -1)]
        bits = max((max([_bits(r) for r in f.atoms(sp.Rational)] + [2]) for f in factors), default=0)
        if bits * abs(exponent) > MAX_BITS:
            raise ValueError("a constant in it is out of range")
    return base ** exponent


def _cse_in_given_order(expressions):
    return sp.cse(expressions, order="none")


def numeric_function(arguments, expressions, modules: str = "numpy"):
    """``sympy.lambdify`` that stays fast on big expression trees (six-joint arms).

    Common subexpressions are eliminated first (sympy's CSE walks the tree as a graph,
    without canonical reordering), and symbols are renamed only where their names are
    not safe Python identifiers (lambdify's ``dummify`` rewrites the whole tree).

    Parameters
    ----------
    arguments : sequence of sympy.Symbol
    expressions : expression or nested lists of expressions
    modules : str
        As for ``sympy.lambdify`` (``numpy``, ``math``, ``mpmath``).

    Returns
    -------
    callable

    Examples
    --------
    >>> x, y = sp.symbols("x y")
    >>> numeric_function([x, y], [x * y + sp.sin(x * y)], "math")(2.0, 0.0)
    [0.0]
    """
    if not (isinstance(expressions, (list, tuple)) and expressions and isinstance(expressions[0], (list, tuple))):
        return sp.lambdify(list(arguments), expressions, modules=modules, dummify=False, cse=_cse_in_given_order)
    # sympy's CSE treats nested lists as opaque: eliminate over the flat list, then regroup
    sizes = [len(group) for group in expressions]
    flat = sp.lambdify(list(arguments), [e for group in expressions for e in group], modules=modules,
                       dummify=False, cse=_cse_in_given_order)

    def grouped(*values):
        out, start, result = [], 0, flat(*values)
        for size in sizes:
            out.append(result[start:start + size])
            start += size
        return out

    return grouped
