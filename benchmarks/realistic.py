"""Closer to the launched run: minibatch steps, stochastic replay, fronts on two networks, transfer.

One hard generated problem (correlated logistic features with spread scales, the
tuning benchmark's recipe at 4,000 x 40 over 10 workers, iid split). For MARINA
(Rand-K) and EF21 (Top-K) it prints, all measured in this run:

1. the tuned step with full local gradients and with `minibatch: b` (b = 8, 32),
   as a ratio to the full-batch step;
2. each tuned config replayed on the full-batch simulation and on the stochastic
   ones (b = 8, 32) on its own validation seeds: mean uplink bits per worker and
   seeds reached (a config tuned on full gradients may miss under noise);
3. the front (objective: front) on two networks: a fast LAN (1 Gbit/s both ways,
   0.1 ms latency) and a metered uplink (1 Mbit/s up, 10 Mbit/s down, 50 ms
   latency) with two stragglers at a tenth of the speed;
4. every tuned config's transfer ratio (its cost on a bootstrap resample of each
   worker's shard over its cost on the sample, expected.transfer_ratio).

    python benchmarks/realistic.py [--trials 30] [--jobs 2] [--methods marina,ef21] [--quick]

A measurement, not a test: it prints and exits 0 (1 if a tune failed).
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from tuning import make_data  # noqa: E402  (the tuning benchmark's data recipe, at this script's sizes)

from bittune.compressors import spec_text  # noqa: E402
from bittune.config import load_config
from bittune.job import load_job  # noqa: E402
from bittune.replay import replay  # noqa: E402
from bittune.tune import tune  # noqa: E402
from bittune.workspace import open_job  # noqa: E402

M, D, N = 4_000, 40, 10
REGULARIZATION = 1e-3
TARGET = 1e-3  # relative ||grad f||^2: loose enough that a stochastic run's noise floor lies below it
SEED = 0
MINIBATCHES = (8, 32)
PAIRS = {"marina": "rand_k", "ef21": "top_k"}
#: The two networks of the front (issue 13's benchmark). A LAN's latency of 0.1 ms is common practice, no source.
NETWORKS = {
    "LAN 1 Gbit/s": "{latency: 1e-4, uplink_bandwidth: 1e9, downlink_bandwidth: 1e9}",
    "metered 1 Mbit/s, 2 stragglers at 1/10": "{latency: 0.05, uplink_bandwidth: 1e6, downlink_bandwidth: 1e7, "
                                              "workers: {stragglers: 2, slowdown: 10}}",
}


class Quiet:
    """The tune's progress object: one line when each phase starts."""

    def __init__(self, label: str):
        self.label, self.start, self.seen = label, time.monotonic(), set()

    def note(self, text: str) -> None:
        word = text.split(" ", 1)[0]
        if word not in self.seen:
            self.seen.add(word)
            print(f"  [{self.label} {time.monotonic() - self.start:4.0f} s] {text}", file=sys.stderr, flush=True)

    def trials(self, *args) -> None:
        pass


def write_job(folder: Path, name: str, *, method: str, trials: int, jobs: int, minibatch: int | None = None,
              network: str | None = None) -> Path:
    lines = ["data: data.npz", "model: logistic_nonconvex", f"regularization: {REGULARIZATION}",
             f"workers: {{count: {N}, split: iid, seed: 1}}",
             f"target: {{grad_norm_sq: {TARGET}, relative: true}}", "budget: {max_rounds: 20000}",
             "search:", f"  methods: [{method}]", f"  compressors: [{PAIRS[method]}]", f"  trials: {trials}",
             f"  jobs: {jobs}", f"  seed: {SEED}", "  validation_seeds: 10"]
    if minibatch is not None:
        lines.append(f"minibatch: {minibatch}")
    if network is not None:
        lines += ["objective: front", "prefer: balanced", f"network: {network}"]
    path = folder / f"{name}.yaml"
    path.write_text("\n".join(lines) + "\n")
    return path


def run(job: Path, folder: Path, label: str, trials: int) -> dict | None:
    try:
        result = tune(job, output=folder / f"{label}-config.yaml", run_dir=folder / f"{label}.run", trials=trials,
                      progress=Quiet(label))
    except Exception as exc:  # a measurement: report and go on with the other arms
        print(f"  {label}: tune failed: {type(exc).__name__}: {exc}")
        return None
    return result.config


