"""Probe: gradient check and smoothness estimates against closed forms and reference libraries."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import check_grad, minimize
from scipy.stats import ortho_group

from bittune.errors import GradientCheckError
from bittune.probe import check_gradients, estimate_constants
from bittune.problems.quadratic import Quadratic
from conftest import breast_cancer_problem, random_problem

ITERS = 80  # power iterations in the closed-form tests (see _contraction)


# ------------------------------------------------------------------ helpers
class _Forward:
    """Forwards the oracle of ``problem``; subclasses change one part of it."""

    def __init__(self, problem):
        self.problem = problem
        self.calls = 0

    def __getattr__(self, name):
        return getattr(self.problem, name)

    def local_grads(self, X, *, with_loss=False):
        self.calls += 1
        return self.problem.local_grads(X, with_loss=with_loss)

    def local_losses(self, X):
        self.calls += 1
        return self.problem.local_losses(X)


class _ScaledCoordinate(_Forward):
    """Worker ``worker``'s gradient has coordinate ``coord`` scaled by 1.5: a deliberate bug."""

    def __init__(self, problem, *, worker, coord):
        super().__init__(problem)
        self.worker, self.coord = worker, coord

    def local_grads(self, X, *, with_loss=False):
        g, f = super().local_grads(X, with_loss=with_loss)
        g = g.copy()
        g[:, self.worker, self.coord] *= 1.5
        return g, f


class _NoBounds(_Forward):
    def smoothness_bounds(self):
        raise NotImplementedError


def _quadratic(seed, spectra, *, shared_basis=False):
    """H_i = Q_i diag(spectra[i]) Q_i^T, Q_i Haar-random orthogonal (scipy.stats.ortho_group)."""
    rng = np.random.default_rng(seed)
    spectra = np.asarray(spectra, dtype=float)
    n, d = spectra.shape
    Qs = [ortho_group.rvs(d, random_state=rng) for _ in range(1 if shared_basis else n)]
    Qs = Qs * n if shared_basis else Qs
    H = np.array([Q @ np.diag(s) @ Q.T for Q, s in zip(Qs, spectra)])
    return Quadratic(H, rng.standard_normal((n, d)))


def _closed_forms(H):
    """docs/theory.md §3.1 for quadratics, with numpy.linalg.eigvalsh: L_i, L, L_+, L_pm."""
    Hbar = H.mean(axis=0)
    M = np.mean(H @ H, axis=0)
    return {
        "L_workers": np.abs(np.linalg.eigvalsh(H)).max(axis=1),
        "L": np.abs(np.linalg.eigvalsh(Hbar)).max(),
        "L_plus": np.sqrt(np.linalg.eigvalsh(M)[-1]),
        "L_pm": np.sqrt(max(np.linalg.eigvalsh(M - Hbar @ Hbar)[-1], 0.0)),
    }


def _contraction(S):
    """mu_2 / mu_1 of the PSD operator S whose top eigenvalue is the squared constant.

    The probe's estimate of a constant c is sqrt(y^T S y) for a power iterate y
    (S = H_i^2, Hbar^2, mean H_i^2 or mean H_i^2 - Hbar^2), and after k oracle
    calls the relative error of c^2 is at most (mu_2/mu_1)^(k-1) / c1, c1 the
    squared overlap of the random start with the top eigenvector (the L_+ and
    L_pm chains make one S-step per two calls, but their estimate is a
    Rayleigh quotient of S, which squares the rate back). Standard power
    iteration analysis, from memory (Golub and Van Loan, "Matrix
    Computations", 7.3).
    """
    mu = np.sort(np.linalg.eigvalsh(S))[::-1]
    return mu[1] / mu[0]


