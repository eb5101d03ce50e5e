"""Softmax regression, the two-layer perceptron and user models, against outside references."""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp
from scipy.optimize import check_grad
from scipy.special import logsumexp, softmax
from sklearn.metrics import log_loss, mean_squared_error

from bittune.compressors import make_compressor
from bittune.data import Dataset, partition
from bittune.errors import GradientCheckError, InputError
from bittune.probe import check_gradients, estimate_constants
from bittune.problems import (
    MLP, PluginProblem, Softmax, _shards, _stacked, build_problem, default_start, load_plugin,
    model_options, problem_from_arrays,
)
from bittune.simulate import simulate
from conftest import breast_cancer_problem

EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "custom_loss"
SIZES = (5, 9, 6, 8)  # unequal worker sizes: padding is exercised
EPS = np.finfo(np.float64).eps


# ------------------------------------------------------------------ helpers
def _rows(rng, *, sparse, dim, sizes=SIZES):
    rows = [rng.standard_normal((s, dim)) for s in sizes]
    if sparse:
        rows = [sp.csr_matrix(r * (rng.random(r.shape) < 0.5)) for r in rows]
    return rows


def softmax_problem(seed, *, sparse=False, labels=(2.0, 5.0, 7.0), dim=4, reg=0.1, sizes=SIZES):
    """Class labels that are not 0..C-1 (the mapping is exercised); every worker sees every class."""
    rng = np.random.default_rng(seed)
    rows = _rows(rng, sparse=sparse, dim=dim, sizes=sizes)
    targets = [rng.permutation(np.resize(np.asarray(labels, float), s)) for s in sizes]
    return problem_from_arrays("softmax", rows, targets, regularization=reg), rows, targets


def mlp_problem(seed, *, sparse=False, activation="tanh", loss="logistic", hidden=3, dim=4, reg=0.1, sizes=SIZES):
    rng = np.random.default_rng(seed)
    rows = _rows(rng, sparse=sparse, dim=dim, sizes=sizes)
    if loss == "logistic":
        targets = [np.where(rng.random(s) < 0.5, -1.0, 1.0) for s in sizes]
    else:
        targets = [rng.standard_normal(s) for s in sizes]
    opts = {"hidden": hidden, "activation": activation, "loss": loss}
    return problem_from_arrays("mlp", rows, targets, regularization=reg, options=opts), rows, targets


def _dense(r):
    return r.toarray() if sp.issparse(r) else r


def _preactivations(problem, rows, x):
    W1, b1, _, _ = problem.unpack(x)
    return np.concatenate([_dense(r) @ W1 + b1 for r in rows])


def _fd_hessian(problem, x, worker, h=1e-5):
    """Central differences of the gradient (error ~ h^2 x third derivative), symmetrised."""
    E = np.eye(problem.dim) * h
    G, _ = problem.local_grads(np.concatenate([x + E, x - E]))
    H = (G[: problem.dim, worker] - G[problem.dim :, worker]) / (2 * h)
    return (H + H.T) / 2


MODELS = [
    ("softmax", {}),
    ("mlp", {"activation": "tanh", "loss": "logistic"}),
    ("mlp", {"activation": "relu", "loss": "logistic"}),
    ("mlp", {"activation": "tanh", "loss": "squared"}),
]


def _make(model, opts, seed, sparse):
    if model == "softmax":
        return softmax_problem(seed, sparse=sparse)
    return mlp_problem(seed, sparse=sparse, **opts)


def _points(problem, rows, rng, shape, margin=1e-3):
    """Standard normal test points; for relu, redrawn until no pre-activation is within
    ``margin`` of its kink, so that no finite difference below straddles one (a step moves
    a pre-activation by at most h max|a_jk| ~ 1e-4 here; our choice, no source)."""
    for _ in range(100):
        X = rng.standard_normal(shape)
        if not (isinstance(problem, MLP) and problem.activation == "relu"):
            return X
        flat = X.reshape(-1, problem.dim)
        if min(np.abs(_preactivations(problem, rows, x)).min() for x in flat) > margin:
            return X
    raise AssertionError("no kink-free test points found")


