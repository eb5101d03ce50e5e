"""Theory-safe settings and predicted cost to a target, per method and compressor.

Each rule turns the measured :class:`~bittune.constants.Constants` and one
compressor into a step size (plus sync probability or shift rate), the rounds
K that its published bound needs to reach E||grad f(x_hat)||^2 <= target, and
the uplink bits per worker for those K rounds (docs/theory.md §2.10). ``target`` is
the absolute target on ||grad f||^2 (docs/theory.md writes it eps^2).

A new method is one file in ``methods/`` plus its rule in :data:`RULES`.
"""

from __future__ import annotations

import inspect
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np

from ._random import trajectory_keys
from .compressors import Compressor, make_compressor
from .constants import Constants
from .methods import dense_bits

__all__ = [
    "TheoryPoint", "RULES", "theory_point", "theory_table", "measured_contraction",
    "default_compressor_specs", "ef21_search_anchor", "EF21_ANCHOR_RANGE", "diana_search_anchor",
    "DIANA_ANCHOR_RANGE", "gd_rule", "dcgd_rule",
    "diana_rule", "marina_rule", "ef21_rule",
    "pp_marina_rule", "vr_marina_rule", "ab_step_size", "fits", "pl_point", "PL_METHODS",
]


@dataclass(frozen=True)
class TheoryPoint:
    """One theory setting: step size, method parameters, predicted rounds and bits."""

    method: str
    compressor: str  # label, e.g. "rand_k:6"
    step_size: float
    sync_probability: float | None
    shift_rate: float | None
    predicted_rounds: int
    predicted_bits_per_worker: float
    source: str  # short citation of the rule
    note: str = ""
    clients: int | None = None  # PP-MARINA: clients r sampled per compressed round
    minibatch: int | None = None  # VR-MARINA: rows b' per worker per compressed round
    #: Under PL (constants.pl_mu): the predicted per-round contraction 1 - gamma mu of the gap
    #: (linear rate); None for the non-convex rules.
    rate: float | None = None
    #: The step the search's step multiplier scales, when the method has a practical anchor other
    #: than its theory step (EF21: 1/L, docs/theory.md §2.9 "Search anchor"); None: the theory step.
    search_anchor: float | None = None
    #: The multiplier range over ``search_anchor`` that the search draws from (replaces
    #: ``search.step_range`` for this method); None with no anchor.
    search_range: tuple[float, float] | None = None

    def method_params(self) -> dict[str, float]:
        """The method parameters in the form :func:`bittune.simulate.simulate` takes."""
        out = {"sync_probability": self.sync_probability, "shift_rate": self.shift_rate,
               "clients": self.clients, "minibatch": self.minibatch}
        return {k: v for k, v in out.items() if v is not None}

    def to_dict(self) -> dict:
        """Plain types for JSON/YAML."""
        return {
            "method": self.method,
            "compressor": self.compressor,
            "step_size": float(self.step_size),
            "sync_probability": None if self.sync_probability is None else float(self.sync_probability),
            "shift_rate": None if self.shift_rate is None else float(self.shift_rate),
            "clients": None if self.clients is None else int(self.clients),
            "minibatch": None if self.minibatch is None else int(self.minibatch),
            "predicted_rounds": int(self.predicted_rounds),
            "predicted_bits_per_worker": float(self.predicted_bits_per_worker),
            **({} if self.rate is None else {"linear_rate": float(self.rate)}),
            **({} if self.search_anchor is None else {"search_anchor": float(self.search_anchor)}),
            "source": self.source,
        }


def _rounds(numerator: float, target: float) -> int:
    """K = ceil(numerator / target), at least 1 (docs/theory.md §2, "Common facts")."""
    value = numerator / target
    if not math.isfinite(value):
        raise ValueError(f"predicted rounds are not finite ({numerator!r} / target {target!r})")
    return max(1, math.ceil(value))


def _point(method, comp, gamma, rounds, bits, source, *, sync=None, shift=None, note="", clients=None,
           minibatch=None):
    return TheoryPoint(method, comp.label(), float(gamma), sync, shift, int(rounds), float(bits),
                       source, note, clients, minibatch)


