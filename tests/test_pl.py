"""Theory under the Polyak-Lojasiewicz condition: the PL step rules and their linear-rate predictions."""

from __future__ import annotations

import math

import numpy as np
import pytest

from bittune.compressors import make_compressor
from bittune.constants import Constants
from bittune.problems import problem_from_arrays
from bittune.simulate import simulate
from bittune.theory import theory_point

LAM = 0.05


def _ridge(seed: int = 0, n: int = 4, m: int = 40, d: int = 6):
    """A ridge least-squares problem with its exact constants (numpy.linalg.eigvalsh) and minimiser."""
    rng = np.random.default_rng(seed)
    rows = [rng.standard_normal((m, d)) * np.geomspace(0.5, 2.0, d) for _ in range(n)]
    ys = [rng.standard_normal(m) for _ in range(n)]
    prob = problem_from_arrays("least_squares", rows, ys, regularization=LAM)
    H = np.array([r.T @ r / m + LAM * np.eye(d) for r in rows])
    Hbar = H.mean(axis=0)
    eig = np.linalg.eigvalsh(Hbar)
    # f is (1/2) x^T Hbar x - b^T x + c: its minimiser solves Hbar x = mean_i A_i^T y_i / m.
    b = np.mean([r.T @ y / m for r, y in zip(rows, ys)], axis=0)
    x_star = np.linalg.solve(Hbar, b)
    f_star = prob.full_loss(x_star)
    L_i = np.linalg.eigvalsh(H)[:, -1]
    L_plus = math.sqrt(np.linalg.eigvalsh(np.einsum("iab,ibc->ac", H, H) / n)[-1])
    L_pm = math.sqrt(max(0.0, np.linalg.eigvalsh(np.einsum("iab,ibc->ac", H, H) / n - Hbar @ Hbar)[-1]))
    x0 = np.zeros(d)
    g0 = prob.full_grad(x0)
    c = Constants(n_workers=n, dim=d, L=float(eig[-1]), L_workers=L_i, L_plus=L_plus, L_pm=L_pm,
                  delta0=prob.full_loss(x0) - f_star, grad_sq0=float(g0 @ g0), local_grad_sq0=float(g0 @ g0),
                  heterogeneity0=0.0, pl_mu=float(eig[0]))
    return prob, c, f_star


def test_gd_pl_prediction_bounds_the_rounds_of_gd():
    """Karimi, Nutini, Schmidt (ECML-PKDD 2016), Thm 1 (from memory): GD at 1/L under PL has
    f(x^K) - f* <= (1 - mu/L)^K (f(x^0) - f*). A strongly convex quadratic is PL with mu its
    smallest Hessian eigenvalue (same source). The predicted rounds to ||grad f||^2 <= eps must
    be at least what GD needs, and the rate is 1 - mu/L."""
    prob, c, _ = _ridge()
    eps = 1e-8 * c.grad_sq0
    t = theory_point("gd", "identity", c, target=eps)
    assert t.step_size == pytest.approx(1 / c.L, rel=1e-15)
    assert t.rate == pytest.approx(1 - c.pl_mu / c.L, rel=1e-14)
    run = simulate(prob, method="gd", compressor=make_compressor("identity", c.dim), step_size=t.step_size,
                   seeds=[0], target=eps, max_rounds=t.predicted_rounds)[0]
    assert run.reached and run.rounds <= t.predicted_rounds
    # The non-convex rule predicts far more rounds for the same target: the PL rate is what users gain.
    nonconvex = theory_point("gd", "identity", Constants(**{**c.__dict__, "pl_mu": None}), target=eps)
    assert nonconvex.rate is None and nonconvex.predicted_rounds > 10 * t.predicted_rounds


