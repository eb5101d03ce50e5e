"""An example user model for bittune: a linear classifier with a Huber-smoothed hinge loss.

It plays the part logistic regression plays among the built-in models (same
labels, same linear model, a smooth convex surrogate of the 0-1 loss), with a
loss of our own choosing. Use it from a job file; the run needs
``--allow-code`` because bittune imports this file::

    model: plugin
    plugin: huber_logistic.py:make_worker   # path relative to the job file

bittune calls ``make_worker(X, y)`` once per simulated worker with that
worker's rows ``X`` (dense array or scipy CSR matrix) and raw labels ``y``.
Label 1 is the positive class; any other label is negative (so {0, 1} and
{-1, 1} labels both work).

Loss, for the margin u = y_j a_j . w and a smoothing width delta > 0::

    phi(u) = 0                      if u >= 1
             (1 - u)^2 / (2 delta)  if 1 - delta < u < 1
             1 - u - delta / 2      if u <= 1 - delta

the hinge max(0, 1 - u) with its corner replaced by a parabola (the idea of
Huber's loss applied to the hinge). phi is convex, continuously
differentiable, and phi'' <= 1/delta, so f_i(w) = mean_j phi(u_j) has
L_i <= lambda_max(A_i^T A_i / m_i) / delta, which the model reports as
``smoothness``; phi >= 0 gives ``lower_bound`` 0.
"""

from __future__ import annotations

import numpy as np

__all__ = ["HuberHinge", "make_worker", "DELTA"]

#: Smoothing width of the hinge's corner (our choice for the example).
DELTA = 0.5


class HuberHinge:
    """f(w) = mean_j phi(y_j a_j . w) on one worker's rows."""

    def __init__(self, X, y, *, delta: float = DELTA):
        if not delta > 0:
            raise ValueError(f"delta must be > 0, got {delta!r}")
        self.delta = float(delta)
        self.X = X
        self.signs = np.where(np.asarray(y) == 1, 1.0, -1.0)
        self.m = X.shape[0]
        self.dim = X.shape[1]
        gram = X.T @ X
        gram = gram.toarray() if hasattr(gram, "toarray") else np.asarray(gram)
        self.smoothness = float(np.linalg.eigvalsh(gram / self.m)[-1]) / self.delta
        self.lower_bound = 0.0

    def _margins(self, w: np.ndarray) -> np.ndarray:
        return self.signs * (self.X @ w)

    def _phi(self, u: np.ndarray) -> np.ndarray:
        gap = 1.0 - u
        return np.where(u >= 1.0, 0.0,
                        np.where(gap < self.delta, gap * gap / (2.0 * self.delta), gap - self.delta / 2.0))

    def loss(self, w: np.ndarray) -> float:
        return float(self._phi(self._margins(w)).mean())

    def loss_and_grad(self, w: np.ndarray) -> tuple[float, np.ndarray]:
        u = self._margins(w)
        gap = 1.0 - u
        # phi'(u) = -clip((1 - u)/delta, 0, 1)
        slope = -np.clip(gap / self.delta, 0.0, 1.0)
        grad = self.X.T @ (slope * self.signs) / self.m
        return float(self._phi(u).mean()), np.asarray(grad, dtype=np.float64).ravel()


def make_worker(X, y) -> HuberHinge:
    """The factory bittune calls once per worker."""
    return HuberHinge(X, y)
