"""Tests of the Lie-algebra layer, including an independent finite-difference cross-check."""

import numpy as np
import pytest
import sympy as sp

from support import pendulum_chain_text
from linz_ros.geometry import (NumericContext, ad, distribution, evaluate, generic_rank,
                               involutivity, is_identically_zero, lie_bracket, lie_derivative,
                               lie_derivative_covector, numeric_rank, rank_at)

x1, x2, x3 = sp.symbols("x1 x2 x3", real=True)
X = (x1, x2, x3)


def _ctx(coords=X, constants=None, count=5):
    return NumericContext.around(coords, constants or {}, [0.3] * len(coords), count=count)


def test_bracket_of_textbook_fields():
    # [f, g] for f = (x2, -sin x1), g = (0, 1): -(df/dx) g = (-1, 0)
    f = sp.Matrix([x2, -sp.sin(x1), 0])
    g = sp.Matrix([0, 1, 0])
    assert lie_bracket(f, g, X) == sp.Matrix([-1, 0, 0])
    assert ad(f, g, X, 0) == g
    assert ad(f, g, X, 2) == lie_bracket(f, lie_bracket(f, g, X), X)


def test_bracket_is_antisymmetric_and_satisfies_jacobi():
    f = sp.Matrix([x2 * x3, sp.sin(x1), x1 ** 2])
    g = sp.Matrix([sp.cos(x3), x1, 1])
    h = sp.Matrix([x1 * x2, 0, sp.exp(x2)])
    assert sp.simplify(lie_bracket(f, g, X) + lie_bracket(g, f, X)) == sp.zeros(3, 1)
    jacobi = (lie_bracket(f, lie_bracket(g, h, X), X) + lie_bracket(g, lie_bracket(h, f, X), X)
              + lie_bracket(h, lie_bracket(f, g, X), X))
    assert sp.simplify(jacobi) == sp.zeros(3, 1)


def test_covector_derivative_commutes_with_d():
    # L_f dh = d(L_f h) (Isidori, Nonlinear Control Systems, Prop. 1.2.x; common practice)
    f = sp.Matrix([x2, -x1 + x3 ** 2, sp.sin(x2)])
    h = x1 * sp.cos(x3) + x2 ** 2
    dh = sp.Matrix([[sp.diff(h, v) for v in X]])
    lhs = lie_derivative_covector(dh, f, X)
    rhs = sp.Matrix([[sp.diff(lie_derivative(h, f, X), v) for v in X]])
    assert sp.simplify(lhs - rhs) == sp.zeros(1, 3)


def test_leibniz_identity_for_brackets():
    # L_[f,g] h = L_f L_g h - L_g L_f h (common practice)
    f = sp.Matrix([x2, x1 * x3, 1])
    g = sp.Matrix([sp.sin(x3), 0, x1])
    h = x1 * x2 + x3 ** 3
    lhs = lie_derivative(h, lie_bracket(f, g, X), X)
    rhs = lie_derivative(lie_derivative(h, g, X), f, X) - lie_derivative(lie_derivative(h, f, X), g, X)
    assert sp.expand(lhs - rhs) == 0


def _numeric_field(expr_matrix):
    fn = sp.lambdify([X], expr_matrix, "numpy")
    return lambda p: np.asarray(fn(p), dtype=float).reshape(-1)


def _jacobian_fd(field, p, eps=1e-6):
    cols = []
    for i in range(len(p)):
        step = np.zeros(len(p))
        step[i] = eps
        cols.append((field(p + step) - field(p - step)) / (2 * eps))
    return np.column_stack(cols)