def _secant_maxima(problem, points):
    """All-pairs secant ratios (docs/theory.md §3.3), computed here independently of the probe."""
    G, _ = problem.local_grads(points)
    out = {"L_workers": np.zeros(problem.n_workers), "L": 0.0, "L_plus": 0.0, "L_pm": 0.0}
    for p in range(len(points)):
        for q in range(p + 1, len(points)):
            dx = np.linalg.norm(points[p] - points[q])
            if dx <= 1e-9:
                continue
            dG = G[p] - G[q]
            per = np.linalg.norm(dG, axis=1)
            out["L_workers"] = np.maximum(out["L_workers"], per / dx)
            out["L"] = max(out["L"], np.linalg.norm(dG.mean(axis=0)) / dx)
            out["L_plus"] = max(out["L_plus"], np.sqrt(np.mean(per**2)) / dx)
            var = np.mean(per**2) - np.linalg.norm(dG.mean(axis=0)) ** 2
            out["L_pm"] = max(out["L_pm"], np.sqrt(max(var, 0.0)) / dx)
    return out


def _logistic_hessians(rows, targets, reg, x):
    """Per-worker Hessians of the logistic loss + lam sum x^2/(1+x^2) at x (docs/theory.md §3.2)."""
    out = []
    for A, b in zip(rows, targets):
        S = A * b[:, None]
        s = 1.0 / (1.0 + np.exp(-(S @ x)))
        phi2 = (2.0 - 6.0 * x**2) / (1.0 + x**2) ** 3
        out.append((S * (s * (1 - s))[:, None]).T @ S / len(b) + reg * np.diag(phi2))
    return np.array(out)


def _assert_chains(L, L_plus, L_pm, L_workers, *, rtol):
    # docs/theory.md §3.1 chains: L_- <= L_+ <= L_QM and L_+^2 - L_-^2 <= L_pm^2 <= L_+^2.
    # They hold for the exact local values at each point (Weyl's inequality, and
    # lambda_max(mean H_i^2) <= mean ||H_i||^2), hence for their maxima over points.
    L_qm = np.sqrt(np.mean(np.square(L_workers)))
    assert L <= L_plus * (1 + rtol)
    assert L_plus <= L_qm * (1 + rtol)
    assert L_plus**2 - L**2 <= L_pm**2 + rtol * L_plus**2
    assert L_pm <= L_plus * (1 + rtol)


# --------------------------------------------------------------- quadratic
def test_quadratic_oracle_against_references():
    q = _quadratic(1, [[3.0, 2.0, 1.0, 0.5], [1.0, 1.0, 4.0, 0.2], [0.1, 2.0, 2.0, 5.0]])
    rng = np.random.default_rng(21)
    X = rng.standard_normal((5, 3, 4))
    G, F = q.local_grads(X, with_loss=True)
    for b in range(5):
        for i in range(3):
            g1, f1 = q.local_grads(X[b, i][None], with_loss=True)
            # Same numbers through a different einsum: rounding only.
            np.testing.assert_allclose(G[b, i], g1[0, i], rtol=1e-12, atol=1e-14)
            np.testing.assert_allclose(F[b, i], f1[0, i], rtol=1e-12, atol=1e-14)
            f = lambda z, i=i: q.local_losses(z[None])[0, i]  # noqa: E731
            g = lambda z, i=i: q.local_grads(z[None])[0][0, i]  # noqa: E731
            # scipy.optimize.check_grad: forward differences, error ~ sqrt(eps) * ||H|| ~ 1e-7.
            assert check_grad(f, g, X[b, i]) < 1e-6 * max(1.0, np.linalg.norm(G[b, i]))
    # Minimum of f by scipy.optimize.minimize (BFGS, gtol 1e-10): agrees to ~1e-12.
    ref = minimize(q.full_loss, np.zeros(4), jac=q.full_grad, method="BFGS", options={"gtol": 1e-10})
    np.testing.assert_allclose(q.loss_lower_bound(), ref.fun, rtol=1e-9, atol=1e-12)
    per, L = q.smoothness_bounds()
    exact = _closed_forms(q.H)
    np.testing.assert_allclose(per, exact["L_workers"], rtol=1e-12)  # SVD vs eigvalsh: rounding only
    np.testing.assert_allclose(L, exact["L"], rtol=1e-12)