def test_marina_and_ef21_pl_steps_are_the_published_forms():
    """docs/theory.md §2.7 (MARINA under PL; Gorbunov et al. 2021, from memory) and §2.9 (EF21 Thm 2,
    Richtarik et al. 2021, from memory)."""
    _, c, _ = _ridge()
    d, n, mu = c.dim, c.n_workers, c.pl_mu
    comp = make_compressor("rand_k:2", d)
    omega, p = d / 2 - 1, 2 / d
    t = theory_point("marina", comp, c, target=1e-6)
    want = min(1 / (c.L + c.L_qm * math.sqrt(2 * (1 - p) * omega / (p * n))), p / (2 * mu))
    assert t.step_size == pytest.approx(want, rel=1e-14)
    assert t.rate == pytest.approx(1 - want * mu, rel=1e-14)
    top = make_compressor("top_k:3", d)
    a = 3 / d
    theta = 1 - math.sqrt(1 - a)
    beta = (1 - a) / theta
    t = theory_point("ef21", top, c, target=1e-6)
    want = min(1 / (c.L + c.L_qm * math.sqrt(2 * beta / theta)), theta / (2 * mu))
    assert t.step_size == pytest.approx(want, rel=1e-12)
    # A large mu makes the p/(2 mu) cap bind: the step is the cap exactly.
    big = Constants(**{**c.__dict__, "pl_mu": c.L})
    assert theory_point("marina", comp, big, target=1e-6).step_size == pytest.approx(p / (2 * c.L), rel=1e-15)
    # DIANA has no PL rule (docs/theory.md §2.3): its point is the non-convex one.
    plain = Constants(**{**c.__dict__, "pl_mu": None})
    assert theory_point("diana", comp, c, target=1e-6) == theory_point("diana", comp, plain, target=1e-6)


def test_marina_pl_rate_holds_on_average_over_seeds():
    """E[f(x^K) - f*] <= (1 - gamma mu)^K Delta0 (docs/theory.md §2.7), checked on the mean gap over
    200 seeds at K rounds; the bound is on the expectation, so the sample mean may exceed it
    by sampling noise: 5 standard errors of margin (common practice, no source)."""
    prob, c, f_star = _ridge(seed=3)
    comp = make_compressor("rand_k:2", c.dim)
    t = theory_point("marina", comp, c, target=1e-4 * c.grad_sq0)
    K = min(t.predicted_rounds, 400)
    runs = simulate(prob, method="marina", compressor=comp, step_size=t.step_size, seeds=range(200), target=0.0,
                    max_rounds=K, params={"sync_probability": t.sync_probability})
    gaps = np.array([prob.full_loss(r.x) - f_star for r in runs])
    bound = (1 - t.step_size * c.pl_mu) ** K * c.delta0
    assert gaps.mean() - 5 * gaps.std(ddof=1) / math.sqrt(len(gaps)) <= bound


def test_job_pl_mu_reaches_the_theory_and_is_checked(tmp_path):
    """assume.pl_mu flows from the job to the probe constants; mu > L is refused (exit 2)."""
    import json

    from bittune.cli import main

    rng = np.random.default_rng(5)
    X = rng.standard_normal((200, 5))
    y = X @ rng.standard_normal(5) + 0.1 * rng.standard_normal(200)
    np.savez(tmp_path / "d.npz", X=X, y=y)
    base = """data: d.npz
model: least_squares
regularization: 0.1
workers: {count: 4, split: iid, seed: 0}
target: {grad_norm_sq: 1e-6, relative: true}
budget: {max_rounds: 1000}
"""
    (tmp_path / "ok.yaml").write_text(base + "assume: {pl_mu: 0.1}\n")
    (tmp_path / "bad.yaml").write_text(base + "assume: {pl_mu: 1e6}\n")
    import contextlib
    import io

    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        assert main(["theory", str(tmp_path / "ok.yaml"), "--method", "gd", "--method", "marina", "--json"]) == 0
    rows = json.loads(buf.getvalue())["rows"]
    assert all("linear_rate" in r and 0 < r["linear_rate"] < 1 for r in rows)
    assert main(["theory", str(tmp_path / "bad.yaml")]) == 2
