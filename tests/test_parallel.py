"""simulate_many: batches cut over worker processes give the trajectories of the whole batch."""

from __future__ import annotations

import numpy as np

from bittune.compressors import make_compressor
from bittune.parallel import _split, simulate_many
from bittune.simulate import absolute_target


def test_chunks_in_processes_match_the_whole_batches(cancer):
    """Reference: the same batches run by the engine in this process (jobs=1). Trajectories draw
    their own random numbers, so only rounding may differ (BLAS blocks batches differently)."""
    _, L = cancer.smoothness_bounds()
    target = absolute_target(cancer, np.zeros(cancer.dim), grad_norm_sq=1e-4, relative=True)
    comp = make_compressor("rand_k:5", cancer.dim)
    marina = dict(method="marina", compressor=comp, step_size=np.repeat([1 / L, 4 / L], 3),
                  seeds=np.tile(np.arange(3), 2), target=target, max_rounds=2000,
                  params={"sync_probability": np.repeat([0.1, 0.2], 3)}, stall_window=np.full(6, 100.0))
    diana = dict(marina, method="diana", params={}, stall_window=None)
    here = simulate_many(cancer, [marina, diana], jobs=1)
    there = simulate_many(cancer, [marina, diana], jobs=2)
    assert [len(b) for b in there] == [6, 6]
    for a, b in zip(here, there):
        for r, s in zip(a, b):
            assert (r.seed, r.status, r.rounds, r.uplink_bits) == (s.seed, s.status, s.rounds, s.uplink_bits)
            # rounding only (measured <= 1e-12 relative; the bound leaves room for other BLAS builds)
            np.testing.assert_allclose(r.grad_norm_sq, s.grad_norm_sq, rtol=1e-8)


def test_split_cuts_every_per_trajectory_value():
    kw = {"seeds": np.arange(5), "step_size": np.arange(5.0), "stall_window": 100.0,
          "params": {"sync_probability": np.linspace(0.1, 0.5, 5), "minibatch": 4}}
    parts = _split(kw, 2)
    assert [list(p["seeds"]) for p in parts] == [[0, 1], [2, 3, 4]]
    assert [list(p["step_size"]) for p in parts] == [[0.0, 1.0], [2.0, 3.0, 4.0]]
    assert all(p["stall_window"] == 100.0 and p["params"]["minibatch"] == 4 for p in parts)
    np.testing.assert_array_equal(parts[1]["params"]["sync_probability"], kw["params"]["sync_probability"][2:])
    assert len(_split(kw, 8)) == 5  # never more chunks than trajectories


def test_theory_baseline_shares_a_batch_with_the_finalists(cancer):
    """The selection may run the theory baseline in one batch with finalists of the same method and
    compressor: every candidate must carry its integer parameters (PP-MARINA's r = n by default,
    THEORY.md 2.6), or the batch mixes numbers with None."""
    from bittune.constants import Constants
    from bittune.search import Space
    from bittune.select import evaluate
    from bittune.workspace import Workspace
    from types import SimpleNamespace

    n, d = cancer.n_workers, cancer.dim
    per, L = cancer.smoothness_bounds()
    consts = Constants(n_workers=n, dim=d, L=L, L_workers=per, L_plus=L, L_pm=0.1, delta0=0.7, grad_sq0=1.0,
                       local_grad_sq0=1.0, heterogeneity0=0.1)
    spec = SimpleNamespace(methods=["pp_marina"], compressors=["rand_k"], levels_range=(1, 16), jobs=1)
    space = Space(spec, consts, target=1e-3)
    base = space.candidate("pp_marina", {"name": "rand_k", "k": 5})
    assert base.clients == n
    tuned = space.candidate("pp_marina", {"name": "rand_k", "k": 5}, step_mult=4.0, clients=2)
    budget = SimpleNamespace(max_rounds=50, max_bits_per_worker=None)
    ws = Workspace(job=SimpleNamespace(budget=budget, search=spec), dataset=None, parts=[], problem=cancer,
                   x0=np.zeros(d), target=1e-3)
    a, b = evaluate(ws, [tuned, base], [0, 1])
    assert [r.seed for r in a.runs] == [0, 1] and len(b.runs) == 2
