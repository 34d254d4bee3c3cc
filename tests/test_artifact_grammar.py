"""Tests of the whitelisted expression grammar shared by plant files and artifacts."""

import pytest

from linz_ros.artifact.grammar import FUNCTIONS, fold, names_in, parse_expression
from linz_ros.errors import ExpressionSyntaxError, LinzError


def _evaluate(text, env):
    import math
    fns = {"sin": math.sin, "cos": math.cos, "atan2": math.atan2, "sqrt": math.sqrt,
           "exp": math.exp, "abs": abs}
    ops = {"add": lambda a, b: a + b, "sub": lambda a, b: a - b, "mul": lambda a, b: a * b,
           "div": lambda a, b: a / b, "pow": lambda a, b: a ** b}

    def leaf(n):
        return float(n[1]) if n[0] == "num" else env[n[1]]

    def combine(kind, n, v):
        if kind == "neg":
            return -v[0]
        if kind == "call":
            return fns[n[1]](*v)
        return ops[kind](*v)

    return fold(parse_expression(text), leaf, combine)


@pytest.mark.parametrize("text, expected", [
    ("1 + 2*3", 7.0),
    ("-2**2", -4.0),          # unary minus binds looser than power (Python and maths agree)
    ("2**3**2", 512.0),       # power is right-associative
    ("2^3", 8.0),             # ^ is accepted for powers
    ("(1+2)*3", 9.0),
    ("8/4/2", 1.0),           # division is left-associative
    ("2**-1", 0.5),
    ("1.5e1 + .5", 15.5),
    ("atan2(0, -1)", 3.141592653589793),
    ("--3", 3.0),
])
def test_precedence_and_associativity(text, expected):
    assert _evaluate(text, {}) == pytest.approx(expected)


def test_user_names_are_never_interpreted():
    tree = parse_expression("lambda*E + I - S*N + beta")
    assert names_in(tree) == {"lambda", "E", "I", "S", "N", "beta"}
    assert _evaluate("lambda*E + I", {"lambda": 2.0, "E": 3.0, "I": 1.0}) == 7.0


def test_long_sums_do_not_exhaust_the_stack():
    text = " + ".join(f"x{i}" for i in range(20000))
    assert len(names_in(parse_expression(text))) == 20000


@pytest.mark.parametrize("text, problem", [
    ("x +", "expected a number, a name or '('"),
    ("sin x", "'sin' is a function"),
    ("__import__(os)", "not a known function"),
    ("__import__('os')", "unexpected character"),
    ("-" * 5000 + "x", "nested too deeply"),
    ("x.real", "unexpected character '.'"),
    ("x[0]", "unexpected character '['"),
    ("lambda: 0", "unexpected character ':'"),
    ("(x", "expected ')'"),
    ("atan2(x)", "atan2 takes 2 argument(s), got 1"),
    ("", "empty expression"),
    ("2 3", "unexpected '3'"),
    ("x = 1", "unexpected character '='"),
    ("'text'", "unexpected character"),
    ("(" * 1000 + "x" + ")" * 1000, "nested too deeply"),
])
def test_refuses_everything_outside_the_grammar(text, problem):
    with pytest.raises(ExpressionSyntaxError, match=problem.replace("(", r"\(").replace(")", r"\)")
                       .replace("[", r"\[")) as info:
        parse_expression(text)
    assert isinstance(info.value, LinzError) and isinstance(info.value, ValueError)


def test_error_reports_the_column():
    with pytest.raises(ExpressionSyntaxError) as info:
        parse_expression("x1 + $")
    assert info.value.column == 6


def test_every_function_parses_with_its_arity():
    for name, arity in FUNCTIONS.items():
        args = ", ".join(["x"] * arity)
        assert parse_expression(f"{name}({args})")[0:2] == ("call", name)


def test_numbers_and_non_text_inputs():
    assert parse_expression(3) == ("num", "3")
    assert parse_expression(0.25) == ("num", "0.25")
    with pytest.raises(ExpressionSyntaxError, match="expected an expression"):
        parse_expression(True)
    with pytest.raises(ExpressionSyntaxError, match="expected an expression"):
        parse_expression([1, 2])


def test_a_yaml_alias_bomb_given_as_an_expression_is_refused_quickly():
    """A nested list of 9**10 strings (YAML aliases share it): the message quotes a bounded repr,
    never ``str()`` of the whole (which would take minutes and gigabytes)."""
    bomb: list = ["lol"] * 9
    for _ in range(9):
        bomb = [bomb] * 9
    with pytest.raises(ExpressionSyntaxError, match=r"^cannot read '\[\[\[.*\.\.\.': expected an expression"):
        parse_expression(bomb)
