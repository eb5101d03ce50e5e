"""The refilling engine (simulate's ``refill``): a trajectory that joins a running batch gets the values
it gets alone.

Outside reference: the trajectory run alone from the start through the same engine (its own batch,
no refill). Counter-based random numbers depend only on (key, round, stream, element), so a row at
local round r draws what it draws alone at round r; the other rows of its batch, at other rounds,
cannot change its numbers. Tolerance: only the batched matrix products differ (BLAS may block a
(B, d) product differently for another B and another mix of rows), which changes results in the last
bits; 1e-9 relative after a few hundred contracting rounds leaves room for that rounding (about 1e-16
per operation, amplified at most linearly) and nothing else (common practice, no source; the same
argument as tests/test_batch.py). Statuses and round counts must be equal.
"""

from __future__ import annotations

import numpy as np
import pytest

from bittune._random import random_bits, random_words32, uniform
from bittune.compressors import PerTrajectory, make_compressor, stack_compressors
from bittune.cost import NetworkModel
from bittune.simulate import Join, absolute_target, simulate

RTOL = 1e-9  # see the module docstring
LINKS = ((0.05, 1e6, 0.01), (0.05, 1e6, 0.01), (0.1, 5e5, 0.02), (0.1, 5e5, 0.02), (0.02, 2e6, 0.01))


def test_random_bits_with_one_round_per_key_equal_per_row_scalar_calls():
    keys = np.array([3, 99, 12345678901, 7], dtype=np.uint64) * np.uint64(0x9E3779B97F4A7C15)
    rounds = np.array([0, 5, 5, 2 ** 41 + 3])  # the counter keeps the low 40 bits of a round
    for fn in (random_bits, random_words32, uniform):
        many = fn(keys, rounds, 1, (3, 5))
        for b in range(keys.size):
            np.testing.assert_array_equal(many[b], fn(keys[b:b + 1], int(rounds[b]), 1, (3, 5))[0])
    with pytest.raises(ValueError):
        random_bits(keys, rounds[:2], 1, (2,))


def test_compressors_take_one_round_per_trajectory():
    d, n = 12, 3
    v = np.random.default_rng(0).standard_normal((4, n, d))
    keys = np.arange(4, dtype=np.uint64) + np.uint64(11)
    rounds = np.array([0, 3, 3, 8])
    parts = [make_compressor("rand_k:2", d), make_compressor("rand_k:5", d)]
    for comp in (make_compressor("dither:2", d), make_compressor("perm_k", d, n_workers=n),
                 PerTrajectory(parts, [0, 1, 1, 0])):
        out, bits = comp.compress(v, keys, rounds)
        for b in range(4):
            alone = comp if not isinstance(comp, PerTrajectory) else parts[comp.assign[b]]
            one, one_bits = alone.compress(v[b:b + 1], keys[b:b + 1], int(rounds[b]))
            np.testing.assert_array_equal(out[b], one[0])
            np.testing.assert_array_equal(bits[b], one_bits[0])


def test_stacked_compressors_keep_each_rows_setting():
    d = 10
    a, b, c = (make_compressor(f"rand_k:{k}", d) for k in (2, 2, 7))
    assert stack_compressors(a, 3, b, 2) is a  # one setting: no per-trajectory compressor
    assert stack_compressors(a, 0, c, 2) is c
    both = stack_compressors(a, 3, PerTrajectory([c, b], [0, 1]), 2)
    assert [p.label() for p in both.parts] == ["rand_k:2", "rand_k:7"]
    np.testing.assert_array_equal(both.assign, [0, 0, 0, 1, 0])
    with pytest.raises(ValueError):
        stack_compressors(a, 1, make_compressor("top_k:2", d), 1)


