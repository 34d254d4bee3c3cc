"""Over 500 lines because each of the grammar's functions has its jet here, one short recurrence
with its numpy-style docstring: one arithmetic, one home.

Truncated Taylor arithmetic ("jets"): exact derivatives along a curve without symbolic trees.

A jet is a numpy array ``c`` of shape ``(K + 1, *batch)`` (float or complex): ``c[k]`` is
the k-th Taylor coefficient of a function of t, so the function is ``sum_k c[k] t^k`` to
order K. Every operation below returns the coefficients of the result to the same order
from the recurrences of automatic differentiation (Griewank and Walther, *Evaluating
Derivatives*, 2nd ed., ch. 13, table 13.2): a product costs O(K^2) per entry of the batch,
never an expression that grows with K.

Two uses: Lie derivatives along the flow of a vector field, L_f^k h(x0) = k! [t^k] h(x(t))
with dx/dt = f(x), x(0) = x0 (:func:`lie_chain`), and time derivatives of a program along a
motion given as a jet (M(q(t)) for q(t) = q + q' t + q'' t^2 / 2 ...). Complex jets carry a
complex-step direction: for F analytic, Im F(x + i eps v) / eps = DF(x) v to rounding for
eps = 1e-30 (Squire and Trapp, SIAM Review 40, 1998), so L_g L_f^k h comes from the same
recurrences. ``abs`` and ``sign`` take the branch of the real part at t = 0.

Sums and differences of jets are numpy's ``+`` and ``-`` and a jet times a number is
``*``; a number is added with :func:`add_constant` (numpy's ``+`` would add it to every
coefficient).
"""

from __future__ import annotations

import math
from typing import Callable, Sequence

import numpy as np

__all__ = ["constant", "variable", "add_constant", "mul", "div", "reciprocal", "power", "integer_power", "sqrt", "exp", "log",
           "sin", "cos", "sin_cos", "tan", "sinh", "cosh", "tanh", "asin", "acos", "atan", "atan2", "abs_", "sign",
           "derivative", "flow", "lie_chain", "factorials", "COMPLEX_STEP"]

#: The complex step: Im F(x + i COMPLEX_STEP v) / COMPLEX_STEP = DF(x) v to rounding.
COMPLEX_STEP = 1e-30

Jet = np.ndarray


def constant(value: float | complex | np.ndarray, like: Jet) -> Jet:
    """The jet of a constant: ``value`` at order 0, zeros above, shaped like ``like``.

    Parameters
    ----------
    value : number or numpy.ndarray
        Broadcast against the batch shape of ``like``.
    like : numpy.ndarray
        A jet giving the order and the batch shape.

    Returns
    -------
    numpy.ndarray
    """
    value = np.asarray(value)
    out = np.zeros(like.shape, dtype=np.result_type(like.dtype, value.dtype, float))
    out[0] = value
    return out


def add_constant(a: Jet, value: float | complex | np.ndarray) -> Jet:
    """a + value, the value added at order 0 only.

    Parameters
    ----------
    a : numpy.ndarray
    value : number or numpy.ndarray
        Broadcast against the batch shape.

    Returns
    -------
    numpy.ndarray

    Examples
    --------
    >>> add_constant(variable(0.0, 1.0, 2), 1.0).tolist()      # 1 + t
    [1.0, 1.0, 0.0]
    """
    out = a.astype(np.result_type(a.dtype, np.asarray(value).dtype, float), copy=True)
    out[0] = out[0] + value
    return out


def variable(value: float | complex | np.ndarray, rate: float | complex | np.ndarray, order: int) -> Jet:
    """The jet of ``value + rate t`` to order ``order``.

    Parameters
    ----------
    value, rate : number or numpy.ndarray
        Of one batch shape.
    order : int

    Returns
    -------
    numpy.ndarray
    """
    value, rate = np.broadcast_arrays(np.asarray(value), np.asarray(rate))
    out = np.zeros((order + 1,) + value.shape, dtype=np.result_type(value.dtype, rate.dtype, float))
    out[0] = value
    if order >= 1:
        out[1] = rate
    return out


def _empty(*jets: Jet) -> Jet:
    shape = np.broadcast_shapes(*(j.shape for j in jets))
    return np.zeros(shape, dtype=np.result_type(*(j.dtype for j in jets), float))


def _is_number(a: object) -> bool:
    return np.ndim(a) == 0


