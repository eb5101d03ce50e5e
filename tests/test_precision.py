"""The engine's float32 path (job key engine.precision): rounds, bits and trajectories against float64
and against closed-form gradient descent."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from bittune.compressors import make_compressor
from bittune.config import config_to_dict, parse_config
from bittune.errors import InputError
from bittune.job import parse_job
from bittune.problems import problem_from_arrays
from bittune.simulate import simulate

EPS32 = float(np.finfo(np.float32).eps)


def diagonal_quadratic(lam: np.ndarray, n: int, seed: int = 0):
    """Least squares whose f has Hessian diag(lam) exactly: worker i holds A_i = Q_i diag(sqrt(d lam))
    (Q_i a random orthogonal d x d matrix), so A_i^T A_i / m_i = diag(lam) on every worker, and
    targets y_i that differ between workers. grad f(x) = diag(lam) x - b, b = mean_i A_i^T y_i / m_i."""
    rng = np.random.default_rng(seed)
    d = lam.size
    rows, ys, b = [], [], np.zeros(d)
    for _ in range(n):
        q, _ = np.linalg.qr(rng.standard_normal((d, d)))
        a = q * np.sqrt(d * lam)[None, :]
        y = rng.standard_normal(d)
        rows.append(a)
        ys.append(y)
        b += a.T @ y / d / n
    return problem_from_arrays("least_squares", rows, ys, regularization=0.0), b


def closed_form_rounds(lam, x0, xstar, L, target, max_rounds):
    """GD with step 1/L on f = 1/2 (x - x*)^T diag(lam) (x - x*): grad_k = diag(lam) (1 - lam/L)^k (x0 - x*),
    so ||grad_k||^2 = sum_i lam_i^2 (1 - lam_i/L)^(2k) (x0_i - x*_i)^2 (Nesterov, "Introductory Lectures on
    Convex Optimization", 2004, 1.2.3; exact for a diagonal quadratic). Returns the first k at target."""
    k = np.arange(max_rounds + 1)[:, None]
    g2 = np.sum(lam**2 * (1.0 - lam / L) ** (2 * k) * (x0 - xstar) ** 2, axis=1)
    hit = np.flatnonzero(g2 <= target)
    return int(hit[0]), g2


@pytest.mark.parametrize("relative", [1e-4, 1e-8])
def test_float32_gd_rounds_match_closed_form(relative):
    lam = np.geomspace(0.1, 1.0, 8)  # condition number 10: well conditioned
    problem, b = diagonal_quadratic(lam, n=4)
    xstar = b / lam
    x0 = np.random.default_rng(1).standard_normal(8)
    L = float(lam.max())
    g0 = lam * (x0 - xstar)
    target = relative * float(g0 @ g0)
    want, g2 = closed_form_rounds(lam, x0, xstar, L, target, 2000)
    got = {}
    for prec in ("float64", "float32"):
        (t,) = simulate(problem, method="gd", compressor=make_compressor("identity", 8), step_size=1.0 / L,
                        seeds=[0], target=target, max_rounds=2000, x0=x0, precision=prec)
        assert t.reached
        got[prec] = t
    assert got["float64"].rounds == want
    # float32: +-1 round, the crossing can move by the rounding of one gradient evaluation.
    assert abs(got["float32"].rounds - want) <= 1
    # Along the way ||grad_k||^2 follows the closed form: float64 to 1e-9 relative (rounding of 8 x 4
    # products per round, amplified by at most the ~100 rounds), float32 to 1e-3 relative. The float32
    # gradient error is about eps_32 ||b|| ~ 1e-7 absolute per coordinate; the target of 1e-8 relative keeps
    # ||grad|| >= 1e-4 ||grad_0|| ~ 1e-4, so the relative error of ||grad||^2 stays below 2 eps_32 ||b|| / 1e-4,
    # about 1e-2 at worst at the end; 3e-2 leaves a margin (our bound, from the error model above).
    k = got["float64"].rounds
    np.testing.assert_allclose(got["float64"].grad_norm_sq, g2[: k + 1], rtol=1e-9)
    k32 = min(got["float32"].rounds, k)
    np.testing.assert_allclose(got["float32"].grad_norm_sq[: k32 + 1], g2[: k32 + 1], rtol=3e-2)
    np.testing.assert_allclose(got["float32"].grad_norm_sq[: k32 // 2], g2[: k32 // 2], rtol=1e-3)


def _logistic(seed=0, m=600, d=20, n=6):
    rng = np.random.default_rng(seed)
    A = rng.standard_normal((m, d))
    y = np.where(rng.random(m) < 1.0 / (1.0 + np.exp(-A @ rng.standard_normal(d))), 1.0, -1.0)
    parts = np.array_split(np.arange(m), n)
    return problem_from_arrays("logistic_nonconvex", [A[p] for p in parts], [y[p] for p in parts],
                               regularization=0.1)


@pytest.mark.parametrize("method,spec,params", [
    ("marina", "rand_k:4", {"sync_probability": 0.2}),
    ("diana", "rand_k:4", {}),
    ("dcgd", "natural", {}),
    ("marina", "perm_k", {"sync_probability": 0.2}),
    ("pp_marina", "rand_k:4", {"clients": 3, "sync_probability": 0.2}),
    ("vr_marina", "rand_k:4", {"minibatch": 5, "sync_probability": 0.2}),
    # Top-K: the bits of a message do not depend on the values; which K indices are kept may
    # differ between precisions when two |entries| tie in float32 but not in float64.
    ("ef21", "top_k:4", {}),
])
def test_float32_charges_the_same_bits(method, spec, params):
    problem = _logistic()
    comp = make_compressor(spec, problem.dim, n_workers=problem.n_workers)
    runs = {prec: simulate(problem, method=method, compressor=comp, step_size=0.5, seeds=[3, 4, 5], target=0.0,
                           max_rounds=40, params=params, precision=prec) for prec in ("float64", "float32")}
    for a, b in zip(runs["float64"], runs["float32"]):
        assert a.rounds == b.rounds == 40
        np.testing.assert_array_equal(a.uplink_curve, b.uplink_curve)
        assert a.downlink_bits == b.downlink_bits and a.gradient_evals == b.gradient_evals
        # Same random draws, same path: on this well-conditioned problem (L / mu about 10) the
        # float32 iterates stay within 1e-4 relative of float64 over 40 rounds (about 1000 eps_32:
        # each round adds a few eps_32, a contraction keeps it from growing; our bound).
        np.testing.assert_allclose(b.x, a.x, rtol=0, atol=1e-4 * np.linalg.norm(a.x))
        np.testing.assert_allclose(b.grad_norm_sq, a.grad_norm_sq, rtol=1e-3)


def test_twin_oracle_types_and_probe_precision():
    problem = _logistic()
    twin = problem.in_precision("float32")
    assert twin is problem.in_precision("float32")  # built once
    assert problem.in_precision("float64") is problem
    X = np.random.default_rng(0).standard_normal((3, problem.dim))
    g64, f64 = problem.local_grads(X, with_loss=True)
    g32, f32 = twin.local_grads(X, with_loss=True)
    assert g64.dtype == np.float64 and g32.dtype == np.float32 and f32.dtype == np.float32
    # One pass in float32: |error| <= a few eps_32 times the scale of the terms (rows of norm ~sqrt(d)).
    np.testing.assert_allclose(g32, g64, rtol=0, atol=100 * EPS32 * np.abs(g64).max())
    assert problem.shards.dtype == np.float64  # the original (probe, gradient check) is untouched


def test_float32_loss_gap_target():
    problem = _logistic()
    comp = make_compressor("rand_k:4", problem.dim)
    f_ref = 0.0  # any level below f: the metric is f - f_ref summed in float64
    for prec in ("float64", "float32"):
        (t,) = simulate(problem, method="marina", compressor=comp, step_size=0.5, seeds=[0], target=0.0,
                        max_rounds=5, params={"sync_probability": 0.5}, loss_ref=f_ref, precision=prec)
        assert t.progress.dtype == np.float64 and np.all(np.isfinite(t.progress))


def test_simulate_rejects_unknown_precision():
    with pytest.raises(ValueError, match="precision"):
        simulate(_logistic(), method="gd", compressor=make_compressor("identity", 20), step_size=0.1, seeds=[0],
                 target=0.0, max_rounds=1, precision="float16")


def _job(tmp_path: Path, **extra):
    (tmp_path / "d.svm").write_text("1 1:1\n-1 1:2\n")
    return {"model": "logistic_nonconvex", "data": "d.svm", "workers": {"count": 1, "split": "iid"},
            "target": {"grad_norm_sq": 1e-3}, "budget": {"max_rounds": 10}, **extra}


def test_job_setting(tmp_path):
    job = parse_job(_job(tmp_path), base_dir=tmp_path, source="job.yaml")
    assert job.engine.precision == "float64"
    job = parse_job(_job(tmp_path, engine={"precision": "float32"}), base_dir=tmp_path, source="job.yaml")
    assert job.engine.precision == "float32"
    with pytest.raises(InputError, match="engine.precision"):
        parse_job(_job(tmp_path, engine={"precision": "half"}), base_dir=tmp_path, source="job.yaml")
    with pytest.raises(InputError, match="engine.precision: float32 is available"):
        parse_job(_job(tmp_path, engine={"precision": "float32"}, model="softmax"), base_dir=tmp_path,
                  source="job.yaml")


def test_config_records_precision():
    doc = {"bittune_config": 1, "method": "gd", "compressor": "identity", "step_size": 0.1, "precision": "float32"}
    cfg = parse_config(doc, source="c.yaml")
    assert cfg.precision == "float32" and config_to_dict(cfg)["precision"] == "float32"
    assert parse_config({**doc, "precision": None}, source="c.yaml").precision is None
    with pytest.raises(InputError, match="precision"):
        parse_config({**doc, "precision": "float16"}, source="c.yaml")


def test_replay_uses_the_config_precision(tmp_path):
    from bittune.job import load_job
    from bittune.replay import replay
    from bittune.workspace import open_job

    rng = np.random.default_rng(4)
    lines = [f"{1 if rng.random() < 0.5 else -1} " + " ".join(f"{j + 1}:{rng.standard_normal():.6f}" for j in range(5))
             for _ in range(60)]
    (tmp_path / "d.svm").write_text("\n".join(lines) + "\n")
    (tmp_path / "job.yaml").write_text("data: d.svm\nmodel: logistic_nonconvex\nworkers: {count: 3, split: iid}\n"
                                       "target: {grad_norm_sq: 1e-6}\nbudget: {max_rounds: 200}\n")
    ws = open_job(load_job(tmp_path / "job.yaml"))  # the job says float64 (the default)
    doc = {"bittune_config": 1, "method": "marina", "compressor": {"name": "rand_k", "k": 2}, "step_size": 0.5,
           "sync_probability": 0.3}
    runs = {p: replay(ws, parse_config({**doc, "precision": p}, source="c.yaml"), seeds=[0, 1])
            for p in ("float64", "float32")}
    comp = make_compressor("rand_k:2", 5)
    direct = simulate(ws.problem, method="marina", compressor=comp, step_size=0.5, seeds=[0, 1], target=ws.target,
                      max_rounds=200, x0=ws.x0, params={"sync_probability": 0.3}, precision="float32")
    for a, b in zip(runs["float32"], direct):
        np.testing.assert_array_equal(a.x, b.x)  # replay ran the float32 engine, as the config says
    assert any(not np.array_equal(a.x, b.x) for a, b in zip(runs["float32"], runs["float64"]))
    # A config without the key (older files) replays in float64.
    legacy = replay(ws, parse_config(doc, source="c.yaml"), seeds=[0, 1])
    for a, b in zip(legacy, runs["float64"]):
        np.testing.assert_array_equal(a.x, b.x)


@pytest.mark.slow
def test_tune_records_float32_and_replay_follows(tmp_path, capsys):
    """End to end: a float32 job tunes, the config says float32, replay of it reaches the target."""
    import json

    from bittune.cli import main
    from bittune.config import load_config

    rng = np.random.default_rng(9)
    w = rng.standard_normal(6)
    lines = []
    for _ in range(240):
        a = rng.standard_normal(6)
        label = 1 if rng.random() < 1.0 / (1.0 + np.exp(-a @ w)) else -1
        lines.append(f"{label} " + " ".join(f"{j + 1}:{v:.6f}" for j, v in enumerate(a)))
    (tmp_path / "d.svm").write_text("\n".join(lines) + "\n")
    (tmp_path / "job.yaml").write_text(
        "data: d.svm\nmodel: logistic_nonconvex\nworkers: {count: 4, split: iid}\n"
        "target: {grad_norm_sq: 1e-4}\nbudget: {max_rounds: 2000}\nengine: {precision: float32}\n"
        "search: {methods: [marina], compressors: [rand_k], trials: 6, validation_seeds: 2, finalists: 1,"
        " backoff_steps: 0}\n")
    cfg_path = tmp_path / "cfg.yaml"
    assert main(["tune", str(tmp_path / "job.yaml"), "-o", str(cfg_path), "--run-dir", str(tmp_path / "run")]) == 0
    assert load_config(cfg_path).precision == "float32"
    capsys.readouterr()
    assert main(["replay", str(cfg_path), "--job", str(tmp_path / "job.yaml"), "--seeds", "2", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["all_reached"]
