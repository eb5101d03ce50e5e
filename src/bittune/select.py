"""Validation on fresh seeds, robustness back-off, final choice.

Bits to target vary a lot between seeds for some methods (docs/design.md: MARINA
1.3-2.8x), so the best trial of a search is partly luck. The best few
distinct candidates are re-run on seeds the search never used; the winner is
the one with the lowest mean cost (bits, or simulated seconds) that reached
the target on every fresh seed.
Its step is then halved (by ``backoff_factor``, at most ``backoff_steps``
times) while the mean bits grow by less than ``backoff_tolerance``, so the
chosen point sits away from the divergence edge; when no finalist reached the
target on every fresh seed, the first of those smaller steps that does is the
winner (a best effort only if none does). The theory setting of the
winning method runs on the same seeds as the theory baseline.

A gain over a timid theory step says little on its own, so the selection also
tunes the plain uncompressed method: GD with its step searched over the search's
seed ladder (``search.SEED_LADDER`` x the theory step, clipped to
``search.step_range``) on the search seeds, in one engine batch of all steps x
seeds; the best step then runs on the fresh seeds like the winner. Both gains
(over tuned GD and over theory) come with a paired percentile bootstrap
interval over the fresh seeds (Efron & Tibshirani 1993, ch. 13; computed by
``scipy.stats.bootstrap`` with a seeded ``numpy.random.Generator``).

Transfer check: the finalists also run, on the same fresh seeds, on a bootstrap
resample of every worker's shard (:mod:`bittune.transfer`); a finalist that
misses the target there on some seed ranks after every finalist that reaches it
on both (:func:`pick`). The ratio of its mean cost on the resample to that on
the sample is its transfer ratio.

``objective: front``: the finalists are the study's non-dominated trials
(``study.best_trials``, at most ``front.FRONT_TRIALS``); the validated front is
the finalists that reached the target on every fresh seed and that no other such
finalist dominates on (mean bits, mean seconds); ``prefer`` picks the winner
among them (:func:`bittune.front.choose`), those that pass the transfer check
first. The back-off then keeps a smaller step only while neither mean cost grows
by more than ``backoff_tolerance``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from optuna.trial import TrialState

from .compressors import make_compressor
from .front import FRONT_TRIALS, choose, non_dominated, thin
from .search import SEED_LADDER, Candidate, Space, link_kwargs, score, search_seeds, stall_window
from .parallel import start_batch
from .simulate import Trajectory
from .transfer import resampled_workspace

__all__ = ["Evaluation", "Selection", "Gain", "validation_seeds", "evaluate", "select", "gd_ladder",
           "paired_gain", "GAIN_LEVEL", "GAIN_RESAMPLES", "pick", "transfer_entry"]

#: Confidence level and resamples of the paired bootstrap intervals of the gains (common practice, no source:
#: 95%, and enough resamples that the percentile ends move by well under 1% between generator seeds).
GAIN_LEVEL, GAIN_RESAMPLES = 0.95, 9999
#: A method whose best trial's search value is within this factor of the study's best joins the
#: finalists (common practice, no source; docs/design.md, "Selection"). Seen on the fast network of
#: tests/test_tune.py: the best GD trial tied the best DIANA trials (16 rounds on both search seeds) and
#: ranked below seven of them by a few bits' seconds, so GD was never validated without this rule.
METHOD_MARGIN = 1.1


@dataclass
class Evaluation:
    """A candidate run on the fresh seeds."""

    candidate: Candidate
    runs: list[Trajectory] = field(repr=False)
    network: object = None  # NetworkModel when the objective is seconds

    @property
    def costs(self) -> np.ndarray:
        """What the search minimised, per seed: bits, or simulated seconds."""
        if self.network is None:
            return self.bits
        return np.array([self.network.seconds(r) for r in self.runs])

    @property
    def mean_cost(self) -> float:
        return float(self.costs.mean())

    @property
    def all_reached(self) -> bool:
        return all(r.reached for r in self.runs)

    @property
    def bits(self) -> np.ndarray:
        return np.array([r.uplink_bits for r in self.runs])

    @property
    def rounds(self) -> np.ndarray:
        return np.array([r.rounds for r in self.runs])

    @property
    def mean_bits(self) -> float:
        return float(self.bits.mean())

    @property
    def both(self) -> tuple[float, float]:
        """(mean bits, mean seconds): a front point (network required)."""
        return self.mean_bits, self.mean_cost

    def summary(self) -> dict:
        b, k = self.bits, self.rounds
        return {
            "method": self.candidate.method,
            "compressor": self.candidate.label,
            "step_size": float(self.candidate.step_size),
            "sync_probability": self.candidate.sync_probability,
            "shift_rate": self.candidate.shift_rate,
            "clients": self.candidate.clients,
            "minibatch": self.candidate.minibatch,
            "reached": int(sum(r.reached for r in self.runs)),
            "seeds": len(self.runs),
            "status": [r.status for r in self.runs],
            "mean_bits_per_worker": float(b.mean()),
            "std_bits_per_worker": float(b.std(ddof=1)) if len(b) > 1 else 0.0,
            "mean_rounds": float(k.mean()),
            "std_rounds": float(k.std(ddof=1)) if len(k) > 1 else 0.0,
            "bits_per_worker": [float(v) for v in b],
            "mean_gradient_evals_per_worker": float(np.mean([r.gradient_evals for r in self.runs])),
            "rounds": [int(v) for v in k],
            **({} if self.network is None else {
                "mean_seconds": self.mean_cost, "seconds": [float(v) for v in self.costs],
                "std_seconds": float(self.costs.std(ddof=1)) if len(b) > 1 else 0.0}),
            "mean_downlink_bits_per_worker": float(np.mean([r.downlink_bits for r in self.runs])),
            **({} if self.runs[0].worker_shares is None else {
                "worker_shares": [float(v) for v in np.mean([r.worker_shares for r in self.runs], axis=0)]}),
        }


@dataclass(frozen=True)
class Gain:
    """Baseline mean cost over the winner's, with a paired bootstrap interval over the seeds."""

    ratio: float
    low: float | None  # None: fewer than two seeds, no interval
    high: float | None
    lower_bound: bool  # the baseline missed the target on some seed: its cost (so the gain) is understated

    def to_dict(self) -> dict:
        return {"ratio": self.ratio, "interval": None if self.low is None else [self.low, self.high],
                "level": GAIN_LEVEL, "lower_bound": self.lower_bound}


