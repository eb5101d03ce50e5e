"""Batched trials: several Optuna trials of one method and compressor in one refilling engine batch.

A trial alone runs its few search seeds (B = 3 by default), which leaves most of
the engine's per-pass gain unused (docs/design.md, "The engine"). Here a process
keeps up to ``search.trial_batch`` trials asked at once (ask-and-tell; TPE's
constant liar, on by default in Optuna 5, keeps trials asked together apart) and
simulates those that share a method and a compressor class as one engine batch:
step size, sync probability, shift rate, PP-MARINA's clients and VR-MARINA's
minibatch are per-trajectory parameters of the engine, and the density per
trajectory comes from :class:`bittune.compressors.PerTrajectory`. The batch
refills (``simulate(refill=...)``): when a trial's seeds have all ended it is told
at once and newly asked trials of the group join the running batch, each on its
own round counter, so the batch stays full instead of draining over its slowest
trajectory.

Every trajectory draws the same random numbers alone or in a batch, from its own
round 0 whenever it joins (counter-based keys), so a trial's values are those it gets
alone, up to float rounding in the batched matrix products. Differences to one trial
at a time: the cost cap is read from the study when a trial joins and tightened inside
the batch as its trials reach the target on every seed (when the cost is bits;
trajectories past it end as ``bits_cap``), and a trial is pruned from its own
checkpoints while the rest of its batch goes on.

A killed process has told every trial that finished; it leaves the running and held
ones RUNNING, and the next run marks them failed
(:func:`bittune.search.fail_stale_trials`) and the budget re-asks them.
"""

from __future__ import annotations

import contextlib
import time
from dataclasses import replace

import numpy as np
import optuna
from optuna.trial import TrialState

from .compressors import PerTrajectory
from .simulate import Join, simulate

__all__ = ["run_refilling", "simulate_group"]


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

    def add(self, monitors) -> None:
        """Trials that join the running batch (a refilling batch: their S rows follow the others)."""
        self.monitors = list(self.monitors) + list(monitors)
        more = len(monitors) * self.S
        self.reached_bits = np.concatenate([self.reached_bits, np.full(more, np.nan)])
        self.capped = np.concatenate([self.capped, np.zeros(more, dtype=bool)])

    def __call__(self, k, index, bits, metric) -> np.ndarray:
        owner = index // self.S
        stop = np.zeros(index.shape, dtype=bool) if self.cap_factor is None else self._tighten(index, bits, metric)
        for t in np.unique(owner):  # a loop over the batch's trials, not its trajectories
            rows = owner == t
            # A refilling batch passes each row's own round: a trial's seeds joined together, so share one.
            kt = k if np.ndim(k) == 0 else int(np.asarray(k)[rows][0])
            if self.monitors[t](kt, index[rows] - t * self.S, bits[rows], metric[rows]):
                stop[rows] = True
        return stop


def _rows_of(objective, plans) -> Join:
    """The engine's per-trajectory inputs of ``plans`` (S consecutive rows per plan): seeds, step
    sizes, the compressor (one per trajectory when the densities differ), parameters, stall windows."""
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
    return Join(seeds=np.tile(objective.seeds, len(plans)), step_size=np.repeat([c.step_size for c in cands], S),
                compressor=comp, params=params, stall_window=window)


def _cap_factor(objective) -> float | None:
    """The batch's cap tightens as its trials finish when the cost is bits (docs/design.md, "Search")."""
    return objective.space.spec.bits_cap_factor if objective.network is None and not objective.front else None


def _engine(objective, plans, split, refill=None) -> list:
    rows = _rows_of(objective, plans)
    return simulate(objective.problem, method=plans[0].candidate.method, compressor=rows.compressor,
                    step_size=rows.step_size, seeds=rows.seeds, target=objective.target,
                    max_rounds=objective.max_rounds, x0=objective.x0, params=rows.params,
                    max_bits_per_worker=objective.bits_cap(plans[0].cap), stall_window=rows.stall_window,
                    monitor=split, loss_ref=objective.loss_ref, precision=objective.precision, refill=refill,
                    **objective.link_kwargs(plans[0].candidate.method))


def _mark_capped(runs, capped) -> None:
    for r, hit in zip(runs, capped):
        if hit and r.status == "stopped":
            r.status = "bits_cap"  # stopped by the cap tightened inside the batch, as the engine's own cap does


