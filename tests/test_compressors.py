"""Conformance suite: every compressor passes the same checks (DEVELOPERS.md, "Code habits": one conformance suite).

Reference values are the published constants (docs/theory.md §1.2), recomputed here
independently of the module; each check names its source.

Statistical checks: every assertion has a false-alarm rate of at most 1e-6
(common practice, no source), with Bonferroni over coordinates where several
are tested at once. Normal approximations are justified by >= 1e4 samples.
"""

from __future__ import annotations

import functools
import math

import numpy as np
import pytest
from scipy.stats import norm

from bittune._random import trajectory_keys
from bittune.compressors import COMPRESSORS, Compressor, make_compressor, parse_spec, spec_text
from bittune.errors import InputError

D, N, B = 40, 3, 2  # dimension, workers, trajectories of the small conformance blocks
SETTINGS = [
    "identity", "rand_k:1", "rand_k:7", f"rand_k:{D}", "top_k:1", "top_k:7",
    "dither:1", "dither:4", "natural", "natural_dither:1", "natural_dither:3", "perm_k",
]
UNBIASED = [s for s in SETTINGS if not s.startswith("top_k")]
RANDOMISED = ["rand_k:1", "rand_k:7", "dither:1", "dither:4", "natural", "natural_dither:1",
              "natural_dither:3", "perm_k"]


def name_of(label: str) -> str:
    """The compressor name of a label ("natural_dither:3" -> "natural_dither")."""
    return label.partition(":")[0]


def build(label, d: int = D, n: int = N) -> Compressor:
    """make_compressor for n workers (only perm_k uses the worker count)."""
    return make_compressor(label, d, n_workers=n)

FALSE_ALARM = 1e-6
Z_ONE = float(norm.isf(FALSE_ALARM))  # one-sided z quantile


def z_two(m: int) -> float:
    """Two-sided z quantile, Bonferroni over m simultaneous tests."""
    return float(norm.isf(FALSE_ALARM / (2 * m)))


def published(label: str, d: int, n: int = N) -> dict:
    """Constants of docs/theory.md §1.2, written out here (not read from the module)."""
    name, _, arg = label.partition(":")
    b_ix = math.ceil(math.log2(d))
    if name == "perm_k":  # Szlendak et al. 2022 (from memory): U(n-1), d/n floats (d >= n); U(d-1), 1 float
        omega, density = (n - 1, d / n) if d >= n else (d - 1, 1.0)
        return dict(unbiased=True, omega=omega, alpha=1 / (1 + omega), density=density, bits=32 * density)
    if name == "natural_dither":  # Horvath et al. 2019, published omega (from memory); bits docs/theory.md §1.2
        s = int(arg)
        t = 2.0 ** (1 - s)
        omega = 1 / 8 + math.sqrt(d) * t * min(1, math.sqrt(d) * t)
        density = min(d, 2 ** (s - 1) * (2 ** (s - 1) + math.sqrt(d)))
        return dict(unbiased=True, omega=omega, alpha=1 / (1 + omega), density=density,
                    bits=32 + d * (1 + math.ceil(math.log2(s + 1))))
    if name == "identity":
        return dict(unbiased=True, omega=0.0, alpha=1.0, density=d, bits=32 * d)
    if name == "natural":  # Horvath et al. 2019: second moment 9/8; 9 bits per float32
        return dict(unbiased=True, omega=1 / 8, alpha=8 / 9, density=d, bits=9 * d)
    p = int(arg)
    if name == "rand_k":  # omega = d/K - 1 (restated in MARINA, Gorbunov et al. 2021)
        omega = d / p - 1
        return dict(unbiased=True, omega=omega, alpha=1 / (1 + omega), density=p, bits=32 * p)
    if name == "top_k":  # alpha = K/d (Stich, Cordonnier, Jaggi 2018); data-dependent indices
        return dict(unbiased=False, omega=math.inf, alpha=p / d, density=p, bits=p * (32 + b_ix))
    # dither: Alistarh et al. 2017 (QSGD), Lemma 3.1 (i) and (iii); bit model docs/theory.md §1.2
    omega = min(d / p**2, math.sqrt(d) / p)
    density = min(d, p * (p + math.sqrt(d)))
    # nominal: the fixed-width count (header "10"/"11" + norm) at the nnz bound
    dense = d * (1 + math.ceil(math.log2(p + 1)))
    bits = 34 + min(dense, density * (1 + b_ix + math.ceil(math.log2(p))))
    return dict(unbiased=True, omega=omega, alpha=1 / (1 + omega), density=density, bits=bits)


def omega_code(k: int) -> str:
    """The Elias omega code word of k >= 1 as a string of 0/1 (Elias 1975, "Universal
    codeword sets and representations of the integers"; the algorithm from memory:
    start with "0"; while k > 1, put binary(k) in front and let k = len(binary(k)) - 1)."""
    code = "0"
    while k > 1:
        b = format(k, "b")
        code, k = b + code, len(b) - 1
    return code


