"""Distributed gradient descent, uncompressed: every worker sends its dense gradient.

Reference: Nesterov, "Introductory Lectures on Convex Optimization" (2004), 1.2.3.
"""

from __future__ import annotations


from .base import Method

__all__ = ["GD"]


class GD(Method):
    name = "gd"

    def direction(self, grads, keys, round_, X=None):
        return grads.mean(axis=1), self._dense(grads)
