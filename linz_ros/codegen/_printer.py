"""Print sympy expressions as text of the shared grammar (what artifacts carry)."""

from __future__ import annotations

import sympy as sp

from linz_ros.errors import LinzError

__all__ = ["to_grammar", "CodegenError"]

_FUNCTIONS = {
    sp.sin: "sin", sp.cos: "cos", sp.tan: "tan", sp.asin: "asin", sp.acos: "acos", sp.atan: "atan",
    sp.atan2: "atan2", sp.sinh: "sinh", sp.cosh: "cosh", sp.tanh: "tanh", sp.exp: "exp", sp.log: "log",
    sp.Abs: "abs", sp.sign: "sign",
}
# reciprocal functions that simplification may introduce, rewritten into the grammar
_RECIPROCALS = {sp.sec: sp.cos, sp.csc: sp.sin, sp.cot: sp.tan, sp.sech: sp.cosh, sp.csch: sp.sinh,
                sp.coth: sp.tanh}
# precedence: sums < products < unary minus < powers < atoms (as the grammar parses them)
_SUM, _PRODUCT, _UNARY, _POWER, _ATOM = 1, 2, 3, 4, 5


class CodegenError(LinzError):
    """An expression that cannot be written in the artifact grammar."""


def to_grammar(expr: sp.Expr) -> str:
    """Text of ``expr`` in the grammar of plant files and artifacts.

    Rationals stay exact (``1/3``), floats keep 17 significant digits, ``exp(1)`` stands
    for E, and sec/csc/cot (and their hyperbolic kin) become reciprocals.

    Parameters
    ----------
    expr : sympy.Expr
        Real-valued, in symbols whose names are grammar names.

    Returns
    -------
    str

    Raises
    ------
    CodegenError
        For a function or object outside the grammar (Piecewise, Min, I, ...).

    Examples
    --------
    >>> x, y = sp.symbols("x y")
    >>> to_grammar(-x**2/(3*y) + sp.sqrt(x) * sp.sec(y))
    'sqrt(x)/cos(y) - x**2/(3*y)'
    """
    expr = sp.sympify(expr).replace(lambda e: e.func in _RECIPROCALS,
                                    lambda e: 1 / _RECIPROCALS[e.func](*e.args))
    return _text(expr)[0]


def _wrap(part: tuple[str, int], needed: bool) -> str:
    return f"({part[0]})" if needed else part[0]


def _text(expr: sp.Expr) -> tuple[str, int]:
    if expr.is_Integer:
        value = int(expr)
        return (str(value), _ATOM) if value >= 0 else (f"-{-value}", _UNARY)
    if expr.is_Rational:
        text = f"{abs(expr.p)}/{expr.q}"
        return (text, _PRODUCT) if expr.p > 0 else ("-" + text, _UNARY)
    if expr.is_Float:
        value = float(expr)
        text = repr(abs(value))
        if "inf" in text or "nan" in text:
            raise CodegenError(f"cannot write the number {value} in an artifact")
        return (text, _ATOM) if value >= 0 else ("-" + text, _UNARY)
    if expr is sp.pi:
        return "pi", _ATOM
    if expr is sp.E:
        return "exp(1)", _ATOM
    if expr.is_Symbol:
        return expr.name, _ATOM
    if expr.is_Add:
        return _sum_text(expr)
    if expr.is_Mul:
        return _product_text(expr)
    if expr.is_Pow:
        return _power_text(expr.base, expr.exp)
    if expr.func in _FUNCTIONS:
        args = ", ".join(_text(a)[0] for a in expr.args)
        return f"{_FUNCTIONS[expr.func]}({args})", _ATOM
    if expr.func is sp.sqrt:  # pragma: no cover - sympy represents sqrt as Pow
        return f"sqrt({_text(expr.args[0])[0]})", _ATOM
    raise CodegenError(f"cannot write {type(expr).__name__} ({str(expr)[:60]}) in the artifact grammar")


def _sum_text(expr: sp.Add) -> tuple[str, int]:
    parts = []
    for index, term in enumerate(expr.as_ordered_terms()):
        negative = term.could_extract_minus_sign()
        body = _text(-term if negative else term)
        if index == 0:
            parts.append(("-" if negative else "") + _wrap(body, body[1] < _PRODUCT))
        else:
            parts.append((" - " if negative else " + ") + _wrap(body, body[1] <= _SUM))
    return "".join(parts), _SUM


def _product_text(expr: sp.Expr) -> tuple[str, int]:
    coefficient, factors = expr.as_coeff_mul()
    if coefficient < 0:
        rest = sp.Mul(-coefficient, *factors)
        body = _text(rest)
        return "-" + _wrap(body, body[1] < _PRODUCT), _UNARY
    numerator: list[str] = []
    denominator: list[tuple[str, int]] = []
    if coefficient.is_Rational and not coefficient.is_Integer:
        if coefficient.p != 1:
            numerator.append(str(coefficient.p))
        denominator.append((str(coefficient.q), _ATOM))
    elif coefficient != 1:
        part = _text(coefficient)
        numerator.append(_wrap(part, part[1] < _PRODUCT))
    for factor in factors:
        if factor.is_Pow and factor.exp.is_Rational and factor.exp < 0:
            denominator.append(_power_text(factor.base, -factor.exp))
        else:
            part = _text(factor)
            numerator.append(_wrap(part, part[1] < _PRODUCT))
    top = "*".join(numerator) if numerator else "1"
    if not denominator:
        return top, _PRODUCT
    if len(denominator) == 1:
        bottom = _wrap(denominator[0], denominator[0][1] <= _PRODUCT)
    else:
        bottom = "(" + "*".join(_wrap(d, d[1] < _PRODUCT) for d in denominator) + ")"
    return f"{top}/{bottom}", _PRODUCT


def _power_text(base: sp.Expr, exponent: sp.Expr) -> tuple[str, int]:
    if exponent == 1:
        return _text(base)
    if exponent == sp.Rational(1, 2):
        return f"sqrt({_text(base)[0]})", _ATOM
    if exponent == -1:
        part = _text(base)
        return f"1/{_wrap(part, part[1] <= _PRODUCT)}", _PRODUCT
    if exponent.is_Rational and exponent < 0:
        inner = _power_text(base, -exponent)
        return f"1/{_wrap(inner, inner[1] <= _PRODUCT)}", _PRODUCT
    base_text = _text(base)
    exponent_text = _text(exponent)
    return (f"{_wrap(base_text, base_text[1] <= _POWER)}**{_wrap(exponent_text, exponent_text[1] < _ATOM)}",
            _POWER)