def simulate_group(objective, plans) -> tuple[list[list], float | None]:
    """Simulate the plans of one group in one engine batch: one list of runs per plan, and the
    cost cap the batch ended with (tightened by its own finished trials; None: no cap or the
    cost is not bits)."""
    S = len(objective.seeds)
    factor = _cap_factor(objective)
    split = _SplitMonitor([p.monitor for p in plans], S, cap=objective.bits_cap(plans[0].cap), cap_factor=factor,
                          target=objective.target)
    runs = _engine(objective, plans, split)
    _mark_capped(runs, split.capped)
    return [runs[i * S:(i + 1) * S] for i in range(len(plans))], split.cap if factor is not None else None


def _tell(study, objective, trial, plan, runs, tight: float | None) -> None:
    """Score a finished trial and tell Optuna (pruned when its monitor pruned it); ``tight``: the cap
    its batch had tightened to (None: none), from which a miss's penalty then starts."""
    if tight is not None and (plan.cap is None or tight < plan.cap):
        plan = replace(plan, cap=tight)
    try:
        value = objective.finish(trial, plan, runs)
    except optuna.TrialPruned:
        study.tell(trial, state=TrialState.PRUNED)
    else:
        study.tell(trial, value)


def _fail(study, trial, reason: str) -> None:
    study._storage.set_trial_user_attr(trial._trial_id, "failed_reason", reason)
    study.tell(trial, state=TrialState.FAIL)


def _group_key(plan) -> tuple:
    return plan.candidate.method, plan.candidate.compressor["name"]


class _Entry:
    """A trial running in a refilling batch: its plan and its S runs as they end."""

    def __init__(self, trial, plan, seeds: int) -> None:
        self.trial, self.plan = trial, plan
        self.runs: list = [None] * seeds
        self.done = False