def gd_rule(compressor: Compressor, constants: Constants, *, target: float) -> TheoryPoint:
    """GD: gamma = 1/L, K = ceil(2 L Delta0 / target), 32 d bits per round.

    Nesterov, "Introductory Lectures on Convex Optimization", 2004, section 1.2.3
    (from memory): min_k ||grad f(x^k)||^2 <= 2 Delta0 / (gamma K) for gamma <= 1/L.
    """
    c = constants
    rounds = _rounds(2.0 * c.L * c.delta0, target)
    return _point("gd", compressor, 1.0 / c.L, rounds, rounds * dense_bits(c.dim),
                  "Nesterov 2004, sec. 1.2.3 (from memory)")


def dcgd_rule(compressor: Compressor, constants: Constants, *, target: float) -> TheoryPoint:
    """DCGD, no extra assumption (docs/theory.md §2.2 Version A).

    Khaled & Richtarik, "Better Theory for SGD in the Nonconvex World", 2020,
    Theorem 2 / Corollary 1 (numbers from memory): with the ABC constants
    A = omega L_max/n, B = 1, C = 2 omega L_max Delta*/n, the rounds
    K >= (12 Delta0 L/eps) max{B, 12 Delta0 A/eps, 2C/eps} and
    gamma = min{1/(L B), 1/sqrt(L A K), eps/(2 L C)} give min_k E||grad f||^2 <= eps.
    K comes first (gamma depends on it). omega = 0 is GD: the GD rule applies.
    """
    c, eps, omega = constants, target, compressor.omega
    if omega == 0.0:
        p = gd_rule(compressor, constants, target=target)
        return TheoryPoint("dcgd", p.compressor, p.step_size, None, None, p.predicted_rounds,
                           p.predicted_bits_per_worker, p.source, "omega = 0: DCGD is GD")
    A = omega * c.L_max / c.n_workers
    B = 1.0
    delta_star, note = c.delta_star_bound, ""
    if not math.isfinite(delta_star):  # a worker's loss unbounded below (only test quadratics)
        delta_star, note = c.delta0, "Delta* unbounded by the model: Delta0 stands in (no guarantee)"
    C = 2.0 * omega * c.L_max * delta_star / c.n_workers
    rounds = _rounds(12.0 * c.delta0 * c.L * max(B, 12.0 * c.delta0 * A / eps, 2.0 * C / eps), eps)
    steps = [1.0 / (c.L * B)]
    if A > 0:
        steps.append(1.0 / math.sqrt(c.L * A * rounds))
    if C > 0:
        steps.append(eps / (2.0 * c.L * C))
    return _point("dcgd", compressor, min(steps), rounds, rounds * compressor.nominal_bits,
                  "Khaled & Richtarik 2020, Thm 2 / Cor. 1 (from memory)", note=note)


def diana_rule(compressor: Compressor, constants: Constants, *, target: float) -> TheoryPoint:
    """DIANA with our derived safe step (docs/theory.md §2.3).

    Method: Mishchenko, Gorbunov, Takac, Richtarik, "Distributed Learning with
    Compressed Gradient Differences", 2019. Rule derived in docs/theory.md §2.3
    (Lyapunov function f - f_inf + c H), consistent with the rate quoted by
    MARINA (Gorbunov et al., 2021; from memory): alpha = 1/(1+omega),
    gamma = min{1/(2L), sqrt(n)/(sqrt(12 omega)(1+omega) L_QM)}. Shifts start at
    the local gradients (one dense message, H^0 = 0), so K = ceil(2 Delta0/(gamma eps)).
    """
    c, omega = constants, compressor.omega
    gamma = 1.0 / (2.0 * c.L)
    if omega > 0:
        gamma = min(gamma, math.sqrt(c.n_workers) / (math.sqrt(12.0 * omega) * (1.0 + omega) * c.L_qm))
    rounds = _rounds(2.0 * c.delta0 / gamma, target)
    bits = dense_bits(c.dim) + rounds * compressor.nominal_bits
    point = _point("diana", compressor, gamma, rounds, bits,
                   "derived (docs/theory.md §2.3) for DIANA, Mishchenko et al. 2019", shift=1.0 / (1.0 + omega))
    return replace(point, **diana_search_anchor(c))


