"""Scale benchmark: tuning wall time, memory and the tuned config's bits as the sample grows.

For each configuration N x d x n (N rows, d features, n workers) of a grid it
generates a seeded problem (dense: correlated features from a low-rank factor
model plus noise; ``s`` configurations: d = 20,000 features at 1% density,
written as svmlight and read as scipy.sparse CSR), then tunes it three times
with the same trial budget and ``--jobs``, each arm in a child process of its own:

  one      one trial at a time (``search.trial_batch: 1``), float64;
  batched  batched trials (``search.trial_batch``: the job's default, or --trial-batch), float64;
  float32  batched trials and ``engine.precision: float32``.

It prints the wall time of each arm by phase (probe = everything before the
search, search, selection = validation, back-off, report), the ratios against
``one``, each arm's peak memory (:class:`TreeMemory`, from /proc: the coordinator's
own high-water mark, the largest worker's, their bound coordinator + jobs x worker,
and the largest sampled sum over the whole process tree; ru_maxrss and ``wait4``
cannot be used, exec hands a parent's high-water mark down to the child), and
the three tuned configs' mean bits on the SAME fresh validation seeds
(:func:`bittune.select.validation_seeds`, run by :func:`bittune.select.evaluate`
in float64 in one more child), so speed is never bought with quality.

Goals (issue "tuning at the size users bring"): the 50,000 x 500 dense sample
over 16 workers tunes 60 trials with --jobs 2 in at most 10 minutes (fastest
arm), no arm of any configuration above 8 GiB peak RSS, and every faster arm's
tuned config within 5% of ``one``'s fresh-seed bits. Exit code 0 when they hold.

    python benchmarks/scale.py [--trials 60] [--jobs 2] [--quick] [--only 50000x500x16] [--only 20000x20000sx16]
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from tuning import Log  # the progress object that marks when each phase began

#: The default grid: (N, d, n, sparse). Dense d from 50 to 2,000, one sparse 20k-feature sample.
GRID = [(10_000, 50, 8, False), (20_000, 200, 16, False), (50_000, 500, 16, False), (100_000, 50, 64, False),
        (20_000, 2_000, 16, False), (20_000, 20_000, 16, True)]
QUICK = [(2_000, 20, 4, False), (2_000, 2_000, 4, True)]
GOAL = (50_000, 500, 16, False)
GOAL_SECONDS, GOAL_RSS_GIB, QUALITY = 600.0, 8.0, 0.05
RANK, NOISE = 5, 0.3  # factor model, as benchmarks/tuning.py
DENSITY = 0.01  # sparse configurations: nonzeros per row = 1% of d
REGULARIZATION = 0.01
TARGET = 1e-4  # relative ||grad f||^2 target: GD needs hundreds of rounds (our choice)
MAX_ROUNDS = 5_000
METHODS, COMPRESSORS = ["marina", "diana", "dcgd"], ["rand_k", "dither"]
SEED = 0
ARMS = ("one", "batched", "float32")


# ------------------------------------------------------------------------ problems
def parse_config(text: str) -> tuple[int, int, int, bool]:
    """``NxDxn`` (dense) or ``NxDsxn`` (sparse, 1% density), e.g. 50000x500x16, 20000x20000sx16."""
    try:
        a, b, c = text.lower().split("x")
        sparse = b.endswith("s")
        return int(a), int(b.rstrip("s")), int(c), sparse
    except ValueError:
        raise SystemExit(f"--only: expected NxDxn or NxDsxn (sparse), got {text!r}") from None


def name(cfg) -> str:
    N, d, n, sparse = cfg
    return f"{N}x{d}{'s' if sparse else ''}x{n}"


def dense_data(N: int, d: int, seed: int = SEED) -> tuple[np.ndarray, np.ndarray]:
    """Correlated features (low-rank factors + noise), column scales geomspace(0.1, 10); logistic labels."""
    rng = np.random.default_rng([seed, N, d])
    X = rng.standard_normal((N, RANK)) @ rng.standard_normal((RANK, d))
    X += NOISE * rng.standard_normal((N, d))
    X *= np.geomspace(0.1, 10.0, d) / math.sqrt(RANK)
    hidden = rng.standard_normal(d) / np.geomspace(0.1, 10.0, d)
    margin = X @ hidden
    margin *= 2.0 / margin.std()
    y = (rng.random(N) < 1.0 / (1.0 + np.exp(-margin))).astype(np.float64)
    return X, y


def write_sparse(path: Path, N: int, d: int, seed: int = SEED) -> None:
    """svmlight rows with DENSITY x d nonzeros each (distinct sorted columns, lognormal values);
    labels from a sparse hidden model, logistic."""
    rng = np.random.default_rng([seed, N, d, 1])
    k = max(1, round(DENSITY * d))
    hidden = rng.standard_normal(d)
    with open(path, "w") as fh:
        for start in range(0, N, 2_000):
            rows = min(2_000, N - start)
            cols = np.sort(np.argpartition(rng.random((rows, d)), k, axis=1)[:, :k], axis=1)
            vals = rng.lognormal(0.0, 0.5, (rows, k)) * rng.choice([-1.0, 1.0], (rows, k))
            margin = (vals * hidden[cols]).sum(axis=1)
            margin *= 2.0 / max(margin.std(), 1e-12)
            y = np.where(rng.random(rows) < 1.0 / (1.0 + np.exp(-margin)), 1, 0)
            fh.writelines(f"{y[r]} " + " ".join(f"{c + 1}:{v:.6g}" for c, v in zip(cols[r], vals[r])) + "\n"
                          for r in range(rows))


def write_job(folder: Path, label: str, cfg, *, data: str, trials: int, jobs: int, trial_batch: int,
              precision: str) -> Path:
    n = cfg[2]
    text = f"""# generated by benchmarks/scale.py