def test_quadratic_lower_bound_infinite_when_unbounded():
    # An indefinite mean Hessian makes f unbounded below (along the negative eigenvector).
    q = _quadratic(2, [[-2.0, 1.0, 1.0], [-1.0, 1.0, 0.5]])
    assert q.loss_lower_bound() == -np.inf
    # PSD but singular mean with b outside its range: unbounded too.
    H = np.array([np.diag([1.0, 0.0]), np.diag([2.0, 0.0])])
    assert Quadratic(H, np.array([[0.0, 1.0], [0.0, 1.0]])).loss_lower_bound() == -np.inf
    # ... and inside its range: the minimum -(1/2) bbar^2/hbar = -(1/2) 1/1.5.
    bounded = Quadratic(H, np.array([[1.0, 0.0], [1.0, 0.0]]))
    assert bounded.loss_lower_bound() == pytest.approx(-1 / 3, rel=1e-12)  # rounding only
    with pytest.raises(ValueError, match=r"H\[1\] must be symmetric"):
        Quadratic(np.array([np.eye(2), [[1.0, 2.0], [0.0, 1.0]]]))


TOP = np.array([1.0, 0.6, 0.5, 0.4, 0.3, 0.2, 0.1, 0.05])  # lambda_2/lambda_1 = 0.6 in every worker
QUADRATICS = {
    # Different bases and scales: large Hessian variance.
    "heterogeneous": dict(seed=3, spectra=[1.0 * TOP, 2.0 * TOP, 5.0 * TOP, 3.0 * TOP]),
    # Worker 0 indefinite with its largest magnitude negative (-4 vs 2.5); the others have
    # eigenvalues >= 2, so lambda_min(Hbar) >= (-4 + 3 * 2)/4 > 0 (Weyl): f is bounded.
    "one_indefinite": dict(seed=4, spectra=[[-4.0, 2.5, 1.0, -0.5, 0.3, 0.2, 0.1, 0.0],
                                            2 + 4 * TOP, 2 + 3 * TOP, 2 + 5 * TOP]),
    # Mean Hessian indefinite: f unbounded below, the probe needs an explicit lower bound.
    "indefinite_mean": dict(seed=5, spectra=[-3.0 * TOP, -2.0 * TOP[::-1], 1.0 * TOP, -4.0 * TOP]),
    # Same basis, different scales: the H_i commute.
    "commuting": dict(seed=6, spectra=[1.0 * TOP, 2.0 * TOP, 4.0 * TOP], shared_basis=True),
}


@pytest.mark.parametrize("case", sorted(QUADRATICS))
def test_quadratic_estimates_match_closed_forms(case):
    spec = QUADRATICS[case]
    q = _quadratic(spec["seed"], spec["spectra"], shared_basis=spec.get("shared_basis", False))
    exact = _closed_forms(q.H)
    Hbar = q.H.mean(axis=0)
    M = np.mean(q.H @ q.H, axis=0)
    ops = [h @ h for h in q.H] + [Hbar @ Hbar, M, M - Hbar @ Hbar]
    for S in ops:
        # Gap check: with c1 >= 1e-4 (a random start in d = 8 fails this with
        # probability ~2e-2 per point, and the max is over 15 independent
        # starts) the relative error of c^2 is <= 1e4 * rate^(ITERS-1) < 1e-4.
        assert 1e4 * _contraction(S) ** (ITERS - 1) < 1e-4, case
    # Only the indefinite mean makes f unbounded below; then any finite value below
    # f(x0) serves as the lower bound (it sets delta0 only).
    assert np.isfinite(q.loss_lower_bound()) == (case != "indefinite_mean")
    lower = None if case != "indefinite_mean" else -1e3
    c, report = estimate_constants(q, x0=np.ones(q.dim), rng=np.random.default_rng(31), power_iters=ITERS,
                                   lower_bound=lower)
    # Within 1% of the closed forms of docs/theory.md §3.1 (numpy.linalg.eigvalsh), as asked; the
    # gap check above gives 1e-4 and central differences of a quadratic are exact up to
    # rounding eps^(2/3) ~ 4e-11 relative (docs/theory.md §3.3).
    np.testing.assert_allclose(c.L_workers, exact["L_workers"], rtol=1e-2)
    for key in ("L", "L_plus", "L_pm"):
        np.testing.assert_allclose(getattr(c, key), exact[key], rtol=1e-2, err_msg=key)
    # The quadratic's smoothness_bounds are exact: the estimates sit on them.
    np.testing.assert_allclose(c.bound_L_workers, exact["L_workers"], rtol=1e-12)
    assert report.gradient_check.passed
    # The commuting case makes L_+^2 - L_-^2 = L_pm^2 an equality, so the tolerance must
    # cover estimation error: c^2 is within 1e-4 by the gap check, in fact within ~1e-10
    # (quadratics: exact differences, and the rates above are < 0.77, 0.77^79 ~ 1e-9).
    _assert_chains(c.L, c.L_plus, c.L_pm, c.L_workers, rtol=1e-6)


