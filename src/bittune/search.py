"""The Optuna study: theory-relative space, seeding, objective, pruning, parallel trials.

The search never asks for a raw step size (docs/design.md, "Theory-relative
search"): a trial picks a method, a compressor and its density, then a
multiplier over the theory step of that method at that density, a multiplier
over MARINA's theory sync probability zeta/d, and one over DIANA's shift rate
1/(1+omega). The theory point (multiplier 1) and a ladder of larger steps are
enqueued before any worker starts, so they run first.

A trial's value is the uplink bits per worker to reach the target, averaged
over the same few seeds for every trial (common random numbers); the seeds run
as one batch in the engine. Missing the target costs a finite penalty that
grows with the distance to it; diverging costs twice that.

Parallel trials are processes sharing one Optuna storage (DEVELOPERS.md,
"Code habits"): a journal file in the run directory by default, any Optuna storage URL
otherwise. The trial budget is global: a process asks for a trial only while
fewer than ``budget`` trials are finished or running.
"""

from __future__ import annotations

import copy
import math
import os
import time
from dataclasses import dataclass, field

import numpy as np
import optuna
from optuna.storages.journal import JournalFileBackend
from optuna.trial import TrialState

from .compressors import COMPRESSORS, make_compressor
from .job import BIDIRECTIONAL
from .methods import METHODS, dense_bits
from .constants import Constants
from .cost import cost_function
from .simulate import Trajectory, simulate
from .theory import fits, measured_contraction, theory_point

__all__ = [
    "Candidate", "Space", "Objective", "score", "open_storage", "open_study", "enqueue_seeds",
    "fail_stale_trials", "run_trials", "batch_size", "search_seeds", "stall_window", "COUNTED", "mask_url", "TrialPlan",
    "trial_value", "FRONT_DIRECTIONS", "enqueue_refinement", "refine_plan",
]

#: Trial states that count against the global budget.
COUNTED = (TrialState.COMPLETE, TrialState.PRUNED, TrialState.RUNNING)
#: Step multipliers enqueued above the theory point (docs/design.md: theory is timid).
SEED_LADDER = (1.0, 2.0, 4.0, 16.0, 64.0, 256.0)
#: Anchor multipliers enqueued after the theory point for a method whose theory rule gives a
#: search anchor (EF21: 1/L, DIANA: 1/(2L); docs/theory.md §2.9, §2.3): around the anchor and far
#: above it (good steps measured at 2-5/L on benchmarks/quality.py's problem, 16-22/L on the demo
#: data, where the probe's L overstates the curvature along the run).
ANCHOR_LADDER = (0.25, 1.0, 2.0, 4.0, 8.0, 32.0)
#: Methods with MARINA's sync probability p (searched as a multiplier of the theory p).
SYNCED = ("marina", "pp_marina", "vr_marina")
#: Minimum stall window in rounds; MARINA's grows like 1/p, DIANA's like 1/alpha (docs/design.md,
#: "Stall windows": runs that would converge are cut otherwise; own measurements, no outside source).
STALL_ROUNDS = 100
#: The MARINA family's window in expected rounds between syncs (10/p).
SYNC_STALL = 10.0
#: DIANA's window in time constants of its shifts (20/alpha): its ||grad f||^2 can rise for ~10/alpha
#: rounds while the shifts learn the local gradients (measured: docs/design.md, "Stall windows").
SHIFT_STALL = 20.0
#: Cost between pruning checkpoints grows by this factor (common practice, no source).
CHECKPOINT_GROWTH = 2.0
#: The objective ``front``: a two-objective study, (uplink bits per worker, simulated seconds), both minimised.
FRONT_DIRECTIONS = ("minimize", "minimize")


def trial_value(t) -> float | None:
    """A finished trial's scalar value: its value, or the first objective (bits) of a front study's trial."""
    values = t.values
    if values is None:
        return None
    return float(values[0])


@dataclass(frozen=True)
class Candidate:
    """One setting in absolute units, with the multipliers it came from."""

    method: str
    compressor: dict
    step_size: float
    sync_probability: float | None = None
    shift_rate: float | None = None
    step_mult: float = 1.0
    sync_mult: float | None = None
    shift_mult: float | None = None
    clients: int | None = None  # PP-MARINA's clients per compressed round
    minibatch: int | None = None  # VR-MARINA's rows per worker per compressed round

    def params(self) -> dict:
        """Method parameters as :func:`bittune.simulate.simulate` takes them."""
        out = {}
        if self.clients is not None:
            out["clients"] = self.clients
        if self.minibatch is not None:
            out["minibatch"] = self.minibatch
        if self.sync_probability is not None:
            out["sync_probability"] = self.sync_probability
        if self.shift_rate is not None:
            out["shift_rate"] = self.shift_rate
        return out

    @property
    def label(self) -> str:
        c = self.compressor
        return ":".join([c["name"], *(str(v) for k, v in c.items() if k != "name")])

    def key(self) -> tuple:
        """Identity for de-duplication: same method, compressor, and values to 4 digits."""
        r = lambda v: None if v is None else float(f"{v:.4g}")  # noqa: E731
        return (self.method, self.label, r(self.step_size), r(self.sync_probability), r(self.shift_rate),
                self.clients, self.minibatch)

    def with_step(self, step: float) -> "Candidate":
        return Candidate(self.method, self.compressor, step, self.sync_probability, self.shift_rate,
                         self.step_mult * step / self.step_size, self.sync_mult, self.shift_mult, self.clients,
                         self.minibatch)

    def to_config(self) -> dict:
        out = {"method": self.method, "compressor": dict(self.compressor), "step_size": float(self.step_size)}
        if self.sync_probability is not None:
            out["sync_probability"] = float(self.sync_probability)
        if self.shift_rate is not None:
            out["shift_rate"] = float(self.shift_rate)
        if self.clients is not None:
            out["clients"] = int(self.clients)
        if self.minibatch is not None:
            out["minibatch"] = int(self.minibatch)
        return out


