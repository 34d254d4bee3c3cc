"""The tokens every backend of the compiler emits for leaves, calls and powers.

Numbers are re-printed from ``float`` (never copied from the file), names become the
compiler's own slot names, the grammar's constants their values, and calls name only
the whitelisted functions below. Shared by the scalar and array backends
(:mod:`linz_ros.artifact.compiler`) and the second-order jet backend
(:mod:`linz_ros.artifact._jet2`).
"""

from __future__ import annotations

import math

from linz_ros.artifact.grammar import CONSTANTS, Node
from linz_ros.errors import ArtifactError

#: Grammar function -> the scalar call emitted for it (``_m`` is :mod:`math`).
MATH_FUNCTIONS = {
    "sin": "_m.sin", "cos": "_m.cos", "tan": "_m.tan", "asin": "_m.asin", "acos": "_m.acos",
    "atan": "_m.atan", "atan2": "_m.atan2", "sinh": "_m.sinh", "cosh": "_m.cosh",
    "tanh": "_m.tanh", "exp": "_m.exp", "log": "_m.log", "sqrt": "_m.sqrt", "abs": "_abs",
    "sign": "_sign",
}
CONSTANT_VALUES = {"pi": math.pi}
#: Integer exponents up to this size are emitted as ``a**k`` (exact and fast).
INT_EXPONENT = 64
#: Deeper subtrees go into a local variable of their own (CPython's compiler recurses).
MAX_NESTING = 40


def sign(value: float) -> float:
    """sign(value) as the grammar defines it (0 at 0, nan stays nan, as in numpy).

    Parameters
    ----------
    value : float

    Returns
    -------
    float
    """
    if value != value:
        return value
    return 0.0 if value == 0 else math.copysign(1.0, value)


def number_text(text: str, where: str) -> str:
    """A number of the grammar re-printed from ``float``; refused when not finite.

    Parameters
    ----------
    text : str
        The number as parsed.
    where : str
        For the message.

    Returns
    -------
    str
    """
    value = float(text)
    if not math.isfinite(value):
        raise ArtifactError(where, f"number {text!r} is out of range")
    return repr(value)


def leaf_text(node: Node, local: dict[str, str], where: str) -> str:
    """The emitted text of a ``num`` or ``name`` node: a number, a slot name or a constant's value.

    Parameters
    ----------
    node : tuple
        The leaf.
    local : dict of str -> str
        Declared names -> slot names.
    where : str
        For the message.

    Returns
    -------
    str

    Raises
    ------
    ArtifactError
        For a name that is neither declared nor a constant of the grammar.
    """
    if node[0] == "num":
        return number_text(node[1], where)
    name = node[1]
    if name in local:
        return local[name]
    if name in CONSTANTS:
        return repr(CONSTANT_VALUES[name])
    raise ArtifactError(where, f"unknown name {name!r}")


def integer_exponent(node: Node) -> int | None:
    """The exponent as a small int when it is an integer literal (possibly negated).

    Parameters
    ----------
    node : tuple
        The exponent's tree.

    Returns
    -------
    int or None
    """
    negative = node[0] == "neg"
    inner = node[1] if negative else node
    if inner[0] != "num":
        return None
    value = float(inner[1])
    if not value.is_integer() or abs(value) > INT_EXPONENT:
        return None
    return -int(value) if negative else int(value)
