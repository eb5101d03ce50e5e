"""Uneven networks (per-worker links, stragglers) and downlink compression (EF21-BC).

docs/design.md "Round time with uneven workers"; docs/theory.md §2.11.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import yaml

from bittune.compressors import make_compressor
from bittune.cost import NetworkModel
from bittune.job import parse_job
from bittune.methods import dense_bits
from bittune.problems.quadratic import Quadratic
from bittune.simulate import simulate

from bittune.cli import main
from bittune.tune import tune
from conftest import Quiet, tune_cli_in
from test_job import _problems, _valid, folder  # noqa: F401  (the fixture)

D = 4


def _quadratic(n: int = 3, seed: int = 0) -> Quadratic:
    rng = np.random.default_rng(seed)
    A = rng.standard_normal((n, D, D))
    return Quadratic(np.einsum("nij,nkj->nik", A, A) + np.eye(D), rng.standard_normal((n, D)))


#: Three workers (latency s, uplink bit/s, compute s); downlink 1280 bit/s: a dense broadcast
#: of d = 4 floats (128 bits) takes 0.1 s.
LINKS = ((0.1, 1000.0, 0.5), (0.2, 100.0, 0.1), (0.05, 10.0, 2.0))
NET = NetworkModel(latency=0.05, uplink_bandwidth=1e6, downlink_bandwidth=1280.0, compute_seconds=0.0, workers=LINKS)


def test_straggler_round_is_the_slowest_workers_time():
    """Closed form (hand-computed, docs/design.md): a round lasts max_i (latency_i + compute_i
    + bits_i / bandwidth_i) + broadcast / downlink bandwidth. MARINA with Rand-1 on d = 4:
    round 0 sends dense 128 bits, later rounds 32 bits (Rand-K: 32 K bits, docs/theory.md §1.2),
    with sync probability 0 (never dense again). Hand count:
      round 0: w0 0.1+0.5+0.128 = 0.728, w1 0.2+0.1+1.28 = 1.58, w2 0.05+2+12.8 = 14.85 -> 14.85 + 0.1
      round k: w0 0.1+0.5+0.032 = 0.632, w1 0.2+0.1+0.32 = 0.62,  w2 0.05+2+3.2  = 5.25  -> 5.25 + 0.1
    """
    runs = simulate(_quadratic(), method="marina", compressor=make_compressor("rand_k:1", D), step_size=0.01,
                    seeds=[1, 2], target=0.0, max_rounds=3, params={"sync_probability": 0.0}, network=NET)
    for r in runs:
        assert r.rounds == 3
        # Tolerance: a few float64 roundings of numbers near 10 (common practice, no source).
        np.testing.assert_allclose(np.diff(r.seconds_curve), [14.95, 5.35, 5.35], rtol=1e-12)
        assert NET.seconds(r) == r.seconds_curve[-1]
        np.testing.assert_array_equal(r.worker_shares, [0.0, 0.0, 1.0])  # w2 was the slowest in every round


def test_slowest_worker_changes_with_the_message():
    """The same three links with GD (dense 128 bits every round): w0 0.728, w1 1.58, and a fast
    third worker (0.05 s latency, 1e6 bit/s, no compute): 0.050128 -> w1 is the slowest, each
    round 1.58 + 0.1 s (hand count)."""
    net = NetworkModel(0.05, 1e6, 1280.0, 0.0, workers=(LINKS[0], LINKS[1], (0.05, 1e6, 0.0)))
    (r,) = simulate(_quadratic(), method="gd", compressor=make_compressor("identity", D), step_size=0.01,
                    seeds=[3], target=0.0, max_rounds=4, network=net)
    np.testing.assert_allclose(np.diff(r.seconds_curve), [1.68] * 4, rtol=1e-12)  # roundings, as above
    np.testing.assert_array_equal(r.worker_shares, [0.0, 1.0, 0.0])


def test_pp_marina_waits_only_for_its_sampled_clients():
    """PP-MARINA (one client a compressed round, sync probability 0) on links whose times are
    1, 10 and 100 s (compute only; 1e12 bit/s uplinks make the bits' time below 1e-9 s, and a
    1e15 bit/s downlink too): round 0 (dense, all workers) lasts 100 s; every later round lasts
    the drawn client's time, 1, 10 or 100 s. MARINA waits for all: 100 s every round (closed form).
    """
    links = ((0.0, 1e12, 1.0), (0.0, 1e12, 10.0), (0.0, 1e12, 100.0))
    net = NetworkModel(0.0, 1e12, 1e15, 0.0, workers=links)
    comp = make_compressor("rand_k:1", D)
    rounds = 40
    (pp,) = simulate(_quadratic(), method="pp_marina", compressor=comp, step_size=0.01, seeds=[5], target=0.0,
                     max_rounds=rounds, params={"sync_probability": 0.0, "clients": 1}, network=net)
    (ma,) = simulate(_quadratic(), method="marina", compressor=comp, step_size=0.01, seeds=[5], target=0.0,
                     max_rounds=rounds, params={"sync_probability": 0.0}, network=net)
    step = np.diff(pp.seconds_curve)
    assert abs(step[0] - 100.0) < 1e-6  # bits' time below 1e-9 s a round
    nearest = np.array([1.0, 10.0, 100.0])[np.argmin(np.abs(step[1:, None] - [1.0, 10.0, 100.0]), axis=1)]
    assert np.all(np.abs(step[1:] - nearest) < 1e-6)
    # Uniform draws: P(all 39 draws are the straggler) = 3^-39; each time class appears with
    # probability 1 - 2 (2/3)^39 > 0.9999 (binomial, closed form).
    assert set(nearest.tolist()) == {1.0, 10.0, 100.0}
    # Shares: the seconds each worker set, over the total (docs/design.md).
    for i, t in enumerate([1.0, 10.0, 100.0]):
        own = t * np.sum(nearest == t) + (100.0 if t == 100.0 else 0.0)
        assert abs(pp.worker_shares[i] - own / pp.seconds_curve[-1]) < 1e-9
    np.testing.assert_allclose(np.diff(ma.seconds_curve), 100.0, rtol=1e-9)


def test_an_even_worker_list_gives_the_even_formula():
    """Every worker on the same link with a fixed-size compressor (Rand-K: every worker sends the
    same bits): max_i = mean_i, so the uneven round sum equals the even formula of cost.py
    (rounds latency + passes compute + bits / bw + down / bw), up to summation order."""
    even = NetworkModel(0.05, 1e4, 1e5, 0.01)
    uneven = NetworkModel(0.05, 1e4, 1e5, 0.01, workers=((0.05, 1e4, 0.01),) * 3)
    for method in ("dcgd", "diana", "marina", "ef21"):
        runs = simulate(_quadratic(), method=method, compressor=make_compressor("rand_k:2", D), step_size=0.02,
                        seeds=[1, 2, 3], target=1e-6, max_rounds=30, network=uneven)
        for r in runs:
            # Tolerance: 30 additions in a different order, relative eps 2.2e-16 each (no source).
            assert abs(uneven.seconds(r) - even.seconds(r)) <= 1e-12 * even.seconds(r)


def test_dense_downlink_and_no_network_keep_todays_totals():
    """Without a downlink compressor every round broadcasts one dense vector, 32 d bits
    (docs/theory.md §1.2), and passing an even network changes nothing in a trajectory."""
    q = _quadratic()
    for method in ("gd", "dcgd", "diana", "marina", "pp_marina", "ef21"):
        kw = dict(method=method, compressor=make_compressor("identity" if method == "gd" else "rand_k:2", D),
                  step_size=0.02, seeds=[1, 2], target=1e-6, max_rounds=25)
        plain = simulate(q, **kw)
        with_even = simulate(q, **kw, network=NetworkModel(0.05, 1e6, 1e7, 0.01))
        for a, b in zip(plain, with_even):
            assert a.downlink_bits == dense_bits(D) * a.rounds
            assert (a.uplink_bits, a.downlink_bits, a.rounds) == (b.uplink_bits, b.downlink_bits, b.rounds)
            np.testing.assert_array_equal(a.x, b.x)
            assert a.seconds_curve is None and b.seconds_curve is None


def test_ef21_bc_bits_match_a_hand_count():
    """EF21-BC, d = 4, n = 2: uplink Rand-1 (32 bits), downlink Top-2 (2 (32 + ceil(log2 4)) = 68
    bits, docs/theory.md §1.2). Round 0 sends and broadcasts dense vectors (128 bits); after R
    rounds the uplink is 128 + 32 (R - 1) and the downlink 128 + 68 (R - 1) bits per worker
    (hand count)."""
    q = _quadratic(n=2)
    for R in (1, 2, 5):
        (r,) = simulate(q, method="ef21", compressor=make_compressor("rand_k:1", D), step_size=0.01, seeds=[4],
                        target=0.0, max_rounds=R, downlink=make_compressor("top_k:2", D))
        assert r.rounds == R
        assert r.uplink_bits == 128 + 32 * (R - 1)
        assert r.downlink_bits == 128 + 68 * (R - 1)
        np.testing.assert_array_equal(np.diff(r.downlink_curve), [128] + [68] * (R - 1))


def test_ef21_bc_with_an_exact_downlink_is_ef21():
    """C_M = identity: b^{t+1} = b^t + (g^{t+1} - b^t) = g^{t+1}, so EF21-BC is EF21 (the source's
    reduction; up to the rounding of b + (g - b), 1e-12 relative on this well-scaled problem)."""
    q = _quadratic()
    kw = dict(method="ef21", compressor=make_compressor("top_k:1", D), step_size=0.02, seeds=[1, 2],
              target=0.0, max_rounds=20)
    plain = simulate(q, **kw)
    bc = simulate(q, **kw, downlink=make_compressor("identity", D))
    for a, b in zip(plain, bc):
        np.testing.assert_allclose(b.x, a.x, rtol=1e-12, atol=1e-12)
        assert b.downlink_bits == a.downlink_bits  # identity: 32 d bits, the dense count


def test_a_method_without_a_bidirectional_form_refuses_a_downlink():
    with pytest.raises(ValueError, match="marina: has no bidirectional form"):
        simulate(_quadratic(), method="marina", compressor=make_compressor("rand_k:1", D), step_size=0.01,
                 seeds=[1], target=0.0, max_rounds=2, downlink=make_compressor("top_k:2", D))


# ------------------------------------------------------------------- the job's keys
def test_worker_list_and_stragglers_are_read(folder):  # noqa: F811
    seconds = {"objective": "seconds"}
    links = [{"uplink_bandwidth": 5e5}, {}, {"latency": 0.2, "compute_seconds": 0.3}]
    job = parse_job(_valid(**seconds, workers={"count": 3, "split": "iid"},
                           network={"uplink_bandwidth": 1e6, "workers": links}), base_dir=folder, source="j")
    w = job.network.workers
    assert [x["uplink_bandwidth"] for x in w] == [5e5, 1e6, 1e6]
    assert [x["latency"] for x in w] == [0.05, 0.05, 0.2]
    assert [x["compute_seconds"] for x in w] == [None, None, 0.3]
    job = parse_job(_valid(**seconds, workers={"count": 4, "split": "iid"},
                           network={"compute_seconds": 0.01, "workers": {"stragglers": 2, "slowdown": 10}}),
                    base_dir=folder, source="j")
    w = job.network.workers
    # Two stragglers at 1/10 speed: a tenth of the bandwidth, ten times the compute (the last two).
    assert [x["uplink_bandwidth"] for x in w] == [1e6, 1e6, 1e5, 1e5]
    np.testing.assert_allclose([x["compute_seconds"] for x in w], [0.01, 0.01, 0.1, 0.1], rtol=1e-15)


BAD = [
    (dict(network={"workers": [{}, {}, {"uplink_bandwidth": 0}]}),
     "network.workers[2].uplink_bandwidth: must be a number > 0, got 0"),
    (dict(network={"workers": [{"uplink_bandwidth": -3}, {}, {}]}),
     "network.workers[0].uplink_bandwidth: must be a number > 0, got -3"),
    (dict(network={"workers": [{}, {}]}), "network.workers: must list one entry per worker (3, workers.count), got 2"),
    (dict(network={"workers": {"stragglers": 4}}), "network.workers.stragglers: at most the 3 workers"),
    (dict(network={"workers": {"slowdown": 0.5}}), "network.workers.slowdown: must be a number >= 1, got 0.5"),
    (dict(downlink={"compressor": "top_k:2"}), "downlink.compressor: only ef21 has a bidirectional form"),
    (dict(downlink={"compressor": "top_k:0"}, search={"methods": ["ef21"]}), "downlink.compressor.k"),
]


@pytest.mark.parametrize("change, message", BAD)
def test_bad_network_and_downlink_keys_are_named(folder, change, message):  # noqa: F811
    got = _problems(_valid(objective="seconds", workers={"count": 3, "split": "iid"}, **change), folder)
    assert any(message in p for p in got), got


def test_cli_refuses_a_zero_bandwidth_worker_and_writes_nothing(tmp_path):
    """Through the command line (as tests/test_cli.py): exit 2, key named, no config, no run folder."""
    rng = np.random.default_rng(7)
    rows = "\n".join(f"{int(a > 0)} 1:{a:.3f} 2:{b:.3f}" for a, b in rng.normal(size=(12, 2)))
    (tmp_path / "d.svm").write_text(rows + "\n")
    proc, unchanged = tune_cli_in(tmp_path, (
        "data: d.svm\nmodel: logistic_nonconvex\nobjective: seconds\nworkers: {count: 3, split: iid}\n"
        "target: {grad_norm_sq: 1e-3}\nbudget: {max_rounds: 100}\n"
        "network: {workers: [{}, {uplink_bandwidth: 0}, {}]}\n"))
    assert proc.returncode == 2, proc.stderr
    assert "network.workers[1].uplink_bandwidth: must be a number > 0, got 0" in proc.stderr
    assert unchanged  # no config, no run folder


def test_tune_with_stragglers_and_a_compressed_downlink_writes_shares_and_downlink(tmp_path):
    """End to end on the generated demo data: two stragglers at 1/10 speed and EF21-BC. The config
    records the time shares (they sum to 1: every round's seconds go to one worker) and the
    downlink; replaying the config on its validation seeds gives back its expected bits."""
    root = Path(__file__).resolve().parents[1]
    subprocess.run([sys.executable, str(root / "examples/frost/make_data.py"), "--out", str(tmp_path / "s.svm"),
                    "--nights", "40"], check=True, capture_output=True)
    (tmp_path / "job.yaml").write_text(
        "data: s.svm\nmodel: logistic_nonconvex\nregularization: 0.01\nobjective: seconds\n"
        "workers: {count: 6, split: iid}\ntarget: {grad_norm_sq: 1e-2}\nbudget: {max_rounds: 2000}\n"
        "network: {compute_seconds: 0.001, workers: {stragglers: 2, slowdown: 10}}\n"
        "downlink: {compressor: 'top_k:8'}\n"
        "search: {methods: [ef21], compressors: [top_k], trials: 4, seeds: 2, validation_seeds: 2, finalists: 1}\n")
    tune(tmp_path / "job.yaml", output=tmp_path / "c.yaml", progress=Quiet())
    cfg = yaml.safe_load((tmp_path / "c.yaml").read_text())
    shares = cfg["network_shares"]["slowest_share"]
    assert len(shares) == 6 and abs(sum(shares) - 1.0) < 1e-3  # rounded to 4 digits each
    assert sum(shares[4:]) > 0.99  # the stragglers (the last two) set the pace
    assert cfg["downlink"]["compressor"] == {"name": "top_k", "k": 8}
    d = cfg["problem"]["dimension"]
    rounds = cfg["expected"]["rounds"]
    # Hand count: a dense first broadcast, then 8 (32 + ceil(log2 d)) bits a round (docs/theory.md §1.2).
    per = 8 * (32 + int(np.ceil(np.log2(d))))
    assert cfg["downlink"]["mean_bits_per_worker"] == pytest.approx(
        np.mean([32 * d + per * (r - 1) for r in rounds]), rel=1e-3)  # config figures keep 4 digits
    assert main(["replay", str(tmp_path / "c.yaml"), "--job", str(tmp_path / "job.yaml")]) == 0


def test_the_monitor_sees_the_seconds_the_objective_counts():
    """Pruning compares trials at equal cost: with a network the engine hands the monitor the
    seconds so far, the same numbers as the trajectory's seconds curve (uneven) or the cost
    formula at that round (even; here EF21-BC, whose broadcast is not dense)."""
    seen = []

    def monitor(k, index, cost, metric):
        seen.append((k, cost.copy()))
        return False

    (r,) = simulate(_quadratic(), method="marina", compressor=make_compressor("rand_k:1", D), step_size=0.01,
                    seeds=[1], target=0.0, max_rounds=5, network=NET, monitor=monitor)
    np.testing.assert_array_equal([c[0] for _, c in seen], r.seconds_curve[1:])
    even = NetworkModel(0.05, 1e3, 1e4, 0.01)
    seen.clear()
    (r,) = simulate(_quadratic(), method="ef21", compressor=make_compressor("top_k:1", D), step_size=0.01,
                    seeds=[1], target=0.0, max_rounds=5, network=even, monitor=monitor,
                    downlink=make_compressor("top_k:2", D))
    assert [c[0] for _, c in seen] == [float(even.seconds_at(k, r.passes_curve[k], r.uplink_curve[k],
                                                             r.downlink_curve[k])) for k, _ in seen]
    assert seen[-1][1][0] == even.seconds(r)
