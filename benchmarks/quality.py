"""Tuning quality for every method: theory, bittune, an exhaustive grid and plain Optuna.

On the tuning benchmark's problem (:mod:`tuning`: 8,000 x 60 correlated logistic,
10 workers), for each of EF21 + Top-K, DIANA + Rand-K, MARINA + PermK and
PP-MARINA + Rand-K, all re-validated on the SAME fresh seeds
(:func:`bittune.select.evaluate`):

(a) the theory point at the theory density (the selection's baseline);
(b) ``bittune.tune.tune`` with --trials trials (jobs=2);
(c) the best point of an exhaustive grid in theory units (density x step multiplier
    x sync / shift multiplier), each point scored like a trial (search seeds,
    :func:`bittune.search.score`, the bit-cap rule, no pruning); its size printed;
(d) a plain raw-units Optuna study (TPE) at the same budget.

Goal per method (issue 16): (b) within 5% of (c) (paired-bootstrap interval's upper
end <= 1.05, or point estimate <= 1.0) with at most a tenth of the grid's evaluations,
and (b) no worse than (d) (same rule). Exit code 0 when every goal holds.

    python benchmarks/quality.py [--methods ef21,diana,marina,pp_marina] [--trials 60] [--quick]
                                 [--validation-seeds 20]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import optuna

sys.path.insert(0, str(Path(__file__).resolve().parent))

from tuning import (  # noqa: E402  (the sibling script's shared helpers)
    D, Log, SEED, check, grid_best, make_data, load_text, paired_interval, plain_optuna, print_four, ratio_text, run_tune,
    validations, write_job)

from bittune.job import load_job  # noqa: E402
from bittune.probe import probe_workspace  # noqa: E402
from bittune.search import SYNCED, Space, search_seeds  # noqa: E402
from bittune.select import validation_seeds  # noqa: E402
from bittune.workspace import open_job  # noqa: E402

#: The method and compressor of each comparison (issue 16).
PAIRS = {"ef21": "top_k", "diana": "rand_k", "marina": "perm_k", "pp_marina": "rand_k"}
#: Grid in theory units, each method's at least ten times bittune's ~70 evaluations (60 trials and
#: the selection's re-runs), so that the "a tenth of the grid's evaluations" goal can hold.
#: EF21: every K of [1, d] (one density-like axis only) x 13 steps.
STEPS = tuple(2.0 ** j for j in range(13))  # x1 .. x4096 the theory step
MULTS = (0.25, 0.5, 1.0, 2.0, 4.0, 8.0)  # sync-probability or shift-rate multipliers
GRID_K = 11
#: MARINA + PermK has one density: finer step and sync axes instead (37 x 21 = 777 points).
PERM_STEPS = tuple(2.0 ** (j / 3) for j in range(-3, 34))  # x0.5 .. x2048
PERM_MULTS = tuple(2.0 ** (j / 4) for j in range(-8, 13))  # x0.25 .. x8
#: PP-MARINA also draws its clients r (bittune and plain Optuna search r in [1, n]): 6 densities x
#: 3 client counts x 4 sync multipliers x 13 steps = 936 points.
PP_K, PP_CLIENTS, PP_MULTS = 6, (2, 5, 10), (0.5, 1.0, 2.0, 4.0)
QUICK_STEPS, QUICK_MULTS = tuple(4.0 ** j for j in range(5)), (0.5, 2.0)


def grid(space: Space, method: str, name: str, *, quick: bool) -> list:
    """Distinct candidates of the method's grid (min(1, mult x theory) merges some)."""
    steps, mults, clients = (QUICK_STEPS, QUICK_MULTS, (None,)) if quick else (STEPS, MULTS, (None,))
    if name == "perm_k":
        comps = [{"name": name}]
        if not quick:
            steps, mults = PERM_STEPS, PERM_MULTS
    elif method == "ef21" and not quick:
        comps = [{"name": name, "k": k} for k in range(1, D + 1)]
    elif method == "pp_marina" and not quick:
        comps, clients, mults = space.density_options(name, PP_K), PP_CLIENTS, PP_MULTS
    else:
        comps = space.density_options(name, 3 if quick else GRID_K)
    extra = mults if method in SYNCED or method == "diana" else (None,)
    out, seen = [], set()
    for comp in comps:
        for r in clients:
            for e in extra:
                for m in steps:
                    kw = {"sync_mult": e} if method in SYNCED else {"shift_mult": e} if method == "diana" else {}
                    c = space.candidate(method, comp, step_mult=m, clients=r, **kw)
                    if c.key() not in seen:
                        seen.add(c.key())
                        out.append(c)
    return out


def within(x, y, *, margin: float) -> tuple[bool, str]:
    """x no dearer than ``margin`` x y: interval's upper end <= margin or point estimate <= 1."""
    _, hi = paired_interval(x, y)
    ok = x.all_reached and (hi <= margin or x.mean_bits / y.mean_bits <= 1.0)
    return ok, ratio_text(x, y)


