"""A two-layer perceptron: one hidden layer of width h, one output, ridge on every parameter.

o(a) = w2 . act(W1^T a + b1) + b2, with act = tanh (default) or relu, and

* ``loss="logistic"`` (labels -1/+1): f_i = (1/m_i) sum_j log(1 + exp(-y_j o(a_j))) + (lam/2)||x||^2;
* ``loss="squared"`` (regression): f_i = (1/m_i) sum_j (o(a_j) - y_j)^2 / 2 + (lam/2)||x||^2.

**Parameter order** (length D = h*d + 2h + 1): x = [W1, b1, w2, b2] with W1
(d x h) stored hidden unit by hidden unit, ``x[k*d + j] = W1[j, k]`` (each
unit's input weights contiguous), then b1 (h), w2 (h), b2 (1). As for softmax
regression, the h first-layer columns of B iterates stack into a (B*h, d)
batch for the shared padded layout (see ``_stacked``).

The loss is non-convex (the saddle below is checked in the tests) and has no
closed-form smoothness constant: :meth:`MLP.smoothness_bounds` raises
NotImplementedError and the probe estimates the constants. With relu the
gradient jumps where a pre-activation crosses 0 (we take relu'(0) = 0): the
loss is not L-smooth there, and a finite-difference check that straddles a
kink can fail; tanh is smooth.

**Start point.** x = 0 is a bad start: there W1 = 0, b1 = 0 and w2 = 0, every
hidden unit is identical (the output is b2 whatever the input), the gradient
in W1, b1, w2 is exactly zero, and that set stays invariant under gradient
steps: GD only fits the output bias and converges to the best constant
predictor (W1, b1, w2 = 0, b2 = b2*). For tanh that point is stationary and,
with residuals r_j = dloss/do there and row weights 1/(n m_i), each hidden
unit k contributes the Hessian block [[lam, v^T], [v, lam I]] in
(w2_k, (W1_k, b1_k)) with v = sum_j r_j (a_j, 1) / (n m_i): eigenvalues
lam +- ||v||, a saddle as soon as ||v|| > lam (the residuals of the constant
predictor correlate with some feature). Use :func:`default_start` (seeded,
symmetry-breaking) when the job does not set a start.
"""

from __future__ import annotations

import numpy as np

from ._shards import Block, Shards
from ._stacked import StackedProblem, stack_rows, unstack_rows

__all__ = ["MLP", "ACTIVATIONS", "LOSSES", "default_start", "mlp_dim"]

ACTIVATIONS = ("tanh", "relu")
LOSSES = ("logistic", "squared")
#: Default hidden width (our choice, no source: small enough for the simulated
#: workers, wide enough to be non-trivial).
DEFAULT_HIDDEN = 16


def mlp_dim(n_features: int, hidden: int) -> int:
    """Number of parameters D = h*d + 2h + 1."""
    return hidden * (n_features + 2) + 1


def default_start(dim: int, seed: int, *, hidden: int = DEFAULT_HIDDEN, activation: str = "tanh") -> np.ndarray:
    """A seeded, symmetry-breaking start for an MLP with ``dim`` parameters.

    First-layer weights: Glorot uniform, U(+-sqrt(6/(d + h))), for tanh
    (Glorot and Bengio, AISTATS 2010; from memory), He normal, N(0, 2/d), for
    relu (He et al., ICCV 2015; from memory). Output weights: Glorot uniform,
    U(+-sqrt(6/(h + 1))). Biases 0. ``dim`` must equal h*(d + 2) + 1 for some
    d >= 1 (d is recovered from it).
    """
    if activation not in ACTIVATIONS:
        raise ValueError(f"activation must be one of {', '.join(ACTIVATIONS)}, got {activation!r}")
    h = int(hidden)
    d, rem = divmod(int(dim) - 1, h)
    d -= 2
    if h < 1 or rem or d < 1:
        raise ValueError(f"dim must be hidden*(d + 2) + 1 for some d >= 1 (hidden = {hidden}), got {dim}")
    rng = np.random.default_rng(seed)
    if activation == "tanh":
        lim = np.sqrt(6.0 / (d + h))
        W1 = rng.uniform(-lim, lim, size=(h, d))
    else:
        W1 = rng.normal(0.0, np.sqrt(2.0 / d), size=(h, d))
    lim2 = np.sqrt(6.0 / (h + 1))
    w2 = rng.uniform(-lim2, lim2, size=h)
    return np.concatenate([W1.ravel(), np.zeros(h), w2, [0.0]])


