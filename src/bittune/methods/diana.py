"""DIANA: compress the difference to a learned shift.

g_i = h_i + Q_i(grad f_i(x) - h_i); h_i <- h_i + alpha Q_i(grad f_i(x) - h_i)
with the same draw. Mishchenko, Gorbunov, Takac, Richtarik, "Distributed
Learning with Compressed Gradient Differences" (2019).

Shifts start at the local gradients of x^0 (one dense message, H^0 = 0; the
theory bound of docs/theory.md §2.3 then has no H^0 term).
"""

from __future__ import annotations

from .base import Method

__all__ = ["DIANA"]


class DIANA(Method):
    name = "diana"
    params = {"shift_rate": lambda c: 1.0 / (1.0 + c.omega)}

    def direction(self, grads, keys, round_, X=None):
        if "h" not in self.state:
            self.state["h"] = grads.copy()
            return grads.mean(axis=1), self._dense(grads)
        h = self.state["h"]
        q, bits = self.compressor.compress(grads - h, keys, round_)
        g = (h + q).mean(axis=1)
        h += self.p["shift_rate"][:, None, None] * q
        return g, bits