def dither_message(levels, d: int, s: int) -> str:
    """One dithered message written out bit by bit ("n" norm bits, "s" sign bits), the
    shortest of the three codings of docs/theory.md §1.2-§1.3 (QSGD's Elias coding, dense
    and sparse fixed width), each behind its prefix-free header 0 / 10 / 11."""
    norm_bits = "n" * 32
    nz = [(j + 1, int(lv)) for j, lv in enumerate(levels) if lv]
    elias, prev = "0" + norm_bits, 0
    for j, lv in nz:
        elias += omega_code(j - prev) + "s" + omega_code(lv)
        prev = j
    width = math.ceil(math.log2(s + 1))
    dense = "10" + norm_bits + "".join("s" + format(int(lv), f"0{width}b") for lv in levels)
    b_ix, b_lv = math.ceil(math.log2(d)), math.ceil(math.log2(s))
    sparse = "11" + norm_bits + "".join("s" + format(j - 1, f"0{b_ix}b") + (format(lv - 1, f"0{b_lv}b") if b_lv
                                                                             else "") for j, lv in nz)
    return min((elias, dense, sparse), key=len)


def dither_bits(v: np.ndarray, out: np.ndarray, s: int) -> np.ndarray:
    """Bits of every message of a block, each written out by :func:`dither_message`; the
    levels are recovered from the output, xi_j = s |Q(x)_j| / ||x|| (rounded: the division
    is off by a few ulps)."""
    got = np.empty(v.shape[:2])
    for b in range(v.shape[0]):
        for i in range(v.shape[1]):
            nrm = np.linalg.norm(v[b, i])
            levels = np.rint(s * np.abs(out[b, i]) / nrm) if nrm > 0 else np.zeros(v.shape[2])
            got[b, i] = len(dither_message(levels, v.shape[2], s))
    return got


def block(seed: int, shape=(B, N, D)) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return rng.standard_normal(shape) * rng.lognormal(0.0, 1.0, size=shape[:2] + (1,))


KEYS = trajectory_keys([11, 12])


# ----------------------------------------------------------------------------- contract


def test_registry_names():
    assert set(COMPRESSORS) == {"identity", "rand_k", "top_k", "dither", "natural", "natural_dither", "perm_k"}
    for name, cls in COMPRESSORS.items():
        assert cls.name == name and issubclass(cls, Compressor)


@pytest.mark.parametrize("label", SETTINGS)
def test_attributes_match_published(label):
    c = build(label)
    want = published(label, D)
    assert c.name == label.partition(":")[0] and c.dim == D
    assert c.correlated is (label == "perm_k")
    assert c.unbiased is want["unbiased"]
    # rtol 1e-14: the same closed forms, evaluated in a different order
    for field in ("omega", "alpha", "density"):
        assert getattr(c, field) == pytest.approx(want[field], rel=1e-14), field
    assert c.nominal_bits == pytest.approx(want["bits"], rel=1e-14)
    assert c.label() == label
    assert parse_spec(c.label()) == c.spec()
    assert build(c.spec()).label() == label


@pytest.mark.parametrize("label", SETTINGS)
def test_shape_dtype_and_input_untouched(label):
    c = build(label)
    v = block(1)
    before = v.copy()
    out, bits = c.compress(v, KEYS, 3)
    assert out.shape == (B, N, D) and out.dtype == np.float64
    assert bits.shape == (B, N) and bits.dtype == np.float64
    np.testing.assert_array_equal(v, before)
    with pytest.raises(ValueError):
        c.compress(v[:, :, :-1], KEYS, 3)


@pytest.mark.parametrize("label", SETTINGS)
def test_deterministic_given_keys_and_round(label):
    c = build(label)
    v = block(2)
    out1, bits1 = c.compress(v, KEYS, 7)
    out2, bits2 = c.compress(v, KEYS, 7)
    np.testing.assert_array_equal(out1, out2)
    np.testing.assert_array_equal(bits1, bits2)
    if label in RANDOMISED:  # another round or another key draws other numbers
        assert not np.array_equal(c.compress(v, KEYS, 8)[0], out1)
        assert not np.array_equal(c.compress(v, KEYS[::-1], 7)[0], out1)


@pytest.mark.parametrize("label", SETTINGS)
def test_alone_equals_batch(label):
    c = build(label)
    v = block(3)
    out, bits = c.compress(v, KEYS, 5)
    alone, alone_bits = c.compress(v[1:2], KEYS[1:2], 5)
    np.testing.assert_array_equal(alone[0], out[1])
    np.testing.assert_array_equal(alone_bits[0], bits[1])


