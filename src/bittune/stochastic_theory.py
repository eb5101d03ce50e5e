"""Theory rules with stochastic gradients: the job's ``minibatch`` b (docs/theory.md §2.12).

Every worker's gradient is the mean of b rows drawn with replacement, unbiased with variance
sigma_i^2 <= ``Constants.noise_variance`` on average over the workers (sigma^2 below; the probe's
largest value over its points stands in for the uniform bound the analyses assume). Each rule
returns a :class:`~bittune.theory.TheoryPoint` like its full-batch rule, with predicted rounds
and bits from its bound:

* GD, DCGD: the ABC condition of Khaled & Richtarik (2020) with C raised by (1+omega) sigma^2/n
  (§2.12.1); the step shrinks with the target (the noise term L C gamma).
* DIANA: the full-batch step of §2.3 capped so the noise term 2 L gamma (1+4 omega) sigma^2/n
  stays at most half the target (§2.12.2, derived).
* MARINA, PP-MARINA: the online form (minibatch sync rounds, differences on the same rows), a
  step with the average smoothness calL and a noise floor sigma^2/n (§2.12.3, derived).
* EF21: EF21-SGD, gamma = 1/(L + 4 L_QM/alpha), noise floor 12 sigma^2/alpha^2 (§2.12.4, derived).

VR-MARINA keeps its own rule with b' = b (:func:`bittune.theory.vr_marina_rule`).
"""

from __future__ import annotations

import math
from dataclasses import replace

from .methods import dense_bits
from .theory import _point, _rounds, diana_search_anchor, ef21_search_anchor

__all__ = [
    "STOCHASTIC_RULES",
    "diana_sgd_rule",
    "ef21_sgd_rule",
    "marina_sgd_rule",
    "pp_marina_sgd_rule",
    "sgd_rule",
]


def _sigma2(c) -> float:
    s2 = c.noise_variance
    if s2 is None or not (math.isfinite(s2) and s2 >= 0):
        raise ValueError(f"a minibatch rule needs constants.noise_variance (the probe's sigma^2), got {s2!r}")
    return float(s2)


def _calL(c) -> float:
    if c.L_sample is None:
        raise ValueError("a stochastic MARINA rule needs constants.L_sample (calL, measured by the probe)")
    return float(c.L_sample)


def _floor_rounds(numerator: float, target: float, floor: float) -> tuple[int, str]:
    """K for 2 Phi0/(gamma K) + floor <= target: numerator/(target - floor). A target within twice
    the floor gets the rounds of a gap target/2 and a note (the bound never meets it; our choice)."""
    gap = target - floor
    if gap >= target / 2.0:
        return _rounds(numerator, gap), ""
    return _rounds(numerator, target / 2.0), (f"the target is within 2x this rule's noise floor {floor:.3g}: "
                                              f"no guarantee (rounds predicted for a gap of target/2)")


def sgd_rule(compressor, constants, *, target: float, method: str = "dcgd"):
    """GD and DCGD on b-row minibatches (docs/theory.md §2.12.1).

    Khaled & Richtarik, "Better Theory for SGD in the Nonconvex World", 2020, Theorem 2 /
    Corollary 1 (from memory), with the ABC constants A = omega L_max/n, B = 1,
    C = 2 omega L_max Delta*/n + (1 + omega) sigma^2/n (derived, §2.12.1): as the DCGD rule,
    K = ceil((12 Delta0 L/eps) max{B, 12 Delta0 A/eps, 2C/eps}),
    gamma = min{1/(L B), 1/sqrt(L A K), eps/(2 L C)}. omega = 0 is minibatch SGD.
    """
    c, eps, omega, n = constants, target, compressor.omega, constants.n_workers
    s2 = _sigma2(c)
    delta_star, note = c.delta_star_bound, ""
    if omega > 0 and not math.isfinite(delta_star):
        delta_star, note = c.delta0, "Delta* unbounded by the model: Delta0 stands in (no guarantee)"
    A = omega * c.L_max / n
    C = (2.0 * omega * c.L_max * delta_star if omega > 0 else 0.0) / n + (1.0 + omega) * s2 / n
    rounds = _rounds(12.0 * c.delta0 * c.L * max(1.0, 12.0 * c.delta0 * A / eps, 2.0 * C / eps), eps)
    steps = [1.0 / c.L]
    if A > 0:
        steps.append(1.0 / math.sqrt(c.L * A * rounds))
    if C > 0:
        steps.append(eps / (2.0 * c.L * C))
    per_round = dense_bits(c.dim) if method == "gd" else compressor.nominal_bits
    return _point(method, compressor, min(steps), rounds, rounds * per_round,
                  "Khaled & Richtarik 2020, Thm 2 / Cor. 1 (from memory), minibatch C derived", note=note)