def compare(folder: Path, method: str, *, trials: int, validation: int, quick: bool) -> bool:
    name, t_method = PAIRS[method], time.perf_counter()
    job_path = write_job(folder, f"job-{method}", methods=[method], compressors=[name], trials=trials,
                         validation=validation)
    job = load_job(job_path)
    ws = open_job(job)
    constants, _ = probe_workspace(ws)
    space = Space(job.search, constants, target=ws.target)
    seeds, fresh = search_seeds(job.search), validation_seeds(job.search)

    result, wall_b = run_tune(job_path, folder, trials=trials, jobs=2, label=method)
    sel = result.selection
    a, b = sel.baseline, sel.winner
    if sel.seeds != fresh:
        raise RuntimeError(f"tune validated on seeds {sel.seeds}, this benchmark on {fresh}")
    points = grid(space, method, name, quick=quick)
    t0 = time.perf_counter()
    c = grid_best(job_path, ws, points, fresh, factor=job.search.bits_cap_factor, seeds=len(seeds))
    wall_c = time.perf_counter() - t0
    t0 = time.perf_counter()
    cand_d, n_d = plain_optuna(ws, seeds, trials=trials, factor=job.search.bits_cap_factor,
                               log=Log(f"plain-{method}"), method=method, compressor=name)
    from bittune.select import evaluate

    d = evaluate(ws, [cand_d], fresh)[0]
    wall_d = time.perf_counter() - t0
    evals_b = trials + validations(sel)
    print(f"\n{method.upper()} + {name}: mean uplink bits per worker over {len(fresh)} fresh seeds; "
          f"grid {len(points)} distinct points ({wall_c:.0f} s), tune {wall_b:.0f} s (search.trial_batch "
          f"{job.search.trial_batch}), plain {wall_d:.0f} s")
    print_four(a, b, c, d, trials=trials, evals_b=evals_b, grid_size=len(points), plain_trials=n_d)
    print(f"  steps over 1/L = {1 / constants.L:.4g}: (a) x{a.candidate.step_size * constants.L:.3g}, "
          f"(b) x{b.candidate.step_size * constants.L:.3g}, (c) x{c.candidate.step_size * constants.L:.3g}, "
          f"(d) x{d.candidate.step_size * constants.L:.3g}")
    chosen = sel.chosen or b
    if chosen is not b:
        print(f"  (b) back-off: the chosen finalist's step {chosen.candidate.step_size:.4g} "
              f"({chosen.mean_bits:,.0f} bits) became {b.candidate.step_size:.4g} (ratio "
              f"{b.mean_bits / chosen.mean_bits:.3f}; search.backoff_tolerance {job.search.backoff_tolerance})")
    ok_c, text_c = within(b, c, margin=1.05)
    ok_d, text_d = within(b, d, margin=1.0)
    goals = [check(f"{method}: (b) within 5% of the grid's best (c)", ok=ok_c, detail=text_c),
             check(f"{method}: (b) uses at most a tenth of the grid's evaluations", ok=evals_b <= len(points) / 10,
                   detail=f"{evals_b} vs {len(points)} / 10 = {len(points) / 10:.1f}"),
             check(f"{method}: (b) no worse than plain Optuna (d)", ok=ok_d, detail=text_d)]
    ok = all(goals)
    print(f"wall {method}: {time.perf_counter() - t_method:.0f} s (tune {wall_b:.0f} s, grid {wall_c:.0f} s, "
          f"plain {wall_d:.0f} s); {load_text()}")
    print(f"goal {method}: {'met' if ok else 'MISSED'}", flush=True)
    return ok


def main() -> int:
    ap = argparse.ArgumentParser(description="tuning quality for every method (issue 16)")
    ap.add_argument("--methods", default=",".join(PAIRS), help=f"comma-separated, of {', '.join(PAIRS)}")
    ap.add_argument("--trials", type=int, default=60)
    ap.add_argument("--validation-seeds", type=int, default=20, help="fresh paired seeds of every comparison")
    ap.add_argument("--quick", action="store_true", help="small grid, few trials and seeds: a smoke test only")
    args = ap.parse_args()
    methods = [m.strip() for m in args.methods.split(",") if m.strip()]
    bad = [m for m in methods if m not in PAIRS]
    if bad:
        print(f"--methods: unknown {', '.join(bad)} (choose from {', '.join(PAIRS)})", file=sys.stderr)
        return 2
    trials = min(args.trials, 12) if args.quick else args.trials
    validation = min(args.validation_seeds, 5) if args.quick else args.validation_seeds
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="bittune-quality-") as tmp:
        folder = Path(tmp)
        X, y = make_data(SEED)
        np.savez(folder / "data.npz", X=X, y=y)
        if args.quick:
            print("QUICK MODE: small grid and few trials; the goals below are NOT meaningful")
        results = {m: compare(folder, m, trials=trials, validation=validation, quick=args.quick) for m in methods}
    print(f"\ntotal wall time {time.perf_counter() - t0:.0f} s")
    print("goals: " + ", ".join(f"{m} {'met' if ok else 'MISSED'}" for m, ok in results.items()))
    return 0 if all(results.values()) else 1


if __name__ == "__main__":
    raise SystemExit(main())
