"""Stochastic gradients for every method: the job's ``minibatch`` (docs/theory.md §2.12,
docs/design.md "Stochastic gradients")."""

from __future__ import annotations

import json

import numpy as np
import pytest
import yaml
from conftest import tune_cli_in
from scipy.stats import norm

from bittune._random import trajectory_keys
from bittune.compressors import make_compressor
from bittune.methods import make_method
from bittune.methods._minibatch import minibatch_weights
from bittune.noise import row_spread
from bittune.problems import problem_from_arrays
from bittune.simulate import simulate

LAM = 0.1


def _ridge(seed: int, *, sizes=(7, 5, 9), d: int = 4, same_hessian: bool = False):
    """Least squares with ridge, f_i = (1/(2 m_i)) ||A_i x - y_i||^2 + (lam/2)||x||^2. With
    ``same_hessian`` every row of worker i is +-v_i, so every row has the Hessian v_i v_i^T + lam I
    and the per-row gradients differ by a constant only (the noise does not depend on x)."""
    rng = np.random.default_rng(seed)
    rows, ys = [], []
    for m in sizes:
        if same_hessian:
            v = rng.standard_normal(d)
            rows.append(np.where(rng.random(m) < 0.5, -1.0, 1.0)[:, None] * v[None, :])
        else:
            rows.append(rng.standard_normal((m, d)))
        ys.append(rng.standard_normal(m))
    return problem_from_arrays("least_squares", rows, ys, regularization=LAM), rows, ys


def _row_grads(rows, ys, x):
    """Per-row gradients a_j (a_j.x - y_j) + lam x with numpy (the reference), one array per worker."""
    return [A * (A @ x - y)[:, None] + LAM * x[None, :] for A, y in zip(rows, ys)]


def test_minibatch_estimate_is_unbiased_with_the_with_replacement_variance():
    """The engine's estimate weighted_grads(x, minibatch_weights(...)) over S independent trajectory
    keys: its mean is grad f_i(x) (numpy's mean of the per-row gradients) and its mean squared error
    is (1/b)(1/m_i) sum_j ||g_ij - g_i||^2, the variance of a with-replacement sample mean (e.g.
    Cochran, Sampling Techniques, 1977, sec. 2.6, from memory). z-tests, Bonferroni over the
    n d coordinates and n workers: family false-alarm rate 1e-3 for each of the two tests."""
    prob, rows, ys = _ridge(11)
    x = np.random.default_rng(1).standard_normal(4)
    S, b, n, d = 4000, 3, 3, 4
    keys = trajectory_keys(np.arange(S))
    W = minibatch_weights(keys, 5, prob.worker_sizes.astype(float), np.full(S, float(b)), prob.shards.m_max)
    est = prob.weighted_grads(np.broadcast_to(x, (S, d)), W)  # (S, n, d)
    per_row = _row_grads(rows, ys, x)
    g = np.array([r.mean(axis=0) for r in per_row])
    var_coord = np.array([((r - r.mean(axis=0)) ** 2).mean(axis=0) for r in per_row]) / b  # (n, d)
    z = (est.mean(axis=0) - g) / np.sqrt(var_coord / S)
    assert np.max(np.abs(z)) < norm.ppf(1 - 1e-3 / (2 * n * d)), z
    err = np.einsum("snd,snd->sn", est - g, est - g)  # squared error per draw and worker
    want = var_coord.sum(axis=1)  # (1/b)(1/m_i) sum_j ||g_ij - g_i||^2
    z2 = (err.mean(axis=0) - want) / (err.std(axis=0, ddof=1) / np.sqrt(S))
    assert np.max(np.abs(z2)) < norm.ppf(1 - 1e-3 / (2 * n)), z2
    # The probe's sigma_i^2 (noise.row_spread, exact: every row at most EXACT_ROWS) is the same closed
    # form to rounding (float64 sums of a few terms: 1e-10 relative).
    np.testing.assert_allclose(row_spread(prob, x[None, :])[0] / b, want, rtol=1e-10)


