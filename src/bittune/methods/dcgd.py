"""Distributed compressed gradient descent (quantized GD).

g^k = (1/n) sum_i Q_i(grad f_i(x^k)). Khaled & Richtarik, "Better Theory for
SGD in the Nonconvex World" (2020); Alistarh et al., "QSGD" (NeurIPS 2017).
"""

from __future__ import annotations

from .base import Method

__all__ = ["DCGD"]


class DCGD(Method):
    name = "dcgd"

    def direction(self, grads, keys, round_, X=None):
        q, bits = self.compressor.compress(grads, keys, round_)
        return q.mean(axis=1), bits
