"""The engine: run a batch of trajectories, count every bit, stop each one on its own.

B trajectories (different seeds, step sizes, sync probabilities, ...) of one
method and one compressor advance together: their iterates form a (B, d)
matrix and every round is one batched oracle call (DESIGN.md, "The engine").
A trajectory leaves the batch when it reaches the target, spends its budget
or diverges; the others go on without it.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ._random import trajectory_keys
from .methods import dense_bits, make_method

__all__ = ["Trajectory", "STATUS", "simulate", "absolute_target"]

#: Status of a finished trajectory, with the message shown to users.
STATUS = {
    "reached": "reached the target",
    "budget": "spent the round budget before the target",
    "bits_cap": "spent the bit budget before the target",
    "diverged": "diverged (non-finite values, or ||grad f||^2 far above its start)",
    "stalled": "stalled (no new best ||grad f||^2 for a window of rounds)",
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
    grad_norm_sq: np.ndarray  # ||grad f(x^k)||^2
    uplink_curve: np.ndarray  # uplink bits per worker spent to reach x^k
    loss_rounds: np.ndarray  # rounds at which f was recorded
    loss: np.ndarray  # f(x^k) at loss_rounds
    x: np.ndarray = field(repr=False)  # the last iterate

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
) -> list[Trajectory]:
    """Simulate ``len(seeds)`` trajectories of ``method`` at once.

    ``step_size`` and each entry of ``params`` (``sync_probability``,
    ``shift_rate``) are scalars or one value per trajectory. ``target`` is
    absolute (see :func:`absolute_target`). The loss f is recorded at x^0,
    every ``loss_every`` rounds (0: never in between) and at the last iterate.

    ``stall_window`` (scalar or per trajectory; None: off) ends a trajectory
    that has not improved its best ||grad f||^2 by 1% for that many rounds.
    ``monitor(k, index, uplink_bits, grad_norm_sq)`` is called after every
    round with the still-running trajectories (their indices into the batch,
    cumulative bits, current ||grad f||^2); if it returns True the batch
    stops and those trajectories end as ``stopped``.
    """
    seeds = np.atleast_1d(np.asarray(seeds, dtype=np.int64))
    B, d, n = seeds.shape[0], problem.dim, problem.n_workers
    keys_all = trajectory_keys(seeds)
    step_all = np.broadcast_to(np.asarray(step_size, dtype=np.float64), (B,)).copy()
    meth = make_method(method, compressor=compressor, n_workers=n, dim=d, batch=B, **(params or {}))
    x0 = np.zeros(d) if x0 is None else np.asarray(x0, dtype=np.float64)
    X = np.broadcast_to(x0, (B, d)).copy()

    grads, loss0 = problem.local_grads(X, with_loss=True)
    gn = _norm_sq(grads)
    limit = divergence_factor * gn
    active = np.arange(B)
    keys, step = keys_all, step_all
    up = np.zeros(B)
    down = np.zeros(B)
    gn_hist = [gn.copy()]
    up_hist = [up.copy()]
    loss_log = [(0, active.copy(), loss0.mean(axis=1))]
    out: dict[int, tuple[str, int]] = {}
    final_x = np.empty((B, d))
    window = None if stall_window is None else np.broadcast_to(np.asarray(stall_window, dtype=np.float64), (B,))
    best = gn.copy()
    last_gain = np.zeros(B)
    stop = False

    for k in range(max_rounds + 1):
        status = np.full(active.shape, "", dtype=object)
        status[~(np.isfinite(gn) & (gn <= limit[active]))] = "diverged"
        status[gn <= target] = "reached"
        if max_bits_per_worker is not None:
            status[(status == "") & (up[active] >= max_bits_per_worker)] = "bits_cap"
        if window is not None:
            better = gn < STALL_IMPROVEMENT * best[active]
            best[active[better]] = gn[better]
            last_gain[active[better]] = k
            status[(status == "") & (k - last_gain[active] >= window[active])] = "stalled"
        if stop:
            status[status == ""] = "stopped"
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
            g, bits = meth.direction(grads, keys, k)
        up[active] += bits.mean(axis=1)
        down[active] += dense_bits(d)  # the server broadcasts one dense vector
        want_loss = loss_every > 0 and (k + 1) % loss_every == 0
        # Overflow and NaN are expected on diverging trajectories: they are
        # caught by the divergence test above, not raised.
        with np.errstate(over="ignore", invalid="ignore"):
            X = X - step[:, None] * g
            grads, lossk = problem.local_grads(X, with_loss=want_loss)
            gn = _norm_sq(grads)
        if want_loss:
            loss_log.append((k + 1, active.copy(), lossk.mean(axis=1)))
        row = np.full(B, np.nan)
        row[active] = gn
        gn_hist.append(row)
        row = np.full(B, np.nan)
        row[active] = up[active]
        up_hist.append(row)
        if monitor is not None and monitor(k + 1, active, up[active], gn):
            stop = True

    with np.errstate(over="ignore", invalid="ignore"):
        loss_end = problem.local_losses(final_x).mean(axis=1)
    gn_hist = np.array(gn_hist)
    up_hist = np.array(up_hist)
    result = []
    for b in range(B):
        status, rounds = out[b]
        lr = [(r, vals[np.flatnonzero(idx == b)[0]]) for r, idx, vals in loss_log if r < rounds and b in idx]
        lr.append((rounds, loss_end[b]))
        result.append(
            Trajectory(
                seed=int(seeds[b]),
                status=status,
                rounds=rounds,
                uplink_bits=float(up[b]),
                downlink_bits=float(down[b]),
                grad_norm_sq=gn_hist[: rounds + 1, b].copy(),
                uplink_curve=up_hist[: rounds + 1, b].copy(),
                loss_rounds=np.array([r for r, _ in lr], dtype=np.int64),
                loss=np.array([v for _, v in lr], dtype=np.float64),
                x=final_x[b].copy(),
            )
        )
    return result


def _norm_sq(grads: np.ndarray) -> np.ndarray:
    g = grads.mean(axis=1)
    return np.einsum("bd,bd->b", g, g)