@pytest.mark.parametrize("label", SETTINGS)
def test_workers_independent_of_each_others_data(label):
    """Zero, inf and nan in one message: no warning, other messages unchanged."""
    c = build(label)
    v = block(4)
    ref, ref_bits = c.compress(v, KEYS, 2)
    w = v.copy()
    w[0, 0] = 0.0
    w[0, 1, 5] = np.inf
    w[1, 2, 7] = np.nan
    out, bits = c.compress(w, KEYS, 2)
    np.testing.assert_array_equal(out[0, 0], 0.0)  # zero in, zero out
    np.testing.assert_array_equal(out[1, :2], ref[1, :2])
    np.testing.assert_array_equal(bits[1, :2], ref_bits[1, :2])
    if name_of(label) == "dither":  # zero message: norm + flag only (docs/theory.md §1.2)
        assert bits[0, 0] == 33.0


@pytest.mark.parametrize("label", SETTINGS)
def test_scale_equivariance_without_overflow(label):
    """Q(2^900 x) = 2^900 Q(x) exactly with the same random numbers (every definition
    in docs/theory.md §1.2 is positively homogeneous; powers of two scale floats exactly).
    Catches a norm computed as sqrt(sum x^2), which overflows here."""
    c = build(label)
    v = block(5)
    out, bits = c.compress(v, KEYS, 4)
    big, big_bits = c.compress(v * 2.0**900, KEYS, 4)
    assert np.all(np.isfinite(big))
    np.testing.assert_array_equal(big, out * 2.0**900)
    np.testing.assert_array_equal(big_bits, bits)


# ----------------------------------------------------------------------------- bits and nnz


@pytest.mark.parametrize("label", SETTINGS)
def test_bits_match_formula(label):
    c = build(label)
    want = published(label, D)
    for round_ in range(5):
        out, bits = c.compress(block(10 + round_), KEYS, round_)
        if name_of(label) == "dither":
            s = int(label.partition(":")[2])
            expected = dither_bits(block(10 + round_), out, s)
        elif name_of(label) == "perm_k":  # 32 bits per kept real coordinate, 32 d over the n workers
            expected = 32.0 * np.count_nonzero(out, axis=-1)
            np.testing.assert_array_equal(bits.sum(axis=1), 32.0 * D)
        else:
            expected = np.full((B, N), want["bits"])
        np.testing.assert_array_equal(bits, expected)


@pytest.mark.parametrize(
    "d, s, x, nnz, bits",
    [
        # Elias omega lengths used below (Elias 1975; from memory): 1 -> "0" (1 bit),
        # 3 -> "11 0" (3), 4 -> "10 100 0" (6), 8 -> "11 1000 0" (7),
        # 1000 -> "11 1001 1111101000 0" (17). Header: 0 Elias, 10 dense, 11 sparse.
        # ||x|| = 4, s|x_j|/||x|| = 1 for all j: every level is 1, Q(x) = x, nnz = 16.
        # Elias: 16 x (gap 1: 1 + sign 1 + level 1: 1) = 48 -> 1 + 32 + 48 = 81;
        # fixed: dense 16 (1 + ceil log2 5) = 64 < sparse 16 (1 + 4 + 2) = 112 -> 2 + 32 + 64 = 98
        (16, 4, np.ones(16), 16, 81),
        # ||x|| = 5, levels 3 and 4 at positions 1 and 2: Elias (1 + 1 + 3) + (1 + 1 + 6) = 13
        # -> 33 + 13 = 46; fixed: sparse 2 (1 + 4 + 3) = 16 < dense 10 (1 + 3) = 40 -> 34 + 16 = 50
        (10, 5, np.r_[3.0, -4.0, np.zeros(8)], 2, 46),
        # s = 1, level 1 at position 3: Elias gap 3 (3) + sign (1) + level 1 (1) = 5 -> 38;
        # fixed: sparse 1 (1 + 4 + 0) = 5 < dense 10 (1 + 1) = 20 -> 34 + 5 = 39
        (10, 1, np.r_[0.0, 0.0, -2.5, np.zeros(7)], 1, 38),
        # ||x|| = 16, s = 16: every level is 8. Elias 4 x (1 + 1 + 7) = 36 -> 69; fixed dense
        # 4 (1 + ceil log2 17) = 24 < sparse 4 (1 + 2 + 4) = 28 -> 34 + 24 = 58: fixed wins
        (4, 16, np.full(4, 8.0), 4, 58),
        # one non-zero at position 1000 of d = 1000, s = 1: Elias 17 + 1 + 1 = 19 -> 52;
        # fixed sparse 1 (1 + 10 + 0) = 11 < dense 1000 (1 + 1) -> 34 + 11 = 45: fixed wins
        (1000, 1, np.r_[np.zeros(999), 7.0], 1, 45),
        # zero vector: header 0 and the norm, no non-zero: 33 (fixed would be 34)
        (10, 5, np.zeros(10), 0, 33),
    ],
)
def test_dither_bits_hand_computed(d, s, x, nnz, bits):
    c = make_compressor({"name": "dither", "levels": s}, d)
    v = np.broadcast_to(x, (B, N, d))
    out, got = c.compress(v, KEYS, 1)
    # the levels are hit exactly, so Q(x) = x up to one rounding per operation
    np.testing.assert_allclose(out, v, rtol=1e-15, atol=0)
    assert np.all(np.count_nonzero(out, axis=-1) == nnz)
    np.testing.assert_array_equal(got, np.full((B, N), float(bits)))
    assert dither_bits(v[:1, :1], out[:1, :1], s)[0, 0] == bits  # the bit-by-bit writer agrees