# ---------------------------------------------------------------- gradients
@pytest.mark.parametrize("sparse", [False, True])
@pytest.mark.parametrize("model,opts", MODELS)
def test_gradient_matches_check_grad_and_central_differences_shared_points(model, opts, sparse):
    problem, rows, _ = _make(model, opts, 1, sparse)
    rng = np.random.default_rng(21)
    n, d = problem.n_workers, problem.dim
    X = _points(problem, rows, rng, (2, d))
    G, _ = problem.local_grads(X)
    for b, x in enumerate(X):
        h = EPS ** (1 / 3) * (1 + np.linalg.norm(x))
        E = np.eye(d) * h
        F = problem.local_losses(np.concatenate([x + E, x - E]))
        fd = (F[:d] - F[d:]).T / (2 * h)  # (n, d)
        for i in range(n):
            f = lambda z, i=i: problem.local_losses(z[None])[0, i]  # noqa: E731
            g = lambda z, i=i: problem.local_grads(z[None])[0][0, i]  # noqa: E731
            # scipy.optimize.check_grad: forward differences with h = sqrt(eps), error
            # O(sqrt(eps)) times the curvature (Nocedal & Wright ch. 8; docs/theory.md §3.3).
            assert check_grad(f, g, x) < 1e-5 * max(1.0, np.linalg.norm(G[b, i]))
            # Central differences with h = eps^(1/3): error ~ eps^(2/3) ~ 4e-11 times the
            # scale of f (docs/theory.md §3.3); 1e-6 leaves room for the third derivative.
            np.testing.assert_allclose(G[b, i], fd[i], rtol=1e-6, atol=1e-8)


@pytest.mark.parametrize("sparse", [False, True])
@pytest.mark.parametrize("model,opts", MODELS)
def test_gradient_matches_central_differences_per_worker_points(model, opts, sparse):
    """(B, n, D) input: worker i at its own point; differences move only worker i's point."""
    problem, rows, _ = _make(model, opts, 2, sparse)
    rng = np.random.default_rng(22)
    n, d = problem.n_workers, problem.dim
    X = _points(problem, rows, rng, (2, n, d))
    G, _ = problem.local_grads(X)
    for b in range(2):
        for i in range(n):
            h = EPS ** (1 / 3) * (1 + np.linalg.norm(X[b, i]))
            shifted = np.repeat(X[b][None], 2 * d, axis=0)
            shifted[:d, i] += np.eye(d) * h
            shifted[d:, i] -= np.eye(d) * h
            F = problem.local_losses(shifted)[:, i]
            # Same tolerance and reason as the shared-point test (central differences).
            np.testing.assert_allclose(G[b, i], (F[:d] - F[d:]) / (2 * h), rtol=1e-6, atol=1e-8)


