"""VR-MARINA: MARINA for finite sums, with minibatch gradient differences.

f_i = (1/m_i) sum_j f_ij. g^0 = grad f(x^0). Each round a coin c ~ Bernoulli(p),
shared by the workers of a trajectory: if c = 1 every worker sends its full
local gradient and g^{k+1} = grad f(x^{k+1}); else worker i draws b' of its
rows i.i.d. uniformly with replacement (the set I'_ik) and
g^{k+1} = g^k + (1/n) sum_i Q_i( (1/b') sum_{j in I'_ik} (grad f_ij(x^{k+1}) - grad f_ij(x^k)) ).
Gorbunov, Burlachenko, Li, Richtarik, "MARINA: Faster Non-Convex Distributed
Learning with Compression" (ICML 2021), Algorithm 2 (VR-MARINA; number from
memory); docs/theory.md §2.5.

Both gradients of a difference are taken on the same rows: one call of the
problem's minibatch oracle (``weighted_grads``) on the stacked points
(x^{k+1}, x^k) with the row counts / b' as weights (``_minibatch.minibatch_weights``:
a trajectory draws the same rows alone or in any batch, with any mix of b' in it).

Cost: a compressed round computes 2 b' per-sample gradients per worker, a
synchronising round m_i (reported by :meth:`gradient_evals`, counted by the
engine beside the bits). The simulation itself still evaluates the full
gradient every round (to watch ||grad f||^2), so a VR-MARINA round costs the
engine about three data passes, not one.
"""

from __future__ import annotations

import numpy as np

from .._random import STREAM, uniform
from ._minibatch import minibatch_weights, paired_grads
from .base import Method

__all__ = ["VRMARINA", "default_minibatch"]


def default_minibatch(sizes) -> int:
    """b' when a job fixes none: about sqrt(m_min) rows (our choice, no source: the variance
    term calL^2/b' then shrinks while a compressed round stays far cheaper than a full pass)."""
    return max(1, int(round(float(np.sqrt(np.min(sizes))))))


class VRMARINA(Method):
    name = "vr_marina"
    #: Defaults depend on the worker sizes: filled in __init__ (minibatch: default_minibatch;
    #: sync_probability: min(zeta/d, b'/(m + b')), docs/theory.md §2.5, from memory; m = mean m_i).
    params = {"sync_probability": None, "minibatch": None}
    own_rows = True  # full local gradients on sync rounds; the differences draw their own rows

    def __init__(self, *, compressor, n_workers: int, dim: int, batch: int, **params):
        # Both defaults need the worker sizes: bind() resolves them, before round 0; the base
        # class sees placeholders so that it still rejects unknown parameters.
        self._given = {k: params.get(k) for k in self.params}
        self._batch = batch
        super().__init__(compressor=compressor, n_workers=n_workers, dim=dim, batch=batch,
                         **{**params, **{k: 0.0 for k in self.params}})

    def bind(self, problem) -> None:
        super().bind(problem)
        if not getattr(problem, "has_samples", False):
            raise ValueError(f"{self.name}: the model {getattr(problem, 'name', '?')!r} has no per-sample "
                             f"gradients (minibatch oracle); use marina")
        sizes = np.asarray(problem.worker_sizes, dtype=np.float64)
        b = self._given.get("minibatch")
        b = np.broadcast_to(np.asarray(default_minibatch(sizes) if b is None else b, dtype=np.float64),
                            (self._batch,)).copy()
        if not np.all((b == np.floor(b)) & (b >= 1)):
            raise ValueError(f"{self.name}: parameter 'minibatch' must be integers >= 1, "
                             f"got {self._given.get('minibatch')!r}")
        p = self._given.get("sync_probability")
        if p is None:
            c = self.compressor
            p = np.minimum(c.density / c.dim, b / (sizes.mean() + b))
        self.p["minibatch"] = b
        self.p["sync_probability"] = np.broadcast_to(np.asarray(p, dtype=np.float64), (self._batch,)).copy()
        self._sizes = sizes
        self._m_max = int(problem.shards.m_max)

    def direction(self, grads, keys, round_, X=None):
        B, n, _ = grads.shape
        if "g" not in self.state:
            self.state["g"] = grads.mean(axis=1)
            self.state["x"] = np.array(X, dtype=np.float64)
            self._evals = None
            return self.state["g"].copy(), self._dense(grads)
        sync = uniform(keys, round_, STREAM["coin"], (1,))[:, 0] < self.p["sync_probability"]
        b = self.p["minibatch"]
        W = minibatch_weights(keys, round_, self._sizes, b, self._m_max)
        new, old = paired_grads(self.problem, X, self.state["x"], W)
        q, bits = self.compressor.compress(new - old, keys, round_)
        g = self.state["g"] + q.mean(axis=1)
        g[sync] = grads[sync].mean(axis=1)
        bits[sync] = self._dense(grads)[sync]
        evals = np.broadcast_to(2.0 * b[:, None], (B, n)).copy()
        evals[sync] = self._sizes
        self._evals = evals
        self.state["g"] = g
        self.state["x"] = np.array(X, dtype=np.float64)
        return g.copy(), bits

    def use_minibatch(self, rows: int) -> None:
        """The job's minibatch fixes b' (docs/theory.md §2.12): a given ``minibatch`` parameter
        gives way to it; sync rounds keep full local gradients (the finite-sum form)."""
        super().use_minibatch(rows)
        self._given["minibatch"] = self.rows
