"""The problem constants that the probe measures and the theory rules consume."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np

__all__ = ["Constants"]


@dataclass
class Constants:
    """Smoothness and scale constants of f = (1/n) sum_i f_i (docs/theory.md §3.1).

    Every smoothness value already includes ``safety`` (a factor >= 1 applied to
    the estimates). ``bound_*`` hold closed-form upper bounds where the model
    offers them (None otherwise), for comparison only.
    """

    n_workers: int
    dim: int
    L: float  # L_- : smoothness of f
    L_workers: np.ndarray  # (n,) L_i
    L_plus: float  # mean-squared constant L_+
    L_pm: float  # Hessian variance L_pm
    delta0: float  # f(x0) - lower bound of f
    grad_sq0: float  # ||grad f(x0)||^2
    local_grad_sq0: float  # (1/n) sum_i ||grad f_i(x0)||^2
    heterogeneity0: float  # (1/n) sum_i ||grad f_i(x0) - grad f(x0)||^2
    safety: float = 1.0
    bound_L: float | None = None
    bound_L_workers: np.ndarray | None = None
    #: Average smoothness calL (docs/theory.md §2.5): calL^2 = mean_i calL_i^2 with
    #: (1/m_i) sum_j ||grad f_ij(x) - grad f_ij(y)||^2 <= calL_i^2 ||x - y||^2.
    #: None when the model has no per-sample gradients.
    L_sample: float | None = None
    samples_per_worker: float | None = None  # mean m_i (VR-MARINA's p and b')
    min_samples_per_worker: int | None = None  # min m_i (the largest minibatch b')
    #: The PL constant mu the user states (job ``assume.pl_mu``): (1/2)||grad f||^2 >= mu (f - f_inf).
    #: When set, the theory rules that have a PL form use it (docs/theory.md §2.7, §2.9).
    pl_mu: float | None = None
    extra: dict = field(default_factory=dict)  # e.g. measured contraction of Top-K
    #: f(x0) - mean_i (a lower bound of f_i): an upper bound on Delta* (docs/theory.md §2.2) from the
    #: model's per-worker bounds, never from the user's ``probe.lower_bound`` (which bounds f only).
    #: None for constants built by hand or saved before it existed: Delta0 stands in.
    delta_star0: float | None = None
    #: Stochastic gradients (job ``minibatch``, docs/theory.md §2.12): the minibatch b, and the
    #: gradient-noise variance of a worker's b-row estimate, sigma_i^2 = (1/b)(1/m_i) sum_j
    #: ||grad f_ij(x) - grad f_i(x)||^2 (rows drawn with replacement), averaged over the workers:
    #: ``noise_variance0`` at x0, ``noise_variance`` the largest over the probe points (x0 and
    #: along its runs; what the rules use), ``noise_workers0`` the per-worker values at x0.
    #: None: full batch.
    minibatch: int | None = None
    noise_variance: float | None = None
    noise_variance0: float | None = None
    noise_workers0: np.ndarray | None = None

    @property
    def L_am(self) -> float:
        return float(np.mean(self.L_workers))

    @property
    def L_qm(self) -> float:
        return float(np.sqrt(np.mean(np.square(self.L_workers))))

    @property
    def L_max(self) -> float:
        return float(np.max(self.L_workers))

    @property
    def delta_star_bound(self) -> float:
        """Upper bound on Delta* = f_inf - (1/n) sum_i f_i^inf: f_inf <= f(x0) and f_i >= the model's
        per-worker lower bound (``delta_star0``; Delta0 when that was not measured)."""
        return float(self.delta0 if self.delta_star0 is None else self.delta_star0)

    def to_dict(self) -> dict:
        """Plain types only (for YAML/JSON): arrays become lists."""
        out = {}
        for key, value in asdict(self).items():
            if isinstance(value, np.ndarray):
                value = [float(v) for v in value]
            elif isinstance(value, (np.floating, np.integer)):
                value = value.item()
            out[key] = value
        out.update(L_am=self.L_am, L_qm=self.L_qm, L_max=self.L_max)
        return out

    @classmethod
    def from_dict(cls, doc: dict) -> "Constants":
        doc = {k: v for k, v in doc.items() if k not in ("L_am", "L_qm", "L_max")}
        for key in ("L_workers", "bound_L_workers", "noise_workers0"):
            if doc.get(key) is not None:
                doc[key] = np.asarray(doc[key], dtype=np.float64)
        return cls(**doc)
