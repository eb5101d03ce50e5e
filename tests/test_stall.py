"""The stall rule ends runs that make no progress, not runs that would converge (docs/design.md, "Stall windows").

Data: scikit-learn's bundled copy of the breast-cancer dataset (an open dataset, via conftest).
The reference for "would converge" is the same trajectories with no stall rule at all: the
engine is deterministic per seed, so a window that cuts nothing that converges leaves every
one of them unchanged.
"""

import numpy as np
import pytest

from bittune.compressors import make_compressor
from bittune.search import STALL_ROUNDS, stall_window
from bittune.simulate import absolute_target, simulate

SEEDS = list(range(100, 120))
MAX_ROUNDS = 8000


def _runs(problem, comp, step, params, window):
    target = absolute_target(problem, np.zeros(problem.dim), grad_norm_sq=1e-6, relative=True)
    return simulate(problem, method="diana", compressor=comp, step_size=step, seeds=SEEDS, target=target,
                    max_rounds=MAX_ROUNDS, params=params, stall_window=window)


def test_diana_window_lets_runs_that_converge_finish(cancer):
    # DIANA + Rand-K (K = 3 of 30, omega = 9) at shift rate 0.02 and step 1/L: every seed
    # converges in 250-470 rounds, but while the shifts learn the local gradients ||grad f||^2
    # goes up to ~470 rounds without a 1% new best (own measurement on this data).
    _, L = cancer.smoothness_bounds()
    comp = make_compressor({"name": "rand_k", "k": 3}, cancer.dim)
    params = {"shift_rate": 0.02}
    free = _runs(cancer, comp, 1.0 / L, params, None)
    assert all(r.reached for r in free)
    # The flat 100-round window this rule replaced cut some of them (3 of 20 when measured).
    old = _runs(cancer, comp, 1.0 / L, params, float(STALL_ROUNDS))
    assert sum(r.status == "stalled" for r in old) >= 1
    window = stall_window("diana", params, comp)
    assert window > STALL_ROUNDS
    for a, b in zip(free, _runs(cancer, comp, 1.0 / L, params, window)):
        assert (b.status, b.rounds) == (a.status, a.rounds)
        assert b.uplink_bits == a.uplink_bits


def test_diana_window_still_ends_a_step_that_does_not_converge(cancer):
    # Step 4/L with Rand-K K = 1 (omega = 29) at shift rate 0.02: no seed reaches the target in
    # 8,000 rounds without a stall rule (own measurement); the window ends every one of them early.
    _, L = cancer.smoothness_bounds()
    comp = make_compressor({"name": "rand_k", "k": 1}, cancer.dim)
    params = {"shift_rate": 0.02}
    window = stall_window("diana", params, comp)
    runs = _runs(cancer, comp, 4.0 / L, params, window)
    assert {r.status for r in runs} == {"stalled"}
    # At most a few windows of rounds each (the budget is 8,000): common practice, no source.
    assert max(r.rounds for r in runs) < min(MAX_ROUNDS, 4 * window)


@pytest.mark.parametrize("k", [1, 3, 30])
def test_diana_default_shift_rate_gets_the_window_of_its_value(cancer, k):
    # A config without a shift rate runs DIANA's default 1/(1 + omega) (docs/theory.md §2.3):
    # its window is the one of that rate written out, so replaying such a config stops where it
    # would with the rate given.
    comp = make_compressor({"name": "rand_k", "k": k}, cancer.dim)
    default = 1.0 / (1.0 + comp.omega)
    assert float(stall_window("diana", {}, comp)) == pytest.approx(
        float(stall_window("diana", {"shift_rate": default}, comp)))
    # Without the compressor nothing says what the rate is: the flat window.
    assert stall_window("diana", {}) == STALL_ROUNDS
    # Other methods keep theirs: 100 rounds, the MARINA family's grows like 1/p.
    assert stall_window("ef21", {}, comp) == STALL_ROUNDS
    assert float(stall_window("marina", {"sync_probability": 0.01})) == pytest.approx(1000.0)
