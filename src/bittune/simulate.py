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
from .methods.base import stack_rows
from .methods._minibatch import minibatch_weights
from .problems.base import PRECISIONS

__all__ = ["Trajectory", "STATUS", "Join", "simulate", "absolute_target", "PRECISIONS"]

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


@dataclass
class Join:
    """Trajectories that join a running batch: what :func:`simulate`'s ``refill`` returns. Each field
    is per trajectory (or one value for all of them), as simulate's arguments of the same name;
    ``compressor`` is one compressor or a :class:`~bittune.compressors.PerTrajectory` over them."""

    seeds: object
    step_size: object
    compressor: object
    params: dict | None = None
    stall_window: object = None


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
    refill=None,
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

    ``refill(ended)`` (None: off) keeps a batch full (docs/design.md, "The engine"): it is called
    in every round where trajectories ended, with ``ended`` the list of (index, Trajectory) of
    those (index: its row in join order, the first ``len(seeds)`` being the starting ones), and
    returns a :class:`Join` of new trajectories or None. Their x^0 joins the round's one oracle
    call; each trajectory then runs on its own round counter (its random numbers, round budget,
    stall window, ``monitor``'s k: an array of the rows' own rounds) and gets the values it gets
    alone from round 0, up to float rounding in the batched products. The result lists every
    trajectory in join order. A ``monitor`` that stops the whole batch stops joiners too.
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

    def build(comp, rows: int, prm):
        m = make_method(method, compressor=comp, n_workers=n, dim=d, batch=rows, **(prm or {}),
                        **({} if downlink is None else {"downlink": downlink}))
        if minibatch is not None:
            m.use_minibatch(int(minibatch))
        m.bind(problem)
        return m

    if minibatch is not None:
        if not getattr(problem, "has_samples", False):
            raise ValueError(f"minibatch: the model {getattr(problem, 'name', '?')!r} has no per-sample gradients")
        if isinstance(minibatch, (bool, np.bool_)) or int(minibatch) != minibatch or minibatch < 1:
            raise ValueError(f"minibatch must be an integer >= 1, got {minibatch!r}")
        if minibatch > int(np.min(problem.worker_sizes)):
            raise ValueError(f"minibatch {minibatch} is larger than the smallest worker's "
                             f"{int(np.min(problem.worker_sizes))} rows")
    meth = build(compressor, B, params)
    fresh, n_fresh = None, 0  # the method instance of rows that joined this round (their round 0 is next)
    sampled = minibatch is not None and not meth.own_rows  # the engine draws the rows
    x0 = np.zeros(d) if x0 is None else np.asarray(x0, dtype=np.float64)
    track_loss = loss_ref is not None
    # Models without rows (a quadratic test problem) count one evaluation per local gradient.
    sizes = getattr(problem, "worker_sizes", None)
    sizes = np.ones(n) if sizes is None else np.asarray(sizes, dtype=np.float64)
    m_max = int(problem.shards.m_max) if sampled else 0
    uneven = network is not None and network.uneven
    stalls = stall_window is not None

    curves = _Curves(("gn", "up", "down", "passes", "secs", "f"), min(max_rounds + 1, 1024))
    rows: dict[str, np.ndarray] = {}  # the running rows' arrays, row-aligned (_Rows keys below)
    ended: list[tuple] = []  # (id, record) of rows that ended, kept to the end (no refill)
    result: dict[int, Trajectory] = {}
    seed_of: list[int] = []

    def new_rows(new_seeds, steps, windows, X, grads, loss) -> dict:
        """The row arrays of trajectories at their round 0 (x^0 and its local gradients given)."""
        b = len(new_seeds)
        gn = _norm_sq(grads)
        f0 = loss.mean(axis=1, dtype=np.float64)
        metric = f0 - loss_ref if track_loss else gn
        ids = np.arange(len(seed_of), len(seed_of) + b)
        seed_of.extend(int(v) for v in new_seeds)
        zero = np.zeros(b)
        out = {"id": ids, "lk": np.zeros(b, dtype=np.int64), "keys": trajectory_keys(new_seeds),
               "step": np.broadcast_to(np.asarray(steps, dtype=dtype), (b,)).copy(), "X": X, "grads": grads,
               "gn": gn, "metric": metric, "limit": divergence_factor * gn, "best": metric.copy(),
               "last_gain": zero.copy(), "halted": np.zeros(b, dtype=bool), "up": zero.copy(),
               "down": zero.copy(), "evals": zero.copy(), "passes": zero.copy(), "secs": zero.copy(),
               "slow": np.zeros((b, n)),  # seconds each worker was the slowest waited one (uneven network)
               "window": np.broadcast_to(np.asarray(np.inf if windows is None else windows, dtype=np.float64),
                                         (b,)).copy(),
               "slot": curves.slots_for(b)}
        curves.record(out["slot"], 0, {"gn": gn, "up": zero, "down": zero, "passes": zero, "secs": zero, "f": f0})
        return out

    X0 = np.broadcast_to(x0.astype(dtype), (B, d)).copy()
    grads0, loss0 = problem.local_grads(X0, with_loss=True)
    rows = new_rows(seeds, step_size, stall_window, X0, grads0, loss0)
    stop = False
    k = 0  # the engine's round; rows that joined later are at earlier local rounds rows["lk"]

    while True:
        lk = rows["lk"]
        gn, metric = rows["gn"], rows["metric"]
        status = np.full(lk.shape, "", dtype=object)
        status[~(np.isfinite(gn) & (gn <= rows["limit"]))] = "diverged"
        status[metric <= target] = "reached"
        if max_bits_per_worker is not None:
            status[(status == "") & (rows["up"] >= max_bits_per_worker)] = "bits_cap"
        if stalls:
            better = metric < STALL_IMPROVEMENT * rows["best"]
            rows["best"][better] = metric[better]
            rows["last_gain"][better] = lk[better]
            status[(status == "") & (lk - rows["last_gain"] >= rows["window"])] = "stalled"
        if stop:
            status[status == ""] = "stopped"
        status[(status == "") & rows["halted"]] = "stopped"
        status[(status == "") & (lk >= max_rounds)] = "budget"
        done = status != ""
        join = None
        if done.any():
            records = [(int(rows["id"][j]), _record(rows, j, str(status[j]), curves)) for j in np.flatnonzero(done)]
            live = ~done
            rows = {key: v[live] for key, v in rows.items()}
            main = lk.size - n_fresh
            meth.keep(np.flatnonzero(live[:main]))
            if fresh is not None:
                fresh.keep(np.flatnonzero(live[main:]))
                n_fresh = int(live[main:].sum())
            if refill is None:
                ended.extend(records)
            else:  # finished now: handed over at once, and the caller may fill the freed rows
                with np.errstate(over="ignore", invalid="ignore"):
                    loss_end = problem.local_losses(np.stack([r["x"] for _, r in records])).mean(axis=1)
                done_now = []
                for (i, rec), f_end in zip(records, loss_end):
                    result[i] = _trajectory(seed_of[i], rec, f_end, loss_every=loss_every, loss_ref=loss_ref,
                                            uneven=uneven)
                    done_now.append((i, result[i]))
                join = refill(done_now)
        if rows["lk"].size == 0 and join is None:
            break
        lk, X, keys = rows["lk"], rows["X"], rows["keys"]
        rnd = k if refill is None else lk  # one round for all rows, or each row's own
        with np.errstate(over="ignore", invalid="ignore"):
            W = None
            if sampled and lk.size:
                W = minibatch_weights(keys, rnd, sizes, np.full(lk.size, float(minibatch)), m_max)
            parts = [(meth, slice(0, lk.size - n_fresh))] + ([(fresh, slice(lk.size - n_fresh, lk.size))]
                                                             if n_fresh else [])
            outs = [(np.empty((0, d), dtype=dtype), np.empty((0, n)), None, None, None, 0)]  # no running rows
            for m, sl in parts:
                if sl.stop == sl.start:
                    continue
                grads = m.stochastic_grads(X[sl], W[sl]) if sampled else rows["grads"][sl]
                g, bits = m.direction(grads, keys[sl], rnd if np.ndim(rnd) == 0 else rnd[sl], X[sl])
                outs.append((g, bits, m.gradient_evals(), m.downlink_bits(), m.waited(), sl.stop - sl.start))
            g, bits, used, sent, waited = _stack_outputs(outs[1:] or outs, sizes, dense_bits(d))
        if fresh is not None:
            meth.append(fresh)
            fresh, n_fresh = None, 0
        rows["up"] += bits.mean(axis=1)
        rows["evals"] += sizes.mean() if used is None else used.mean(axis=1)
        rows["passes"] += 1.0 if used is None else (used / sizes).mean(axis=1)
        rows["down"] += dense_bits(d) if sent is None else sent
        if uneven and lk.size:
            per_pass = np.ones_like(bits) if used is None else used / sizes
            t, who = network.round_seconds(bits, per_pass, waited, dense_bits(d) if sent is None else sent)
            rows["secs"] += t
            rows["slow"][np.arange(lk.size), who] += t
        lk = rows["lk"] = lk + 1
        want_loss = loss_every > 0 and bool(np.any(lk % loss_every == 0))
        if join is not None:  # the newcomers' x^0 shares the round's one pass over the data
            if not stalls and join.stall_window is not None:
                raise ValueError("refill: stall windows need a batch started with one (stall_window)")
            b_new = len(join.seeds)
            fresh, n_fresh = build(join.compressor, b_new, join.params), b_new
        # Overflow and NaN are expected on diverging trajectories: they are
        # caught by the divergence test above, not raised.
        with np.errstate(over="ignore", invalid="ignore"):
            Xn = X - rows["step"][:, None] * g.astype(dtype, copy=False)  # a method may upcast its state
            if join is not None:
                Xn = np.concatenate([Xn, np.broadcast_to(x0.astype(dtype), (b_new, d))])
            grads, lossk = problem.local_grads(Xn, with_loss=want_loss or track_loss or join is not None)
            b_old = lk.size
            gn = _norm_sq(grads[:b_old])
            f_k = None if lossk is None else lossk[:b_old].mean(axis=1, dtype=np.float64)
            metric = f_k - loss_ref if track_loss else gn
        rows.update(X=Xn[:b_old], grads=grads[:b_old], gn=gn, metric=metric)
        curves.record(rows["slot"], lk, {"gn": gn, "up": rows["up"], "down": rows["down"], "passes": rows["passes"],
                                         "secs": rows["secs"], **({} if f_k is None else {"f": f_k})})
        if monitor is not None and b_old:
            if uneven:
                cost = rows["secs"]
            elif network is not None:  # even: the cost formula at this round, the broadcast as counted
                cost = network.seconds_at(k + 1 if refill is None else lk, rows["passes"], rows["up"], rows["down"])
            else:
                cost = rows["up"]
            verdict = monitor(k + 1 if refill is None else lk, rows["id"], cost, metric)
            if np.ndim(verdict) == 0:
                stop = stop or bool(verdict)
            else:
                rows["halted"][np.asarray(verdict, dtype=bool)] = True
        if join is not None:
            new = new_rows(np.atleast_1d(np.asarray(join.seeds, dtype=np.int64)), join.step_size,
                           join.stall_window, Xn[b_old:], grads[b_old:], lossk[b_old:])
            rows = {key: np.concatenate([v, new[key]]) for key, v in rows.items()}
        k += 1

    if refill is not None:
        return [result[i] for i in range(len(seed_of))]
    ended.sort(key=lambda item: item[0])
    with np.errstate(over="ignore", invalid="ignore"):
        loss_end = problem.local_losses(np.stack([r["x"] for _, r in ended])).mean(axis=1)
    return [_trajectory(seed_of[i], rec, f_end, loss_every=loss_every, loss_ref=loss_ref, uneven=uneven)
            for (i, rec), f_end in zip(ended, loss_end)]


