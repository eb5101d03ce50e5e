"""Minibatch row draws: the weights of a with-replacement sample of each worker's rows.

Worker i of trajectory t draws b_t of its m_i rows i.i.d. uniformly with replacement
in round k; the weights W[t, i, j] = (count of row j in the draw) / b_t make the
problem's ``weighted_grads(X, W)`` the minibatch mean gradient
(1/b) sum_{j in I_ik} grad f_ij(x), an unbiased estimate of grad f_i(x) with
covariance (1/b) Cov_j(grad f_ij) (docs/theory.md §2.5).

Draws come from (trajectory key, round, STREAM["minibatch"], slot, worker): a
trajectory draws the same rows alone or in any batch, with any mix of b in it.
"""

from __future__ import annotations

import numpy as np

from .._random import STREAM, uniform

__all__ = ["minibatch_weights"]


def minibatch_weights(keys: np.ndarray, round_: int, sizes: np.ndarray, b: np.ndarray, m_max: int) -> np.ndarray:
    """Weights (B, n, m_max) of one round's draw: b (B,) rows per worker, sizes (n,) = m_i."""
    B, n = keys.shape[0], sizes.shape[0]
    slots = int(b.max())
    # Row j of worker i for slot s: floor(m_i u) is uniform on 0..m_i-1 up to 2^-53;
    # the min guards the rounding of m_i u.
    # Shape (slots, n): element s*n + i does not depend on how many slots the batch needs.
    u = uniform(keys, round_, STREAM["minibatch"], (slots, n)).transpose(0, 2, 1)
    last = (sizes - 1).astype(np.int64)[None, :, None]
    rows = np.minimum((u * sizes[None, :, None]).astype(np.int64), last)
    live = np.arange(slots)[None, None, :] < b[:, None, None]
    W = np.zeros((B, n, m_max))
    bi = np.broadcast_to(np.arange(B)[:, None, None], rows.shape)
    wi = np.broadcast_to(np.arange(n)[None, :, None], rows.shape)
    np.add.at(W, (bi, wi, rows), np.where(live, 1.0 / b[:, None, None], 0.0))
    return W