#: DIANA's search range as multipliers of its anchor 1/(2L) (docs/theory.md §2.3, "Search anchor";
#: common practice, no source): 1/(64 L) to 32/L. Good DIANA steps were measured at 0.9-2/L for
#: K = 2..29 on benchmarks/quality.py's problem but at 17-22/L on the demo data (the probe's L is
#: measured where the probe ran, not along the run); the low end 1/512 spent a fifth of a 60-trial
#: study below 0.1 anchors. A theory step below the range (small K/d) is clipped to its lower end.
DIANA_ANCHOR_RANGE = (1.0 / 32.0, 64.0)


def diana_search_anchor(c: Constants) -> dict:
    """DIANA's practical search anchor: 1/(2L), its own step at omega = 0 (its uncompressed limit),
    whatever the density; the theory step shrinks like omega^(-3/2) with d/K while the good steps do
    not (docs/theory.md §2.3, "Search anchor")."""
    return {"search_anchor": 1.0 / (2.0 * c.L), "search_range": DIANA_ANCHOR_RANGE}


def ab_step_size(*, L_minus: float, L_plus: float, L_pm: float, p: float, A: float, B: float) -> float:
    """MARINA's step under the AB inequality (docs/theory.md §1.1 and §2.8).

    Szlendak, Tyurin, Richtarik, "Permutation Compressors for Provably Faster
    Distributed Nonconvex Optimization", ICLR 2022, main theorem (number from
    memory): gamma = 1/(L_- + sqrt(((1-p)/p)((A - B) L_+^2 + B L_pm^2))), which gives
    E||grad f(x_hat)||^2 <= 2 Delta0/(gamma K). Independent Q_i in U(omega) have
    A = omega/n, B = 0 and recover the refined MARINA step.
    """
    if not (0.0 < p <= 1.0):
        raise ValueError(f"p must be in (0, 1], got {p!r}")
    if not (A >= B >= 0.0):
        raise ValueError(f"the AB constants must satisfy A >= B >= 0, got A = {A!r}, B = {B!r}")
    return 1.0 / (L_minus + math.sqrt((1.0 - p) / p * ((A - B) * L_plus**2 + B * L_pm**2)))


def marina_rule(compressor: Compressor, constants: Constants, *, target: float) -> TheoryPoint:
    """MARINA, refined form (docs/theory.md §2.4), AB form for correlated compressors (2.8).

    Gorbunov, Burlachenko, Li, Richtarik, "MARINA: Faster Non-Convex Distributed
    Learning with Compression", ICML 2021, Theorem 2.1 and Corollary 2.1 (from
    memory), in the refined form of Szlendak, Tyurin, Richtarik, ICLR 2022 (from
    memory): p = zeta/d, gamma = 1/(L_- + L_+ sqrt((1-p) omega/(p n))),
    E||grad f(x_hat)||^2 <= 2 Delta0/(gamma K). Bits: 32 d + K (p 32 d + (1-p) bits(Q)).
    A correlated compressor (PermK) uses :func:`ab_step_size` with its own (A, B)
    and the Hessian variance L_pm; p = zeta/d is 1/n for PermK when d >= n.
    """
    c, omega = constants, compressor.omega
    p = min(1.0, compressor.density / compressor.dim)  # density >= 1, so p > 0
    if compressor.correlated:
        if not (math.isfinite(c.L_pm) and c.L_pm >= 0):
            raise ValueError(f"constants.L_pm must be a finite number >= 0, got {c.L_pm!r}")
        A, B = compressor.ab
        gamma = ab_step_size(L_minus=c.L, L_plus=c.L_plus, L_pm=c.L_pm, p=p, A=A, B=B)
        source = "Szlendak et al. 2022, AB theorem for MARINA (from memory)"
    else:
        gamma = 1.0 / (c.L + c.L_plus * math.sqrt((1.0 - p) * omega / (p * c.n_workers)))
        source = "Gorbunov et al. 2021, Thm 2.1 refined (from memory)"
    rounds = _rounds(2.0 * c.delta0 / gamma, target)
    per_round = p * dense_bits(c.dim) + (1.0 - p) * compressor.nominal_bits
    return _point("marina", compressor, gamma, rounds, dense_bits(c.dim) + rounds * per_round, source, sync=p)