def test_sampled_row_spread_is_unbiased():
    """With more rows than it evaluates, row_spread draws rows with replacement: over 40 seeds its mean
    matches the numpy closed form within 4 standard errors (false alarm about 6e-5, normal tail)."""
    prob, rows, ys = _ridge(12, sizes=(40, 30, 50))
    x = np.random.default_rng(2).standard_normal(4)
    want = np.array([((r - r.mean(axis=0)) ** 2).sum(axis=1).mean() for r in _row_grads(rows, ys, x)])
    got = np.array([row_spread(prob, x[None, :], rows=16, seed=s)[0] for s in range(40)])
    se = got.std(axis=0, ddof=1) / np.sqrt(len(got))
    assert np.all(np.abs(got.mean(axis=0) - want) < 4 * se + 1e-12), (got.mean(axis=0), want)


def test_minibatch_sgd_on_ridge_stays_within_the_neighbourhood_bound():
    """Minibatch SGD (gd with minibatch b, step gamma = 1/L) on a mu-strongly convex ridge problem whose
    gradient noise has the same variance sigma^2 everywhere (rows +-v_i): after K rounds
    E||x_K - x*||^2 <= (1 - gamma mu)^K ||x0 - x*||^2 + gamma sigma^2/mu, the standard constant-step SGD
    bound for bounded variance (e.g. Bottou, Curtis, Nocedal, SIAM Review 2018, Thm 4.6; from memory;
    the one-line proof: co-coercivity gives E||x+ - x*||^2 <= (1 - gamma mu)||x - x*||^2 + gamma^2 sigma^2).
    The Monte Carlo mean over 300 seeds must be below the bound by 4 standard errors' margin, and
    must match the exact second moment of this linear recursion (numpy), so the check can fail
    both ways."""
    prob, rows, ys = _ridge(13, sizes=(8, 6, 10), same_hessian=True)
    n, d, b = 3, 4, 2
    H = np.mean([A.T @ A / len(A) for A in rows], axis=0) + LAM * np.eye(d)
    hbar = np.mean([A.T @ y / len(A) for A, y in zip(rows, ys)], axis=0)
    x_star = np.linalg.solve(H, hbar)
    eig = np.linalg.eigvalsh(H)
    mu, L = eig[0], eig[-1]
    gamma = 1.0 / L
    # Noise of the averaged estimate (1/n) sum_i g_i: independent workers, each (1/b) Cov_j(g_ij).
    devs = [r - r.mean(axis=0) for r in _row_grads(rows, ys, x_star)]
    cov = sum(D.T @ D / len(D) for D in devs) / (b * n * n)
    sigma2 = float(np.trace(cov))
    x0 = x_star + 2.0
    K, S = 150, 300
    runs = simulate(prob, method="gd", compressor=make_compressor("identity", d), step_size=gamma,
                    seeds=np.arange(S), target=0.0, max_rounds=K, x0=x0, minibatch=b)
    assert {r.status for r in runs} == {"budget"}
    sq = np.array([np.sum((r.x - x_star) ** 2) for r in runs])
    bound = (1 - gamma * mu) ** K * np.sum((x0 - x_star) ** 2) + gamma * sigma2 / mu
    se = sq.std(ddof=1) / np.sqrt(S)
    assert sq.mean() + 4 * se <= bound, (sq.mean(), se, bound)
    # Exact: e+ = (I - gamma H) e - gamma xi, E[xi xi^T] = cov.
    A = np.eye(d) - gamma * H
    e, C = x0 - x_star, np.zeros((d, d))
    for _ in range(K):
        e, C = A @ e, A @ C @ A.T + gamma**2 * cov
    exact = float(e @ e + np.trace(C))
    assert abs(sq.mean() - exact) < 4 * se, (sq.mean(), exact, se)
    # Counted cost: b per worker per round (docs/theory.md §2.12).
    assert runs[0].gradient_evals == pytest.approx(K * b, rel=1e-12)


