"""Loss-gap targets: f_ref by L-BFGS-B, the engine's stopping rule, the job keys, tune and replay."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

from bittune.cli import main
from bittune.compressors import make_compressor
from bittune.config import load_config
from bittune.errors import InputError
from bittune.job import TargetSpec, load_job, parse_job
from bittune.replay import stored_reference
from bittune.search import _PruneMonitor, score
from bittune.simulate import Trajectory, simulate
from bittune.workspace import open_job

WORKERS = 4


def _data(folder: Path, *, seed: int, rows: int = 240, dim: int = 8, binary: bool) -> str:
    """Generated rows with feature scales over a decade; labels {0, 1} or real targets."""
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((rows, dim)) * np.geomspace(0.3, 3.0, dim)
    w = rng.standard_normal(dim)
    y = X @ w + 0.5 * rng.standard_normal(rows)
    y = (y > 0).astype(float) if binary else y
    np.savez(folder / "data.npz", X=X, y=y)
    return "data.npz"


def _job(folder: Path, *, model: str, reg: float, target: str, rounds: int = 20000, extra: str = "") -> Path:
    path = folder / "job.yaml"
    path.write_text(f"""data: data.npz
model: {model}
regularization: {reg}
workers: {{count: {WORKERS}, split: iid, seed: 1}}
target: {target}
budget: {{max_rounds: {rounds}}}
{extra}""")
    return path


# --- f_ref -------------------------------------------------------------------------------


def test_f_ref_of_least_squares_is_the_closed_form_ridge_minimum(tmp_path):
    _data(tmp_path, seed=3, binary=False)
    lam = 1e-2
    ws = open_job(load_job(_job(tmp_path, model="least_squares", reg=lam, target="{loss_gap: 1e-6}")))
    assert len(set(ws.problem.worker_sizes.tolist())) == 1  # equal shares: f is the pooled mean
    d = np.load(tmp_path / "data.npz")
    X, y = d["X"], d["y"]
    N = len(y)
    # Reference: the ridge normal equations (X^T X/N + lam I) x = X^T y/N solved by numpy.linalg.solve,
    # for f(x) = ||X x - y||^2/(2N) + (lam/2)||x||^2 (the least-squares model's documented loss).
    H = X.T @ X / N + lam * np.eye(X.shape[1])
    x_star = np.linalg.solve(H, X.T @ y / N)
    f_star = float(np.sum((X @ x_star - y) ** 2) / (2 * N) + 0.5 * lam * x_star @ x_star)
    ref = ws.reference
    assert ref["success"] and ref["convexity"] == "convex" and "(the model is convex)" in ref["note"]
    # Tolerance: f is mu-strongly convex (mu = smallest eigenvalue of H), so
    # 0 <= f(x_ref) - f* <= ||grad f(x_ref)||^2/(2 mu) (standard strong-convexity bound, from memory);
    # plus 1e-12 relative for float64 rounding in two different summation orders.
    mu = float(np.linalg.eigvalsh(H)[0])
    slack = 1e-12 * abs(f_star)
    assert f_star - slack <= ws.loss_ref <= f_star + ref["grad_norm_sq"] / (2 * mu) + slack
    np.testing.assert_allclose(ws.loss_ref, f_star, rtol=1e-10)  # the bound above is far below this
    assert ws.target == 1e-6 and ws.target_kind == "loss_gap"


def test_start_point_that_already_meets_the_loss_gap_is_an_input_error(tmp_path):
    _data(tmp_path, seed=3, binary=False)
    with pytest.raises(InputError, match=r"target\.loss_gap: the start point already meets it"):
        open_job(load_job(_job(tmp_path, model="least_squares", reg=0.01, target="{loss_gap: 1e6}")))


# --- the engine's stopping rule --------------------------------------------------------------


def _logistic_reference(X, b, lam, x0, step, gap_of, rounds):
    """Plain numpy GD on f(x) = (1/N) sum log(1 + exp(-b_j a_j.x)) + lam sum x_k^2/(1 + x_k^2)."""
    N = len(b)
    A = X * b[:, None]
    x, losses = x0.copy(), []
    for _ in range(rounds):
        u = A @ x
        losses.append(float(np.mean(np.logaddexp(0.0, -u)) + lam * np.sum(x * x / (1 + x * x))))
        if gap_of(losses[-1]) <= 0:
            break
        grad = -A.T @ (1.0 / (1.0 + np.exp(u))) / N + lam * 2 * x / (1 + x * x) ** 2
        x = x - step * grad
    return np.array(losses)


def test_gd_stops_at_the_first_round_within_the_loss_gap(tmp_path):
    _data(tmp_path, seed=5, binary=True)
    lam, delta = 0.05, 1e-4
    ws = open_job(load_job(_job(tmp_path, model="logistic_nonconvex", reg=lam, target=f"{{loss_gap: {delta}}}")))
    assert ws.reference["convexity"] == "non-convex" and "local minimum" in ws.reference["note"]
    d = np.load(tmp_path / "data.npz")
    X, b = d["X"], np.where(d["y"] > 0, 1.0, -1.0)
    # L of the pooled loss: lambda_max(X^T X)/(4N) + 2 lam (logistic Hessian <= X^T X/(4N); the
    # regulariser's second derivative lies in [-lam/2, 2 lam]; from memory), eigenvalue by numpy.
    L = float(np.linalg.eigvalsh(X.T @ X)[-1]) / (4 * len(b)) + 2 * lam
    ref = _logistic_reference(X, b, lam, ws.x0, 1.0 / L, lambda f: f - ws.loss_ref - delta, 20000)
    K = len(ref) - 1  # the first round with f(x^K) - f_ref <= delta
    gaps = ref - ws.loss_ref
    assert 20 < K < 20000 and gaps[K] <= delta < gaps[K - 1] * (1 - 1e-6)  # not a rounding tie
    comp = make_compressor({"name": "identity"}, ws.problem.dim, n_workers=ws.problem.n_workers)
    (run,) = simulate(ws.problem, method="gd", compressor=comp, step_size=1.0 / L, seeds=[0], target=ws.target,
                      max_rounds=20000, x0=ws.x0, loss_ref=ws.loss_ref)
    assert run.status == "reached" and run.rounds == K
    # Same iterates in another summation order: agreement to float64 rounding over K rounds.
    np.testing.assert_allclose(run.loss, ref, rtol=1e-9)
    np.testing.assert_allclose(run.progress, gaps, rtol=1e-6, atol=1e-12)
    assert run.loss_rounds.tolist() == list(range(K + 1))
    # The gradient target is untouched: without loss_ref the metric is ||grad f||^2.
    (plain,) = simulate(ws.problem, method="gd", compressor=comp, step_size=1.0 / L, seeds=[0], target=1e-300,
                        max_rounds=5, x0=ws.x0)
    assert plain.progress is plain.grad_norm_sq and plain.status == "budget"


# --- the job keys --------------------------------------------------------------------------------


def _mapping(target) -> dict:
    return {"data": "data.npz", "model": "least_squares", "workers": {"count": 2, "split": "iid"},
            "target": target, "budget": {"max_rounds": 10}}


@pytest.mark.parametrize("target, message", [
    ({"grad_norm_sq": 1e-3, "loss_gap": 1e-3}, "target: give exactly one of grad_norm_sq"),
    ({}, "target: give grad_norm_sq (stop at ||grad f(x)||^2 <= eps) or loss_gap"),
    ({"relative": False}, "target.grad_norm_sq: required"),
    ({"loss_gap": 1e-3, "relative": False}, "target.relative: only used with target.grad_norm_sq"),
    ({"loss_gap": 0}, "target.loss_gap: must be a number > 0, got 0"),
    ({"loss_gap": "abc"}, "target.loss_gap: must be a number > 0, got 'abc'"),
])
def test_target_kind_errors_name_the_key(tmp_path, target, message):
    _data(tmp_path, seed=1, binary=False)
    with pytest.raises(InputError) as info:
        parse_job(_mapping(target), base_dir=tmp_path, source="job.yaml")
    assert any(p.startswith(message) for p in info.value.problems), info.value.problems
    assert info.value.exit_code == 2


def test_loss_gap_target_parses_absolute(tmp_path):
    _data(tmp_path, seed=1, binary=False)
    job = parse_job(_mapping({"loss_gap": "1e-3"}), base_dir=tmp_path, source="job.yaml")
    assert job.target == TargetSpec(grad_norm_sq=None, relative=False, loss_gap=1e-3)
    assert job.target.kind == "loss_gap"
    assert parse_job(_mapping({"grad_norm_sq": 1e-3}), base_dir=tmp_path, source="j").target.kind == "grad_norm_sq"


# --- score and pruning ------------------------------------------------------------------------


def _traj(status: str, bits: float, gaps, grad_norm_sq) -> Trajectory:
    from dataclasses import MISSING, fields

    gaps = np.asarray(gaps, float)
    given = dict(seed=0, status=status, rounds=len(gaps) - 1, uplink_bits=bits, downlink_bits=0.0,
                 grad_norm_sq=np.asarray(grad_norm_sq, float), uplink_curve=np.linspace(0, bits, len(gaps)),
                 loss_rounds=np.arange(len(gaps)), loss=gaps + 1.0, x=np.zeros(2), progress=gaps)
    counters = {f.name: 0.0 for f in fields(Trajectory)  # e.g. gradient counts: not used by score
                if f.name not in given and f.default is MISSING and f.default_factory is MISSING}
    return Trajectory(**given, **counters)


def test_score_penalises_a_miss_by_its_best_loss_gap():
    # The rule is ours (documented in bittune.search.score, no outside source):
    # reached -> bits; missed -> max(bits, cap) x (2 + log10(best gap / delta)); diverged -> twice that.
    delta, cap = 1e-3, 5000.0
    tiny_gn = [1e-30, 1e-30, 1e-30]  # below any target: the gradient must not decide a loss-gap score
    reached = _traj("reached", 1200.0, [1.0, 0.1, 5e-4], tiny_gn)
    near = _traj("budget", 8000.0, [1.0, 1e-2, 2e-2], tiny_gn)
    far = _traj("stalled", 3000.0, [1.0, 0.5, 0.9], tiny_gn)
    gone = _traj("diverged", 100.0, [1.0, 0.1, np.nan], tiny_gn)
    value, per_seed = score([reached, near, far, gone], target=delta, cap=cap)
    expected = [1200.0, 8000.0 * (2 + math.log10(1e-2 / delta)), cap * (2 + math.log10(0.5 / delta)),
                2 * cap * (2 + math.log10(0.1 / delta))]
    np.testing.assert_allclose(per_seed, expected, rtol=1e-12)  # exact arithmetic up to rounding
    assert value == pytest.approx(np.mean(expected), rel=1e-12)
    assert per_seed[2] / cap > per_seed[1] / 8000.0  # farther from the target: larger penalty factor


class _Trial:
    def __init__(self):
        self.reports = []

    def report(self, value, step):
        self.reports.append((step, value))

    def should_prune(self):
        return False


def test_prune_monitor_reports_log_distance_of_the_best_gap():
    delta, trial = 1e-3, _Trial()
    mon = _PruneMonitor(trial, 2, delta, cost_at=lambda k, bits: bits, start=100.0)
    assert not mon(1, np.array([0, 1]), np.array([10.0, 10.0]), np.array([1e-1, 1e1]))  # below the checkpoint
    mon(2, np.array([0, 1]), np.array([200.0, 200.0]), np.array([1.0, 1e-2]))
    # best gaps so far: 1e-1 and 1e-2 -> mean log10(gap/delta) = (2 + 1)/2
    assert trial.reports == [(0, pytest.approx(1.5, rel=1e-12))]
    mon(3, np.array([1]), np.array([400.0]), np.array([-1e-5]))  # a gap below 0 counts as 1e-12 delta
    assert trial.reports[1] == (1, pytest.approx((2 - 12) / 2, rel=1e-12))


# --- tune and replay through the command line -------------------------------------------------------


@pytest.mark.slow
def test_tune_cli_writes_the_loss_gap_target_and_f_ref(tmp_path, capsys, monkeypatch):
    _data(tmp_path, seed=7, rows=200, binary=True)
    job = _job(tmp_path, model="logistic_nonconvex", reg=0.05, target="{loss_gap: 1e-3}", rounds=3000,
               extra="search: {methods: [gd, marina], compressors: [rand_k], seeds: 2, validation_seeds: 3,"
                     " finalists: 2, backoff_steps: 1}\n")
    out = tmp_path / "tuned.yaml"
    code = main(["tune", str(job), "-o", str(out), "--trials", "6", "--json"])
    captured = capsys.readouterr()
    assert code in (0, 4)
    doc = json.loads(captured.out)
    assert "f_ref = " in captured.err and "local minimum found by L-BFGS-B (the model is non-convex)" in captured.err
    cfg = load_config(out)
    target, constants = cfg.extra["target"], cfg.extra["constants"]
    assert target["kind"] == "loss_gap" and target["loss_gap"] == 1e-3 and target["absolute"] == 1e-3
    f_ref = constants["f_ref"]
    assert f_ref["value"] == target["f_ref"] and f_ref["convexity"] == "non-convex" and f_ref["iterations"] >= 1
    assert doc["expected"]["target_loss_gap"] == 1e-3 and "target_grad_norm_sq" not in doc["expected"]
    # Reference for f_ref: scipy.optimize.minimize(L-BFGS-B) called here directly on the pooled loss.
    from scipy.optimize import minimize

    ws = open_job(load_job(job))  # the same problem (rebuilt from the job)
    res = minimize(lambda x: (ws.problem.full_loss(x), ws.problem.full_grad(x)), ws.x0, jac=True,
                   method="L-BFGS-B", options={"maxiter": 10_000, "gtol": 1e-10, "ftol": 1e-15})
    np.testing.assert_allclose(f_ref["value"], res.fun, rtol=1e-9)  # same local minimum, solver noise only
    summary = json.loads((tmp_path / "tuned.run" / "summary.json").read_text())
    assert summary["target"]["kind"] == "loss_gap"
    assert all(r["predicted_rounds"] is None for r in summary["theory"])
    assert "loss_gap" in summary["curves"]["winner"][0]
    assert "f − f_ref ≤ 0.001" in (tmp_path / "tuned.run" / "report" / "report.md").read_text()
    # a worker process takes f_ref from the study's probe constants instead of running L-BFGS-B again
    import optuna

    import bittune.workspace
    from bittune.search import open_storage
    from bittune.tune import worker_main

    prov = dict(cfg.extra["provenance"])
    prov["storage"] = str(tmp_path / prov["storage"])  # written relative to the config's folder
    study = optuna.load_study(study_name=prov["study"], storage=open_storage(prov["storage"]))
    assert study.user_attrs["constants"]["extra"]["f_ref"]["value"] == f_ref["value"]

    def no_solver(*args, **kwargs):
        raise AssertionError("f_ref recomputed in a worker")

    with monkeypatch.context() as m:
        m.setattr(bittune.workspace, "reference_loss", no_solver)
        assert worker_main(str(job), prov["storage"], prov["study"], budget=6) == 0  # budget already spent
    # replay reuses the config's f_ref (same job and data) and reports the final gaps
    assert stored_reference(cfg, load_job(job))["value"] == f_ref["value"]
    code = main(["replay", str(out), "--job", str(job), "--seeds", "2", "--json"])
    rep = json.loads(capsys.readouterr().out)
    assert rep["f_ref"] == f_ref["value"] and len(rep["final_loss_gap"]) == 2
    assert all(g <= 1e-3 for g, s in zip(rep["final_loss_gap"], rep["status"]) if s == "reached")
    # retune on the same data: f_ref found again, equal to the previous one (same deterministic solver run)
    from bittune.retune import retune

    result = retune(job, previous=out, output=tmp_path / "retuned.yaml", trials=3)
    assert result.exit_code in (0, 4, 5)
    assert result.config["retune"]["f_ref"]["previous"] == pytest.approx(f_ref["value"], rel=1e-12, abs=0)
    assert result.config["retune"]["f_ref"]["current"] == pytest.approx(f_ref["value"], rel=1e-12, abs=0)
    # another data file: the stored f_ref no longer applies
    _data(tmp_path, seed=8, rows=200, binary=True)
    assert stored_reference(cfg, load_job(job)) is None


def test_tune_cli_on_a_malformed_target_exits_2_and_writes_nothing(tmp_path, capsys):
    _data(tmp_path, seed=7, rows=200, binary=True)
    job = _job(tmp_path, model="logistic_nonconvex", reg=0.05, target="{loss_gap: 1e-3, relative: true}")
    out = tmp_path / "tuned.yaml"
    assert main(["tune", str(job), "-o", str(out), "--trials", "6"]) == 2
    err = capsys.readouterr().err
    assert "target.relative: only used with target.grad_norm_sq" in err
    assert not out.exists() and not (tmp_path / "tuned.run").exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["data.npz", "job.yaml"]
