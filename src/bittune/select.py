"""Validation on fresh seeds, robustness back-off, final choice.

Bits to target vary a lot between seeds for some methods (DESIGN.md: MARINA
1.3-2.8x), so the best trial of a search is partly luck. The best few
distinct candidates are re-run on seeds the search never used; the winner is
the one with the lowest mean cost (bits, or simulated seconds) that reached
the target on every fresh seed.
Its step is then halved (by ``backoff_factor``, at most ``backoff_steps``
times) while the mean bits grow by less than ``backoff_tolerance``, so the
chosen point sits away from the divergence edge. The theory setting of the
winning method runs on the same seeds as the baseline.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from optuna.trial import TrialState

from .compressors import make_compressor
from .search import Candidate, Space, stall_window
from .parallel import start_batch
from .simulate import Trajectory

__all__ = ["Evaluation", "Selection", "validation_seeds", "evaluate", "select"]


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
        }


@dataclass
class Selection:
    winner: Evaluation
    baseline: Evaluation
    finalists: list[Evaluation]
    backoff: list[Evaluation]
    seeds: list[int]

    @property
    def all_reached(self) -> bool:
        return self.winner.all_reached

    def gain(self) -> float:
        """Baseline mean cost over winner mean cost (a lower bound if the baseline missed)."""
        return self.baseline.mean_cost / self.winner.mean_cost


def validation_seeds(spec) -> list[int]:
    """Fresh seeds, disjoint from :func:`bittune.search.search_seeds` (those are < 10^6)."""
    return [1_000_000 + spec.seed * 1000 + j for j in range(spec.validation_seeds)]


def _batches(ws, candidates: list[Candidate], seeds: list[int]) -> list[tuple[list[int], dict]]:
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
                              stall_window=stall_window(first.method, params.get("sync_probability")),
                              loss_ref=ws.loss_ref, precision=job.engine.precision)))
    return out


def evaluate(ws, candidates: list[Candidate], seeds: list[int], network=None) -> list[Evaluation]:
    """Run each candidate on ``seeds``; candidates of one method and compressor share a batch."""
    return start_evaluate(ws, candidates, seeds, network, jobs=1)()


def start_evaluate(ws, candidates: list[Candidate], seeds: list[int], network=None, *, jobs: int):
    """:func:`evaluate` started in another process when ``jobs`` > 1 (:func:`bittune.parallel.start_batch`);
    returns a function that waits for the evaluations and returns them."""
    pending = [(idx, start_batch(ws.problem, kwargs, jobs=jobs)) for idx, kwargs in _batches(ws, candidates, seeds)]
    S = len(seeds)

    def result() -> list[Evaluation]:
        out: list[Evaluation | None] = [None] * len(candidates)
        for idx, wait in pending:
            runs = wait()
            for j, i in enumerate(idx):
                out[i] = Evaluation(candidates[i], runs[j * S:(j + 1) * S], network)
        return out

    return result


def _start_baseline(ws, space: Space, method: str, seeds: list[int], network):
    """The theory setting of ``method`` at its cheapest predicted density, started (see start_evaluate)."""
    cand = space.candidate(method, space.theory_density(method))
    return start_evaluate(ws, [cand], seeds, network, jobs=ws.job.search.jobs)


def finalists(study, space: Space, *, count: int) -> list[Candidate]:
    """The best ``count`` distinct completed candidates, best first."""
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
    return out


def select(ws, space: Space, study, network=None) -> Selection:
    """Validate the finalists, back the winner's step off, run the theory baseline."""
    spec = ws.job.search
    seeds = validation_seeds(spec)
    cands = finalists(study, space, count=spec.finalists)
    if not cands:
        from .errors import BittuneError

        raise BittuneError("no trial completed: nothing to validate (see the trials' failed_reason)")
    # The theory baseline needs only the method: with --jobs > 1 it runs in another process
    # beside the finalists (one method among them) or beside the back-off steps.
    methods = {c.method for c in cands}
    pending_baseline = None
    if len(methods) == 1:
        pending_baseline = _start_baseline(ws, space, next(iter(methods)), seeds, network)
    evals = evaluate(ws, cands, seeds, network)
    ok = [e for e in evals if e.all_reached]
    winner = min(ok, key=lambda e: e.mean_cost) if ok else min(
        evals, key=lambda e: (-sum(r.reached for r in e.runs), e.mean_cost))
    if pending_baseline is None:
        pending_baseline = _start_baseline(ws, space, winner.candidate.method, seeds, network)
    backoff: list[Evaluation] = []
    if winner.all_reached and spec.backoff_steps > 0:
        steps = [winner.candidate.step_size / spec.backoff_factor ** j for j in range(1, spec.backoff_steps + 1)]
        backoff = evaluate(ws, [winner.candidate.with_step(s) for s in steps], seeds, network)
        limit = winner.mean_cost * (1.0 + spec.backoff_tolerance)
        chosen = winner
        for e in backoff:
            if not (e.all_reached and e.mean_cost <= limit):
                break
            chosen = e
        winner = chosen
    baseline = pending_baseline()[0]
    return Selection(winner=winner, baseline=baseline, finalists=evals, backoff=backoff, seeds=seeds)
