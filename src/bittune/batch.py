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
once per batch (trials of a batch do not tighten each other's caps), and a trial
is pruned from its own checkpoints while the rest of its batch goes on.

A killed process leaves its batch's trials RUNNING; the next run marks them
failed (:func:`bittune.search.fail_stale_trials`) and the budget re-asks them.
"""

from __future__ import annotations

import contextlib
import time

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
    and stops only the trajectories of the trials it prunes."""

    def __init__(self, monitors, seeds_per_trial: int) -> None:
        self.monitors, self.S = monitors, seeds_per_trial

    def __call__(self, k, index, bits, metric) -> np.ndarray:
        owner = index // self.S
        stop = np.zeros(index.shape, dtype=bool)
        for t in np.unique(owner):  # a loop over the batch's trials, not its trajectories
            rows = owner == t
            if self.monitors[t](k, index[rows] - t * self.S, bits[rows], metric[rows]):
                stop[rows] = True
        return stop


def simulate_group(objective, plans) -> list[list]:
    """Simulate the plans of one group in one engine batch; one list of runs per plan."""
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
    runs = simulate(objective.problem, method=cands[0].method, compressor=comp,
                    step_size=np.repeat([c.step_size for c in cands], S), seeds=np.tile(objective.seeds, len(plans)),
                    target=objective.target, max_rounds=objective.max_rounds, x0=objective.x0, params=params,
                    max_bits_per_worker=objective.bits_cap(plans[0].cap), stall_window=window,
                    monitor=_SplitMonitor([p.monitor for p in plans], S), loss_ref=objective.loss_ref,
                    precision=objective.precision, **objective.link_kwargs(cands[0].method))
    return [runs[i * S:(i + 1) * S] for i in range(len(plans))]


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
                results = simulate_group(objective, gplans)
            except ArithmeticError as exc:
                if len(gplans) == 1:
                    _fail(study, gtrials[0], f"{type(exc).__name__}: {exc}")
                    continue
                # Find the culprit: each trial of the group again, alone; only a faulty one fails.
                results = []
                for i, (t, old) in enumerate(zip(gtrials, gplans)):
                    plan = objective.plan(t, cap)  # the same candidate (its params are fixed now)
                    plan.monitor.reported = old.monitor.step
                    gplans[i] = plan
                    try:
                        results.append(simulate_group(objective, [plan])[0])
                    except ArithmeticError as solo:
                        _fail(study, t, f"{type(solo).__name__}: {solo}")
                        results.append(None)
            for trial, plan, runs in zip(gtrials, gplans, results):
                if runs is None:
                    continue
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
    from .search import COUNTED, recover_stale_trials

    done = 0
    finished_states = (TrialState.COMPLETE, TrialState.PRUNED)
    while len(study.get_trials(deepcopy=False, states=finished_states)) < budget:
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