class Space:
    """The search space of one job, in theory-relative units."""

    def __init__(self, spec, constants: Constants, *, target: float, contraction_vectors=None):
        self.spec = spec
        self.constants = constants
        self.dim = constants.dim
        self.target = float(target)
        self._vectors = contraction_vectors
        self._theory: dict[tuple, object] = {}
        self.methods = list(spec.methods)
        self.compressors = {m: self._fitting(m) for m in self.methods}
        if "vr_marina" in self.methods and constants.L_sample is None:
            from .errors import InputError

            raise InputError("search.methods: vr_marina needs a model with per-sample gradients (the "
                             "plugin models give whole-worker losses only) and the probe's calL; drop it")
        empty = [m for m, c in self.compressors.items() if not c]
        if empty:
            from .errors import InputError

            raise InputError(f"search.compressors: no compressor in {spec.compressors} fits "
                             f"{', '.join(empty)} (dcgd, diana, pp_marina need an independent unbiased one: "
                             f"rand_k, dither, natural, natural_dither, identity; marina also takes perm_k)")

    @property
    def max_minibatch(self) -> int:
        """VR-MARINA's largest minibatch b': the smallest worker's row count."""
        return int(self.constants.min_samples_per_worker or 1)

    # ------------------------------------------------------------ structure
    def _fitting(self, method: str) -> list[str]:
        """Compressor names of the job that ``method``'s theory applies to (theory.fits)."""
        if method == "gd":
            return ["identity"]
        out = []
        for name in self.spec.compressors:
            spec = {"name": name, **{p: 1 for p in COMPRESSORS[name].params}}
            if fits(method, make_compressor(spec, self.dim, n_workers=self.constants.n_workers)):
                out.append(name)
        return out

    def _density_param(self, name: str) -> tuple[str, int, int] | None:
        """(param name, low, high) of a compressor's density, None if it has none."""
        if name in ("rand_k", "top_k"):
            return f"{name}.k", 1, self.dim
        if name in ("dither", "natural_dither"):
            lo, hi = self.spec.levels_range
            return f"{name}.levels", int(lo), int(min(hi, 8) if name == "natural_dither" else hi)
        return None

    def theory(self, method: str, compressor: dict, clients: int | None = None, minibatch: int | None = None):
        """The theory point of ``method`` with ``compressor`` (and PP-MARINA's clients or VR-MARINA's
        minibatch), cached."""
        key = (method, tuple(sorted(compressor.items())), clients, minibatch)
        if key not in self._theory:
            comp = make_compressor(compressor, self.dim, n_workers=self.constants.n_workers)
            alpha = None
            if method == "ef21" and not comp.unbiased and not comp.correlated and self._vectors is not None:
                alpha = measured_contraction(comp, self._vectors)
            self._theory[key] = theory_point(method, comp, self.constants, target=self.target,
                                             contraction=alpha, clients=clients, minibatch=minibatch)
        return self._theory[key]

    def candidate(self, method: str, compressor: dict, *, step_mult: float = 1.0,
                  sync_mult: float | None = None, shift_mult: float | None = None,
                  clients: int | None = None, minibatch: int | None = None) -> Candidate:
        minibatch = minibatch if method == "vr_marina" else None
        t = self.theory(method, compressor, clients, minibatch)
        sync = shift = None
        if method in SYNCED:
            sync_mult = 1.0 if sync_mult is None else sync_mult
            sync = min(1.0, sync_mult * t.sync_probability)
        if method == "diana":
            shift_mult = 1.0 if shift_mult is None else shift_mult
            shift = min(1.0, shift_mult * t.shift_rate)
        return Candidate(method, dict(compressor), step_mult * t.step_size, sync, shift,
                         step_mult, sync_mult, shift_mult, t.clients if method == "pp_marina" else None,
                         t.minibatch)

    # --------------------------------------------------------------- trials
    def suggest(self, trial: optuna.Trial) -> Candidate:
        """Define-by-run: draw one candidate for ``trial``."""
        s = self.spec
        method = trial.suggest_categorical("method", self.methods)
        name = trial.suggest_categorical(f"{method}.compressor", self.compressors[method])
        compressor = {"name": name}
        dp = self._density_param(name)
        if dp is not None:
            pname, lo, hi = dp
            compressor[pname.split(".")[1]] = trial.suggest_int(pname, lo, hi, log=True)
        name_, lo_, hi_ = self.step_param(method, compressor)
        step_mult = trial.suggest_float(name_, lo_, hi_, log=True) * self.step_unit(method, compressor)
        sync_mult = shift_mult = clients = minibatch = None
        if method in SYNCED:
            sync_mult = trial.suggest_float(f"{method}.sync_mult", *s.sync_range, log=True)
        if method == "pp_marina":
            clients = trial.suggest_int("pp_marina.clients", 1, self.constants.n_workers, log=True)
        if method == "vr_marina" and self.constants.minibatch is None:  # else the job's b (§2.12)
            minibatch = trial.suggest_int("vr_marina.minibatch", 1, self.max_minibatch, log=True)
        if method == "diana":
            shift_mult = trial.suggest_float("diana.shift_mult", *s.shift_range, log=True)
        return self.candidate(method, compressor, step_mult=step_mult, sync_mult=sync_mult,
                              shift_mult=shift_mult, clients=clients, minibatch=minibatch)

    def _anchor(self, method: str, compressor: dict):
        """The theory point's (search_anchor, search_range), or None: the search's step unit is then the
        theory step and its range ``search.step_range`` (docs/design.md, "Theory-relative search")."""
        if method == "gd":
            return None
        t = self.theory(method, compressor)
        return None if t.search_anchor is None else (t.search_anchor, t.search_range)

    def step_param(self, method: str, compressor: dict) -> tuple[str, float, float]:
        """(Optuna param name, low, high) of ``method``'s step: ``{method}.step_mult`` over the theory
        step, or ``{method}.anchor_mult`` over the theory rule's search anchor."""
        anchor = self._anchor(method, compressor)
        if anchor is None:
            return (f"{method}.step_mult", *self.spec.step_range)
        return (f"{method}.anchor_mult", *(self.spec.anchor_range or anchor[1]))

    def step_unit(self, method: str, compressor: dict) -> float:
        """The step multiplier over the theory step that one unit of :meth:`step_param` is."""
        anchor = self._anchor(method, compressor)
        return 1.0 if anchor is None else anchor[0] / self.theory(method, compressor).step_size

    def step_params(self, method: str, compressor: dict, step_mult: float) -> dict:
        """A step multiplier over the theory step as a trial holds it, clipped into its range."""
        name, lo, hi = self.step_param(method, compressor)
        return {name: _clip(step_mult / self.step_unit(method, compressor), (lo, hi))}

    def density_options(self, name: str, points: int) -> list[dict]:
        """Settings of compressor ``name`` on a log grid of ``points`` densities (one if it has none)."""
        dp = self._density_param(name)
        if dp is None:
            return [{"name": name}]
        pname, lo, hi = dp
        grid = np.unique(np.round(np.geomspace(lo, hi, points)).astype(int))
        return [{"name": name, pname.split(".")[1]: int(v)} for v in grid]

    def theory_density(self, method: str) -> dict:
        """The compressor setting with the fewest predicted bits for ``method``.

        Densities are tried on a log grid (theory usually picks an extreme K,
        docs/theory.md §2.4 and §2.9), dithering over its level range.
        """
        best, best_bits = None, math.inf
        for name in self.compressors[method]:
            for comp in self.density_options(name, 12):
                bits = self.theory(method, comp).predicted_bits_per_worker
                if bits < best_bits:
                    best, best_bits = comp, bits
        return best

    def seed_points(self) -> list[dict]:
        """Enqueue-ready params: theory point and step ladder per method, clipped to the bounds."""
        s = self.spec
        out, seen = [], set()
        for method in self.methods:
            comp = self.theory_density(method)
            base = {"method": method, f"{method}.compressor": comp["name"]}
            dp = self._density_param(comp["name"])
            if dp is not None:
                pname, lo, hi = dp
                base[pname] = int(min(max(comp[pname.split(".")[1]], lo), hi))
            if method in SYNCED:
                base[f"{method}.sync_mult"] = _clip(1.0, s.sync_range)
            if method == "pp_marina":
                base["pp_marina.clients"] = int(self.constants.n_workers)
            if method == "vr_marina" and self.constants.minibatch is None:
                base["vr_marina.minibatch"] = int(self.theory(method, comp).minibatch)
            if method == "diana":
                base["diana.shift_mult"] = _clip(1.0, s.shift_range)
            pname_, lo_, hi_ = self.step_param(method, comp)
            unit = self.step_unit(method, comp)
            # Anchored: the theory point, then the ladder below and around the anchor.
            ladder = SEED_LADDER if unit == 1.0 else (1.0 / unit, *ANCHOR_LADDER)
            for m in ladder:
                params = dict(base, **{pname_: _clip(m, (lo_, hi_))})
                key = tuple(sorted(params.items()))
                if key not in seen:
                    seen.add(key)
                    out.append(params)
        return out

    def from_params(self, params: dict) -> Candidate:
        """Rebuild the candidate of a finished trial from its params."""
        method = params["method"]
        name = params[f"{method}.compressor"]
        compressor = {"name": name}
        dp = self._density_param(name)
        if dp is not None:
            compressor[dp[0].split(".")[1]] = int(params[dp[0]])
        name_, _, _ = self.step_param(method, compressor)
        return self.candidate(method, compressor,
                              step_mult=params[name_] * self.step_unit(method, compressor),
                              sync_mult=params.get(f"{method}.sync_mult"),
                              shift_mult=params.get("diana.shift_mult") if method == "diana" else None,
                              clients=params.get("pp_marina.clients") if method == "pp_marina" else None,
                              minibatch=params.get("vr_marina.minibatch"))