@pytest.mark.parametrize("label", SETTINGS)
def test_nnz_within_density(label):
    """Every message: rand_k / top_k have nnz = K (no zero in the input), dense ones
    keep the support of x, dithering never adds a non-zero. The dither density is a
    bound on the mean only: see test_dither_mean_nnz."""
    c = build(label)
    for round_ in range(10):
        v = block(20 + round_)
        nnz = np.count_nonzero(c.compress(v, KEYS, round_)[0], axis=-1)
        if label.startswith(("rand_k", "top_k")):
            assert np.all(nnz == published(label, D)["density"])
        elif name_of(label) == "perm_k":  # d >= n: ceil(d/n) padded slots per worker; the n cover d
            assert np.all(nnz <= math.ceil(D / N)) and np.all(nnz.sum(axis=1) == D)
        elif name_of(label) in ("dither", "natural_dither"):
            assert np.all(nnz <= np.count_nonzero(v, axis=-1))
        else:
            np.testing.assert_array_equal(nnz, np.count_nonzero(v, axis=-1))
            assert np.all(nnz <= c.density)


# ----------------------------------------------------------------------------- Monte Carlo

MC_KEYS, MC_WORKERS, MC_ROUNDS = 200, 10, 50  # 1e5 messages, 1e4 worker averages


def mc_vector(kind: str) -> np.ndarray:
    rng = np.random.default_rng(123)
    if kind == "worst_natural":  # |x_j| = (4/3) 2^k: natural compression's worst case
        return rng.choice([-1.0, 1.0], D) * (4 / 3) * 2.0 ** rng.integers(-8, 9, D)
    x = rng.standard_normal(D)
    x[0], x[1], x[2] = 0.0, 6.0, 2.0**-3  # a zero, a spike and an exact power of two
    return x


@functools.lru_cache(maxsize=None)
def monte_carlo(label: str, kind: str = "gauss") -> dict:
    """Statistics of Q(x) for one fixed x over (trajectory, worker, round) draws."""
    c = build(label, D, MC_WORKERS)
    x = mc_vector(kind)
    keys = trajectory_keys(np.arange(1000, 1000 + MC_KEYS))
    v = np.broadcast_to(x, (MC_KEYS, MC_WORKERS, D))
    total = np.zeros(D)
    ratio, avg_ratio, nnz = [], [], []
    for round_ in range(MC_ROUNDS):
        q, _ = c.compress(v, keys, round_)
        total += q.sum(axis=(0, 1))
        ratio.append((np.sum((q - x) ** 2, axis=-1) / (x @ x)).ravel())
        avg_ratio.append(np.sum((q.mean(axis=1) - x) ** 2, axis=-1) / (x @ x))
        nnz.append(np.count_nonzero(q, axis=-1).ravel())
    ratio, avg_ratio, nnz = (np.concatenate(a) for a in (ratio, avg_ratio, nnz))
    count = MC_KEYS * MC_WORKERS * MC_ROUNDS

    def stats(a):
        return float(a.mean()), float(a.std(ddof=1) / math.sqrt(a.size))

    return dict(x=x, count=count, mean=total / count, ratio=stats(ratio),
                avg_ratio=stats(avg_ratio), nnz=stats(nnz))


