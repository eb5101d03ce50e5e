"""Counter-based random numbers keyed by (trajectory key, round, stream, element).

Why not one ``numpy.random.Generator`` per trajectory: the engine advances B
trajectories at once and must not loop over them in Python, yet a trajectory
must draw the same numbers whether it runs alone or inside a batch (common
random numbers across trials, and the batch/alone equivalence test). A
counter-based generator gives both: every number is a pure function of its
coordinates, computed for the whole (B, n, d) block in a few vector operations.
It also models the shared-seed trick of Rand-K: the server can regenerate a
worker's index set from (key, round, worker), so indices cost no bits.

Keys come from ``numpy.random.SeedSequence`` (see :func:`trajectory_keys`).
The generator is SplitMix64 (Steele, Lea, Flood, "Fast splittable
pseudorandom number generators", OOPSLA 2014): each (key, round, stream)
seeds its own SplitMix64 sequence through a twice-mixed state.
"""

from __future__ import annotations

import numpy as np

__all__ = ["trajectory_keys", "uniform", "random_bits", "random_words32", "STREAM", "derived_keys"]

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)

#: Stream ids: one per distinct use of randomness inside a round.
STREAM = {
    "compress": 1,
    "coin": 2,
    "compress_aux": 3,
    "start": 4,
    "clients": 5,
    "minibatch": 6,
    "downlink": 7,
}


def _mix(x: np.ndarray) -> np.ndarray:
    """SplitMix64 finaliser on a uint64 array (wrapping arithmetic, in place)."""
    x ^= x >> np.uint64(30)
    x *= _M1
    x ^= x >> np.uint64(27)
    x *= _M2
    x ^= x >> np.uint64(31)
    return x


def trajectory_keys(seeds) -> np.ndarray:
    """One 64-bit key per seed, via ``SeedSequence(seed).generate_state``."""
    seeds = np.atleast_1d(np.asarray(seeds))
    keys = np.empty(seeds.shape[0], dtype=np.uint64)
    for j, s in enumerate(seeds.tolist()):
        keys[j] = np.random.SeedSequence(int(s)).generate_state(1, dtype=np.uint64)[0]
    return keys


def _counter(keys: np.ndarray, round_, stream: int) -> np.ndarray:
    """The (stream, round) counter word: shape (1,) for a scalar round, (B,) for one round per key."""
    high = (int(stream) & 0xFFFFFF) << 40
    r = np.asarray(round_)
    if r.ndim == 0:
        return np.full(1, np.uint64(high ^ (int(round_) & 0xFFFFFFFFFF)), dtype=np.uint64)
    if r.shape != keys.shape or not np.issubdtype(r.dtype, np.integer):
        raise ValueError(f"round_: a scalar or one integer per key {keys.shape}, got {r.dtype} {r.shape}")
    return (r.astype(np.int64) & 0xFFFFFFFFFF).astype(np.uint64) ^ np.uint64(high)


def random_bits(keys: np.ndarray, round_, stream: int, shape: tuple[int, ...]) -> np.ndarray:
    """Random uint64 words, shape ``(len(keys), *shape)``.

    For each (key, round, stream) a well-mixed 64-bit state ``head`` is made;
    element i is then output i of the SplitMix64 generator seeded with
    ``head``: ``mix(head + (i + 1) * golden)``. Element (b, *idx) depends only
    on ``keys[b]``, ``round_``, ``stream`` and the flat index of ``idx``, so a
    trajectory sees the same numbers whatever batch it is in. ``round_`` is one
    round for every key, or a (B,) integer array of one round per key (a refilling
    batch, where rows that joined later are at earlier rounds; docs/design.md, "The engine").
    """
    keys = np.asarray(keys, dtype=np.uint64)
    size = int(np.prod(shape, dtype=np.int64))
    with np.errstate(over="ignore"):
        head = _mix(_mix(keys ^ _mix(_counter(keys, round_, stream))) + _GOLDEN)
        steps = np.arange(1, size + 1, dtype=np.uint64)
        steps *= _GOLDEN
        x = head[:, None] + steps[None, :]
        x = _mix(x)
    return x.reshape((keys.shape[0],) + tuple(shape))


def random_words32(keys: np.ndarray, round_, stream: int, shape: tuple[int, ...]) -> np.ndarray:
    """Random uint32 words, shape ``(len(keys), *shape)``: both halves of each
    64-bit output of :func:`random_bits` (half the hashing work)."""
    size = int(np.prod(shape, dtype=np.int64))
    x = random_bits(keys, round_, stream, ((size + 1) // 2,))
    words = x.view(np.uint32)[:, :size]
    return words.reshape((x.shape[0],) + tuple(shape))


def uniform(keys: np.ndarray, round_, stream: int, shape: tuple[int, ...]) -> np.ndarray:
    """Uniform floats in [0, 1) (53 random bits each), shape ``(len(keys), *shape)``."""
    x = random_bits(keys, round_, stream, shape)
    x >>= np.uint64(11)
    out = x.astype(np.float64)
    out *= 1.0 / 9007199254740992.0  # 2^-53
    return out


def derived_keys(keys: np.ndarray, stream: int) -> np.ndarray:
    """Keys of a second, independent party of the same trajectories (the server's downlink
    compressor): the SplitMix64 finaliser of key XOR a stream constant."""
    return _mix(np.asarray(keys, dtype=np.uint64) ^ np.uint64((0x9E3779B97F4A7C15 * stream) % 2**64))