class MLP(StackedProblem):
    """Two-layer perceptron on sharded rows (targets -1/+1 for the logistic loss)."""

    name = "mlp"

    def __init__(
        self,
        shards: Shards,
        *,
        regularization: float,
        hidden: int = DEFAULT_HIDDEN,
        activation: str = "tanh",
        loss: str = "logistic",
    ):
        super().__init__(shards, regularization=regularization)
        if isinstance(hidden, bool) or not isinstance(hidden, (int, np.integer)) or hidden < 1:
            raise ValueError(f"hidden must be an integer >= 1, got {hidden!r}")
        if activation not in ACTIVATIONS:
            raise ValueError(f"activation must be one of {', '.join(ACTIVATIONS)}, got {activation!r}")
        if loss not in LOSSES:
            raise ValueError(f"loss must be one of {', '.join(LOSSES)}, got {loss!r}")
        if loss == "logistic":
            for blk in shards.blocks:
                if not np.all(np.abs(blk.y[blk.mask]) == 1.0):
                    raise ValueError("targets must be -1/+1 for the logistic loss")
        self.hidden, self.activation, self.loss = int(hidden), activation, loss

    @property
    def n_features(self) -> int:
        return self.shards.dim

    @property
    def dim(self) -> int:
        return mlp_dim(self.n_features, self.hidden)

    def unpack(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """(W1 (..., d, h), b1 (..., h), w2 (..., h), b2 (...)) from parameter vectors (..., D)."""
        x = np.asarray(x, dtype=np.float64)
        h, d = self.hidden, self.n_features
        hd = h * d
        W1 = x[..., :hd].reshape(*x.shape[:-1], h, d).swapaxes(-1, -2)
        return W1, x[..., hd : hd + h], x[..., hd + h : hd + 2 * h], x[..., -1]

    @staticmethod
    def pack(W1: np.ndarray, b1: np.ndarray, w2: np.ndarray, b2) -> np.ndarray:
        """The inverse of :meth:`unpack`."""
        W1 = np.asarray(W1, dtype=np.float64)
        lead = W1.shape[:-2]
        flat = np.ascontiguousarray(W1.swapaxes(-1, -2)).reshape(*lead, -1)
        b2 = np.asarray(b2, dtype=np.float64)[..., None]
        return np.concatenate([flat, np.asarray(b1, float), np.asarray(w2, float), b2], axis=-1)

    def default_start(self, seed: int) -> np.ndarray:
        """:func:`default_start` for this network's shape and activation."""
        return default_start(self.dim, seed, hidden=self.hidden, activation=self.activation)

    # --------------------------------------------------------------- oracle
    @property
    def _stack_width(self) -> int:
        return self.hidden

    def _pass(self, X: np.ndarray, grads: np.ndarray | None, loss: np.ndarray | None,
              weights: np.ndarray | None = None) -> None:
        """Forward and backward pass for the iterates X (B, D) or (B, n, D), every worker; ``weights``
        (B, n, m_max) replaces the per-worker 1/m_i of the gradient (the minibatch oracle)."""
        B, h, d = X.shape[0], self.hidden, self.n_features
        hd = h * d
        shared = X.ndim == 2
        Xs = stack_rows(X[..., :hd].reshape(*X.shape[:-1], h, d))
        b1, w2, b2 = X[..., hd : hd + h], X[..., hd + h : hd + 2 * h], X[..., -1]
        if shared:  # one worker axis of length 1, broadcast to each block
            b1, w2, b2 = b1[:, None], w2[:, None], b2[:, None]

        def work(blk: Block) -> None:
            nb, m = blk.nb, blk.m
            cols = slice(0, 1) if shared else slice(blk.lo, blk.hi)
            b1b = np.broadcast_to(b1[:, cols], (B, nb, h)).transpose(0, 2, 1)[..., None]  # (B, h, nb, 1)
            w2b = np.broadcast_to(w2[:, cols], (B, nb, h))
            b2b = np.broadcast_to(b2[:, cols], (B, nb))
            act = blk.forward(Xs).reshape(B, h, nb, m)
            act += b1b
            if self.activation == "tanh":
                np.tanh(act, out=act)
            else:
                np.maximum(act, 0.0, out=act)
            out = np.einsum("bhnm,bnh->bnm", act, w2b)
            out += b2b[..., None]
            if loss is not None:
                loss[:, blk.lo : blk.hi] = self._data_loss(out, blk)
            if grads is None:
                return
            r = self._residual_weights(out, blk)  # dloss/do per row, 0 on padded rows
            if weights is not None:  # the row weights take the place of 1/m_i
                r *= weights[:, blk.lo : blk.hi]
                inv = np.ones(blk.nb)
            else:
                inv = 1.0 / blk.sizes
            g = grads[:, blk.lo : blk.hi]
            g[..., hd + h : hd + 2 * h] = np.einsum("bhnm,bnm->bnh", act, r) * inv[None, :, None]
            g[..., -1] = r.sum(axis=2) * inv
            # act'(z) from act(z), in place: tanh' = 1 - tanh^2; relu' = [relu(z) > 0].
            if self.activation == "tanh":
                np.multiply(act, act, out=act)
                np.subtract(1.0, act, out=act)
            else:
                np.greater(act, 0.0, out=act)
            act *= r[:, None]
            act *= w2b.transpose(0, 2, 1)[..., None]  # now dloss/dz per unit and row
            g[..., hd : hd + h] = act.sum(axis=3).transpose(0, 2, 1) * inv[None, :, None]
            back = np.empty((B * h, nb, d))
            blk.backward(act.reshape(B * h, nb, m), back)
            g[..., :hd] = (unstack_rows(back, B) * inv[None, :, None, None]).reshape(B, nb, hd)

        self.shards.run(work)

    # ---------------------------------------------------------- model parts
    def _data_loss(self, o: np.ndarray, blk: Block) -> np.ndarray:
        """Mean loss per worker (B, nb) from the network outputs o (B, nb, m_max)."""
        if self.loss == "logistic":
            per_row = np.logaddexp(0.0, -blk.y * o)
        else:
            per_row = o - blk.y
            per_row *= per_row
            per_row *= 0.5
        per_row *= blk.mask  # padded rows have outputs too: drop them
        return per_row.sum(axis=2) / blk.sizes

    def _residual_weights(self, o: np.ndarray, blk: Block) -> np.ndarray:
        """Per-row derivative of the loss in the output, zero on padded rows; overwrites o."""
        if self.loss == "logistic":
            # d/do log(1 + e^{-y o}) = -y / (1 + e^{y o}); e^{y o} = inf gives the limit 0.
            o *= blk.y
            with np.errstate(over="ignore"):
                np.exp(o, out=o)
            o += 1.0
            np.divide(-blk.y, o, out=o)
        else:
            o -= blk.y
        o *= blk.mask
        return o

    # ---------------------------------------------------------- constants
    def smoothness_bounds(self) -> tuple[np.ndarray, float]:
        """None in closed form: the curvature grows with the weights (the probe estimates it)."""
        raise NotImplementedError("mlp: no closed-form smoothness bound; the probe estimates the constants")
