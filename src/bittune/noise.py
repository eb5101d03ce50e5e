"""Gradient noise of minibatch estimates: the sigma^2 the stochastic theory rules read.

Worker i's b-row estimate (1/b) sum_{s=1..b} grad f_{i j_s}(x), rows j_s drawn i.i.d. uniformly
with replacement from its m_i rows, is unbiased for grad f_i(x) with variance

    sigma_i^2(x) = (1/b) (1/m_i) sum_j ||grad f_ij(x) - grad f_i(x)||^2

(the with-replacement sample mean: the b draws are i.i.d., each with that spread; e.g. Cochran,
*Sampling Techniques*, 1977, sec. 2.6, from memory; docs/theory.md §2.12). :func:`row_spread`
computes the spread (the b = 1 variance) per worker at given points from per-row gradients (the
minibatch oracle ``weighted_grads`` with one-hot row weights, many rows per call);
:func:`noise_constants` turns it into the constants the probe stores.
"""

from __future__ import annotations

import numpy as np

__all__ = ["EXACT_ROWS", "RUN_ROWS", "noise_constants", "row_spread"]

#: Rows per worker whose gradients are evaluated at x0: every row when a worker has at most this many
#: (exact), else this many drawn with replacement (an unbiased estimate, relative standard error
#: about sqrt(kurtosis / 256), a few per cent to ~20%; our choice, no source).
EXACT_ROWS = 256
#: The same at the probe's other points (along its runs): fewer, they only raise the maximum.
RUN_ROWS = 64
_MAX_ELEMENTS = 2**22  # weights per oracle call (memory: 32 MB of float64)


def row_spread(problem, pts: np.ndarray, *, rows: int = EXACT_ROWS, seed: int = 0) -> np.ndarray:
    """(1/m_i) sum_j ||grad f_ij(x) - grad f_i(x)||^2 per point and worker, shape (P, n).

    Exact when every worker has at most ``rows`` rows; else the mean over ``rows`` rows per worker
    drawn uniformly with replacement (``numpy.random.default_rng(seed)``), an unbiased estimate.
    """
    pts = np.atleast_2d(np.asarray(pts, dtype=np.float64))
    sizes = np.asarray(problem.worker_sizes, dtype=np.int64)
    n, m_max, P = sizes.shape[0], int(problem.shards.m_max), pts.shape[0]
    if m_max <= rows:
        idx = np.broadcast_to(np.arange(m_max)[:, None], (m_max, n))
        valid = idx < sizes[None, :]
    else:
        u = np.random.default_rng(seed).random((rows, n))
        idx = np.minimum((u * sizes[None, :]).astype(np.int64), sizes[None, :] - 1)
        valid = np.ones(idx.shape, dtype=bool)
    full, _ = problem.local_grads(pts)  # (P, n, d)
    S = idx.shape[0]
    chunk = max(1, _MAX_ELEMENTS // (P * n * m_max))
    acc = np.zeros((P, n))
    workers = np.arange(n)
    for lo in range(0, S, chunk):  # chunks of rows (memory), not a loop over workers or points
        hi = min(S, lo + chunk)
        c = hi - lo
        W = np.zeros((P, c, n, m_max))
        W[:, np.arange(c)[:, None], workers[None, :], idx[lo:hi]] = valid[lo:hi]
        X = np.repeat(pts, c, axis=0)
        G = problem.weighted_grads(X, W.reshape(P * c, n, m_max)).reshape(P, c, n, -1)
        diff = G - full[:, None]
        acc += (np.einsum("pcnd,pcnd->pcn", diff, diff) * valid[lo:hi][None]).sum(axis=1)
    return acc / valid.sum(axis=0)[None, :]


def noise_constants(problem, x0: np.ndarray, points: np.ndarray, b: int, *, seed: int = 0) -> dict:
    """The Constants fields of a minibatch b: sigma_i^2 at x0 per worker (``noise_workers0``), their mean
    at x0 (``noise_variance0``) and the largest such mean over x0 and ``points`` (``noise_variance``)."""
    at0 = row_spread(problem, x0[None, :], rows=EXACT_ROWS, seed=seed)[0] / b
    worst = float(at0.mean())
    if len(points):
        along = row_spread(problem, points, rows=RUN_ROWS, seed=seed + 1) / b
        worst = max(worst, float(along.mean(axis=1).max()))
    return {"minibatch": int(b), "noise_variance": worst, "noise_variance0": float(at0.mean()),
            "noise_workers0": at0}