def test_identical_workers_have_zero_hessian_variance():
    # L_pm^2 = lambda_max(mean H_i^2 - Hbar^2) = 0 when every H_i is the same (docs/theory.md §3.1).
    H = _quadratic(7, [TOP * 2.0]).H
    q = Quadratic(np.repeat(H, 4, axis=0), np.random.default_rng(7).standard_normal((4, 8)))
    c, _ = estimate_constants(q, x0=np.zeros(8), rng=np.random.default_rng(32), power_iters=ITERS)
    # Only rounding of the differences remains: ~eps^(2/3) * L = 1e-10 (docs/theory.md §3.3).
    assert c.L_pm <= 1e-8 * c.L
    np.testing.assert_allclose([c.L, c.L_plus], [2.0, 2.0], rtol=1e-8)


def test_estimates_are_raised_to_secants():
    # Two identical workers, H = Q diag(100, 1, ..., 1) Q^T, x0 on the top eigenvector q1:
    # GD from x0 stays on the line through q1, so secants there equal 100 = L_i = L = L_+
    # exactly (H(x - y) = 100 (x - y)), while one power iteration from a random v gives
    # ||H v|| < 100 (docs/theory.md §3.3: secants are lower bounds, estimates must exceed them).
    q1 = _quadratic(16, [[100.0] + [1.0] * 7])
    H = np.repeat(q1.H, 2, axis=0)
    top = np.linalg.eigh(H[0])[1][:, -1]
    q = Quadratic(H)
    c, report = estimate_constants(q, x0=10.0 * top, rng=np.random.default_rng(39), power_iters=1)
    assert report.local["L"] < 99 and report.local["L_plus"] < 99 and np.all(report.local["L_workers"] < 99)
    assert report.raised >= 4  # L_1, L_2, L, L_+ (L_pm is 0 up to rounding either way)
    # Raised to the secant: 100 up to rounding of the GD iterates (~1e-14).
    np.testing.assert_allclose([*c.L_workers, c.L, c.L_plus], 100.0, rtol=1e-10)


def test_start_point_quantities_and_lower_bound():
    q = _quadratic(8, [2.0 * TOP, 1.0 * TOP, 3.0 * TOP])
    x0 = np.random.default_rng(22).standard_normal(8)
    c, _ = estimate_constants(q, x0=x0, rng=np.random.default_rng(33), runs=1, run_rounds=3, power_iters=5)
    G = np.einsum("nij,j->ni", q.H, x0) + q.b  # gradients of f_i = x^T H_i x / 2 + b_i^T x
    gbar = G.mean(axis=0)
    ref = minimize(q.full_loss, x0, jac=q.full_grad, method="BFGS", options={"gtol": 1e-10})
    # Delta0 = f(x0) - inf f with inf f from scipy.optimize.minimize (BFGS): ~1e-12.
    np.testing.assert_allclose(c.delta0, q.full_loss(x0) - ref.fun, rtol=1e-9)
    np.testing.assert_allclose(c.grad_sq0, gbar @ gbar, rtol=1e-12)
    np.testing.assert_allclose(c.local_grad_sq0, np.mean(np.sum(G**2, axis=1)), rtol=1e-12)
    np.testing.assert_allclose(c.heterogeneity0, np.mean(np.sum((G - gbar) ** 2, axis=1)), rtol=1e-12)
    # The theory's unbounded case is refused unless a bound is given.
    bad = _quadratic(2, [[-2.0, 1.0, 1.0], [-1.0, 1.0, 0.5]])
    with pytest.raises(ValueError, match="lower_bound"):
        estimate_constants(bad, x0=np.zeros(3), rng=np.random.default_rng(0))
    with pytest.raises(ValueError, match="lower_bound must be <= f"):
        estimate_constants(q, x0=x0, rng=np.random.default_rng(0), lower_bound=q.full_loss(x0) + 1.0)


