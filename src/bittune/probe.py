"""Gradient check and smoothness estimation (docs/design.md, "Data flow"; docs/theory.md §3.3).

Both work on any object with the batched oracle of
:class:`bittune.problems.Problem`. Every finite difference is central, with
the error-balancing step h = eps^(1/3) (1 + ||x||) along unit directions
(Nocedal and Wright, "Numerical Optimization", 2nd ed., 2006, ch. 8), and all
points, directions and workers of one stage go into one oracle call.
"""

from __future__ import annotations

import time
from dataclasses import asdict, dataclass, field

import numpy as np

from .compressors import make_compressor
from .constants import Constants
from .errors import GradientCheckError, InputError
from .simulate import simulate

__all__ = ["GradientCheck", "ProbeReport", "check_gradients", "estimate_constants", "half_sample_weights"]

_EPS = np.finfo(np.float64).eps
_TINY = np.finfo(np.float64).tiny
_H = _EPS ** (1.0 / 3.0)  # central-difference step per unit of (1 + ||x||)
# Gradient check: the error is measured in units of max(||g_i||, _FLOOR |f_i| / (1 + ||x||)).
# The rounding error of the central difference is about eps^(2/3) |f_i| / (1 + ||x||)
# (= 3.7e-11 of that scale), so the floor keeps it below 4e-8 relative near
# stationary points, far under any sensible threshold (our choice, no source).
_FLOOR = 1e-3
_SPREAD = 1.0  # radius of the random probe starts, in units of 1 + ||x0|| (our choice)
_QUICK_ITERS = 10  # power iterations at x0 when the model has no closed-form bound
_SAME = 1e-6  # secant pairs closer than this (relative to 1 + ||x||) are skipped
_MAX_ELEMENTS = 2**24  # an oracle call on more numbers than this is split (memory)
# Sample stability: probe points of the half-sample power iteration (x0 and points spread over the
# list, as for calL): about 3/15 of the main power iteration's points at the defaults (our choice).
_STABILITY_POINTS = 3
#: Constants compared between the half and the full sample (L_max: the largest per-worker L_i).
STABILITY_KEYS = ("L", "L_plus", "L_pm", "L_max")


@dataclass
class GradientCheck:
    """Directional derivatives g_i(x).v against central differences of f_i along v."""

    max_rel_error: float
    per_worker: np.ndarray  # (n,) worst relative error of each worker
    worst: tuple[int, int, float]  # (worker, point index, error)
    passed: bool
    threshold: float
    points: int
    directions: int
    oracle_calls: int
    seconds: float

    def raise_if_failed(self) -> None:
        """Raise :class:`GradientCheckError` (exit code 3) naming the worst worker and point."""
        if not self.passed:
            worker, point, err = self.worst
            raise GradientCheckError(
                f"gradient check failed: worker {worker} at point {point}: the gradient disagrees with "
                f"central finite differences, relative error {err:.3g} > threshold {self.threshold:g}"
            )

    def to_dict(self) -> dict:
        out = asdict(self)
        out["per_worker"] = [float(e) for e in self.per_worker]
        worker, point, err = self.worst
        out["worst"] = {"worker": int(worker), "point": int(point), "error": float(err)}
        return out


@dataclass
class ProbeReport:
    """What :func:`estimate_constants` did and saw (values before ``safety``)."""

    points: np.ndarray = field(repr=False)  # (P, d) probe points; row 0 is x0
    oracle_calls: int  # batched oracle calls (a call on B points counts once)
    oracle_points: int  # points evaluated, summed over calls
    seconds: float
    step_size: float  # GD step of the probe runs
    step_source: str  # "closed-form bound" or "local estimate at x0"
    local: dict  # maxima over points of the power-iteration estimates
    secant: dict  # maxima of the secant ratios
    raised: int  # how many of the n + 3 values were raised to a secant
    gradient_check: GradientCheck
    #: Half sample against full sample at the same points (see :func:`_sample_stability`); None when
    #: the model has no per-sample rows.
    sample_stability: dict | None = None

    def to_dict(self) -> dict:
        def plain(d: dict) -> dict:
            return {k: [float(x) for x in v] if isinstance(v, np.ndarray) else float(v) for k, v in d.items()}

        return {"points": int(self.points.shape[0]), "oracle_calls": self.oracle_calls,
                "oracle_points": self.oracle_points, "seconds": self.seconds,
                "step_size": self.step_size, "step_source": self.step_source,
                "local": plain(self.local), "secant": plain(self.secant), "raised": self.raised,
                "gradient_check": self.gradient_check.to_dict(), "sample_stability": self.sample_stability}