def pp_marina_rule(compressor: Compressor, constants: Constants, *, target: float,
                   clients: int | None = None) -> TheoryPoint:
    """PP-MARINA, r clients sampled with replacement per compressed round (docs/theory.md §2.6).

    Gorbunov, Burlachenko, Li, Richtarik, "MARINA: Faster Non-Convex Distributed
    Learning with Compression", ICML 2021, Theorem 4.1 (number and form from
    memory; docs/theory.md §2.6 re-derives the form): p = zeta r/(d n) clipped to (0, 1],
    gamma = 1/(L + L_QM sqrt((1-p)(1+omega)/(p r))), E||grad f(x_hat)||^2 <=
    2 Delta0/(gamma K). Bits per worker (the mean over workers of what each sent):
    32 d + K (p 32 d + (1-p) r bits(Q)/n). ``clients`` defaults to n.
    """
    c, omega, n = constants, compressor.omega, constants.n_workers
    r = n if clients is None else clients
    if isinstance(r, (bool, np.bool_)) or not isinstance(r, (int, np.integer)) or not 1 <= r <= n:
        raise ValueError(f"clients must be an integer in [1, {n}], got {clients!r}")
    r = int(r)
    p = min(1.0, compressor.density * r / (compressor.dim * n))  # density >= 1, so p > 0
    gamma = 1.0 / (c.L + c.L_qm * math.sqrt((1.0 - p) * (1.0 + omega) / (p * r)))
    rounds = _rounds(2.0 * c.delta0 / gamma, target)
    per_round = p * dense_bits(c.dim) + (1.0 - p) * r * compressor.nominal_bits / n
    return _point("pp_marina", compressor, gamma, rounds, dense_bits(c.dim) + rounds * per_round,
                  "Gorbunov et al. 2021, Thm 4.1 (from memory)", sync=p, clients=r)


def vr_marina_rule(compressor: Compressor, constants: Constants, *, target: float,
                   minibatch: int | None = None) -> TheoryPoint:
    """VR-MARINA, minibatches of b' rows drawn with replacement (docs/theory.md §2.5).

    Gorbunov, Burlachenko, Li, Richtarik, "MARINA: Faster Non-Convex Distributed
    Learning with Compression", ICML 2021, Theorem 3.1 (number and form from
    memory; docs/theory.md §2.5 re-derives the form): p = min(zeta/d, b'/(m + b')),
    gamma = 1/(L + sqrt(((1-p)/(p n)) (omega L_QM^2 + (1+omega) calL^2/b'))),
    E||grad f(x_hat)||^2 <= 2 Delta0/(gamma K). calL is the average smoothness
    (``constants.L_sample``), m the mean worker size. Bits as MARINA's;
    gradient evaluations per worker p m + (1-p) 2 b' per round (in ``note``).
    ``minibatch`` defaults to :func:`bittune.methods.vr_marina.default_minibatch`.
    """
    from .methods.vr_marina import default_minibatch

    c, omega, n = constants, compressor.omega, constants.n_workers
    if c.L_sample is None or c.samples_per_worker is None:
        raise ValueError("vr_marina needs constants.L_sample and samples_per_worker (a model with "
                         "per-sample gradients, measured by the probe)")
    m_min = int(c.min_samples_per_worker or c.samples_per_worker)
    b = default_minibatch([m_min]) if minibatch is None else minibatch
    if getattr(c, "minibatch", None) is not None:  # the job's minibatch fixes b' (docs/theory.md §2.12)
        b = c.minibatch
    if isinstance(b, (bool, np.bool_)) or not isinstance(b, (int, np.integer)) or b < 1:
        raise ValueError(f"minibatch must be an integer >= 1, got {minibatch!r}")
    b, m = int(b), float(c.samples_per_worker)
    p = min(compressor.density / compressor.dim, b / (m + b))
    var = omega * c.L_qm ** 2 + (1.0 + omega) * c.L_sample ** 2 / b
    gamma = 1.0 / (c.L + math.sqrt((1.0 - p) / (p * n) * var))
    rounds = _rounds(2.0 * c.delta0 / gamma, target)
    per_round = p * dense_bits(c.dim) + (1.0 - p) * compressor.nominal_bits
    evals = p * m + (1.0 - p) * 2.0 * b
    return _point("vr_marina", compressor, gamma, rounds, dense_bits(c.dim) + rounds * per_round,
                  "Gorbunov et al. 2021, Thm 3.1 (from memory)", sync=p, minibatch=b,
                  note=f"{evals:.4g} gradient evaluations per worker per round (m = {m:.4g})")


