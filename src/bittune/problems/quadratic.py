"""Quadratic workers f_i(x) = (1/2) x^T H_i x + b_i^T x: the probe's ground truth.

Every smoothness constant of docs/theory.md §3.1 has a closed form here, so tests can
compare numerical estimates with exact values. The class offers the oracle of
:class:`bittune.problems.Problem` (``local_grads`` on (B, d) or (B, n, d)
iterates, ``local_losses``, ``full_grad``, ``full_loss``, ``smoothness_bounds``,
``loss_lower_bound``) without the sharded data layout: one ``einsum`` per call,
which suits the small problems it is meant for. It is not registered as a job
model.
"""

from __future__ import annotations

import numpy as np

from .base import check_iterates

__all__ = ["Quadratic"]


class Quadratic:
    """n quadratic workers with symmetric Hessians ``H`` (n, d, d) and linear terms ``b`` (n, d)."""

    name = "quadratic"

    def __init__(self, H: np.ndarray, b: np.ndarray | None = None):
        H = np.asarray(H, dtype=np.float64)
        if H.ndim != 3 or H.shape[1] != H.shape[2] or H.shape[0] < 1 or H.shape[1] < 1:
            raise ValueError(f"H must have shape (n, d, d) with n, d >= 1, got {H.shape}")
        if not np.all(np.isfinite(H)):
            raise ValueError("H must be finite")
        # Symmetric up to rounding of whoever built it: 1e-12 of the largest entry.
        asym = np.abs(H - H.transpose(0, 2, 1)).max(axis=(1, 2))
        bad = np.flatnonzero(asym > 1e-12 * max(np.abs(H).max(), np.finfo(float).tiny))
        if bad.size:
            raise ValueError(f"H[{bad[0]}] must be symmetric, max |H - H^T| = {asym[bad[0]]:.3g}")
        n, d = H.shape[:2]
        b = np.zeros((n, d)) if b is None else np.asarray(b, dtype=np.float64)
        if b.shape != (n, d) or not np.all(np.isfinite(b)):
            raise ValueError(f"b must be a finite array of shape ({n}, {d}), got shape {b.shape}")
        self.H = 0.5 * (H + H.transpose(0, 2, 1))
        self.b = b

    @property
    def n_workers(self) -> int:
        return self.H.shape[0]

    @property
    def dim(self) -> int:
        return self.H.shape[1]

    # --------------------------------------------------------------- oracle
    def local_grads(
        self, X: np.ndarray, *, with_loss: bool = False
    ) -> tuple[np.ndarray, np.ndarray | None]:
        """Gradients (B, n, d) of every f_i at (B, d) or (B, n, d) iterates, and values (B, n) if asked."""
        X = self._check(X)
        if X.ndim == 2:
            HX = np.einsum("nij,bj->bni", self.H, X)
            X = X[:, None, :]
        else:
            HX = np.einsum("nij,bnj->bni", self.H, X)
        grads = HX + self.b
        loss = ((0.5 * HX + self.b) * X).sum(axis=-1) if with_loss else None
        return grads, loss

    def local_losses(self, X: np.ndarray) -> np.ndarray:
        """Values (B, n) of every f_i."""
        return self.local_grads(X, with_loss=True)[1]

    def full_grad(self, x: np.ndarray) -> np.ndarray:
        """Gradient of f = (1/n) sum_i f_i at one point, shape (d,)."""
        g, _ = self.local_grads(np.asarray(x, dtype=np.float64)[None, :])
        return g[0].mean(axis=0)

    def full_loss(self, x: np.ndarray) -> float:
        """f at one point."""
        return float(self.local_losses(np.asarray(x, dtype=np.float64)[None, :])[0].mean())

    def _check(self, X) -> np.ndarray:
        return check_iterates(X, n_workers=self.n_workers, dim=self.dim)

    # ---------------------------------------------------------- constants
    def smoothness_bounds(self) -> tuple[np.ndarray, float]:
        """The exact constants: L_i = ||H_i||_2 (n,) and L = ||mean_i H_i||_2 (docs/theory.md §3.1)."""
        per = np.linalg.norm(self.H, ord=2, axis=(1, 2))
        return per, float(np.linalg.norm(self.H.mean(axis=0), ord=2))

    def loss_lower_bound(self) -> float:
        """inf f: exact when f is bounded below, ``-inf`` when it is not (:func:`_inf_quadratic` on
        Hbar = mean H_i, bbar = mean b_i). Only the mean matters: a worker may be indefinite while f
        is bounded. The probe refuses an infinite bound (pass ``lower_bound`` to it instead)."""
        return _inf_quadratic(self.H.mean(axis=0), self.b.mean(axis=0))

    def worker_loss_lower_bound(self) -> float:
        """mean_i inf f_i, each by :func:`_inf_quadratic` on (H_i, b_i); ``-inf`` when some worker is
        unbounded below (then Delta* has no finite bound from the model)."""
        return float(np.mean([_inf_quadratic(H, b) for H, b in zip(self.H, self.b)]))


def _inf_quadratic(H: np.ndarray, b: np.ndarray) -> float:
    """inf of (1/2) x^T H x + b^T x for symmetric H: exact when bounded below, ``-inf`` when not.

    With H = V diag(lam) V^T and c = V^T b, the function is bounded below iff every lam_j >= 0
    and c_j = 0 wherever lam_j = 0; then inf = -(1/2) sum_{lam_j > 0} c_j^2 / lam_j. "Zero" means
    below ``d * eps * ||H||`` for eigenvalues (the rounding level of ``eigh``) and
    ``sqrt(eps) * ||b||`` for c_j.
    """
    lam, V = np.linalg.eigh(H)
    c = V.T @ b
    eps = np.finfo(np.float64).eps
    zero = H.shape[0] * eps * max(np.abs(lam).max(), np.finfo(float).tiny)
    if lam[0] < -zero:
        return -np.inf
    flat = lam <= zero
    if np.any(np.abs(c[flat]) > np.sqrt(eps) * max(np.linalg.norm(b), np.finfo(float).tiny)):
        return -np.inf
    return float(-0.5 * np.sum(c[~flat] ** 2 / lam[~flat]))
