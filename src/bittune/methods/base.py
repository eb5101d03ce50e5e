"""The interface every method implements, and the state handling they share.

A method turns the local gradients at the current iterates into the direction
g^k that the engine steps along (x^{k+1} = x^k - gamma g^k), and says how many
bits each worker sent to produce it. It advances B trajectories at once:
parameters are (B,) arrays, state arrays have B as their leading axis, and no
Python loop runs over trajectories or workers.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from typing import ClassVar

import numpy as np

__all__ = ["Method", "dense_bits"]


def dense_bits(dim: int) -> float:
    """Bits of one dense float32 vector (docs/theory.md §1.2: b_full = 32 d)."""
    return 32.0 * dim


class Method(ABC):
    #: Name used in configs and job files.
    name: ClassVar[str] = ""
    #: Per-trajectory parameters besides the step size, with their defaults
    #: (a callable of the compressor, or None when the parameter is required).
    params: ClassVar[dict[str, object]] = {}
    #: Has a published bidirectional form: takes a downlink compressor (params["downlink"]).
    bidirectional: ClassVar[bool] = False
    #: Draws its own minibatch rows and takes full local gradients from the engine even when a
    #: minibatch is set (VR-MARINA); the others get :meth:`stochastic_grads`.
    own_rows: ClassVar[bool] = False

    def __init__(self, *, compressor, n_workers: int, dim: int, batch: int, **params):
        self.compressor = compressor
        #: The server's compressor (None: a dense broadcast); only bidirectional methods take one.
        self.downlink = params.pop("downlink", None)
        if self.downlink is not None and not self.bidirectional:
            raise ValueError(f"{self.name}: has no bidirectional form, cannot take a downlink compressor")
        self._down_bits: np.ndarray | None = None  # (B,) broadcast bits of the last round
        self._waited: np.ndarray | None = None  # (B, n) workers the last round waited for
        #: The job's minibatch b (rows per worker per gradient evaluation, :meth:`use_minibatch`);
        #: None: full local gradients.
        self.rows: int | None = None
        self._evals: np.ndarray | None = None  # (B, n) per-sample gradients of the last round
        self.n = int(n_workers)
        self.d = int(dim)
        self.size = int(batch)  # trajectories (rows) in this instance: :meth:`keep` and :meth:`append` change it
        self.p: dict[str, np.ndarray] = {}
        for key, default in self.params.items():
            value = params.pop(key, None)
            if value is None:
                if default is None:
                    raise ValueError(f"{self.name}: parameter {key!r} is required")
                value = default(compressor)
            self.p[key] = np.broadcast_to(np.asarray(value, dtype=np.float64), (batch,)).copy()
        if params:
            raise ValueError(f"{self.name}: unknown parameters {sorted(params)}")
        self.state: dict[str, np.ndarray] = {}
        #: The problem being simulated (set by :meth:`bind`); only methods that call
        #: an oracle of their own (minibatches) use it.
        self.problem = None

    def bind(self, problem) -> None:
        """Attach the simulated problem (the engine calls this once, before round 0)."""
        self.problem = problem

    def use_minibatch(self, rows: int) -> None:
        """Run on stochastic gradients: b = ``rows`` rows per worker per gradient evaluation, drawn
        with replacement (the engine calls this before :meth:`bind`; docs/theory.md §2.12)."""
        self.rows = int(rows)

    def stochastic_grads(self, X: np.ndarray, W: np.ndarray) -> np.ndarray | None:
        """The per-worker gradient estimates (B, n, d) that :meth:`direction` gets in place of the
        full local gradients when a minibatch is set: the minibatch means on the round's rows W
        (``_minibatch.minibatch_weights``), b per worker. None: the method takes the full local
        gradients and draws its own rows (VR-MARINA)."""
        self._evals = np.full((X.shape[0], self.n), float(self.rows))
        return self.problem.weighted_grads(X, W)

    @abstractmethod
    def direction(
        self, grads: np.ndarray, keys: np.ndarray, round_, X: np.ndarray | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        """Direction (B, d) from local gradients (B, n, d) at the iterates X (B, d), and uplink bits (B, n)."""

    def gradient_evals(self) -> np.ndarray | None:
        """Per-sample gradients each worker computed in the last :meth:`direction` call, (B, n);
        None for a full local gradient (m_i per worker), which is every method's cost but a
        minibatch method's (VR-MARINA, or any method with :meth:`use_minibatch`)."""
        return self._evals

    def downlink_bits(self) -> np.ndarray | None:
        """Bits of the last round's broadcast per worker, (B,); None: one dense vector."""
        return self._down_bits

    def waited(self) -> np.ndarray | None:
        """Workers the server waited for in the last round, (B, n) booleans; None: all of them."""
        return self._waited

    def keep(self, index: np.ndarray) -> None:
        """Drop finished trajectories: keep rows ``index`` of every array."""
        self.p = {k: v[index] for k, v in self.p.items()}
        self.state = {k: v[index] for k, v in self.state.items()}
        self._down_bits = None if self._down_bits is None else self._down_bits[index]
        self._waited = None if self._waited is None else self._waited[index]
        keep = getattr(self.compressor, "keep", None)  # a per-trajectory compressor (PerTrajectory)
        if keep is not None:
            keep(index)
        self.size = len(index)

    def append(self, other: "Method") -> None:
        """Add the trajectories of ``other`` (an instance of the same method that has run its round 0
        on them alone) after this instance's rows: trajectories joining a running batch
        (docs/design.md, "The engine"). Concatenates the parameters, the state, the last round's
        broadcast bits, waited workers and gradient evaluations, and the compressor (one per
        trajectory, :func:`~bittune.compressors.stack_compressors`). A method whose state after round
        0 lacks keys that later rounds add must override this."""
        from ..compressors import stack_compressors

        if type(other) is not type(self):
            raise ValueError(f"{self.name}: cannot append trajectories of {other.name}")
        if other.size == 0:
            return
        if self.size == 0:  # nothing running (maybe no round run yet): take the newcomers' state as it is
            self.p, self.state, self.compressor, self.size = other.p, other.state, other.compressor, other.size
            self._down_bits, self._waited, self._evals = other._down_bits, other._waited, other._evals
            return
        if set(self.state) != set(other.state) or set(self.p) != set(other.p):
            raise ValueError(f"{self.name}: state {sorted(self.state)} and joining state {sorted(other.state)} differ")
        self.p = {k: np.concatenate([v, other.p[k]]) for k, v in self.p.items()}
        self.state = {k: np.concatenate([v, other.state[k]]) for k, v in self.state.items()}
        sizes = getattr(self.problem, "worker_sizes", None)
        full = np.ones(self.n) if sizes is None else np.asarray(sizes, dtype=np.float64)
        self._down_bits = stack_rows(self._down_bits, other._down_bits, self.size, other.size, dense_bits(self.d))
        self._waited = stack_rows(self._waited, other._waited, self.size, other.size, np.ones(self.n, dtype=bool))
        self._evals = stack_rows(self._evals, other._evals, self.size, other.size, full)
        self.compressor = stack_compressors(self.compressor, self.size, other.compressor, other.size)
        self.size += other.size

    def _dense(self, grads: np.ndarray) -> np.ndarray:
        return np.full(grads.shape[:2], dense_bits(self.d))


def stack_rows(a, b, rows_a: int, rows_b: int, none_means):
    """Rows of a per-round array of two instances, one after the other; None (the default meaning,
    e.g. "a dense broadcast") stays None when both are None, else becomes ``none_means`` per row."""
    if a is None and b is None:
        return None
    fill = lambda x, rows: np.broadcast_to(np.asarray(none_means), (rows,) + np.shape(none_means)) \
        if x is None else x  # noqa: E731
    return np.concatenate([fill(a, rows_a), fill(b, rows_b)])