def natural_levels(x: np.ndarray, s: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The two natural-dithering levels around u_j = |x_j|/||x|| (Horvath et al. 2019):
    0 and 2^(1-s) below 2^(1-s), else 2^a <= u_j < 2^(a+1) (2^a = u_j on a level)."""
    u = np.abs(x) / np.linalg.norm(x, axis=-1, keepdims=True)
    t = 2.0 ** (1 - s)
    low = np.where(u < t, 0.0, 2.0 ** np.floor(np.log2(np.maximum(u, t))))
    high = np.where(u < t, t, 2 * low)
    return u, low, high


def exact_coordinate_variance(label: str, x: np.ndarray) -> np.ndarray:
    """Var Q(x)_j: exact for identity, rand_k, dither, natural_dither, perm_k (MC_WORKERS
    workers); an upper bound for natural."""
    name, _, arg = label.partition(":")
    if name == "identity":
        return np.zeros_like(x)
    if name == "perm_k":  # n x_j with probability 1/n, else 0 (d >= n)
        return x**2 * (MC_WORKERS - 1)
    if name == "natural_dither":  # ||x||^2 (u - low)(high - u), randomised rounding between levels
        u, low, high = natural_levels(x, int(arg))
        return (x @ x) * (u - low) * (high - u)
    if name == "rand_k":  # (d/K) x_j with probability K/d, else 0
        return x**2 * (D / int(arg) - 1)
    if name == "dither":  # (||x||/s)^2 (u - l)(l + 1 - u), docs/theory.md §1.2 derivation notes
        s = int(arg)
        u = s * np.abs(x) / np.linalg.norm(x)
        low = np.floor(u)
        return (np.linalg.norm(x) / s) ** 2 * (u - low) * (low + 1 - u)
    return x**2 / 8  # natural: per coordinate E Q_j^2 <= (9/8) x_j^2 (Horvath et al. 2019)


def exact_variance_ratio(label: str, x: np.ndarray) -> float:
    return float(exact_coordinate_variance(label, x).sum() / (x @ x))


@pytest.mark.parametrize("label", UNBIASED)
def test_unbiased_mean(label):
    """E Q(x) = x: z-test per coordinate with the known variance, Bonferroni over d."""
    mc = monte_carlo(label)
    x = mc["x"]
    se = np.sqrt(exact_coordinate_variance(label, x) / mc["count"])
    # atol: pairwise summation of 1e5 terms, error ~ log2(1e5) eps relative
    atol = 1e-12 * np.abs(x).max()
    assert np.all(np.abs(mc["mean"] - x) <= z_two(D) * se + atol)


@pytest.mark.parametrize("label", UNBIASED)
def test_variance_within_omega(label):
    """E||Q(x) - x||^2 / ||x||^2 <= omega (published), and equal to the exact value where known."""
    mc = monte_carlo(label)
    mean, se = mc["ratio"]
    want = published(label, D, MC_WORKERS)["omega"]
    assert mean <= want + Z_ONE * se + 1e-12
    if name_of(label) != "natural":
        exact = exact_variance_ratio(label, mc["x"])
        # Rand-K: omega = d/K - 1, PermK: omega = n - 1, with equality for every x (docs/theory.md §1.2)
        if name_of(label) in ("rand_k", "perm_k"):
            assert exact == pytest.approx(want, rel=1e-12)
        # dithering: sharper derived bound min(d/(4 s^2), sqrt(d)/s) (docs/theory.md §1.2, DER)
        if label.startswith("dither"):
            s = int(label.partition(":")[2])
            assert exact <= min(D / (4 * s**2), math.sqrt(D) / s)
        assert abs(mean - exact) <= z_two(1) * se + 1e-12


@pytest.mark.parametrize("label", UNBIASED)
def test_workers_draw_independently(label):
    """Independent Q_i in U(omega): E||mean_i Q_i(x) - x||^2 = (1/n) E||Q(x) - x||^2
    (docs/theory.md §1.1, A = omega/n). Shared draws across workers would give n times more.
    PermK is correlated on purpose: with one x for all workers, the kept sets partition
    the coordinates and the mean is x itself (AB identity with a_i = x: 0, docs/theory.md §1.2)."""
    mc = monte_carlo(label)
    mean, se = mc["avg_ratio"]
    if label == "perm_k":
        # (n x_j)/n in floating point: a relative rounding error of about 1e-16 per coordinate
        assert mean <= 1e-28
        return
    assert mean <= published(label, D)["omega"] / MC_WORKERS + Z_ONE * se + 1e-12
    if name_of(label) != "natural":
        exact = exact_variance_ratio(label, mc["x"]) / MC_WORKERS
        assert abs(mean - exact) <= z_two(1) * se + 1e-12


def test_natural_worst_case_attains_one_eighth():
    """|x_j| = (4/3) 2^k: P(up) = 1/3, Var = 4^k (2/9) = x_j^2 / 8 (docs/theory.md §1.2, DER)."""
    mc = monte_carlo("natural", "worst_natural")
    mean, se = mc["ratio"]
    assert abs(mean - 1 / 8) <= z_two(1) * se


@pytest.mark.parametrize("label", ["dither:1", "dither:4"])
def test_dither_mean_nnz(label):
    """E nnz = sum_j min(1, u_j) (a level >= 1 is never rounded to 0; below 1 it is
    non-zero with probability u_j) and <= min(d, s(s + sqrt d)) (QSGD Lemma 3.1 (iii))."""
    mc = monte_carlo(label)
    mean, se = mc["nnz"]
    s = int(label.partition(":")[2])
    x = mc["x"]
    exact = float(np.minimum(1.0, s * np.abs(x) / np.linalg.norm(x)).sum())
    assert mean <= published(label, D)["density"] + Z_ONE * se
    assert abs(mean - exact) <= z_two(1) * se


@pytest.mark.parametrize("label", ["natural_dither:1", "natural_dither:3"])
def test_natural_dither_mean_nnz(label):
    """E nnz = #{u_j >= 2^(1-s)} + sum over the others of u_j / 2^(1-s) (rounded up to the
    smallest level with that probability), <= min(d, 2^(s-1)(2^(s-1) + sqrt d)) (docs/theory.md §1.2)."""
    mc = monte_carlo(label)
    mean, se = mc["nnz"]
    s = int(label.partition(":")[2])
    u, low, high = natural_levels(mc["x"], s)
    exact = float(np.where(low > 0, 1.0, u / high).sum())
    assert mean <= published(label, D)["density"] + Z_ONE * se
    assert abs(mean - exact) <= z_two(1) * se


@pytest.mark.parametrize("s", [1, 3, 8])
def test_natural_dither_outputs_neighbouring_levels(s):
    """|Q(x)_j| / ||x|| is one of the two levels around |x_j|/||x|| (Horvath et al. 2019),
    the sign is kept, and x on the levels is reproduced."""
    c = make_compressor(f"natural_dither:{s}", D)
    v = block(30)
    norms = np.linalg.norm(v, axis=-1, keepdims=True)
    for round_ in range(10):
        out, _ = c.compress(v, KEYS, round_)
        level = np.abs(out) / norms
        _, low, high = natural_levels(v, s)
        # rtol 1e-14: ||x|| is computed as max|x_j| * ||x / max|x_j|||, a few roundings apart
        assert np.all(np.isclose(level, low, rtol=1e-14, atol=0) | np.isclose(level, high, rtol=1e-14))
        assert np.all((np.sign(out) == np.sign(v)) | (out == 0))
    on_levels = np.zeros((B, N, D))
    on_levels[..., :4] = [0.5, -0.5, 0.5, 0.5]  # ||x|| = 1, every u_j = 1/2, a level for s >= 2
    if s >= 2:
        np.testing.assert_allclose(c.compress(on_levels, KEYS, 0)[0], on_levels, rtol=1e-15, atol=0)


# ----------------------------------------------------------------------------- Top-K, natural


@pytest.mark.parametrize("k", [1, 7, D])
def test_top_k_contraction_and_selection(k):
    c = make_compressor(f"top_k:{k}", D)
    rng = np.random.default_rng(7)
    v = np.concatenate([rng.standard_normal((20, N, D)), rng.standard_cauchy((20, N, D))])
    keys = trajectory_keys(np.arange(v.shape[0]))
    out, _ = c.compress(v, keys, 0)
    err = np.sum((out - v) ** 2, axis=-1)
    # deterministic bound ||C(x) - x||^2 <= (1 - K/d)||x||^2; rtol 1e-12 for rounding of sums
    assert np.all(err <= (1 - k / D) * np.sum(v**2, axis=-1) * (1 + 1e-12))
    kept = out != 0
    np.testing.assert_array_equal(out[kept], v[kept])  # values are copied, not scaled
    np.testing.assert_array_equal(  # exactly the K largest magnitudes (numpy sort as reference)
        np.sort(np.abs(out), axis=-1)[..., D - k :], np.sort(np.abs(v), axis=-1)[..., D - k :]
    )


def test_top_k_ties_keep_exactly_k_and_attain_the_bound():
    c = make_compressor("top_k:7", D)
    rng = np.random.default_rng(8)
    v = rng.choice([-2.0, 2.0], size=(B, N, D))  # all magnitudes tie
    out, _ = c.compress(v, KEYS, 0)
    assert np.all(np.count_nonzero(out, axis=-1) == 7)
    err = np.sum((out - v) ** 2, axis=-1)
    np.testing.assert_allclose(err, (1 - 7 / D) * 4.0 * D, rtol=1e-15)  # equality case


def test_natural_outputs_signed_powers_of_two():
    c = make_compressor("natural", D)
    rng = np.random.default_rng(9)
    v = rng.standard_normal((B, N, D)) * 2.0 ** rng.integers(-60, 61, (B, N, D))
    v[0, 0, :5] = 0.0
    for round_ in range(20):
        out, _ = c.compress(v, KEYS, round_)
        np.testing.assert_array_equal(out == 0, v == 0)
        np.testing.assert_array_equal(np.sign(out), np.sign(v))
        mant, expo = np.frexp(out[v != 0])
        assert np.all(np.abs(mant) == 0.5)  # a power of two
        # 2^a <= |x| < 2^(a+1) and out in {2^a, 2^(a+1)}: frexp exponent grows by 0 or 1
        assert np.all(np.isin(expo - np.frexp(v[v != 0])[1], [0, 1]))


def test_natural_is_identity_on_powers_of_two():
    c = make_compressor("natural", D)
    rng = np.random.default_rng(10)
    v = rng.choice([-1.0, 1.0], (B, N, D)) * 2.0 ** rng.integers(-1070, 1000, (B, N, D))
    for round_ in range(20):
        np.testing.assert_array_equal(c.compress(v, KEYS, round_)[0], v)


# ----------------------------------------------------------------------------- PermK

# (d, n): n divides d; d padded (13 = 3*5 - 2); n = d; d divides n; n padded (7 workers, d = 3 -> 9).
PERM_CASES = [(12, 3), (13, 3), (5, 5), (3, 6), (3, 7)]


def perm_ab(d: int, n: int) -> tuple[float, float]:
    """AB constants of PermK, written out here. d >= n: A = B = 1 (docs/theory.md §1.2, DER + MC);
    d < n with d | n: A = B = (d-1)/(n-1) (docs/theory.md §1.2, DER + MC); d < n otherwise: pad the
    workers to n' = d ceil(n/d) with zero vectors, apply the d | n' identity to them and rescale
    by n'/n: B = (d-1)/(n'-1), A = B n'/n (derived here, checked by the Monte Carlo below)."""
    if d >= n:
        return 1.0, 1.0
    padded = d * math.ceil(n / d)
    b = (d - 1) / (padded - 1)
    return b * padded / n, b