def ef21_rule(compressor: Compressor, constants: Constants, *, target: float,
              alpha: float | None = None) -> TheoryPoint:
    """EF21 (docs/theory.md §2.9).

    Richtarik, Sokolov, Fatkhullin, "EF21: A New, Simpler, Theoretically Better,
    and Practically Faster Error Feedback", NeurIPS 2021, Theorem 1 (number from
    memory): C in B(alpha), theta = 1 - sqrt(1-alpha), beta = (1-alpha)/theta,
    gamma = 1/(L + L_QM sqrt(beta/theta)); with G^0 = 0 (dense start)
    E||grad f(x_hat)||^2 <= 2 Delta0/(gamma K). An unbiased Q is used as Q/(1+omega),
    alpha = 1/(1+omega). ``alpha`` overrides the compressor's worst case (e.g. the
    measured contraction of Top-K, :func:`measured_contraction`).
    """
    c = constants
    a = compressor.alpha if alpha is None else float(alpha)
    if not 0.0 < a <= 1.0:
        raise ValueError(f"alpha must be in (0, 1], got {alpha!r}")
    # theta = 1 - sqrt(1-a) written without cancellation; sqrt(beta/theta) = sqrt(1-a)/theta.
    theta = a / (1.0 + math.sqrt(1.0 - a))
    gamma = 1.0 / (c.L + c.L_qm * math.sqrt(1.0 - a) / theta)
    rounds = _rounds(2.0 * c.delta0 / gamma, target)
    note = "" if alpha is None else f"alpha measured {a:.4g} (worst case {compressor.alpha:.4g})"
    point = _point("ef21", compressor, gamma, rounds, dense_bits(c.dim) + rounds * compressor.nominal_bits,
                   "Richtarik et al. 2021, Thm 1 (from memory)", note=note)
    return replace(point, **ef21_search_anchor(c))


#: EF21's search range as multipliers of its anchor 1/L (docs/theory.md §2.9, "Search anchor";
#: common practice, no source): down to 1/256 (the theory step at K = 1 for d up to ~128 when
#: L_QM ~ L) and up to 64/L: the probe's L is measured at the probe points, and good steps were
#: 2-5/L on benchmarks/quality.py's problem but reached the former cap 16/L on the demo data.
EF21_ANCHOR_RANGE = (1.0 / 256.0, 64.0)


def ef21_search_anchor(c: Constants) -> dict:
    """EF21's practical search anchor: the step 1/L of its uncompressed limit (K = d, where EF21 is GD),
    whatever the density; the theory step gamma ~ alpha/(2 L_QM) shrinks with K/d while the good
    steps do not (docs/theory.md §2.9, "Search anchor")."""
    return {"search_anchor": 1.0 / c.L, "search_range": EF21_ANCHOR_RANGE}


#: One rule per method name (the keys of :data:`bittune.methods.METHODS`).
RULES: dict[str, Callable[..., TheoryPoint]] = {
    "gd": gd_rule, "dcgd": dcgd_rule, "diana": diana_rule, "marina": marina_rule, "ef21": ef21_rule,
    "pp_marina": pp_marina_rule, "vr_marina": vr_marina_rule,
}


#: Methods with a PL rule (docs/theory.md §2.7, §2.9; Karimi et al. 2016 for GD). DCGD and DIANA
#: keep their non-convex rules under PL (docs/theory.md §2.7 has no PL form for them).
PL_METHODS = ("gd", "marina", "pp_marina", "vr_marina", "ef21")


def _pl_rounds(gamma: float, mu: float, c: Constants, target: float) -> int:
    """Rounds for (1 - gamma mu)^K Delta0 <= target / (2 L).

    An L-smooth f has ||grad f||^2 <= 2 L (f - f_inf) (Nesterov 2004, eq. 2.1.7, from
    memory), so a gap of target/(2L) meets the target on ||grad f||^2.
    """
    q = 1.0 - gamma * mu
    need = c.delta0 * 2.0 * c.L / target
    if need <= 1.0:
        return 1
    if q <= 0.0:
        return 1
    return max(1, math.ceil(math.log(need) / -math.log(q)))


