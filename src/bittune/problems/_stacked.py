"""Helpers for models whose pass multiplies the data by K weight vectors per iterate.

Softmax regression (K = classes) and the MLP's first layer (K = hidden units)
need ``A_i w_k`` for K vectors ``w_k`` per iterate. Stacking the K vectors of
B iterates as B*K rows turns this into one call of
:meth:`~bittune.problems._shards.Block.forward` / ``backward``, so these models
reuse the padded per-worker layout, its sparse path and its threads unchanged.

Their intermediates have K * n * m_max numbers per iterate (K times a linear
model's); :func:`batch_slices` cuts a large batch so that no intermediate
exceeds ``MAX_ELEMENTS`` numbers.
"""

from __future__ import annotations

import numpy as np

from .base import Problem

__all__ = ["MAX_ELEMENTS", "StackedProblem", "batch_slices", "stack_rows", "unstack_rows"]

#: Numbers per (B, K, n, m_max) intermediate in one pass: 2^23 float64 = 64 MiB
#: (our choice, no source: a pass keeps about three such arrays alive).
MAX_ELEMENTS = 2**23


def batch_slices(batch: int, *, width: int, n_workers: int, m_max: int) -> list[slice]:
    """Slices of ``range(batch)`` so that each chunk has at most MAX_ELEMENTS intermediates."""
    per_point = max(1, width * n_workers * m_max)
    step = max(1, MAX_ELEMENTS // per_point)
    return [slice(s, min(s + step, batch)) for s in range(0, batch, step)]


def stack_rows(W: np.ndarray) -> np.ndarray:
    """Weights (B, K, d) or (B, n, K, d) as Block.forward input (B*K, d) or (B*K, n, d)."""
    if W.ndim == 3:
        B, K, d = W.shape
        return W.reshape(B * K, d)
    B, n, K, d = W.shape
    return np.ascontiguousarray(W.transpose(0, 2, 1, 3)).reshape(B * K, n, d)


def unstack_rows(out: np.ndarray, batch: int) -> np.ndarray:
    """Block.backward output (B*K, nb, d) as (B, nb, K, d) (a view)."""
    BK, nb, d = out.shape
    return out.reshape(batch, BK // batch, nb, d).transpose(0, 2, 1, 3)


class StackedProblem(Problem):
    """The oracle of models whose pass stacks ``_stack_width`` weight columns per iterate
    (softmax: classes, MLP: hidden units): slices the batch to bound memory, runs the
    model's ``_pass`` on each slice, adds the regulariser."""

    _stack_width: int
    float32_ok = False  # the models keep arrays of their own (one-hot targets, layer shapes) in float64

    def local_grads(
        self, X: np.ndarray, *, with_loss: bool = False
    ) -> tuple[np.ndarray, np.ndarray | None]:
        """Gradients (B, n, D) of every f_i, and their values (B, n) if asked."""
        X = self._check(X)
        B = X.shape[0]
        grads = np.empty((B, self.n_workers, self.dim))
        loss = np.empty((B, self.n_workers)) if with_loss else None
        for s in self._slices(B):
            self._pass(X[s], grads[s], None if loss is None else loss[s])
        return self._add_regulariser(X, grads, loss)

    def weighted_grads(self, X: np.ndarray, weights: np.ndarray) -> np.ndarray:
        """sum_j w_bij grad f_ij(x_b) per worker, (B, n, D) (see :meth:`Problem.weighted_grads`)."""
        X = self._check(X)
        W = self._check_weights(X, weights)
        grads = np.empty((X.shape[0], self.n_workers, self.dim))
        for s in self._slices(X.shape[0]):
            self._pass(X[s], grads[s], None, weights=W[s])
        return self._add_weighted_regulariser(X, grads, W)

    def local_losses(self, X: np.ndarray) -> np.ndarray:
        """Values (B, n) of every f_i."""
        X = self._check(X)
        loss = np.empty((X.shape[0], self.n_workers))
        for s in self._slices(X.shape[0]):
            self._pass(X[s], None, loss[s])
        return loss + self._reg_value(X if X.ndim == 3 else X[:, None, :])

    def _slices(self, batch: int) -> list[slice]:
        return batch_slices(batch, width=self._stack_width, n_workers=self.n_workers, m_max=self.shards.m_max)