# ---------------------------------------------------------------- logistic
def test_logistic_local_estimates_match_exact_hessians():
    problem, rows, targets = random_problem(model="logistic_nonconvex", sparse=False, seed=9)
    x0 = np.random.default_rng(23).standard_normal(problem.dim)
    _, report = estimate_constants(problem, x0=x0, rng=np.random.default_rng(34), power_iters=ITERS)
    Hs = [_logistic_hessians(rows, targets, 0.1, x) for x in report.points]
    per_point = [_closed_forms(H) for H in Hs]
    exact = {k: np.max([e[k] for e in per_point], axis=0) for k in per_point[0]}
    operators = {
        "L": lambda H: H.mean(0) @ H.mean(0),
        "L_plus": lambda H: np.mean(H @ H, 0),
        "L_pm": lambda H: np.mean(H @ H, 0) - H.mean(0) @ H.mean(0),
    }
    operators.update({i: (lambda H, i=i: H[i] @ H[i]) for i in range(problem.n_workers)})
    for key, S in operators.items():
        # Gap at the point where the maximum is attained (see _contraction): the
        # estimate there, hence the maximum, has c^2 within 1e-6 (c1 >= 1e-4).
        values = [e["L_workers"][key] if isinstance(key, int) else e[key] for e in per_point]
        assert 1e4 * _contraction(S(Hs[int(np.argmax(values))])) ** (ITERS - 1) < 1e-6, key
    # Exact local values from the closed-form Hessian (docs/theory.md §3.2) and numpy.linalg.eigvalsh;
    # the estimates are converged (gap check) and central HVPs err by ~1e-10 (docs/theory.md §3.3).
    np.testing.assert_allclose(report.local["L_workers"], exact["L_workers"], rtol=1e-4)
    for key in ("L", "L_plus", "L_pm"):
        np.testing.assert_allclose(report.local[key], exact[key], rtol=1e-4, err_msg=key)
    # Chains on the estimates: each c^2 is within 1e-6 of its exact value (gap check),
    # so 1e-5 covers the worst case where L_- and L_pm are both low by that much.
    local = report.local
    _assert_chains(local["L"], local["L_plus"], local["L_pm"], local["L_workers"], rtol=1e-5)


def test_hessian_products_split_over_calls_match_exact_hessians(monkeypatch):
    """The power iteration's shifted points go to the oracle a chunk of (stage, point) pairs at a
    time (probe._hvp; at d = 20,000 over 16 workers one whole call was 3 GB). Forced down to one
    pair per call, the sparse path still gives the closed-form Hessians' values, and the very
    numbers of one call on all points."""
    import bittune.probe as probe

    problem, rows, targets = random_problem(model="logistic_nonconvex", sparse=True, seed=12)
    x0 = np.random.default_rng(24).standard_normal(problem.dim)
    _, whole = estimate_constants(problem, x0=x0, rng=np.random.default_rng(35), power_iters=ITERS)
    monkeypatch.setattr(probe, "_MAX_ELEMENTS", 2 * problem.n_workers * problem.dim)
    _, split = estimate_constants(problem, x0=x0, rng=np.random.default_rng(35), power_iters=ITERS)
    # Six stages x 15 points = 90 pairs per iteration: 90 calls where there was one.
    assert split.oracle_calls > whole.oracle_calls + 80 * ITERS
    for key in ("L_workers", "L", "L_plus", "L_pm"):
        # Each shifted point's gradient is a row of its own in either call (CSR products do
        # not mix columns): the same numbers up to rounding of a reordered sum, 1e-12.
        np.testing.assert_allclose(split.local[key], whole.local[key], rtol=1e-12, err_msg=key)
    Hs = [_logistic_hessians([r.toarray() for r in rows], targets, 0.1, x) for x in split.points]
    exact = [_closed_forms(H) for H in Hs]
    # Closed-form Hessian (docs/theory.md §3.2) and numpy.linalg.eigvalsh, the tolerance of the
    # dense test above; no gap check here, so 1e-3 (power iteration from below: the estimate
    # may only be low, and the chains above bound how low).
    np.testing.assert_allclose(split.local["L"], max(e["L"] for e in exact), rtol=1e-3)
    np.testing.assert_allclose(split.local["L_workers"], np.max([e["L_workers"] for e in exact], axis=0),
                               rtol=1e-3)