# ------------------------------------------------------------- consistency
@pytest.mark.parametrize("sparse", [False, True])
@pytest.mark.parametrize("model,opts", MODELS)
def test_batch_equals_alone_and_per_worker_equals_shared(model, opts, sparse):
    problem, _, _ = _make(model, opts, 3, sparse)
    rng = np.random.default_rng(23)
    n, d = problem.n_workers, problem.dim
    X = rng.standard_normal((3, d))
    G, L = problem.local_grads(X, with_loss=True)
    for b in range(3):
        g1, l1 = problem.local_grads(X[b][None], with_loss=True)
        # Same numbers through a different BLAS call shape: rounding only.
        np.testing.assert_allclose(G[b], g1[0], rtol=1e-12, atol=1e-14)
        np.testing.assert_allclose(L[b], l1[0], rtol=1e-12)
    # Every worker at the shared point, given as (B, n, D): the same result.
    G3, L3 = problem.local_grads(np.repeat(X[:, None], n, axis=1), with_loss=True)
    np.testing.assert_allclose(G3, G, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(L3, L, rtol=1e-12)
    np.testing.assert_allclose(problem.local_losses(X), L, rtol=1e-12)
    # Per-worker points, one worker at a time.
    Xw = rng.standard_normal((2, n, d))
    Gw, Lw = problem.local_grads(Xw, with_loss=True)
    for b in range(2):
        for i in range(n):
            g1, l1 = problem.local_grads(Xw[b, i][None], with_loss=True)
            np.testing.assert_allclose(Gw[b, i], g1[0, i], rtol=1e-12, atol=1e-14)
            np.testing.assert_allclose(Lw[b, i], l1[0, i], rtol=1e-12)


@pytest.mark.parametrize("model,opts", MODELS[:2])
def test_sparse_dense_threads_and_batch_chunks_agree(model, opts, monkeypatch):
    sparse_p, rows, targets = _make(model, opts, 4, True)
    X = np.random.default_rng(24).standard_normal((5, sparse_p.dim))
    ref_g, ref_l = sparse_p.local_grads(X, with_loss=True)
    options = {} if model == "softmax" else {"hidden": 3, **opts}
    dense_p = problem_from_arrays(model, [r.toarray() for r in rows], targets, regularization=0.1, options=options)
    g, l = dense_p.local_grads(X, with_loss=True)
    # Same sums in another order (sparse vs dense products): rounding only.
    np.testing.assert_allclose(g, ref_g, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(l, ref_l, rtol=1e-12)
    old = _shards.get_threads()
    try:
        _shards.set_threads(1)
        one = problem_from_arrays(model, rows, targets, regularization=0.1, options=options)
        assert len(one.shards.blocks) == 1
        g, l = one.local_grads(X, with_loss=True)
    finally:
        _shards.set_threads(old)
    np.testing.assert_allclose(g, ref_g, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(l, ref_l, rtol=1e-12)
    # A tiny intermediate cap forces one trajectory per chunk.
    monkeypatch.setattr(_stacked, "MAX_ELEMENTS", 1)
    assert len(sparse_p._slices(5)) == 5
    g, l = sparse_p.local_grads(X, with_loss=True)
    np.testing.assert_allclose(g, ref_g, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(sparse_p.local_losses(X), ref_l, rtol=1e-12)


# ------------------------------------------------------------------ softmax
def test_softmax_loss_equals_sklearn_log_loss_and_classes_are_mapped():
    problem, rows, targets = softmax_problem(5, reg=0.0)
    np.testing.assert_array_equal(problem.classes, [2.0, 5.0, 7.0])
    x = np.random.default_rng(25).standard_normal(problem.dim)
    W = problem.weights(x)
    assert W.shape == (4, 3)
    np.testing.assert_array_equal(Softmax.flatten(W), x)
    np.testing.assert_array_equal(W[:, 1], x[4:8])  # documented order: column c is x[c*d:(c+1)*d]
    losses = problem.local_losses(x[None])[0]
    for i, (r, t) in enumerate(zip(rows, targets)):
        p = softmax(r @ W, axis=1)  # scipy.special.softmax (reference library)
        # sklearn.metrics.log_loss: mean negative log-likelihood of the true class (reference library).
        ref = log_loss(t, p, labels=[2.0, 5.0, 7.0])
        np.testing.assert_allclose(losses[i], ref, rtol=1e-10)


def test_softmax_is_stable_for_huge_margins():
    """Margins of order 1e4: exp would overflow without the row-max shift."""
    problem, rows, targets = softmax_problem(6, reg=0.0)
    x = 1e4 * np.random.default_rng(26).standard_normal(problem.dim)
    g, loss = problem.local_grads(x[None], with_loss=True)
    assert np.all(np.isfinite(g)) and np.all(np.isfinite(loss))
    W = problem.weights(x)
    for i, (r, t) in enumerate(zip(rows, targets)):
        Z = r @ W
        picked = Z[np.arange(len(t)), np.searchsorted(problem.classes, t)]
        # scipy.special.logsumexp (reference library); loss values ~1e4, rounding ~1e-12 relative.
        np.testing.assert_allclose(loss[0, i], np.mean(logsumexp(Z, axis=1) - picked), rtol=1e-10)


@pytest.mark.parametrize("sparse", [False, True])
def test_softmax_bound_dominates_finite_difference_hessian(sparse):
    problem, _, _ = softmax_problem(7, sparse=sparse, reg=0.1)
    per, pooled = problem.smoothness_bounds()
    rng = np.random.default_rng(27)
    for scale in (0.3, 1.0, 3.0):
        x = scale * rng.standard_normal(problem.dim)
        for i in range(problem.n_workers):
            eig = np.linalg.eigvalsh(_fd_hessian(problem, x, i))
            # FD Hessian error ~ h^2 = 1e-10 relative: 1e-6 is ample.
            assert eig[-1] <= per[i] * (1 + 1e-6)
            assert eig[0] >= 0.1 - 1e-6  # convex data term plus ridge lam = 0.1
        # f's Hessian is the mean of the workers'.
        H = np.mean([_fd_hessian(problem, x, i) for i in range(problem.n_workers)], axis=0)
        assert np.linalg.eigvalsh(H)[-1] <= pooled * (1 + 1e-6)


@pytest.mark.parametrize("labels", [(0.0, 1.0), (2.0, 5.0, 7.0), (1.0, 2.0, 3.0, 4.0, 5.0)])
def test_softmax_hessian_at_zero_is_gram_over_C(labels):
    """At W = 0, p is uniform and Diag(p) - pp^T = (I - 11^T/C)/C (module docstring), so
    lambda_max(Hess f_i(0)) = lambda_max(A_i^T A_i/m_i)/C + lam: the bound for C = 2."""
    problem, rows, _ = softmax_problem(8, labels=labels, reg=0.1)
    C = len(labels)
    per, _ = problem.smoothness_bounds()
    # Reference: numpy.linalg.eigvalsh of the data's Gram matrix.
    gram = np.array([np.linalg.eigvalsh(r.T @ r / r.shape[0])[-1] for r in rows])
    np.testing.assert_allclose(per, gram / 2 + 0.1, rtol=1e-10)
    x0 = np.zeros(problem.dim)
    top = np.array([np.linalg.eigvalsh(_fd_hessian(problem, x0, i))[-1] for i in range(problem.n_workers)])
    np.testing.assert_allclose(top, gram / C + 0.1, rtol=1e-6)  # FD error ~ h^2 (see _fd_hessian)
    if C == 2:
        np.testing.assert_allclose(top, per, rtol=1e-6)


def test_softmax_descends_on_digits_at_step_one_over_L():
    """scikit-learn's bundled digits (open data, 10 classes), 10 workers split by label: GD with
    the identity compressor at step 1/L satisfies the descent lemma
    f(x+) <= f(x) - ||grad f(x)||^2 / (2L) (Nesterov 2004, Lemma 1.2.3; from memory)."""
    from sklearn.datasets import load_digits

    X, y = load_digits(return_X_y=True)
    data = Dataset(X=X / 16.0, y=y.astype(np.float64), groups=None, source="sklearn digits")
    parts = partition(data, n_workers=10, split="by_label", seed=0)
    problem = build_problem(data, parts, model="softmax", regularization=1e-3)
    assert problem.n_classes == 10 and problem.dim == 64 * 10
    _, L = problem.smoothness_bounds()
    x0 = np.zeros(problem.dim)
    assert problem.full_loss(x0) == pytest.approx(np.log(10), rel=1e-12)  # uniform p at W = 0
    (traj,) = simulate(problem, method="gd", compressor=make_compressor("identity", problem.dim),
                       step_size=1.0 / L, seeds=[0], target=0.0, max_rounds=50, x0=x0, loss_every=1)
    assert traj.rounds == 50 and traj.loss.shape == (51,)
    f, gsq = traj.loss, traj.grad_norm_sq
    # Rounding of a loss near 1: 1e-12 absolute.
    assert np.all(np.diff(f) < 0)
    assert np.all(f[1:] <= f[:-1] - gsq[:-1] / (2 * L) + 1e-12)


# ---------------------------------------------------------------------- MLP
@pytest.mark.parametrize("activation", ["tanh", "relu"])
def test_mlp_loss_equals_sklearn_mlp_classifier(activation):
    """sklearn.neural_network.MLPClassifier with the same weights (reference library): its
    predict_proba is sigmoid(o), and log_loss of it is our data loss."""
    from sklearn.neural_network import MLPClassifier

    problem, rows, targets = mlp_problem(9, activation=activation, hidden=3, reg=0.0)
    x = np.random.default_rng(29).standard_normal(problem.dim)
    W1, b1, w2, b2 = problem.unpack(x)
    np.testing.assert_array_equal(MLP.pack(W1, b1, w2, b2), x)
    np.testing.assert_array_equal(W1[:, 1], x[4:8])  # documented order: hidden unit k is x[k*d:(k+1)*d]
    losses = problem.local_losses(x[None])[0]
    for i, (r, t) in enumerate(zip(rows, targets)):
        ref = MLPClassifier(hidden_layer_sizes=(3,), activation=activation)
        ref.partial_fit(r, (t > 0).astype(int), classes=[0, 1])  # builds the layers; weights replaced below
        ref.coefs_, ref.intercepts_ = [W1.copy(), w2[:, None].copy()], [b1.copy(), np.array([b2])]
        np.testing.assert_allclose(losses[i], log_loss((t > 0).astype(int), ref.predict_proba(r)[:, 1]),
                                   rtol=1e-10)


def test_mlp_squared_loss_equals_half_mse_of_sklearn_regressor():
    from sklearn.neural_network import MLPRegressor

    problem, rows, targets = mlp_problem(10, loss="squared", hidden=3, reg=0.0)
    x = np.random.default_rng(30).standard_normal(problem.dim)
    W1, b1, w2, b2 = problem.unpack(x)
    losses = problem.local_losses(x[None])[0]
    for i, (r, t) in enumerate(zip(rows, targets)):
        ref = MLPRegressor(hidden_layer_sizes=(3,), activation="tanh")
        ref.partial_fit(r, t)
        ref.coefs_, ref.intercepts_ = [W1.copy(), w2[:, None].copy()], [b1.copy(), np.array([b2])]
        # sklearn.neural_network.MLPRegressor.predict and sklearn.metrics.mean_squared_error.
        np.testing.assert_allclose(losses[i], 0.5 * mean_squared_error(t, ref.predict(r)), rtol=1e-10)


def test_mlp_zero_is_a_stuck_start_that_ends_at_a_saddle():
    """mlp.py docstring: from x = 0 only b2 moves; GD ends at the best constant predictor,
    where the Hessian's smallest eigenvalue is lam - ||v||, v = sum_j w_j r_j (a_j, 1)."""
    lam = 1e-3
    problem, rows, targets = mlp_problem(11, loss="squared", hidden=3, reg=lam)
    d, h, n = problem.n_features, problem.hidden, problem.n_workers
    x0 = np.zeros(problem.dim)
    g = problem.full_grad(x0)
    assert np.all(g[:-1] == 0.0) and g[-1] != 0.0  # only the output bias moves
    # GD keeps W1 = 0, b1 = 0, w2 = 0 exactly: every hidden unit stays identical.
    (traj,) = simulate(problem, method="gd", compressor=make_compressor("identity", problem.dim),
                       step_size=0.5, seeds=[0], target=0.0, max_rounds=20, x0=x0)
    assert np.all(traj.x[:-1] == 0.0) and traj.x[-1] != 0.0
    # The limit in closed form: f(b2) = sum_j w_j (b2 - y_j)^2/2 + lam b2^2/2, weights
    # w_j = 1/(n m_i) summing to 1, so b2* = sum_j w_j y_j / (1 + lam).
    w = np.concatenate([np.full(len(t), 1.0 / (n * len(t))) for t in targets])
    y, A = np.concatenate(targets), np.concatenate(rows)
    b2 = w @ y / (1 + lam)
    star = np.zeros(problem.dim)
    star[-1] = b2
    np.testing.assert_allclose(problem.full_grad(star), 0.0, atol=1e-15)  # stationary: rounding only
    r = b2 - y
    v = np.concatenate([(w * r) @ A, [w @ r]])
    H = np.mean([_fd_hessian(problem, star, i) for i in range(n)], axis=0)
    eig = np.linalg.eigvalsh(H)
    assert lam - np.linalg.norm(v) < -0.1  # a clear saddle for this data
    # FD Hessian error ~ h^2 (see _fd_hessian): 1e-7 absolute.
    np.testing.assert_allclose(eig[0], lam - np.linalg.norm(v), atol=1e-7)
    assert eig[-1] > 0.5  # d^2 f / d b2^2 = 1 + lam
    # The default start breaks the symmetry: W1's gradient is no longer zero.
    xs = problem.default_start(0)
    assert np.linalg.norm(problem.full_grad(xs)[: h * d]) > 0


def test_default_start_is_seeded_and_follows_its_init_rules():
    d, h = 30, 16
    dim = h * (d + 2) + 1
    a, b, c = default_start(dim, 3), default_start(dim, 3), default_start(dim, 4)
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c) and a.shape == (dim,)
    W1 = a[: h * d].reshape(h, d)
    # Glorot uniform limit sqrt(6/(fan_in + fan_out)) (Glorot & Bengio 2010; from memory).
    assert np.abs(W1).max() <= np.sqrt(6 / (d + h))
    assert np.all(a[h * d : h * d + h] == 0) and a[-1] == 0  # zero biases
    assert len({tuple(row) for row in W1}) == h  # distinct hidden units
    relu = default_start(dim, 3, activation="relu")
    # He normal, std sqrt(2/fan_in) (He et al. 2015; from memory): the sample std of 480 draws
    # is within 20% of it with probability > 1 - 1e-5 (chi-square with 479 degrees of freedom).
    assert abs(relu[: h * d].std() / np.sqrt(2 / d) - 1) < 0.2
    with pytest.raises(ValueError, match="dim must be hidden"):
        default_start(dim + 1, 0)


def test_mlp_has_no_closed_form_bound_and_rejects_non_pm1_labels():
    problem, rows, targets = mlp_problem(12)
    with pytest.raises(NotImplementedError):
        problem.smoothness_bounds()
    with pytest.raises(ValueError, match="-1/\\+1"):
        problem_from_arrays("mlp", rows, [np.abs(t) * 2 for t in targets], regularization=0.0)


# ------------------------------------------------------------------- probe
def test_probe_on_softmax_stays_under_the_bound_and_above_the_secants():
    problem, _, _ = softmax_problem(13, reg=0.05, sizes=(20, 30, 25))
    const, report = estimate_constants(problem, x0=np.zeros(problem.dim), rng=np.random.default_rng(33),
                                       runs=2, run_rounds=10, points_per_run=3, power_iters=30)
    per, pooled = problem.smoothness_bounds()
    assert report.step_source == "closed-form bound" and report.gradient_check.passed
    for key, bound in (("L", pooled), ("L_workers", per)):
        est = np.atleast_1d(getattr(const, key))
        assert np.all(np.isfinite(est)) and np.all(est >= np.atleast_1d(report.secant[key]))
        # Local estimates under a global bound; FD Hessian-vector products err ~1e-10 relative.
        assert np.all(est <= np.atleast_1d(bound) * (1 + 1e-6))
    for key in ("L_plus", "L_pm"):
        assert np.isfinite(getattr(const, key)) and getattr(const, key) >= report.secant[key]


def test_probe_on_mlp_without_bounds_gives_finite_constants_above_the_secants():
    problem = breast_cancer_problem(4, model="mlp", reg=1e-3)  # scikit-learn's bundled data
    x0 = problem.default_start(0)
    const, report = estimate_constants(problem, x0=x0, rng=np.random.default_rng(34),
                                       runs=2, run_rounds=10, points_per_run=3, power_iters=20)
    assert report.step_source == "local estimate at x0" and report.gradient_check.passed
    assert const.bound_L is None
    for key in ("L", "L_plus", "L_pm", "L_workers"):
        est = np.atleast_1d(getattr(const, key))
        assert np.all(np.isfinite(est)) and np.all(est > 0)
        assert np.all(est >= np.atleast_1d(report.secant[key]))


# ---------------------------------------------------------------- building
def test_build_problem_labels_and_options():
    rng = np.random.default_rng(35)
    X = rng.standard_normal((40, 3))
    parts = [np.arange(0, 20), np.arange(20, 40)]
    data = Dataset(X=X, y=rng.integers(0, 2, 40).astype(float), groups=None, source="mem")
    p = build_problem(data, parts, model="mlp", regularization=0.0, options={"hidden": 2})
    assert isinstance(p, MLP) and p.dim == 2 * (3 + 2) + 1
    assert set(np.unique(np.concatenate([b.y[b.mask] for b in p.shards.blocks]))) == {-1.0, 1.0}
    multi = Dataset(X=X, y=rng.integers(0, 4, 40).astype(float), groups=None, source="mem")
    with pytest.raises(InputError, match="not binary"):
        build_problem(multi, parts, model="mlp", regularization=0.0)
    reg = build_problem(Dataset(X=X, y=rng.standard_normal(40), groups=None, source="mem"), parts,
                        model="mlp", regularization=0.0, options={"loss": "squared"})
    assert reg.loss == "squared"
    s = build_problem(multi, parts, model="softmax", regularization=0.0)
    assert s.n_classes == 4 and s.dim == 12
    with pytest.raises(InputError, match="integer class labels"):
        build_problem(Dataset(X=X, y=rng.standard_normal(40), groups=None, source="mem"), parts,
                      model="softmax", regularization=0.0)
    with pytest.raises(InputError, match="at least 2 distinct"):
        build_problem(Dataset(X=X, y=np.ones(40), groups=None, source="mem"), parts,
                      model="softmax", regularization=0.0)
    with pytest.raises(InputError) as err:
        model_options("mlp", {"hidden": 0, "activation": "sigmoid", "width": 3})
    text = str(err.value)
    assert "model.hidden" in text and "model.activation" in text and "model.width" in text


# ------------------------------------------------------------------ plugins
BROKEN = '''
import numpy as np

def make(X, y):
    def loss_and_grad(w):
        r = X @ w - y
        g = X.T @ r / len(y)
        g[0] *= 1.1  # deliberately wrong
        return 0.5 * float(r @ r) / len(y), g
    return loss_and_grad
'''


def _cancer_split(n=3):
    from sklearn.datasets import load_breast_cancer

    X, y = load_breast_cancer(return_X_y=True)
    X = (X - X.mean(axis=0)) / X.std(axis=0)
    parts = np.array_split(np.arange(len(y)), n)
    return Dataset(X=X, y=y.astype(float), groups=None, source="cancer"), parts


def test_plugin_is_refused_without_allow_code_and_nothing_is_imported(tmp_path):
    marker = tmp_path / "imported"
    (tmp_path / "side_effect.py").write_text(f"open({str(marker)!r}, 'w').close()\ndef make(X, y):\n    pass\n")
    with pytest.raises(InputError, match="model.plugin: .*--allow-code"):
        load_plugin("side_effect.py:make", allow_code=False, base_dir=tmp_path)
    data, parts = _cancer_split()
    with pytest.raises(InputError, match="--allow-code"):
        build_problem(data, parts, model="plugin", regularization=0.0,
                      options={"plugin": "side_effect.py:make"}, base_dir=tmp_path)
    assert not marker.exists()
    load_plugin("side_effect.py:make", allow_code=True, base_dir=tmp_path)
    assert marker.exists()  # the same call with permission does run it


def test_example_plugin_passes_the_gradient_check():
    data, parts = _cancer_split()
    problem = build_problem(data, parts, model="plugin", regularization=0.01,
                            options={"plugin": "huber_logistic.py:make_worker"}, allow_code=True, base_dir=EXAMPLE)
    assert isinstance(problem, PluginProblem) and problem.dim == 30 and problem.n_workers == 3
    rng = np.random.default_rng(36)
    check = check_gradients(problem, rng.standard_normal((4, problem.dim)) * 0.3, rng=rng)
    assert check.passed, check.max_rel_error
    # Per-worker points agree with one worker at a time (the loop is per worker).
    X = rng.standard_normal((2, 3, problem.dim))
    G, L = problem.local_grads(X, with_loss=True)
    g1, l1 = problem.local_grads(X[1, 2][None], with_loss=True)
    np.testing.assert_array_equal(G[1, 2], g1[0, 2])
    np.testing.assert_array_equal(L[1, 2], l1[0, 2])
    np.testing.assert_allclose(problem.local_losses(X), L, rtol=1e-14)
    # Bounds from the models' attributes: smoothness + lam per worker, their mean for f.
    per, pooled = problem.smoothness_bounds()
    grams = [np.linalg.eigvalsh(data.X[p].T @ data.X[p] / len(p))[-1] for p in parts]
    np.testing.assert_allclose(per, np.array(grams) / 0.5 + 0.01, rtol=1e-10)  # delta = 0.5
    assert pooled == pytest.approx(per.mean(), rel=1e-14) and problem.loss_lower_bound() == 0.0


def test_example_plugin_loss_has_its_closed_form_values():
    mod = load_plugin("huber_logistic.py:HuberHinge", allow_code=True, base_dir=EXAMPLE)
    margins = np.array([2.0, 1.0, 0.75, 0.5, -1.0])
    model = mod(np.diag(margins), np.ones(5), delta=0.5)  # row j of X = margin_j e_j, w = 1
    # phi by hand (file docstring): 0, 0, 0.25^2/1, 0.5 - 0.25, 2 - 0.25.
    expected = np.array([0.0, 0.0, 0.0625, 0.25, 1.75])
    value, grad = model.loss_and_grad(np.ones(5))
    assert value == pytest.approx(expected.mean(), rel=1e-14)
    # phi'(u) a_j / m with a_j = margin_j e_j: slopes 0, 0, -0.5, -1, -1.
    np.testing.assert_allclose(grad, np.array([0, 0, -0.5, -1, -1]) * margins / 5, rtol=1e-14)


def test_broken_plugin_fails_the_gradient_check(tmp_path, monkeypatch):
    (tmp_path / "broken_ls.py").write_text(BROKEN)
    data, parts = _cancer_split()
    problem = build_problem(data, parts, model="plugin", regularization=0.0,
                            options={"plugin": "broken_ls.py:make"}, allow_code=True, base_dir=tmp_path)
    rng = np.random.default_rng(37)
    check = check_gradients(problem, rng.standard_normal((3, problem.dim)), rng=rng)
    # A 10% error in one of 30 coordinates: far above the 1e-5 threshold.
    assert not check.passed and check.max_rel_error > 1e-3
    with pytest.raises(GradientCheckError):
        check.raise_if_failed()
    # The same module imported by name (module:function form) behaves the same.
    monkeypatch.syspath_prepend(str(tmp_path))
    factory = load_plugin("broken_ls:make", allow_code=True)
    by_name = PluginProblem(factory, [data.X[p] for p in parts], [data.y[p] for p in parts])
    x = rng.standard_normal(problem.dim)
    np.testing.assert_array_equal(by_name.local_grads(x[None])[0], problem.local_grads(x[None])[0])
    sys.modules.pop("broken_ls", None)


@pytest.mark.parametrize("source,spec,message", [
    (None, "no_colon_here", "must be 'module:function'"),
    (None, "mod:not an identifier", "must be 'module:function'"),
    (None, "bittune_no_such_module_xyz:f", "cannot import 'bittune_no_such_module_xyz': ModuleNotFoundError"),
    ("def f(:\n", "bad.py:f", "cannot import 'bad.py': SyntaxError"),
    ("raise RuntimeError('boom')\n", "bad.py:f", "RuntimeError: boom"),
    ("x = 1\n", "bad.py:f", "has no attribute 'f'"),
    ("f = 3\n", "bad.py:f", "must name a callable factory"),
    (None, "missing.py:f", "FileNotFoundError"),
])
def test_plugin_load_errors_name_the_key(tmp_path, source, spec, message):
    if source is not None:
        (tmp_path / "bad.py").write_text(source)
    with pytest.raises(InputError, match="model.plugin") as err:
        load_plugin(spec, allow_code=True, base_dir=tmp_path)
    assert message in str(err.value)


@pytest.mark.parametrize("body,message", [
    ("raise ValueError('bad data')", "failed on worker 0's data: ValueError: bad data"),
    ("return 3", "must return a callable"),
    ("return lambda w: (0.0, np.zeros(2))", "gradient has shape (2,)"),
    ("return lambda w: 1.0", "raised on worker 0"),
])
def test_plugin_model_errors_name_the_key(tmp_path, body, message):
    (tmp_path / "odd.py").write_text(f"import numpy as np\n\ndef make(X, y):\n    {body}\n")
    factory = load_plugin("odd.py:make", allow_code=True, base_dir=tmp_path)
    X = np.random.default_rng(38).standard_normal((6, 3))
    with pytest.raises(InputError, match="model.plugin") as err:
        PluginProblem(factory, [X[:3], X[3:]], [np.ones(3), np.ones(3)]).local_grads(np.zeros((1, 3)))
    assert message in str(err.value)


def test_model_options_defaults_and_plugin_spec_checked_without_import():
    # Defaults are the documented ones; None counts as not given.
    assert model_options("mlp", {"hidden": None, "plugin": None}) == {"hidden": 16, "activation": "tanh",
                                                                       "loss": "logistic"}
    assert model_options("softmax", None) == {}
    with pytest.raises(InputError, match="model.plugin: required"):
        model_options("plugin", {})
    with pytest.raises(InputError, match="model.plugin: must be 'module:function'"):
        model_options("plugin", {"plugin": "no-colon"})
    assert model_options("plugin", {"plugin": "bittune_never_imported_xyz:f"})["plugin"].endswith(":f")
    assert "bittune_never_imported_xyz" not in sys.modules
