"""The bits-versus-seconds front (objective: front, prefer) and the transfer check on a data resample."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
import yaml
from scipy import stats

from bittune.cli import main
from bittune.front import FRONT_SIZE, choose, non_dominated, thin
from bittune.select import Evaluation, pick
from bittune.transfer import RESAMPLE_KEY, bootstrap_parts
from conftest import Quiet

ROOT = Path(__file__).resolve().parents[1]


def _dominated_brute_force(points: list[tuple[float, float]], i: int) -> bool:
    """Is point i dominated (<= in both costs, < in one) by another? Pairwise, as the definition reads
    (Pareto dominance for minimisation; common practice, no source)."""
    a = points[i]
    return any(b[0] <= a[0] and b[1] <= a[1] and (b[0] < a[0] or b[1] < a[1]) for j, b in enumerate(points) if j != i)


def test_non_dominated_matches_a_pairwise_check():
    rng = np.random.default_rng(7)
    for _ in range(50):
        n = int(rng.integers(1, 12))
        # integer costs make ties (equal bits, equal seconds, duplicates) frequent
        pts = [tuple(map(float, rng.integers(0, 6, size=2))) for _ in range(n)]
        mask = non_dominated(np.array(pts))
        assert mask.tolist() == [not _dominated_brute_force(pts, i) for i in range(n)]


def test_prefer_picks_the_stated_point():
    # Hand-made front of (bits, seconds): products 1000x9 = 9000, 2000x4 = 8000, 4000x2.5 = 10000, 9000x1 = 9000.
    pts = np.array([[1000.0, 9.0], [2000.0, 4.0], [4000.0, 2.5], [9000.0, 1.0]])
    assert choose(pts, "bits") == 0
    assert choose(pts, "seconds") == 3
    assert choose(pts, "balanced") == 1  # the least product bits x seconds (bittune.front docstring)
    # balanced does not depend on the units: seconds in milliseconds, bits in bytes
    assert choose(pts * np.array([1 / 8, 1000.0]), "balanced") == 1
    # ties: bits breaks by seconds, seconds by bits
    assert choose(np.array([[5.0, 3.0], [5.0, 2.0]]), "bits") == 1
    assert choose(np.array([[6.0, 2.0], [5.0, 2.0]]), "seconds") == 1


def test_thin_keeps_both_ends_and_the_chosen_point():
    pts = np.array([[float(b), 100.0 / b] for b in range(1, 12)])
    for keep in range(len(pts)):
        idx = thin(pts, keep=keep)
        assert len(idx) == FRONT_SIZE and keep in idx and 0 in idx and len(pts) - 1 in idx
        assert idx == sorted(idx)  # sorted by bits, which grow with the index here


def test_bootstrap_rows_follow_numpys_generator_with_the_same_seed():
    parts = [np.arange(0, 40), np.arange(40, 47), np.arange(47, 130)]
    got = bootstrap_parts(parts, seed=3)
    # The documented seed semantics (bittune.transfer): one child of SeedSequence(seed, spawn_key=(KEY,)) per
    # worker, each drawing integers(0, m_i, size=m_i) (numpy.random.Generator.integers, numpy's own reference).
    children = np.random.default_rng(np.random.SeedSequence(3, spawn_key=(RESAMPLE_KEY,))).spawn(3)
    for p, g, rng in zip(parts, got, children):
        assert np.array_equal(g, np.sort(p[rng.integers(0, len(p), size=len(p))]))
        assert len(g) == len(p) and np.isin(g, p).all()  # same size, rows of its own shard only
    assert not np.array_equal(got[0], bootstrap_parts(parts, seed=4)[0])


def test_bootstrap_counts_are_multinomial():
    """A shard of m rows, grouped into 50 blocks of m/50: the resample's counts per block are
    Multinomial(m, 1/50), so Pearson's chi-square has 49 degrees of freedom (scipy.stats.chisquare;
    expected count 100 per block, well above the usual 5). One test at alpha = 1e-3: a correct
    resampler fails it once in a thousand seeds."""
    m, blocks = 5000, 50
    parts = [np.arange(m), np.arange(m, 2 * m)]
    for seed in (0, 1):
        for w, rows in enumerate(bootstrap_parts(parts, seed=seed)):
            counts = np.bincount((rows - w * m) // (m // blocks), minlength=blocks)
            assert stats.chisquare(counts).pvalue > 1e-3


def _eval(bits: list[float], reached: list[bool], seconds: list[float] | None = None) -> Evaluation:
    runs = [SimpleNamespace(uplink_bits=b, reached=r, rounds=10, seconds=s)
            for b, r, s in zip(bits, reached, seconds or bits)]
    network = None if seconds is None else SimpleNamespace(seconds=lambda run: run.seconds)
    return Evaluation(candidate=None, runs=runs, network=network)


def test_a_finalist_that_misses_on_the_resample_loses():
    cheap = _eval([100.0, 110.0], [True, True])  # the least cost on the sample...
    dear = _eval([300.0, 310.0], [True, True])
    resampled = [_eval([120.0, 900.0], [True, False]), _eval([320.0, 330.0], [True, True])]  # ...misses there
    assert pick([cheap, dear], None)[0] == 0
    assert pick([cheap, dear], resampled)[0] == 1
    # no finalist passes on the resample: the sample's ranking stands
    both_miss = [_eval([1.0, 1.0], [False, True]), _eval([1.0, 1.0], [True, False])]
    assert pick([cheap, dear], both_miss)[0] == 0


def test_on_a_front_a_point_that_misses_on_the_resample_loses():
    a = _eval([1000.0] * 2, [True] * 2, [9.0] * 2)
    b = _eval([2000.0] * 2, [True] * 2, [4.0] * 2)  # balanced's pick (least product)
    c = _eval([4000.0] * 2, [True] * 2, [2.5] * 2)
    d = _eval([5000.0] * 2, [True] * 2, [5.0] * 2)  # dominated by b and c
    passes = _eval([1.0] * 2, [True] * 2, [1.0] * 2)
    fails = _eval([1.0] * 2, [True, False], [1.0] * 2)
    chosen, front = pick([a, b, c, d], [passes] * 4, prefer="balanced")
    assert (chosen, sorted(front)) == (1, [0, 1, 2])
    chosen, front = pick([a, b, c, d], [passes, fails, passes, passes], prefer="balanced")
    assert (chosen, sorted(front)) == (0, [0, 1, 2])  # a: 9000 < c: 10000 among those that pass


def test_front_points_with_equal_costs_count_once():
    # Two finalists tied on (mean bits, mean seconds) are one point of the front (a non-dominated set is a set
    # of cost vectors; common practice, no source); the one that passes on the resample stands for both.
    a = _eval([1000.0] * 2, [True] * 2, [9.0] * 2)
    a_twin = _eval([1000.0] * 2, [True] * 2, [9.0] * 2)
    c = _eval([4000.0] * 2, [True] * 2, [2.5] * 2)
    passes = _eval([1.0] * 2, [True] * 2, [1.0] * 2)
    fails = _eval([1.0] * 2, [True, False], [1.0] * 2)
    assert sorted(pick([a, a_twin, c], [passes] * 3, prefer="bits")[1]) == [0, 2]
    chosen, front = pick([a, a_twin, c], [fails, passes, passes], prefer="bits")
    assert (chosen, sorted(front)) == (1, [1, 2])


# ------------------------------------------------------------------------- end to end
@pytest.fixture(scope="module")
def front_run(tmp_path_factory):
    """A small front tune of the demo scenario, batched trials, resumed once with a larger budget."""
    from bittune.tune import tune

    folder = tmp_path_factory.mktemp("front")
    subprocess.run([sys.executable, str(ROOT / "examples/frost/make_data.py"), "--out", str(folder / "stations.svm"),
                    "--nights", "60"], check=True, capture_output=True)
    job = yaml.safe_load((ROOT / "examples/frost/job.yaml").read_text())
    job["search"].update(trials=10, jobs=1, trial_batch=4, validation_seeds=3)
    job.update(objective="front", prefer="balanced")
    path = folder / "job.yaml"
    path.write_text(yaml.safe_dump(job))
    out = folder / "config.yaml"
    tune(path, output=out, trials=6, progress=Quiet())
    res = tune(path, output=out, progress=Quiet())  # resumes the study: 4 more trials
    return SimpleNamespace(folder=folder, job=path, out=out, res=res)


@pytest.mark.slow
def test_front_tune_writes_a_non_dominated_front(front_run):
    import optuna
    from optuna.trial import TrialState

    cfg = yaml.safe_load(front_run.out.read_text())
    summary = json.loads((front_run.out.parent / "config.run" / "summary.json").read_text())
    from bittune.search import open_storage

    study = optuna.load_study(study_name=front_run.res.study_name, storage=open_storage(front_run.res.storage))
    assert len(study.directions) == 2
    assert len(study.get_trials(states=(TrialState.COMPLETE,))) == 10  # the resume added the rest of the budget
    points = cfg["front"]["points"]
    assert 1 <= len(points) <= FRONT_SIZE and cfg["front"]["prefer"] == "balanced"
    # Every written point is non-dominated among all validated finalists that reached on every fresh seed
    # (their per-seed means on the same validation seeds), by the pairwise check above.
    ok = [(e["mean_bits_per_worker"], e["mean_seconds"]) for e in summary["selection"]["front_finalists"]
          if e["reached"] == e["seeds"]]
    for p in summary["selection"]["front"]:
        assert p["reached"] == p["seeds"]
        me = (p["mean_bits_per_worker"], p["mean_seconds"])
        assert not _dominated_brute_force([me, *[q for q in ok if q != me]], 0)
    chosen = [p for p in points if p["chosen"]]
    assert len(chosen) == 1
    passing = [p for p in points if p["transfer_passed"]] or points
    # balanced: the least product of the (rounded, 4 digits) mean costs; rel. 1e-3 covers the rounding
    best = min(p["mean_bits_per_worker"] * p["mean_seconds"] for p in passing)
    assert chosen[0]["mean_bits_per_worker"] * chosen[0]["mean_seconds"] <= best * (1 + 1e-3)
    # the transfer check: every finalist, and the chosen config's ratio in expected
    assert len(cfg["transfer"]["finalists"]) == len(summary["selection"]["front_finalists"])
    assert cfg["expected"]["transfer_ratio"] == cfg["transfer"]["chosen"]["transfer_ratio"] > 0
    assert (front_run.out.parent / "config.run" / "report" / "front.png").is_file()


def test_prefer_without_front_exits_2_and_writes_nothing(tmp_path, capsys):
    subprocess.run([sys.executable, str(ROOT / "examples/frost/make_data.py"), "--out", str(tmp_path / "stations.svm"),
                    "--nights", "20"], check=True, capture_output=True)
    job = yaml.safe_load((ROOT / "examples/frost/job.yaml").read_text())
    job["prefer"] = "seconds"  # objective stays bits
    (tmp_path / "job.yaml").write_text(yaml.safe_dump(job))
    code = main(["tune", str(tmp_path / "job.yaml"), "-o", str(tmp_path / "c.yaml")])
    err = capsys.readouterr().err
    assert code == 2 and "prefer: only used with objective: front" in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["job.yaml", "stations.svm"]


@pytest.mark.parametrize("target", [{"grad_norm_sq": 1e-3, "relative": True}, {"loss_gap": 1e-3}])
def test_resampled_workspace_keeps_the_job_target_definition(tmp_path, target):
    from bittune.job import load_job
    from bittune.transfer import resampled_workspace
    from bittune.workspace import open_job, reference_loss

    subprocess.run([sys.executable, str(ROOT / "examples/frost/make_data.py"), "--out", str(tmp_path / "stations.svm"),
                    "--nights", "20"], check=True, capture_output=True)
    job = yaml.safe_load((ROOT / "examples/frost/job.yaml").read_text())
    job["target"] = target
    (tmp_path / "job.yaml").write_text(yaml.safe_dump(job))
    ws = open_job(load_job(tmp_path / "job.yaml"))
    wr = resampled_workspace(ws)
    assert np.array_equal(wr.problem.worker_sizes, ws.problem.worker_sizes)
    assert not np.array_equal(wr.problem.full_grad(ws.x0), ws.problem.full_grad(ws.x0))  # other data
    if "loss_gap" in target:
        # the same gap, to an f_ref of the resample found the same way (L-BFGS-B from x0)
        ref = reference_loss(wr.problem, ws.x0, model=job["model"], regularization=job["regularization"])
        assert wr.target == ws.target == 1e-3
        assert wr.loss_ref == pytest.approx(ref["value"], rel=1e-12)  # the same deterministic solver run
        assert wr.loss_ref != ws.loss_ref
    else:
        g = wr.problem.full_grad(ws.x0)
        # relative: eps x ||grad f(x0)||^2 of the resampled problem; rel. 1e-12 covers summation order
        assert wr.target == pytest.approx(1e-3 * float(g @ g), rel=1e-12)
