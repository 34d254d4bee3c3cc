"""Closed-form small linear algebra of the control step against numpy's LAPACK routines."""

import numpy as np
import pytest

from linz_ros.runtime._linalg import damped_solve, singular_values, solve


@pytest.mark.parametrize("m", [1, 2, 3, 4])
def test_singular_values_solve_and_damped_solve_match_numpy(m):
    rng = np.random.default_rng(m)
    for _ in range(200):
        A = rng.normal(size=(m, m)) * rng.uniform(0.01, 100)
        rhs = rng.normal(size=m)
        flat = A.ravel().tolist()
        sigma = np.linalg.svd(A, compute_uv=False)
        smin, smax = singular_values(flat, m)
        assert smin == pytest.approx(sigma[-1], rel=1e-9) and smax == pytest.approx(sigma[0], rel=1e-12)
        np.testing.assert_allclose(solve(flat, rhs.tolist(), m), np.linalg.solve(A, rhs), rtol=1e-7, atol=1e-12)
        lam = rng.uniform(0.01, 1.0)
        expected = A.T @ np.linalg.solve(A @ A.T + lam ** 2 * np.eye(m), rhs)
        np.testing.assert_allclose(damped_solve(flat, rhs.tolist(), m, lam), expected, rtol=1e-9, atol=1e-12)


def test_two_by_two_smallest_singular_value_stays_accurate_when_tiny():
    # nearly rank one: sigma_min = |det| / sigma_max avoids the cancellation of the textbook formula
    A = np.array([[1.0, 2.0], [1.0, 2.0 + 1e-9]])
    smin, _ = singular_values(A.ravel().tolist(), 2)
    assert smin == pytest.approx(np.linalg.svd(A, compute_uv=False)[-1], rel=1e-6)


def test_damped_solution_is_bounded_at_an_exact_singularity():
    lam = 0.1
    u = damped_solve([1.0, 1.0, 1.0, 1.0], [1.0, -1.0], 2, lam)    # rhs orthogonal to the range
    assert np.linalg.norm(u) <= np.linalg.norm([1.0, -1.0]) / (2 * lam)
    assert np.allclose(u, 0.0)


def test_two_by_two_singular_values_survive_huge_and_tiny_entries():
    for factor in (1e155, 1e-160):
        A = np.array([[1.0, 2.0], [0.5, -3.0]]) * factor
        smin, smax = singular_values(A.ravel().tolist(), 2)
        expected = np.linalg.svd(A / factor, compute_uv=False) * factor
        assert smin == pytest.approx(expected[-1], rel=1e-12) and smax == pytest.approx(expected[0], rel=1e-12)
    assert singular_values([0.0, 0.0, 0.0, 0.0], 2) == (0.0, 0.0)


def test_two_by_two_singular_values_agree_across_the_unscaled_and_scaled_paths():
    # |A|_F^2 inside (1e-140, 1e140) is computed unscaled, outside it scaled by the largest entry
    rng = np.random.default_rng(11)
    base = rng.normal(size=(2, 2))
    for exponent in (-75, -70, -69, -10, 0, 10, 69, 70, 75):
        A = base * 10.0 ** exponent
        smin, smax = singular_values(A.ravel().tolist(), 2)
        expected = np.linalg.svd(base, compute_uv=False) * 10.0 ** exponent
        assert smin == pytest.approx(expected[-1], rel=1e-12) and smax == pytest.approx(expected[0], rel=1e-12)


@pytest.mark.parametrize("nq, m", [(1, 1), (2, 2), (3, 2), (3, 3), (6, 6), (6, 3)])
def test_task_space_terms_match_a_direct_numpy_evaluation(nq, m):
    from linz_ros.runtime._linalg import task_space_terms

    rng = np.random.default_rng(nq * 10 + m)
    for _ in range(10):
        root = rng.normal(size=(nq, nq))
        M = root @ root.T + nq * np.eye(nq)
        F, B, J, c = rng.normal(size=nq), rng.normal(size=(nq, m)), rng.normal(size=(m, nq)), rng.normal(size=m)
        A, b = task_space_terms(M.ravel().tolist(), F.tolist(), B.ravel().tolist(), J.ravel().tolist(),
                                c.tolist(), nq, m)
        np.testing.assert_allclose(np.reshape(A, (m, m)), J @ np.linalg.solve(M, B), rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(b, J @ np.linalg.solve(M, F) + c, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("nq", [1, 2, 3, 5])
def test_task_space_terms_refuse_a_mass_matrix_that_is_not_positive_definite(nq):
    from linz_ros.runtime._linalg import task_space_terms

    M = np.eye(nq)
    M[-1, -1] = -0.5
    with pytest.raises(ArithmeticError, match="not positive definite"):
        task_space_terms(M.ravel().tolist(), [0.0] * nq, np.eye(nq).ravel().tolist(), np.eye(nq).ravel().tolist(),
                         [0.0] * nq, nq, nq)


def test_three_by_three_singular_values_of_special_and_nearly_singular_matrices():
    rng = np.random.default_rng(12)
    U, _ = np.linalg.qr(rng.normal(size=(3, 3)))
    V, _ = np.linalg.qr(rng.normal(size=(3, 3)))
    cases = [np.eye(3), 2.5 * np.eye(3), np.diag([3.0, 3.0, 1.0]), np.diag([1.0, 0.0, 0.0]), np.zeros((3, 3)),
             np.outer([1.0, 2.0, 3.0], [0.5, -1.0, 2.0])]                      # rank one
    cases += [U @ np.diag([2.0, 1.0, tiny]) @ V.T for tiny in (1e-3, 1e-6, 1e-9)]  # down to sigma_min 1e-9
    cases += [U @ np.diag([1.0, 1.0, 1e-4]) @ V.T, U @ np.diag([5.0, 1e-3, 1e-3]) @ V.T]
    for A in cases:
        smin, smax = singular_values(A.ravel().tolist(), 3)
        sigma = np.linalg.svd(A, compute_uv=False)
        # near a double eigenvalue of A^T A the trigonometric cubic loses to about sqrt(eps)
        assert smax == pytest.approx(sigma[0], rel=1e-8, abs=1e-300)
        # relative to sigma_min while sigma_max / sigma_mid is moderate; absolute otherwise
        assert smin == pytest.approx(sigma[-1], rel=1e-6, abs=1e-12 * sigma[0]), (A, smin, sigma)
    assert singular_values([np.nan] + [0.0] * 8, 3)[0] != singular_values([np.nan] + [0.0] * 8, 3)[0]
    assert singular_values([np.inf] + [0.0] * 8, 3)[1] == np.inf
