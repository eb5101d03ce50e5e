"""The search anchors of EF21 and DIANA (docs/theory.md §2.9 and §2.3, "Search anchor") on a closed-form
problem."""

import numpy as np
import pytest

from bittune.constants import Constants
from bittune.theory import DIANA_ANCHOR_RANGE, EF21_ANCHOR_RANGE, theory_point


def _diag_constants(diag, n=4):
    # f(x) = 1/2 x^T diag(a) x on every worker (identical workers): L = L_QM = max a
    # (the Hessian's largest eigenvalue; Nesterov, "Introductory Lectures on Convex
    # Optimization", 2004, §1.2.2, from memory), and L_QM = sqrt(mean_i L_i^2) = max a.
    L = float(np.max(diag))
    return Constants(n_workers=n, dim=len(diag), L=L, L_workers=np.full(n, L), L_plus=L, L_pm=0.0, delta0=1.0,
                     grad_sq0=1.0, local_grad_sq0=1.0, heterogeneity0=0.0)


@pytest.mark.parametrize("k", [1, 3, 10])
def test_ef21_anchor_is_one_over_L_whatever_k(k):
    c = _diag_constants(np.array([4.0, 2.0, 1.0, 0.5, 0.25, 0.1, 0.1, 0.1, 0.1, 0.1]))
    t = theory_point("ef21", f"top_k:{k}", c, target=1e-6)
    # Anchor: 1/L, the step of EF21's uncompressed limit (K = d is GD); L = 4 in closed form.
    assert t.search_anchor == pytest.approx(0.25, rel=1e-12)
    assert t.search_range == EF21_ANCHOR_RANGE
    # Theory step for Top-K's worst case alpha = K/d (Richtarik et al. 2021, Thm 1, from memory):
    # gamma = 1/(L + L_QM sqrt(1-a)/(1-sqrt(1-a))); equal to the anchor only at K = d.
    a = k / 10
    gamma = 1.0 / (4.0 + 4.0 * np.sqrt(1 - a) / (1 - np.sqrt(1 - a)))
    assert t.step_size == pytest.approx(gamma, rel=1e-12)
    # The range reaches down to the theory step for these K (anchor / gamma <= 256).
    assert EF21_ANCHOR_RANGE[0] * t.search_anchor <= t.step_size <= EF21_ANCHOR_RANGE[1] * t.search_anchor


@pytest.mark.parametrize("k", [1, 3, 10])
def test_diana_anchor_is_its_uncompressed_step_whatever_k(k):
    c = _diag_constants(np.array([4.0, 2.0, 1.0, 0.5, 0.25, 0.1, 0.1, 0.1, 0.1, 0.1]))
    t = theory_point("diana", f"rand_k:{k}", c, target=1e-6)
    # Anchor: 1/(2L), DIANA's step at omega = 0; L = 4 in closed form.
    assert t.search_anchor == pytest.approx(0.125, rel=1e-12)
    assert t.search_range == DIANA_ANCHOR_RANGE
    # Theory step (docs/theory.md §2.3, derived; Mishchenko et al. 2019 for the method): Rand-K has
    # omega = d/K - 1 (Beznosikov et al. 2020, "On Biased Compression for Distributed Learning",
    # Table 1, from memory); gamma = min{1/(2L), sqrt(n)/(sqrt(12 omega)(1+omega) L_QM)}, n = 4.
    omega = 10 / k - 1
    gamma = 0.125 if omega == 0 else min(0.125, 2.0 / (np.sqrt(12 * omega) * (1 + omega) * 4.0))
    assert t.step_size == pytest.approx(gamma, rel=1e-12)
    # At K = d DIANA is uncompressed and the anchor is its theory step.
    assert (t.step_size == pytest.approx(t.search_anchor)) == (k == 10)
    assert DIANA_ANCHOR_RANGE[0] * t.search_anchor <= t.step_size <= DIANA_ANCHOR_RANGE[1] * t.search_anchor


def test_other_rules_have_no_anchor():
    c = _diag_constants(np.array([4.0, 1.0, 1.0, 1.0]))
    for method, comp in (("marina", "rand_k:1"), ("dcgd", "rand_k:2"), ("pp_marina", "rand_k:1")):
        t = theory_point(method, comp, c, target=1e-6)
        assert t.search_anchor is None and t.search_range is None


def test_ef21_stochastic_rule_keeps_the_anchor():
    # With a minibatch EF21 takes its stochastic form (docs/theory.md §2.12.4, our derivation:
    # gamma = 1/(L + 4 L_QM/alpha)); its search anchor stays 1/L, L = 4 in closed form as above.
    from dataclasses import replace

    c = replace(_diag_constants(np.array([4.0, 2.0, 1.0, 0.5, 0.25, 0.1, 0.1, 0.1, 0.1, 0.1])),
                minibatch=8, noise_variance=1e-3, noise_variance0=1e-3)
    t = theory_point("ef21", "top_k:2", c, target=1e-2)
    assert t.step_size == pytest.approx(1.0 / (4.0 + 4.0 * 4.0 / 0.2), rel=1e-12)
    assert t.search_anchor == pytest.approx(0.25, rel=1e-12)
    assert t.search_range == EF21_ANCHOR_RANGE
