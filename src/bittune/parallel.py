"""Independent simulation batches spread over worker processes (the selection stage's lever).

The engine's threads split one oracle call by workers; on a small problem that
split gains little, while separate processes, each single-threaded, run whole
batches side by side (``benchmarks/tuning.py`` prints the search and selection
phases of ``--jobs 1`` and ``--jobs 2``). :func:`simulate_many` cuts each
batch's trajectories into about ``jobs`` chunks and runs the chunks in joblib's
loky processes. Trajectories of a batch are independent (each draws its own
random numbers), so a chunk gives the same trajectories as the whole batch up
to floating-point rounding (BLAS blocks products of different batch sizes
differently).
"""

from __future__ import annotations

import numpy as np

from .simulate import Trajectory, simulate

__all__ = ["simulate_many"]


def _chunk(problem, kwargs: dict) -> list[Trajectory]:
    """One chunk in a worker process, with single-threaded numerics (the processes fill the cores)."""
    from threadpoolctl import threadpool_limits

    from .problems import _shards

    _shards.set_threads(1)
    with threadpool_limits(1):
        return simulate(problem, **kwargs)


def _split(kwargs: dict, parts: int) -> list[dict]:
    """Cut one batch (seeds, per-trajectory steps and params) into ``parts`` contiguous chunks."""
    B = len(kwargs["seeds"])
    edges = np.linspace(0, B, min(parts, B) + 1).astype(int)
    out = []
    for a, b in zip(edges[:-1], edges[1:]):
        part = dict(kwargs)
        part["seeds"] = np.asarray(kwargs["seeds"])[a:b]
        for key in ("step_size", "stall_window"):  # scalars, or one value per trajectory
            if np.ndim(kwargs.get(key)):
                part[key] = np.asarray(kwargs[key])[a:b]
        part["params"] = {k: (np.asarray(v)[a:b] if np.ndim(v) else v) for k, v in (kwargs.get("params") or {}).items()}
        out.append(part)
    return out


def simulate_many(problem, batches: list[dict], *, jobs: int = 1) -> list[list[Trajectory]]:
    """Run :func:`bittune.simulate.simulate` for every kwargs dict in ``batches`` (``problem`` aside).

    ``jobs`` > 1 spreads the trajectories over that many processes; problems that
    cannot be sent to another process (a user model holding unpicklable state)
    run here instead. Results come back in the order of ``batches``.
    """
    if jobs <= 1 or not getattr(problem, "has_samples", False):
        # has_samples is False for plugin models: user code may not survive pickling.
        return [simulate(problem, **kw) for kw in batches]
    from joblib import Parallel, delayed

    chunks = [_split(kw, jobs) for kw in batches]
    flat = [(i, part) for i, parts in enumerate(chunks) for part in parts]
    done = Parallel(n_jobs=jobs, backend="loky")(delayed(_chunk)(problem, part) for _, part in flat)
    out: list[list[Trajectory]] = [[] for _ in batches]
    for (i, _), runs in zip(flat, done):
        out[i].extend(runs)
    return out