def replay_on(folder: Path, label: str, job: Path, minibatch: int | None) -> str:
    """The config ``label`` replayed on ``job``'s problem, with full gradients (None) or minibatch b."""
    cfg = load_config(folder / f"{label}-config.yaml")
    extra = {k: v for k, v in cfg.extra.items() if k != "gradients"}
    if minibatch is not None:
        extra["gradients"] = {"minibatch": minibatch}
    cfg = dataclasses.replace(cfg, extra=extra)
    ws = open_job(load_job(job))
    runs = replay(ws, cfg, seeds=list(cfg.extra["expected"]["validation_seeds"]))
    bits = np.array([r.uplink_bits for r in runs])
    ok = np.array([r.reached for r in runs])
    mean = f"{bits[ok].mean():>9,.0f}" if ok.any() else f"{'-':>9}"
    return f"{mean} ({ok.sum()}/{ok.size})"


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--trials", type=int, default=30)
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--methods", default=",".join(PAIRS))
    ap.add_argument("--quick", action="store_true", help="6 trials per tune: a smoke run, numbers not meaningful")
    args = ap.parse_args()
    trials = 6 if args.quick else args.trials
    methods = [m for m in args.methods.split(",") if m]
    if unknown := [m for m in methods if m not in PAIRS]:
        ap.error(f"--methods: unknown {', '.join(unknown)} (choose from {', '.join(PAIRS)})")
    failed = 0
    t0 = time.perf_counter()
    print(f"problem: {M:,} x {D} correlated logistic over {N} workers, relative target {TARGET:g}, "
          f"{trials} trials per tune, --jobs {args.jobs}; load average {os.getloadavg()[0]:.1f}")
    with tempfile.TemporaryDirectory(prefix="bittune-realistic-") as tmp:
        folder = Path(tmp)
        X, y = make_data(SEED, rows=M, dim=D)
        np.savez(folder / "data.npz", X=X, y=y)
        for method in methods:
            comp = PAIRS[method]
            print(f"\n== {method} + {comp}")
            jobs = {None: write_job(folder, f"{method}-full", method=method, trials=trials, jobs=args.jobs)}
            for b in MINIBATCHES:
                jobs[b] = write_job(folder, f"{method}-b{b}", method=method, trials=trials, jobs=args.jobs,
                                    minibatch=b)
            tuned = {b: run(job, folder, f"{method}-{'full' if b is None else f'b{b}'}", trials)
                     for b, job in jobs.items()}
            failed += sum(c is None for c in tuned.values())
            full = tuned[None]
            print("tuned step (gradients: tuned step, ratio to the full-batch step; transfer ratio):")
            for b, cfg in tuned.items():
                if cfg is None:
                    continue
                name = "full batch" if b is None else f"minibatch {b}"
                ratio = f"{cfg['step_size'] / full['step_size']:.3g}x" if full else "-"
                print(f"  {name:12s} {spec_text(cfg['compressor'])} step {cfg['step_size']:.4g}  {ratio:>7s}  "
                      f"transfer {cfg['expected'].get('transfer_ratio', float('nan')):.3g}x")
            print("replayed (mean uplink bits/worker over the seeds that reached, reached/seeds):")
            print(f"  {'config tuned on':16s}" + "".join(
                f"{'full batch' if b is None else f'minibatch {b}':>20s}" for b in jobs))
            for tb, cfg in tuned.items():
                if cfg is None:
                    continue
                name = f"{method}-{'full' if tb is None else f'b{tb}'}"
                cells = [replay_on(folder, name, jobs[b], b) for b in jobs]
                row = "full batch" if tb is None else f"minibatch {tb}"
                print(f"  {row:16s}" + "".join(f"{c:>20s}" for c in cells))
            for i, (net_name, net) in enumerate(NETWORKS.items()):
                name = f"{method}-front{i}"
                job = write_job(folder, name, method=method, trials=trials, jobs=args.jobs, network=net)
                cfg = run(job, folder, name, trials)
                if cfg is None:
                    failed += 1
                    continue
                pts = cfg["front"]["points"]
                print(f"front on {net_name} ({len(pts)} points; * chosen, prefer balanced; transfer "
                      f"{cfg['expected'].get('transfer_ratio', float('nan')):.3g}x):")
                for p in pts:
                    print(f"  {'*' if p['chosen'] else ' '} {spec_text(p['compressor'])} step {p['step_size']:.4g}: "
                          f"{p['mean_bits_per_worker']:>9,.0f} bits  {p['mean_seconds']:.4g} s")
    print(f"\nwall {time.perf_counter() - t0:.0f} s; load average {os.getloadavg()[0]:.1f}")
    return 1 if failed else 0


if __name__ == "__main__":
    raise SystemExit(main())
