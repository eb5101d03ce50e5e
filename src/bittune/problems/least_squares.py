"""Least squares with a ridge term: f_i(x) = (1/(2 m_i)) ||A_i x - y_i||^2 + (lam/2) ||x||^2."""

from __future__ import annotations

import numpy as np

from .base import Problem

__all__ = ["LeastSquares"]


class LeastSquares(Problem):
    """The data term's gradient A_i^T (A_i x - y_i)/m_i is computed as
    A_i^T (A_i x)/m_i - A_i^T y_i/m_i, the second part once: no per-row pass."""

    name = "least_squares"

    def __init__(self, shards, *, regularization: float):
        super().__init__(shards, regularization=regularization)
        shift = np.empty((1, shards.n, shards.dim))

        def work(blk):
            blk.backward(blk.y[None], shift[:, blk.lo : blk.hi])

        shards.run(work)
        self._grad_shift = shift[0] / shards.sizes[:, None]

    def _data_loss(self, z, blk):
        r = z - blk.y  # padded rows: z = 0 and y = 0
        return 0.5 * np.einsum("bnm,bnm->bn", r, r) / blk.sizes

    def _residual_weights(self, z, blk):
        return z

    def _row_residuals(self, z, blk):
        z -= blk.y  # the minibatch oracle has no precomputed shift
        return z

    def smoothness_bounds(self) -> tuple[np.ndarray, float]:
        # Hessian of f_i is A_i^T A_i/m_i + lam I: the bounds are exact (docs/theory.md §3.2).
        per, pooled = self.shards.gram_top_eigs()
        return per + self.regularization, pooled + self.regularization