def _clip(value: float, bounds: tuple) -> float:
    return float(min(max(value, bounds[0]), bounds[1]))


# -------------------------------------------------------------------- objective
def stall_window(method: str, params: dict | None = None, compressor=None):
    """Rounds without progress before a trajectory counts as stalled (docs/design.md, "Stall windows").

    ``params`` as :func:`bittune.simulate.simulate` takes them (scalars or one value per
    trajectory). 100 rounds; the MARINA family max(100, 10/p); DIANA max(100, 20/alpha), its
    shift rate alpha from ``params`` or else the method's own default for ``compressor``.
    """
    params = params or {}
    if method in SYNCED and params.get("sync_probability") is not None:
        return np.maximum(STALL_ROUNDS, SYNC_STALL / np.asarray(params["sync_probability"], dtype=np.float64))
    if method == "diana":
        alpha = params.get("shift_rate")
        if alpha is None and compressor is not None:
            alpha = METHODS["diana"].params["shift_rate"](compressor)  # what the engine will run
        if alpha is not None:
            return np.maximum(STALL_ROUNDS, SHIFT_STALL / np.asarray(alpha, dtype=np.float64))
    return STALL_ROUNDS


def search_seeds(spec) -> list[int]:
    """The common random seeds every trial uses."""
    return [spec.seed * 1000 + j for j in range(spec.seeds)]


