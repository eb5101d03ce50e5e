"""Engine benchmark: trajectory-rounds per second against one plain gradient.

Builds a 32,000 x 123 logistic problem (0/1 features, about 11% non-zeros)
over 20 workers, stored dense and stored sparse, and prints, measured in this
one run: the time of one plain full-data gradient (the floor), the time per
round of each method at B = 1 and B = 32 trajectories, and each as a ratio to
the floor (median over --repeat pairs, each round timed right after a floor). Goals for the dense problem (issue "Foundation"): MARINA at B = 1
within 1.5x the floor, and a B = 32 round within 6.4x the floor.

Single precision (issue 14): on the dense problem, the per-trajectory round
cost of float32 at B = 32 against float64 at B = 1 (goal: at least 8x cheaper),
both paired with floors like every other row; ``--precision-only`` runs just
that part.

    python benchmarks/engine.py [--rounds 60] [--repeat 5] [--precision-only]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import scipy.sparse as sp

from bittune.compressors import make_compressor
from bittune.problems import problem_from_arrays
from bittune.simulate import simulate

M, D, N = 32_000, 123, 20
METHODS = [
    ("gd", "identity", {}),
    ("dcgd", "rand_k:12", {}),
    ("diana", "rand_k:12", {}),
    ("marina", "rand_k:12", {"sync_probability": 0.1}),
    ("ef21", "top_k:12", {}),
]


def make_data(seed: int = 0):
    rng = np.random.default_rng(seed)
    A = (rng.random((M, D)) < 0.11).astype(np.float64)
    w = rng.standard_normal(D)
    logit = 0.3 * (A @ w - (A @ w).mean())
    y = np.where(rng.random(M) < 1.0 / (1.0 + np.exp(-logit)), 1.0, -1.0)
    return A, y


def plain_gradient_time(A, y, repeat: int) -> float:
    """One full-data logistic gradient written the plain way: two matvecs."""
    rng = np.random.default_rng(1)
    x = rng.standard_normal(D) * 0.01
    At = A.T.tocsr() if sp.issparse(A) else A.T

    def grad():
        z = A @ x
        r = -y / (1.0 + np.exp(y * z)) / M
        return At @ r + 0.1 * 2 * x / (1 + x * x) ** 2

    return _best(grad, repeat, inner=20)


def round_time(problem, method, spec, params, batch: int, rounds: int, precision: str = "float64") -> float:
    """Seconds per round: (best time of R rounds - best time of R/6 rounds) / (5R/6), so setup cancels."""
    comp = make_compressor(spec, problem.dim)
    short = max(rounds // 6, 1)

    def run(r):
        simulate(problem, method=method, compressor=comp, step_size=1e-3, seeds=np.arange(batch),
                 target=0.0, max_rounds=r, params=params, precision=precision)

    def timed(r):
        t0 = time.perf_counter()
        run(r)
        return time.perf_counter() - t0

    t_long = min(timed(rounds) for _ in range(3))
    t_short = min(timed(short) for _ in range(3))
    return (t_long - t_short) / (rounds - short)


def paired_ratio(floor_fn, round_fn, repeat: int) -> tuple[float, float]:
    """Interleave floor and round measurements; return (best round time, median of paired ratios).

    This machine's speed drifts by several percent between seconds; pairing each
    round measurement with a floor measurement taken right before it keeps the
    drift out of the ratio.
    """
    rounds, ratios = [], []
    round_fn()  # warm up
    for _ in range(repeat):
        f = floor_fn()
        r = round_fn()
        rounds.append(r)
        ratios.append(r / f)
    return min(rounds), float(np.median(ratios))


def _best(fn, repeat: int, inner: int = 1) -> float:
    fn()
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        for _ in range(inner):
            fn()
        best = min(best, (time.perf_counter() - t0) / inner)
    return best


#: Methods of the single-precision comparison (MARINA is the goal's reference).
PRECISION_METHODS = [("gd", "identity", {}), ("marina", "rand_k:12", {"sync_probability": 0.1})]
PRECISION_GOAL = 8.0  # float32 at B = 32 per trajectory vs float64 at B = 1 (issue 14)


def precision_rows(problem, floor_fn, rounds: int, repeat: int) -> bool:
    """float64 at B = 1 and float32 at B = 32 (and float64 at B = 32 for scale), per trajectory."""
    print("\n[dense] single precision: round time x floor; gain = per-trajectory cost of float64 B=1 over B=32")
    print(f"{'method':<8} {'compressor':<10} {'f64 B=1':>8} {'f64 B=32':>9} {'f32 B=32':>9} "
          f"{'f64 gain':>9} {'f32 gain':>9}")
    ok = True
    for method, spec, params in PRECISION_METHODS:
        _, r1 = paired_ratio(floor_fn, lambda: round_time(problem, method, spec, params, 1, rounds), repeat)
        _, r64 = paired_ratio(floor_fn, lambda: round_time(problem, method, spec, params, 32, rounds), repeat)
        _, r32 = paired_ratio(floor_fn, lambda: round_time(problem, method, spec, params, 32, rounds,
                                                           "float32"), repeat)
        gain64, gain32 = 32 * r1 / r64, 32 * r1 / r32
        print(f"{method:<8} {spec:<10} {r1:8.2f} {r64:9.2f} {r32:9.2f} {gain64:8.1f}x {gain32:8.1f}x")
        if method == "marina":
            met = gain32 >= PRECISION_GOAL
            ok &= met
            print(f"  goal MARINA float32 B=32 >= {PRECISION_GOAL:g}x cheaper per trajectory than float64 B=1: "
                  f"{'met' if met else 'MISSED'} ({gain32:.1f}x)")
    return ok


def main() -> int:
    ap = argparse.ArgumentParser(description="engine benchmark")
    ap.add_argument("--rounds", type=int, default=60)
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--precision-only", action="store_true", help="only the float32 vs float64 comparison")
    args = ap.parse_args()
    A, y = make_data()
    parts = np.array_split(np.arange(M), N)
    ok = True
    print(f"problem: {M} x {D}, {N} workers, density {np.count_nonzero(A) / A.size:.3f}")
    if args.precision_only:
        problem = problem_from_arrays("logistic_nonconvex", [A[p] for p in parts], [y[p] for p in parts],
                                      regularization=0.1)
        ok = precision_rows(problem, lambda: plain_gradient_time(A, y, 3), args.rounds, args.repeat)
        print("\nall goals met" if ok else "\nsome goals MISSED")
        return 0 if ok else 1
    for storage in ("dense", "sparse"):
        data = A if storage == "dense" else sp.csr_matrix(A)
        problem = problem_from_arrays("logistic_nonconvex", [data[p] for p in parts], [y[p] for p in parts],
                                      regularization=0.1)
        floor_fn = lambda: plain_gradient_time(data, y, 3)  # noqa: E731
        floor = floor_fn()
        print(f"\n[{storage}] plain full-data gradient (floor): {floor * 1e3:.2f} ms (best of 60)")
        print(f"{'method':<8} {'compressor':<10} {'B=1 ms':>8} {'x floor':>8} {'B=32 ms':>8} {'x floor':>8} {'per-traj gain':>13}")
        for method, spec, params in METHODS:
            t1, r1 = paired_ratio(floor_fn, lambda: round_time(problem, method, spec, params, 1, args.rounds), args.repeat)
            t32, r32 = paired_ratio(floor_fn, lambda: round_time(problem, method, spec, params, 32, args.rounds), args.repeat)
            gain = 32 * r1 / r32
            print(f"{method:<8} {spec:<10} {t1 * 1e3:8.2f} {r1:8.2f} {t32 * 1e3:8.2f} {r32:8.2f} {gain:12.1f}x")
            if storage == "dense" and method == "marina":
                goal1, goal32 = r1 <= 1.5, r32 <= 6.4
                ok &= goal1 and goal32
                print(f"  goal MARINA B=1 <= 1.5x floor: {'met' if goal1 else 'MISSED'}; "
                      f"B=32 <= 6.4x floor: {'met' if goal32 else 'MISSED'}")
        if storage == "dense":
            ok &= precision_rows(problem, floor_fn, args.rounds, args.repeat)
    print("\nall goals met" if ok else "\nsome goals MISSED")
    return 0 if ok else 1


if __name__ == "__main__":
    raise SystemExit(main())
