"""Batched trials: several Optuna trials of one method and compressor in one engine batch.

A trial alone runs its few search seeds (B = 3 by default), which leaves most of
the engine's per-pass gain unused (docs/design.md, "The engine"). Here a process
asks Optuna for ``search.trial_batch`` trials at once (ask-and-tell; TPE's
constant liar, on by default in Optuna 5, keeps trials asked together apart),
groups those that share a method and a compressor class, and simulates all their
seeds as one batch: step size, sync probability, shift rate, PP-MARINA's clients
and VR-MARINA's minibatch are per-trajectory parameters of the engine, and the
density per trajectory comes from :class:`bittune.compressors.PerTrajectory`.

Every trajectory draws the same random numbers alone or in a batch (counter-based
keys), so a trial's values are those it gets alone, up to float rounding in the
batched matrix products. Differences to one trial at a time: the cost cap is read
from the study once per batch and then tightened inside it as its trials reach the
target on every seed (when the cost is bits; trajectories past it end as
``bits_cap``), and a trial is pruned from its own checkpoints while the rest of its
batch goes on.

A killed process leaves its batch's trials RUNNING; the next run marks them
failed (:func:`bittune.search.fail_stale_trials`) and the budget re-asks them.
"""

from __future__ import annotations

import contextlib
import time
from dataclasses import replace

import numpy as np
import optuna
from optuna.trial import TrialState

from .compressors import PerTrajectory
from .simulate import simulate

__all__ = ["run_batches", "group_plans"]


def group_plans(plans) -> list[list[int]]:
    """Indices of ``plans`` that can share an engine batch: same method and compressor class."""
    groups: dict[tuple, list[int]] = {}
    for i, plan in enumerate(plans):
        groups.setdefault((plan.candidate.method, plan.candidate.compressor["name"]), []).append(i)
    return list(groups.values())


class _SplitMonitor:
    """Hands each trial's pruning monitor its own trajectories (S consecutive ones per trial)
    and stops only the trajectories of the trials it prunes.

    With ``cap_factor`` it also tightens the batch's bit cap as its trials finish: once every
    seed of a trial has reached the target at a mean of b bits, trajectories still running
    past ``cap_factor`` x b stop (the cap a later trial would read from the study, applied
    inside the batch instead of at the next one; docs/design.md, "Search")."""

    def __init__(self, monitors, seeds_per_trial: int, *, cap: float | None = None,
                 cap_factor: float | None = None, target: float = 0.0) -> None:
        self.monitors, self.S = monitors, seeds_per_trial
        self.cap, self.cap_factor, self.target = cap, cap_factor, target
        self.reached_bits = np.full(len(monitors) * seeds_per_trial, np.nan)
        self.capped = np.zeros(len(monitors) * seeds_per_trial, dtype=bool)

    def _tighten(self, index, bits, metric) -> np.ndarray:
        """Trajectories (rows of ``index``) to stop at the batch's current cap."""
        hit = metric <= self.target  # the engine ends these as "reached" before any other test
        self.reached_bits[index[hit]] = bits[hit]
        per_trial = self.reached_bits.reshape(-1, self.S)
        done = ~np.isnan(per_trial).any(axis=1)
        if done.any():
            best = self.cap_factor * float(per_trial[done].mean(axis=1).min())
            self.cap = best if self.cap is None else min(self.cap, best)
        if self.cap is None:
            return np.zeros(index.shape, dtype=bool)
        over = ~hit & (bits >= self.cap)
        self.capped[index[over]] = True
        return over

    def __call__(self, k, index, bits, metric) -> np.ndarray:
        owner = index // self.S
        stop = np.zeros(index.shape, dtype=bool) if self.cap_factor is None else self._tighten(index, bits, metric)
        for t in np.unique(owner):  # a loop over the batch's trials, not its trajectories
            rows = owner == t
            if self.monitors[t](k, index[rows] - t * self.S, bits[rows], metric[rows]):
                stop[rows] = True
        return stop


