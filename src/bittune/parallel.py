"""One simulation batch run in another process while this one works on the next.

The selection stage runs three kinds of batches: the finalists, the winner's
back-off steps (which need the finalists' results) and the theory baseline
(which needs only the method). The baseline is often the longest (a timid step
runs to the round budget) and, at a handful of seeds, its rounds cost Python
overhead more than arithmetic: cutting it into smaller batches does not make it
faster, running it beside the other two does. :func:`start_batch` sends one
batch to a worker of joblib's reusable loky pool (the processes of the search,
single-threaded) and returns a function that waits for its result;
``benchmarks/tuning.py`` prints the selection phase of ``--jobs 1`` and
``--jobs 2`` (measured: 38.9 s and 25.2 s in one run).
"""

from __future__ import annotations

from typing import Callable

from .simulate import Trajectory, simulate

__all__ = ["start_batch"]


def _run(problem, kwargs: dict) -> list[Trajectory]:
    """One batch in a worker process, with single-threaded numerics (the processes fill the cores)."""
    from threadpoolctl import threadpool_limits

    from .problems import _shards

    _shards.set_threads(1)
    with threadpool_limits(1):
        return simulate(problem, **kwargs)


def start_batch(problem, kwargs: dict, *, jobs: int) -> Callable[[], list[Trajectory]]:
    """Start ``simulate(problem, **kwargs)`` in another process when ``jobs`` > 1 (else run it here);
    returns a function that waits for the trajectories and returns them.

    joblib's ``Parallel(return_as="generator")`` dispatches at once and yields
    when the result is ready, on the same reusable loky pool as the search.
    Problems that cannot travel to another process (user models: their code is
    imported from a file the worker may not find) always run here.
    """
    if jobs > 1 and getattr(problem, "portable", False):
        from joblib import Parallel, delayed

        results = Parallel(n_jobs=jobs, backend="loky", return_as="generator")([delayed(_run)(problem, kwargs)])
        # Run the generator to its end: one left open warns, when collected, that tasks were cancelled.
        return lambda: list(results)[0]
    runs = simulate(problem, **kwargs)
    return lambda: runs
