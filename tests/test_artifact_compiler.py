"""The artifact compiler: grammar text -> Python, same numbers as sympy, nothing else runs."""

import math

import numpy as np
import pytest
import sympy as sp
from hypothesis import given, settings
from hypothesis import strategies as st

from linz_ros.artifact.compiler import compile_program
from linz_ros.codegen import to_grammar
from linz_ros.errors import ArtifactError


def _one(text, names=("a", "b"), backend="math"):
    return compile_program("t", [("x", list(names))], [], [("y", [1], [text])], backend=backend)


@pytest.mark.parametrize("text, a, b, expected", [
    ("a - b - a", 2.0, 3.0, -3.0),                 # left association kept
    ("a - (b - a)", 2.0, 3.0, 1.0),
    ("a / b / a", 2.0, 4.0, 0.25),
    ("a / (b / a)", 2.0, 4.0, 1.0),
    ("-a**2", 3.0, 0.0, -9.0),                    # unary minus binds looser than powers
    ("(-a)**2", 3.0, 0.0, 9.0),
    ("a**b**0.5", 2.0, 4.0, 4.0),                 # right-associative powers
    ("2**-a", 1.0, 0.0, 0.5),
    ("a^2 + b^-1", 3.0, 2.0, 9.5),
    ("atan2(a, b) + abs(-b) + sign(-a) + sign(0*a)", 1.0, 1.0, math.pi / 4 + 1.0 - 1.0),
    ("sqrt(a) * exp(log(b)) + pi", 4.0, 3.0, 6.0 + math.pi),
    ("a**0.5", 2.25, 0.0, 1.5),
    ("1e-3*a + .5", 2.0, 0.0, 0.502),
])
def test_precedence_and_functions_match_the_grammar(text, a, b, expected):
    for backend in ("math", "numpy"):
        value = _one(text, backend=backend)([a, b])[0]
        assert value == pytest.approx(expected, rel=1e-14, abs=1e-15), backend


def test_temporaries_chain_and_outputs_have_shapes():
    program = compile_program("t", [("x", ["q"]), ("p", ["k"])], [("_t0", "k*q"), ("_t1", "_t0 + 1")],
                              [("A", [2, 2], ["_t0", "_t1", "0", "q"]), ("s", [1], ["_t1**2"])])
    assert program([2.0], [3.0]) == (6.0, 7.0, 0.0, 2.0, 49.0)
    out = program.evaluate([2.0], [3.0])
    assert out["A"].shape == (2, 2) and out["A"][0, 1] == 7.0 and out["s"].tolist() == [49.0]


def test_numpy_backend_evaluates_many_points_at_once():
    program = compile_program("t", [("x", ["a", "b"])], [("_t0", "sin(a)")],
                              [("y", [2], ["_t0*b", "1"])], backend="numpy")
    points = np.array([[0.0, 1.0, 2.0], [1.0, 2.0, 3.0]])  # row i = state i at three points
    out = program.evaluate(points)["y"]
    np.testing.assert_allclose(out[0], np.sin(points[0]) * points[1])
    np.testing.assert_allclose(out[1], [1.0, 1.0, 1.0])


@pytest.mark.parametrize("text", ["sqrt(a - 5)", "log(a - a)", "a/(b - b)", "(a - 5)**0.5", "exp(1000*a)",
                                  "acos(a + 3)"])
def test_domain_errors_raise_arithmetic_or_value_errors_on_the_math_backend(text):
    program = _one(text)
    with pytest.raises((ArithmeticError, ValueError)):
        program([1.0, 2.0])
    assert math.isnan(program.evaluate([1.0, 2.0])["y"][0])