def test_marina_differences_use_the_same_rows_at_both_points():
    """Rows +-v_i: every row's gradient difference is (v_i v_i^T + lam I)(x - y), so a difference on the
    same rows at both points equals the full difference exactly (up to rounding), while one on other
    rows does not. MARINA with the identity compressor and p = 0 (never a sync round): g^1 - g^0 is
    the full gradient difference, and the round costs 2b per worker."""
    prob, _, _ = _ridge(14, sizes=(8, 6, 10), same_hessian=True)
    n, d, b, B = 3, 4, 2, 5
    meth = make_method("marina", compressor=make_compressor("identity", d), n_workers=n, dim=d, batch=B,
                       sync_probability=0.0)
    meth.use_minibatch(b)
    meth.bind(prob)
    keys = trajectory_keys(np.arange(B))
    sizes = prob.worker_sizes.astype(float)
    rng = np.random.default_rng(3)
    X0, X1 = rng.standard_normal((B, d)), rng.standard_normal((B, d))
    W0 = minibatch_weights(keys, 0, sizes, np.full(B, float(b)), prob.shards.m_max)
    W1 = minibatch_weights(keys, 1, sizes, np.full(B, float(b)), prob.shards.m_max)
    g0, _ = meth.direction(meth.stochastic_grads(X0, W0), keys, 0, X0)
    g1, _ = meth.direction(meth.stochastic_grads(X1, W1), keys, 1, X1)
    def full(X):
        return prob.local_grads(X)[0].mean(axis=1)

    # Rounding of a few float64 products of O(1) numbers: 1e-12 absolute.
    np.testing.assert_allclose(g1 - g0, full(X1) - full(X0), atol=1e-12)
    assert np.all(meth.gradient_evals() == 2 * b)
    other = (prob.weighted_grads(X1, W1) - prob.weighted_grads(X0, W0)).mean(axis=1)
    assert np.max(np.abs(other - (full(X1) - full(X0)))) > 1e-3  # different rows: not exact


def test_marina_engine_run_with_identity_keeps_its_start_error():
    """The same property through the engine: with p = 0 and identity, g^k - grad f(x^k) keeps the round-0
    minibatch error, so MARINA's last iterate equals the numpy recursion x <- x - gamma (grad f(x) + e0),
    e0 = (the round-0 minibatch estimate) - grad f(x0)."""
    prob, _, _ = _ridge(15, sizes=(8, 6, 10), same_hessian=True)
    d, b, K, gamma = 4, 3, 20, 0.2
    x0 = np.ones(d)
    run, = simulate(prob, method="marina", compressor=make_compressor("identity", d), step_size=gamma,
                    seeds=[7], target=0.0, max_rounds=K, x0=x0, params={"sync_probability": 0.0}, minibatch=b)
    W0 = minibatch_weights(trajectory_keys([7]), 0, prob.worker_sizes.astype(float), np.array([float(b)]),
                           prob.shards.m_max)
    e0 = prob.weighted_grads(x0[None], W0)[0].mean(axis=0) - prob.full_grad(x0)
    x = x0.copy()
    for _ in range(K):
        x = x - gamma * (prob.full_grad(x) + e0)
    np.testing.assert_allclose(run.x, x, atol=1e-12)  # rounding only
    assert run.gradient_evals == pytest.approx(b + 2 * b * (K - 1), rel=1e-12)


@pytest.mark.parametrize("method, spec", [("gd", "identity"), ("dcgd", "rand_k:2"), ("diana", "rand_k:2"),
                                          ("marina", "rand_k:2"), ("pp_marina", "rand_k:2"), ("ef21", "top_k:2")])
def test_without_minibatch_full_gradients_and_counts_are_as_before(method, spec):
    """Absent minibatch: one full local gradient per round (evals = mean m_i per round, passes = rounds), and
    minibatch=None gives the very same trajectories as leaving the argument out. GD's iterates are
    plain numpy gradient descent on the ridge gradient H x - hbar (rounding only)."""
    prob, rows, ys = _ridge(16)
    d, K = 4, 30
    comp = make_compressor(spec, d)
    kw = {"method": method, "compressor": comp, "step_size": 0.1, "seeds": [1, 2], "target": 0.0, "max_rounds": K,
          "x0": np.ones(d)}
    a, b = simulate(prob, **kw), simulate(prob, **kw, minibatch=None)
    for r, s in zip(a, b):
        assert r.uplink_bits == s.uplink_bits and np.array_equal(r.x, s.x)
        assert r.gradient_evals == pytest.approx(K * prob.worker_sizes.mean(), rel=1e-12)
        assert r.gradient_passes == pytest.approx(K, rel=1e-12)
    if method == "gd":
        H = np.mean([A.T @ A / len(A) for A in rows], axis=0) + LAM * np.eye(d)
        hbar = np.mean([A.T @ y / len(A) for A, y in zip(rows, ys)], axis=0)
        x = np.ones(d)
        for _ in range(K):
            x = x - 0.1 * (H @ x - hbar)
        np.testing.assert_allclose(a[0].x, x, rtol=1e-12, atol=1e-13)