def gd_sgd_rule(compressor, constants, *, target: float):
    return sgd_rule(compressor, constants, target=target, method="gd")


def diana_sgd_rule(compressor, constants, *, target: float):
    """DIANA on b-row minibatches (docs/theory.md §2.12.2, derived).

    gamma = min{1/(2L), sqrt(n)/(sqrt(12 omega)(1+omega) L_QM), eps/(2N)}, N = 2 L (1 + 4 omega) sigma^2/n,
    E||grad f(x_hat)||^2 <= 2 Phi0/(gamma K) + N gamma with Phi0 = Delta0 + c sigma^2,
    c = 2 L gamma^2 omega (1+omega)/n (the shifts start at minibatch gradients), so
    K = ceil(4 Phi0/(gamma eps)). Shift rate 1/(1+omega) as in §2.3.
    """
    c, eps, omega, n = constants, target, compressor.omega, constants.n_workers
    s2 = _sigma2(c)
    gamma = 1.0 / (2.0 * c.L)
    if omega > 0:
        gamma = min(gamma, math.sqrt(n) / (math.sqrt(12.0 * omega) * (1.0 + omega) * c.L_qm))
    N = 2.0 * c.L * (1.0 + 4.0 * omega) * s2 / n
    if N > 0:
        gamma = min(gamma, eps / (2.0 * N))
    phi0 = c.delta0 + 2.0 * c.L * gamma**2 * omega * (1.0 + omega) / n * s2
    rounds = _rounds(4.0 * phi0 / gamma, eps)
    point = _point("diana", compressor, gamma, rounds, dense_bits(c.dim) + rounds * compressor.nominal_bits,
                   "derived (docs/theory.md §2.12.2) for DIANA, Mishchenko et al. 2019", shift=1.0 / (1.0 + omega))
    return replace(point, **diana_search_anchor(c))  # as the full-batch rule (docs/theory.md §2.3)


def _marina_like(method, compressor, c, *, target, p, variance, per_round, source, clients=None):
    """gamma = 1/(L + sqrt((1-p)/p * variance)), floor sigma^2/n, Phi0 = Delta0 + gamma sigma^2/(2 p n)."""
    s2, n = _sigma2(c), c.n_workers
    gamma = 1.0 / (c.L + math.sqrt((1.0 - p) / p * variance))
    phi0 = c.delta0 + gamma * s2 / (2.0 * p * n)
    rounds, note = _floor_rounds(2.0 * phi0 / gamma, target, s2 / n)
    return _point(method, compressor, gamma, rounds, dense_bits(c.dim) + rounds * per_round, source,
                  sync=p, note=note, clients=clients)