LOGISTIC = {
    "generated_at_zero": lambda: random_problem(model="logistic_nonconvex", sparse=False, seed=10)[0],
    "generated_sparse": lambda: random_problem(model="logistic_nonconvex", sparse=True, seed=11)[0],
    "breast_cancer": breast_cancer_problem,
}


@pytest.mark.parametrize("case", sorted(LOGISTIC))
def test_logistic_estimates_between_secants_and_closed_form_bounds(case):
    problem = LOGISTIC[case]()
    d = problem.dim
    x0 = np.zeros(d) if case != "generated_sparse" else np.random.default_rng(24).standard_normal(d)
    c, report = estimate_constants(problem, x0=x0, rng=np.random.default_rng(35), power_iters=ITERS)
    per, L = problem.smoothness_bounds()
    qm = np.sqrt(np.mean(per**2))
    # Closed-form bounds of docs/theory.md §3.2 (x 1.01: estimation error is ~1e-10, the margin is generous).
    assert np.all(c.L_workers <= per * 1.01)
    assert c.L <= L * 1.01
    assert c.L_plus <= qm * 1.01 and c.L_pm <= qm * 1.01  # L_pm <= L_+ <= L_QM (docs/theory.md §3.1)
    # At least every secant ratio between probe points, recomputed here (docs/theory.md §3.3).
    sec = _secant_maxima(problem, report.points)
    assert np.all(c.L_workers >= sec["L_workers"])
    for key in ("L", "L_plus", "L_pm"):
        assert getattr(c, key) >= sec[key], key
    if not np.any(x0):
        # The bound is attained at x = 0 (docs/theory.md §3.2: s(1-s) = 1/4 and phi'' = 2 there),
        # and x0 = 0 is a probe point: the estimates reach it (power iteration converged).
        np.testing.assert_allclose(c.L_workers, per, rtol=1e-4)
        np.testing.assert_allclose(c.L, L, rtol=1e-4)
    assert report.gradient_check.passed


def test_safety_factor_scales_every_smoothness_value():
    problem = random_problem(model="logistic_nonconvex", sparse=False, seed=12)[0]
    x0 = np.zeros(problem.dim)
    c1, _ = estimate_constants(problem, x0=x0, rng=np.random.default_rng(36), power_iters=10)
    c2, _ = estimate_constants(problem, x0=x0, rng=np.random.default_rng(36), power_iters=10, safety=2.0)
    # Same seed, same points: exactly twice (one multiplication, rounding only).
    np.testing.assert_allclose(c2.L_workers, 2 * c1.L_workers, rtol=1e-15)
    for key in ("L", "L_plus", "L_pm"):
        np.testing.assert_allclose(getattr(c2, key), 2 * getattr(c1, key), rtol=1e-15)
    assert c2.delta0 == c1.delta0 and c2.safety == 2.0
    with pytest.raises(ValueError, match="safety must be"):
        estimate_constants(problem, x0=x0, rng=0, safety=0.5)
    with pytest.raises(ValueError, match="runs must be an integer >= 1, got 0"):
        estimate_constants(problem, x0=x0, rng=0, runs=0)


