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

    def __init__(self, *, compressor, n_workers: int, dim: int, batch: int, **params):
        self.compressor = compressor
        #: The server's compressor (None: a dense broadcast); only bidirectional methods take one.
        self.downlink = params.pop("downlink", None)
        if self.downlink is not None and not self.bidirectional:
            raise ValueError(f"{self.name}: has no bidirectional form, cannot take a downlink compressor")
        self._down_bits: np.ndarray | None = None  # (B,) broadcast bits of the last round
        self._waited: np.ndarray | None = None  # (B, n) workers the last round waited for
        self.n = int(n_workers)
        self.d = int(dim)
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

    @abstractmethod
    def direction(
        self, grads: np.ndarray, keys: np.ndarray, round_: int, X: np.ndarray | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        """Direction (B, d) from local gradients (B, n, d) at the iterates X (B, d), and uplink bits (B, n)."""

    def gradient_evals(self) -> np.ndarray | None:
        """Per-sample gradients each worker computed in the last :meth:`direction` call, (B, n);
        None for a full local gradient (m_i per worker), which is every method's cost but a
        minibatch method's."""
        return None

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

    def _dense(self, grads: np.ndarray) -> np.ndarray:
        return np.full(grads.shape[:2], dense_bits(self.d))