def paired_gain(baseline: np.ndarray, winner: np.ndarray, *, seed: int = 0, lower_bound: bool = False) -> Gain:
    """mean(baseline) / mean(winner) and its paired percentile bootstrap interval.

    Seeds are resampled in pairs (the two configs ran on the same seeds, so the
    pairing removes the seed-to-seed spread they share); the interval holds the
    (1 - level)/2 and (1 + level)/2 percentiles of the resampled ratios
    (Efron & Tibshirani 1993, ch. 13, the percentile interval).
    """
    from scipy import stats

    baseline, winner = np.asarray(baseline, float), np.asarray(winner, float)
    ratio = float(baseline.mean() / winner.mean())
    if len(baseline) < 2:
        return Gain(ratio, None, None, lower_bound)
    res = stats.bootstrap((baseline, winner), lambda b, w, axis: b.mean(axis) / w.mean(axis), paired=True,
                          vectorized=True, method="percentile", confidence_level=GAIN_LEVEL,
                          n_resamples=GAIN_RESAMPLES, random_state=np.random.default_rng(seed))
    ci = res.confidence_interval
    return Gain(ratio, float(ci.low), float(ci.high), lower_bound)


@dataclass
class Selection:
    winner: Evaluation
    baseline: Evaluation  # the theory setting of the winning method
    finalists: list[Evaluation]
    backoff: list[Evaluation]
    seeds: list[int]
    gd: Evaluation | None = None  # tuned uncompressed GD on the fresh seeds
    gd_ladder: list[Evaluation] = field(default_factory=list)  # GD's step ladder on the search seeds
    #: the transfer check: each finalist (same order) and the winner on the data resample, same seeds
    resampled: list[Evaluation] = field(default_factory=list)
    winner_resample: Evaluation | None = None
    #: objective front: the validated front (at most front.FRONT_SIZE, by bits; the chosen point's
    #: finalist among them) and ``prefer``
    front: list[Evaluation] = field(default_factory=list)
    prefer: str | None = None
    chosen: Evaluation | None = None  # the finalist the winner came from (before the back-off)

    @property
    def all_reached(self) -> bool:
        return self.winner.all_reached

    def gain(self) -> float:
        """Baseline mean cost over winner mean cost (a lower bound if the baseline missed)."""
        return self.baseline.mean_cost / self.winner.mean_cost

    def gains(self, seed: int = 0) -> dict[str, Gain]:
        """``over_theory`` and (when GD ran) ``over_tuned_gd``, each with its paired interval."""
        out = {"over_theory": paired_gain(self.baseline.costs, self.winner.costs, seed=seed,
                                          lower_bound=not self.baseline.all_reached)}
        if self.gd is not None:
            out["over_tuned_gd"] = paired_gain(self.gd.costs, self.winner.costs, seed=seed,
                                               lower_bound=not self.gd.all_reached)
        return out