def pl_point(point: TheoryPoint, compressor: Compressor, constants: Constants, *, target: float,
             alpha: float | None = None) -> TheoryPoint:
    """The PL version of a non-convex theory point (``constants.pl_mu`` set; docs/theory.md §2.7, §2.9).

    * GD: gamma = 1/L and f(x^K) - f_inf <= (1 - mu/L)^K Delta0 (Karimi, Nutini,
      Schmidt, ECML-PKDD 2016, Thm 1; from memory).
    * MARINA: gamma = min{1/(L + L_QM sqrt(2 (1-p) omega/(p n))), p/(2 mu)} and
      E[f(x^K) - f_inf] <= (1 - gamma mu)^K Delta0 (Gorbunov et al. 2021, PL theorem;
      number from memory, form docs/theory.md §2.7; the start g^0 = grad f(x^0) makes the
      Lyapunov term (gamma/p)||g - grad f||^2 zero). PermK keeps its AB step, capped by p/(2 mu).
    * PP-MARINA and VR-MARINA: their non-convex variance terms with the same factor 2,
      min with p/(2 mu) ("analogous", docs/theory.md §2.7, from memory).
    * EF21: gamma = min{1/(L + L_QM sqrt(2 beta/theta)), theta/(2 mu)} (Richtarik et al.
      2021, Thm 2; from memory; dense start, G^0 = 0).
    Rounds from the linear rate (:func:`_pl_rounds`); bits as the non-convex rule counts them.
    ``alpha``: EF21's contraction (measured or worst case), as the EF21 rule took it.
    """
    c, mu, omega = constants, float(constants.pl_mu), compressor.omega
    m = point.method
    p = point.sync_probability
    if m == "gd":
        gamma = 1.0 / c.L
    elif m == "marina" and compressor.correlated:
        gamma = min(point.step_size, p / (2.0 * mu))
    elif m == "marina":
        gamma = min(1.0 / (c.L + c.L_qm * math.sqrt(2.0 * (1.0 - p) * omega / (p * c.n_workers))), p / (2.0 * mu))
    elif m == "pp_marina":
        r = point.clients
        gamma = min(1.0 / (c.L + c.L_qm * math.sqrt(2.0 * (1.0 - p) * (1.0 + omega) / (p * r))), p / (2.0 * mu))
    elif m == "vr_marina":
        b = point.minibatch
        var = omega * c.L_qm ** 2 + (1.0 + omega) * c.L_sample ** 2 / b
        gamma = min(1.0 / (c.L + math.sqrt(2.0 * (1.0 - p) / (p * c.n_workers) * var)), p / (2.0 * mu))
    elif m == "ef21":
        a = compressor.alpha if alpha is None else float(alpha)
        theta = a / (1.0 + math.sqrt(1.0 - a))  # 1 - sqrt(1-a) without cancellation
        # sqrt(2 beta/theta) = sqrt(2) sqrt(1-a)/theta (docs/theory.md §2.9)
        gamma = min(1.0 / (c.L + c.L_qm * math.sqrt(2.0) * math.sqrt(1.0 - a) / theta), theta / (2.0 * mu))
    else:
        return point
    rounds = _pl_rounds(gamma, mu, c, target)
    per_round = (point.predicted_bits_per_worker - _start_bits(point, c)) / point.predicted_rounds
    bits = _start_bits(point, c) + rounds * per_round
    return TheoryPoint(m, point.compressor, float(gamma), point.sync_probability, point.shift_rate, int(rounds),
                       float(bits), point.source + "; PL form", point.note, point.clients, point.minibatch,
                       1.0 - gamma * mu, point.search_anchor, point.search_range)


def _start_bits(point: TheoryPoint, c: Constants) -> float:
    """Bits of the dense start message that a rule's prediction includes (all but GD and DCGD)."""
    return 0.0 if point.method in ("gd", "dcgd") else dense_bits(c.dim)


def _check_constants(c: Constants) -> None:
    problems = []
    for key in ("L", "L_plus"):
        value = float(getattr(c, key))
        if not (math.isfinite(value) and value > 0):
            problems.append(f"constants.{key} must be a finite number > 0, got {value!r}")
    workers = np.asarray(c.L_workers, dtype=np.float64)
    if workers.shape != (c.n_workers,) or not np.all(np.isfinite(workers) & (workers > 0)):
        problems.append(f"constants.L_workers must be {c.n_workers} finite numbers > 0, got {workers!r}")
    if not (math.isfinite(c.delta0) and c.delta0 >= 0):
        problems.append(f"constants.delta0 must be a finite number >= 0, got {c.delta0!r}")
    if problems:
        raise ValueError("; ".join(problems))