def simulate_group(objective, plans) -> tuple[list[list], float | None]:
    """Simulate the plans of one group in one engine batch: one list of runs per plan, and the
    cost cap the batch ended with (tightened by its own finished trials; None: no cap or the
    cost is not bits)."""
    S = len(objective.seeds)
    cands = [p.candidate for p in plans]
    labels = []
    for c in cands:
        if c.label not in labels:
            labels.append(c.label)
    if len(labels) == 1:
        comp = plans[0].compressor
    else:
        parts = [next(p.compressor for p in plans if p.candidate.label == lab) for lab in labels]
        comp = PerTrajectory(parts, np.repeat([labels.index(c.label) for c in cands], S))
    params = {}
    for key in cands[0].params():
        params[key] = np.repeat(np.asarray([c.params()[key] for c in cands], dtype=np.float64), S)
    window = None
    if plans[0].window is not None:
        window = np.concatenate([np.broadcast_to(np.asarray(p.window, dtype=np.float64), (S,)) for p in plans])
    # The batch's cap tightens as its trials finish when the cost is bits (docs/design.md, "Search").
    factor = objective.space.spec.bits_cap_factor if objective.network is None and not objective.front else None
    split = _SplitMonitor([p.monitor for p in plans], S, cap=objective.bits_cap(plans[0].cap), cap_factor=factor,
                          target=objective.target)
    runs = simulate(objective.problem, method=cands[0].method, compressor=comp,
                    step_size=np.repeat([c.step_size for c in cands], S), seeds=np.tile(objective.seeds, len(plans)),
                    target=objective.target, max_rounds=objective.max_rounds, x0=objective.x0, params=params,
                    max_bits_per_worker=objective.bits_cap(plans[0].cap), stall_window=window,
                    monitor=split, loss_ref=objective.loss_ref, precision=objective.precision,
                    **objective.link_kwargs(cands[0].method))
    for r, capped in zip(runs, split.capped):
        if capped and r.status == "stopped":
            r.status = "bits_cap"  # stopped by the cap tightened inside the batch, as the engine's own cap does
    return [runs[i * S:(i + 1) * S] for i in range(len(plans))], split.cap if factor is not None else None


def _fail(study, trial, reason: str) -> None:
    study._storage.set_trial_user_attr(trial._trial_id, "failed_reason", reason)
    study.tell(trial, state=TrialState.FAIL)


def _heartbeats(study, trials):
    """Database heartbeats for every trial of the batch (Optuna's own thread, as optimize() starts)."""
    from optuna.storages._heartbeat import get_heartbeat_thread

    stack = contextlib.ExitStack()
    for t in trials:
        stack.enter_context(get_heartbeat_thread(t._trial_id, study._storage))
    return stack


def run_batch(study: optuna.Study, objective, trials) -> int:
    """Evaluate the asked ``trials`` (grouped into engine batches) and tell Optuna; returns how
    many finished (complete or pruned). A numerical fault in an engine batch re-runs its trials
    one by one and fails only those that fault alone (reason recorded), never the study; any
    other error fails every trial still running here and propagates, as ``optimize()`` does."""
    try:
        cap = objective._cap(study)
        plans = [objective.plan(t, cap) for t in trials]
        done = 0
        for group in group_plans(plans):
            gplans, gtrials = [plans[i] for i in group], [trials[i] for i in group]
            try:
                results, tight = simulate_group(objective, gplans)
            except ArithmeticError as exc:
                if len(gplans) == 1:
                    _fail(study, gtrials[0], f"{type(exc).__name__}: {exc}")
                    continue
                # Find the culprit: each trial of the group again, alone; only a faulty one fails.
                results, tight = [], None
                for i, (t, old) in enumerate(zip(gtrials, gplans)):
                    plan = objective.plan(t, cap)  # the same candidate (its params are fixed now)
                    plan.monitor.reported = old.monitor.step
                    gplans[i] = plan
                    try:
                        results.append(simulate_group(objective, [plan])[0][0])
                    except ArithmeticError as solo:
                        _fail(study, t, f"{type(solo).__name__}: {solo}")
                        results.append(None)
            for trial, plan, runs in zip(gtrials, gplans, results):
                if runs is None:
                    continue
                if tight is not None and (plan.cap is None or tight < plan.cap):
                    plan = replace(plan, cap=tight)  # a miss's penalty starts from the cap it was stopped at
                try:
                    value = objective.finish(trial, plan, runs)
                except optuna.TrialPruned:
                    study.tell(trial, state=TrialState.PRUNED)
                else:
                    study.tell(trial, value)
                done += 1
        return done
    except BaseException as exc:
        for t in trials:
            if study._storage.get_trial(t._trial_id).state == TrialState.RUNNING:
                _fail(study, t, f"its batch stopped: {type(exc).__name__}: {exc}")
        raise


def run_batches(study: optuna.Study, objective, *, budget: int, size: int, poll: float = 1.0) -> int:
    """:func:`bittune.search.run_trials` with ``size`` trials asked at once; returns how many
    trials this process finished."""
    from .search import COUNTED, enqueue_refinement, recover_stale_trials

    done = 0
    finished_states = (TrialState.COMPLETE, TrialState.PRUNED)
    while len(study.get_trials(deepcopy=False, states=finished_states)) < budget:
        enqueue_refinement(study, objective.space, budget=budget, seeds=len(objective.seeds))
        free = budget - len(study.get_trials(deepcopy=False, states=COUNTED))
        if free <= 0:
            time.sleep(poll)
            recover_stale_trials(study)
            continue
        asked = [study.ask() for _ in range(min(size, free))]
        # Another process may have asked at the same moment: a trial whose number shows that
        # the budget was already taken when it was asked fails with the reason recorded.
        counted = study.get_trials(deepcopy=False, states=COUNTED)
        trials = []
        for t in asked:
            if sum(1 for c in counted if c.number < t.number) >= budget:
                _fail(study, t, "over the trial budget")
            else:
                trials.append(t)
        if not trials:
            continue
        with _heartbeats(study, trials):
            done += run_batch(study, objective, trials)
    return done
