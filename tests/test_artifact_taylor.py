"""Truncated Taylor arithmetic: every operation against sympy's series of the same function."""

import math

import numpy as np
import pytest
import sympy as sp

from linz_ros.artifact import taylor

ORDER = 7
t = sp.Symbol("t")


def _series(expr: sp.Expr) -> list[float]:
    """Taylor coefficients of expr(t) at t = 0 to ORDER, by sympy (the reference)."""
    poly = sp.series(expr, t, 0, ORDER + 1).removeO()
    return [float(poly.coeff(t, k)) for k in range(ORDER + 1)]


# inner curves a(t), b(t) with a(0), b(0) away from branch points
A = 0.3 + 0.7 * t - 0.2 * t ** 2 + 0.05 * t ** 3
B = 1.4 - 0.3 * t + 0.6 * t ** 2


def _jet(expr: sp.Expr) -> np.ndarray:
    return np.array(_series(expr))


CASES = [
    ("mul", lambda a, b: taylor.mul(a, b), A * B),
    ("div", lambda a, b: taylor.div(a, b), A / B),
    ("reciprocal", lambda a, b: taylor.reciprocal(b), 1 / B),
    ("power", lambda a, b: taylor.power(b, 1.7), B ** sp.Rational(17, 10)),
    ("negative integer power", lambda a, b: taylor.power(b, -3), B ** -3),
    ("integer power at zero", lambda a, b: taylor.integer_power(taylor.add_constant(a, -0.3), 3), (A - sp.Rational(3, 10)) ** 3),
    ("sqrt", lambda a, b: taylor.sqrt(b), sp.sqrt(B)),
    ("exp", lambda a, b: taylor.exp(a), sp.exp(A)),
    ("log", lambda a, b: taylor.log(b), sp.log(B)),
    ("sin", lambda a, b: taylor.sin(a), sp.sin(A)),
    ("cos", lambda a, b: taylor.cos(a), sp.cos(A)),
    ("tan", lambda a, b: taylor.tan(a), sp.tan(A)),
    ("sinh", lambda a, b: taylor.sinh(a), sp.sinh(A)),
    ("cosh", lambda a, b: taylor.cosh(a), sp.cosh(A)),
    ("tanh", lambda a, b: taylor.tanh(a), sp.tanh(A)),
    ("asin", lambda a, b: taylor.asin(a), sp.asin(A)),
    ("acos", lambda a, b: taylor.acos(a), sp.acos(A)),
    ("atan", lambda a, b: taylor.atan(a), sp.atan(A)),
    ("atan2 first quadrant", lambda a, b: taylor.atan2(a, b), sp.atan2(A, B)),
    ("atan2 third quadrant", lambda a, b: taylor.atan2(-a, -b), sp.atan(A / B) - sp.pi),
    ("abs of a negative", lambda a, b: taylor.abs_(-b), B),
    ("a composition", lambda a, b: taylor.mul(taylor.sin(taylor.mul(a, b)), taylor.exp(-a)) + 2.0 * b,
     sp.sin(A * B) * sp.exp(-A) + 2 * B),
]


@pytest.mark.parametrize("name, operation, expected", CASES, ids=[c[0] for c in CASES])
def test_each_operation_gives_the_taylor_coefficients_sympy_finds(name, operation, expected):
    got = operation(_jet(A), _jet(B))
    np.testing.assert_allclose(got, _series(expected), rtol=1e-11, atol=1e-12)


def test_a_batch_axis_is_carried_through():
    # two curves at once: a(t) and 2 a(t)
    a = np.stack([_jet(A), _jet(2 * A)], axis=1)
    got = taylor.sin(a)
    np.testing.assert_allclose(got[:, 0], _series(sp.sin(A)), atol=1e-12)
    np.testing.assert_allclose(got[:, 1], _series(sp.sin(2 * A)), atol=1e-12)


def test_a_number_is_added_at_order_zero_only():
    np.testing.assert_allclose(taylor.add_constant(_jet(A), 2.0), _series(A + 2), atol=1e-15)


def test_sign_is_the_constant_sign_at_zero():
    assert taylor.sign(_jet(-B)).tolist() == [-1.0] + [0.0] * ORDER


def test_flow_of_a_pendulum_matches_the_series_of_its_solution():
    # dx1 = x2, dx2 = -sin(x1) from (0.4, 0.1): the coefficients by sympy's Lie series
    x1, x2 = sp.symbols("x1 x2")
    f = sp.Matrix([x2, -sp.sin(x1)])
    expected, term = [], sp.Matrix([x1, x2])
    for k in range(6):
        expected.append([float(e.subs({x1: 0.4, x2: 0.1})) / math.factorial(k) for e in term])
        term = term.jacobian([x1, x2]) * f
    got = taylor.flow(lambda x: [x[1], -taylor.sin(x[0])], np.array([0.4, 0.1]), 5)
    np.testing.assert_allclose(got, expected, rtol=1e-12, atol=1e-14)


def test_lie_chain_and_a_complex_step_give_L_f_and_L_g_of_the_khalil_example():
    # Khalil, Nonlinear Systems (3rd ed.), ex. 13.2 form: dx1 = a sin x2, dx2 = -x1^2 + u, h = x1;
    # L_f h = a sin x2, L_f^2 h = -a cos(x2) x1^2, L_g L_f h = a cos x2
    a, x0 = 1.5, np.array([0.2, 0.3])

    def f(x):
        return [a * taylor.sin(x[1]), -taylor.mul(x[0], x[0])]

    chain = taylor.lie_chain(f, lambda x: x[0], x0, 2)
    np.testing.assert_allclose(chain, [0.2, a * math.sin(0.3), -a * math.cos(0.3) * 0.04], rtol=1e-13)
    g = np.array([0.0, 1.0])
    stepped = taylor.lie_chain(f, lambda x: x[0], x0 + 1j * taylor.COMPLEX_STEP * g, 1)
    assert stepped[1].imag / taylor.COMPLEX_STEP == pytest.approx(a * math.cos(0.3), rel=1e-14)
    assert stepped[1].real == pytest.approx(a * math.sin(0.3), rel=1e-14)


def test_the_complex_step_passes_every_operation():
    # d/dx of atan2(x, 1.2) * abs(x - 2) + sqrt(x) at x = 0.7, by the complex step on order-0 jets
    def F(x):
        return taylor.mul(taylor.atan2(x, taylor.constant(1.2, x)), taylor.abs_(taylor.add_constant(x, -2.0))) + taylor.sqrt(x)

    x = np.array([0.7 + 1j * taylor.COMPLEX_STEP])
    derivative = F(x)[0].imag / taylor.COMPLEX_STEP
    X = sp.Symbol("X")
    expected = sp.diff(sp.atan2(X, sp.Rational(6, 5)) * (2 - X) + sp.sqrt(X), X).subs(X, sp.Rational(7, 10))
    assert derivative == pytest.approx(float(expected), rel=1e-13)