def validation_seeds(spec) -> list[int]:
    """Fresh seeds, disjoint from :func:`bittune.search.search_seeds` (those are < 10^6)."""
    return [1_000_000 + spec.seed * 1000 + j for j in range(spec.validation_seeds)]


def _batches(ws, candidates: list[Candidate], seeds: list[int], network=None) -> list[tuple[list[int], dict]]:
    """One engine batch per method and compressor: (candidate indices, simulate() keyword arguments)."""
    groups: dict[tuple, list[int]] = {}
    for i, c in enumerate(candidates):
        groups.setdefault((c.method, c.label), []).append(i)
    job, S, out = ws.job, len(seeds), []
    for idx in groups.values():
        first = candidates[idx[0]]
        steps = np.repeat([candidates[i].step_size for i in idx], S)
        # Candidate.params() names each method parameter once; one value per trajectory.
        each = [candidates[i].params() for i in idx]
        params = {key: np.repeat([p[key] for p in each], S) for key in each[0]}
        comp = make_compressor(first.compressor, ws.problem.dim, n_workers=ws.problem.n_workers)
        out.append((idx, dict(method=first.method, compressor=comp, step_size=steps,
                              seeds=np.tile(seeds, len(idx)), target=ws.target, max_rounds=job.budget.max_rounds,
                              x0=ws.x0, params=params, max_bits_per_worker=job.budget.max_bits_per_worker,
                              stall_window=stall_window(first.method, params, comp),
                              loss_ref=ws.loss_ref, precision=job.engine.precision,
                              **link_kwargs(ws.problem, network, getattr(job, "downlink", None), first.method,
                                            minibatch=getattr(job, "minibatch", None)))))
    return out


class _Ticker:
    """A simulate() monitor that reports finished trajectories of one batch to a progress task."""

    def __init__(self, task, offset: int, size: int):
        self.task, self.offset, self.size = task, offset, size

    def __call__(self, k, index, bits, metric) -> bool:
        self.task.update(self.offset + self.size - len(index), extra=f"round {k}")
        return False  # never stops the batch


def evaluate(ws, candidates: list[Candidate], seeds: list[int], network=None, task=None) -> list[Evaluation]:
    """Run each candidate on ``seeds``; candidates of one method and compressor share a batch.
    ``task`` (a :class:`bittune.progress.Task`) hears of every finished trajectory."""
    return start_evaluate(ws, candidates, seeds, network, jobs=1, task=task)()


