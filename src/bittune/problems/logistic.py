"""Logistic loss with the non-convex regulariser lam * sum_j x_j^2 / (1 + x_j^2).

f_i(x) = (1/m_i) sum_j log(1 + exp(-b_j a_j.x)) + lam sum_k x_k^2/(1 + x_k^2).
The labels are folded into the rows once (a~_j = b_j a_j), so a pass needs only
the signed margins u_j = a~_j.x: loss log(1 + e^{-u}), weight -1/(1 + e^{u})
(the sign is applied to the small (B, n, d) result, not to every row).
"""

from __future__ import annotations

import numpy as np

from .base import Problem

__all__ = ["LogisticNonconvex"]


class LogisticNonconvex(Problem):
    name = "logistic_nonconvex"
    _weight_sign = -1.0

    def _data_loss(self, z, blk):
        per_row = np.logaddexp(0.0, -z)
        per_row *= blk.mask  # padded rows have u = 0, loss log 2: drop them
        return per_row.sum(axis=2) / blk.sizes

    def _residual_weights(self, z, blk):
        # d/du log(1 + e^{-u}) = -1/(1 + e^{u}); e^{u} may overflow to inf, which
        # gives the correct limit 0.
        with np.errstate(over="ignore"):
            np.exp(z, out=z)
        z += 1.0
        np.reciprocal(z, out=z)
        return z

    def _reg_value(self, Xw: np.ndarray) -> np.ndarray:
        sq = Xw * Xw
        return self.regularization * (sq / (1.0 + sq)).sum(axis=-1)

    def _reg_grad(self, Xw: np.ndarray) -> np.ndarray:
        # d/dt t^2/(1+t^2) = 2t/(1+t^2)^2
        # In place: two temporaries instead of five, the same numbers bit for bit (at d = 20,000
        # the probe's 180 x n points make each temporary 460 MB; docs/design.md, "Scale").
        den = Xw * Xw
        den += 1.0
        den *= den
        out = (self.regularization * 2.0) * Xw
        out /= den
        return out

    def smoothness_bounds(self) -> tuple[np.ndarray, float]:
        # Logistic Hessian <= A^T A/(4m) (s(1-s) <= 1/4); the regulariser's
        # Hessian is diagonal with entries in [-lam/2, 2 lam] (docs/theory.md §3.2).
        per, pooled = self.shards.gram_top_eigs()
        return per / 4.0 + 2.0 * self.regularization, pooled / 4.0 + 2.0 * self.regularization
