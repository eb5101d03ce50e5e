"""EF21: error feedback with a contractive compressor.

c_i = C(grad f_i(x^{t+1}) - g_i^t); g_i^{t+1} = g_i^t + c_i; g = mean_i g_i.
Richtarik, Sokolov, Fatkhullin, "EF21: A New, Simpler, Theoretically Better,
and Practically Faster Error Feedback" (NeurIPS 2021), Algorithm 1. An unbiased
compressor Q in U(omega) is used as Q/(1+omega), which is contractive with
alpha = 1/(1+omega) (docs/theory.md §1.1). g_i^0 = grad f_i(x^0) (dense, G^0 = 0).
"""

from __future__ import annotations

import numpy as np

from .base import Method

__all__ = ["EF21"]


class EF21(Method):
    name = "ef21"

    def direction(self, grads, keys, round_, X=None):
        if "gi" not in self.state:
            self.state["gi"] = grads.copy()
            return grads.mean(axis=1), self._dense(grads)
        gi = self.state["gi"]
        c, bits = self.compressor.compress(grads - gi, keys, round_)
        if self.compressor.unbiased:  # omega is a scalar, or one value per trajectory (PerTrajectory)
            omega = np.asarray(self.compressor.omega, dtype=np.float64)
            scale = 1.0 / (1.0 + omega)
            c *= scale[:, None, None] if scale.ndim else scale
        gi += c
        return gi.mean(axis=1), bits
