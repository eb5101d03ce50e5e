"""Models: losses, gradients and closed-form smoothness against outside references."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
from scipy.optimize import check_grad
from sklearn.metrics import log_loss

from bittune.problems import _shards
from conftest import random_problem

CASES = [(m, s) for m in ("logistic_nonconvex", "least_squares") for s in (False, True)]


@pytest.mark.parametrize("model,sparse", CASES)
def test_gradient_matches_central_differences_and_check_grad(model, sparse):
    problem, _, _ = random_problem(model=model, sparse=sparse, seed=1)
    rng = np.random.default_rng(11)
    n, d = problem.n_workers, problem.dim
    for _ in range(3):
        x = rng.standard_normal(d)
        grads, _ = problem.local_grads(x[None])
        for i in range(n):
            f = lambda z, i=i: problem.local_losses(z[None])[0, i]  # noqa: E731
            g = lambda z, i=i: problem.local_grads(z[None])[0][0, i]  # noqa: E731
            # scipy.optimize.check_grad: forward differences with h = sqrt(eps),
            # error O(sqrt(eps)) ~ 1e-8 times the curvature (Nocedal & Wright ch. 8).
            assert check_grad(f, g, x) < 1e-5 * max(1.0, np.linalg.norm(grads[0, i]))
            # Central differences, h = eps^(1/3): error ~ eps^(2/3) ~ 4e-11 (docs/theory.md §3.3).
            h = np.finfo(float).eps ** (1 / 3) * (1 + np.linalg.norm(x))
            E = np.eye(d) * h
            fd = np.array([(f(x + e) - f(x - e)) / (2 * h) for e in E])
            np.testing.assert_allclose(grads[0, i], fd, rtol=1e-6, atol=1e-8)


@pytest.mark.parametrize("model,sparse", CASES)
def test_per_worker_points_equal_one_worker_at_a_time(model, sparse):
    problem, _, _ = random_problem(model=model, sparse=sparse, seed=2)
    rng = np.random.default_rng(12)
    X = rng.standard_normal((3, problem.n_workers, problem.dim))
    G, L = problem.local_grads(X, with_loss=True)
    for b in range(3):
        for i in range(problem.n_workers):
            g1, l1 = problem.local_grads(X[b, i][None], with_loss=True)
            # Same numbers through a different BLAS call shape: rounding only.
            np.testing.assert_allclose(G[b, i], g1[0, i], rtol=1e-12, atol=1e-14)
            np.testing.assert_allclose(L[b, i], l1[0, i], rtol=1e-12)


@pytest.mark.parametrize("model", ["logistic_nonconvex", "least_squares"])
def test_sparse_and_dense_storage_agree(model):
    dense, rows, targets = random_problem(model=model, sparse=True, seed=3)
    from bittune.problems import problem_from_arrays

    as_dense = problem_from_arrays(model, [r.toarray() for r in rows], targets, regularization=0.1)
    X = np.random.default_rng(13).standard_normal((4, dense.dim))
    g1, l1 = dense.local_grads(X, with_loss=True)
    g2, l2 = as_dense.local_grads(X, with_loss=True)
    np.testing.assert_allclose(g1, g2, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(l1, l2, rtol=1e-12)


def test_logistic_loss_equals_sklearn_log_loss():
    problem, rows, targets = random_problem(model="logistic_nonconvex", sparse=False, seed=4, reg=0.0)
    x = np.random.default_rng(14).standard_normal(problem.dim)
    losses = problem.local_losses(x[None])[0]
    for i, (r, t) in enumerate(zip(rows, targets)):
        p = 1.0 / (1.0 + np.exp(-(r @ x)))
        # sklearn.metrics.log_loss is the mean negative log-likelihood (reference library).
        ref = log_loss((t > 0).astype(int), p, labels=[0, 1])
        np.testing.assert_allclose(losses[i], ref, rtol=1e-10)


def test_least_squares_loss_equals_half_mean_squared_error():
    from sklearn.metrics import mean_squared_error

    problem, rows, targets = random_problem(model="least_squares", sparse=False, seed=5, reg=0.0)
    x = np.random.default_rng(15).standard_normal(problem.dim)
    losses = problem.local_losses(x[None])[0]
    for i, (r, t) in enumerate(zip(rows, targets)):
        np.testing.assert_allclose(losses[i], 0.5 * mean_squared_error(t, r @ x), rtol=1e-12)


def test_nonconvex_regulariser_value_and_gradient():
    problem, _, _ = random_problem(model="logistic_nonconvex", sparse=False, seed=6, reg=0.3)
    x = np.array([0.0, 1.0, -1.0, 2.0, 0.5, -3.0, 10.0])
    no_reg, _, _ = random_problem(model="logistic_nonconvex", sparse=False, seed=6, reg=0.0)
    diff = problem.local_losses(x[None])[0] - no_reg.local_losses(x[None])[0]
    # Closed form lam * sum x^2/(1+x^2).
    np.testing.assert_allclose(diff, 0.3 * np.sum(x**2 / (1 + x**2)), rtol=1e-12)
    gdiff = problem.local_grads(x[None])[0][0] - no_reg.local_grads(x[None])[0][0]
    np.testing.assert_allclose(gdiff, np.broadcast_to(0.3 * 2 * x / (1 + x**2) ** 2, gdiff.shape), atol=1e-14)


@pytest.mark.parametrize("sparse", [False, True])
def test_least_squares_smoothness_equals_top_singular_value(sparse):
    problem, rows, _ = random_problem(model="least_squares", sparse=sparse, seed=7, reg=0.2)
    per, pooled = problem.smoothness_bounds()
    dense_rows = [r.toarray() if sp.issparse(r) else r for r in rows]
    # Reference: numpy.linalg.svd, sigma_max(A_i)^2/m_i + lam (docs/theory.md §3.2).
    ref = [np.linalg.svd(r, compute_uv=False)[0] ** 2 / r.shape[0] + 0.2 for r in dense_rows]
    np.testing.assert_allclose(per, ref, rtol=1e-10)
    H = np.mean([r.T @ r / r.shape[0] for r in dense_rows], axis=0) + 0.2 * np.eye(problem.dim)
    np.testing.assert_allclose(pooled, np.linalg.eigvalsh(H)[-1], rtol=1e-10)


@pytest.mark.parametrize("sparse", [False, True])
def test_smoothness_without_grams_above_the_direct_limit_equals_svd(sparse):
    """Above ``GRAM_DIRECT_MAX`` features the bounds come from Lanczos on A_i^T A_i / m_i without
    forming a gram (docs/design.md, "Scale"); reference: numpy.linalg.svd of the dense rows."""
    d = _shards.GRAM_DIRECT_MAX + 44
    problem, rows, _ = random_problem(model="least_squares", sparse=sparse, seed=17, sizes=(40, 310, 75), dim=d,
                                      reg=0.2)
    per, pooled = problem.smoothness_bounds()
    dense_rows = [r.toarray() if sp.issparse(r) else r for r in rows]
    ref = [np.linalg.svd(r, compute_uv=False)[0] ** 2 / r.shape[0] + 0.2 for r in dense_rows]
    # ARPACK at tol = 0 converges to machine precision; 1e-9 leaves room for the rounding of
    # d-term sums in both references (common practice, no source).
    np.testing.assert_allclose(per, ref, rtol=1e-9)
    stacked = np.vstack([r / np.sqrt(len(rows) * r.shape[0]) for r in dense_rows])  # B^T B = mean A_i^T A_i / m_i
    np.testing.assert_allclose(pooled, np.linalg.svd(stacked, compute_uv=False)[0] ** 2 + 0.2, rtol=1e-9)


def test_logistic_bound_is_attained_at_zero():
    """docs/theory.md §3.2: the logistic Hessian bound A^T A/(4m) is attained at x = 0,
    and the regulariser's Hessian there is 2 lam I, so lambda_max(Hess f_i(0)) = L_i."""
    problem, rows, _ = random_problem(model="logistic_nonconvex", sparse=False, seed=8, reg=0.1)
    per, _ = problem.smoothness_bounds()
    d, h = problem.dim, 1e-5
    for i in range(problem.n_workers):
        # Hessian by central differences of the gradient (error ~ h^2 * third derivative).
        H = np.array([
            (problem.local_grads((h * e)[None])[0][0, i] - problem.local_grads((-h * e)[None])[0][0, i]) / (2 * h)
            for e in np.eye(d)
        ])
        np.testing.assert_allclose(np.linalg.eigvalsh((H + H.T) / 2)[-1], per[i], rtol=1e-6)
    # And the bound equals numpy.linalg.eigvalsh of the data matrix (reference library).
    ref = [np.linalg.eigvalsh(r.T @ r / r.shape[0])[-1] / 4 + 0.2 for r in rows]
    np.testing.assert_allclose(per, ref, rtol=1e-10)


def test_thread_blocks_do_not_change_results():
    rows_targets = random_problem(model="logistic_nonconvex", sparse=False, seed=9, sizes=(4, 7, 3, 9, 5))
    base = rows_targets[0]
    X = np.random.default_rng(16).standard_normal((3, base.dim))
    g_blocks, l_blocks = base.local_grads(X, with_loss=True)
    old = _shards.get_threads()
    try:
        _shards.set_threads(1)
        one, _, _ = random_problem(model="logistic_nonconvex", sparse=False, seed=9, sizes=(4, 7, 3, 9, 5))
        assert len(one.shards.blocks) == 1
        g_one, l_one = one.local_grads(X, with_loss=True)
    finally:
        _shards.set_threads(old)
    np.testing.assert_allclose(g_blocks, g_one, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(l_blocks, l_one, rtol=1e-12)
