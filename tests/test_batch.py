"""Batched trials (bittune.batch): several trials in one engine batch give the values each gets alone.

The outside reference is the trial run alone through the same engine: counter-based random
numbers make a trajectory's draws independent of its batch (DEVELOPERS.md, "Randomness"), so a
trial's trajectories in a shared batch must match, value for value, the same trial simulated by
itself. Tolerances: only the batched matrix products differ (BLAS may block a (B, d) product
differently for another B), which changes results in the last bits; 1e-9 relative on bits
and squared gradient norms after thousands of rounds leaves room for that rounding (about
1e-16 per operation, amplified at most linearly over a few thousand contracting rounds) and
nothing else (common practice, no source).
"""

from __future__ import annotations

import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import optuna
import pytest
from optuna.trial import TrialState

from bittune.compressors import PerTrajectory, make_compressor
from bittune.search import Objective, Space, open_storage, run_trials
from bittune.simulate import absolute_target, simulate
from conftest import journal_study

ROOT = Path(__file__).resolve().parents[1]
RTOL = 1e-9  # see the module docstring


@pytest.mark.parametrize("name,settings", [("rand_k", (2, 5, 30)), ("dither", (1, 3)), ("top_k", (1, 7))])
def test_per_trajectory_compressor_equals_each_part_alone(name, settings):
    dim, n = 30, 4
    rng = np.random.default_rng(7)
    v = rng.standard_normal((2 * len(settings), n, dim))
    keys = np.arange(v.shape[0], dtype=np.uint64) * 7919 + 13
    param = "levels" if name == "dither" else "k"
    parts = [make_compressor({"name": name, param: s}, dim) for s in settings]
    assign = np.tile(np.arange(len(settings)), 2)
    mixed = PerTrajectory(parts, assign)
    out, bits = mixed.compress(v, keys, 3)
    for b in range(v.shape[0]):
        alone, alone_bits = parts[assign[b]].compress(v[b:b + 1], keys[b:b + 1], 3)
        np.testing.assert_array_equal(out[b], alone[0])
        np.testing.assert_array_equal(bits[b], alone_bits[0])
    np.testing.assert_array_equal(mixed.omega, [parts[a].omega for a in assign])
    mixed.keep(np.array([1, 2]))
    np.testing.assert_array_equal(mixed.assign, assign[[1, 2]])


@pytest.mark.parametrize("method,params", [
    ("marina", {"sync_probability": [0.05, 0.3]}),
    ("diana", {"shift_rate": [0.02, 0.2]}),
    ("ef21", {}),
    ("pp_marina", {"sync_probability": [0.1, 0.4], "clients": [2, 5]}),
])
def test_mixed_densities_in_one_batch_equal_separate_runs(cancer, method, params):
    d = cancer.dim
    _, L = cancer.smoothness_bounds()
    target = absolute_target(cancer, np.zeros(d), grad_norm_sq=1e-3, relative=True)
    comp_name = "top_k" if method == "ef21" else "rand_k"
    ks, steps, seeds = (2, 9), (0.5 / L, 1.5 / L), [11, 12, 13]
    parts = [make_compressor({"name": comp_name, "k": k}, d) for k in ks]
    S = len(seeds)
    together = simulate(cancer, method=method, compressor=PerTrajectory(parts, np.repeat([0, 1], S)),
                        step_size=np.repeat(steps, S), seeds=seeds * 2, target=target, max_rounds=1500,
                        params={k: np.repeat(v, S) for k, v in params.items()}, stall_window=100)
    for i in range(2):
        alone = simulate(cancer, method=method, compressor=parts[i], step_size=steps[i], seeds=seeds,
                         target=target, max_rounds=1500, params={k: v[i] for k, v in params.items()},
                         stall_window=100)
        for a, b in zip(alone, together[i * S:(i + 1) * S]):
            assert (a.status, a.rounds) == (b.status, b.rounds)
            assert b.uplink_bits == pytest.approx(a.uplink_bits, rel=RTOL)
            np.testing.assert_allclose(b.grad_norm_sq, a.grad_norm_sq, rtol=RTOL)