def _data(folder):
    rng = np.random.default_rng(7)
    rows = "\n".join(f"{int(a > 0)} 1:{a:.3f} 2:{b:.3f}" for a, b in rng.normal(size=(12, 2)))
    (folder / "d.svm").write_text(rows + "\n")
    return ("data: d.svm\nmodel: logistic_nonconvex\nworkers: {count: 3, split: iid}\n"
            "target: {grad_norm_sq: 1e-3}\nbudget: {max_rounds: 100}\n")


@pytest.mark.parametrize("line, message", [
    ("minibatch: 5\n", "minibatch: must be at most the smallest worker's row count 4"),
    ("minibatch: 0\n", "minibatch: must be an integer >= 1, got 0"),
])
def test_cli_refuses_a_bad_minibatch_and_writes_nothing(tmp_path, line, message):
    """12 rows over 3 workers (iid): 4 rows each, so b = 5 cannot be drawn per worker; b = 0 is no batch.
    Exit 2 with the key named, no config and no run folder (as tests/test_cli.py)."""
    proc, unchanged = tune_cli_in(tmp_path, _data(tmp_path) + line)
    assert proc.returncode == 2, proc.stderr
    assert message in proc.stderr, proc.stderr
    assert unchanged


@pytest.mark.slow
def test_tune_with_minibatch_writes_the_gradients_section_and_replays_it(tmp_path, capsys):
    """End to end: the config records gradients.minibatch and sigma^2; replaying it on its validation
    seeds gives back its expected bits (the same stochastic trajectories: rows keyed by seed and round)."""
    from bittune.cli import main

    (tmp_path / "job.yaml").write_text(_data(tmp_path).replace("1e-3", "1e-1") + "minibatch: 2\n"
                                       "search: {methods: [marina, ef21], compressors: [rand_k, top_k], trials: 6,"
                                       " validation_seeds: 2}\n")
    out = tmp_path / "c.yaml"
    assert main(["tune", str(tmp_path / "job.yaml"), "-o", str(out)]) == 0
    cfg = yaml.safe_load(out.read_text())
    assert cfg["gradients"]["minibatch"] == 2 and cfg["gradients"]["noise_variance"] > 0
    report = (tmp_path / "c.run" / "report" / "report.md").read_text()
    assert "every worker draws 2 of its rows with replacement" in report
    capsys.readouterr()
    assert main(["replay", str(out), "--job", str(tmp_path / "job.yaml"), "--json"]) == 0
    got = json.loads(capsys.readouterr().out)
    # The config rounds its figures to 4 significant digits (config.REPORTED_DIGITS).
    assert got["mean_bits_per_worker"] == pytest.approx(cfg["expected"]["mean_bits_per_worker"], rel=1e-3)
    # Full batch on the same seeds is another run: the minibatch was replayed, not dropped.
    cfg.pop("gradients")
    full = tmp_path / "full.yaml"
    full.write_text(yaml.safe_dump(cfg))
    assert main(["replay", str(full), "--job", str(tmp_path / "job.yaml"), "--json"]) == 0
    other = json.loads(capsys.readouterr().out)
    assert other["final_grad_norm_sq"] != got["final_grad_norm_sq"]


def _consts(**extra):
    from bittune.constants import Constants

    w = np.array([1.0, 2.0, 3.0])
    return Constants(n_workers=3, dim=10, L=1.5, L_workers=w, L_plus=2.0, L_pm=1.0, delta0=4.0, grad_sq0=1.0,
                     local_grad_sq0=2.0, heterogeneity0=0.5, L_sample=3.5, samples_per_worker=50.0,
                     min_samples_per_worker=40, delta_star0=5.0, **extra)


