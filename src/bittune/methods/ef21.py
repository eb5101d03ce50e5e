"""EF21: error feedback with a contractive compressor; EF21-BC with a compressed broadcast.

c_i = C(grad f_i(x^{t+1}) - g_i^t); g_i^{t+1} = g_i^t + c_i; g = mean_i g_i.
Richtarik, Sokolov, Fatkhullin, "EF21: A New, Simpler, Theoretically Better,
and Practically Faster Error Feedback" (NeurIPS 2021), Algorithm 1. An unbiased
compressor Q in U(omega) is used as Q/(1+omega), which is contractive with
alpha = 1/(1+omega) (docs/theory.md §1.1). g_i^0 = grad f_i(x^0) (dense, G^0 = 0).

With a downlink compressor C_M (params["downlink"]) it is EF21-BC, bidirectional
compression (Fatkhullin, Sokolov, Gorbunov, Li, Richtarik, "EF21 with bells &
whistles", 2021; docs/theory.md §2.11): the server keeps b^t, known to every
worker, broadcasts m^t = C_M(g^{t+1} - b^t) and all set b^{t+1} = b^t + m^t; the
iterates step along b. b^0 = g^0 is broadcast dense. C_M draws its random
numbers from keys of its own (STREAM["downlink"]), so it never repeats a worker's.
"""

from __future__ import annotations

import numpy as np

from .._random import STREAM, derived_keys
from .base import Method, dense_bits

__all__ = ["EF21"]


def _contract(comp, c: np.ndarray) -> np.ndarray:
    """An unbiased compressor's message scaled by 1/(1+omega) (in place; omega scalar or (B,))."""
    if comp.unbiased:
        omega = np.asarray(comp.omega, dtype=np.float64)
        scale = 1.0 / (1.0 + omega)
        c *= scale[:, None, None] if scale.ndim else scale
    return c


class EF21(Method):
    name = "ef21"
    bidirectional = True

    def direction(self, grads, keys, round_, X=None):
        if "gi" not in self.state:
            self.state["gi"] = grads.copy()
            g = grads.mean(axis=1)
            if self.downlink is not None:
                self.state["b"] = g.copy()
                self._down_bits = np.full(grads.shape[0], dense_bits(self.d))
            return g, self._dense(grads)
        gi = self.state["gi"]
        c, bits = self.compressor.compress(grads - gi, keys, round_)
        gi += _contract(self.compressor, c)
        g = gi.mean(axis=1)
        if self.downlink is None:
            return g, bits
        b = self.state["b"]
        m, mbits = self.downlink.compress((g - b)[:, None, :], derived_keys(keys, STREAM["downlink"]), round_)
        b += _contract(self.downlink, m)[:, 0]
        self._down_bits = mbits[:, 0].astype(np.float64)
        return b.copy(), bits