def _objective(problem, spec, seeds):
    from bittune.constants import Constants

    n, d = problem.n_workers, problem.dim
    per, L = problem.smoothness_bounds()  # closed-form bounds stand in for the probe here
    consts = Constants(n_workers=n, dim=d, L=L, L_workers=per, L_plus=L, L_pm=0.1 * L, delta0=0.7,
                       grad_sq0=1.0, local_grad_sq0=1.0, heterogeneity0=0.1)
    target = absolute_target(problem, np.zeros(d), grad_norm_sq=1e-3, relative=True)
    space = Space(spec, consts, target=target)
    return Objective(problem=problem, space=space, x0=np.zeros(d), target=target, max_rounds=1500,
                     max_bits=None, seeds=seeds)


def test_batched_trials_give_the_values_of_trials_run_one_at_a_time(cancer):
    """The same 12 enqueued trials (three methods, mixed densities and multipliers), no pruning:
    batched (6 at a time) and one at a time give equal runs and values per trial."""
    from dataclasses import replace

    from bittune.job import SECTIONS, SearchSpec

    defaults = {k: p.default for k, p in SECTIONS["search"].items()}
    spec = SearchSpec(**{**defaults, "methods": ["marina", "diana", "ef21"], "compressors": ["rand_k", "top_k"],
                         "pruner": "none", "bits_cap_factor": 1e12, "seeds": 2})
    rng = np.random.default_rng(3)
    fixed = []
    for j in range(12):
        method = ["marina", "diana", "ef21"][j % 3]
        comp = "top_k" if method == "ef21" else "rand_k"
        p = {"method": method, f"{method}.compressor": comp, f"{comp}.k": int(rng.integers(1, 12)),
             # EF21 and DIANA draw their steps over their search anchors 1/L and 1/(2L) (docs/theory.md
             # §2.9 and §2.3): x0.05 .. x2 of it
             (f"{method}.step_mult" if method == "marina" else f"{method}.anchor_mult"):
             float(rng.uniform(1, 30)) if method == "marina" else float(rng.uniform(0.05, 2))}
        if method == "marina":
            p["marina.sync_mult"] = float(rng.uniform(0.5, 3))
        if method == "diana":
            p["diana.shift_mult"] = float(rng.uniform(0.5, 3))
        fixed.append(p)
    values = {}
    for batch in (1, 6):
        obj = _objective(cancer, replace(spec, trial_batch=batch), seeds=[5, 6])
        study = optuna.create_study(sampler=optuna.samplers.TPESampler(seed=0), pruner=optuna.pruners.NopPruner())
        for p in fixed:
            study.enqueue_trial(p)
        assert run_trials(study, obj, budget=len(fixed)) == len(fixed)
        trials = sorted(study.get_trials(states=(TrialState.COMPLETE,)), key=lambda t: t.number)
        assert len(trials) == len(fixed)
        values[batch] = {tuple(sorted(t.params.items())): t for t in trials}
    assert values[1].keys() == values[6].keys()
    reached = 0
    for key, alone in values[1].items():
        batched = values[6][key]
        assert batched.user_attrs["status"] == alone.user_attrs["status"], key
        assert batched.user_attrs["rounds"] == alone.user_attrs["rounds"], key
        np.testing.assert_allclose(batched.user_attrs["bits"], alone.user_attrs["bits"], rtol=RTOL)
        # A miss's penalty starts from the study's cost cap, which a batch reads once at its start
        # (bittune.batch): only trials that reached on every seed have cap-free values.
        if alone.user_attrs["reached"] == 2:
            reached += 1
            assert batched.value == pytest.approx(alone.value, rel=RTOL), key
    assert reached >= 6  # most of these settings reach: the value check is not vacuous