def mul(a: Jet, b: Jet) -> Jet:
    """The product: c_k = sum_j a_j b_(k-j).

    Parameters
    ----------
    a, b : numpy.ndarray or number

    Returns
    -------
    numpy.ndarray

    Examples
    --------
    >>> t = variable(0.0, 1.0, 3)
    >>> mul(add_constant(t, 1.0), add_constant(t, 1.0)).tolist()        # (1 + t)^2
    [1.0, 2.0, 1.0, 0.0]
    """
    if _is_number(a) or _is_number(b):
        return a * b
    c = _empty(a, b)
    for k in range(c.shape[0]):
        c[k] = (a[:k + 1] * b[k::-1]).sum(axis=0)
    return c


def div(a: Jet, b: Jet) -> Jet:
    """The quotient: c_k = (a_k - sum_(j>=1) b_j c_(k-j)) / b_0.

    Parameters
    ----------
    a, b : numpy.ndarray or number

    Returns
    -------
    numpy.ndarray
    """
    if _is_number(b):
        return a / b
    if _is_number(a):
        a = constant(a, b)
    c = _empty(a, b)
    for k in range(c.shape[0]):
        c[k] = (a[k] - (b[1:k + 1] * c[k - 1::-1][:k]).sum(axis=0)) / b[0]
    return c


def reciprocal(a: Jet) -> Jet:
    """1 / a.

    Parameters
    ----------
    a : numpy.ndarray

    Returns
    -------
    numpy.ndarray
    """
    return div(1.0, a)


def derivative(a: Jet) -> Jet:
    """The jet of da/dt, one order shorter in content (its top coefficient is zero).

    Parameters
    ----------
    a : numpy.ndarray

    Returns
    -------
    numpy.ndarray
    """
    d = np.zeros_like(a)
    k = np.arange(1, a.shape[0]).reshape((-1,) + (1,) * (a.ndim - 1))
    d[:-1] = k * a[1:]
    return d


def _integrate(a: Jet, rate: Jet, start: float | complex | np.ndarray) -> Jet:
    """y with y(0) = start and dy/dt = rate(t) a'(t), i.e. y_k = (1/k) sum_(j=1..k) j a_j rate_(k-j)."""
    y = _empty(a, rate)
    y[0] = start
    for k in range(1, y.shape[0]):
        j = np.arange(1, k + 1).reshape((-1,) + (1,) * (a.ndim - 1))
        y[k] = (j * a[1:k + 1] * rate[k - 1::-1][:k]).sum(axis=0) / k
    return y


def exp(a: Jet) -> Jet:
    """exp(a): y_k = (1/k) sum_j j a_j y_(k-j).

    Parameters
    ----------
    a : numpy.ndarray

    Returns
    -------
    numpy.ndarray

    Examples
    --------
    >>> np.round(exp(variable(0.0, 1.0, 3)), 12).tolist()    # 1 + t + t^2/2 + t^3/6
    [1.0, 1.0, 0.5, 0.166666666667]
    """
    y = _empty(a)
    y[0] = np.exp(a[0])
    for k in range(1, y.shape[0]):
        j = np.arange(1, k + 1).reshape((-1,) + (1,) * (a.ndim - 1))
        y[k] = (j * a[1:k + 1] * y[k - 1::-1][:k]).sum(axis=0) / k
    return y


def log(a: Jet) -> Jet:
    """log(a), from a y' = a'.

    Parameters
    ----------
    a : numpy.ndarray

    Returns
    -------
    numpy.ndarray
    """
    return _integrate(a, reciprocal(a), np.log(a[0]))


def power(a: Jet, p: float) -> Jet:
    """a ** p for a real constant p: y_k = (1 / (k a_0)) sum_j ((p + 1) j - k) a_j y_(k-j).

    Parameters
    ----------
    a : numpy.ndarray
    p : float

    Returns
    -------
    numpy.ndarray
    """
    if float(p).is_integer() and abs(p) <= 64:
        return integer_power(a, int(p))
    y = _empty(a)
    y[0] = a[0] ** p
    for k in range(1, y.shape[0]):
        j = np.arange(1, k + 1).reshape((-1,) + (1,) * (a.ndim - 1))
        y[k] = (((p + 1) * j - k) * a[1:k + 1] * y[k - 1::-1][:k]).sum(axis=0) / (k * a[0])
    return y


def integer_power(a: Jet, n: int) -> Jet:
    """a ** n by repeated squaring (defined where a_0 = 0 too, for n >= 0).

    Parameters
    ----------
    a : numpy.ndarray
    n : int

    Returns
    -------
    numpy.ndarray
    """
    if n < 0:
        return reciprocal(integer_power(a, -n))
    result = constant(1.0, a)
    base = a
    while n:
        if n & 1:
            result = mul(result, base)
        n >>= 1
        if n:
            base = mul(base, base)
    return result