def fits(method: str, comp: Compressor) -> bool:
    """Whether ``method``'s theory rule applies to ``comp``.

    GD sends dense gradients; DCGD, DIANA, MARINA and PP-MARINA need an unbiased
    Q; EF21 takes any.

    Correlated compressors (PermK) fit MARINA (its AB theorem, docs/theory.md §2.8) and EF21
    (a per-worker analysis); the DCGD, DIANA and PP-MARINA rules assume independent Q_i.
    """
    if method == "gd":
        return comp.name == "identity"
    if method == "ef21":
        return True
    return comp.unbiased and (method == "marina" or not comp.correlated)  # vr_marina: independent Q_i


_fits = fits  # the older private name


def _needs(method: str, comp: Compressor) -> str:
    if method == "gd":
        return "identity"
    if comp.unbiased and comp.correlated:
        return "independent compressors (its theory rule assumes independent Q_i)"
    return "an unbiased compressor"


def theory_point(method: str, compressor: Compressor | str | Mapping, constants: Constants, *,
                 target: float, contraction: float | None = None,
                 clients: int | None = None, minibatch: int | None = None) -> TheoryPoint:
    """The theory setting of ``method`` with ``compressor`` (object or spec like "rand_k:6").

    ``target`` is the absolute target on ||grad f||^2; ``contraction`` overrides
    the compressor's alpha for rules that take one (EF21); ``clients`` is the r
    of PP-MARINA (default n). A spec is built for ``constants.n_workers`` workers.
    """
    if method not in RULES:
        raise ValueError(f"method must be one of {', '.join(RULES)}, got {method!r}")
    comp = compressor if isinstance(compressor, Compressor) else make_compressor(
        compressor, constants.dim, n_workers=constants.n_workers)
    if comp.dim != constants.dim:
        raise ValueError(f"compressor {comp.label()} has dim {comp.dim}, constants.dim is {constants.dim}")
    if comp.needs_workers and comp.n_workers != constants.n_workers:
        raise ValueError(f"compressor {comp.label()} is built for {comp.n_workers} workers, "
                         f"constants.n_workers is {constants.n_workers}")
    if not fits(method, comp):
        raise ValueError(f"{method} needs {_needs(method, comp)}, got {comp.label()}")
    target = float(target)
    if not (math.isfinite(target) and target > 0):
        raise ValueError(f"target must be a finite number > 0, got {target!r}")
    _check_constants(constants)
    rule = RULES[method]
    kwargs = {}
    if contraction is not None:
        if "alpha" not in inspect.signature(rule).parameters:
            raise ValueError(f"contraction applies to ef21 only, not to {method}")
        kwargs["alpha"] = contraction
    if clients is not None:
        if "clients" not in inspect.signature(rule).parameters:
            raise ValueError(f"clients applies to pp_marina only, not to {method}")
        kwargs["clients"] = clients
    if minibatch is not None:
        if "minibatch" not in inspect.signature(rule).parameters:
            raise ValueError(f"minibatch applies to vr_marina only, not to {method}")
        kwargs["minibatch"] = minibatch
    stochastic = getattr(constants, "minibatch", None) is not None
    if stochastic and method != "vr_marina":  # the job's minibatch: the stochastic forms (§2.12)
        from .stochastic_theory import STOCHASTIC_RULES

        rule = STOCHASTIC_RULES[method]
        kwargs = {k: v for k, v in kwargs.items() if k in inspect.signature(rule).parameters}
    point = rule(comp, constants, target=target, **kwargs)
    # The PL forms have no noise term: with a minibatch only VR-MARINA (full sync rounds) keeps one.
    if constants.pl_mu is not None and method in PL_METHODS and (not stochastic or method == "vr_marina"):
        point = pl_point(point, comp, constants, target=target, alpha=kwargs.get("alpha"))
    return point