def score(runs: list[Trajectory], *, target: float, cap: float | None, cost=None) -> tuple[float, list[float]]:
    """Mean over seeds of: the cost if reached; else a penalty growing with the distance to target.

    The cost is uplink bits per worker unless ``cost`` (run -> float, e.g.
    simulated seconds) is given. Missed (budget, bit cap, stall, stop):
    max(cost, cap) x (2 + log10(best metric / target)), at least twice
    the cap, the metric being the run's stopping metric (``Trajectory.progress``:
    ||grad f||^2, or f - f_ref for a loss-gap target). Diverged: twice that.
    (Our own rule: it keeps values finite and ordered, so the sampler still
    learns from failures; no source.)
    """
    cost = cost or (lambda r: float(r.uplink_bits))
    values = []
    for r in runs:
        if r.reached:
            values.append(cost(r))
            continue
        finite = r.progress[np.isfinite(r.progress)]
        best = float(finite.min()) if finite.size else math.inf
        distance = math.log10(best / target) if math.isfinite(best) and best > 0 else 12.0
        base = max(cost(r), cap or 0.0, 1e-9)
        v = base * (2.0 + max(distance, 0.0))
        values.append(2.0 * v if r.status == "diverged" else v)
    return float(np.mean(values)), values


@dataclass(frozen=True)
class TrialPlan:
    """What one trial's simulation needs: its candidate, compressor, stall window, pruning monitor
    and the study's cost cap when it started."""

    candidate: Candidate
    compressor: object
    window: object
    monitor: "_PruneMonitor"
    cap: float | None


@dataclass
class Objective:
    """Callable objective for one process: problem, space and the job's budget."""

    problem: object
    space: Space
    x0: np.ndarray
    target: float
    max_rounds: int
    max_bits: float | None
    seeds: list[int]
    worker: int = 0
    network: object = None  # a NetworkModel for the objective "seconds"; None: bits
    loss_ref: float | None = None  # f_ref of a loss-gap target (then ``target`` is the gap); None: ||grad f||^2
    precision: str = "float64"  # the job's engine.precision
    #: objective front: the value is (bits, seconds) and no trial is pruned (Optuna prunes single-objective
    #: studies only; docs/design.md, "The front")
    front: bool = False
    downlink: dict | None = None  # the job's downlink.compressor spec; None: dense broadcast
    minibatch: int | None = None  # the job's minibatch b (stochastic gradients); None: full batch
    _best: float = field(default=math.inf, repr=False)

    def __call__(self, trial: optuna.Trial) -> float:
        plan = self.plan(trial, self._cap(trial.study))
        runs = simulate(self.problem, method=plan.candidate.method, compressor=plan.compressor,
                        step_size=plan.candidate.step_size, seeds=self.seeds, target=self.target,
                        max_rounds=self.max_rounds, x0=self.x0, params=plan.candidate.params(),
                        max_bits_per_worker=self.bits_cap(plan.cap), stall_window=plan.window,
                        monitor=plan.monitor, loss_ref=self.loss_ref, precision=self.precision,
                        **self.link_kwargs(plan.candidate.method))
        return self.finish(trial, plan, runs)

    def link_kwargs(self, method: str) -> dict:
        """simulate()'s network and downlink arguments for this objective and ``method``."""
        return link_kwargs(self.problem, self.network, self.downlink, method, minibatch=self.minibatch)

    def plan(self, trial: optuna.Trial, cap: float | None) -> "TrialPlan":
        """Draw ``trial``'s candidate and set up what its simulation needs (cap: the study's cost cap)."""
        cand = self.space.suggest(trial)
        trial.set_user_attr("worker", self.worker)
        trial.set_user_attr("pid", os.getpid())
        trial.set_user_attr("candidate", _plain(cand.to_config()))
        comp = make_compressor(cand.compressor, self.problem.dim, n_workers=self.problem.n_workers)
        window = stall_window(cand.method, cand.params(), comp)
        d = self.problem.dim
        if self.network is None:
            cost_at = lambda k, bits: bits  # noqa: E731
        else:
            net = self.network
            # Full local gradients per round: 1, VR-MARINA's expected p + (1-p) 2b'/m_i, or a minibatch's.
            passes = 1.0
            if self.minibatch is not None and cand.method != "vr_marina":
                # The job's minibatch (docs/theory.md §2.12): b/m_i per estimate, a MARINA-type
                # difference 2b/m_i (an upper bound for PP-MARINA, whose undrawn clients compute none).
                per = float(np.mean(self.minibatch / self.problem.worker_sizes))
                p = cand.sync_probability if cand.method in SYNCED else 1.0
                passes = p * per + (1.0 - p) * 2.0 * per
            elif cand.minibatch is not None:
                p = cand.sync_probability
                passes = p + (1.0 - p) * float(np.mean(2.0 * cand.minibatch / self.problem.worker_sizes))
            # The objective's one seconds formula, with the dense broadcast of every round.
            cost_at = lambda k, bits: net.seconds_at(k, passes * k, bits, dense_bits(d) * k)  # noqa: E731
        # Checkpoints start at the cost of four dense rounds and grow geometrically.
        start = cost_at(4, 4 * 32.0 * d)
        if self.network is not None and "network" in self.link_kwargs(cand.method):
            cost_at = lambda k, secs: secs  # noqa: E731  (the engine hands the monitor its seconds)
        monitor = _PruneMonitor(trial, len(self.seeds), self.target, cost_at=cost_at, start=start,
                                prune=not self.front)
        return TrialPlan(cand, comp, window, monitor, cap)

    def bits_cap(self, cap: float | None) -> float | None:
        """The engine's bit cap per worker: the cost cap when the cost is bits, else the job's."""
        return cap if self.network is None else self.max_bits

    def finish(self, trial: optuna.Trial, plan: "TrialPlan", runs: list[Trajectory]) -> float | list[float]:
        """Score ``trial``'s runs and record them on it; raises ``TrialPruned`` for a pruned trial.
        A front study's value is [bits, seconds], each scored by :func:`score` with its own floor."""
        cap, monitor = plan.cap, plan.monitor
        # Before any trial has reached the target there is no cap; a miss must still score above
        # every possible reach, so its penalty starts from the most a reach could cost.
        floor = cap if cap is not None else self._most_a_reach_costs()  # a front study has no cap
        value, per_seed = score(runs, target=self.target, cap=floor, cost=cost_function(self.network))
        if self.front:  # [bits, seconds]: bits scored with the bits floor
            bits_floor = self.max_bits if self.max_bits is not None else self._most_a_reach_costs(bits=True)
            value = [score(runs, target=self.target, cap=bits_floor)[0], value]
        if self.network is not None:
            trial.set_user_attr("seconds", [float(self.network.seconds(r)) for r in runs])
        trial.set_user_attr("status", [r.status for r in runs])
        trial.set_user_attr("bits", [float(r.uplink_bits) for r in runs])
        trial.set_user_attr("rounds", [int(r.rounds) for r in runs])
        trial.set_user_attr("reached", int(sum(r.reached for r in runs)))
        trial.set_user_attr("penalised", [float(v) for v, r in zip(per_seed, runs) if not r.reached])
        trial.set_user_attr("cost_cap", cap)
        if monitor.pruned:
            raise optuna.TrialPruned(f"pruned at {monitor.step} bit checkpoints")
        return value

    def _most_a_reach_costs(self, *, bits: bool = False) -> float:
        """An upper bound on the cost of any trajectory that reaches the target within the round budget.

        No message of our compressors exceeds d (33 + ceil(log2 d)) bits (a value and an index per
        coordinate, plus a norm), and no method computes more than two full gradients a round
        (VR-MARINA: 2 b' <= 2 m_i).
        """
        d = self.problem.dim
        most = (self.max_rounds + 1) * d * (33 + math.ceil(math.log2(max(d, 2))))
        if self.network is None or bits:
            return float(most)
        rounds = self.max_rounds + 1
        # A compressed broadcast's message obeys the same bound; on an uneven network one worker may
        # send up to n messages a round (a PP-MARINA client drawn r <= n times), and the bound is
        # the slowest worker's total (cost.NetworkModel.seconds_at).
        down = most if self.downlink is not None else dense_bits(d) * rounds
        up = most * self.problem.n_workers if self.network.uneven else most
        return float(self.network.seconds_at(rounds, 2.0 * rounds, up, down))

    def _cap(self, study: optuna.Study) -> float | None:
        """Cost cap: bits_cap_factor x the best all-seeds-reached value so far (and the job's bit cap,
        when the cost is bits). A front study has no single best: its cap is the job's bit cap only."""
        if self.front:
            return None
        best = self._best
        for t in study.get_trials(deepcopy=False, states=(TrialState.COMPLETE,)):
            if t.user_attrs.get("reached") == len(self.seeds) and t.value is not None:
                best = min(best, t.value)
        self._best = best
        job_cap = self.max_bits if self.network is None else None
        caps = [c for c in (job_cap, self.space.spec.bits_cap_factor * best) if c is not None]
        caps = [c for c in caps if math.isfinite(c)]
        return min(caps) if caps else None


