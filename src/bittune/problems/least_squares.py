"""Least squares with a ridge term: f_i(x) = (1/(2 m_i)) ||A_i x - y_i||^2 + (lam/2) ||x||^2."""

from __future__ import annotations

import numpy as np

from .base import Problem

__all__ = ["LeastSquares"]


class LeastSquares(Problem):
    name = "least_squares"

    def _data_loss(self, z, blk):
        r = z - blk.y  # padded rows: z = 0 and y = 0
        return 0.5 * np.einsum("bnm,bnm->bn", r, r) / blk.sizes

    def _residual_weights(self, z, blk):
        z -= blk.y
        return z

    def _reg_value(self, Xw: np.ndarray) -> np.ndarray:
        return 0.5 * self.regularization * (Xw * Xw).sum(axis=-1)

    def _reg_grad(self, Xw: np.ndarray) -> np.ndarray:
        return self.regularization * Xw

    def smoothness_bounds(self) -> tuple[np.ndarray, float]:
        # Hessian of f_i is A_i^T A_i/m_i + lam I: the bounds are exact (THEORY.md 3.2).
        per, pooled = self.shards.gram_top_eigs()
        return per + self.regularization, pooled + self.regularization