@pytest.mark.parametrize("text, words", [
    ("__import__('os')", "unexpected character"),
    ("a.__class__", "unexpected character"),
    ("eval(a)", "'eval' is not a known function"),
    ("getattr(a, b)", "'getattr' is not a known function"),
    ("lambda: a", "unexpected character"),
    ("[a for a in b]", "unexpected character"),
    ("a; import os", "unexpected character"),
    ("c + a", "unknown name 'c'"),
    ("open", "unknown name 'open'"),
    ("__builtins__", "unknown name '__builtins__'"),
    ("1e999*a", "out of range"),
    ("sin(a, b)", "takes 1 argument"),
])
def test_anything_outside_the_grammar_is_refused_before_compiling(text, words):
    with pytest.raises(ArtifactError, match="t: y\\[0\\]") as info:
        _one(text)
    assert words in str(info.value)


def test_names_are_checked():
    with pytest.raises(ArtifactError, match="declared twice"):
        compile_program("t", [("x", ["a", "a"])], [], [("y", [1], ["a"])])
    with pytest.raises(ArtifactError, match="not a valid name"):
        compile_program("t", [("x", ["a-b"])], [], [("y", [1], ["1"])])
    with pytest.raises(ArtifactError, match="reserved constant"):
        compile_program("t", [("x", ["pi"])], [], [("y", [1], ["1"])])
    with pytest.raises(ArtifactError, match="shape \\[2\\] needs 2"):
        compile_program("t", [("x", ["a"])], [], [("y", [2], ["a"])])
    with pytest.raises(ArtifactError, match="temporary _t1: .*unknown name '_t2'"):
        compile_program("t", [("x", ["a"])], [("_t1", "_t2"), ("_t2", "a")], [("y", [1], ["_t1"])])


def test_the_emitted_source_only_uses_its_own_names():
    program = compile_program("t", [("x", ["lambda", "E"])], [("_t0", "lambda*E")], [("y", [1], ["_t0 + E"])])
    assert "lambda" not in program.source.split("def _program")[1].replace("_program", "")
    assert program([2.0, 3.0]) == (9.0,)


def test_a_long_sum_compiles_without_deep_nesting():
    text = " + ".join(f"{k}*a" for k in range(3000))
    assert _one(text)([1.0, 0.0])[0] == sum(range(3000))


# -- property: printed sympy expressions evaluate like sympy ----------------------------------
_x, _y = sp.symbols("x y", real=True)
_leaves = st.sampled_from([_x, _y, sp.Integer(2), sp.Rational(3, 7), sp.Float(0.37), sp.pi, -_x])
_unary = [sp.sin, sp.cos, sp.atan, sp.exp, sp.tanh, lambda e: sp.sqrt(e ** 2 + 1), lambda e: sp.log(e ** 2 + 1)]


def _combine(children):
    pairs = st.tuples(children, children)
    return st.one_of(
        pairs.map(lambda p: p[0] + p[1]), pairs.map(lambda p: p[0] - p[1]), pairs.map(lambda p: p[0] * p[1]),
        pairs.map(lambda p: p[0] / (p[1] ** 2 + 1)), children.map(lambda e: e ** 3), children.map(lambda e: -e),
        st.tuples(st.sampled_from(_unary), children).map(lambda p: p[0](p[1])))


@settings(max_examples=150, deadline=None)
@given(st.recursive(_leaves, _combine, max_leaves=12), st.floats(-2, 2), st.floats(-2, 2))
def test_printed_expressions_compile_to_the_same_numbers_as_sympy(expr, a, b):
    expected = complex(expr.evalf(30, subs={_x: a, _y: b}))
    if not (math.isfinite(expected.real) and abs(expected.imag) < 1e-12 and abs(expected.real) < 1e12):
        return
    program = compile_program("t", [("x", ["x", "y"])], [], [("y", [1], [to_grammar(expr)])])
    try:
        got = program([a, b])[0]
    except OverflowError:
        return
    assert got == pytest.approx(expected.real, rel=1e-9, abs=1e-9)


def test_a_name_with_a_trailing_newline_is_refused():
    with pytest.raises(ArtifactError, match="is not a valid name"):
        compile_program("t", [("x", ["q\n"])], [], [("y", [1], ["1"])])