def start_evaluate(ws, candidates: list[Candidate], seeds: list[int], network=None, *, jobs: int, task=None):
    """:func:`evaluate` started in another process when ``jobs`` > 1 (:func:`bittune.parallel.start_batch`);
    returns a function that waits for the evaluations and returns them. ``task`` is told of finished
    trajectories round by round in this process, and of a whole batch when it comes back from another."""
    S, pending, offset = len(seeds), [], 0
    for idx, kwargs in _batches(ws, candidates, seeds, network):
        size = len(idx) * S
        if task is not None and jobs == 1:
            kwargs = dict(kwargs, monitor=_Ticker(task, offset, size))
        pending.append((idx, offset + size, start_batch(ws.problem, kwargs, jobs=jobs)))
        offset += size

    def result() -> list[Evaluation]:
        out: list[Evaluation | None] = [None] * len(candidates)
        for idx, end, wait in pending:
            runs = wait()
            if task is not None:
                task.update(end)
            for j, i in enumerate(idx):
                out[i] = Evaluation(candidates[i], runs[j * S:(j + 1) * S], network)
        return out

    return result


def _start_baseline(ws, space: Space, method: str, seeds: list[int], network, task=None):
    """The theory setting of ``method`` at its cheapest predicted density, started (see start_evaluate)."""
    cand = space.candidate(method, space.theory_density(method))
    return start_evaluate(ws, [cand], seeds, network, jobs=ws.job.search.jobs, task=task)


def gd_ladder(space: Space, step_range=None) -> list[Candidate]:
    """Uncompressed GD at the search's seed ladder of steps over its theory step, clipped to ``step_range``
    (default the space's; a retune passes the job's own, since its narrowed range belongs to another method)."""
    lo, hi = step_range or space.spec.step_range
    mults = sorted({min(max(m, lo), hi) for m in SEED_LADDER})
    return [space.candidate("gd", {"name": "identity"}, step_mult=m) for m in mults]


def _best_rung(ws, ladder: list[Evaluation], network) -> Candidate:
    """The ladder's best step on the search seeds: reached on every seed at the least cost, else the best score."""
    from .cost import cost_function

    def key(e: Evaluation):
        value, _ = score(e.runs, target=ws.target, cap=None, cost=cost_function(network))
        return (not e.all_reached, value)

    return min(ladder, key=key).candidate


def finalists(study, space: Space, *, count: int) -> list[Candidate]:
    """The best ``count`` distinct completed candidates, best first, then the best candidate of each other
    method whose value is within ``METHOD_MARGIN`` of the best. A front study's finalists are its
    non-dominated trials (``study.best_trials``): at most FRONT_TRIALS, evenly spread by bits."""
    if len(study.directions) > 1:
        return _front_finalists(study, space)
    trials = sorted((t for t in study.get_trials(deepcopy=False, states=(TrialState.COMPLETE,))
                     if t.value is not None and math.isfinite(t.value)), key=lambda t: t.value)
    out, seen = [], set()
    for t in trials:
        cand = space.from_params(t.params)
        if cand.key() not in seen:
            seen.add(cand.key())
            out.append(cand)
        if len(out) == count:
            break
    # A method whose best search value comes within METHOD_MARGIN of the study's best is validated
    # too: two or three search seeds cannot separate near-ties, and the fresh seeds can.
    methods = {c.method for c in out}
    for t in trials:
        if t.value > METHOD_MARGIN * trials[0].value:
            break
        cand = space.from_params(t.params)
        if cand.method not in methods:
            methods.add(cand.method)
            out.append(cand)
    return out


def _front_finalists(study, space: Space) -> list[Candidate]:
    trials = [t for t in study.best_trials if all(math.isfinite(v) for v in t.values)]
    out, seen, costs = [], set(), []
    for t in sorted(trials, key=lambda t: tuple(t.values)):
        cand = space.from_params(t.params)
        if cand.key() not in seen:
            seen.add(cand.key())
            out.append(cand)
            costs.append(t.values)
    if len(out) > FRONT_TRIALS:
        out = [out[i] for i in thin(costs, FRONT_TRIALS)]
    return out