def link_kwargs(problem, network, downlink: dict | None, method: str | None = None, *,
                minibatch: int | None = None) -> dict:
    """simulate()'s ``network`` (an uneven NetworkModel, else left out), ``downlink`` (the
    server's compressor built from the job's spec, else left out) and ``minibatch`` (the job's b,
    else left out: full batch) keyword arguments. A method
    without a bidirectional form (a baseline such as gd; the job admits only bidirectional
    search methods with a downlink) keeps the dense broadcast; every method, baselines included,
    runs on the job's minibatch (the run a user launches, docs/design.md "Stochastic gradients")."""
    out = {} if minibatch is None else {"minibatch": int(minibatch)}
    if downlink is not None and (method is None or method in BIDIRECTIONAL):
        out["downlink"] = make_compressor(downlink, problem.dim, key="downlink.compressor",
                                          n_workers=problem.n_workers)
    if network is not None and (network.uneven or "downlink" in out):
        out["network"] = network  # the engine's seconds: what a compressed broadcast or uneven links need
    return out


class _PruneMonitor:
    """Reports mean log10(best metric / target) over the seeds at geometric cost checkpoints.

    The metric is the engine's stopping metric: ||grad f||^2, or f - f_ref for a
    loss-gap target (a gap at or below 0 counts as 1e-12 x target).
    Trials are compared at equal cost (bits, or simulated seconds), the unit the
    search minimises, so a pruner never judges cheap-per-round settings by rounds.
    """

    def __init__(self, trial, n_seeds: int, target: float, *, cost_at, start: float, prune: bool = True):
        self.trial, self.target, self.cost_at = trial, target, cost_at
        self.prune = prune  # False: never reports nor stops (a front study)
        self.best = np.full(n_seeds, np.inf)
        self.next_cost = start
        self.step = 0
        self.pruned = False
        #: Checkpoints below this were reported by an earlier attempt of the same trial (a batch
        #: that a numerical fault stopped, re-run alone): not reported twice.
        self.reported = 0

    def __call__(self, k, index, bits, metric) -> bool:
        self.best[index] = np.minimum(self.best[index], np.where(np.isfinite(metric), metric, np.inf))
        if not self.prune or bits.size == 0 or self.cost_at(k, bits.mean()) < self.next_cost:
            return False
        with np.errstate(divide="ignore"):
            progress = np.log10(np.maximum(self.best, 1e-12 * self.target) / self.target)
        value = float(np.mean(np.minimum(progress, 1e6)))
        if self.step >= self.reported:
            self.trial.report(value, self.step)
        self.step += 1
        self.next_cost *= CHECKPOINT_GROWTH
        if self.trial.should_prune():
            self.pruned = True
            return True
        return False