# -- the jet2 backend: scalar second-order jets -------------------------------------------------
# every grammar function, each power form, atan2 with jets and constants on either side, quotients
_JET_TEXTS = ["sin(a)*cos(b)/(1 + a**2)", "k*exp(-b) - 2**a + atan2(a, k)", "sqrt(k)*a - 3", "k**2 + 1",
              "tan(0.3*a) + asin(0.2*b) + acos(0.1*a) + atan(b)", "sinh(a)*cosh(b) + tanh(a*b)",
              "log(2 + a**2)*abs(b + 5)*sign(b + 5)", "a**b + a**2.5 + (a + b)**(-2)", "atan2(k, b)",
              "atan2(a, b) + atan2(a*b, k)", "a**7 - a**(-3) + (a*b)**k + k**a", "a/b - k/a + a/k - (-b)",
              "abs(-a)*sign(-a) + sqrt(a*a + b*b)*pi", "a**0 + b**1 + (a - a)"]
_A, _B = (1.3, 0.5, -0.2), (0.4, -0.3, 0.7)         # a(t) = 1.3 + 0.5 t - 0.2 t^2, b(t) likewise
_K = 1.7


def _series_coefficients(text):
    """[t^0], [t^1], [t^2] of the expression along the curve, by sympy at 30 digits (not jets)."""
    t = sp.Symbol("t", real=True)
    curve = {name: sum(sp.Float(c, 30) * t ** i for i, c in enumerate(coefficients))
             for name, coefficients in (("a", _A), ("b", _B))}
    expr = sp.sympify(text, locals={**curve, "k": sp.Float(_K, 30)})
    return [float(sp.diff(expr, t, order).subs(t, 0).evalf(30) / math.factorial(order)) for order in range(3)]


@pytest.mark.parametrize("text", _JET_TEXTS)
def test_jet2_backend_equals_sympy_series_for_every_function(text):
    program = compile_program("j", [("x", ["a", "b"]), ("p", ["k"])], [], [("y", [1], [text])], backend="jet2")
    got = program([_A, _B], [_K])[0]
    assert got == pytest.approx(_series_coefficients(text), rel=1e-12, abs=1e-13)


def test_jet2_temporaries_and_outputs_keep_their_layout():
    args = [("x", ["a", "b"]), ("p", ["k"])]
    temporaries = [("_t0", "sin(a)*k"), ("_t1", "_t0/b"), ("_t2", "k*2")]
    outputs = [("A", [2, 2], ["_t1", "_t0**2", "_t2", "a"]), ("s", [1], ["_t1*_t2 + b"])]
    program = compile_program("j", args, temporaries, outputs, backend="jet2")
    got = program([_A, _B], [_K])
    texts = ["sin(a)*k/b", "(sin(a)*k)**2", "k*2", "a", "sin(a)*k/b*k*2 + b"]
    for value, text in zip(got, texts):
        assert value == pytest.approx(_series_coefficients(text), rel=1e-12, abs=1e-13)
    assert got[2] == (2 * _K, 0.0, 0.0)               # a constant output is a triple too
    assert program.evaluate([_A, _B], [_K])["A"].shape == (2, 2, 3)


def test_jet2_phases_take_each_order_after_the_previous_one():
    """Order k of the outputs needs the inputs up to order k: the order-2 input may depend on order 1."""
    program = compile_program("j", [("x", ["a", "b"]), ("p", ["k"])], [], [("y", [1], [_JET_TEXTS[0]])],
                              backend="jet2")
    run = program.phases([_A[0], _B[0]], [_K])
    orders = [next(run)[0], run.send([_A[1], _B[1]])[0], run.send([_A[2], _B[2]])[0]]
    assert tuple(orders) == program([_A, _B], [_K])[0]
    assert compile_program("m", [("x", ["a", "b"])], [], [("y", [1], [_JET_TEXTS[0]])]).phases is None


def test_jet2_skips_the_known_zeros_of_constants():
    program = compile_program("j", [("x", ["a"]), ("p", ["k"])], [], [("y", [1], ["k*a + k*k"])], backend="jet2")
    assert program([(2.0, 3.0, 5.0)], [7.0]) == ((63.0, 21.0, 35.0),)
    # one product per order for k*a, the constant k*k once: no multiplication by a zero coefficient
    assert program.source.count(" * ") == 4


