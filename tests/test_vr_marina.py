"""VR-MARINA: the minibatch oracle, the estimator, the cost count, calL and the theory rule."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import norm

from bittune._random import trajectory_keys
from bittune.compressors import make_compressor
from bittune.constants import Constants
from bittune.methods import make_method
from bittune.probe import _sample_smoothness, estimate_constants
from bittune.problems import problem_from_arrays
from bittune.simulate import simulate
from bittune.theory import theory_point, vr_marina_rule
from conftest import Quiet

MODELS = {
    "least_squares": {},
    "logistic_nonconvex": {},
    "softmax": {},
    "mlp": {"hidden": 3},
}


def _data(model: str, *, seed: int, n: int = 3, m=(7, 5, 9), d: int = 4):
    rng = np.random.default_rng(seed)
    rows = [rng.standard_normal((k, d)) for k in m]
    if model == "least_squares":
        ys = [rng.standard_normal(k) for k in m]
    elif model == "softmax":
        ys = [rng.integers(0, 3, k).astype(float) for k in m]
        ys[0][:3] = [0, 1, 2]  # every class present
    else:
        ys = [np.where(rng.random(k) < 0.5, -1.0, 1.0) for k in m]
    return rows, ys


def _problem(model, rows, ys, reg=0.1):
    opts = MODELS[model]
    classes = np.array([0.0, 1.0, 2.0]) if model == "softmax" else None
    return problem_from_arrays(model, rows, ys, regularization=reg, options=opts or None, classes=classes)


@pytest.mark.parametrize("model", sorted(MODELS))
def test_weighted_grads_give_full_and_single_row_gradients(model):
    """Weights 1/m_i reproduce local_grads; a one-hot weight on row j gives grad f_ij, checked
    against the same model built on that single row (f_ij = row loss + regulariser)."""
    rows, ys = _data(model, seed=3)
    prob = _problem(model, rows, ys)
    rng = np.random.default_rng(4)
    n, D, m_max = prob.n_workers, prob.dim, prob.shards.m_max
    X = 0.5 * rng.standard_normal((2, D))
    W = np.zeros((2, n, m_max))
    for i, r in enumerate(rows):
        W[:, i, : len(r)] = 1.0 / len(r)
    full, _ = prob.local_grads(X)
    # Same arithmetic up to summation order (rounding ~1e-15 of the gradient scale).
    np.testing.assert_allclose(prob.weighted_grads(X, W), full, rtol=1e-10, atol=1e-12)
    picks = [2, 4, 0]  # row j of worker i
    W = np.zeros((2, n, m_max))
    W[:, np.arange(n), picks] = 1.0
    got = prob.weighted_grads(X, W)
    single = _problem(model, [r[j : j + 1] for r, j in zip(rows, picks)], [y[j : j + 1] for y, j in zip(ys, picks)])
    want, _ = single.local_grads(X)
    np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-12)
    # Per-worker points (B, n, d) as well.
    Xw = 0.5 * rng.standard_normal((2, n, D))
    np.testing.assert_allclose(prob.weighted_grads(Xw, W), single.local_grads(Xw)[0], rtol=1e-10, atol=1e-12)


def test_plugin_models_have_no_minibatch_oracle():
    from bittune.problems.plugin import PluginProblem

    assert PluginProblem.has_samples is False


def _one_round(prob, *, b, batch, spec="identity", seed=0):
    """g^1 - g^0 of VR-MARINA with p = 0 for ``batch`` trajectories, and the exact per-row
    differences delta_ij = grad f_ij(x1) - grad f_ij(x0) (least squares: closed form)."""
    rng = np.random.default_rng(seed)
    d, n = prob.dim, prob.n_workers
    x0, x1 = rng.standard_normal(d), rng.standard_normal(d)
    comp = make_compressor(spec, d)
    meth = make_method("vr_marina", compressor=comp, n_workers=n, dim=d, batch=batch, sync_probability=0.0,
                       minibatch=b)
    meth.bind(prob)
    keys = trajectory_keys(np.arange(batch) + 500)
    X0, X1 = np.broadcast_to(x0, (batch, d)).copy(), np.broadcast_to(x1, (batch, d)).copy()
    g0, _ = prob.local_grads(X0)
    g1, _ = prob.local_grads(X1)
    start, _ = meth.direction(g0, keys, 0, X0)
    after, bits = meth.direction(g1, keys, 1, X1)
    return after - start, x1 - x0, meth, bits


def test_vr_marina_estimator_is_unbiased_with_the_sampling_variance():
    """docs/theory.md §2.5: with b' rows drawn i.i.d. uniformly with replacement,
    E[g^1 - g^0] = (1/n) sum_i D_i and, with the identity compressor,
    E||g^1 - g^0 - Dbar||^2 = (1/n^2) sum_i (1/b') ((1/m_i) sum_j ||delta_ij||^2 - ||D_i||^2)
    (the variance of a mean of b' i.i.d. draws; common practice, no source). Least squares:
    delta_ij = (a_j a_j^T + lam I) dx, computed with numpy. z-tests at false-alarm 1e-6."""
    rows, ys = _data("least_squares", seed=7, m=(6, 9, 4), d=3)
    lam = 0.1
    prob = _problem("least_squares", rows, ys, reg=lam)
    b, batch = 3, 20_000
    step, dx, _, _ = _one_round(prob, b=b, batch=batch)
    deltas = [r * (r @ dx)[:, None] + lam * dx for r in rows]
    D = np.array([dl.mean(axis=0) for dl in deltas])
    dbar = D.mean(axis=0)
    se = step.std(axis=0, ddof=1) / math.sqrt(batch)
    assert np.all(np.abs(step.mean(axis=0) - dbar) <= norm.isf(1e-6 / (2 * 3)) * se)
    exact = sum((np.mean(np.sum(dl * dl, axis=1)) - D[i] @ D[i]) / b for i, dl in enumerate(deltas)) / 9
    err = np.sum((step - dbar) ** 2, axis=1)
    assert abs(err.mean() - exact) <= norm.isf(1e-6 / 2) * err.std(ddof=1) / math.sqrt(batch)


def test_vr_marina_with_sync_probability_one_equals_gd(cancer):
    _, L = cancer.smoothness_bounds()
    comp = make_compressor("identity", cancer.dim)
    gd = simulate(cancer, method="gd", compressor=comp, step_size=1 / L, seeds=[0], target=0.0, max_rounds=100)[0]
    vr = simulate(cancer, method="vr_marina", compressor=make_compressor("rand_k:3", cancer.dim), step_size=1 / L,
                  seeds=[0], target=0.0, max_rounds=100, params={"sync_probability": 1.0, "minibatch": 4})[0]
    np.testing.assert_allclose(vr.grad_norm_sq, gd.grad_norm_sq, rtol=1e-12)
    assert vr.uplink_bits == gd.uplink_bits
    assert vr.gradient_evals == gd.gradient_evals  # the same sum, term by term
    assert gd.gradient_evals == pytest.approx(100 * cancer.worker_sizes.mean(), rel=1e-13)  # 100 additions


def test_vr_marina_counts_gradient_evaluations_and_bits(cancer):
    """m_i on the first and on sync rounds, 2 b' on compressed rounds; Rand-K bits 32 K."""
    d, b, k = cancer.dim, 5, 4
    run = simulate(cancer, method="vr_marina", compressor=make_compressor(f"rand_k:{k}", d), step_size=0.05,
                   seeds=[1], target=0.0, max_rounds=300, params={"sync_probability": 0.2, "minibatch": b})[0]
    per_round = np.diff(run.uplink_curve)
    syncs = int(np.sum(per_round == 32.0 * d))  # round 0 included
    assert set(np.unique(per_round)) <= {32.0 * d, 32.0 * k}
    m = cancer.worker_sizes.mean()
    assert run.gradient_evals == pytest.approx(syncs * m + (run.rounds - syncs) * 2 * b, rel=1e-12)
    passes = syncs + (run.rounds - syncs) * np.mean(2 * b / cancer.worker_sizes)
    assert run.gradient_passes == pytest.approx(passes, rel=1e-12)
    # Binomial(299, 0.2) compressed-or-sync rounds after round 0: mean 59.8, sd 6.9; 5 sd.
    assert abs(syncs - 1 - 59.8) < 5 * 6.9


def test_vr_marina_defaults_and_errors(cancer):
    comp = make_compressor("rand_k:3", cancer.dim)
    m = make_method("vr_marina", compressor=comp, n_workers=cancer.n_workers, dim=cancer.dim, batch=2)
    m.bind(cancer)
    b = round(math.sqrt(cancer.worker_sizes.min()))
    np.testing.assert_array_equal(m.p["minibatch"], [b, b])
    # p = min(zeta/d, b'/(m + b')) (docs/theory.md §2.5, Gorbunov et al. 2021, from memory)
    want = min(3 / cancer.dim, b / (cancer.worker_sizes.mean() + b))
    np.testing.assert_allclose(m.p["sync_probability"], [want, want], rtol=1e-15)
    bad = make_method("vr_marina", compressor=comp, n_workers=cancer.n_workers, dim=cancer.dim, batch=1,
                      minibatch=2.5)
    with pytest.raises(ValueError, match="minibatch"):
        bad.bind(cancer)
    with pytest.raises(ValueError, match=r"vr_marina: unknown parameters \['clients'\]"):
        make_method("vr_marina", compressor=comp, n_workers=cancer.n_workers, dim=cancer.dim, batch=1, clients=2)


def test_probe_estimates_the_average_smoothness_of_least_squares(monkeypatch):
    """calL_i^2 = lambda_max((1/m_i) sum_j (a_j a_j^T + lam I)^2) for least squares (docs/theory.md §2.5
    definition; computed with numpy.linalg.eigvalsh). The estimator is stochastic (16 sign draws:
    about 18% standard error on calL_i, our analysis in probe._sample_smoothness), so the check is
    a band of about 3 standard errors, [0.5, 1.6]; and calL_i >= L_i (Jensen)."""
    rng = np.random.default_rng(11)
    n, m, d, lam = 4, 60, 5, 0.1
    rows = [rng.standard_normal((m, d)) * np.geomspace(0.3, 3, d) for _ in range(n)]
    ys = [rng.standard_normal(m) for _ in range(n)]
    prob = _problem("least_squares", rows, ys, reg=lam)
    exact = []
    for r in rows:
        H = r[:, :, None] * r[:, None, :] + lam * np.eye(d)
        exact.append(math.sqrt(np.linalg.eigvalsh(np.einsum("jab,jbc->ac", H, H) / m)[-1]))
    exact = np.array(exact)
    est = _sample_smoothness(prob, rng.standard_normal((3, d)), iters=12, draws=16, rng=np.random.default_rng(2))
    assert np.all((est / exact > 0.5) & (est / exact < 1.6)), est / exact
    # One sign draw per oracle call (the memory cap of large data): other random signs, same band.
    import bittune.probe as probe_module

    monkeypatch.setattr(probe_module, "_MAX_ELEMENTS", 1)
    small = _sample_smoothness(prob, rng.standard_normal((3, d)), iters=12, draws=16, rng=np.random.default_rng(3))
    assert np.all((small / exact > 0.5) & (small / exact < 1.6)), small / exact
    monkeypatch.undo()
    c, _ = estimate_constants(prob, x0=np.zeros(d), rng=np.random.default_rng(0), sample_smoothness=True)
    assert c.L_sample >= c.L_qm  # calL_i >= L_i for every i, so their quadratic means too
    assert 0.5 * np.sqrt(np.mean(exact**2)) < c.L_sample < 1.6 * np.sqrt(np.mean(exact**2))
    assert c.samples_per_worker == m and c.min_samples_per_worker == m
    c2, _ = estimate_constants(prob, x0=np.zeros(d), rng=np.random.default_rng(0))
    assert c2.L_sample is None  # only when asked (the job lists vr_marina)


def test_vr_marina_theory_rule_is_the_published_formula():
    """docs/theory.md §2.5 (Gorbunov et al. 2021, Thm 3.1, from memory):
    gamma = 1/(L + sqrt(((1-p)/(p n)) (omega L_QM^2 + (1+omega) calL^2/b'))), p = min(zeta/d, b'/(m+b'))."""
    n, d = 4, 20
    c = Constants(n_workers=n, dim=d, L=2.0, L_workers=np.array([2.0, 3.0, 2.5, 1.5]), L_plus=2.5, L_pm=1.0,
                  delta0=5.0, grad_sq0=1.0, local_grad_sq0=1.2, heterogeneity0=0.2, L_sample=4.0,
                  samples_per_worker=100.0, min_samples_per_worker=90)
    comp = make_compressor("rand_k:5", d)
    t = vr_marina_rule(comp, c, target=1e-3, minibatch=10)
    omega, p = d / 5 - 1, min(5 / d, 10 / 110)
    lqm2 = np.mean(np.square(c.L_workers))
    gamma = 1 / (2.0 + math.sqrt((1 - p) / (p * n) * (omega * lqm2 + (1 + omega) * 16.0 / 10)))
    assert t.step_size == pytest.approx(gamma, rel=1e-14)
    assert t.sync_probability == pytest.approx(p, rel=1e-14)
    assert t.predicted_rounds == math.ceil(2 * 5.0 / gamma / 1e-3)
    assert t.minibatch == 10
    # Larger minibatches only shrink the variance term: the step grows with b'.
    assert theory_point("vr_marina", comp, c, target=1e-3, minibatch=80).step_size > t.step_size
    no_samples = Constants(**{**c.__dict__, "L_sample": None})
    with pytest.raises(ValueError, match="L_sample"):
        vr_marina_rule(comp, no_samples, target=1e-3)


@pytest.mark.slow
def test_tune_searches_vr_marina_and_replays_its_config(tmp_path):
    """scikit-learn's bundled breast-cancer data (open dataset): a job listing vr_marina gets calL
    from the probe, searches the minibatch, and writes a config that replays."""
    from pathlib import Path

    import yaml
    from sklearn.datasets import load_breast_cancer

    from bittune.cli import main
    from bittune.config import load_config
    from bittune.tune import tune

    X, y = load_breast_cancer(return_X_y=True)
    X = (X - X.mean(axis=0)) / X.std(axis=0)
    np.savez(tmp_path / "bc.npz", X=X, y=np.where(y > 0, 1.0, -1.0))
    job = tmp_path / "job.yaml"
    job.write_text("""
data: bc.npz
model: logistic_nonconvex
regularization: 0.01
workers: {count: 5, split: iid, seed: 0}
target: {grad_norm_sq: 1e-3, relative: true}
budget: {max_rounds: 4000}
objective: seconds
network: {latency: 0.0, uplink_bandwidth: 1e9, compute_seconds: 1.0}
search: {methods: [vr_marina], compressors: [rand_k], trials: 14, seeds: 2, validation_seeds: 3}
""")
    result = tune(job, output=tmp_path / "c.yaml", progress=Quiet())
    cfg = load_config(tmp_path / "c.yaml")
    assert cfg.method == "vr_marina" and 1 <= cfg.minibatch <= 113  # the smallest worker holds 113 rows
    consts = result.config["constants"]
    assert consts["L_sample"] >= consts["L_qm"]
    # VR-MARINA computes fewer per-sample gradients than a full pass per round.
    expected = result.config["expected"]
    assert 0 < expected["mean_gradient_evals_per_worker"] < expected["mean_rounds"] * X.shape[0] / 5
    # Compute dominates here (1 s per full gradient, free links): tuning must beat the theory point's
    # seconds on the same fresh seeds.
    assert result.selection.winner.mean_cost < result.selection.baseline.mean_cost
    assert main(["replay", str(tmp_path / "c.yaml"), "--job", str(job), "--seeds", "2"]) in (0, 4)
    doc = yaml.safe_load((tmp_path / "c.yaml").read_text())
    assert doc["minibatch"] == cfg.minibatch
    # The report names the method's parameter and the constant its theory used.
    md = Path(result.report["markdown"]).read_text()
    assert f"minibatch b' {cfg.minibatch}" in md and "L_sample" in md and "gradient evaluations" in md


def test_minibatch_draw_is_unbiased_with_the_with_replacement_variance():
    """The row draw behind every minibatch (``methods._minibatch.minibatch_weights``).

    Reference (sampling with replacement, standard result, e.g. Cochran, "Sampling
    Techniques", 3rd ed., 1977, sec. 2.6; from memory): the mean of b i.i.d. uniform draws from
    m values has mean = the population mean and variance S^2/b, S^2 = (1/m) sum_j (v_j - vbar)^2.
    R = 4,000 independent draws (one trajectory key each) per worker and coordinate:
    * mean: z = (sample mean - grad f_i) / sqrt(S^2/(b R)), |z| <= 4.4 for all n d = 12
      coordinates; false-alarm rate <= 12 x 1.1e-5 ~ 1.3e-4 (normal tails, Bonferroni);
    * variance: sample variance / (S^2/b) within 1 +- 0.2; its standard error is about
      sqrt((kurtosis - 1)/R) <= 0.05 for these bounded rows, so 0.2 is 4 standard errors.
    """
    from bittune.methods._minibatch import minibatch_weights

    rows, ys = _data("logistic", seed=3)
    prob = _problem("logistic_nonconvex", rows, ys)
    sizes = np.asarray(prob.worker_sizes, dtype=np.float64)
    n, d, m_max = prob.n_workers, prob.dim, int(prob.shards.m_max)
    x = np.random.default_rng(0).standard_normal(d)
    # Every row's own gradient: one-hot weights (slot j picks row j of each worker).
    onehot = np.zeros((m_max, n, m_max))
    onehot[np.arange(m_max), :, np.arange(m_max)] = 1.0
    per_row = prob.weighted_grads(np.repeat(x[None], m_max, axis=0), onehot)  # (m_max, n, d)
    full = prob.local_grads(x[None])[0][0]  # (n, d): (grads, loss)[0], first point
    for b in (1, 3, 12):  # b = 12 > every m_i: with replacement allows it
        R = 4000
        keys = trajectory_keys(np.arange(R) + 1000 * b)
        W = minibatch_weights(keys, 5, sizes, np.full(R, float(b)), m_max)
        assert np.allclose(W.sum(axis=2), 1.0)  # b draws of weight 1/b per worker
        est = prob.weighted_grads(np.repeat(x[None], R, axis=0), W)  # (R, n, d)
        S2 = np.stack([np.mean((per_row[: int(m), i] - full[i]) ** 2, axis=0)
                       for i, m in enumerate(sizes)])  # (n, d), population variance per coordinate
        z = (est.mean(axis=0) - full) / np.sqrt(S2 / (b * R))
        assert np.max(np.abs(z)) <= 4.4, (b, z)
        ratio = est.var(axis=0) / (S2 / b)
        assert np.all(np.abs(ratio - 1.0) <= 0.2), (b, ratio)