def pick(evals: list[Evaluation], resampled: list[Evaluation] | None = None, *,
         prefer: str | None = None) -> tuple[int, list[int]]:
    """The winner's index among ``evals`` and (``prefer`` given: a front) the validated front's indices.

    Finalists that reached the target on every fresh seed on the sample and on the resample
    (``resampled``, same order) come first, then those that reached it on the sample only, then the
    rest (most seeds reached, then cost). Single objective: the least mean cost. Front: the front is
    the sample-validated finalists no other dominates on (mean bits, mean seconds), and ``prefer``
    picks among its members that pass on the resample (all of it when none does). Exact ties on both costs
    count once."""
    n = len(evals)
    moved = [i for i in range(n) if resampled is not None and evals[i].all_reached
             and resampled[i].all_reached]
    ok = [i for i in range(n) if evals[i].all_reached]
    if prefer is None:
        pool = moved or ok
        if pool:
            return min(pool, key=lambda i: evals[i].mean_cost), []
        return min(range(n), key=lambda i: (-sum(r.reached for r in evals[i].runs), evals[i].mean_cost)), []
    if not ok:
        return pick(evals, resampled)[0], []
    costs = np.array([evals[i].both for i in ok])
    front = [ok[j] for j in np.flatnonzero(non_dominated(costs))]
    # Finalists with the very same (mean bits, mean seconds) (e.g. steps a deterministic compressor cannot tell
    # apart) are one point of the front: the first that passes on the resample stands for them (else the first).
    stands: dict[tuple, int] = {}
    for i in sorted(front, key=lambda i: (i not in moved, i)):
        stands.setdefault(tuple(evals[i].both), i)
    front = sorted(stands.values())
    pool = [i for i in front if i in moved] or front
    chosen = pool[choose(np.array([evals[i].both for i in pool]), prefer)]
    return chosen, front


def transfer_entry(sample: Evaluation, resample: Evaluation) -> dict:
    """One finalist's transfer check: seeds reached on the sample and the resample, and the ratios of the
    mean costs (resample / sample): bits, seconds when there is a network, and ``transfer_ratio`` in the
    unit the selection ranks by (:attr:`Evaluation.mean_cost`)."""
    out = {"method": sample.candidate.method, "compressor": sample.candidate.label,
           "step_size": float(sample.candidate.step_size), "seeds": len(sample.runs),
           "reached_sample": int(sum(r.reached for r in sample.runs)),
           "reached_resample": int(sum(r.reached for r in resample.runs)),
           "passed": bool(sample.all_reached and resample.all_reached),
           "transfer_ratio": float(resample.mean_cost / sample.mean_cost),
           "bits_ratio": float(resample.mean_bits / sample.mean_bits)}
    if sample.network is not None:
        out["seconds_ratio"] = out["transfer_ratio"]
    return out