def perm_draws(d: int, n: int, a: np.ndarray, *, keys: int, rounds: int) -> np.ndarray:
    """C_i(a_i) of PermK for ``keys`` trajectories x ``rounds`` rounds: (keys*rounds, n, d)."""
    c = build("perm_k", d, n)
    ks = trajectory_keys(np.arange(5000, 5000 + keys))
    v = np.broadcast_to(a, (keys, n, d))
    return np.concatenate([c.compress(v, ks, r)[0] for r in range(rounds)])


@pytest.mark.parametrize("d,n", PERM_CASES)
def test_perm_k_ab_identity(d, n):
    """E||(1/n) sum_i C_i(a_i) - abar||^2 = A (1/n) sum_i ||a_i||^2 - B ||abar||^2 with equality
    (Szlendak, Tyurin, Richtarik 2022; docs/theory.md §1.2). Two-sided z-test with the sample
    standard error of 2e4 draws, false alarm 1e-6 per case (z = 4.9)."""
    c = build("perm_k", d, n)
    A, B = perm_ab(d, n)
    assert c.ab == pytest.approx((A, B), rel=1e-14)  # the same closed forms
    assert A >= B >= 0
    rng = np.random.default_rng(40 + d + n)
    a = rng.standard_normal((n, d)) + rng.standard_normal(d)  # a shared part: abar != 0
    abar = a.mean(axis=0)
    exact = A * np.mean(np.sum(a * a, axis=1)) - B * (abar @ abar)
    out = perm_draws(d, n, a, keys=2000, rounds=10)
    err = np.sum((out.mean(axis=1) - abar) ** 2, axis=-1)
    se = err.std(ddof=1) / math.sqrt(err.size)
    assert abs(err.mean() - exact) <= z_two(1) * se


