"""Turn parse trees of the shared grammar into sympy expressions, with user-owned names."""

from __future__ import annotations

from typing import Mapping

import sympy as sp

from linz_ros.artifact.grammar import Node, fold

_SYMPY_FUNCTIONS = {
    "sin": sp.sin, "cos": sp.cos, "tan": sp.tan, "asin": sp.asin, "acos": sp.acos,
    "atan": sp.atan, "atan2": sp.atan2, "sinh": sp.sinh, "cosh": sp.cosh, "tanh": sp.tanh,
    "exp": sp.exp, "log": sp.log, "sqrt": sp.sqrt, "abs": sp.Abs, "sign": sp.sign,
}
_CONSTANTS = {"pi": sp.pi}


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
    """

    def leaf(n: Node) -> sp.Expr:
        if n[0] == "num":
            # decimal text becomes an exact rational, so simplification stays exact
            return sp.Rational(n[1])
        name = n[1]
        if name in table:
            return table[name]
        if name in _CONSTANTS:
            return _CONSTANTS[name]
        raise UnknownName(name)

    def combine(kind: str, n: Node, v: list[sp.Expr]) -> sp.Expr:
        if kind == "neg":
            return -v[0]
        if kind == "add":
            return v[0] + v[1]
        if kind == "sub":
            return v[0] - v[1]
        if kind == "mul":
            return v[0] * v[1]
        if kind == "div":
            return v[0] / v[1]
        if kind == "pow":
            return v[0] ** v[1]
        return _SYMPY_FUNCTIONS[n[1]](*v)

    return fold(node, leaf, combine)
