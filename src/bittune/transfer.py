"""The transfer check: the finalists on a fresh data resample (docs/design.md, "Selection").

A config tuned on one sample of data should hold on another sample of the same
population. Selection re-runs its finalists, on the same fresh seeds, on a
bootstrap resample of each worker's shard: worker i keeps m_i rows drawn with
replacement from its own m_i rows (Efron & Tibshirani 1993, ch. 6, the
nonparametric bootstrap; so the split, the worker sizes and the heterogeneity
between workers stay as they are). The target keeps the job's definition: a
relative ||grad f||^2 target is relative to the resampled problem's gradient at
x0, and a loss-gap target's f_ref is found again on the resample.

The rows come from ``numpy.random.default_rng(SeedSequence(search.seed,
spawn_key=(RESAMPLE_KEY,))).spawn(n)``: one child generator per worker, each
drawing ``integers(0, m_i, size=m_i)``.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

__all__ = ["RESAMPLE_KEY", "bootstrap_parts", "resampled_workspace"]

#: The resample's branch of the job seed (any fixed number apart from other uses; our choice).
RESAMPLE_KEY = 0x7E5A


def bootstrap_parts(parts: list[np.ndarray], seed: int) -> list[np.ndarray]:
    """Each worker's row indices drawn with replacement from its own, as many as it has (sorted)."""
    rngs = np.random.default_rng(np.random.SeedSequence(int(seed), spawn_key=(RESAMPLE_KEY,))).spawn(len(parts))
    return [np.sort(np.asarray(p)[rng.integers(0, len(p), size=len(p))]) for p, rng in zip(parts, rngs)]


def resampled_workspace(ws, seed: int | None = None):
    """``ws`` with every worker's shard replaced by its bootstrap resample, the problem rebuilt and the
    target redefined on it (see the module text). ``seed`` defaults to the job's ``search.seed``."""
    from .problems import build_problem
    from .simulate import absolute_target
    from .workspace import reference_loss

    job = ws.job
    parts = bootstrap_parts(ws.parts, job.search.seed if seed is None else seed)
    problem = build_problem(ws.dataset, parts, model=job.model, regularization=job.regularization,
                            options=job.model_options, allow_code=job.allow_code, base_dir=job.path.parent)
    if ws.reference is not None:
        ref = reference_loss(problem, ws.x0, model=job.model, regularization=job.regularization,
                             source=str(job.path))
        return replace(ws, parts=parts, problem=problem, reference=ref)
    t = job.target
    target = absolute_target(problem, ws.x0, grad_norm_sq=t.grad_norm_sq, relative=t.relative)
    return replace(ws, parts=parts, problem=problem, target=float(target))