@pytest.mark.parametrize("d,n", PERM_CASES)
def test_perm_k_each_worker_unbiased_with_omega_equality(d, n):
    """E C_i(x) = x for every worker (z-test per coordinate and worker with the exact variance
    (s - 1) x_j^2, s = n or d the scale; Bonferroni over n d), and E||C_i(x) - x||^2 =
    omega ||x||^2 with omega = s - 1 (docs/theory.md §1.2: U(n-1), or U(d-1) when n >= d)."""
    c = build("perm_k", d, n)
    scale = n if d >= n else d
    assert c.omega == scale - 1 and c.unbiased
    rng = np.random.default_rng(60 + d + n)
    x = rng.standard_normal(d)
    out = perm_draws(d, n, np.broadcast_to(x, (n, d)), keys=2000, rounds=10)
    se = np.sqrt((scale - 1) * x**2 / out.shape[0])
    # atol: rounding of sums of 2e4 terms
    assert np.all(np.abs(out.mean(axis=0) - x) <= z_two(n * d) * se + 1e-12)
    ratio = np.sum((out - x) ** 2, axis=-1) / (x @ x)  # (draws, n)
    se_ratio = ratio.std(ddof=1) / math.sqrt(ratio.size)
    assert abs(ratio.mean() - (scale - 1)) <= z_two(1) * se_ratio