class _Curves:
    """Per-row curves of a batch: one column per row slot (a slot is reused once its row ended), one
    line per local round, grown by doubling; a row's curve is read once, when it ends."""

    def __init__(self, names, cap: int) -> None:
        self.buf = {key: np.full((cap, 0), np.nan) for key in names}
        self.free: list[int] = []

    def slots_for(self, count: int) -> np.ndarray:
        take, self.free = self.free[:count], self.free[count:]
        have = next(iter(self.buf.values())).shape[1]
        extra = count - len(take)
        if extra:
            self.buf = {key: np.concatenate([b, np.full((b.shape[0], extra), np.nan)], axis=1)
                        for key, b in self.buf.items()}
            take += list(range(have, have + extra))
        return np.asarray(take, dtype=np.int64)

    def record(self, slot: np.ndarray, rnd, values: dict) -> None:
        top = int(np.max(rnd)) if np.size(rnd) else 0
        cap = next(iter(self.buf.values())).shape[0]
        if top >= cap:
            grow = max(cap, top + 1 - cap)
            self.buf = {key: np.concatenate([b, np.full((grow, b.shape[1]), np.nan)]) for key, b in self.buf.items()}
        for key, v in values.items():
            self.buf[key][rnd, slot] = v

    def take(self, slot: int, rounds: int) -> dict:
        self.free.append(slot)
        return {key: b[: rounds + 1, slot].copy() for key, b in self.buf.items()}