def sqrt(a: Jet) -> Jet:
    """sqrt(a) (a_0 must not be zero).

    Parameters
    ----------
    a : numpy.ndarray

    Returns
    -------
    numpy.ndarray
    """
    return power(a, 0.5)


def sin_cos(a: Jet) -> tuple[Jet, Jet]:
    """sin(a) and cos(a) together: s_k = (1/k) sum_j j a_j c_(k-j), c_k = -(1/k) sum_j j a_j s_(k-j).

    Parameters
    ----------
    a : numpy.ndarray

    Returns
    -------
    tuple of numpy.ndarray
    """
    s, c = _empty(a), _empty(a)
    s[0], c[0] = np.sin(a[0]), np.cos(a[0])
    for k in range(1, s.shape[0]):
        j = np.arange(1, k + 1).reshape((-1,) + (1,) * (a.ndim - 1))
        ja = j * a[1:k + 1]
        s[k] = (ja * c[k - 1::-1][:k]).sum(axis=0) / k
        c[k] = -(ja * s[k - 1::-1][:k]).sum(axis=0) / k
    return s, c


def sin(a: Jet) -> Jet:
    """sin(a).

    Parameters
    ----------
    a : numpy.ndarray

    Returns
    -------
    numpy.ndarray
    """
    return sin_cos(a)[0]


def cos(a: Jet) -> Jet:
    """cos(a).

    Parameters
    ----------
    a : numpy.ndarray

    Returns
    -------
    numpy.ndarray
    """
    return sin_cos(a)[1]


def tan(a: Jet) -> Jet:
    """tan(a) = sin(a) / cos(a).

    Parameters
    ----------
    a : numpy.ndarray

    Returns
    -------
    numpy.ndarray
    """
    s, c = sin_cos(a)
    return div(s, c)


def _sinh_cosh(a: Jet) -> tuple[Jet, Jet]:
    s, c = _empty(a), _empty(a)
    s[0], c[0] = np.sinh(a[0]), np.cosh(a[0])
    for k in range(1, s.shape[0]):
        j = np.arange(1, k + 1).reshape((-1,) + (1,) * (a.ndim - 1))
        ja = j * a[1:k + 1]
        s[k] = (ja * c[k - 1::-1][:k]).sum(axis=0) / k
        c[k] = (ja * s[k - 1::-1][:k]).sum(axis=0) / k
    return s, c


def sinh(a: Jet) -> Jet:
    """sinh(a).

    Parameters
    ----------
    a : numpy.ndarray

    Returns
    -------
    numpy.ndarray
    """
    return _sinh_cosh(a)[0]


def cosh(a: Jet) -> Jet:
    """cosh(a).

    Parameters
    ----------
    a : numpy.ndarray

    Returns
    -------
    numpy.ndarray
    """
    return _sinh_cosh(a)[1]


def tanh(a: Jet) -> Jet:
    """tanh(a) = sinh(a) / cosh(a).

    Parameters
    ----------
    a : numpy.ndarray

    Returns
    -------
    numpy.ndarray
    """
    s, c = _sinh_cosh(a)
    return div(s, c)


def asin(a: Jet) -> Jet:
    """asin(a), from y' = a' / sqrt(1 - a^2).

    Parameters
    ----------
    a : numpy.ndarray

    Returns
    -------
    numpy.ndarray
    """
    return _integrate(a, power(add_constant(-mul(a, a), 1.0), -0.5), np.arcsin(a[0]))


def acos(a: Jet) -> Jet:
    """acos(a), from y' = -a' / sqrt(1 - a^2).

    Parameters
    ----------
    a : numpy.ndarray

    Returns
    -------
    numpy.ndarray
    """
    return _integrate(a, -power(add_constant(-mul(a, a), 1.0), -0.5), np.arccos(a[0]))


def atan(a: Jet) -> Jet:
    """atan(a), from y' = a' / (1 + a^2).

    Parameters
    ----------
    a : numpy.ndarray

    Returns
    -------
    numpy.ndarray
    """
    return _integrate(a, reciprocal(add_constant(mul(a, a), 1.0)), np.arctan(a[0]))


