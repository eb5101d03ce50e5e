"""What every model offers the engine and the probe: a batched local-gradient oracle."""

from __future__ import annotations

import copy
from abc import ABC, abstractmethod

import numpy as np

from ._shards import Block, Shards

__all__ = ["Problem", "check_iterates", "PRECISIONS"]

#: The engine's floating types by job/config name (``engine.precision``).
PRECISIONS = {"float64": np.float64, "float32": np.float32}


def check_iterates(X, *, n_workers: int, dim: int, dtype=np.float64) -> np.ndarray:
    """X as ``dtype`` (float64 by default) of shape (B, d) or (B, n, d), the two forms every oracle takes."""
    X = np.asarray(X, dtype=dtype)
    n, d = n_workers, dim
    if not (X.ndim == 2 or (X.ndim == 3 and X.shape[1] == n)) or X.shape[-1] != d:
        raise ValueError(f"X must have shape (B, {d}) or (B, {n}, {d}), got {X.shape}")
    return X


class Problem(ABC):
    """f(x) = (1/n) sum_i f_i(x), each f_i the model's loss on worker i's rows.

    The oracle is batched: :meth:`local_grads` takes B iterates, shape (B, d)
    (all workers at one point) or (B, n, d) (worker i at ``X[:, i]``), and
    returns every worker's gradient, shape (B, n, d), in one pass over the data.
    """

    #: Name used in job files.
    name: str = ""
    #: True when :meth:`weighted_grads` (per-sample gradients for minibatches) is available.
    has_samples: bool = True
    #: True when the problem can be pickled into a worker process (bittune.parallel).
    portable: bool = True
    #: True when :meth:`in_precision` can give a float32 twin (rows and shift cast; models that
    #: keep other data arrays of their own set False).
    float32_ok: bool = True
    #: Sign folded into the per-worker scale 1/m_i of the backward pass, so that
    #: ``_residual_weights`` can skip a negation pass.
    _weight_sign: float = 1.0

    def __init__(self, shards: Shards, *, regularization: float):
        self.shards = shards
        self.regularization = float(regularization)
        #: Optional constant (n, d) subtracted from every gradient (a data term
        #: that does not depend on x, precomputed once).
        self._grad_shift: np.ndarray | None = None
        self._twins: dict = {}

    @property
    def dtype(self) -> np.dtype:
        """Floating type of the oracle's arithmetic and results (that of the stored rows)."""
        return self.shards.dtype

    def in_precision(self, precision: str) -> "Problem":
        """This problem with its data in ``precision`` ("float64" or "float32"); built once, cached.

        The twin shares nothing mutable with this problem; the probe and the gradient check
        always use the float64 original (docs/design.md, "The engine").
        """
        dtype = np.dtype(PRECISIONS[precision])
        if dtype == self.dtype:
            return self
        if not self.float32_ok:
            raise ValueError(f"model {self.name!r}: precision {precision} is not available for this model")
        twin = self._twins.get(precision)
        if twin is None:
            twin = copy.copy(self)
            twin._twins = {}
            twin.shards = self.shards.astype(dtype)
            if self._grad_shift is not None:
                twin._grad_shift = self._grad_shift.astype(dtype)
            self._twins[precision] = twin
        return twin

    def __getstate__(self) -> dict:
        state = dict(self.__dict__)
        state["_twins"] = {}  # rebuilt on demand in the receiving process
        return state

    @property
    def n_workers(self) -> int:
        return self.shards.n

    @property
    def dim(self) -> int:
        return self.shards.dim

    @property
    def worker_sizes(self) -> np.ndarray:
        return self.shards.sizes

    # --------------------------------------------------------------- oracle
    def local_grads(
        self, X: np.ndarray, *, with_loss: bool = False
    ) -> tuple[np.ndarray, np.ndarray | None]:
        """Gradients (B, n, d) of every f_i, and their values (B, n) if asked."""
        X = self._check(X)
        B, n, d = X.shape[0], self.n_workers, self.dim
        grads = np.empty((B, n, d), dtype=X.dtype)
        loss = np.empty((B, n), dtype=X.dtype) if with_loss else None

        def work(blk: Block) -> None:
            z = blk.forward(X)
            if loss is not None:
                loss[:, blk.lo : blk.hi] = self._data_loss(z, blk)
            out = grads[:, blk.lo : blk.hi]
            blk.backward(self._residual_weights(z, blk), out)
            out *= (self._weight_sign / blk.sizes)[None, :, None]
            if self._grad_shift is not None:
                out -= self._grad_shift[blk.lo : blk.hi]

        self.shards.run(work)
        return self._add_regulariser(X, grads, loss)

    def weighted_grads(self, X: np.ndarray, weights: np.ndarray) -> np.ndarray:
        """sum_j w_bij grad f_ij(x_b) per worker, (B, n, d): the minibatch oracle.

        f_ij is row j's loss plus the regulariser, so f_i = (1/m_i) sum_j f_ij.
        ``weights`` (B, n, m_max) replaces the 1/m_i of :meth:`local_grads`
        (w = 1/m_i on every row gives it back); rows past m_i must get 0.
        """
        X = self._check(X)
        W = self._check_weights(X, weights)
        grads = np.empty((X.shape[0], self.n_workers, self.dim), dtype=X.dtype)

        def work(blk: Block) -> None:
            R = self._row_residuals(blk.forward(X), blk)
            R *= W[:, blk.lo : blk.hi]
            out = grads[:, blk.lo : blk.hi]
            blk.backward(R, out)
            if self._weight_sign != 1.0:
                out *= self._weight_sign

        self.shards.run(work)
        return self._add_weighted_regulariser(X, grads, W)

    def _check_weights(self, X: np.ndarray, weights) -> np.ndarray:
        W = np.asarray(weights, dtype=np.float64)
        want = (X.shape[0], self.n_workers, self.shards.m_max)
        if W.shape != want:
            raise ValueError(f"weights must have shape {want}, got {W.shape}")
        return W

    def _add_weighted_regulariser(self, X: np.ndarray, grads: np.ndarray, W: np.ndarray) -> np.ndarray:
        """Every f_ij carries the regulariser: add (sum_j w_ij) times its gradient."""
        Xw = X if X.ndim == 3 else X[:, None, :]
        grads += W.sum(axis=2)[:, :, None] * self._reg_grad(Xw)
        return grads

    def _row_residuals(self, z: np.ndarray, blk: Block) -> np.ndarray:
        """Per-row derivative of the loss in z including every target term (no shift applied later)."""
        return self._residual_weights(z, blk)

    def local_losses(self, X: np.ndarray) -> np.ndarray:
        """Values (B, n) of every f_i."""
        X = self._check(X)
        loss = np.empty((X.shape[0], self.n_workers), dtype=X.dtype)

        def work(blk: Block) -> None:
            loss[:, blk.lo : blk.hi] = self._data_loss(blk.forward(X), blk)

        self.shards.run(work)
        return loss + self._reg_value(X if X.ndim == 3 else X[:, None, :])

    def _check(self, X) -> np.ndarray:
        return check_iterates(X, n_workers=self.n_workers, dim=self.dim, dtype=self.dtype)

    def full_grad(self, x: np.ndarray) -> np.ndarray:
        """Gradient of f at one point, shape (d,)."""
        g, _ = self.local_grads(np.asarray(x, dtype=np.float64)[None, :])
        return g[0].mean(axis=0)

    def full_loss(self, x: np.ndarray) -> float:
        """f at one point."""
        return float(self.local_losses(np.asarray(x, dtype=np.float64)[None, :])[0].mean())

    # ---------------------------------------------------------- model parts
    @abstractmethod
    def _data_loss(self, z: np.ndarray, blk: Block) -> np.ndarray:
        """Mean data loss per worker of the block, (B, nb), from margins z (B, nb, m_max)."""

    @abstractmethod
    def _residual_weights(self, z: np.ndarray, blk: Block) -> np.ndarray:
        """Per-row derivative of the data loss in z, (B, nb, m_max); may overwrite z.

        Padded rows may get any finite weight: their data rows are zero.
        """

    def _reg_value(self, Xw: np.ndarray) -> np.ndarray:
        """Regulariser value broadcast to (B, n): ridge (lam/2)||x||^2 unless a model overrides it."""
        return 0.5 * self.regularization * (Xw * Xw).sum(axis=-1)

    def _reg_grad(self, Xw: np.ndarray) -> np.ndarray:
        """Regulariser gradient, broadcastable to (B, n, d): ridge lam x unless overridden."""
        return self.regularization * Xw

    def _add_regulariser(self, X: np.ndarray, grads: np.ndarray, loss: np.ndarray | None):
        """Add the regulariser's gradient (and value) to the data terms; returns (grads, loss)."""
        Xw = X if X.ndim == 3 else X[:, None, :]
        grads += self._reg_grad(Xw)
        if loss is not None:
            loss += self._reg_value(Xw)
        return grads, loss

    # ---------------------------------------------------------- constants
    @abstractmethod
    def smoothness_bounds(self) -> tuple[np.ndarray, float]:
        """Closed-form upper bounds: per-worker L_i (n,) and L of f (docs/theory.md §3.2)."""

    def loss_lower_bound(self) -> float:
        """A lower bound on f (every model here has non-negative loss)."""
        return 0.0

    def worker_loss_lower_bound(self) -> float:
        """Mean over workers of a lower bound on each f_i (Delta*'s bound, docs/theory.md §2.2):
        every f_i here is non-negative."""
        return 0.0