@pytest.mark.parametrize("d,n", PERM_CASES)
def test_perm_k_kept_sets_come_from_one_shared_permutation(d, n):
    """The workers of a trajectory share one permutation: for d >= n their kept sets are
    disjoint and cover the d coordinates (ceil(d/n) padded slots each, the phantom ones
    unsent); for d < n each worker sends one coordinate and every coordinate is sent by
    n/d workers (d | n) or by ceil(n/d) padded workers minus the phantoms. The sets do not
    depend on the data, and the bits are 32 per value sent (no index bits)."""
    c = build("perm_k", d, n)
    rng = np.random.default_rng(80 + d + n)
    keys = trajectory_keys(np.arange(50))
    for round_ in range(5):
        v = rng.standard_normal((50, n, d))
        out, bits = c.compress(v, keys, round_)
        kept = out != 0
        np.testing.assert_array_equal(kept, c.compress(v + 1.0, keys, round_)[0] != 0)  # data-free
        np.testing.assert_array_equal(out[kept], (c.scale * v)[kept])
        np.testing.assert_array_equal(bits, 32.0 * kept.sum(axis=-1))
        per_coord, per_worker = kept.sum(axis=1), kept.sum(axis=2)
        if d >= n:
            q = math.ceil(d / n)
            assert np.all(per_coord == 1)  # disjoint and covering
            assert np.all((per_worker >= q - (q * n - d)) & (per_worker <= q))
            np.testing.assert_array_equal(bits.sum(axis=1), 32.0 * d)
        else:
            q = math.ceil(n / d)
            assert np.all(per_worker == 1)
            assert np.all((per_coord >= q - (q * d - n)) & (per_coord <= q))
            if n % d == 0:
                assert np.all(per_coord == n // d)
    assert c.nominal_bits == pytest.approx(32 * (d / n if d >= n else 1), rel=1e-14)


def test_perm_k_needs_the_worker_count():
    with pytest.raises(InputError, match=r"^compressor: perm_k needs the number of workers \(n_workers\)"):
        make_compressor("perm_k", D)
    with pytest.raises(InputError, match=r"^job\.uplink: perm_k needs"):
        make_compressor({"name": "perm_k"}, D, key="job.uplink")
    with pytest.raises(ValueError, match="n_workers must be an integer >= 1, got 0"):
        make_compressor("perm_k", D, n_workers=0)
    c = build("perm_k")
    with pytest.raises(ValueError, match="built for 3 workers, got a block of 2"):
        c.compress(block(1, (B, 2, D)), KEYS, 0)
    assert build("rand_k:3", D, 99).label() == "rand_k:3"  # the others ignore n_workers


# ----------------------------------------------------------------------------- parsing


@pytest.mark.parametrize(
    "spec, want",
    [
        ("rand_k:6", {"name": "rand_k", "k": 6}),
        (" top_k : 3 ", {"name": "top_k", "k": 3}),
        ({"name": "top_k", "k": 3}, {"name": "top_k", "k": 3}),
        ({"name": "top_k", "k": np.int64(3)}, {"name": "top_k", "k": 3}),
        ("dither:4", {"name": "dither", "levels": 4}),
        ({"name": "dither", "levels": 2.0}, {"name": "dither", "levels": 2}),
        ("natural", {"name": "natural"}),
        ({"name": "identity"}, {"name": "identity"}),
        ("natural_dither:3", {"name": "natural_dither", "levels": 3}),
        ("perm_k", {"name": "perm_k"}),
    ],
)
def test_parse_accepts(spec, want):
    assert parse_spec(spec) == want
    c = build(spec)
    assert c.spec() == want and type(c.spec().get("k", 0)) is int


@pytest.mark.parametrize(
    "spec, message",
    [
        ("foo", "compressor: unknown compressor 'foo'"),
        ({"name": "foo"}, "compressor.name: unknown compressor 'foo'"),
        ({"k": 3}, "compressor.name: missing"),
        ("rand_k", "compressor.k: missing"),
        ({"name": "top_k"}, "compressor.k: missing"),
        ("rand_k:0", f"compressor.k: must be an integer in [1, {D}], got 0"),
        ("rand_k:41", f"compressor.k: must be an integer in [1, {D}], got 41"),
        ("rand_k:abc", f"compressor.k: must be an integer in [1, {D}], got 'abc'"),
        ({"name": "top_k", "k": 2.5}, "compressor.k: must be an integer in [1, 40], got 2.5"),
        ({"name": "top_k", "k": True}, "compressor.k: must be an integer in [1, 40], got True"),
        ("dither:0", "compressor.levels: must be an integer >= 1, got 0"),
        ("natural:3", "compressor: natural takes no parameter"),
        ({"name": "natural", "k": 3}, "compressor.k: unknown key for natural"),
        ("perm_k:3", "compressor: perm_k takes no parameter"),
        ("natural_dither", "compressor.levels: missing"),
        ("natural_dither:0", "compressor.levels: must be an integer >= 1, got 0"),
        (42, "compressor: must be text"),
    ],
)
def test_make_compressor_rejects(spec, message):
    with pytest.raises(InputError) as info:
        make_compressor(spec, D)
    assert message in str(info.value)


def test_errors_use_the_given_key_and_are_collected():
    with pytest.raises(InputError) as info:
        make_compressor({"name": "rand_k", "k": 0, "extra": 1}, D, key="job.uplink")
    assert info.value.problems == [
        f"job.uplink.k: must be an integer in [1, {D}], got 0",
        "job.uplink.extra: unknown key for rand_k (allowed: name, k)",
    ]
    with pytest.raises(InputError, match=r"^job\.uplink\.k: must be an integer >= 1, got 0$"):
        parse_spec("rand_k:0", key="job.uplink")
    with pytest.raises(ValueError, match="dim"):
        make_compressor("natural", 0)


@pytest.mark.parametrize("text", ["top_k:3", "rand_k:1", "dither:5", "natural", "perm_k"])
def test_spec_text_writes_what_the_job_syntax_reads(text):
    # The job file's compressor syntax "name:k" (README, "Job file"): written back unchanged.
    spec = parse_spec(text)
    assert spec_text(spec) == text
    assert parse_spec(spec_text(spec)) == spec