CASES = {
    "gd": dict(method="gd", comp="identity", mult=1.0),
    "dcgd": dict(method="dcgd", comp="dither:2", mult=0.5, loss_every=7),
    "diana": dict(method="diana", comp="rand_k:3", mult=0.4, params={"shift_rate": 0.2}),
    "marina": dict(method="marina", comp="rand_k:3", mult=2.0, params={"sync_probability": 0.2}),
    "ef21": dict(method="ef21", comp="top_k:4", mult=1.0, downlink="top_k:10"),
    "pp_marina": dict(method="pp_marina", comp="rand_k:3", mult=1.0, params={"clients": 3}, network=True),
    "vr_marina": dict(method="vr_marina", comp="rand_k:3", mult=1.0, params={"minibatch": 8}),
    "marina-minibatch": dict(method="marina", comp="rand_k:3", mult=1.0, minibatch=6),
    "diana-minibatch": dict(method="diana", comp="rand_k:3", mult=0.3, minibatch=6, loss_ref=True),
    "per-trajectory": dict(method="marina", comp="rand_k:9", host_comp="rand_k:3", mult=1.0),
}


@pytest.mark.parametrize("case", list(CASES))
def test_a_trajectory_that_joins_a_running_batch_equals_its_run_alone(cancer, case):
    c = CASES[case]
    d = cancer.dim
    _, L = cancer.smoothness_bounds()
    target = absolute_target(cancer, np.zeros(d), grad_norm_sq=1e-3, relative=True)
    kw = dict(method=c["method"], target=target, max_rounds=400, loss_every=c.get("loss_every", 0),
              minibatch=c.get("minibatch"), stall_window=60)
    if c.get("downlink"):
        kw["downlink"] = make_compressor(c["downlink"], d)
    if c.get("network"):
        kw["network"] = NetworkModel(0.05, 1e6, 1280.0, 0.01, workers=LINKS)
    if c.get("loss_ref"):
        kw["loss_ref"] = -1.0  # below any logistic loss (>= 0): the gap stays above 1
        kw["target"] = 0.0  # a loss gap that no run reaches: they run to the budget or stall
    comp = make_compressor(c["comp"], d)
    params = c.get("params", {})
    step = c["mult"] / L
    alone = simulate(cancer, compressor=comp, step_size=step, seeds=[21, 22], params=params, **kw)

    # Host rows: their own (slower) step and compressor, one stopped by the monitor at local round 7 and
    # one at 20, so the joiners arrive at global rounds 7 (one pair) and 20 (a second pair, in the
    # middle of the first pair's run but for GD's), beside a host row that keeps running.
    host = make_compressor(c.get("host_comp", c["comp"]), d)
    stops = {0: 7, 1: 20}
    joins = [Join(seeds=[21, 22], step_size=step, compressor=comp, params=params, stall_window=60)] * 2
    ended = []

    def monitor(k, index, cost, metric):
        return np.array([i in stops and kk >= stops[i] for i, kk in zip(index.tolist(), np.atleast_1d(k))])

    def refill(done):
        ended.extend(i for i, _ in done)
        if any(i in stops for i, _ in done) and joins:
            return joins.pop()
        return None

    runs = simulate(cancer, compressor=host, step_size=0.1 * step, seeds=[1, 2, 3], params=params, monitor=monitor,
                    refill=refill, **kw)
    assert len(runs) == 7 and sorted(ended) == list(range(7))
    assert [runs[i].status for i in (0, 1)] == ["stopped", "stopped"] and [runs[i].rounds for i in (0, 1)] == [7, 20]
    for joined in (runs[3:5], runs[5:7]):
        for a, b in zip(alone, joined):
            assert (b.seed, b.status, b.rounds) == (a.seed, a.status, a.rounds)
            for field in ("uplink_bits", "downlink_bits", "gradient_evals", "gradient_passes"):
                assert getattr(b, field) == pytest.approx(getattr(a, field), rel=RTOL), field
            for field in ("grad_norm_sq", "uplink_curve", "downlink_curve", "passes_curve", "progress", "loss", "x"):
                np.testing.assert_allclose(getattr(b, field), getattr(a, field), rtol=RTOL, atol=1e-14, err_msg=field)
            np.testing.assert_array_equal(b.loss_rounds, a.loss_rounds)
            if kw.get("network") is not None:
                np.testing.assert_allclose(b.seconds_curve, a.seconds_curve, rtol=RTOL)
                np.testing.assert_allclose(b.worker_shares, a.worker_shares, rtol=RTOL, atol=1e-14)