@pytest.mark.parametrize("seed", range(5))
def test_brackets_and_lie_derivatives_match_finite_differences(seed):
    """Independent check: numeric fields differentiated by central differences."""
    f = sp.Matrix([x2 * sp.cos(x3), -sp.sin(x1) + x3 ** 2, x1 * x2 - sp.exp(-x3)])
    g = sp.Matrix([1 + x2 ** 2, sp.tanh(x1), sp.cos(x1 * x3)])
    h = sp.atan2(x2, 2 + x1) + x3 * x1
    p = np.random.default_rng(seed).uniform(-1, 1, 3)
    f_num, g_num = _numeric_field(f), _numeric_field(g)
    expected = _jacobian_fd(g_num, p) @ f_num(p) - _jacobian_fd(f_num, p) @ g_num(p)
    got = _numeric_field(lie_bracket(f, g, X))(p)
    np.testing.assert_allclose(got, expected, rtol=1e-6, atol=1e-8)
    h_num = sp.lambdify([X], h, "numpy")
    eps = 1e-6
    expected_lf = (h_num(p + eps * f_num(p)) - h_num(p - eps * f_num(p))) / (2 * eps)
    assert float(sp.lambdify([X], lie_derivative(h, f, X))(p)) == pytest.approx(expected_lf, rel=1e-6)
    # second order: ad_f^2 g from the numeric bracket field
    bracket_num = _numeric_field(lie_bracket(f, g, X))
    expected2 = _jacobian_fd(bracket_num, p) @ f_num(p) - _jacobian_fd(f_num, p) @ bracket_num(p)
    np.testing.assert_allclose(_numeric_field(ad(f, g, X, 2))(p), expected2, rtol=1e-5, atol=1e-7)


def test_distribution_generator_order():
    f = sp.Matrix([x2, x3, 0])
    G = sp.Matrix([[0, 1], [0, 0], [1, 0]])
    cols = distribution(f, G, X, 1)
    assert cols[:2] == [G[:, 0], G[:, 1]]
    assert cols[2] == lie_bracket(f, G[:, 0], X)
    assert len(cols) == 4


def test_identically_zero_decides_trig_identities_and_parameters():
    ctx = _ctx()
    assert is_identically_zero(sp.sin(x1) ** 2 + sp.cos(x1) ** 2 - 1, ctx).value is True
    assert is_identically_zero(sp.sin(2 * x1) - 2 * sp.sin(x1) * sp.cos(x1), ctx).value is True
    assert is_identically_zero(sp.sin(x1) - x1, ctx).value is False
    a = sp.Symbol("a", real=True)
    with_param = NumericContext.around(X, {a: sp.Integer(0)}, [0, 0, 0])
    assert is_identically_zero(a * x1, with_param).value is True      # a = 0 nominally
    assert is_identically_zero(a * x1, _ctx(constants={a: sp.Integer(2)})).value is False


def test_rank_at_a_point_with_stated_tolerance():
    ctx = _ctx()
    M = sp.Matrix([[1, 0], [0, sp.sin(x2)]])
    assert rank_at(M, ctx, [0, 0, 0]) == 1
    assert rank_at(M, ctx, [0, 0.5, 0]) == 2
    assert rank_at(M, ctx, [0, 1e-12, 0]) == 1                  # below 1e-9 relative
    assert rank_at(sp.Matrix([[1 / x1]]), ctx, [0, 0, 0]) is None
    np.testing.assert_allclose(evaluate(M, ctx, [0, 0.5, 0]), [[1, 0], [0, np.sin(0.5)]])


def test_generic_rank_symbolic_and_numeric_agree():
    ctx = _ctx()
    M = sp.Matrix([[sp.sin(x1), sp.cos(x1)], [sp.cos(x1), -sp.sin(x1)], [x2, x3]])
    assert generic_rank(M, ctx).rank == 2
    dependent = sp.Matrix([[sp.sin(x1), 2 * sp.sin(x1)], [x2, 2 * x2]])
    result = generic_rank(dependent, ctx)
    assert result.rank == 1
    big = sp.Matrix(3, 3, lambda i, j: sp.expand((x1 + i + 1) ** (12 + j) * sp.cos(x2 + j)))
    assert generic_rank(big, ctx).method.startswith("numeric")
    assert generic_rank(big, ctx).rank == 3


