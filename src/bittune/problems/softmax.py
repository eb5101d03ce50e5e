"""Multinomial logistic (softmax) regression with a ridge term.

f_i(W) = (1/m_i) sum_j [logsumexp(a_j W) - (a_j W)_{y_j}] + (lam/2) ||W||_F^2,

with W of shape (d, C), one column w_c per class. **Parameter order**: the
vector x of length C*d holds the columns one after another,
x = [w_0; w_1; ...; w_{C-1}], i.e. ``x[c*d + k] = W[k, c]``
(``W.ravel(order="F")``; :meth:`Softmax.weights` and :meth:`Softmax.flatten`
convert). This order makes the C columns of B iterates a plain (B*C, d)
reshape, so one pass of the shared padded layout computes every margin
``z[b, c, i, j] = a_ij . w_c`` (dense or sparse rows alike, see ``_stacked``).

Classes are the distinct labels, sorted, mapped to 0..C-1 (``Softmax.classes``
holds the original values).

Smoothness. For one row a with probabilities p = softmax(a W), the Hessian of
the row's loss is (Diag(p) - p p^T) kron (a a^T) in this parameter order. For
any v, v^T (Diag(p) - p p^T) v = Var_p(v) <= (max v - min v)^2 / 4
(Popoviciu's inequality on variances) <= ||v||^2 / 2, so
0 <= Diag(p) - p p^T <= I/2 and Hess f_i <= (1/2) I kron A_i^T A_i / m_i + lam I:

    L_i <= lambda_max(A_i^T A_i / m_i) / 2 + lam,
    L   <= lambda_max(mean_i A_i^T A_i / m_i) / 2 + lam.

(The same constant as Boehning's bound (1/2)(I - 11^T/C) on the multinomial
Hessian, Ann. Inst. Statist. Math. 1992; from memory.) The factor 1/2 is the
supremum over p (p = (1/2, 1/2, 0, ...)); at W = 0 (p uniform)
Diag(p) - p p^T = (1/C)(I - 11^T/C), so the Hessian there has top eigenvalue
lambda_max(A_i^T A_i / m_i)/C + lam: the bound is attained for C = 2.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError
from ._shards import Block, Shards
from ._stacked import StackedProblem, stack_rows, unstack_rows

__all__ = ["Softmax", "class_labels"]


def class_labels(y: np.ndarray, *, source: str) -> tuple[np.ndarray, np.ndarray]:
    """Class codes 0..C-1 (float64, like every target array) and the sorted distinct labels.

    Labels must be integer-valued (scikit-learn's ``type_of_target`` likewise
    reads non-integer floats as a continuous target, not classes) and take at
    least two values.
    """
    y = np.asarray(y, dtype=np.float64)
    odd = y[y != np.round(y)]
    if odd.size:
        raise InputError(f"{source}: softmax needs integer class labels; found {odd.size} non-integer "
                         f"labels such as {odd[0]:g} (a regression target? use least_squares or mlp)")
    classes, codes = np.unique(y, return_inverse=True)
    if classes.size < 2:
        shown = ", ".join(f"{v:g}" for v in classes)
        raise InputError(f"{source}: softmax needs at least 2 distinct class labels, found {classes.size} ({shown})")
    return codes.reshape(y.shape).astype(np.float64), classes


class Softmax(StackedProblem):
    """Softmax regression on sharded rows whose targets are class codes 0..C-1."""

    name = "softmax"

    def __init__(self, shards: Shards, *, regularization: float, classes: np.ndarray):
        super().__init__(shards, regularization=regularization)
        self.classes = np.asarray(classes, dtype=np.float64).ravel()
        C = self.classes.size
        if C < 2:
            raise ValueError(f"classes must hold at least 2 labels, got {C}")
        #: Per block (keyed by its first worker): one-hot targets (C, nb, m_max), zero on padded rows.
        self._onehot: dict[int, np.ndarray] = {}
        for blk in shards.blocks:
            codes = blk.y[blk.mask]
            if np.any((codes != np.round(codes)) | (codes < 0) | (codes >= C)):
                raise ValueError(f"targets must be class codes 0..{C - 1}")
            onehot = (blk.y[None] == np.arange(C, dtype=np.float64)[:, None, None]) & blk.mask[None]
            self._onehot[blk.lo] = onehot.astype(np.float64)

    @property
    def n_classes(self) -> int:
        return int(self.classes.size)

    @property
    def n_features(self) -> int:
        return self.shards.dim

    @property
    def dim(self) -> int:
        return self.n_features * self.n_classes

    def weights(self, x: np.ndarray) -> np.ndarray:
        """Parameter vectors (..., C*d) as weight matrices (..., d, C) (a view)."""
        x = np.asarray(x, dtype=np.float64)
        return x.reshape(*x.shape[:-1], self.n_classes, self.n_features).swapaxes(-1, -2)

    @staticmethod
    def flatten(W: np.ndarray) -> np.ndarray:
        """Weight matrices (..., d, C) as parameter vectors (..., C*d): the columns in turn."""
        W = np.asarray(W, dtype=np.float64)
        return np.ascontiguousarray(W.swapaxes(-1, -2)).reshape(*W.shape[:-2], -1)

    # --------------------------------------------------------------- oracle
    @property
    def _stack_width(self) -> int:
        return self.n_classes

    def _pass(self, X: np.ndarray, grads: np.ndarray | None, loss: np.ndarray | None,
              weights: np.ndarray | None = None) -> None:
        """One pass over the data for the iterates X (B, C*d) or (B, n, C*d); ``weights``
        (B, n, m_max) replaces the per-worker 1/m_i of the gradient (the minibatch oracle)."""
        B, C, d = X.shape[0], self.n_classes, self.n_features
        Xs = stack_rows(X.reshape(*X.shape[:-1], C, d))
        g4 = None if grads is None else grads.reshape(B, self.n_workers, C, d)  # a view: grads is contiguous

        def work(blk: Block) -> None:
            z = blk.forward(Xs).reshape(B, C, blk.nb, blk.m)
            if loss is not None:
                loss[:, blk.lo : blk.hi] = self._data_loss(z, blk)
            if g4 is None:
                return
            R = self._residual_weights(z, blk)
            if weights is not None:
                R *= weights[:, None, blk.lo : blk.hi]
            out = np.empty((B * C, blk.nb, d))
            blk.backward(R.reshape(B * C, blk.nb, blk.m), out)
            scale = np.ones(blk.nb) if weights is not None else 1.0 / blk.sizes
            np.multiply(unstack_rows(out, B), scale[None, :, None, None], out=g4[:, blk.lo : blk.hi])

        self.shards.run(work)

    # ---------------------------------------------------------- model parts
    def _data_loss(self, z: np.ndarray, blk: Block) -> np.ndarray:
        """Mean cross-entropy per worker (B, nb) from the class margins z (B, C, nb, m_max)."""
        zmax = z.max(axis=1)
        # logsumexp with the row maximum subtracted: exp never overflows.
        lse = zmax + np.log(np.exp(z - zmax[:, None]).sum(axis=1))
        picked = np.einsum("bcnm,cnm->bnm", z, self._onehot[blk.lo])  # z_{y_j}; 0 on padded rows
        per_row = lse * blk.mask - picked
        return per_row.sum(axis=2) / blk.sizes

    def _residual_weights(self, z: np.ndarray, blk: Block) -> np.ndarray:
        """p - onehot(y) per row and class, (B, C, nb, m_max); overwrites z."""
        z -= z.max(axis=1, keepdims=True)
        np.exp(z, out=z)
        z /= z.sum(axis=1, keepdims=True)
        z -= self._onehot[blk.lo]
        return z

    # ---------------------------------------------------------- constants
    def smoothness_bounds(self) -> tuple[np.ndarray, float]:
        """lambda_max(A_i^T A_i/m_i)/2 + lam per worker, and the same for f (module docstring)."""
        per, pooled = self.shards.gram_top_eigs()
        return per / 2.0 + self.regularization, pooled / 2.0 + self.regularization