@pytest.mark.parametrize("text", ["sqrt(a - 5)", "log(a - a)", "a/(b - b)", "(a - 5)**0.5", "acos(a + 3)",
                                  "(a - a)**(-2)"])
def test_jet2_domain_errors_raise_like_the_math_backend(text):
    program = _one(text, backend="jet2")
    with pytest.raises((ArithmeticError, ValueError)):
        program([(1.0, 1.0, 1.0), (2.0, 1.0, 0.0)])


def test_jet2_backend_keeps_the_grammar_checks():
    for text, words in [("__import__(a)", "is not a known function"), ("a + q", "unknown name 'q'"),
                        ("a; b", "cannot read"), ("1e999*a", "out of range")]:
        with pytest.raises(ArtifactError, match=words):
            compile_program("j", [("x", ["a"])], [], [("y", [1], [text])], backend="jet2")
    with pytest.raises(ArtifactError, match="declared twice"):
        compile_program("j", [("x", ["a"])], [("a", "a*2")], [("y", [1], ["a"])], backend="jet2")
    program = compile_program("j", [("x", ["lambda", "E"]), ("p", ["k"])], [], [("y", [1], ["k*sin(lambda)"])],
                              backend="jet2")
    body = program.source.split("def _phases")[1]
    assert "_m.sin(a0_0)" in body and "lambda" not in body and "import" not in body


def test_jet2_long_sums_compile_without_deep_nesting():
    text = " + ".join(f"{k}*a*k" for k in range(3000))
    program = compile_program("j", [("x", ["a"]), ("p", ["k"])], [], [("y", [1], [text])], backend="jet2")
    total = sum(range(3000))
    assert program([(1.0, 2.0, 3.0)], [2.0])[0] == pytest.approx((2 * total, 4 * total, 6 * total), rel=1e-14)


def test_the_taylor_backend_agrees_with_the_jet2_backend_and_carries_complex_steps():
    from linz_ros.artifact import taylor
    text = ["sin(x1)*exp(x2)/(2 + cos(x1*x2)) + atan2(x2, 3) - sqrt(4 + x1**2)*a**2",
            "log(3 + x2)**(-2) + tanh(x1)**1.5 + abs(x1 - 5)*a", "a*x1 + 1"]
    parts = ([("x", ["x1", "x2"]), ("p", ["a"])], [], [("y", [3], text)])
    jets = compile_program("demo", *parts, backend="taylor")
    second = compile_program("demo", *parts, backend="jet2")
    x = [(0.3, 0.7, -0.2), (0.5, -1.1, 0.4)]
    got = jets([np.array([c + 0.0 for c in xi] + [0.0] * 3) for xi in x], [1.7])
    want = second(x, [1.7])
    for g, w in zip(got, want):
        assert np.asarray(g)[:3] == pytest.approx(w, rel=1e-13, abs=1e-13)
    # a complex step along (1, 0): Im / eps is the derivative in x1, exact to rounding
    step = [taylor.variable(0.3 + 1j * taylor.COMPLEX_STEP, 0.0, 2), taylor.variable(0.5 + 0j, 0.0, 2)]
    real = [taylor.variable(0.3, 0.0, 2), taylor.variable(0.5, 0.0, 2)]
    h = 1e-6
    ahead = [taylor.variable(0.3 + h, 0.0, 2), taylor.variable(0.5, 0.0, 2)]
    behind = [taylor.variable(0.3 - h, 0.0, 2), taylor.variable(0.5, 0.0, 2)]
    for s, r, a, b in zip(jets(step, [1.7]), jets(real, [1.7]), jets(ahead, [1.7]), jets(behind, [1.7])):
        assert np.real(np.asarray(s)[0]) == pytest.approx(np.asarray(r)[0], rel=1e-15)
        assert np.imag(np.asarray(s)[0]) / taylor.COMPLEX_STEP == pytest.approx(
            (np.asarray(a)[0] - np.asarray(b)[0]) / (2 * h), rel=1e-7)