def test_involutivity_of_classic_distributions():
    ctx = _ctx()
    # span{d/dx1, d/dx2} is involutive
    assert involutivity([sp.Matrix([1, 0, 0]), sp.Matrix([0, 1, 0])], X, ctx).involutive is True
    # the Heisenberg (contact) pair is not: [X1, X2] = d/dx3 leaves the plane
    X1, X2 = sp.Matrix([1, 0, -x2 / 2]), sp.Matrix([0, 1, x1 / 2])
    result = involutivity([X1, X2], X, ctx)
    assert result.involutive is False and result.witness == (0, 1)
    # a rank-2 distribution whose generators do not commute but close: rotations about x3
    R = sp.Matrix([-x2, x1, 0])
    radial = sp.Matrix([x1, x2, 0])
    assert involutivity([R, radial], X, ctx).involutive is True


def test_numeric_rank_ignores_the_scale_of_each_column():
    # iterated brackets differ by many orders of magnitude; both directions are real
    assert numeric_rank(np.diag([1e-5, 1e6])) == 2
    assert numeric_rank(np.array([[1e-5, 2e-5], [1e6, 2e6]]).T) == 1
    assert numeric_rank(np.array([[1.0, 1e-13], [0.0, 1e-13]])) == 1    # second column is below atol


def test_sampled_involutivity_matches_the_symbolic_decision():
    ctx = _ctx()
    # large generators force the sampled path; the contact pair stays non-involutive
    pad = sp.expand((x1 + x2 + x3 + 2) ** 5)
    X1 = sp.Matrix([pad, 0, -x2 * pad / 2])
    X2 = sp.Matrix([0, pad, x1 * pad / 2])
    result = involutivity([X1, X2], X, ctx)
    assert result.method.startswith("numeric") and result.involutive is False
    flat = involutivity([sp.Matrix([pad, 0, 0]), sp.Matrix([0, pad, 0])], X, ctx)
    assert flat.method.startswith("numeric") and flat.involutive is True


def test_large_matrices_get_a_numeric_generic_rank_however_simple_their_entries():
    from linz_ros.geometry import SYMBOLIC_RANK_MAX_ENTRIES, fits_symbolic_budget
    side = int(SYMBOLIC_RANK_MAX_ENTRIES ** 0.5) + 1
    x = sp.symbols(f"x0:{side}")
    shift = sp.Matrix(side, side, lambda i, j: 1 if j == i + 1 else 0)     # a chain of integrators: ops 0
    assert not fits_symbolic_budget(shift)
    assert fits_symbolic_budget(shift[: side - 1, : side - 1])
    ctx = NumericContext.around(x, {}, [0.0] * side)
    result = generic_rank(shift, ctx)
    assert result.rank == side - 1 and result.method.startswith("numeric")


# ---- jets: numeric Lie derivatives and brackets against the symbolic ones ----------------

def _pendulum_chain_text(n):
    return pendulum_chain_text(n, envelope=False)


def _jet_plants():
    from pathlib import Path

    from linz_ros.model import load_plant, plant_from_text
    root = Path(__file__).resolve().parent.parent
    two_input = plant_from_text("plant: two\nstates: [x1, x2, x3]\ninputs: [u1, u2]\nparameters: {c: 0.7}\n"
                                "dynamics: {x1: sin(x2) + u1, x2: c*x3**2 + exp(x1)*u2, x3: x1*x2 - u1}\n"
                                "outputs: {y1: x1, y2: x3 + x2**2}\n")
    return [load_plant(root / "tests" / "plants" / "khalil_two_state.yaml"),
            plant_from_text(_pendulum_chain_text(2)), plant_from_text(_pendulum_chain_text(3)), two_input]