def _plain(doc):
    if isinstance(doc, dict):
        return {k: _plain(v) for k, v in doc.items()}
    if isinstance(doc, (np.floating, np.integer)):
        return doc.item()
    return doc


# ------------------------------------------------------------------- storage
#: Heartbeats for database storages: a trial whose process stopped beating for
#: GRACE seconds is failed and retried once (Optuna's heartbeat settings).
#: BITTUNE_HEARTBEAT="interval,grace" (seconds) overrides them, e.g. for a fast test.
HEARTBEAT, GRACE, CONNECT_TIMEOUT = 20, 60, 10


def _heartbeat() -> tuple[int, int]:
    text = os.environ.get("BITTUNE_HEARTBEAT")
    if not text:
        return HEARTBEAT, GRACE
    try:
        interval, grace = (int(v) for v in text.split(","))
        if interval < 1 or grace <= interval:
            raise ValueError
    except ValueError:
        from .errors import InputError

        raise InputError(f"BITTUNE_HEARTBEAT: must be 'interval,grace' in whole seconds with grace > interval "
                         f">= 1, got {text!r}") from None
    return interval, grace


def mask_url(url: str) -> str:
    """The URL with its passwords hidden (``storage.redact``)."""
    from .storage import redact

    return redact(url, url)


class _JournalBackend(JournalFileBackend):
    """Optuna's journal file; a full disk or read-only file system names the journal (exit 7)."""

    def append_logs(self, logs):
        try:
            super().append_logs(logs)
        except OSError as exc:
            from ._yaml import NO_SPACE
            from .errors import WriteError

            if exc.errno in NO_SPACE:
                raise WriteError(f"{self._file_path}: cannot write the study journal "
                                 f"({os.strerror(exc.errno)})") from None
            raise


def open_storage(url: str):
    """An Optuna storage: a database URL (RDBStorage with heartbeats and a small pool), else a
    journal file path. An unreachable database raises :class:`StorageError` (exit 6)."""
    from .storage import real_url

    url = real_url(url)  # a summary holds the URL redacted; this process may know the real one
    if "://" not in url:
        from optuna.storages import JournalStorage
        from optuna.storages.journal import JournalFileSymlinkLock

        from .storage import JOURNAL_LOCK_GRACE, journal_path

        # An absolute path: optuna's lock is a symlink to this path, and a relative target
        # left by a killed run dangles, which optuna's lock loop then spins on forever.
        path = str(journal_path(url))
        try:
            return JournalStorage(_JournalBackend(path, lock_obj=JournalFileSymlinkLock(
                path, grace_period=JOURNAL_LOCK_GRACE)))
        except OSError as exc:
            from ._yaml import NO_SPACE
            from .errors import InputError, WriteError

            if exc.errno in NO_SPACE:
                raise WriteError(f"{path}: cannot write ({os.strerror(exc.errno)})") from None
            raise InputError(f"--storage: cannot open the journal file {path} ({os.strerror(exc.errno or 0)})") \
                from None
    import warnings

    from optuna.storages import RDBStorage, RetryHeartbeatStaleTrialCallback

    from .errors import StorageError
    from .storage import install_log_filter, redact, remember

    remember(url)
    install_log_filter()
    engine = {"pool_size": 1, "max_overflow": 2, "pool_pre_ping": True}
    if url.startswith("postgresql"):
        engine["connect_args"] = {"connect_timeout": CONNECT_TIMEOUT}
    if url.startswith("sqlite"):
        engine = {}
    try:
        # Optuna marks heartbeats "experimental" (a warning, not a defect): we rely on them
        # knowingly for multi-machine studies, so the warning is silenced here only.
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", optuna.exceptions.ExperimentalWarning)
            interval, grace = _heartbeat()
            return RDBStorage(url, engine_kwargs=engine, heartbeat_interval=interval, grace_period=grace,
                              heartbeat_stale_trial_callback=RetryHeartbeatStaleTrialCallback(max_retry=1))
    except ImportError as exc:
        raise StorageError(f"storage {mask_url(url)}: the database driver is missing ({exc}); "
                           f"install bittune[postgres]") from None
    except Exception as exc:  # SQLAlchemy's OperationalError and friends: report, retry later
        reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise StorageError(redact(f"storage unreachable: {url} ({type(exc).__name__}: {reason})", url)) from None


def open_study(storage, name: str, *, sampler_seed: int, pruner: str) -> optuna.Study:
    sampler = optuna.samplers.TPESampler(seed=sampler_seed)
    # A gentle median-style pruner: stop a trial only when its progress at a cost checkpoint
    # is in the worst quarter of the trials seen there, after 10 trials and 5 checkpoints.
    # Measured on the tuning benchmark's MARINA study: plain median pruning from the 4th
    # checkpoint stopped 51 of 60 trials, many of which would have reached the target at
    # fewer bits than the best trial kept, and saved under 10% of the wall time.
    prune = (optuna.pruners.PercentilePruner(75.0, n_startup_trials=10, n_warmup_steps=5)
             if pruner == "median" else optuna.pruners.NopPruner())
    return optuna.load_study(study_name=name, storage=storage, sampler=sampler, pruner=prune)


