"""Compressors applied by every worker before it sends a message (docs/design.md, "Package layout").

Each compressor works on a whole ``(B, n, d)`` block (B trajectories, n workers)
with no Python loop over B or n, and returns the exact bit cost of every message.
Random numbers come from :mod:`bittune._random`: worker i of trajectory b draws
from (key_b, round, stream, element (i, j)), so a trajectory sees the same
numbers alone or inside a batch, and the server can regenerate Rand-K's index
set (its indices cost no bits).

Classes (docs/theory.md §1.1): unbiased compressors are in U(omega), E Q(x) = x and
E||Q(x) - x||^2 <= omega ||x||^2; contractive ones are in B(alpha),
E||C(x) - x||^2 <= (1 - alpha) ||x||^2. For an unbiased compressor ``alpha`` is
1/(1 + omega), the contraction of Q/(1 + omega).

Bit costs (docs/theory.md §1.2, our cost model): 32-bit floats, ceil(log2 d) bits per
index when indices depend on the data.

Correlated compressors (docs/theory.md §1.1, the "AB inequality"): PermK's workers
share one random permutation per (trajectory, round), so its messages are not
independent across workers. Such a compressor has ``correlated = True`` and
``ab = (A, B)``; it needs the worker count (``n_workers``) and compresses
blocks whose worker axis is exactly that count.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from collections.abc import Mapping
from typing import Any, ClassVar

import numpy as np

from bittune._random import STREAM, random_bits, random_words32, uniform
from bittune.errors import InputError

__all__ = [
    "Compressor", "Identity", "RandK", "TopK", "Dither", "Natural", "NaturalDither", "PermK",
    "COMPRESSORS", "parse_spec", "spec_text", "make_compressor", "PerTrajectory", "stack_compressors",
    "elias_omega_bits",
]

_FLOAT_BITS = 32  # one float32 value


def _ceil_log2(x: int) -> int:
    """ceil(log2 x) for an integer x >= 1, exact (no floating-point log)."""
    return (int(x) - 1).bit_length()


def elias_omega_bits(k) -> np.ndarray:
    """Length in bits of the Elias omega code of each integer k >= 1 (int64 array).

    The code writes k in binary, then the bit length of k minus one in binary, and so on
    down to 1, and ends with a 0 (Elias 1975, "Universal codeword sets and representations
    of the integers"; the recursive code QSGD uses, docs/theory.md §1.3): 1 -> 1 bit,
    2-3 -> 3, 4-7 -> 6, 8-15 -> 7, 16 -> 11. A loop over the recursion depth only (at most
    6 steps below 2^53), each step on the whole array. Entries k < 1 give 1.
    """
    n = np.asarray(k, dtype=np.int64)
    bits = np.ones(n.shape, dtype=np.int64)  # the closing 0
    while True:
        big = n > 1
        if not big.any():
            return bits
        width = np.frexp(n.astype(np.float64))[1].astype(np.int64)  # floor(log2 n) + 1, exact below 2^53
        bits += np.where(big, width, 0)
        n = np.where(big, width - 1, 1)


def _as_round(round_, rows: int):
    """A round for the random streams: an int, or a (rows,) int64 array of one round per trajectory."""
    if np.ndim(round_) == 0:
        return int(round_)
    r = np.asarray(round_, dtype=np.int64)
    if r.shape != (rows,):
        raise ValueError(f"round_: a scalar or one round per trajectory ({rows}), got shape {r.shape}")
    return r


class Compressor(ABC):
    """Base class. Build instances with :func:`make_compressor` (it validates)."""

    name: ClassVar[str]
    params: ClassVar[tuple[str, ...]] = ()  # names of the integer parameters, in label order
    #: True when the workers' messages are correlated (then ``ab`` holds the AB constants).
    correlated: ClassVar[bool] = False
    #: True when the constructor needs ``n_workers`` (the compressor is built for one n).
    needs_workers: ClassVar[bool] = False
    unbiased: bool
    omega: float
    alpha: float
    density: float
    nominal_bits: float

    def __init__(self, dim: int) -> None:
        self.dim = int(dim)

    def _set_unbiased(self, omega: float) -> None:
        self.unbiased = True
        self.omega = float(omega)
        self.alpha = 1.0 / (1.0 + self.omega)  # Q/(1+omega) is in B(1/(1+omega)), docs/theory.md §1.1

    def compress(
        self, v: np.ndarray, keys: np.ndarray, round_
    ) -> tuple[np.ndarray, np.ndarray]:
        """Compress every message of a ``(B, n, d)`` block at round ``round_`` (one round, or a
        (B,) array of one round per trajectory: a refilling batch, docs/design.md "The engine").

        Returns the compressed block (same shape, ``v`` untouched; float32 for a
        float32 block, else float64) and the exact bits of each message, float64
        of shape ``(B, n)``.
        """
        v = np.asarray(v)
        v = v if v.dtype == np.float32 else v.astype(np.float64, copy=False)
        keys = np.asarray(keys, dtype=np.uint64)
        if v.ndim != 3 or v.shape[2] != self.dim or keys.shape != (v.shape[0],):
            raise ValueError(
                f"{self.label()}: expected v of shape (B, n, {self.dim}) and keys of shape (B,),"
                f" got {v.shape} and {keys.shape}"
            )
        out, bits = self._apply(v, keys, _as_round(round_, keys.shape[0]))
        return out.astype(v.dtype, copy=False), bits

    @abstractmethod
    def _apply(
        self, v: np.ndarray, keys: np.ndarray, round_
    ) -> tuple[np.ndarray, np.ndarray]: ...

    def _fixed_bits(self, v: np.ndarray) -> np.ndarray:
        return np.full(v.shape[:2], float(self.nominal_bits), dtype=np.float64)

    @staticmethod
    def _draw(keys: np.ndarray, round_, v: np.ndarray) -> np.ndarray:
        """Uniforms of shape (B, n, d): worker i of trajectory b gets its own numbers."""
        return uniform(keys, round_, STREAM["compress"], v.shape[1:])

    def spec(self) -> dict[str, Any]:
        """Config form, e.g. ``{"name": "rand_k", "k": 6}``."""
        return {"name": self.name, **{p: int(getattr(self, p)) for p in self.params}}

    def label(self) -> str:
        """Short text form, e.g. ``"rand_k:6"``; :func:`parse_spec` reads it back."""
        return ":".join([self.name, *(str(getattr(self, p)) for p in self.params)])

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self.label()!r}, dim={self.dim})"


class Identity(Compressor):
    """Q(x) = x: omega = 0, a dense float32 vector (32 d bits)."""

    name = "identity"

    def __init__(self, dim: int) -> None:
        super().__init__(dim)
        self._set_unbiased(0.0)
        self.density = float(dim)
        self.nominal_bits = float(_FLOAT_BITS * dim)

    def _apply(self, v, keys, round_):
        return v.copy(), self._fixed_bits(v)


class RandK(Compressor):
    """Rand-K: Q(x) = (d/K) x_S for a uniform K-subset S; omega = d/K - 1 (docs/theory.md §1.2).

    S is the set of the K smallest of d uniforms, a uniform K-subset. It comes
    from the shared seed, so only the K values are sent: 32 K bits.
    """

    name = "rand_k"
    params = ("k",)

    def __init__(self, dim: int, k: int) -> None:
        super().__init__(dim)
        self.k = int(k)
        self._set_unbiased(dim / k - 1.0)
        self.density = float(k)
        self.nominal_bits = float(_FLOAT_BITS * k)

    def _apply(self, v, keys, round_):
        if self.k == self.dim:  # S is everything and d/K = 1
            return v.copy(), self._fixed_bits(v)
        # The K smallest of d random 32-bit words: a uniform K-subset, up to
        # ties (probability below d^2 / 2^33 per message, 2e-6 at d = 123).
        words = random_words32(keys, round_, STREAM["compress"], v.shape[1:])
        idx = np.argpartition(words, self.k - 1, axis=-1)[..., : self.k]
        out = np.zeros_like(v)
        np.put_along_axis(out, idx, np.take_along_axis(v, idx, axis=-1) * (self.dim / self.k), -1)
        return out, self._fixed_bits(v)


class TopK(Compressor):
    """Top-K: keep the K largest |x_j|; contractive with alpha = K/d (Stich, Cordonnier,
    Jaggi, "Sparsified SGD with Memory", NeurIPS 2018). Indices depend on the data:
    K (32 + ceil(log2 d)) bits."""

    name = "top_k"
    params = ("k",)

    def __init__(self, dim: int, k: int) -> None:
        super().__init__(dim)
        self.k = int(k)
        self.unbiased = False
        self.omega = math.inf
        self.alpha = k / dim
        self.density = float(k)
        self.nominal_bits = float(k * (_FLOAT_BITS + _ceil_log2(dim)))

    def _apply(self, v, keys, round_):
        idx = np.argpartition(np.abs(v), self.dim - self.k, axis=-1)[..., self.dim - self.k :]
        out = np.zeros_like(v)
        np.put_along_axis(out, idx, np.take_along_axis(v, idx, axis=-1), -1)
        return out, self._fixed_bits(v)


class Dither(Compressor):
    """Random dithering (QSGD) with s levels and the l2 norm.

    Q(x)_j = ||x|| sign(x_j) xi_j / s, xi_j in {l, l+1}, l = floor(s|x_j|/||x||),
    P(l+1) = s|x_j|/||x|| - l (unbiased). Alistarh, Grubic, Li, Tomioka, Vojnovic,
    "QSGD", NeurIPS 2017, Lemma 3.1: omega = min(d/s^2, sqrt(d)/s), expected
    nnz <= min(d, s(s + sqrt d)).

    Bits, exact per message: the encoder writes whichever of three codings is shortest
    (docs/theory.md §1.2 and §1.3), behind a prefix-free format header, then the
    32-bit norm:

    * ``0`` + Elias coding (QSGD section 3): for each non-zero in order, the Elias
      omega code of the gap to the previous non-zero (1-based position for the first),
      1 sign bit and the Elias omega code of the level xi_j >= 1 -> 33 + sum over the
      non-zeros of (omega(gap) + 1 + omega(xi));
    * ``10`` + dense fixed width: d (1 + ceil(log2(s+1))) -> 34 + that;
    * ``11`` + sparse fixed width: nnz (1 + ceil(log2 d) + ceil(log2 s)) -> 34 + that.

    So bits = min(fixed, Elias), fixed = 34 + min(dense, sparse). The decoder knows d and
    s; the transport frames each message, so no count of non-zeros is sent. A zero
    message costs 33 bits. ``nominal_bits`` (the theory rules' cost per message) is the
    fixed-width count at the expected-nnz bound: an upper bound on the mean.
    """

    name = "dither"
    params = ("levels",)

    def __init__(self, dim: int, levels: int) -> None:
        super().__init__(dim)
        s = self.levels = int(levels)
        self._set_unbiased(min(dim / s**2, math.sqrt(dim) / s))
        self.density = min(float(dim), s * (s + math.sqrt(dim)))
        self._dense_bits = dim * (1 + _ceil_log2(s + 1))
        self._bits_per_nz = 1 + _ceil_log2(dim) + _ceil_log2(s)
        # Elias omega lengths of every possible gap (1..d) and level (1..s): table lookups
        # in the round; levels above d (rare, huge s) are coded directly.
        self._omega = elias_omega_bits(np.arange(max(dim, min(s, 1 << 16)) + 1))
        self.nominal_bits = float(self._fixed_message_bits(self.density))

    def _fixed_message_bits(self, nnz):
        return _FLOAT_BITS + 2 + np.minimum(self._dense_bits, nnz * self._bits_per_nz)

    def _elias_message_bits(self, xi: np.ndarray) -> np.ndarray:
        """33 + sum over non-zeros of omega(gap) + 1 + omega(level), per message of (B, n, d)."""
        nz = xi > 0
        pos = np.arange(1, self.dim + 1, dtype=np.int64)
        last = np.maximum.accumulate(np.where(nz, pos, 0), axis=-1)  # latest non-zero at or before j
        gap = pos - np.concatenate([np.zeros(last.shape[:-1] + (1,), np.int64), last[..., :-1]], axis=-1)
        level = xi.astype(np.int64)
        lev_bits = (self._omega[level] if self.levels < self._omega.size else elias_omega_bits(level))
        per = self._omega[gap] + 1 + lev_bits
        return _FLOAT_BITS + 1 + np.sum(np.where(nz, per, 0), axis=-1)

    def _apply(self, v, keys, round_):
        s = self.levels
        a = np.abs(v)
        # ||x|| = m ||x/m|| with m = max|x_j|: no overflow for huge finite vectors.
        m = a.max(axis=-1, keepdims=True)
        ok = np.isfinite(m) & (m > 0)  # zero rows give zero; non-finite rows pass through
        scale = np.where(ok, m, 1.0)
        r = a / scale
        q = np.sqrt(np.sum(r * r, axis=-1, keepdims=True))  # ||x|| / m, in [1, sqrt d] if ok
        q = np.where(ok, q, 1.0)
        u = np.where(ok, np.minimum(s * r / q, s), 0.0)  # s|x_j|/||x||
        low = np.floor(u)
        xi = low + (self._draw(keys, round_, v) < u - low)
        with np.errstate(over="ignore"):  # only if the true value exceeds float64: inf, as it is
            out = np.where(ok, np.sign(v) * (scale * (xi * (q / s))), v)
        fixed = self._fixed_message_bits(np.count_nonzero(xi, axis=-1))
        bits = np.minimum(fixed, self._elias_message_bits(xi)).astype(np.float64)
        return out, bits


class Natural(Compressor):
    """Natural compression (Horvath, Ho, Horvath, Sahu, Canini, Richtarik, "Natural
    Compression for Distributed Deep Learning", 2019): each non-zero t is rounded at
    random to 2^a or 2^(a+1), 2^a <= |t| < 2^(a+1), P(up) = (|t| - 2^a)/2^a, sign
    kept. omega = 1/8; 9 bits per coordinate (sign + float32 exponent)."""

    name = "natural"

    def __init__(self, dim: int) -> None:
        super().__init__(dim)
        self._set_unbiased(1.0 / 8.0)
        self.density = float(dim)
        self.nominal_bits = float(9 * dim)

    def _apply(self, v, keys, round_):
        mant, expo = np.frexp(v)  # v = mant 2^expo, |mant| in [1/2, 1): 2^a = 2^(expo-1)
        p_up = 2.0 * np.abs(mant) - 1.0  # (|t| - 2^a)/2^a; 0 on exact powers of two, -1 on 0
        half_or_one = np.where(self._draw(keys, round_, v) < p_up, 1.0, 0.5)
        with np.errstate(over="ignore"):  # rounding up past the largest float64 gives inf
            out = np.ldexp(np.sign(mant) * half_or_one, expo)
        return np.where(np.isfinite(v), out, v), self._fixed_bits(v)


class NaturalDither(Compressor):
    """Natural dithering with s levels and the l2 norm (Horvath, Ho, Horvath, Sahu,
    Canini, Richtarik, "Natural Compression for Distributed Deep Learning", 2019).

    The levels are {0, 2^(1-s), ..., 1/2, 1}; u_j = |x_j|/||x|| is rounded at random
    to one of its two neighbouring levels, unbiased (P(up) = (u - low)/(high - low)),
    and Q(x)_j = ||x|| sign(x_j) level_j. Published (from memory, docs/theory.md §1.2):
    omega = 1/8 + sqrt(d) 2^(1-s) min(1, sqrt(d) 2^(1-s)); expected nnz
    <= min(d, 2^(s-1)(2^(s-1) + sqrt d)). Bits (docs/theory.md §1.2, our model, dense fixed
    width): 32 (norm) + d (1 sign + ceil(log2(s+1)) level-index bits), every message.
    """

    name = "natural_dither"
    params = ("levels",)

    def __init__(self, dim: int, levels: int) -> None:
        super().__init__(dim)
        s = self.levels = int(levels)
        self._smallest = math.ldexp(1.0, 1 - s)  # 2^(1-s); 0.0 only for s > 1075
        root = math.sqrt(dim)
        self._set_unbiased(0.125 + root * self._smallest * min(1.0, root * self._smallest))
        half = 1 << (s - 1)  # 2^(s-1), exact integer (no float overflow for large s)
        self.density = float(dim) if half * half >= dim else min(float(dim), half * (half + root))
        self.nominal_bits = float(_FLOAT_BITS + dim * (1 + _ceil_log2(s + 1)))

    def _apply(self, v, keys, round_):
        a = np.abs(v)
        # ||x|| = m ||x/m|| with m = max|x_j| (as in Dither: no overflow for huge finite x)
        m = a.max(axis=-1, keepdims=True)
        ok = np.isfinite(m) & (m > 0)  # zero rows give zero; non-finite rows pass through
        scale = np.where(ok, m, 1.0)
        r = a / scale
        q = np.sqrt(np.sum(r * r, axis=-1, keepdims=True))
        q = np.where(ok, q, 1.0)
        u = np.where(ok, np.minimum(r / q, 1.0), 0.0)  # |x_j|/||x|| in [0, 1]
        mant, expo = np.frexp(u)  # u = mant 2^expo, mant in [1/2, 1): 2^expo/2 <= u < 2^expo
        below = u < self._smallest  # between the levels 0 and 2^(1-s)
        low = np.where(below, 0.0, np.ldexp(0.5, expo))
        width = np.where(below, self._smallest, low)  # next level up: 2^(1-s), or 2 low
        level = low + width * (self._draw(keys, round_, v) < (u - low) / width)
        level = np.where(u > 0, level, 0.0)
        with np.errstate(over="ignore"):  # only if the true value exceeds float64: inf, as it is
            out = np.where(ok, np.sign(v) * (scale * (level * q)), v)
        return out, self._fixed_bits(v)


class PermK(Compressor):
    """PermK, a correlated sparsifier (Szlendak, Tyurin, Richtarik, "Permutation
    Compressors for Provably Faster Distributed Nonconvex Optimization", ICLR 2022;
    construction from memory, docs/theory.md §1.2).

    One random permutation per (trajectory, round), drawn from the trajectory key
    and the round only, so all n workers of a trajectory share it (it is the
    shared seed: no index bits are sent). Padding, when n does not divide d (or d
    does not divide n), adds phantom entries that are always zero and never sent:

    * d >= n: pad the d coordinates up to d' = q n, q = ceil(d/n), and draw a
      permutation pi of the d' padded coordinates; worker i keeps pi[q i ..
      q(i+1)-1], scaled by n, and sends only the real ones (< d) among them, 32 bits
      each: between 32 (q - (d' - d)) and 32 q bits, 32 d over the n workers
      together, 32 d/n on average. The owner of every real coordinate is uniform
      over the workers, so each worker is in U(n - 1) (equality) and the AB identity
      E||(1/n) sum_i C_i(a_i) - abar||^2 = (1/n) sum_i ||a_i||^2 - ||abar||^2 holds
      exactly (A = B = 1), padded or not.
    * d < n: pad the n workers up to n' = q d, q = ceil(n/d), with phantom workers
      (zero vectors) and draw a permutation pi of the n' padded workers; worker i
      sends the coordinate floor(pi_i/q) (0-based; docs/theory.md §1.2's ceil(pi_i/q) with
      1-based pi_i) scaled by d: always one real coordinate, 32 bits. Its coordinate
      is uniform, so each worker is in U(d - 1) (equality). Each coordinate's mean
      over the padded workers is that of q of them drawn without replacement, which
      gives, with equality, E||(1/n) sum_i C_i(a_i) - abar||^2 =
      A (1/n) sum_i ||a_i||^2 - B ||abar||^2 with B = (d - 1)/(n' - 1) and
      A = B n'/n. Without padding (d divides n) A = B = (d - 1)/(n - 1), docs/theory.md §1.2.
    """

    name = "perm_k"
    correlated = True
    needs_workers = True
    unbiased = True  # also at class level: each C_i is unbiased, whatever n is

    def __init__(self, dim: int, *, n_workers: int) -> None:
        super().__init__(dim)
        if isinstance(n_workers, (bool, np.bool_)) or not isinstance(n_workers, (int, np.integer)) \
                or n_workers < 1:
            raise ValueError(f"n_workers must be an integer >= 1, got {n_workers!r}")
        self.n_workers = int(n_workers)
        n, d = self.n_workers, self.dim
        if d >= n:
            self.block = -(-d // n)  # q padded coordinates per worker
            self.padded = self.block * n  # d', padded coordinates
            self.scale = float(n)
            self.ab = (1.0, 1.0)
            self.density = d / n
        else:
            self.block = -(-n // d)  # q padded workers per coordinate
            self.padded = self.block * d  # n', padded workers
            self.scale = float(d)
            # integer numerators and denominators: A == B exactly when n' = n
            self.ab = ((d - 1) * self.padded / (n * (self.padded - 1)), (d - 1) / (self.padded - 1))
            self.density = 1.0
        self._set_unbiased(self.scale - 1.0)
        self.nominal_bits = float(_FLOAT_BITS * self.density)

    def _apply(self, v, keys, round_):
        n, d = self.n_workers, self.dim
        if v.shape[1] != n:
            raise ValueError(f"{self.label()}: built for {n} workers, got a block of {v.shape[1]}")
        # 64-bit words: ties (probability below padded^2 / 2^65) only make the stable
        # argsort favour the lower index; the result is always a permutation.
        words = random_bits(keys, round_, STREAM["compress"], (self.padded,))
        perm = np.argsort(words, axis=-1, kind="stable")
        rank = np.empty_like(perm)  # rank[b, j] = position of entry j in the permutation
        np.put_along_axis(rank, perm, np.arange(self.padded)[None, :], axis=-1)
        if d >= n:
            owner = rank[:, :d] // self.block  # (B, d): the worker that keeps coordinate j
            mask = owner[:, None, :] == np.arange(n)[None, :, None]
        else:
            coord = rank[:, :n] // self.block  # (B, n): the coordinate worker i sends
            mask = coord[:, :, None] == np.arange(d)[None, None, :]
        with np.errstate(over="ignore"):  # only if the true value exceeds float64
            out = np.where(mask, v * self.scale, 0.0)
        bits = _FLOAT_BITS * np.count_nonzero(mask, axis=-1).astype(np.float64)
        return out, bits

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self.label()!r}, dim={self.dim}, n_workers={self.n_workers})"


class PerTrajectory:
    """One compressor per trajectory of a batch: several settings of one compressor class
    (Rand-K at different K, dithering at different levels, ...) inside one engine batch.

    ``parts`` are the distinct compressors and ``assign[b]`` the part trajectory b uses.
    :meth:`compress` hands each part the rows that use it (a loop over the distinct
    settings, never over workers or trajectories), so every trajectory gets exactly
    the values and bits it gets when its compressor runs alone. ``omega``, ``alpha``
    and ``density`` are (B,) arrays over the trajectories still in the batch;
    :meth:`keep` drops finished ones, as the methods' state does, and :meth:`append` adds the
    rows of trajectories that join a running batch (:func:`stack_compressors`).
    """

    def __init__(self, parts, assign) -> None:
        parts = list(parts)
        kinds = {(type(c), c.unbiased, c.correlated) for c in parts}
        if not parts or len(kinds) != 1:
            raise ValueError(f"PerTrajectory needs compressors of one class, got {[c.label() for c in parts]}")
        self.parts = parts
        self.assign = np.asarray(assign, dtype=np.int64).copy()
        if self.assign.ndim != 1 or (self.assign.size and (self.assign.min() < 0 or self.assign.max() >= len(parts))):
            raise ValueError(f"assign must index the {len(parts)} parts, got {assign!r}")
        first = parts[0]
        self.name, self.dim = first.name, first.dim
        self.unbiased, self.correlated = first.unbiased, first.correlated

    def _per_row(self, attr: str) -> np.ndarray:
        return np.array([getattr(c, attr) for c in self.parts], dtype=np.float64)[self.assign]

    omega = property(lambda self: self._per_row("omega"))
    alpha = property(lambda self: self._per_row("alpha"))
    density = property(lambda self: self._per_row("density"))

    def keep(self, index: np.ndarray) -> None:
        """Keep rows ``index`` of the batch (the engine drops finished trajectories)."""
        self.assign = self.assign[index]

    def append(self, other: "PerTrajectory") -> None:
        """Add the rows of ``other`` after this batch's rows (trajectories joining a running batch);
        parts with the same label are shared."""
        labels = [c.label() for c in self.parts]
        where = []
        for c in other.parts:
            if c.label() not in labels:
                if (type(c), c.unbiased, c.correlated) != (type(self.parts[0]), self.unbiased, self.correlated):
                    raise ValueError(f"PerTrajectory: cannot add {c.label()} to {self.label()} (another class)")
                self.parts.append(c)
                labels.append(c.label())
            where.append(labels.index(c.label()))
        self.assign = np.concatenate([self.assign, np.asarray(where, dtype=np.int64)[other.assign]])

    def compress(self, v: np.ndarray, keys: np.ndarray, round_) -> tuple[np.ndarray, np.ndarray]:
        if v.shape[0] != self.assign.shape[0]:
            raise ValueError(f"PerTrajectory: a block of {v.shape[0]} trajectories, {self.assign.shape[0]} assigned")
        used = np.unique(self.assign)
        if used.size == 1:
            return self.parts[int(used[0])].compress(v, keys, round_)
        out = None
        bits = np.empty(v.shape[:2], dtype=np.float64)
        per_row = np.ndim(round_) > 0
        for g in used:
            rows = np.flatnonzero(self.assign == g)
            part, bits[rows] = self.parts[int(g)].compress(v[rows], keys[rows],
                                                          np.asarray(round_)[rows] if per_row else round_)
            if out is None:  # the parts' dtype (float32 blocks stay float32)
                out = np.empty(v.shape, dtype=part.dtype)
            out[rows] = part
        return out, bits

    def label(self) -> str:
        return "+".join(c.label() for c in self.parts)


def stack_compressors(first, rows_first: int, second, rows_second: int):
    """The compressor of a batch made of ``rows_first`` trajectories compressed by ``first`` followed
    by ``rows_second`` compressed by ``second`` (a :class:`Compressor` or a :class:`PerTrajectory`):
    one of them when the other has no rows or both are the same setting, else a PerTrajectory."""
    if rows_second == 0:
        return first
    if rows_first == 0:
        return second
    if not isinstance(first, PerTrajectory) and not isinstance(second, PerTrajectory) \
            and first.label() == second.label():
        return first
    out = first if isinstance(first, PerTrajectory) else PerTrajectory([first], np.zeros(rows_first, np.int64))
    out.append(second if isinstance(second, PerTrajectory) else PerTrajectory([second], np.zeros(rows_second,
                                                                                                   np.int64)))
    return out


COMPRESSORS: dict[str, type[Compressor]] = {
    cls.name: cls for cls in (Identity, RandK, TopK, Dither, Natural, NaturalDither, PermK)
}


def _as_int(value: Any) -> int | None:
    """An integer from int, integral float or decimal text; None otherwise (bool too)."""
    if isinstance(value, (bool, np.bool_)):
        return None
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return int(value) if float(value).is_integer() else None
    if isinstance(value, str):
        try:
            return int(value.strip(), 10)
        except ValueError:
            return None
    return None


def _parse(spec: Any, key: str, dim: int | None) -> dict[str, Any]:
    known = ", ".join(sorted(COMPRESSORS))
    if isinstance(spec, str):
        name, sep, arg = spec.strip().partition(":")
        name, name_key = name.strip(), key
        raw: dict[str, Any] = {"name": name}
        cls = COMPRESSORS.get(name)
        if sep and cls is not None and not cls.params:
            raise InputError(f"{key}: {name} takes no parameter, got {spec!r}")
        if sep and cls is not None:
            raw[cls.params[0]] = arg
    elif isinstance(spec, Mapping):
        raw, name_key = dict(spec), f"{key}.name"
        if "name" not in raw:
            raise InputError(f"{name_key}: missing (one of {known})")
        name = raw["name"]
    else:
        raise InputError(
            f"{key}: must be text like 'rand_k:6' or a mapping with a 'name', got {spec!r}"
        )
    if not isinstance(name, str) or name not in COMPRESSORS:
        raise InputError(f"{name_key}: unknown compressor {name!r} (known: {known})")
    cls = COMPRESSORS[name]
    problems, out = [], {"name": name}
    for p in cls.params:
        if p not in raw:
            problems.append(f"{key}.{p}: missing ({name} needs an integer {p}, e.g. '{name}:4')")
            continue
        value = _as_int(raw[p])
        upper = dim if (p == "k" and dim is not None) else None
        if value is None or value < 1 or (upper is not None and value > upper):
            shown = raw[p] if value is None else value
            rule = f"in [1, {upper}]" if upper is not None else ">= 1"
            problems.append(f"{key}.{p}: must be an integer {rule}, got {shown!r}")
        else:
            out[p] = value
    for extra in sorted(set(raw) - {"name", *cls.params}, key=str):
        allowed = ", ".join(("name", *cls.params))
        problems.append(f"{key}.{extra}: unknown key for {name} (allowed: {allowed})")
    if problems:
        raise InputError(problems)
    return out


def parse_spec(text_or_mapping: str | Mapping[str, Any], *, key: str = "compressor") -> dict:
    """Normalise ``"rand_k:6"``, ``"natural"``, ``{"name": "top_k", "k": 3}`` ... to a dict.

    Checks the name, that each parameter is present and an integer >= 1, and
    that there are no unknown keys; errors (:class:`InputError`) name ``key``.
    The upper bound k <= d is checked by :func:`make_compressor`.
    """
    return _parse(text_or_mapping, key, None)


def spec_text(spec: Mapping[str, Any]) -> str:
    """A compressor spec as a job writes it, the inverse of :func:`parse_spec` on text: ``top_k:3``."""
    return ":".join([spec["name"], *(str(v) for k, v in spec.items() if k != "name")])


def make_compressor(
    spec: str | Mapping[str, Any], dim: int, *, key: str = "compressor", n_workers: int | None = None
) -> Compressor:
    """Validate ``spec`` for dimension ``dim`` (k in [1, dim], levels >= 1) and build it.

    ``n_workers`` is required by compressors built for one worker count
    (``needs_workers``: perm_k) and ignored by the others.
    """
    if isinstance(dim, (bool, np.bool_)) or not isinstance(dim, (int, np.integer)) or dim < 1:
        raise ValueError(f"dim must be an integer >= 1, got {dim!r}")
    params = _parse(spec, key, int(dim))
    name = params.pop("name")
    cls = COMPRESSORS[name]
    if cls.needs_workers:
        if n_workers is None:
            raise InputError(f"{key}: {name} needs the number of workers (n_workers), none was given")
        params["n_workers"] = n_workers
    return cls(int(dim), **params)