def test_stochastic_rules_take_over_with_a_minibatch_and_reduce_to_full_batch():
    """theory_point uses the docs/theory.md §2.12 forms when the constants carry a minibatch. Minibatch SGD
    (gd): gamma = min{1/L, eps n/(2 L sigma^2)} (the ABC rule with A = 0, C = sigma^2/n; Khaled & Richtarik
    2020, from memory). As sigma^2 -> 0 and b -> infinity the MARINA and EF21 steps tend to their
    full-batch forms' structure: MARINA's to the refined 1/(L + L_+ sqrt((1-p) omega/(p n))) of §2.4."""
    from bittune.theory import theory_point

    eps = 1e-3
    c = _consts(minibatch=4, noise_variance=0.3)
    gd = theory_point("gd", "identity", c, target=eps)
    assert gd.step_size == pytest.approx(min(1 / 1.5, eps * 3 / (2 * 1.5 * 0.3)), rel=1e-12)
    assert "Khaled" in gd.source
    m = theory_point("marina", "rand_k:2", c, target=eps)
    assert "2.12.3" in m.source and "noise floor" in m.note  # floor 0.1 > target
    big = _consts(minibatch=10**12, noise_variance=0.0)
    p = 2 / 10
    omega = 10 / 2 - 1
    want = 1 / (1.5 + 2.0 * np.sqrt((1 - p) * omega / (p * 3)))  # docs/theory.md §2.4 refined form
    assert theory_point("marina", "rand_k:2", big, target=eps).step_size == pytest.approx(want, rel=1e-9)
    vr = theory_point("vr_marina", "rand_k:2", c, target=eps)
    assert vr.minibatch == 4  # b' = the job's b
    # The noise floor rises the predicted rounds: a larger sigma^2 never predicts fewer.
    hi = theory_point("ef21", "top_k:2", _consts(minibatch=4, noise_variance=1e-6), target=eps)
    lo = theory_point("ef21", "top_k:2", _consts(minibatch=4, noise_variance=1e-8), target=eps)
    assert hi.predicted_rounds >= lo.predicted_rounds


def test_gradient_passes_count_b_rows_per_estimate():
    """The cost model's input: with a minibatch a DCGD round computes b per-sample gradients per worker,
    so gradient_passes = K mean_i(b/m_i) (closed form) and the even network's seconds
    (latency + passes x compute + bits/bandwidth, docs/design.md "Bits") charge that, not K passes."""
    from bittune.cost import NetworkModel

    prob, _, _ = _ridge(17)
    K, b = 25, 2
    run, = simulate(prob, method="dcgd", compressor=make_compressor("rand_k:2", 4), step_size=0.05, seeds=[3],
                    target=0.0, max_rounds=K, x0=np.ones(4), minibatch=b)
    sizes = prob.worker_sizes.astype(float)
    assert run.gradient_passes == pytest.approx(K * np.mean(b / sizes), rel=1e-12)
    net = NetworkModel(latency=0.01, uplink_bandwidth=1e6, downlink_bandwidth=1e7, compute_seconds=0.5)
    want = K * 0.01 + K * np.mean(b / sizes) * 0.5 + run.uplink_bits / 1e6 + run.downlink_bits / 1e7
    assert net.seconds(run) == pytest.approx(want, rel=1e-12)


@pytest.mark.parametrize("method, spec", [("dcgd", "rand_k:2"), ("marina", "rand_k:2"), ("pp_marina", "rand_k:2"),
                                          ("ef21", "top_k:2"), ("vr_marina", "rand_k:2")])
def test_a_stochastic_trajectory_is_the_same_alone_or_in_a_batch(method, spec):
    """The rows come from (trajectory key, round, stream): a trajectory run alone repeats its run inside a
    batch with other steps and seeds, bits and iterates alike (DEVELOPERS.md, Randomness; exact up to the
    rounding of a batched matrix product, 1e-12)."""
    prob, _, _ = _ridge(18, sizes=(9, 7, 11))
    comp = make_compressor(spec, 4)
    kw = {"method": method, "compressor": comp, "target": 0.0, "max_rounds": 40, "x0": np.ones(4), "minibatch": 3}
    batch = simulate(prob, step_size=[0.05, 0.2, 0.1], seeds=[4, 5, 6], **kw)
    alone = simulate(prob, step_size=0.2, seeds=[5], **kw)[0]
    assert batch[1].uplink_bits == alone.uplink_bits and batch[1].gradient_evals == alone.gradient_evals
    np.testing.assert_allclose(batch[1].x, alone.x, rtol=0, atol=1e-12)