def test_model_without_bounds_uses_a_local_step():
    inner, rows, targets = random_problem(model="logistic_nonconvex", sparse=False, seed=13)
    problem = _NoBounds(inner)
    c, report = estimate_constants(problem, x0=np.zeros(problem.dim), rng=np.random.default_rng(37))
    assert report.step_source == "local estimate at x0"
    assert c.bound_L is None and c.bound_L_workers is None
    # 1/(2 L_local(0)), and L_local(0) = the closed-form bound (attained at 0, docs/theory.md §3.2).
    # The quick estimate (10 iterations) is a lower bound on it, so the step is at least
    # 1/(2 max_i L_i) (minus central-difference error ~1e-10); from above, the gap check
    # gives c^2 within 1e4 * rate^9 < 0.04 (c1 >= 1e-4), i.e. c within 2%.
    per, _ = inner.smoothness_bounds()
    H = _logistic_hessians(rows, targets, 0.1, np.zeros(problem.dim))
    top = int(np.argmax(per))
    assert 1e4 * _contraction(H[top] @ H[top]) ** 9 < 0.04
    assert 1 / (2 * per.max()) * (1 - 1e-8) <= report.step_size <= 1.02 / (2 * per.max())


# ------------------------------------------------------------ gradient check
def test_wrong_gradient_is_caught_and_named():
    problem = random_problem(model="logistic_nonconvex", sparse=False, seed=14)[0]
    rng = np.random.default_rng(25)
    points = rng.standard_normal((3, problem.dim))
    worker = 2
    g, _ = problem.local_grads(points[:1])
    coord = int(np.argmax(np.abs(g[0, worker])))  # a coordinate where the bug shows
    bad = _ScaledCoordinate(problem, worker=worker, coord=coord)

    good_check = check_gradients(problem, points, rng=np.random.default_rng(26))
    bad_check = check_gradients(bad, points, rng=np.random.default_rng(26))
    assert good_check.passed and good_check.max_rel_error < 1e-7
    good_check.raise_if_failed()
    assert not bad_check.passed
    assert bad_check.worst[0] == worker
    others = np.delete(bad_check.per_worker, worker)
    assert np.all(others <= bad_check.threshold) and bad_check.per_worker[worker] > 1e-2
    with pytest.raises(GradientCheckError, match=f"worker {worker} at point") as info:
        bad_check.raise_if_failed()
    assert info.value.exit_code == 3
    assert bad_check.oracle_calls == 2

    # scipy.optimize.check_grad agrees on which worker is wrong: it returns the absolute
    # ||g - g_fd|| with forward differences (error ~ sqrt(eps) L ~ 1e-7); a threshold of
    # 1e-4 ||g|| separates that from the bug (0.5 |g_coord| at the first point).
    for model, check in ((problem, good_check), (bad, bad_check)):
        for i in range(problem.n_workers):
            f = lambda z, i=i: model.local_losses(z[None])[0, i]  # noqa: E731
            gi = lambda z, i=i: model.local_grads(z[None])[0][0, i]  # noqa: E731
            wrong = check_grad(f, gi, points[0]) > 1e-4 * max(1.0, np.linalg.norm(gi(points[0])))
            assert wrong == (check.per_worker[i] > check.threshold), (i, model)


def test_gradient_check_rejects_bad_input():
    problem = random_problem(model="least_squares", sparse=False, seed=15)[0]
    with pytest.raises(ValueError, match="points must be"):
        check_gradients(problem, np.zeros((2, problem.dim + 1)), rng=0)
    with pytest.raises(ValueError, match="directions must be an integer >= 1"):
        check_gradients(problem, np.zeros((1, problem.dim)), rng=0, directions=0)


# ------------------------------------------------------------------- cost
def test_probe_cost_is_reported_and_small(cancer):
    counted = _Forward(cancer)
    c, report = estimate_constants(counted, x0=np.zeros(cancer.dim), rng=np.random.default_rng(38))
    # The report's count equals an independent count of calls through the wrapper.
    assert report.oracle_calls == counted.calls
    assert report.oracle_calls < 200  # the brief's budget for the default settings
    assert 0 < report.seconds < 30  # loose: no timed micro-assertions
    assert report.oracle_points >= report.oracle_calls
    doc = report.to_dict()
    assert doc["oracle_calls"] == report.oracle_calls and doc["points"] == report.points.shape[0]
    assert c.to_dict()["L"] == c.L