def test_a_batch_tightens_its_cap_as_its_trials_reach(cancer):
    """A fast and a slow MARINA trial in one batch (same Rand-K, bits cap factor 3): once the fast
    one has reached on both seeds at a mean of b bits, the slow one stops at 3 b, exactly as the
    slow trial alone under a bit cap of 3 b (same rounds, bits, status bits_cap), and its penalty
    starts from that cap (bittune.batch; the reference is the engine's own bit cap and
    bittune.search.score)."""
    from dataclasses import replace

    from bittune.job import SECTIONS, SearchSpec
    from bittune.search import score

    defaults = {k: p.default for k, p in SECTIONS["search"].items()}
    spec = SearchSpec(**{**defaults, "methods": ["marina"], "compressors": ["rand_k"], "pruner": "none",
                         "bits_cap_factor": 3.0, "seeds": 2, "trial_batch": 2})
    fast = {"method": "marina", "marina.compressor": "rand_k", "rand_k.k": 4, "marina.step_mult": 3.0,
            "marina.sync_mult": 1.0}
    slow = dict(fast, **{"marina.step_mult": 0.5})
    obj = _objective(cancer, spec, seeds=[5, 6])
    study = optuna.create_study(sampler=optuna.samplers.TPESampler(seed=0), pruner=optuna.pruners.NopPruner())
    study.enqueue_trial(fast)
    study.enqueue_trial(slow)
    assert run_trials(study, obj, budget=2) == 2
    a, b = sorted(study.get_trials(states=(TrialState.COMPLETE,)), key=lambda t: t.number)
    assert a.user_attrs["reached"] == 2 and b.user_attrs["reached"] == 0
    cap = 3.0 * a.value
    plan = obj.plan(optuna.trial.FixedTrial(slow), None)
    alone = simulate(cancer, method="marina", compressor=plan.compressor, step_size=plan.candidate.step_size,
                     seeds=[5, 6], target=obj.target, max_rounds=obj.max_rounds, x0=obj.x0,
                     params=plan.candidate.params(), max_bits_per_worker=cap, stall_window=plan.window)
    assert [r.status for r in alone] == ["bits_cap", "bits_cap"]  # the slow setting is cut by the cap
    assert b.user_attrs["status"] == ["bits_cap", "bits_cap"]
    assert b.user_attrs["rounds"] == [r.rounds for r in alone]
    np.testing.assert_allclose(b.user_attrs["bits"], [r.uplink_bits for r in alone], rtol=RTOL)
    assert b.value == pytest.approx(score(alone, target=obj.target, cap=cap)[0], rel=1e-6)
    # A batch without a finished trial keeps the study's cap: the slow trial alone in its batch runs on.
    study2 = optuna.create_study(sampler=optuna.samplers.TPESampler(seed=0), pruner=optuna.pruners.NopPruner())
    study2.enqueue_trial(slow)
    assert run_trials(study2, _objective(cancer, replace(spec, trial_batch=2), seeds=[5, 6]), budget=1) == 1
    assert "bits_cap" not in study2.trials[0].user_attrs["status"]


def test_a_pruned_trial_leaves_its_batch_mates_running(cancer):
    """Per-trajectory stopping: a monitor that prunes one trial stops only that trial's trajectories."""
    from bittune.batch import _SplitMonitor

    class Once:
        def __init__(self, prune):
            self.prune, self.calls = prune, 0

        def __call__(self, k, index, bits, metric):
            self.calls += 1
            return self.prune and k >= 5

    d = cancer.dim
    _, L = cancer.smoothness_bounds()
    monitors = [Once(False), Once(True), Once(False)]
    runs = simulate(cancer, method="gd", compressor=make_compressor("identity", d), step_size=1.0 / L,
                    seeds=[1, 2, 1, 2, 1, 2], target=0.0, max_rounds=40, monitor=_SplitMonitor(monitors, 2))
    assert [r.status for r in runs] == ["budget", "budget", "stopped", "stopped", "budget", "budget"]
    assert [r.rounds for r in runs[2:4]] == [5, 5]
    assert monitors[1].calls == 5 and monitors[0].calls == 40


def _complete(run_dir: Path) -> dict[int, float]:
    try:
        study = journal_study(run_dir)
        if study is None:
            return {}
        return {t.number: t.value for t in study.get_trials(deepcopy=False, states=(TrialState.COMPLETE,))}
    except Exception:  # the journal may be mid-write while the run goes on; read again later
        return {}


