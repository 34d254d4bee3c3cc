"""Checks of plant-file values that parse but cannot be meant: a division by a parameter that
is zero, a constant beyond a float, a negative mass, an expression grown out of bounds.

The reader object is the plant-file reader of ``_reader`` (passed in, so this module stays
below it); every refusal is its one-line ``PlantFileError``.
"""

from __future__ import annotations

import math
from typing import Any, Mapping

import sympy as sp

__all__ = ["MAX_EXPRESSION_NODES", "check_expression_size", "check_nominal_values", "check_physical_sign",
           "unit_kind"]

#: An expression with more tree nodes than this is refused (definitions that square each
#: other double in size each time; the analysis would never finish).
MAX_EXPRESSION_NODES = 20_000
#: Unit texts (lower case, without spaces, ``*``, ``.``, ``^`` and ``·``) of masses and inertias.
_MASS_UNITS = ("kg", "g", "t", "lb")
_INERTIA_UNITS = ("kgm2", "gm2", "gcm2", "kgcm2", "gmm2", "kgmm2", "lbft2", "lbin2")
_QUOTE = 40


def _short(text: Any, width: int = _QUOTE) -> str:
    text = text if isinstance(text, str) else str(text)
    return text if len(text) <= width else text[:width - 3] + "..."


def check_expression_size(reader: Any, field: str, expr: sp.Expr, limit: int = MAX_EXPRESSION_NODES) -> None:
    """Refuse an expression of more than ``limit`` tree nodes, naming the field.

    Parameters
    ----------
    reader : the plant-file reader
    field : str
    expr : sympy.Expr
    limit : int
        Counting stops there, so a tree of shared subtrees (2^30 nodes written out) costs
        no more than ``limit`` steps.
    """
    for count, _ in enumerate(sp.preorder_traversal(expr), start=1):
        if count > limit:
            raise reader.fail(field, f"expression too large: more than {limit} nodes once the definitions are "
                                     "substituted (does a definition use an earlier one several times?)")


def check_nominal_values(reader: Any, field: str, text: Any, expr: sp.Expr,
                         values: Mapping[sp.Symbol, float]) -> None:
    """Refuse an expression that is infinite, undefined or beyond a float at the nominal values.

    A division by a parameter that is zero is blamed on the parameter:
    ``parameters.J: is 0, and dynamics.w divides by it (u/J)``.

    Parameters
    ----------
    reader : the plant-file reader
    field : str
        The field the expression came from, e.g. ``dynamics.w``.
    text : str
        The expression as written (quoted, shortened, in the message).
    expr : sympy.Expr
    values : mapping
        Parameter symbol -> nominal value.
    """
    used = {p: v for p, v in values.items() if p in expr.free_symbols}
    exact = {p: sp.Rational(repr(float(v))) for p, v in used.items()}
    for power in expr.atoms(sp.Pow):
        if power.exp.is_negative and power.base.free_symbols & set(exact) \
                and power.base.xreplace(exact) == 0:
            _division_by_zero(reader, field, text, power.base, exact)
    for function in expr.atoms(sp.log):
        if function.args[0].free_symbols & set(exact) and function.args[0].xreplace(exact) == 0:
            raise reader.fail(field, f"log({_short(function.args[0])}) is undefined at the nominal parameter "
                                     "values (its argument is 0)")
    nominal = expr.xreplace(exact) if exact else expr
    if nominal.has(sp.zoo, sp.oo, -sp.oo, sp.nan):
        raise reader.fail(field, f"{_short(text)!r} is infinite or undefined at the nominal parameter values")
    for constant in _constants(nominal):
        if not _finite(constant):
            raise reader.fail(field, f"{_short(text)!r} holds a constant beyond the range of a float at the "
                                     f"nominal parameter values ({_magnitude(constant)})")


def _division_by_zero(reader: Any, field: str, text: Any, base: sp.Expr, exact: Mapping[sp.Symbol, Any]) -> None:
    zero = sorted((p.name for p in base.free_symbols if p in exact and exact[p] == 0))
    if isinstance(base, sp.Symbol) and zero:
        raise reader.fail(f"parameters.{base.name}", f"is 0, and {field} divides by it ({_short(text)})")
    names = f" ({', '.join(f'{n} = 0' for n in zero)})" if zero else ""
    raise reader.fail(field, f"divides by {_short(base)}, which is 0 at the nominal parameter values{names}")


def _constants(expr: sp.Expr):
    """The numbers, and the functions of numbers only (``exp(1000)``), in an expression."""
    yield from expr.atoms(sp.Number)
    for function in expr.atoms(sp.Function):
        if not function.free_symbols:
            yield function


def _magnitude(constant: sp.Expr) -> str:
    """A constant in three digits (``1.00e+616``), however many it has exactly."""
    try:
        return _short(sp.N(constant, 3))
    except (TypeError, ValueError, ArithmeticError):
        return _short(constant)


def _finite(constant: sp.Expr) -> bool:
    try:
        value = complex(constant.evalf(17))
    except (TypeError, ValueError, OverflowError):
        return False
    return math.isfinite(value.real) and math.isfinite(value.imag)


def unit_kind(unit: str) -> str | None:
    """``"mass"`` or ``"inertia"`` for a unit text of one of them, else None.

    Parameters
    ----------
    unit : str
        As written: ``kg``, ``kg m^2``, ``kg*m^2``, ``kg m2``, ``kg·m²`` ...

    Returns
    -------
    str or None

    Examples
    --------
    >>> unit_kind("kg*m^2"), unit_kind(" KG "), unit_kind("N m s")
    ('inertia', 'mass', None)
    """
    key = unit.lower().replace("²", "2")
    for mark in (" ", "*", ".", "^", "·", "\u22c5"):
        key = key.replace(mark, "")
    if key in _MASS_UNITS:
        return "mass"
    if key in _INERTIA_UNITS:
        return "inertia"
    return None


def check_physical_sign(reader: Any, values: Mapping[sp.Symbol, float], units: Mapping[str, str]) -> None:
    """Refuse a parameter whose unit says mass or inertia and whose value is not positive.

    Used for the explicit form; the mechanical forms check that M is positive definite
    (where an added-mass derivative of unit kg is negative by convention).

    Parameters
    ----------
    reader : the plant-file reader
    values : mapping
        Parameter symbol -> nominal value.
    units : mapping
        Parameter name -> unit text, where given.
    """
    for symbol, value in values.items():
        kind = unit_kind(units.get(symbol.name, ""))
        if kind is not None and not value > 0:
            raise reader.fail(f"parameters.{symbol.name}",
                              f"{'a mass' if kind == 'mass' else 'an inertia'} (unit {units[symbol.name]}) "
                              f"must be positive, got {value:g} (a coefficient that may be negative, "
                              "such as an added-mass derivative, takes no mass unit here)")