@pytest.mark.parametrize("index", range(4))
def test_jet_ad_fields_and_brackets_agree_with_the_symbolic_ones(index):
    from linz_ros.geometry import PlantJets, evaluate_many
    plant = _jet_plants()[index]
    ctx = NumericContext.around(plant.states, plant.nominal, [0.2] * plant.n)
    jets = PlantJets(plant.f, plant.G, plant.states, plant.nominal)
    order = plant.n - 1
    values = jets.ad_values(ctx.samples, order)                       # order+1, B, n, m
    fields = [[ad(plant.f, plant.G[:, j], plant.states, k) for j in range(plant.m)] for k in range(order + 1)]
    for k in range(order + 1):
        for j in range(plant.m):
            exact = evaluate_many(fields[k][j], ctx, ctx.samples)[:, :, 0]
            assert np.allclose(values[k, :, :, j], exact, rtol=1e-9, atol=1e-9)
    # D(ad_f^1 g_0) X along X = g_0: the bracket [g_0, ad_f g_0] from complex steps
    direction = jets.input_fields(ctx.samples)[:, :, 0][:, None, :]
    derivative = jets.ad_directional(ctx.samples, direction, 1)[1, :, 0, :, 0]
    other = jets.ad_directional(ctx.samples, values[1, :, :, 0][:, None, :], 0)[0, :, 0, :, 0]
    bracket = evaluate_many(lie_bracket(fields[0][0], fields[1][0], plant.states), ctx, ctx.samples)[:, :, 0]
    assert np.allclose(derivative - other, bracket, rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize("index", range(4))
def test_jet_lie_chains_agree_with_the_symbolic_ones(index):
    from linz_ros.geometry import PlantJets, evaluate_many
    plant = _jet_plants()[index]
    outputs = list(plant.h) if plant.h.shape[0] else [plant.states[0]]
    ctx = NumericContext.around(plant.states, plant.nominal, [0.2] * plant.n)
    jets = PlantJets(plant.f, plant.G, plant.states, plant.nominal)
    program = jets.program(outputs)
    order = plant.n
    values = jets.lie_values(program, ctx.samples, order)
    along_g = jets.input_lie_values(program, ctx.samples, order)
    gradients = jets.lie_gradients(program, ctx.samples, order)
    for i, h in enumerate(outputs):
        phi = sp.sympify(h)
        for k in range(order + 1):
            exact = evaluate_many(sp.Matrix([phi]), ctx, ctx.samples)[:, 0, 0]
            assert np.allclose(values[k, i], exact, rtol=1e-9, atol=1e-9)
            for j in range(plant.m):
                lg = evaluate_many(sp.Matrix([lie_derivative(phi, plant.G[:, j], plant.states)]), ctx,
                                   ctx.samples)[:, 0, 0]
                assert np.allclose(along_g[k, i, :, j], lg, rtol=1e-9, atol=1e-9)
            gradient = evaluate_many(sp.Matrix([phi]).jacobian(sp.Matrix(plant.states)), ctx, ctx.samples)[:, 0]
            assert np.allclose(gradients[k, i], gradient, rtol=1e-9, atol=1e-9)
            phi = lie_derivative(phi, plant.f, plant.states)


def test_jet_program_refuses_a_function_without_a_jet_rule():
    from linz_ros.geometry import JetProgram, UnsupportedExpression
    with pytest.raises(UnsupportedExpression, match="no jet rule for gamma"):
        JetProgram([sp.gamma(x1)], X, {})


def test_tree_budget_predicts_growth_from_one_order_to_the_next():
    from linz_ros.geometry import beyond_tree_budget, tree_size
    big = sum(sp.sin(x1 + i) for i in range(40))
    assert tree_size(big, 10) == 11
    assert beyond_tree_budget([big], budget=50)[0]
    assert not beyond_tree_budget([x1 * x2], budget=50)[0]
    # 5 nodes now, 3 before: two more orders at that growth give 5 (5/3)^2 = 13.9 nodes
    assert beyond_tree_budget([x1 * x2 + x3], previous=3, remaining=2, budget=12) == (True, 5)
    assert not beyond_tree_budget([x1 * x2 + x3], previous=3, remaining=0, budget=12)[0]