@pytest.mark.slow
def test_a_kill_during_a_batch_loses_no_finished_trial(tmp_path):
    """SIGKILL once trials have finished (observed in the storage, not after a sleep), then rerun:
    the finished trials survive unchanged, the killed batch's trials are failed and re-asked. A
    refilling batch tells each trial as it finishes, so the kill lands inside the first engine batch
    (4 trials running, 2 told) and still loses none of them."""
    subprocess.run([sys.executable, str(ROOT / "examples/frost/make_data.py"), "--out", str(tmp_path / "st.svm"),
                    "--nights", "60"], check=True, capture_output=True)
    job = tmp_path / "job.yaml"
    job.write_text("""
data: st.svm
model: logistic_nonconvex
regularization: 0.01
workers: {count: 8, split: iid, seed: 0}
target: {grad_norm_sq: 1e-4, relative: true}
budget: {max_rounds: 3000}
search: {methods: [marina, diana], compressors: [rand_k], trials: 24, seeds: 2, trial_batch: 4}
""")
    out = tmp_path / "c.yaml"
    cmd = [sys.executable, "-m", "bittune.cli", "tune", str(job), "-o", str(out)]
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    before: dict[int, float] = {}
    deadline = time.monotonic() + 300  # generous: a loaded 2-core machine
    while time.monotonic() < deadline and proc.poll() is None:
        before = _complete(tmp_path / "c.run")
        if len(before) >= 2:  # told inside a running batch (its slots refilled since)
            break
        time.sleep(0.1)
    assert proc.poll() is None, "the run finished before 2 trials were seen in its storage"
    assert len(before) >= 2, f"only {len(before)} finished trials within the deadline"
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    rerun = subprocess.run(cmd, capture_output=True, text=True)
    assert rerun.returncode == 0, rerun.stderr
    storage = open_storage(str(tmp_path / "c.run" / "study.journal"))
    study = optuna.load_study(study_name=optuna.get_all_study_summaries(storage)[0].study_name, storage=storage)
    trials = {t.number: t for t in study.get_trials(deepcopy=False)}
    for number, value in before.items():
        assert trials[number].state == TrialState.COMPLETE and trials[number].value == value
    assert sum(t.state in (TrialState.COMPLETE, TrialState.PRUNED) for t in trials.values()) == 24
    assert not [t for t in trials.values() if t.state == TrialState.RUNNING]


def test_a_numerical_fault_in_a_batch_fails_only_its_trial(cancer, monkeypatch):
    """The batch that faults is re-run trial by trial: only the trial that faults alone fails."""

    import bittune.batch as batch
    from bittune.job import SECTIONS, SearchSpec

    real = batch.simulate

    def faulty(problem, **kw):
        if np.any(np.isclose(np.atleast_1d(kw["step_size"]), bad_step)):
            raise FloatingPointError("overflow encountered in multiply")
        return real(problem, **kw)

    defaults = {k: p.default for k, p in SECTIONS["search"].items()}
    spec = SearchSpec(**{**defaults, "methods": ["marina"], "compressors": ["rand_k"], "seeds": 2,
                         "trial_batch": 4})
    obj = _objective(cancer, spec, seeds=[5, 6])
    study = optuna.create_study(sampler=optuna.samplers.TPESampler(seed=0), pruner=optuna.pruners.NopPruner())
    mults = (2.0, 3.0, 5.0, 7.0)
    for m in mults:
        study.enqueue_trial({"method": "marina", "marina.compressor": "rand_k", "rand_k.k": 3,
                             "marina.step_mult": m, "marina.sync_mult": 1.0})
    bad_step = obj.space.candidate("marina", {"name": "rand_k", "k": 3}, step_mult=5.0).step_size
    monkeypatch.setattr(batch, "simulate", faulty)
    assert run_trials(study, obj, budget=3) == 3
    trials = sorted(study.get_trials(deepcopy=False), key=lambda t: t.number)
    failed = [t for t in trials if t.state == TrialState.FAIL]
    assert [t.params["marina.step_mult"] for t in failed] == [5.0]
    assert "overflow" in failed[0].user_attrs["failed_reason"]
    assert [t.state for t in trials[:4]].count(TrialState.COMPLETE) == 3


@pytest.mark.parametrize("batch,jobs,budget,expected", [
    (8, 2, 8, 4),  # two processes share 8 trials: 4 each, not 8 in the first and none in the second
    (8, 2, 60, 8),  # a large budget keeps the asked batch size
    (8, 1, 8, 8),  # one process: its share is the whole budget
    (8, 3, 10, 4),  # ceil(10 / 3)
    (4, 8, 5, 1),  # fewer trials than processes: one trial at a time
    (1, 2, 60, 1),  # the default stays one at a time
])
def test_batch_never_takes_more_than_its_process_share(batch, jobs, budget, expected, monkeypatch):
    """search.batch_size caps search.trial_batch at ceil(budget / jobs) (common practice, no
    source: an even split of the budget over the processes), and run_trials hands that size on."""
    from types import SimpleNamespace

    import bittune.batch
    from bittune.search import batch_size

    spec = SimpleNamespace(trial_batch=batch, jobs=jobs)
    assert batch_size(spec, budget) == expected
    seen = []
    monkeypatch.setattr(bittune.batch, "run_refilling",
                        lambda study, obj, *, budget, size, poll: seen.append(size) or 0)
    objective = SimpleNamespace(space=SimpleNamespace(spec=spec))
    if expected > 1:
        run_trials(None, objective, budget=budget)
        assert seen == [expected]