def fail_stale_trials(study: optuna.Study) -> int:
    """Mark trials left RUNNING by a killed process as FAIL (the journal has no heartbeat)."""
    stale = study.get_trials(deepcopy=False, states=(TrialState.RUNNING,))
    for t in stale:
        study._storage.set_trial_user_attr(t._trial_id, "failed_reason", "left running by a stopped process")
        study._storage.set_trial_state_values(t._trial_id, state=TrialState.FAIL)
    return len(stale)


def enqueue_seeds(study: optuna.Study, space: Space) -> int:
    """Enqueue the theory points and step ladder (once per study); returns how many."""
    if study.user_attrs.get("seeded"):
        return 0
    points = space.seed_points()
    for params in points:
        study.enqueue_trial(params, user_attrs={"seed_point": True})
    study.set_user_attr("seeded", True)
    return len(points)


#: The last tenth of the trial budget refines the step of the best trial so far, in two stages
#: (docs/design.md, "Step refinement"): first at these fractions of an octave around it, then, around
#: the best of that, at half of them. Bits usually fall as the step grows up to the edge where the
#: method stalls or diverges, and the best steps sit within a fraction of an octave of that edge,
#: narrower than a TPE density over many octaves resolves in a few dozen trials (measured on
#: benchmarks/quality.py's EF21 + Top-K: bits fall from 46.8k at 5.3/L to 42.8k at 7.3/L, and stall
#: at 7.6/L). Common practice (a local line search after a global one), no source.
REFINE_OCTAVES = (0.25, -0.25, 0.5, -0.5, 0.75)
#: Budgets below this many trials are not refined (a tenth of them is under two trials).
REFINE_MIN_BUDGET = 20