def _record(rows: dict, j: int, status: str, curves: _Curves) -> dict:
    """What a trajectory needs once its row j ended (its curves read from their slot, which is freed)."""
    rounds = int(rows["lk"][j])
    rec = {key: float(rows[key][j]) for key in ("up", "down", "evals", "passes", "secs")}
    rec.update(status=status, rounds=rounds, x=np.asarray(rows["X"][j], dtype=np.float64).copy(),
               slow=rows["slow"][j].copy(), curves=curves.take(int(rows["slot"][j]), rounds))
    return rec


def _trajectory(seed: int, rec: dict, loss_end: float, *, loss_every: int, loss_ref, uneven: bool) -> Trajectory:
    c, rounds = rec["curves"], rec["rounds"]
    if loss_ref is not None:  # f at every round: x^rounds is the last iterate
        loss_rounds = np.arange(rounds + 1, dtype=np.int64)
        loss = c["f"]
    else:  # f at x^0, every loss_every rounds, and at the last iterate
        loss_rounds = np.arange(0, rounds, loss_every if loss_every > 0 else max(rounds, 1), dtype=np.int64)
        loss = np.append(c["f"][loss_rounds], loss_end)
        loss_rounds = np.append(loss_rounds, rounds)
    secs = rec["secs"]
    return Trajectory(
        seed=seed, status=rec["status"], rounds=rounds, uplink_bits=rec["up"], downlink_bits=rec["down"],
        gradient_evals=rec["evals"], gradient_passes=rec["passes"], grad_norm_sq=c["gn"], uplink_curve=c["up"],
        loss_rounds=loss_rounds, loss=np.asarray(loss, dtype=np.float64), x=rec["x"],
        progress=None if loss_ref is None else c["f"] - loss_ref, downlink_curve=c["down"], passes_curve=c["passes"],
        seconds_curve=c["secs"] if uneven else None,
        worker_shares=(rec["slow"] / secs if secs > 0 else rec["slow"]) if uneven else None)


def _stack_outputs(outs, sizes: np.ndarray, dense: float):
    """One round's direction, bits, gradient evaluations, broadcast bits and waited workers of the
    batch from those of its method instances (the running rows, then the rows at their round 0)."""
    if len(outs) == 1:
        return outs[0][:5]
    (g1, b1, u1, s1, w1, r1), (g2, b2, u2, s2, w2, r2) = outs
    return (np.concatenate([g1, g2]), np.concatenate([b1, b2]), stack_rows(u1, u2, r1, r2, sizes),
            stack_rows(s1, s2, r1, r2, dense), stack_rows(w1, w2, r1, r2, np.ones(sizes.shape, dtype=bool)))


def _norm_sq(grads: np.ndarray) -> np.ndarray:
    """||mean_i g_i||^2 per trajectory, summed in float64 whatever the gradients' type: the mean
    of n float32 gradients near a stationary point cancels, and a float32 sum over n and d would
    add its own rounding (about sqrt(n d) eps_32 relative) to the one test that stops a run."""
    g = grads.mean(axis=1, dtype=np.float64)
    return np.einsum("bd,bd->b", g, g)