def atan2(y: Jet, x: Jet) -> Jet:
    """atan2(y, x), from d/dt atan2 = (x y' - y x') / (x^2 + y^2).

    The value at t = 0 takes numpy's quadrant of the real parts; a complex-step part is
    carried to first order, which is all a complex step keeps.

    Parameters
    ----------
    y, x : numpy.ndarray

    Returns
    -------
    numpy.ndarray
    """
    rate = div(mul(x, derivative(y)) - mul(y, derivative(x)), mul(x, x) + mul(y, y))
    out = _empty(x, y)
    y0, x0 = y[0], x[0]
    if np.iscomplexobj(out):
        yr, xr = np.real(y0), np.real(x0)
        out[0] = np.arctan2(yr, xr) + 1j * (xr * np.imag(y0) - yr * np.imag(x0)) / (xr * xr + yr * yr)
    else:
        out[0] = np.arctan2(y0, x0)
    out[1:] = rate[:-1] / np.arange(1, out.shape[0]).reshape((-1,) + (1,) * (out.ndim - 1))
    return out


def sign(a: Jet) -> Jet:
    """sign(a): the constant sign of the real part at t = 0.

    Parameters
    ----------
    a : numpy.ndarray

    Returns
    -------
    numpy.ndarray
    """
    return constant(np.sign(np.real(a[0])), a)


def abs_(a: Jet) -> Jet:
    """|a| = sign(a_0) a, on the branch of the real part at t = 0.

    Parameters
    ----------
    a : numpy.ndarray

    Returns
    -------
    numpy.ndarray
    """
    return np.sign(np.real(a[0])) * a


def flow(f: Callable[[list[Jet]], Sequence[Jet]], x0: np.ndarray, order: int) -> np.ndarray:
    """Taylor coefficients of the solution of dx/dt = f(x), x(0) = x0, to ``order``.

    x_(k+1) = [t^k] f(x(t)) / (k + 1), and [t^k] f depends on x_0 .. x_k only, so each
    order is one evaluation of f on the jets known so far.

    Parameters
    ----------
    f : callable
        Maps a list of n jets to n jets (of the same order and batch shape).
    x0 : numpy.ndarray
        Shape ``(n, *batch)``.
    order : int

    Returns
    -------
    numpy.ndarray
        Shape ``(order + 1, n, *batch)``.

    Examples
    --------
    >>> x = flow(lambda x: [add_constant(mul(x[0], x[0]), 1.0)], np.array([0.0]), 5)   # tan t
    >>> np.round(x[:, 0], 12).tolist()
    [0.0, 1.0, 0.0, 0.333333333333, 0.0, 0.133333333333]
    """
    x0 = np.asarray(x0)
    coefficients = np.zeros((order + 1,) + x0.shape, dtype=np.result_type(x0.dtype, float))
    coefficients[0] = x0
    for k in range(order):
        rates = f([coefficients[:k + 1, i] for i in range(x0.shape[0])])
        for i, rate in enumerate(rates):
            coefficients[k + 1, i] = np.asarray(rate)[k] / (k + 1) if np.ndim(rate) else (rate if k == 0 else 0.0)
    return coefficients


def lie_chain(f: Callable[[list[Jet]], Sequence[Jet]], h: Callable[[list[Jet]], Jet], x0: np.ndarray,
              order: int) -> np.ndarray:
    """L_f^k h(x0) for k = 0 .. order: k! times the k-th Taylor coefficient of h along the flow of f.

    Parameters
    ----------
    f : callable
        The vector field: n jets -> n jets.
    h : callable
        The function: n jets -> one jet.
    x0 : numpy.ndarray
        Shape ``(n, *batch)``; complex for a complex step.
    order : int

    Returns
    -------
    numpy.ndarray
        Shape ``(order + 1, *batch)``.

    Examples
    --------
    >>> # dx1 = x2, dx2 = -x1: L_f^k of h = x1 at (1, 0) is 1, 0, -1, 0, 1
    >>> (lie_chain(lambda x: [x[1], -x[0]], lambda x: x[0], np.array([1.0, 0.0]), 4) + 0.0).tolist()
    [1.0, 0.0, -1.0, 0.0, 1.0]
    """
    x = flow(f, x0, order)
    values = np.asarray(h([x[:, i] for i in range(x.shape[1])]))
    if values.ndim == 0:
        values = constant(values, x[:, 0])
    return values * factorials(order).reshape((-1,) + (1,) * (values.ndim - 1))


def factorials(order: int) -> np.ndarray:
    """``0!, 1!, ..., order!`` as floats: Taylor coefficient k times k! is the k-th derivative."""
    return np.array([math.factorial(k) for k in range(order + 1)], dtype=float)