class _Refiller:
    """:func:`run_refilling`'s state: the trials it asked and holds for a later batch, and their heartbeats."""

    def __init__(self, study, objective, *, budget: int, size: int) -> None:
        self.study, self.objective, self.budget, self.size = study, objective, budget, size
        self.S = len(objective.seeds)
        self.held: list[tuple] = []  # (trial, plan) asked, of another group than the running batch
        self.beats: dict[int, contextlib.ExitStack] = {}
        self.running: list = []  # trials of the last engine batch not told yet (failed if it stops)
        self.done = 0

    # ---------------------------------------------------------------- trials
    def ask(self, count: int) -> list[tuple]:
        """Ask up to ``count`` trials within the global budget and plan them; (trial, plan) pairs."""
        from optuna.storages._heartbeat import get_heartbeat_thread

        from .search import COUNTED, enqueue_refinement, over_budget

        study = self.study
        # The budget's last tenth refines the best step (docs/design.md, "Step refinement"): enqueued
        # before the asks, as run_trials does, so the asks below pop them first.
        enqueue_refinement(study, self.objective.space, budget=self.budget, seeds=self.S)
        free = self.budget - len(study.get_trials(deepcopy=False, states=COUNTED))
        asked = [study.ask() for _ in range(max(0, min(count, free)))]
        if not asked:
            return []
        # Another process may have asked at the same moment: a trial whose number shows that the
        # budget was already taken when it was asked fails with the reason recorded.
        counted = study.get_trials(deepcopy=False, states=COUNTED)
        kept = []
        for t in asked:
            if over_budget(counted, t.number, self.budget):
                _fail(study, t, "over the trial budget")
            else:
                stack = contextlib.ExitStack()
                stack.enter_context(get_heartbeat_thread(t._trial_id, study._storage))  # Optuna's own thread
                self.beats[t._trial_id] = stack
                kept.append(t)
        cap = self.objective._cap(study)
        return [(t, self.objective.plan(t, cap)) for t in kept]

    def _close(self, trial) -> None:
        stack = self.beats.pop(trial._trial_id, None)
        if stack is not None:
            stack.close()

    def tell(self, entry: _Entry, tight) -> None:
        _tell(self.study, self.objective, entry.trial, entry.plan, entry.runs, tight)
        entry.done = True
        self._close(entry.trial)
        self.done += 1

    def fail(self, trial, reason: str) -> None:
        _fail(self.study, trial, reason)
        self._close(trial)

    def fail_running(self, trials, exc: BaseException) -> None:
        for t in trials:
            if self.study._storage.get_trial(t._trial_id).state == TrialState.RUNNING:
                self.fail(t, f"its batch stopped: {type(exc).__name__}: {exc}")

    # ----------------------------------------------------------------- batch
    def run_group(self, start: list[tuple]) -> None:
        """One refilling engine batch that starts with ``start`` (trials of one group) and takes in
        trials of that group as its trials finish, until the budget is asked and its rows end."""
        objective, S = self.objective, self.S
        key = _group_key(start[0][1])
        cap = objective._cap(self.study)
        factor = _cap_factor(objective)
        entries = [_Entry(t, replace(p, cap=cap), S) for t, p in start]
        split = _SplitMonitor([e.plan.monitor for e in entries], S, cap=objective.bits_cap(cap), cap_factor=factor,
                              target=objective.target)

        def refill(ended):
            for i, run in ended:
                entry = entries[i // S]
                entry.runs[i % S] = run
                if all(r is not None for r in entry.runs):  # the trial's last seed ended: tell it now
                    _mark_capped(entry.runs, split.capped[(i // S) * S:(i // S + 1) * S])
                    self.tell(entry, split.cap if factor is not None else None)
            free = self.size - sum(not e.done for e in entries)
            if free <= 0:
                return None
            joining = [h for h in self.held if _group_key(h[1]) == key][:free]
            if len(joining) < free and len(self.held) - len(joining) < self.size:
                for trial, plan in self.ask(free - len(joining)):
                    (joining if _group_key(plan) == key else self.held).append((trial, plan))
            self.held = [h for h in self.held if h not in joining]
            if not joining:
                return None
            now = objective._cap(self.study)  # other trials (here or elsewhere) may have tightened it
            if factor is not None and now is not None:
                split.cap = now if split.cap is None else min(split.cap, now)
            new = [_Entry(t, replace(p, cap=now), S) for t, p in joining]
            entries.extend(new)
            split.add([e.plan.monitor for e in new])
            return _rows_of(objective, [e.plan for e in new])

        try:
            _engine(objective, [e.plan for e in entries[:len(start)]], split, refill=refill)
        except ArithmeticError:
            # A numerical fault: each trial still running again, alone; only one that faults alone fails.
            for entry in [e for e in entries if not e.done]:
                plan = objective.plan(entry.trial, entry.plan.cap)  # the same candidate (its params are fixed)
                plan.monitor.reported = entry.plan.monitor.step
                try:
                    (runs,), tight = simulate_group(objective, [plan])
                except ArithmeticError as solo:
                    self.fail(entry.trial, f"{type(solo).__name__}: {solo}")
                    entry.done = True
                    continue
                entry.plan, entry.runs = plan, runs
                self.tell(entry, tight)
        finally:
            self.running = [e.trial for e in entries if not e.done]


def run_refilling(study: optuna.Study, objective, *, budget: int, size: int, poll: float = 1.0) -> int:
    """:func:`bittune.search.run_trials` with up to ``size`` trials in one refilling engine batch
    (docs/design.md, "Batched trials"); returns how many trials this process finished.

    A batch starts with the asked trials of one group (method and compressor class); when a
    trial's S seeds have all ended it is scored and told at once, and newly asked trials of the
    group join the running batch (their x^0 in the round's one oracle call), so the batch stays
    near ``size`` x S rows until the budget is asked. An asked trial of another group is held
    (asked, RUNNING) for a later batch; at most ``size`` are held, after which the batch drains.
    """
    from .search import COUNTED, recover_stale_trials

    run = _Refiller(study, objective, budget=budget, size=size)
    finished_states = (TrialState.COMPLETE, TrialState.PRUNED)
    try:
        while len(study.get_trials(deepcopy=False, states=finished_states)) < budget:
            if len(run.held) < size:
                run.held += run.ask(size - len(run.held))
            if not run.held:
                if budget - len(study.get_trials(deepcopy=False, states=COUNTED)) <= 0:
                    time.sleep(poll)
                    recover_stale_trials(study)
                continue
            key = _group_key(run.held[0][1])
            start = [h for h in run.held if _group_key(h[1]) == key][:size]
            run.held = [h for h in run.held if h not in start]
            run.run_group(start)
        return run.done
    except BaseException as exc:
        run.fail_running([t for t, _ in run.held] + run.running, exc)
        raise
    finally:
        for stack in list(run.beats.values()):
            stack.close()