def default_compressor_specs(dim: int, *, n_workers: int | None = None) -> dict[str, list[str]]:
    """Per method, a sensible set of compressors for dimension ``dim``.

    K covers 1%, 5%, 10% and 25% of d (common practice, no source); identity
    only for GD (with it, the other methods reduce to GD). With ``n_workers``
    (PermK is built for one n), MARINA also gets perm_k (docs/theory.md §2.8).
    """
    ks = sorted({max(1, round(dim * f)) for f in (0.01, 0.05, 0.1, 0.25)} - {dim})
    rand = [f"rand_k:{k}" for k in ks]
    unbiased = rand + ["dither:2", "dither:4", "natural", "natural_dither:3"]
    marina = unbiased + (["perm_k"] if n_workers is not None and n_workers > 1 else [])
    return {"gd": ["identity"], "dcgd": unbiased, "diana": unbiased, "marina": marina,
            "pp_marina": unbiased, "vr_marina": unbiased, "ef21": [f"top_k:{k}" for k in ks] + rand}


def theory_table(constants: Constants, *, target: float, dim: int | None = None,
                 methods: Sequence[str] = ("gd", "dcgd", "diana", "marina", "pp_marina", "ef21"),
                 compressors: Sequence[str | Mapping] | None = None,
                 contraction_vectors: np.ndarray | None = None) -> list[TheoryPoint]:
    """Theory points for every method x fitting compressor, in that order.

    ``compressors`` default to :func:`default_compressor_specs`; a given list is
    filtered per method (GD: identity; DCGD/DIANA/PP-MARINA: unbiased and
    independent; MARINA: unbiased, PermK included; EF21: any). PP-MARINA rows use r = n.
    With ``contraction_vectors`` (e.g. local gradients, (B, n, d) or (m, d)),
    EF21 with a biased (deterministic) compressor uses the measured contraction.
    """
    if dim is not None and dim != constants.dim:
        raise ValueError(f"dim is {dim} but constants.dim is {constants.dim}")
    defaults = default_compressor_specs(constants.dim, n_workers=constants.n_workers)
    rows = []
    for method in methods:
        if method not in RULES:
            raise ValueError(f"methods: unknown method {method!r} (known: {', '.join(RULES)})")
        specs = defaults[method] if compressors is None else compressors
        for spec in specs:
            comp = make_compressor(spec, constants.dim, key="compressors", n_workers=constants.n_workers)
            if not fits(method, comp):
                continue
            alpha = None
            if method == "ef21" and contraction_vectors is not None and not comp.unbiased:
                alpha = measured_contraction(comp, contraction_vectors)
            rows.append(theory_point(method, comp, constants, target=target, contraction=alpha))
    return rows


def measured_contraction(compressor: Compressor, vectors: np.ndarray, *, draws: int = 8,
                         seed: int = 0) -> float:
    """Effective alpha = 1 - max over ``vectors`` of E||C(x) - x||^2 / ||x||^2.

    docs/theory.md §2.9: Top-K contracts far more than its worst case K/d on real
    vectors, so an autotuner should measure alpha. ``vectors`` is (B, n, d) or
    (m, d); zero rows are skipped. An unbiased Q is measured as Q/(1+omega), as
    EF21 uses it, with the expectation taken over ``draws`` random draws. The
    result is never below the compressor's proven alpha (a lower sample value
    can only be sampling noise) and is a heuristic, not a guarantee: EF21
    compresses differences g_i - grad f_i, not these vectors.
    """
    x = np.asarray(vectors, dtype=np.float64)
    if x.ndim not in (2, 3) or x.shape[-1] != compressor.dim:
        d = compressor.dim
        raise ValueError(f"vectors must have shape (m, {d}) or (B, n, {d}), got {x.shape}")
    if not np.all(np.isfinite(x)):
        raise ValueError("vectors must be finite")
    x = x.reshape(-1, compressor.dim)
    norms = np.einsum("md,md->m", x, x)
    x, norms = x[norms > 0], norms[norms > 0]
    if x.shape[0] == 0:
        raise ValueError("vectors: every vector is zero, the contraction is undefined")
    draws = int(draws) if compressor.unbiased else 1  # a biased compressor here is deterministic
    block = np.broadcast_to(x, (draws, *x.shape))
    out, _ = compressor.compress(block, trajectory_keys(seed + np.arange(draws)), 0)
    if compressor.unbiased:
        out = out / (1.0 + compressor.omega)
    err = out - block
    ratio = np.einsum("bmd,bmd->bm", err, err).mean(axis=0) / norms
    return float(min(1.0, max(1.0 - ratio.max(), compressor.alpha)))
