"""The search's step refinement over the budget's last tenth (docs/design.md, "Step refinement")."""

import math

import numpy as np
import optuna
import pytest
from optuna.trial import TrialState

from bittune.constants import Constants
from bittune.job import SECTIONS, SearchSpec
from bittune.search import REFINE_OCTAVES, Space, enqueue_refinement, refine_plan


def _space(method="marina"):
    defaults = {k: p.default for k, p in SECTIONS["search"].items()}
    spec = SearchSpec(**{**defaults, "methods": [method], "compressors": ["rand_k"], "seeds": 2})
    # f(x) = 1/2 x^T diag(a) x on identical workers: L = L_QM = max a (Nesterov 2004, §1.2.2, from memory).
    c = Constants(n_workers=4, dim=8, L=2.0, L_workers=np.full(4, 2.0), L_plus=2.0, L_pm=0.0, delta0=1.0,
                  grad_sq0=1.0, local_grad_sq0=1.0, heterogeneity0=0.0)
    return Space(spec, c, target=1e-6)


def test_plan_is_the_last_tenth_in_two_stages():
    # Our own rule (no source): a tenth of 60 trials, 3 at quarter octaves then 3 at eighth octaves.
    plan = refine_plan(60)
    assert [start for start, _ in plan] == [54, 57]
    assert plan[0][1] == pytest.approx([2 ** 0.25, 2 ** -0.25, 2 ** 0.5])
    assert plan[1][1] == pytest.approx([2 ** 0.125, 2 ** -0.125, 2 ** 0.25])
    assert refine_plan(19) == []
    big = refine_plan(1000)  # at most twice REFINE_OCTAVES trials
    assert sum(len(f) for _, f in big) == 2 * len(REFINE_OCTAVES) and big[0][0] == 990


def _value(space, target_mult):
    def objective(trial):
        cand = space.suggest(trial)
        trial.set_user_attr("reached", 2)
        # A bowl in log step around target_mult: the best trial is the one nearest to it.
        return 1e4 * (1.0 + abs(math.log(cand.step_mult / target_mult)))
    return objective


@pytest.mark.parametrize("method", ["marina", "diana"])
def test_refinement_enqueues_the_best_step_times_the_factors_once(method):
    space = _space(method)
    study = optuna.create_study(sampler=optuna.samplers.TPESampler(seed=0))
    study.optimize(_value(space, 40.0), n_trials=53)
    assert enqueue_refinement(study, space, budget=60, seeds=2) == 0  # 53 < 54: not yet
    study.optimize(_value(space, 40.0), n_trials=1)
    best = study.best_trial
    added = enqueue_refinement(study, space, budget=60, seeds=2)
    waiting = study.get_trials(states=(TrialState.WAITING,))
    assert added == len(waiting) == 3
    name, lo, hi = space.step_param(method, space.from_params(best.params).compressor)
    want = [min(max(best.params[name] * f, lo), hi) for f in refine_plan(60)[0][1]]
    fixed = [t.system_attrs["fixed_params"] for t in waiting]  # an enqueued trial's params (Optuna)
    assert [p[name] for p in fixed] == pytest.approx(want, rel=1e-12)
    for p in fixed:  # everything but the step is the best trial's
        assert {k: v for k, v in p.items() if k != name} == {k: v for k, v in best.params.items()
                                                                  if k != name}
    assert enqueue_refinement(study, space, budget=60, seeds=2) == 0  # once per stage


def test_no_refinement_without_a_reached_trial_or_for_a_front():
    space = _space()
    study = optuna.create_study()
    study.optimize(lambda t: (space.suggest(t), t.set_user_attr("reached", 1))[0].step_mult, n_trials=54)
    assert enqueue_refinement(study, space, budget=60, seeds=2) == 0  # no trial reached on both seeds
    front = optuna.create_study(directions=["minimize", "minimize"])
    assert enqueue_refinement(front, space, budget=0, seeds=2) == 0


def test_second_stage_splits_the_gap_up_to_the_nearest_failed_larger_step():
    # Our own rule (no source): once a larger step of the best trial's setting failed, the second stage
    # bisects that bracket in log scale (3 points: a quarter, a half, three quarters of the gap).
    space = _space("marina")
    study = optuna.create_study(sampler=optuna.samplers.TPESampler(seed=1))
    study.optimize(_value(space, 40.0), n_trials=55)
    study.set_user_attr("refined_54", True)  # the first stage ran
    best = study.best_trial
    name, _, _ = space.step_param("marina", space.from_params(best.params).compressor)
    step = best.params[name]

    def add(factor, **kw):
        study.add_trial(optuna.trial.create_trial(params=dict(best.params, **{name: step * factor}),
                                                  distributions=best.distributions, **kw))

    add(2 ** 0.25, state=TrialState.PRUNED, user_attrs={"reached": 0})
    add(2 ** 0.5, value=1e9, user_attrs={"reached": 1})  # missed a seed, but further away
    assert len(study.trials) == 57
    assert enqueue_refinement(study, space, budget=60, seeds=2) == 3
    fixed = [t.system_attrs["fixed_params"][name] for t in study.get_trials(states=(TrialState.WAITING,))]
    assert fixed == pytest.approx([step * 2 ** (0.25 * j / 4) for j in (1, 2, 3)], rel=1e-12)