def test_the_refilling_runner_keeps_its_batch_full_and_finishes_exactly_the_budget(cancer, monkeypatch):
    """search.trial_batch 3 on two groups (MARINA, DIANA): trials join running batches as others
    finish (told at once, before their slot is refilled), other-group trials wait for a later batch,
    and exactly the budget of trials finishes, none left running or failed."""
    import optuna
    from optuna.trial import TrialState

    import bittune.batch as batch
    from bittune.job import SECTIONS, SearchSpec
    from bittune.search import run_trials
    from test_batch import _objective

    defaults = {k: p.default for k, p in SECTIONS["search"].items()}
    spec = SearchSpec(**{**defaults, "methods": ["marina", "diana"], "compressors": ["rand_k"], "seeds": 2,
                         "trial_batch": 3})
    obj = _objective(cancer, spec, seeds=[5, 6])
    study = optuna.create_study(sampler=optuna.samplers.TPESampler(seed=0), pruner=optuna.pruners.NopPruner())
    real = batch.simulate
    calls, told_at_join = [], []

    def counting(problem, **kw):
        inner = kw["refill"]

        def refill(ended):
            join = inner(ended)
            if join is not None:
                told_at_join.append(len(study.get_trials(deepcopy=False, states=(TrialState.COMPLETE,))))
            return join

        runs = real(problem, **{**kw, "refill": refill})
        calls.append((kw["method"], len(runs) // 2))
        return runs

    monkeypatch.setattr(batch, "simulate", counting)
    budget = 11
    assert run_trials(study, obj, budget=budget) == budget
    states = [t.state for t in study.get_trials(deepcopy=False)]
    assert states.count(TrialState.COMPLETE) + states.count(TrialState.PRUNED) == budget
    assert TrialState.RUNNING not in states and TrialState.FAIL not in states
    assert sum(n for _, n in calls) == budget  # every trial ran in exactly one engine batch
    assert max(n for _, n in calls) > 3  # trials joined a running batch (more than trial_batch in one)
    assert told_at_join and all(a >= 1 for a in told_at_join) and told_at_join == sorted(told_at_join)


def test_trajectories_join_a_batch_whose_rows_have_all_ended(cancer):
    """The only row stops at round 5; the joiners start in an empty batch (a method instance with no
    rows takes their state as it is) and still equal their run alone (reference: that run)."""
    d = cancer.dim
    _, L = cancer.smoothness_bounds()
    target = absolute_target(cancer, np.zeros(d), grad_norm_sq=1e-3, relative=True)
    comp = make_compressor("rand_k:4", d)
    kw = dict(method="marina", compressor=comp, target=target, max_rounds=400, params={"sync_probability": 0.3})
    alone = simulate(cancer, step_size=1.5 / L, seeds=[8, 9], **kw)
    pending = [Join(seeds=[8, 9], step_size=1.5 / L, compressor=comp, params={"sync_probability": 0.3})]
    runs = simulate(cancer, step_size=0.1 / L, seeds=[1], monitor=lambda k, i, c, m: (i == 0) & (np.asarray(k) >= 5),
                    refill=lambda done: pending.pop() if pending else None, **kw)
    assert [(r.status, r.rounds) for r in runs[:1]] == [("stopped", 5)]
    for a, b in zip(alone, runs[1:]):
        assert (b.seed, b.status, b.rounds) == (a.seed, a.status, a.rounds)
        assert b.uplink_bits == pytest.approx(a.uplink_bits, rel=RTOL)
        np.testing.assert_allclose(b.grad_norm_sq, a.grad_norm_sq, rtol=RTOL)