def select(ws, space: Space, study, network=None, log=None) -> Selection:
    """Validate the finalists, back the winner's step off, run the theory and tuned-GD baselines.

    ``log`` (a :class:`bittune.progress.Progress`) shows each phase's finished trajectories."""
    from .progress import task as start_task

    spec = ws.job.search
    seeds = validation_seeds(spec)
    cands = finalists(study, space, count=spec.finalists)
    if not cands:
        from .errors import BittuneError

        raise BittuneError("no trial completed: nothing to validate (see the trials' failed_reason)")
    # The theory baseline needs only the method: with --jobs > 1 it runs in another process
    # beside the finalists (one method among them) or beside the back-off steps.
    methods = {c.method for c in cands}
    S, ladder_cands = len(seeds), gd_ladder(space, ws.job.search.step_range)  # the job's range, not a retune's
    # Baselines: the theory setting (S), GD's ladder on the search seeds, tuned GD on the fresh seeds (S).
    # Their trajectories are counted apart: the first two may finish in another process.
    base_task = start_task(log, "baselines", 2 * S + len(ladder_cands) * spec.seeds, "trajectories")
    pending_baseline = None
    if len(methods) == 1:
        pending_baseline = _start_baseline(ws, space, next(iter(methods)), seeds, network, task=base_task.part())
    # Tuned GD: all ladder steps x search seeds in one batch, beside the finalists when --jobs > 1.
    pending_ladder = start_evaluate(ws, ladder_cands, search_seeds(spec), network, jobs=spec.jobs,
                                    task=base_task.part())
    # The transfer check: the finalists on the data resample, same seeds (in another process with --jobs > 1).
    ws_r = resampled_workspace(ws)
    tr_task = start_task(log, "transfer check", len(cands) * S, "trajectories")
    pending_resample = start_evaluate(ws_r, cands, seeds, network, jobs=spec.jobs, task=tr_task)
    val_task = start_task(log, "validation", len(cands) * S, "trajectories")
    evals = evaluate(ws, cands, seeds, network, task=val_task)
    val_task.finish()
    resampled = pending_resample()
    tr_task.finish()
    prefer = ws.job.prefer if ws.job.objective == "front" else None
    chosen, front_idx = pick(evals, resampled, prefer=prefer)
    winner = evals[chosen]
    if pending_baseline is None:
        pending_baseline = _start_baseline(ws, space, winner.candidate.method, seeds, network,
                                           task=base_task.part())
    backoff: list[Evaluation] = []
    if spec.backoff_steps > 0:
        steps = [winner.candidate.step_size / spec.backoff_factor ** j for j in range(1, spec.backoff_steps + 1)]
        back_task = start_task(log, "back-off", len(steps) * S, "trajectories")
        backoff = evaluate(ws, [winner.candidate.with_step(s) for s in steps], seeds, network, task=back_task)
        back_task.finish()
    if backoff and not winner.all_reached:
        # No finalist reached the target on every fresh seed: the largest smaller step that does (a
        # step near the edge of stability misses on some seeds) replaces the best effort.
        winner = next((e for e in backoff if e.all_reached), winner)
    elif backoff:
        # A front's winner keeps a smaller step only while neither of its two costs grows by more.
        cost = (lambda e: np.array(e.both)) if prefer is not None else (lambda e: np.array([e.mean_cost]))
        limit = cost(winner) * (1.0 + spec.backoff_tolerance)
        # Nor above a passed finalist of another method or compressor: the back-off must not hand
        # the win to a setting the validation beat (a smaller step of the same setting may cost more).
        if prefer is None:
            own = (winner.candidate.method, winner.candidate.label)
            rivals = [cost(e) for i, e in enumerate(evals) if (e.candidate.method, e.candidate.label) != own
                      and e.all_reached and resampled[i].all_reached]
            limit = np.minimum(limit, min(rivals, key=lambda c: c[0])) if rivals else limit
        best = winner
        for e in backoff:
            if not (e.all_reached and np.all(cost(e) <= limit)):
                break
            best = e
        winner = best
    winner_resample = resampled[chosen]
    if winner is not evals[chosen]:  # the back-off moved the step: the chosen config on the resample too
        winner_resample = evaluate(ws_r, [winner.candidate], seeds, network)[0]
    ladder = pending_ladder()
    gd = evaluate(ws, [_best_rung(ws, ladder, network)], seeds, network, task=base_task.part())[0]
    baseline = pending_baseline()[0]
    base_task.finish()
    # The front as validated (the chosen finalist before any back-off, so every point stays non-dominated).
    front = [evals[front_idx[j]] for j in thin([evals[i].both for i in front_idx], keep=front_idx.index(chosen))] \
        if front_idx else []
    return Selection(winner=winner, baseline=baseline, finalists=evals, backoff=backoff, seeds=seeds, gd=gd,
                     gd_ladder=ladder, resampled=resampled, winner_resample=winner_resample, front=front,
                     prefer=prefer, chosen=evals[chosen])
