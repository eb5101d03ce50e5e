"""One suite that every method passes (DEVELOPERS.md, "Code habits": conformance suites)."""

from __future__ import annotations

import numpy as np
import pytest

import math

from scipy.stats import norm

from bittune._random import trajectory_keys
from bittune.compressors import make_compressor
from bittune.methods import METHODS, make_method
from bittune.simulate import absolute_target, simulate
from conftest import breast_cancer_problem, random_problem

ALL = sorted(METHODS)
# PP-MARINA samples r clients with replacement: even with the identity compressor and r = n
# its compressed rounds are not GD (see test_pp_marina_with_sync_probability_one_equals_gd).
# VR-MARINA's compressed rounds use minibatch differences: not GD either (tests/test_vr_marina.py).
IDENTITY_IS_GD = [m for m in ALL if m not in ("pp_marina", "vr_marina")]


def _run(problem, method, spec, *, step, seeds=(0,), rounds=200, target=0.0, **params):
    comp = make_compressor(spec, problem.dim, n_workers=problem.n_workers)
    return simulate(problem, method=method, compressor=comp, step_size=step,
                    seeds=list(seeds), target=target, max_rounds=rounds, params=params)


@pytest.mark.parametrize("method", IDENTITY_IS_GD)
def test_identity_compressor_reproduces_gd(cancer, method):
    _, L = cancer.smoothness_bounds()
    ref = _run(cancer, "gd", "identity", step=1 / L)[0]
    got = _run(cancer, method, "identity", step=1 / L)[0]
    # Identical arithmetic up to the order of a few additions (h + (g - h)):
    # rounding of ~1e-16 per round over 200 rounds. The iterate agrees to 1e-12
    # relative; ||grad f||^2 falls by 1e11 here, so its rounding is measured
    # against its starting scale (cancellation makes small values noisier).
    np.testing.assert_allclose(got.x, ref.x, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(got.grad_norm_sq, ref.grad_norm_sq, rtol=1e-12, atol=1e-12 * ref.grad_norm_sq[0])


@pytest.mark.parametrize("method,spec,params", [("marina", "rand_k:3", {}), ("marina", "perm_k", {}),
                                                ("pp_marina", "rand_k:3", {"clients": 2})])
def test_marina_with_sync_probability_one_equals_gd(cancer, method, spec, params):
    _, L = cancer.smoothness_bounds()
    ref = _run(cancer, "gd", "identity", step=1 / L)[0]
    got = _run(cancer, method, spec, step=1 / L, sync_probability=1.0, **params)[0]
    np.testing.assert_allclose(got.grad_norm_sq, ref.grad_norm_sq, rtol=1e-12)
    assert got.uplink_bits == ref.uplink_bits  # every round is a dense sync


@pytest.mark.parametrize("model", ["logistic_nonconvex", "least_squares"])
def test_gd_at_one_over_L_meets_the_descent_bound(model):
    """Nesterov (2004), 1.2.3: with gamma = 1/L, min_k ||grad f(x_k)||^2 <= 2 Delta0 / (gamma K)."""
    problem, _, _ = random_problem(model=model, sparse=False, seed=21, sizes=(30, 25, 40), dim=6)
    _, L = problem.smoothness_bounds()
    x0 = np.zeros(problem.dim)
    delta0 = problem.full_loss(x0) - problem.loss_lower_bound()
    run = _run(problem, "gd", "identity", step=1 / L, rounds=400)[0]
    for K in (1, 10, 100, 400):
        assert run.grad_norm_sq[:K].min() <= 2 * delta0 * L / K


@pytest.mark.parametrize("method,spec,params", [
    ("gd", "identity", {}),
    ("dcgd", "rand_k:15", {}),
    ("diana", "rand_k:6", {}),
    ("marina", "rand_k:6", {}),
    ("ef21", "top_k:6", {}),
    ("diana", "dither:4", {}),
    ("marina", "natural", {"sync_probability": 0.2}),
    ("marina", "perm_k", {}),
    ("pp_marina", "rand_k:6", {}),
    ("pp_marina", "natural_dither:3", {"clients": 2}),
    ("vr_marina", "rand_k:6", {"minibatch": 8}),
])
def test_each_method_reaches_the_target_on_breast_cancer(cancer, method, spec, params):
    """scikit-learn's bundled breast-cancer data (open dataset), standardised, 5 workers."""
    _, L = cancer.smoothness_bounds()
    x0 = np.zeros(cancer.dim)
    target = absolute_target(cancer, x0, grad_norm_sq=1e-3, relative=True)
    runs = _run(cancer, method, spec, step=1 / L, seeds=range(3), rounds=20_000, target=target, **params)
    assert all(r.status == "reached" for r in runs), [r.status for r in runs]
    assert all(r.grad_norm_sq[-1] <= target for r in runs)


@pytest.mark.parametrize("method,spec,params", [
    ("dcgd", "rand_k:5", {}), ("diana", "dither:2", {}), ("marina", "rand_k:5", {}), ("ef21", "rand_k:5", {}),
    ("gd", "identity", {}), ("marina", "perm_k", {}), ("dcgd", "natural_dither:2", {}),
    # one r per trajectory: the client draws of a trajectory must not depend on the others' r
    ("pp_marina", "rand_k:5", {"clients": np.array([1, 5, 2, 3])}),
    # and one b' per trajectory: the row draws must not depend on the largest b' in the batch
    ("vr_marina", "rand_k:5", {"minibatch": np.array([1, 8, 3, 30])}),
])
def test_batch_equals_each_trajectory_alone(cancer, method, spec, params):
    _, L = cancer.smoothness_bounds()
    steps = np.array([0.5, 1.0, 2.0, 4.0]) / L
    target = absolute_target(cancer, np.zeros(cancer.dim), grad_norm_sq=1e-4, relative=True)
    batch = _run(cancer, method, spec, step=steps, seeds=[3, 4, 5, 6], rounds=300, target=target, **params)
    for j, seed in enumerate([3, 4, 5, 6]):
        one = {k: v[j] for k, v in params.items()}
        alone = _run(cancer, method, spec, step=steps[j], seeds=[seed], rounds=300, target=target, **one)[0]
        assert (alone.status, alone.rounds) == (batch[j].status, batch[j].rounds)
        assert alone.uplink_bits == batch[j].uplink_bits
        # Same random numbers by construction; BLAS blocks products of different
        # batch sizes differently, so iterates agree to rounding (measured <= 2e-12).
        np.testing.assert_allclose(alone.grad_norm_sq, batch[j].grad_norm_sq, rtol=1e-8)


def test_marina_coin_is_shared_by_workers_and_bits_add_up(cancer):
    d = cancer.dim
    run = _run(cancer, "marina", "rand_k:5", step=0.1, rounds=300, sync_probability=0.3)[0]
    per_round = np.diff(run.uplink_curve)
    # Every round is either a dense sync (32 d) or a Rand-K message (32 K) for all
    # workers alike; a per-worker coin would give mixtures in between.
    assert set(np.unique(per_round)) <= {32.0 * d, 32.0 * 5}
    assert per_round[0] == 32.0 * d  # g^0 = grad f(x^0), dense
    syncs = np.sum(per_round[1:] == 32.0 * d)
    # Binomial(299, 0.3): mean 89.7, sd 7.9; 5 sd either side (false alarm < 1e-6).
    assert abs(syncs - 89.7) < 5 * 7.9


def test_diana_default_shift_rate_is_one_over_one_plus_omega():
    from bittune.methods import make_method

    comp = make_compressor("rand_k:4", 20)
    m = make_method("diana", compressor=comp, n_workers=3, dim=20, batch=2)
    # Mishchenko et al. (2019): alpha = 1/(omega + 1); Rand-K omega = d/K - 1 = 4.
    np.testing.assert_allclose(m.p["shift_rate"], [0.2, 0.2])


def test_divergence_is_detected_and_budget_reported(cancer):
    _, L = cancer.smoothness_bounds()
    runs = _run(cancer, "gd", "identity", step=np.array([100.0, 0.01]) / L, seeds=[0, 1], rounds=50)
    statuses = {r.status for r in runs}
    assert runs[1].status == "budget" and runs[1].rounds == 50
    # Logistic gradients are bounded, so a huge step oscillates rather than
    # overflowing: least squares is the model that truly diverges.
    ls = breast_cancer_problem(model="least_squares", reg=0.0)
    _, L2 = ls.smoothness_bounds()
    div = _run(ls, "gd", "identity", step=3.0 / L2, rounds=5000)[0]
    assert div.status == "diverged" and div.rounds < 5000
    assert statuses <= {"budget", "diverged"}


def test_bits_cap_stops_a_trajectory(cancer):
    d = cancer.dim
    run = _run(cancer, "gd", "identity", step=0.01, rounds=1000)[0]
    capped = simulate(cancer, method="gd", compressor=make_compressor("identity", d), step_size=0.01, seeds=[0],
                      target=0.0, max_rounds=1000, max_bits_per_worker=32.0 * d * 10)[0]
    assert run.status == "budget"
    assert capped.status == "bits_cap" and capped.rounds == 10
    assert capped.uplink_bits == 32.0 * d * 10


# ---------------------------------------------------------------- PP-MARINA


def _pp_step(*, d, n, r, spec, batch, seed):
    """One compressed PP-MARINA round from g^0 for ``batch`` trajectories (no sync: p = 0).

    Returns the differences D_i (n, d), g^1 - g^0 (batch, d) and the bits (batch, n)."""
    rng = np.random.default_rng(seed)
    g0 = rng.standard_normal((n, d))
    g1 = g0 + rng.standard_normal((n, d)) * rng.lognormal(0.0, 1.0, (n, 1))
    comp = make_compressor(spec, d)
    m = make_method("pp_marina", compressor=comp, n_workers=n, dim=d, batch=batch, sync_probability=0.0,
                    clients=r)
    keys = trajectory_keys(np.arange(batch) + 10_000)
    start, _ = m.direction(np.broadcast_to(g0, (batch, n, d)).copy(), keys, 0)
    after, bits = m.direction(np.broadcast_to(g1, (batch, n, d)).copy(), keys, 1)
    return g1 - g0, after - start, bits


@pytest.mark.parametrize("r", [1, 3, 5])
def test_pp_marina_estimator_is_unbiased_with_the_theory_variance(r):
    """docs/theory.md §2.6 (Gorbunov et al. 2021, PP-MARINA; derivation there): with r clients drawn
    i.i.d. uniformly and independent draws of Q, E[g^{k+1} - g^k] = Dbar and
    E||g^{k+1} - g^k - Dbar||^2 = (1/r) ((1/n) sum_i E||Q(D_i)||^2 - ||Dbar||^2); for Rand-K
    E||Q(D)||^2 = (d/K) ||D||^2 exactly (docs/theory.md §1.2). A client drawn twice must compress
    twice: re-sending one draw would add (r-1)/(r n) omega mean_i ||D_i||^2.
    z-tests at false-alarm 1e-6 (Bonferroni over d for the mean), sample standard errors."""
    d, n, k, batch = 6, 5, 2, 20_000
    D, step, bits = _pp_step(d=d, n=n, r=r, spec=f"rand_k:{k}", batch=batch, seed=r)
    dbar = D.mean(axis=0)
    se = step.std(axis=0, ddof=1) / math.sqrt(batch)
    assert np.all(np.abs(step.mean(axis=0) - dbar) <= norm.isf(1e-6 / (2 * d)) * se)
    err = np.sum((step - dbar) ** 2, axis=1)
    exact = ((d / k) * np.mean(np.sum(D * D, axis=1)) - dbar @ dbar) / r
    assert abs(err.mean() - exact) <= norm.isf(1e-6 / 2) * err.std(ddof=1) / math.sqrt(batch)
    # bits: r Rand-K messages of 32 K bits per trajectory, none from workers not drawn
    np.testing.assert_array_equal(bits.sum(axis=1), r * 32.0 * k)
    assert set(np.unique(bits)) <= {32.0 * k * c for c in range(r + 1)}
    # each worker is drawn r/n times on average: Binomial(batch r, 1/n) per worker, 5.3 sd
    count = bits.sum(axis=0) / (32.0 * k)
    sd = math.sqrt(batch * r * (1 / n) * (1 - 1 / n))
    assert np.all(np.abs(count - batch * r / n) <= norm.isf(1e-6 / (2 * n)) * sd)


def test_pp_marina_defaults_and_errors():
    comp = make_compressor("rand_k:4", 20)
    m = make_method("pp_marina", compressor=comp, n_workers=5, dim=20, batch=2)
    np.testing.assert_array_equal(m.p["clients"], [5, 5])  # r = n
    # p = zeta r/(d n) (docs/theory.md §2.6, Gorbunov et al. 2021, from memory): 4 * 5 / (20 * 5)
    np.testing.assert_allclose(m.p["sync_probability"], [0.2, 0.2], rtol=1e-15)
    m = make_method("pp_marina", compressor=comp, n_workers=5, dim=20, batch=2, clients=[1, 2])
    np.testing.assert_allclose(m.p["sync_probability"], [0.04, 0.08], rtol=1e-15)
    for bad in (0, 6, 2.5):
        with pytest.raises(ValueError, match=r"pp_marina: parameter 'clients' must be integers in \[1, 5\]"):
            make_method("pp_marina", compressor=comp, n_workers=5, dim=20, batch=2, clients=bad)
    perm = make_compressor("perm_k", 20, n_workers=5)
    with pytest.raises(ValueError, match="pp_marina: needs independent compressors"):
        make_method("pp_marina", compressor=perm, n_workers=5, dim=20, batch=2)


def test_pp_marina_bits_follow_the_coin_and_the_draws(cancer):
    """Per round, the mean over workers of the uplink is 32 d on sync rounds and r 32 K/n on
    compressed rounds (r messages of 32 K bits over n workers); the coin is shared."""
    d, n, r = cancer.dim, cancer.n_workers, 2
    run = _run(cancer, "pp_marina", "rand_k:5", step=0.1, rounds=300, sync_probability=0.3, clients=r)[0]
    per_round = np.diff(run.uplink_curve)
    assert per_round[0] == 32.0 * d
    np.testing.assert_allclose(per_round[1:][per_round[1:] != 32.0 * d], r * 32.0 * 5 / n, rtol=1e-15)
    syncs = np.sum(per_round[1:] == 32.0 * d)
    # Binomial(299, 0.3): mean 89.7, sd 7.9; 5 sd either side (false alarm < 1e-6).
    assert abs(syncs - 89.7) < 5 * 7.9
