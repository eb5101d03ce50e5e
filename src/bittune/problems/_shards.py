"""Worker-sharded data laid out for batched passes (docs/design.md, "The engine").

Worker i's rows are padded to a common length ``m_max`` so that every pass is a
handful of BLAS calls on a (workers, m_max, d) layout, never a Python loop over
workers. Padded rows are zero (dense) or empty (sparse) and carry no weight in
any gradient; losses mask them out.

The workers are cut into as many contiguous blocks as there are threads (at
most the cores; see :func:`set_threads`). Each block runs forward pass,
per-row weights and backward pass on its own thread with single-threaded
BLAS: numpy's element-wise work then uses every core too, and small batched
products, which BLAS would run on one core, use them all (measured in
``benchmarks/engine.py``).

Two shapes of input are served in one pass each:

* shared iterates ``X`` of shape (B, d): every worker at the same point;
* per-worker points ``X`` of shape (B, n, d): worker i at ``X[:, i]`` (used by
  the probe's batched Hessian-vector products).
"""

from __future__ import annotations

import copy
import os
from concurrent.futures import ThreadPoolExecutor
from typing import Callable

import numpy as np
import scipy.sparse as sp

__all__ = ["Shards", "Block", "set_threads", "get_threads"]

_THREADS = max(1, min(2, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 1))
_POOL: ThreadPoolExecutor | None = None
_BLAS = None


def set_threads(k: int) -> None:
    """Threads per oracle call for problems built from now on (1 disables the split)."""
    global _THREADS, _POOL
    _THREADS = max(1, int(k))
    _POOL = None


def get_threads() -> int:
    return _THREADS


def _pool() -> ThreadPoolExecutor:
    global _POOL
    if _POOL is None or _POOL._max_workers != _THREADS:  # noqa: SLF001 - our own pool
        _POOL = ThreadPoolExecutor(max_workers=_THREADS, thread_name_prefix="bittune-shard")
    return _POOL


def _single_threaded_blas():
    global _BLAS
    if _BLAS is None:
        from threadpoolctl import ThreadpoolController

        _BLAS = ThreadpoolController()
    return _BLAS.limit(limits=1, user_api="blas")


class Block:
    """Workers ``lo..hi-1``: their rows, targets and masks in the padded layout."""

    def __init__(self, rows: list, targets: list[np.ndarray], *, lo: int, m_max: int, dim: int):
        self.lo, self.hi = lo, lo + len(rows)
        nb, m, d = len(rows), m_max, dim
        self.sizes = np.array([r.shape[0] for r in rows], dtype=np.int64)
        self.mask = np.zeros((nb, m), dtype=bool)
        self.y = np.zeros((nb, m), dtype=np.float64)
        for i, (r, t) in enumerate(zip(rows, targets)):
            self.mask[i, : r.shape[0]] = True
            self.y[i, : r.shape[0]] = t
        self.sparse = sp.issparse(rows[0])
        self.nb, self.m, self.d = nb, m, d
        if self.sparse:
            blocks = []
            for r in rows:
                r = sp.csr_matrix(r, dtype=np.float64)
                if r.shape[0] < m:
                    r = sp.vstack([r, sp.csr_matrix((m - r.shape[0], d))], format="csr")
                blocks.append(r)
            self._flat = sp.vstack(blocks, format="csr")  # (nb*m, d): shared iterates
            self._blk = sp.block_diag(blocks, format="csr")  # (nb*m, nb*d): per-worker points
            self._blk_t = self._blk.T.tocsr()  # (nb*d, nb*m): backward for all workers
        else:
            a3 = np.zeros((nb, m, d), dtype=np.float64)
            for i, r in enumerate(rows):
                a3[i, : r.shape[0]] = r
            # One copy serves both passes: the forward pass reads it transposed.
            # A separate contiguous transpose made a single-threaded product
            # faster but the whole round slower, by doubling the memory each
            # round streams (measured on 2 cores).
            self._a3 = a3

    def astype(self, dtype) -> "Block":
        """A copy whose rows and targets are stored in ``dtype`` (the mask and sizes are shared)."""
        out = copy.copy(self)
        out.y = self.y.astype(dtype)
        if self.sparse:
            out._flat, out._blk, out._blk_t = (m.astype(dtype) for m in (self._flat, self._blk, self._blk_t))
        else:
            out._a3 = self._a3.astype(dtype)
        return out

    def forward(self, X: np.ndarray) -> np.ndarray:
        """Margins ``z[b, i, j] = a_ij . x`` as a (B, nb, m) array (a fresh array)."""
        nb, m, d = self.nb, self.m, self.d
        B = X.shape[0]
        if X.ndim == 2:
            z = (self._flat @ X.T).T if self.sparse else X @ self._a3.reshape(nb * m, d).T
            return np.ascontiguousarray(z).reshape(B, nb, m)
        Xb = X[:, self.lo : self.hi]
        if self.sparse:
            z = (self._blk @ Xb.reshape(B, nb * d).T).T
            return np.ascontiguousarray(z).reshape(B, nb, m)
        z = np.matmul(self._a3, Xb.transpose(1, 2, 0))  # (nb, m, B)
        return np.ascontiguousarray(z.transpose(2, 0, 1))

    def backward(self, R: np.ndarray, out: np.ndarray) -> None:
        """``out[b, i] = sum_j R[b, i, j] a_ij``; ``out`` is a (B, nb, d) view."""
        nb, m, d = self.nb, self.m, self.d
        B = R.shape[0]
        if self.sparse:
            out[...] = (self._blk_t @ R.reshape(B, nb * m).T).T.reshape(B, nb, d)
        else:
            out[...] = np.matmul(R.transpose(1, 0, 2), self._a3).transpose(1, 0, 2)

    def rows(self, i: int):
        """The m_i rows of local worker i (a dense view or a CSR slice, no padding)."""
        size = int(self.sizes[i])
        if self.sparse:
            return self._flat[i * self.m : i * self.m + size]
        return self._a3[i, :size]

    def gram(self, i: int) -> np.ndarray:
        """A_i^T A_i of local worker i (dense d x d)."""
        if self.sparse:
            a = self._flat[i * self.m : (i + 1) * self.m]
            return (a.T @ a).toarray()
        a = self._a3[i]
        return a.T @ a


