"""MARINA: compressed gradient differences with rare dense synchronisation.

g^0 = grad f(x^0). Then each round a coin c ~ Bernoulli(p), shared by the
workers of a trajectory: if c = 1 every worker sends its dense gradient,
else g^{k+1} = g^k + (1/n) sum_i Q_i(grad f_i(x^{k+1}) - grad f_i(x^k)).
Gorbunov, Burlachenko, Li, Richtarik, "MARINA: Faster Non-Convex Distributed
Learning with Compression" (ICML 2021), Algorithm 1.

With a minibatch (the job's ``minibatch``, :meth:`Method.use_minibatch`) it is the online form
of that paper's VR-MARINA (docs/theory.md §2.12): g^0 and the sync rounds use a minibatch
estimate of b rows per worker, and each difference is taken on one draw of b rows at both points
(:class:`~bittune.methods._minibatch.SameRows`).
"""

from __future__ import annotations

import numpy as np

from .._random import STREAM, uniform
from ._minibatch import SameRows
from .base import Method

__all__ = ["MARINA"]


class MARINA(SameRows, Method):
    name = "marina"
    params = {"sync_probability": lambda c: np.minimum(1.0, c.density / c.dim)}

    def direction(self, grads, keys, round_, X=None):
        if "g" not in self.state:
            self.state["g"] = grads.mean(axis=1)
            if self.rows is None:
                self.state["prev"] = grads  # the engine hands a fresh array every round
            return self.state["g"].copy(), self._dense(grads)
        sync = uniform(keys, round_, STREAM["coin"], (1,))[:, 0] < self.p["sync_probability"]
        q, bits = self.compressor.compress(grads - self.prev_grads(self.state.get("prev")), keys, round_)
        g = self.state["g"] + q.mean(axis=1)
        g[sync] = grads[sync].mean(axis=1)
        bits[sync] = self._dense(grads)[sync]
        self.count_evals(np.broadcast_to(~sync[:, None], bits.shape))
        self.state["g"] = g
        if self.rows is None:
            self.state["prev"] = grads
        return g.copy(), bits