def marina_sgd_rule(compressor, constants, *, target: float):
    """MARINA on b-row minibatches, online form (docs/theory.md §2.12.3, derived).

    Sync rounds send minibatch gradients, differences use one draw of b rows at both points.
    With the AB constants of the compressors (independent U(omega): A = omega/n, B = 0; §1.1):
    gamma = 1/(L_- + sqrt(((1-p)/p) ((A-B) L_+^2 + B L_pm^2 + (A + 1/n) calL^2/b))),
    E||grad f(x_hat)||^2 <= 2 Phi0/(gamma K) + sigma^2/n, p = min(1, zeta/d) as §2.4.
    """
    c, omega, n, b = constants, compressor.omega, constants.n_workers, constants.minibatch
    p = min(1.0, compressor.density / compressor.dim)
    A, B = compressor.ab if compressor.correlated else (omega / n, 0.0)
    L_pm = c.L_pm if compressor.correlated else 0.0
    variance = (A - B) * c.L_plus**2 + B * L_pm**2 + (A + 1.0 / n) * _calL(c) ** 2 / b
    per_round = p * dense_bits(c.dim) + (1.0 - p) * compressor.nominal_bits
    return _marina_like("marina", compressor, c, target=target, p=p, variance=variance, per_round=per_round,
                        source="derived (docs/theory.md §2.12.3), online VR-MARINA form of Gorbunov et al. 2021")


def pp_marina_sgd_rule(compressor, constants, *, target: float, clients: int | None = None):
    """PP-MARINA on b-row minibatches (docs/theory.md §2.12.3, derived):
    gamma = 1/(L + sqrt(((1-p)/(p r)) (1+omega)(L_QM^2 + calL^2/b))), floor sigma^2/n."""
    from .theory import pp_marina_rule

    c, omega, b = constants, compressor.omega, constants.minibatch
    base = pp_marina_rule(compressor, c, target=target, clients=clients)  # r and p as in §2.6
    r, p = base.clients, base.sync_probability
    variance = (1.0 + omega) * (c.L_qm**2 + _calL(c) ** 2 / b) / r
    per_round = p * dense_bits(c.dim) + (1.0 - p) * r * compressor.nominal_bits / c.n_workers
    return _marina_like("pp_marina", compressor, c, target=target, p=p, variance=variance, per_round=per_round,
                        source="derived (docs/theory.md §2.12.3) for PP-MARINA, Gorbunov et al. 2021", clients=r)


def ef21_sgd_rule(compressor, constants, *, target: float, alpha: float | None = None):
    """EF21-SGD on b-row minibatches (docs/theory.md §2.12.4, derived): gamma = 1/(L + 4 L_QM/alpha),
    E||grad f(x_hat)||^2 <= 2 Phi0/(gamma K) + 12 sigma^2/alpha^2, Phi0 = Delta0 + 2 gamma sigma^2/alpha."""
    c = constants
    a = compressor.alpha if alpha is None else float(alpha)
    if not 0.0 < a <= 1.0:
        raise ValueError(f"alpha must be in (0, 1], got {alpha!r}")
    s2 = _sigma2(c)
    gamma = 1.0 / (c.L + 4.0 * c.L_qm / a)
    phi0 = c.delta0 + 2.0 * gamma * s2 / a
    rounds, note = _floor_rounds(2.0 * phi0 / gamma, target, 12.0 * s2 / a**2)
    if alpha is not None:
        note = "; ".join(x for x in (note, f"alpha measured {a:.4g} (worst case {compressor.alpha:.4g})") if x)
    point = _point("ef21", compressor, gamma, rounds, dense_bits(c.dim) + rounds * compressor.nominal_bits,
                   "derived (docs/theory.md §2.12.4) for EF21-SGD, Fatkhullin et al. 2021", note=note)
    # The search anchor of the full-batch rule (docs/theory.md §2.9, "Search anchor"): the same step
    # shrinks with K/d here too, while the good steps do not.
    return replace(point, **ef21_search_anchor(c))


#: The rule per method when the job sets a minibatch (vr_marina keeps its own, b' = b).
STOCHASTIC_RULES = {"gd": gd_sgd_rule, "dcgd": sgd_rule, "diana": diana_sgd_rule, "marina": marina_sgd_rule,
                    "pp_marina": pp_marina_sgd_rule, "ef21": ef21_sgd_rule}