class Shards:
    """Rows of n workers in a padded layout, cut into per-thread blocks.

    ``rows`` is a list of n row blocks (dense arrays or CSR matrices) in worker
    order; ``targets`` the matching label arrays.
    """

    def __init__(self, rows: list, targets: list[np.ndarray]):
        self.n = len(rows)
        self.sizes = np.array([r.shape[0] for r in rows], dtype=np.int64)
        self.dim = int(rows[0].shape[1])
        self.m_max = int(self.sizes.max())
        self.sparse = sp.issparse(rows[0])
        k = min(_THREADS, self.n)
        # Contiguous blocks with near-equal row counts.
        cuts = np.searchsorted(np.cumsum(self.sizes), np.arange(1, k) * self.sizes.sum() / k)
        edges = np.unique(np.concatenate([[0], np.clip(cuts + 1, 1, self.n - 1), [self.n]]))
        self.blocks = [
            Block(rows[a:b], targets[a:b], lo=int(a), m_max=self.m_max, dim=self.dim)
            for a, b in zip(edges[:-1], edges[1:])
        ]

    @property
    def dtype(self) -> np.dtype:
        """Floating type the rows are stored in (float64 unless made by :meth:`astype`)."""
        return self.blocks[0].y.dtype

    def astype(self, dtype) -> "Shards":
        """A copy with every block's rows and targets in ``dtype`` (float32 for the engine's
        single-precision path): the same layout, half the bytes a pass streams."""
        out = copy.copy(self)
        out.blocks = [b.astype(dtype) for b in self.blocks]
        return out

    def run(self, work: Callable[[Block], None]) -> None:
        """Call ``work(block)`` for every block, in parallel when there are several."""
        if len(self.blocks) == 1:
            work(self.blocks[0])
            return
        with _single_threaded_blas():
            futures = [_pool().submit(work, b) for b in self.blocks[1:]]
            work(self.blocks[0])
            for f in futures:
                f.result()

    def grams(self) -> np.ndarray:
        """The (n, d, d) stack of A_i^T A_i / m_i (once per problem, not in a hot path)."""
        out = np.empty((self.n, self.dim, self.dim))
        for blk in self.blocks:
            for i in range(blk.nb):
                out[blk.lo + i] = blk.gram(i) / blk.sizes[i]
        return out

    def gram_top_eigs(self) -> tuple[np.ndarray, float]:
        """lambda_max(A_i^T A_i / m_i) per worker, and lambda_max(mean_i A_i^T A_i / m_i).

        The second is the Hessian scale of f = (1/n) sum_i f_i. Up to
        ``GRAM_DIRECT_MAX`` features: ``numpy.linalg.eigvalsh`` of the (n, d, d)
        gram stack. Beyond it the stack (n d^2 numbers: 51 GB at d = 20,000 over
        16 workers) and its O(n d^3) eigenvalues would dominate the whole probe, so
        Lanczos iteration (``scipy.sparse.linalg.eigsh``, ARPACK, k = 1, tolerance
        machine precision, seeded start) runs on the operators v -> A_i^T (A_i v) / m_i
        and their mean, without forming a gram (docs/design.md, "Scale").
        """
        if self.dim <= GRAM_DIRECT_MAX:
            grams = self.grams()
            per = np.linalg.eigvalsh(grams)[:, -1]
            pooled = float(np.linalg.eigvalsh(grams.mean(axis=0))[-1])
            return per, pooled
        rows = [blk.rows(i) for blk in self.blocks for i in range(blk.nb)]
        per = np.array([_top_eig(lambda v, a=a: a.T @ (a @ v) / a.shape[0], self.dim) for a in rows])
        pooled = _top_eig(lambda v: sum(a.T @ (a @ v) / a.shape[0] for a in rows) / self.n, self.dim)
        return per, pooled


#: Largest dimension whose gram stack :meth:`Shards.gram_top_eigs` builds and diagonalises
#: directly (256: at most 0.5 MB per worker and milliseconds of LAPACK; our choice).
GRAM_DIRECT_MAX = 256


def _top_eig(matvec, dim: int) -> float:
    """Largest eigenvalue of the symmetric positive semi-definite operator ``matvec`` on R^dim:
    Lanczos (``scipy.sparse.linalg.eigsh``, which="LA", tol=0 = machine precision) from a start
    vector drawn by ``numpy.random.default_rng(0)`` (ARPACK's own start is not seeded)."""
    from scipy.sparse.linalg import LinearOperator, eigsh

    op = LinearOperator((dim, dim), matvec=lambda v: matvec(np.ravel(v)), dtype=np.float64)
    v0 = np.random.default_rng(0).standard_normal(dim)
    return max(0.0, float(eigsh(op, k=1, which="LA", v0=v0, tol=0.0, return_eigenvectors=False)[0]))
