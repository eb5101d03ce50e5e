"""Batches started in another process give the trajectories of the same batches run here."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np

from bittune.compressors import make_compressor
from bittune.constants import Constants
from bittune.parallel import start_batch
from bittune.search import Space
from bittune.select import evaluate, start_evaluate
from bittune.simulate import absolute_target, simulate
from bittune.workspace import Workspace


def test_a_batch_in_another_process_matches_the_batch_here(cancer):
    """Reference: the engine in this process. Trajectories draw their own random numbers; only
    rounding may differ (a single-threaded worker sums the blocks in another order)."""
    _, L = cancer.smoothness_bounds()
    target = absolute_target(cancer, np.zeros(cancer.dim), grad_norm_sq=1e-4, relative=True)
    kwargs = dict(method="marina", compressor=make_compressor("rand_k:5", cancer.dim),
                  step_size=np.repeat([1 / L, 4 / L], 3), seeds=np.tile(np.arange(3), 2), target=target,
                  max_rounds=2000, params={"sync_probability": np.repeat([0.1, 0.2], 3)},
                  stall_window=np.full(6, 100.0))
    here = simulate(cancer, **kwargs)
    there = start_batch(cancer, kwargs, jobs=2)()
    assert len(there) == 6
    for r, s in zip(here, there):
        assert (r.seed, r.status, r.rounds, r.uplink_bits) == (s.seed, s.status, s.rounds, s.uplink_bits)
        # rounding only (measured <= 1e-12 relative; the bound leaves room for other BLAS builds)
        np.testing.assert_allclose(r.grad_norm_sq, s.grad_norm_sq, rtol=1e-8)


def _workspace(problem, spec):
    budget = SimpleNamespace(max_rounds=300, max_bits_per_worker=None)
    job = SimpleNamespace(budget=budget, search=spec, engine=SimpleNamespace(precision="float64"))
    return Workspace(job=job, dataset=None, parts=[], problem=problem,
                     x0=np.zeros(problem.dim), target=1e-3)


def _space(problem, methods):
    n, d = problem.n_workers, problem.dim
    per, L = problem.smoothness_bounds()
    consts = Constants(n_workers=n, dim=d, L=L, L_workers=per, L_plus=L, L_pm=0.1, delta0=0.7, grad_sq0=1.0,
                       local_grad_sq0=1.0, heterogeneity0=0.1)
    spec = SimpleNamespace(methods=methods, compressors=["rand_k"], levels_range=(1, 16), jobs=2)
    return Space(spec, consts, target=1e-3), spec


def test_evaluations_started_elsewhere_equal_those_run_here(cancer):
    space, spec = _space(cancer, ["marina", "diana"])
    cands = [space.candidate("marina", {"name": "rand_k", "k": 5}, step_mult=8.0),
             space.candidate("diana", {"name": "rand_k", "k": 3}, step_mult=4.0),
             space.candidate("marina", {"name": "rand_k", "k": 5}, step_mult=2.0)]
    ws = _workspace(cancer, spec)
    here = evaluate(ws, cands, [0, 1])
    there = start_evaluate(ws, cands, [0, 1], jobs=2)()
    for a, b in zip(here, there):
        assert a.candidate == b.candidate
        assert [(r.seed, r.status, r.rounds, r.uplink_bits) for r in a.runs] == \
            [(r.seed, r.status, r.rounds, r.uplink_bits) for r in b.runs]


def test_theory_baseline_shares_a_batch_with_the_finalists(cancer):
    """Candidates of one method and compressor share a batch: every one must carry its integer
    parameters (PP-MARINA's r = n by default, docs/theory.md §2.6), or the batch mixes numbers with None."""
    space, spec = _space(cancer, ["pp_marina"])
    base = space.candidate("pp_marina", {"name": "rand_k", "k": 5})
    assert base.clients == cancer.n_workers
    tuned = space.candidate("pp_marina", {"name": "rand_k", "k": 5}, step_mult=4.0, clients=2)
    a, b = evaluate(_workspace(cancer, spec), [tuned, base], [0, 1])
    assert [r.seed for r in a.runs] == [0, 1] and len(b.runs) == 2