data: {data}
model: logistic_nonconvex
regularization: {REGULARIZATION}
workers: {{count: {n}, split: iid, seed: 1}}
target: {{grad_norm_sq: {TARGET}, relative: true}}
budget: {{max_rounds: {MAX_ROUNDS}}}
engine: {{precision: {precision}}}
search:
  methods: [{", ".join(METHODS)}]
  compressors: [{", ".join(COMPRESSORS)}]
  trials: {trials}
  jobs: {jobs}
  seed: {SEED}
  trial_batch: {trial_batch}
"""
    path = folder / f"{label}.yaml"
    path.write_text(text)
    return path


# ---------------------------------------------------------------------- children
def _status_kib(pid: int, key: str) -> int:
    """``key`` (VmRSS, VmHWM) of /proc/PID/status in KiB; 0 once the process is gone."""
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                if line.startswith(key + ":"):
                    return int(line.split()[1])
    except (OSError, ValueError):
        pass
    return 0


def _descendants(root: int) -> list[int]:
    """Pids of the living descendants of ``root`` (from the ppid field of /proc/*/stat)."""
    children: dict[int, list[int]] = {}
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                with open(f"/proc/{entry}/stat") as fh:
                    ppid = int(fh.read().rsplit(")", 1)[1].split()[1])
            except (OSError, ValueError, IndexError):
                continue
            children.setdefault(ppid, []).append(int(entry))
    out, todo = [], [root]
    while todo:
        kids = children.get(todo.pop(), [])
        out += kids
        todo += kids
    return out


class TreeMemory:
    """Peak memory of this process and its descendants, sampled every ``every`` seconds.

    ru_maxrss cannot tell them apart on Linux: exec copies the parent's high-water mark
    into the new program's (from memory: the kernel's ``exec_mmap``), so every worker
    started by a coordinator at 2.8 GiB reports >= 2.8 GiB from ``getrusage`` and from
    ``wait4`` (measured: a child exec'd by a process at 1.03 GiB reports ru_maxrss 1.03 GiB
    and VmHWM 13 MB). VmHWM in /proc/PID/status is the high-water mark of the process's own
    address space only. Kept: this process's VmHWM, each descendant's largest VmHWM seen
    (a worker that peaks and exits within one interval can be missed), and the largest
    sampled sum of VmRSS over the whole tree (what was resident at one moment).
    """

    def __init__(self, every: float = 0.25):
        import threading

        self.every, self.worker_kib, self.tree_kib = every, {}, 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._thread.start()

    def _sample(self) -> None:
        me = os.getpid()
        kids = _descendants(me)
        total = _status_kib(me, "VmRSS")
        for pid in kids:
            total += _status_kib(pid, "VmRSS")
            self.worker_kib[pid] = max(self.worker_kib.get(pid, 0), _status_kib(pid, "VmHWM"))
        self.tree_kib = max(self.tree_kib, total)

    def _run(self) -> None:
        while not self._stop.wait(self.every):
            self._sample()

    def stop(self) -> dict:
        """Stop sampling; GiB: ``self`` (VmHWM), ``worker`` (largest descendant), ``tree`` (sampled sum)."""
        self._sample()
        self._stop.set()
        self._thread.join()
        gib = 2.0**20
        return {"self": _status_kib(os.getpid(), "VmHWM") / gib,
                "worker": max(self.worker_kib.values(), default=0) / gib, "tree": self.tree_kib / gib}


def child_tune(job: str, out: str, label: str) -> int:
    """One arm: tune, then write wall times by phase, the winner and the peak memory."""
    from bittune.tune import tune

    log = Log(label)
    memory = TreeMemory()
    t0 = time.perf_counter()
    result = tune(job, output=Path(out) / f"{label}-config.yaml", run_dir=Path(out) / f"{label}.run", progress=log)
    wall = time.perf_counter() - t0
    # Reap the loky workers (their last samples are taken before they go).
    from joblib.externals.loky import get_reusable_executor

    mem = memory.stop()
    get_reusable_executor().shutdown(wait=True)
    search_at, select_at = log.marks.get("search:", 0.0), log.marks.get("select:", wall)
    w = result.selection.winner
    doc = {"wall": wall, "probe": search_at, "search": select_at - search_at, "select": wall - select_at,
           "trials": result.trials, "winner": w.candidate.to_config(), "bits": w.mean_bits,
           "reached": int(sum(r.reached for r in w.runs)), "seeds": len(w.runs),
           "rss_self": mem["self"], "rss_workers": mem["worker"], "rss_tree": mem["tree"],
           "load": os.getloadavg()[0]}
    Path(out, f"{label}.json").write_text(json.dumps(doc))
    return 0


def child_quality(job: str, out: str) -> int:
    """The arms' winners on the same fresh seeds, float64, one engine batch per method and compressor."""
    from bittune.job import load_job
    from bittune.search import Candidate
    from bittune.select import evaluate, validation_seeds
    from bittune.workspace import open_job

    jb = load_job(job)
    ws = open_job(jb)
    docs = [json.loads(Path(out, f"{a}.json").read_text()) for a in ARMS]
    cands = [Candidate(**{k: v for k, v in d["winner"].items()}) for d in docs]
    seeds = validation_seeds(jb.search)
    evals = evaluate(ws, cands, seeds)
    Path(out, "quality.json").write_text(json.dumps({"seeds": seeds, "bits": [e.bits.tolist() for e in evals],
                                                     "reached": [int(sum(r.reached for r in e.runs))
                                                                 for e in evals]}))
    return 0


def run_child(args: list[str]) -> None:
    """Run this script with ``args`` in a child process (niced like its parent)."""
    code = subprocess.run([sys.executable, __file__, *args]).returncode
    if code != 0:
        raise SystemExit(f"child {' '.join(args)} failed with exit code {code}")


# ------------------------------------------------------------------------ parent
@dataclass
class Outcome:
    cfg: tuple
    arms: dict  # arm -> child document
    quality: dict
    data_seconds: float


def default_batch() -> int:
    """The job's default ``search.trial_batch`` (8 when the default is one trial at a time)."""
    from bittune.job import SearchSpec

    value = SearchSpec.__dataclass_fields__["trial_batch"].default
    return value if value > 1 else 8


def run_config(cfg, *, trials: int, jobs: int, batch: int, folder: Path) -> Outcome:
    N, d, _, sparse = cfg
    t0 = time.perf_counter()
    if sparse:
        data = "data.svm"
        write_sparse(folder / data, N, d)
    else:
        data = "data.npz"
        X, y = dense_data(N, d)
        np.savez(folder / data, X=X, y=y)
        del X, y
    data_seconds = time.perf_counter() - t0
    arms = {}
    settings = {"one": (1, "float64"), "batched": (batch, "float64"), "float32": (batch, "float32")}
    for arm in ARMS:
        tb, prec = settings[arm]
        job = write_job(folder, arm, cfg, data=data, trials=trials, jobs=jobs, trial_batch=tb, precision=prec)
        run_child(["--child-tune", str(job), str(folder), arm])
        arms[arm] = json.loads((folder / f"{arm}.json").read_text())
        print(f"  {name(cfg)} {arm}: {arms[arm]['wall']:.0f} s, load {arms[arm]['load']:.1f}", file=sys.stderr)
    job = write_job(folder, "quality", cfg, data=data, trials=trials, jobs=1, trial_batch=1, precision="float64")
    run_child(["--child-quality", str(job), str(folder)])
    quality = json.loads((folder / "quality.json").read_text())
    return Outcome(cfg, arms, quality, data_seconds)


def report(o: Outcome, *, jobs: int) -> list[tuple[str, bool, str]]:
    """Print one configuration's table; returns its goal checks (text, ok, detail)."""
    N, d, n, sparse = o.cfg
    kind = f"sparse, {DENSITY:.0%} density" if sparse else "dense"
    print(f"\n{N:,} x {d:,} ({kind}) over {n} workers; data written in {o.data_seconds:.0f} s")
    print(f"{'arm':<8} {'trials':>6} {'probe s':>8} {'search s':>9} {'select s':>9} {'wall s':>7} {'x one':>6} "
          f"{'search x':>8} {'coord':>6} {'worker':>7} {'bound':>6} {'tree':>6} {'fresh bits':>12} "
          f"{'reached':>7} {'/ one':>6} {'load':>5}")
    one = o.arms["one"]
    bits = [float(np.mean(b)) for b in o.quality["bits"]]
    checks = []
    for i, arm in enumerate(ARMS):
        a = o.arms[arm]
        bound = a["rss_self"] + jobs * a["rss_workers"]
        peak = max(bound, a["rss_tree"])  # the tree's sum also holds helpers (loky's tracker, the report's browser)
        done = a["trials"].get("complete", 0) + a["trials"].get("pruned", 0) if isinstance(a["trials"], dict) else "?"
        print(f"{arm:<8} {done!s:>6} {a['probe']:8.1f} {a['search']:9.1f} {a['select']:9.1f} {a['wall']:7.0f} "
              f"{one['wall'] / a['wall']:6.2f} {one['search'] / max(a['search'], 1e-9):8.2f} "
              f"{a['rss_self']:6.2f} {a['rss_workers']:7.2f} {bound:6.2f} {a['rss_tree']:6.2f} {bits[i]:12,.0f} "
              f"{o.quality['reached'][i]:>3}/{len(o.quality['seeds']):<3} {bits[i] / bits[0]:6.3f} {a['load']:5.1f}")
        checks.append((f"{name(o.cfg)} {arm}: peak RSS <= {GOAL_RSS_GIB:g} GiB", peak <= GOAL_RSS_GIB,
                       f"max(coordinator + {jobs} x worker, tree) = {peak:.2f} GiB"))
        if arm != "one":
            ok = o.quality["reached"][i] == len(o.quality["seeds"]) and bits[i] <= (1 + QUALITY) * bits[0]
            checks.append((f"{name(o.cfg)} {arm}: fresh-seed bits within {QUALITY:.0%} of one trial at a time",
                           ok, f"{bits[i] / bits[0]:.3f}x"))
    print("winners: " + "; ".join(f"{arm} {o.arms[arm]['winner']}" for arm in ARMS))
    if o.cfg[:3] == GOAL[:3] and o.cfg[3] == GOAL[3]:
        fastest = min(ARMS, key=lambda arm: o.arms[arm]["wall"])
        wall = o.arms[fastest]["wall"]
        checks.append((f"{name(o.cfg)}: tuned in <= {GOAL_SECONDS / 60:g} minutes with --jobs {jobs}",
                       wall <= GOAL_SECONDS, f"{fastest} arm {wall:.0f} s"))
    return checks


def main() -> int:
    ap = argparse.ArgumentParser(description="scale benchmark: tuning time, memory and quality over N x d x n")
    ap.add_argument("--trials", type=int, default=60)
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--trial-batch", type=int, default=0, help="search.trial_batch of the batched arms "
                    "(default: the job's default, 8 when that is 1)")
    ap.add_argument("--quick", action="store_true", help="tiny grid and 8 trials: a smoke test only")
    ap.add_argument("--only", action="append", default=[], metavar="NxDxn",
                    help="only this configuration (repeatable); a sparse one is NxDsxn, e.g. 20000x20000sx16")
    ap.add_argument("--child-tune", nargs=3, help=argparse.SUPPRESS)
    ap.add_argument("--child-quality", nargs=2, help=argparse.SUPPRESS)
    args = ap.parse_args()
    import optuna

    optuna.logging.set_verbosity(optuna.logging.WARNING)
    if args.child_tune:
        return child_tune(*args.child_tune)
    if args.child_quality:
        return child_quality(*args.child_quality)
    grid = [parse_config(t) for t in args.only] or (QUICK if args.quick else GRID)
    trials = min(args.trials, 8) if args.quick else args.trials
    batch = args.trial_batch or default_batch()
    print(f"scale benchmark: {trials} trials per arm, --jobs {args.jobs}, trial_batch {batch} in the batched arms; "
          f"methods {METHODS}, compressors {COMPRESSORS}; logistic_nonconvex, target ||grad f||^2 <= {TARGET:g} "
          f"x ||grad f(x0)||^2, max_rounds {MAX_ROUNDS:,}; {os.cpu_count()} cores, load average "
          f"{', '.join(f'{v:.2f}' for v in os.getloadavg())} at start")
    if args.quick:
        print("QUICK MODE: tiny problems; the checks below are NOT meaningful")
    checks, t0 = [], time.perf_counter()
    for cfg in grid:
        with tempfile.TemporaryDirectory(prefix="bittune-scale-") as tmp:
            checks += report(run_config(cfg, trials=trials, jobs=args.jobs, batch=batch, folder=Path(tmp)),
                             jobs=args.jobs)
    print(f"\nchecks (load average now {', '.join(f'{v:.2f}' for v in os.getloadavg())}; "
          f"total {time.perf_counter() - t0:.0f} s)")
    for text, ok, detail in checks:
        print(f"  {'ok    ' if ok else 'MISSED'}  {text}: {detail}")
    return 0 if all(ok for _, ok, _ in checks) else 1


if __name__ == "__main__":
    raise SystemExit(main())