def refine_plan(budget: int) -> list[tuple[int, tuple[float, ...]]]:
    """(finished-or-running trials at which a stage starts, its step factors) of the refinement:
    the budget's last tenth (at most twice :data:`REFINE_OCTAVES`), its first part at
    :data:`REFINE_OCTAVES`, the rest at half of them."""
    if budget < REFINE_MIN_BUDGET:
        return []
    total = min(budget // 10, 2 * len(REFINE_OCTAVES))
    second = total // 2
    first = total - second
    return [(budget - total, tuple(2.0 ** o for o in REFINE_OCTAVES[:first])),
            (budget - second, tuple(2.0 ** (o / 2) for o in REFINE_OCTAVES[:second]))]


def enqueue_refinement(study: optuna.Study, space: Space, *, budget: int, seeds: int) -> int:
    """Enqueue a refinement stage of :func:`refine_plan` once its start is reached (once per stage and
    study); returns how many trials were enqueued. Only single-objective studies, and only around a
    trial that reached the target on every seed; the step is clipped into its range, and a setting
    already tried is not enqueued again."""
    if len(study.directions) != 1:
        return 0
    counted = len(study.get_trials(deepcopy=False, states=COUNTED))
    added = 0
    for stage, (start, factors) in enumerate(refine_plan(budget)):
        key = f"refined_{start}"
        if counted < start or study.user_attrs.get(key):
            continue
        study.set_user_attr(key, True)
        done = [t for t in study.get_trials(deepcopy=False, states=(TrialState.COMPLETE,))
                if t.user_attrs.get("reached") == seeds and t.value is not None]
        if not done:
            continue
        best = min(done, key=lambda t: t.value)
        cand = space.from_params(best.params)
        name, lo, hi = space.step_param(cand.method, cand.compressor)
        if stage > 0:
            factors = _bracket_factors(study, best, name, seeds=seeds, points=len(factors)) or factors
        for f in factors:
            params = dict(best.params, **{name: _clip(best.params[name] * f, (lo, hi))})
            before = len(study.get_trials(deepcopy=False))
            study.enqueue_trial(params, user_attrs={"refine_point": True}, skip_if_exists=True)
            added += len(study.get_trials(deepcopy=False)) - before
    return added


def _bracket_factors(study: optuna.Study, best, name: str, *, seeds: int, points: int) -> tuple[float, ...]:
    """Step factors that split the gap between ``best``'s step and the smallest larger step of the same
    setting that failed (pruned, or missed the target on a seed) into ``points + 1`` equal parts in
    log scale; () when no such failure is known (docs/design.md, "Step refinement")."""
    others = {k: v for k, v in best.params.items() if k != name}
    step = best.params[name]
    failed = [t.params[name] for t in study.get_trials(deepcopy=False, states=(TrialState.COMPLETE, TrialState.PRUNED))
              if t.params.get(name, 0.0) > step and {k: v for k, v in t.params.items() if k != name} == others
              and (t.state == TrialState.PRUNED or t.user_attrs.get("reached") != seeds)]
    if not failed:
        return ()
    gap = min(failed) / step
    return tuple(gap ** (j / (points + 1)) for j in range(1, points + 1))


def over_budget(counted, number: int, budget: int) -> bool:
    """True when ``budget`` counted trials (:data:`COUNTED`, from ``counted``) were asked before trial
    ``number``: another process took the budget's last place first (docs/design.md, "Storage, resume, parallel
    processes"). One rule for both runners: :func:`run_trials` and :mod:`bittune.batch`."""
    return sum(1 for c in counted if c.number < number) >= budget


class _OverBudget(Exception):
    """Raised inside a trial that was asked for after the global budget was taken."""


def recover_stale_trials(study: optuna.Study) -> None:
    """Fail (and, through the storage's callback, retry) trials whose heartbeat stopped.

    Only database storages keep heartbeats; elsewhere this does nothing. Optuna
    marks the function experimental: the warning is silenced here only.
    """
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", optuna.exceptions.ExperimentalWarning)
        optuna.storages.fail_stale_trials(study)
    _fail_beatless_trials(study)


def _fail_beatless_trials(study: optuna.Study) -> int:
    """Fail (and retry through the storage's callback) RUNNING trials of a database study that never
    recorded a heartbeat and started more than twice the grace period ago; returns how many.

    Optuna's stale-trial test skips trials without a heartbeat, and ``optimize()`` asks a trial
    (RUNNING from then on) before its heartbeat thread starts: a process killed in that window
    left a trial RUNNING for ever, and every process then waited for a budget that never finished.
    A live process records the first heartbeat right after the ask (a batch after asking all of
    its trials), so twice the grace period cannot catch a live trial on a sane clock."""
    from datetime import datetime, timedelta

    storage = study._storage
    backend = getattr(storage, "_backend", storage)  # Optuna wraps RDBStorage in a cache
    if not isinstance(backend, optuna.storages.RDBStorage) or backend.heartbeat_interval is None:
        return 0
    from optuna.storages._rdb import models
    from optuna.storages._rdb.storage import _create_scoped_session

    grace = backend.grace_period or 2 * backend.heartbeat_interval
    old = datetime.now() - timedelta(seconds=2 * grace)  # Optuna stamps datetime_start with now()
    running = [t for t in study.get_trials(deepcopy=False, states=(TrialState.RUNNING,))
               if t.datetime_start is not None and t.datetime_start < old]
    if not running:
        return 0
    with _create_scoped_session(backend.scoped_session) as session:
        beating = {tid for (tid,) in session.query(models.TrialHeartbeatModel.trial_id)
                   .filter(models.TrialHeartbeatModel.trial_id.in_([t._trial_id for t in running])).all()}
    failed = []
    for t in running:
        if t._trial_id in beating:
            continue
        try:
            storage.set_trial_user_attr(t._trial_id, "failed_reason", "its process stopped before its first heartbeat")
            if storage.set_trial_state_values(t._trial_id, state=TrialState.FAIL):
                failed.append(t._trial_id)
        except optuna.exceptions.UpdateFinishedTrialError:
            pass  # another process failed (or its own process finished) it meanwhile
    callback = storage.get_heartbeat_stale_trial_callback()
    for trial_id in failed if callback is not None else []:
        callback(study, copy.deepcopy(storage.get_trial(trial_id)))
    return len(failed)


def batch_size(spec, budget: int) -> int:
    """Trials one process keeps in its engine batch: ``search.trial_batch``, but at most its share
    ceil(budget / jobs) of the budget, so that a batch never asks the trials the other ``--jobs``
    processes were to run (8 trials, 2 jobs, trial_batch 8: 4 each, where the first process took
    all 8 and the second waited; measured on the scale benchmark's sparse sample, docs/design.md,
    "Batched trials")."""
    size = int(getattr(spec, "trial_batch", 1))
    jobs = max(1, int(getattr(spec, "jobs", 1)))
    return max(1, min(size, -(-int(budget) // jobs)))


def run_trials(study: optuna.Study, objective: Objective, *, budget: int, poll: float = 1.0) -> int:
    """Run trials in this process until ``budget`` trials are finished (complete or pruned).

    With ``search.trial_batch`` above 1 (the default is 1), up to that many trials share one
    refilling engine batch (:mod:`bittune.batch`). Otherwise each trial runs through
    ``study.optimize(n_trials=1)``, so database heartbeats work. While the rest of the budget is running in other
    processes, this one waits and recovers trials whose heartbeat stopped (a
    crashed machine), so their retries still run. A trial whose number shows
    that the budget was already taken when it started (a race between
    processes) is failed with the reason recorded. Returns how many trials this
    process ran.
    """
    size = batch_size(objective.space.spec, budget)
    if size > 1:
        from .batch import run_refilling

        return run_refilling(study, objective, budget=budget, size=size, poll=poll)
    done = 0
    finished_states = (TrialState.COMPLETE, TrialState.PRUNED)

    def guarded(trial: optuna.Trial) -> float:
        if over_budget(study.get_trials(deepcopy=False, states=COUNTED), trial.number, budget):
            trial.set_user_attr("failed_reason", "over the trial budget")
            raise _OverBudget()
        try:
            return objective(trial)
        except ArithmeticError as exc:
            trial.set_user_attr("failed_reason", f"{type(exc).__name__}: {exc}")
            raise

    while len(study.get_trials(deepcopy=False, states=finished_states)) < budget:
        enqueue_refinement(study, objective.space, budget=budget, seeds=len(objective.seeds))
        if len(study.get_trials(deepcopy=False, states=COUNTED)) >= budget:
            time.sleep(poll)
            recover_stale_trials(study)
            continue
        before = len(study.get_trials(deepcopy=False, states=(TrialState.FAIL,)))
        # A numerical fault (overflow, invalid value, division by zero) ends that trial as
        # FAIL with the reason recorded by Optuna, never the study; bugs still propagate.
        study.optimize(guarded, n_trials=1, catch=(_OverBudget, ArithmeticError), gc_after_trial=False)
        failed_over = [t for t in study.get_trials(deepcopy=False, states=(TrialState.FAIL,))[before:]
                       if t.user_attrs.get("failed_reason") == "over the trial budget"]
        done += 0 if failed_over else 1
    return done