def _rows_per_call(numbers_per_row: int) -> int:
    """Points per oracle call: ``_MAX_ELEMENTS`` numbers, at least one point."""
    return max(1, _MAX_ELEMENTS // numbers_per_row)


class _Counted:
    """The oracle of ``problem``, counting calls and points (large calls are split)."""

    def __init__(self, problem):
        self.problem = problem
        self.n_workers, self.dim = int(problem.n_workers), int(problem.dim)
        self.worker_sizes = getattr(problem, "worker_sizes", None)
        self.calls = self.rows = 0

    def _chunks(self, X: np.ndarray) -> list[np.ndarray]:
        step = _rows_per_call(int(np.prod(X.shape[1:])) * (self.n_workers if X.ndim == 2 else 1))
        self.calls += -(-X.shape[0] // step)
        self.rows += X.shape[0]
        return [X[i : i + step] for i in range(0, X.shape[0], step)]

    def local_grads(self, X, *, with_loss: bool = False):
        parts = [self.problem.local_grads(c, with_loss=with_loss) for c in self._chunks(np.asarray(X, float))]
        grads = np.concatenate([g for g, _ in parts])
        return grads, (np.concatenate([f for _, f in parts]) if with_loss else None)

    def local_losses(self, X):
        return np.concatenate([self.problem.local_losses(c) for c in self._chunks(np.asarray(X, float))])


def _unit(a: np.ndarray, axis) -> tuple[np.ndarray, np.ndarray]:
    """``a`` scaled to unit norm along ``axis`` (zero stays zero), and the norms."""
    norm = np.sqrt(np.sum(a * a, axis=axis, keepdims=True))
    return a / np.maximum(norm, _TINY), norm


def _int_at_least(name: str, value, low: int) -> int:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) or value < low:
        raise ValueError(f"{name} must be an integer >= {low}, got {value!r}")
    return int(value)


def check_gradients(
    problem, points: np.ndarray, *, rng, directions: int = 4, threshold: float = 1e-5
) -> GradientCheck:
    """Compare every worker's gradient with central differences of its loss at ``points`` (P, d).

    Along ``directions`` random unit vectors v per point, the error of worker i
    at x is |g_i(x).v - (f_i(x+hv) - f_i(x-hv))/(2h)| / max(||g_i(x)||,
    1e-3 |f_i(x)| / (1 + ||x||)). Dividing by ||g_i|| and not by |g_i.v| keeps
    the measure stable when a random v is nearly orthogonal to g_i; the floor
    is the resolution of the difference itself near stationary points (see
    ``_FLOOR``). Two oracle calls: gradients at the points, and the losses at
    all P x directions x 2 shifted points. Non-finite values count as failures.
    """
    start = time.perf_counter()
    oracle = _Counted(problem)
    directions = _int_at_least("directions", directions, 1)
    if not (np.isfinite(threshold) and threshold > 0):
        raise ValueError(f"threshold must be a finite number > 0, got {threshold!r}")
    pts = np.asarray(points, dtype=np.float64)
    if pts.ndim != 2 or pts.shape[1] != oracle.dim or pts.shape[0] < 1 or not np.all(np.isfinite(pts)):
        raise ValueError(f"points must be a finite array of shape (P, {oracle.dim}) with P >= 1, "
                         f"got {pts.shape}")
    grads, losses = oracle.local_grads(pts, with_loss=True)
    return _check(oracle, pts, grads, losses, rng=np.random.default_rng(rng), directions=directions,
                  threshold=float(threshold), start=start)


def _check(oracle, pts, grads, losses, *, rng, directions, threshold, start, calls0=0) -> GradientCheck:
    P, d = pts.shape
    V, _ = _unit(rng.standard_normal((P, directions, d)), axis=2)
    h = _H * (1.0 + np.linalg.norm(pts, axis=1))
    shift = h[:, None, None] * V
    X = np.concatenate([(pts[:, None] + shift).reshape(-1, d), (pts[:, None] - shift).reshape(-1, d)])
    with np.errstate(over="ignore", invalid="ignore"):
        f = oracle.local_losses(X).reshape(2, P, directions, -1)
        fd = (f[0] - f[1]) / (2.0 * h[:, None, None])  # (P, D, n)
        gv = np.einsum("pnd,pkd->pkn", grads, V)
        scale = np.maximum(np.linalg.norm(grads, axis=2),
                           _FLOOR * np.abs(losses) / (1.0 + np.linalg.norm(pts, axis=1))[:, None])
        err = np.abs(gv - fd) / np.maximum(scale, _TINY)[:, None, :]
    err = np.where(np.isfinite(err), err, np.inf).max(axis=1)  # (P, n)
    p, i = np.unravel_index(int(np.argmax(err)), err.shape)
    worst = float(err[p, i])
    return GradientCheck(max_rel_error=worst, per_worker=err.max(axis=0), worst=(int(i), int(p), worst),
                         passed=bool(worst <= threshold), threshold=threshold, points=P,
                         directions=directions, oracle_calls=oracle.calls - calls0,
                         seconds=time.perf_counter() - start)


def _hvp(oracle, pts: np.ndarray, h: np.ndarray, dirs: np.ndarray, weights: np.ndarray | None = None) -> np.ndarray:
    """H_i(x_p) dirs[s, p, i] for every stage s, point p, worker i: (S, P, n, d).

    With ``weights`` (S, P, n, m_max) the Hessian is that of sum_j w_j f_ij (the minibatch
    oracle ``weighted_grads``) instead of f_i's.

    The 2 S P shifted points x_p +- h_p u (n d numbers each) are built and differenced a
    chunk of (s, p) pairs at a time, as many points per oracle call as :class:`_Counted`
    would put in one (``_rows_per_call``, rounded down to whole pairs; so the calls are
    those of one call on all the points when that count is even, one more at most
    otherwise): only the (S, P, n, d) result is ever whole in memory. At d = 20,000 over 16
    workers the whole point set of one power iteration was 3 GB (docs/design.md, "Scale").
    """
    S, P, n, d = dirs.shape
    out = np.empty((S * P, n, d))
    flat = dirs.reshape(S * P, n, d)
    pair = max(1, _rows_per_call(n * d) // 2)  # (s, p) pairs per call: 2 shifted points each
    p_of = np.tile(np.arange(P), S)  # the point of flat row r = s P + p
    W = None if weights is None else weights.reshape(S * P, n, weights.shape[-1])
    for a in range(0, S * P, pair):
        b = min(a + pair, S * P)
        unit, norm = _unit(flat[a:b], axis=2)  # worker i moves along its own unit direction
        hp = h[p_of[a:b], None, None]
        shift = hp * unit
        base = pts[p_of[a:b], None, :]
        X = np.concatenate([base + shift, base - shift])  # (2 q, n, d): the q pairs' + then - points
        if W is None:
            G, _ = oracle.local_grads(X)
        else:
            G = oracle.weighted_grads(X, np.concatenate([W[a:b], W[a:b]]))
        q = b - a
        out[a:b] = (G[:q] - G[q:]) / (2.0 * hp) * norm
    return out.reshape(S, P, n, d)


def _power(oracle, pts: np.ndarray, *, iters: int, rng, per_point: bool = False) -> dict:
    """Local L_i, L_-, L_+, L_pm at every point by power iteration, one oracle call per iteration.

    Six stages share each call: per-worker directions v_i (H_i), a shared u
    (Hbar = mean H_i), and for L_+ = sigma_max(J), J = [H_1; ...; H_n]/sqrt(n)
    (J^T J = mean H_i^2), the two halves of power iteration on J^T J run as two
    interleaved chains: J w (shared w) and J^T z = sum_i H_i z_i / sqrt(n)
    (worker directions z_i); the new w is J^T z, the new z is J w. L_pm =
    sigma_max(K), K = [H_i - Hbar]_i / sqrt(n) (K^T K = mean H_i^2 - Hbar^2),
    the same way with sum_i z_i = 0, so that K^T z = sum_i H_i z_i / sqrt(n).
    Each estimate is a norm ||A y|| of a unit y, a lower bound on ||A||_2 that
    rises with the iterations (Cauchy-Schwarz); the maximum over iterations is kept.
    Returns the maxima over the points, or with ``per_point`` each point's values.
    """
    P, d = pts.shape
    n = oracle.n_workers
    h = _H * (1.0 + np.linalg.norm(pts, axis=1))
    r = np.sqrt(n)
    v = _unit(rng.standard_normal((P, n, d)), 2)[0]
    u, w, w2 = (_unit(rng.standard_normal((P, d)), 1)[0] for _ in range(3))
    z = _unit(rng.standard_normal((P, n, d)), (1, 2))[0]
    z2 = rng.standard_normal((P, n, d))
    z2 = _unit(z2 - z2.mean(axis=1, keepdims=True), (1, 2))[0]
    best = {"L_workers": np.zeros((P, n)), "L": np.zeros(P), "L_plus": np.zeros(P), "L_pm": np.zeros(P)}
    for _ in range(iters):
        spread = [a[:, None].repeat(n, 1) for a in (u, w, w2)]  # shared directions, one per worker
        A, B, C, D, E, F = _hvp(oracle, pts, h, np.stack([v, spread[0], spread[1], z, spread[2], z2]))
        v, nv = _unit(A, 2)
        u, nu = _unit(B.mean(axis=1), 1)
        Kw = E - E.mean(axis=1, keepdims=True)
        (z, nJw), (w, nJz) = _unit(C / r, (1, 2)), _unit(D.sum(axis=1) / r, 1)
        (z2, nKw), (w2, nKz) = _unit(Kw / r, (1, 2)), _unit(F.sum(axis=1) / r, 1)
        # Centre again at unit scale: when Kw is tiny next to H_i w, the subtraction
        # above leaves a mean of ~eps ||H_i w|| / ||Kw||, which K^T z would amplify.
        z2 = _unit(z2 - z2.mean(axis=1, keepdims=True), (1, 2))[0]
        for key, value in (("L_workers", nv[..., 0]), ("L", nu[:, 0]), ("L_plus", nJw.ravel()),
                           ("L_plus", nJz[:, 0]), ("L_pm", nKw.ravel()), ("L_pm", nKz[:, 0])):
            np.maximum(best[key], np.nan_to_num(value), out=best[key])
        del A, B, C, D, E, F, Kw, spread  # free this iteration's products before the next call's
    return best if per_point else {key: value.max(axis=0) for key, value in best.items()}


def half_sample_weights(sizes, m_max: int, seed: int) -> np.ndarray:
    """Row weights (n, m_max) of the half sample: worker i keeps max(1, floor(m_i / 2)) of its m_i rows,
    drawn without replacement by ``numpy.random.default_rng([seed, 0])``, each with weight 1/kept; every
    other row (and padding) gets 0. With these weights the minibatch oracle ``weighted_grads`` is the
    gradient of f_i on the kept rows (regulariser included)."""
    sizes = np.asarray(sizes, dtype=np.int64)
    rng = np.random.default_rng([int(seed), 0])
    W = np.zeros((sizes.size, int(m_max)))
    for i, m in enumerate(sizes):  # once per probe, not in a hot path
        keep = max(1, int(m) // 2)
        W[i, rng.choice(int(m), size=keep, replace=False)] = 1.0 / keep
    return W


class _Weighted:
    """The local-gradient oracle of ``problem`` on a weighted sample (weights (n, m_max)), served by its
    minibatch oracle: f_i^w = sum_j w_ij f_ij."""

    def __init__(self, problem, weights: np.ndarray):
        self.problem, self.weights = problem, weights
        self.n_workers, self.dim = int(problem.n_workers), int(problem.dim)

    def local_grads(self, X, *, with_loss: bool = False):
        X = np.asarray(X, dtype=np.float64)
        return self.problem.weighted_grads(X, np.broadcast_to(self.weights, (X.shape[0], *self.weights.shape))), None


def _stable_values(local: dict) -> dict:
    return {"L": float(local["L"]), "L_plus": float(local["L_plus"]), "L_pm": float(local["L_pm"]),
            "L_max": float(np.max(local["L_workers"]))}


def _sample_stability(problem, pts: np.ndarray, full: dict, *, iters: int, seed: int) -> dict:
    """How the local constants move when every worker's shard is halved: the power iteration of
    :func:`_power` (same iterations) on the half sample (:func:`half_sample_weights`) at
    ``_STABILITY_POINTS`` of the probe points, against the full sample's values (``full``, per point)
    at the same points. ``ratio`` = half / full per constant (1: the sample is large enough that
    halving it does not move the constant). Values are before ``safety``."""
    start = time.perf_counter()
    pick = np.unique(np.linspace(0, len(pts) - 1, min(_STABILITY_POINTS, len(pts))).astype(int))
    W = half_sample_weights(problem.worker_sizes, problem.shards.m_max, seed)
    oracle = _Counted(_Weighted(problem, W))
    half = _power(oracle, pts[pick], iters=iters, rng=np.random.default_rng([int(seed), 1]))
    whole = _stable_values({k: v[pick].max(axis=0) for k, v in full.items()})
    halved = _stable_values(half)
    ratio = {k: (halved[k] / whole[k] if whole[k] > 0 else None) for k in STABILITY_KEYS}  # None: 0 / 0
    return {"ratio": ratio, "half": halved, "full": whole, "points": int(pick.size),
            "rows_kept": [int(v) for v in np.count_nonzero(W, axis=1)], "seed": int(seed),
            "oracle_calls": oracle.calls, "oracle_points": oracle.rows, "seconds": time.perf_counter() - start}


def _sample_smoothness(problem, pts: np.ndarray, *, iters: int, draws: int, rng) -> np.ndarray:
    """Average smoothness calL_i (docs/theory.md §2.5) per worker, (n,): the largest over ``pts`` of
    sqrt(lambda_max(M_i)), M_i = (1/m_i) sum_j H_ij^2, H_ij the Hessian of row j's f_ij.

    Power iteration on M_i without per-row Hessians: for Rademacher signs s_j,
    A_s = sum_j s_j H_ij has E_s[A_s^2] = sum_j H_ij^2 (the cross terms have
    mean zero; Hutchinson's trick, from memory), so v <- mean_s A_s (A_s v) / m_i
    is power iteration on M_i in expectation, and mean_s ||A_s v||^2 / m_i is an
    unbiased estimate of v^T M_i v. A_s v is a central difference of the
    minibatch oracle with the signs as row weights (``weighted_grads``). The
    estimate of the last iteration counts (the max over noisy iterations would
    be biased upwards); ``draws`` sign vectors per iteration set its noise
    (relative standard error about sqrt(2/draws) per point).
    """
    P, d = pts.shape
    n, m_max = problem.n_workers, problem.shards.m_max
    sizes = np.asarray(problem.worker_sizes, dtype=np.float64)
    mask = np.arange(m_max)[None, :] < sizes[:, None]
    h = _H * (1.0 + np.linalg.norm(pts, axis=1))

    chunk = max(1, _MAX_ELEMENTS // (4 * P * n * m_max))  # sign draws per oracle call (memory)

    def signs(seed: int, a: int, r: int) -> np.ndarray:
        """Draws a..a+r-1 of one iteration's Rademacher signs, (r, P, n, m_max), zero on padded
        rows; regenerated from (seed, a) so both products of an iteration see the same signs
        while only one chunk is ever in memory."""
        g = np.random.default_rng([seed, a])
        return np.where(g.random((r, P, n, m_max)) < 0.5, -1.0, 1.0) * mask

    def apply(seed: int, dirs: np.ndarray) -> np.ndarray:
        """sum_j s_j H_ij(x_p) dirs[r, p, i] for the iteration's signs: (R, P, n, d), ``chunk``
        draws per oracle call."""
        out = np.empty_like(dirs)
        for a in range(0, dirs.shape[0], chunk):
            part = dirs[a : a + chunk]
            out[a : a + chunk] = _hvp(problem, pts, h, part, weights=signs(seed, a, part.shape[0]))
        return out

    v = np.broadcast_to(_unit(rng.standard_normal((P, n, d)), 2)[0], (draws, P, n, d))  # shared by the draws
    est = np.zeros((P, n))
    for _ in range(iters):
        seed = int(rng.integers(2**63))
        Av = apply(seed, v)
        est = (np.sum(Av * Av, axis=3) / sizes).mean(axis=0)  # v^T M_i v, v unit
        Mv = apply(seed, Av).mean(axis=0) / sizes[None, :, None]
        v = np.broadcast_to(_unit(Mv, 2)[0], (draws, P, n, d))
    return np.sqrt(np.nan_to_num(est)).max(axis=0)


def _secants(pts: np.ndarray, G: np.ndarray) -> dict:
    """Largest secant ratios over all pairs of points: lower bounds on L_i, L, L_+, L_pm."""
    P, n, _ = G.shape
    out = {"L_workers": np.zeros(n), "L": 0.0, "L_plus": 0.0, "L_pm": 0.0}
    norms = np.linalg.norm(pts, axis=1)
    for p in range(P - 1):
        dx = np.linalg.norm(pts[p + 1 :] - pts[p], axis=1)
        ok = dx > _SAME * (1.0 + np.maximum(norms[p], norms[p + 1 :]))
        if not ok.any():
            continue
        dG, dx = (G[p + 1 :] - G[p])[ok], dx[ok]
        mean = dG.mean(axis=1)
        sq = np.sum(dG * dG, axis=2)  # (q, n)
        out["L_workers"] = np.maximum(out["L_workers"], (np.sqrt(sq) / dx[:, None]).max(axis=0))
        out["L"] = max(out["L"], float((np.linalg.norm(mean, axis=1) / dx).max()))
        out["L_plus"] = max(out["L_plus"], float((np.sqrt(sq.mean(axis=1)) / dx).max()))
        var = np.sum((dG - mean[:, None]) ** 2, axis=2).mean(axis=1)
        out["L_pm"] = max(out["L_pm"], float((np.sqrt(var) / dx).max()))
    return out


def estimate_constants(
    problem,
    *,
    x0: np.ndarray,
    rng,
    runs: int = 3,
    run_rounds: int = 30,
    points_per_run: int = 4,
    power_iters: int = 30,
    safety: float = 1.0,
    lower_bound: float | None = None,
    gradient_tolerance: float = 1e-5,
    strict: bool = True,
    sample_smoothness: bool = False,
    sample_stability: bool = True,
) -> tuple[Constants, ProbeReport]:
    """Estimate the smoothness constants of docs/theory.md §3.1 near the path from ``x0``.

    Probe points: x0, ``runs - 1`` random starts at distance 1 + ||x0|| from
    it, and from each start ``points_per_run`` GD runs of ``run_rounds``
    rounds (one batched :func:`simulate` call per start) with steps
    gamma j / points_per_run, j = 1..points_per_run: small steps follow the
    gradient flow, so their end points lie along the path of the longest run.
    gamma = 1 / (closed-form L) when the model has one, else 1 / (2 x the
    largest local constant at x0). At every point, power iteration on central
    finite-difference Hessian-vector products (:func:`_power`) gives local
    L_i, L_-, L_+, L_pm; the maximum over points is taken. Each value is then
    raised to the largest secant ratio seen between probe points (a true lower
    bound on the global constant) and multiplied by ``safety``.

    The result can undershoot the true global constants: (1) the values are
    local, measured only at the probe points, and the supremum of the
    curvature may lie elsewhere (far from the path, or between points); (2)
    power iteration approaches ||H||_2 from below, slowly when the top two
    eigenvalues are close; (3) for non-quadratics, the local L_pm is
    lambda_max(mean H_i(x)^2 - Hbar(x)^2) at single points, while the global
    L_pm is defined on pairs of points. ``safety`` > 1 buys margin. The
    gradient check runs at the probe points, before any Hessian work; with
    ``sample_smoothness`` (VR-MARINA needs it) the average smoothness calL is
    estimated too (:func:`_sample_smoothness`), for models with per-sample
    gradients; with
    ``strict`` a failure raises :class:`GradientCheckError` at once (a wrong
    gradient makes every later number meaningless), else it is only reported.

    Cost: runs x (run_rounds + 2) oracle calls for the runs, 2 for the
    gradients and the gradient check, ``power_iters`` for the power iteration
    (on 12 P points each), and 10 more without a closed-form bound; reported
    in ``report.oracle_calls``. With ``sample_stability`` (models with
    per-sample rows) ``power_iters`` more calls on 12 x 3 points redo the power
    iteration on a seeded half of every worker's rows
    (``report.sample_stability``: its own calls, points and seconds). Raises ValueError on invalid arguments and when
    the lower bound on f is infinite or above f(x0).
    """
    start = time.perf_counter()
    runs = _int_at_least("runs", runs, 1)
    run_rounds = _int_at_least("run_rounds", run_rounds, 1)
    points_per_run = _int_at_least("points_per_run", points_per_run, 1)
    power_iters = _int_at_least("power_iters", power_iters, 1)
    if not (np.isfinite(safety) and safety >= 1.0):
        raise ValueError(f"safety must be a finite number >= 1, got {safety!r}")
    oracle = _Counted(problem)
    n, d = oracle.n_workers, oracle.dim
    x0 = np.asarray(x0, dtype=np.float64)
    if x0.shape != (d,) or not np.all(np.isfinite(x0)):
        raise ValueError(f"x0 must be a finite vector of length {d}, got shape {x0.shape}")
    lower = float(problem.loss_lower_bound() if lower_bound is None else lower_bound)
    if not np.isfinite(lower):
        origin = "given" if lower_bound is not None else "the model's loss_lower_bound(); pass one"
        raise ValueError(f"lower_bound must be finite (Delta0 = f(x0) - lower_bound), got {lower} ({origin})")
    rng = np.random.default_rng(rng)

    bounds = None
    try:
        per, pooled = problem.smoothness_bounds()
        bounds = (np.asarray(per, dtype=np.float64), float(pooled))
    except (AttributeError, NotImplementedError):
        pass
    if bounds is not None and np.isfinite(bounds[1]) and bounds[1] > 0:
        step, source = 1.0 / bounds[1], "closed-form bound"
    else:
        quick = _power(oracle, x0[None], iters=_QUICK_ITERS, rng=rng)
        top = max(quick["L"], float(quick["L_workers"].max()))
        step, source = (1.0 / (2.0 * top) if top > 0 else 1.0), "local estimate at x0"

    starts = [x0]
    for _ in range(runs - 1):
        starts.append(x0 + _SPREAD * (1.0 + np.linalg.norm(x0)) * _unit(rng.standard_normal(d), 0)[0])
    identity = make_compressor("identity", d)
    steps = step * np.arange(1, points_per_run + 1) / points_per_run
    pts = []
    for s in starts:
        trajs = simulate(oracle, method="gd", compressor=identity, step_size=steps,
                         seeds=np.arange(points_per_run), target=0.0, max_rounds=run_rounds, x0=s)
        pts += [s] + [t.x for t in trajs]
    pts = np.array(pts)
    pts = pts[np.all(np.isfinite(pts), axis=1)]

    grads, losses = oracle.local_grads(pts, with_loss=True)
    finite = np.all(np.isfinite(grads), axis=(1, 2)) & np.all(np.isfinite(losses), axis=1)
    if not finite[0]:
        raise ValueError("x0: the model's gradient or loss there is not finite")
    pts, grads, losses = pts[finite], grads[finite], losses[finite]
    check = _check(oracle, pts, grads, losses, rng=rng, directions=4, threshold=gradient_tolerance,
                   start=time.perf_counter(), calls0=oracle.calls)
    if strict:
        check.raise_if_failed()

    per_point = _power(oracle, pts, iters=power_iters, rng=rng, per_point=True)
    local = {key: value.max(axis=0) for key, value in per_point.items()}
    secant = _secants(pts, grads)
    raised = int(np.sum(secant["L_workers"] > local["L_workers"]))
    raised += sum(int(secant[k] > local[k]) for k in ("L", "L_plus", "L_pm"))
    est = {k: np.maximum(local[k], secant[k]) * safety for k in local}

    sample_L = sizes = None
    if sample_smoothness and getattr(problem, "has_samples", False):
        # Three probe points spread over the list (x0 first) keep the cost at 2 x 12 oracle
        # calls of 2 x 16 x 3 points; 16 sign draws: about 35% standard error per estimate
        # (our choice, no source). calL_i >= L_i always (Jensen), so L_i is the floor.
        ends = pts[np.unique(np.linspace(0, len(pts) - 1, 3).astype(int))]
        raw = _sample_smoothness(problem, ends, iters=12, draws=16, rng=rng)
        per = np.maximum(raw * safety, est["L_workers"])
        sample_L = float(np.sqrt(np.mean(per * per)))
        sizes = np.asarray(problem.worker_sizes, dtype=np.float64)
    stability = None
    if sample_stability and getattr(problem, "has_samples", False) and hasattr(problem, "weighted_grads"):
        # Drawn last from rng, so every earlier estimate is the same with or without this stage.
        stability = _sample_stability(problem, pts, per_point, iters=power_iters, seed=int(rng.integers(2**63)))
    f0 = float(losses[0].mean())
    if f0 < lower:
        raise ValueError(f"lower_bound must be <= f(x0) = {f0:.6g}, got {lower:.6g}")
    g0 = grads[0]
    gbar = g0.mean(axis=0)
    # Delta*'s bound needs a bound on each f_i: the model's, whatever probe.lower_bound says.
    worker_lower = getattr(problem, "worker_loss_lower_bound", None)
    worker_lower = None if worker_lower is None else float(worker_lower())
    constants = Constants(
        n_workers=n, dim=d, L=float(est["L"]), L_workers=est["L_workers"], L_plus=float(est["L_plus"]),
        L_pm=float(est["L_pm"]), delta0=f0 - lower, grad_sq0=float(gbar @ gbar),
        local_grad_sq0=float(np.mean(np.sum(g0 * g0, axis=1))),
        heterogeneity0=float(np.mean(np.sum((g0 - gbar) ** 2, axis=1))), safety=float(safety),
        bound_L=None if bounds is None else bounds[1], bound_L_workers=None if bounds is None else bounds[0],
        L_sample=sample_L, samples_per_worker=None if sizes is None else float(sizes.mean()),
        min_samples_per_worker=None if sizes is None else int(sizes.min()),
        delta_star0=None if worker_lower is None else f0 - worker_lower,
    )
    report = ProbeReport(points=pts, oracle_calls=oracle.calls, oracle_points=oracle.rows,
                         seconds=time.perf_counter() - start, step_size=float(step), step_source=source,
                         local=local, secant=secant, raised=raised, gradient_check=check,
                         sample_stability=stability)
    return constants, report


def probe_workspace(ws, *, strict: bool = True,
                    sample_smoothness: bool | None = None) -> tuple[Constants, ProbeReport]:
    """Run the probe with the job's ``probe`` settings on a workspace's problem.

    An impossible lower bound is an input error naming ``probe.lower_bound``;
    ``assume.pl_mu`` above the measured L likewise. ``sample_smoothness``
    (default: whether the job searches vr_marina) asks for calL.
    """
    spec = ws.job.probe
    try:
        constants, report = estimate_constants(
            ws.problem, x0=ws.x0, rng=np.random.default_rng(spec.seed), runs=spec.runs,
            run_rounds=spec.run_rounds, points_per_run=spec.points_per_run, power_iters=spec.power_iters,
            safety=spec.safety, lower_bound=spec.lower_bound, gradient_tolerance=spec.gradient_tolerance,
            strict=strict,
            sample_smoothness=(("vr_marina" in ws.job.search.methods or getattr(ws.job, "minibatch", None) is not None)
                               if sample_smoothness is None else sample_smoothness))
    except ValueError as exc:  # every ValueError here is about the job's input
        key = "probe.lower_bound" if "lower_bound" in str(exc) else "start"
        raise InputError(f"{key}: {exc}", source=str(ws.job.path)) from None
    mu = ws.job.assume.pl_mu
    if mu is not None:
        # mu <= L always: the PL inequality and L-smoothness give 2 mu (f - f_inf) <= ||grad f||^2
        # <= 2 L (f - f_inf) (Karimi, Nutini, Schmidt 2016, from memory).
        if mu > constants.L:
            raise InputError(f"assume.pl_mu: must be <= L = {constants.L:.4g} (the PL constant never exceeds the "
                             f"smoothness constant), got {mu:g}", source=str(ws.job.path))
        constants.pl_mu = float(mu)
    b = getattr(ws.job, "minibatch", None)
    if b is not None:  # stochastic gradients: sigma^2 at x0 and along the runs (docs/theory.md §2.12)
        from .noise import noise_constants

        for key, value in noise_constants(ws.problem, ws.x0, report.points[1:], b, seed=spec.seed).items():
            setattr(constants, key, value)
        sizes = np.asarray(ws.problem.worker_sizes, dtype=np.float64)
        constants.samples_per_worker = float(sizes.mean())
        constants.min_samples_per_worker = int(sizes.min())
    return constants, report
