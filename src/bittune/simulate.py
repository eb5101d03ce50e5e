"""The engine: run a batch of trajectories, count every bit, stop each one on its own.

B trajectories (different seeds, step sizes, sync probabilities, ...) of one
method and one compressor advance together: their iterates form a (B, d)
matrix and every round is one batched oracle call (docs/design.md, "The engine").
A trajectory leaves the batch when it reaches the target, spends its budget
or diverges; the others go on without it.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ._random import trajectory_keys
from .methods import dense_bits, make_method
from .methods._minibatch import minibatch_weights
from .problems.base import PRECISIONS

__all__ = ["Trajectory", "STATUS", "simulate", "absolute_target", "PRECISIONS"]

#: Status of a finished trajectory, with the message shown to users.
STATUS = {
    "reached": "reached the target",
    "budget": "spent the round budget before the target",
    "bits_cap": "spent the bit budget before the target",
    "diverged": "diverged (non-finite values, or ||grad f||^2 far above its start)",
    "stalled": "stalled (no new best ||grad f||^2, or f - f_ref for a loss-gap target, for a window of rounds)",
    "stopped": "stopped by the caller (e.g. a pruned trial)",
}

#: A new best ||grad f||^2 must beat the old one by this factor to count as
#: progress for the stall rule (common practice, no source).
STALL_IMPROVEMENT = 0.99


@dataclass
class Trajectory:
    """One simulated run. Curves are indexed by round k = 0..rounds (iterate x^k)."""

    seed: int
    status: str
    rounds: int
    uplink_bits: float  # cumulative uplink bits per worker (mean over workers)
    downlink_bits: float  # cumulative broadcast bits per worker
    gradient_evals: float  # per-sample gradients each worker computed (mean over workers)
    gradient_passes: float  # the same in full local gradients (mean of evals_i / m_i); = rounds but for minibatches
    grad_norm_sq: np.ndarray  # ||grad f(x^k)||^2
    uplink_curve: np.ndarray  # uplink bits per worker spent to reach x^k
    loss_rounds: np.ndarray  # rounds at which f was recorded
    loss: np.ndarray  # f(x^k) at loss_rounds
    x: np.ndarray = field(repr=False)  # the last iterate
    #: The stopping metric at x^k: f(x^k) - f_ref for a loss-gap target, else ||grad f(x^k)||^2
    #: (None given: the same array as grad_norm_sq).
    progress: np.ndarray | None = field(default=None, repr=False)
    #: Cumulative downlink bits and gradient passes per worker to reach x^k (the seconds curve's
    #: inputs, cost.NetworkModel.seconds_curve); their last entries are downlink_bits, gradient_passes.
    downlink_curve: np.ndarray | None = field(default=None, repr=False)
    passes_curve: np.ndarray | None = field(default=None, repr=False)
    #: Uneven network only (simulate(network=...)): cumulative simulated seconds to reach x^k
    #: (cost.NetworkModel.round_seconds summed), and per worker the share of those seconds it was
    #: the slowest worker the round waited for (docs/design.md, "Round time with uneven workers").
    seconds_curve: np.ndarray | None = field(default=None, repr=False)
    worker_shares: np.ndarray | None = field(default=None, repr=False)

    def __post_init__(self) -> None:
        if self.progress is None:
            self.progress = self.grad_norm_sq

    @property
    def reached(self) -> bool:
        return self.status == "reached"

    @property
    def message(self) -> str:
        return STATUS[self.status]


def absolute_target(problem, x0: np.ndarray, *, grad_norm_sq: float, relative: bool) -> float:
    """The target on ||grad f||^2 in absolute units."""
    if not relative:
        return float(grad_norm_sq)
    g0 = problem.full_grad(x0)
    return float(grad_norm_sq) * float(g0 @ g0)


def simulate(
    problem,
    *,
    method: str,
    compressor,
    step_size,
    seeds,
    target: float,
    max_rounds: int,
    x0: np.ndarray | None = None,
    params: dict | None = None,
    max_bits_per_worker: float | None = None,
    divergence_factor: float = 1e6,
    loss_every: int = 0,
    stall_window=None,
    monitor=None,
    loss_ref: float | None = None,
    precision: str = "float64",
    network=None,
    downlink=None,
    minibatch: int | None = None,
) -> list[Trajectory]:
    """Simulate ``len(seeds)`` trajectories of ``method`` at once.

    ``step_size`` and each entry of ``params`` (``sync_probability``,
    ``shift_rate``) are scalars or one value per trajectory. ``target`` is
    absolute (see :func:`absolute_target`). The loss f is recorded at x^0,
    every ``loss_every`` rounds (0: never in between) and at the last iterate.

    The stopping metric is ||grad f(x^k)||^2, or with ``loss_ref`` (f_ref of a
    loss-gap target) f(x^k) - loss_ref: then f is computed every round (it
    shares the oracle's pass over the data) and recorded at every round, and
    ``target`` is the gap. Divergence is always judged on ||grad f||^2.

    ``stall_window`` (scalar or per trajectory; None: off) ends a trajectory
    that has not improved its best metric by 1% for that many rounds.
    ``monitor(k, index, uplink_bits, metric)`` is called after every
    round with the still-running trajectories (their indices into the batch,
    cumulative bits, current metric); if it returns True the batch
    stops and those trajectories end as ``stopped``; if it returns a boolean
    array over ``index``, only the marked trajectories stop (several trials
    sharing one batch, each pruned on its own).

    ``precision`` "float32" runs the trajectory arithmetic (iterates, method
    state, compressed messages, the data passes) in single precision on the
    problem's float32 twin (:meth:`Problem.in_precision`); the stopping
    metric ||grad f||^2 is still summed in float64 (:func:`_norm_sq`), and
    results (curves, last iterates) are float64. Bits do not depend on it
    except through value-dependent message sizes (Top-K ties, dithering nnz).

    ``network`` (a cost.NetworkModel; None: bits) makes ``monitor`` receive simulated seconds
    in place of the uplink bits. An uneven one also makes the engine sum each round's seconds
    (NetworkModel.round_seconds, waiting for the workers the method waited for) into
    ``Trajectory.seconds_curve``; an even one changes no trajectory. The broadcast is dense unless ``downlink`` is the server's
    compressor (a bidirectional method, docs/theory.md §2.11).

    ``minibatch`` b (None: full local gradients) runs the method on stochastic gradients: each
    round every worker draws b of its rows with replacement (keyed by trajectory and round,
    ``_minibatch.minibatch_weights``) and the method gets the minibatch means
    (:meth:`Method.stochastic_grads`; MARINA's differences on the same rows at both points,
    VR-MARINA's b' fixed to b); gradient evaluations count b per worker per estimate
    (docs/theory.md §2.12, docs/design.md "Stochastic gradients"). The stopping metric stays the
    full ||grad f(x^k)||^2.
    """
    seeds = np.atleast_1d(np.asarray(seeds, dtype=np.int64))
    B, d, n = seeds.shape[0], problem.dim, problem.n_workers
    if precision not in PRECISIONS:
        raise ValueError(f"precision must be one of {', '.join(PRECISIONS)}, got {precision!r}")
    if precision != "float64":
        if not hasattr(problem, "in_precision"):
            raise ValueError(f"precision {precision}: the model {getattr(problem, 'name', '?')!r} has no "
                             f"{precision} oracle")
        problem = problem.in_precision(precision)
    dtype = PRECISIONS[precision]
    keys_all = trajectory_keys(seeds)
    step_all = np.broadcast_to(np.asarray(step_size, dtype=dtype), (B,)).copy()
    meth = make_method(method, compressor=compressor, n_workers=n, dim=d, batch=B, **(params or {}),
                       **({} if downlink is None else {"downlink": downlink}))
    if minibatch is not None:
        if not getattr(problem, "has_samples", False):
            raise ValueError(f"minibatch: the model {getattr(problem, 'name', '?')!r} has no per-sample gradients")
        if isinstance(minibatch, (bool, np.bool_)) or int(minibatch) != minibatch or minibatch < 1:
            raise ValueError(f"minibatch must be an integer >= 1, got {minibatch!r}")
        if minibatch > int(np.min(problem.worker_sizes)):
            raise ValueError(f"minibatch {minibatch} is larger than the smallest worker's "
                             f"{int(np.min(problem.worker_sizes))} rows")
        meth.use_minibatch(int(minibatch))
    meth.bind(problem)
    sampled = minibatch is not None and not meth.own_rows  # the engine draws the rows
    x0 = np.zeros(d) if x0 is None else np.asarray(x0, dtype=np.float64)
    X = np.broadcast_to(x0.astype(dtype), (B, d)).copy()

    grads, loss0 = problem.local_grads(X, with_loss=True)
    gn = _norm_sq(grads)
    track_loss = loss_ref is not None
    f_hist = [loss0.mean(axis=1, dtype=np.float64)] if track_loss else None  # f(x^k) every round (loss-gap target)
    metric = f_hist[0] - loss_ref if track_loss else gn  # what the target and the stall rule see
    limit = divergence_factor * gn
    active = np.arange(B)
    keys, step = keys_all, step_all
    up = np.zeros(B)
    down = np.zeros(B)
    evals = np.zeros(B)
    passes = np.zeros(B)
    # Models without rows (a quadratic test problem) count one evaluation per local gradient.
    sizes = getattr(problem, "worker_sizes", None)
    sizes = np.ones(n) if sizes is None else np.asarray(sizes, dtype=np.float64)
    m_max = int(problem.shards.m_max) if sampled else 0
    gn_hist = [gn.copy()]
    up_hist = [up.copy()]
    down_hist = [down.copy()]
    pass_hist = [passes.copy()]
    uneven = network is not None and network.uneven
    secs = np.zeros(B)
    slow = np.zeros((B, n))  # seconds each worker was the slowest waited one (uneven network)
    secs_hist = [secs.copy()]
    loss_log = [(0, active.copy(), loss0.mean(axis=1, dtype=np.float64))]
    out: dict[int, tuple[str, int]] = {}
    final_x = np.empty((B, d))
    window = None if stall_window is None else np.broadcast_to(np.asarray(stall_window, dtype=np.float64), (B,))
    best = metric.copy()
    last_gain = np.zeros(B)
    stop = False
    halted = np.zeros(B, dtype=bool)  # trajectories a monitor stopped on their own

    for k in range(max_rounds + 1):
        status = np.full(active.shape, "", dtype=object)
        status[~(np.isfinite(gn) & (gn <= limit[active]))] = "diverged"
        status[metric <= target] = "reached"
        if max_bits_per_worker is not None:
            status[(status == "") & (up[active] >= max_bits_per_worker)] = "bits_cap"
        if window is not None:
            better = metric < STALL_IMPROVEMENT * best[active]
            best[active[better]] = metric[better]
            last_gain[active[better]] = k
            status[(status == "") & (k - last_gain[active] >= window[active])] = "stalled"
        if stop:
            status[status == ""] = "stopped"
        status[(status == "") & halted[active]] = "stopped"
        if k == max_rounds:
            status[status == ""] = "budget"
        done = status != ""
        if done.any():
            for j in np.flatnonzero(done):
                out[int(active[j])] = (str(status[j]), k)
            final_x[active[done]] = X[done]
            live = ~done
            active, X, grads, keys, step = active[live], X[live], grads[live], keys[live], step[live]
            meth.keep(np.flatnonzero(live))
        if active.size == 0:
            break
        with np.errstate(over="ignore", invalid="ignore"):
            if sampled:
                W = minibatch_weights(keys, k, sizes, np.full(active.size, float(minibatch)), m_max)
                g, bits = meth.direction(meth.stochastic_grads(X, W), keys, k, X)
            else:
                g, bits = meth.direction(grads, keys, k, X)
        up[active] += bits.mean(axis=1)
        used = meth.gradient_evals()
        evals[active] += sizes.mean() if used is None else used.mean(axis=1)
        passes[active] += 1.0 if used is None else (used / sizes).mean(axis=1)
        sent = meth.downlink_bits()  # None: the server broadcasts one dense vector
        down[active] += dense_bits(d) if sent is None else sent
        if uneven:
            per_pass = np.ones_like(bits) if used is None else used / sizes
            t, who = network.round_seconds(bits, per_pass, meth.waited(), dense_bits(d) if sent is None else sent)
            secs[active] += t
            slow[active, who] += t
        want_loss = loss_every > 0 and (k + 1) % loss_every == 0
        # Overflow and NaN are expected on diverging trajectories: they are
        # caught by the divergence test above, not raised.
        with np.errstate(over="ignore", invalid="ignore"):
            X = X - step[:, None] * g.astype(dtype, copy=False)  # a method may upcast its state
            grads, lossk = problem.local_grads(X, with_loss=want_loss or track_loss)
            gn = _norm_sq(grads)
            metric = lossk.mean(axis=1, dtype=np.float64) - loss_ref if track_loss else gn
        if track_loss:
            row = np.full(B, np.nan)
            row[active] = lossk.mean(axis=1, dtype=np.float64)
            f_hist.append(row)
        if want_loss:
            loss_log.append((k + 1, active.copy(), lossk.mean(axis=1, dtype=np.float64)))
        row = np.full(B, np.nan)
        row[active] = gn
        gn_hist.append(row)
        for hist, total in ((up_hist, up), (down_hist, down), (pass_hist, passes), (secs_hist, secs)):
            row = np.full(B, np.nan)
            row[active] = total[active]
            hist.append(row)
        if monitor is not None:
            if uneven:
                cost = secs[active]
            elif network is not None:  # even: the cost formula at this round, the broadcast as counted
                cost = network.seconds_at(k + 1, passes[active], up[active], down[active])
            else:
                cost = up[active]
            verdict = monitor(k + 1, active, cost, metric)
            if np.ndim(verdict) == 0:
                stop = stop or bool(verdict)
            else:
                halted[active[np.asarray(verdict, dtype=bool)]] = True

    with np.errstate(over="ignore", invalid="ignore"):
        loss_end = problem.local_losses(final_x).mean(axis=1)
    gn_hist = np.array(gn_hist)
    up_hist, down_hist, pass_hist = np.array(up_hist), np.array(down_hist), np.array(pass_hist)
    secs_hist = np.array(secs_hist)
    f_hist = None if f_hist is None else np.array(f_hist)
    result = []
    for b in range(B):
        status, rounds = out[b]
        if f_hist is not None:  # f at every round: x^rounds is the last iterate
            lr = list(zip(range(rounds + 1), f_hist[: rounds + 1, b]))
        else:
            lr = [(r, vals[np.flatnonzero(idx == b)[0]]) for r, idx, vals in loss_log if r < rounds and b in idx]
            lr.append((rounds, loss_end[b]))
        result.append(
            Trajectory(
                seed=int(seeds[b]),
                status=status,
                rounds=rounds,
                uplink_bits=float(up[b]),
                downlink_bits=float(down[b]),
                gradient_evals=float(evals[b]),
                gradient_passes=float(passes[b]),
                grad_norm_sq=gn_hist[: rounds + 1, b].copy(),
                uplink_curve=up_hist[: rounds + 1, b].copy(),
                loss_rounds=np.array([r for r, _ in lr], dtype=np.int64),
                loss=np.array([v for _, v in lr], dtype=np.float64),
                x=final_x[b].copy(),
                progress=None if f_hist is None else f_hist[: rounds + 1, b] - loss_ref,
                downlink_curve=down_hist[: rounds + 1, b].copy(),
                passes_curve=pass_hist[: rounds + 1, b].copy(),
                seconds_curve=secs_hist[: rounds + 1, b].copy() if uneven else None,
                worker_shares=(slow[b] / secs[b] if secs[b] > 0 else slow[b]) if uneven else None,
            )
        )
    return result


def _norm_sq(grads: np.ndarray) -> np.ndarray:
    """||mean_i g_i||^2 per trajectory, summed in float64 whatever the gradients' type: the mean
    of n float32 gradients near a stationary point cancels, and a float32 sum over n and d would
    add its own rounding (about sqrt(n d) eps_32 relative) to the one test that stops a run."""
    g = grads.mean(axis=1, dtype=np.float64)
    return np.einsum("bd,bd->b", g, g)
