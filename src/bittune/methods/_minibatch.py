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

__all__ = ["SameRows", "minibatch_weights", "paired_grads"]


def minibatch_weights(keys: np.ndarray, round_, sizes: np.ndarray, b: np.ndarray, m_max: int) -> np.ndarray:
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


def paired_grads(problem, X: np.ndarray, X_prev: np.ndarray, W: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Minibatch gradients at X and at X_prev on the same rows W, one oracle call on the stacked
    points: a MARINA-type difference then has no sampling noise of its own beyond the rows' spread
    (docs/theory.md §2.5, §2.12)."""
    B = X.shape[0]
    both = problem.weighted_grads(np.concatenate([X, X_prev]), np.concatenate([W, W]))
    return both[:B], both[B:]


class SameRows:
    """Stochastic MARINA and PP-MARINA (a mixin before :class:`~bittune.methods.base.Method`): each
    round's estimate at x^k is the minibatch mean on the round's rows, and the gradient difference
    grad f_i(x^k) - grad f_i(x^{k-1}) is taken on those same rows at both points (one stacked
    oracle call, :func:`paired_grads`; docs/theory.md §2.12). :meth:`prev_grads` gives the
    difference's second half; :meth:`count_evals` the per-sample gradients of the round (b on a
    sync round, 2b where a difference was computed)."""

    def stochastic_grads(self, X, W):
        if "x" not in self.state:  # round 0: g^0 is a minibatch estimate
            est, self._prev_rows = self.problem.weighted_grads(X, W), None
        else:
            est, self._prev_rows = paired_grads(self.problem, X, self.state["x"], W)
        self.state["x"] = np.array(X, copy=True)
        self._evals = np.full((X.shape[0], self.n), float(self.rows))
        return est

    def prev_grads(self, fallback: np.ndarray) -> np.ndarray:
        """The gradients at x^{k-1} to subtract: on this round's rows (minibatch), else ``fallback``
        (the full local gradients kept from the last round)."""
        return fallback if self.rows is None else self._prev_rows

    def count_evals(self, differences: np.ndarray) -> None:
        """Per-sample gradients of a round: 2b for the workers marked in ``differences`` (B, n) (both
        points on the same rows), b for the others (one estimate). No-op for full gradients."""
        if self.rows is not None:
            self._evals = np.where(differences, 2.0 * self.rows, float(self.rows))
