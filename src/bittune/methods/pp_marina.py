"""PP-MARINA: MARINA with partial participation on the compressed rounds.

g^0 = grad f(x^0). Each round a coin c ~ Bernoulli(p), shared by the workers of
a trajectory: if c = 1 all n workers send their dense gradients and
g^{k+1} = grad f(x^{k+1}); else the server draws r clients i_1..i_r i.i.d.
uniformly with replacement and
g^{k+1} = g^k + (1/r) sum_j Q_{i_j}(grad f_{i_j}(x^{k+1}) - grad f_{i_j}(x^k)).
Gorbunov, Burlachenko, Li, Richtarik, "MARINA: Faster Non-Convex Distributed
Learning with Compression" (ICML 2021), Algorithm 4 (PP-MARINA; number from memory).

Every draw j is compressed on its own (its own random numbers, slot j of a
(B, r, d) block): a client drawn twice sends two independent compressions of
its difference, as the variance bound of docs/theory.md §2.6 assumes
((1/r) E_i E||Q_i(D_i)||^2 needs independent draws). The client draws come from
(trajectory key, round, STREAM["clients"], draw j), so a trajectory draws the
same clients alone or in a batch, with any mix of r in the batch.

Bits: the engine takes the mean over workers of the (B, n) bits a method
returns. On a compressed round worker i reports the sum of the bits of its
messages (twice the message if drawn twice, 0 if not drawn), so that mean is
(total bits sent)/n and totals come out right; it is not what a typical
worker sends (only r messages are sent, not n).

With a minibatch (the job's ``minibatch``) the gradients are minibatch estimates and each
difference is taken on the same b rows at both points, as for MARINA (docs/theory.md §2.12).

Time (uneven network, cost.NetworkModel.round_seconds): a compressed round waits
for the drawn clients only (:meth:`Method.waited`), a sync round for all n.
"""

from __future__ import annotations

import numpy as np

from .._random import STREAM, uniform
from ._minibatch import SameRows
from .base import Method

__all__ = ["PPMARINA"]


class PPMARINA(SameRows, Method):
    name = "pp_marina"
    #: Both defaults depend on n as well as on the compressor: filled in __init__
    #: (clients: r = n; sync_probability: zeta r/(d n), docs/theory.md §2.6, from memory).
    params = {"sync_probability": None, "clients": None}

    def __init__(self, *, compressor, n_workers: int, dim: int, batch: int, **params):
        if getattr(compressor, "correlated", False):
            raise ValueError(f"{self.name}: needs independent compressors (clients are sampled), "
                             f"got the correlated {compressor.label()}")
        n = int(n_workers)
        clients = params.pop("clients", None)
        r = np.broadcast_to(np.asarray(n if clients is None else clients, dtype=np.float64), (batch,))
        if not np.all((r == np.floor(r)) & (r >= 1) & (r <= n)):
            raise ValueError(f"{self.name}: parameter 'clients' must be integers in [1, {n}], got {clients!r}")
        if params.get("sync_probability") is None:
            params["sync_probability"] = np.minimum(1.0, compressor.density * r / (compressor.dim * n))
        super().__init__(compressor=compressor, n_workers=n, dim=dim, batch=batch, clients=r, **params)

    def direction(self, grads, keys, round_, X=None):
        if "g" not in self.state:
            self.state["g"] = grads.mean(axis=1)
            if self.rows is None:
                self.state["prev"] = grads  # the engine hands a fresh array every round
            return self.state["g"].copy(), self._dense(grads)
        B, n, _ = grads.shape
        sync = uniform(keys, round_, STREAM["coin"], (1,))[:, 0] < self.p["sync_probability"]
        r = self.p["clients"].astype(np.int64)
        slots = int(r.max())
        # Draw j of trajectory b depends only on (key_b, round, j): floor(n u) is uniform on
        # 0..n-1 up to 2^-53 (u has 53 random bits); the min guards the rounding of n u.
        picks = np.minimum((uniform(keys, round_, STREAM["clients"], (slots,)) * n).astype(np.int64), n - 1)
        live = np.arange(slots)[None, :] < r[:, None]  # (B, slots): draws beyond r_b are unused
        diff = np.take_along_axis(grads - self.prev_grads(self.state.get("prev")), picks[:, :, None], axis=1)
        q, qbits = self.compressor.compress(diff, keys, round_)
        g = self.state["g"] + np.where(live[:, :, None], q, 0.0).sum(axis=1) / r[:, None]
        bits = np.zeros((B, n))
        at = (np.broadcast_to(np.arange(B)[:, None], picks.shape), picks)  # (trajectory, client) of each draw
        np.add.at(bits, at, np.where(live, qbits, 0.0))
        g[sync] = grads[sync].mean(axis=1)
        bits[sync] = self._dense(grads)[sync]
        # The server waits for its drawn clients on a compressed round, for all on a sync round.
        drawn = np.zeros((B, n))
        np.add.at(drawn, at, live)
        drawn[sync] = 1.0
        self._waited = drawn > 0
        # Minibatch: a drawn client computes its difference once (2b), on a sync round every worker
        # one estimate (b); a client not drawn computes nothing.
        self.count_evals(self._waited & ~sync[:, None])
        if self.rows is not None:
            self._evals[~self._waited] = 0.0
        self.state["g"] = g
        if self.rows is None:
            self.state["prev"] = grads
        return g.copy(), bits
