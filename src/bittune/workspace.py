"""From a job to what every command simulates on: problem, start point, target.

This is the "problem" stage of DESIGN.md's data flow: load the data, split it
over the simulated workers, build the batched oracle, resolve the start point
and the absolute target. Every command that simulates starts here.
"""

from __future__ import annotations

import tokenize
from dataclasses import dataclass

import numpy as np

from .data import Dataset, _quiet_array_header, load_data, partition
from .errors import InputError
from .job import Job
from .problems import Problem, build_problem
from .simulate import absolute_target

__all__ = ["Workspace", "open_job"]


@dataclass
class Workspace:
    job: Job
    dataset: Dataset
    parts: list[np.ndarray]
    problem: Problem
    x0: np.ndarray
    target: float  # absolute target on ||grad f||^2

    def summary(self) -> dict:
        p = self.problem
        return {
            "samples": int(self.dataset.n_samples),
            "dimension": int(p.dim),
            "workers": int(p.n_workers),
            "worker_sizes": [int(s) for s in p.worker_sizes],
            "model": self.job.model,
            "target_grad_norm_sq": float(self.target),
        }


def open_job(job: Job) -> Workspace:
    """Load and split the job's data and build its problem (raises InputError on bad input)."""
    spec = job.data
    dataset = load_data(spec.path, format=spec.format, label_column=spec.label_column,
                        group_column=spec.group_column)
    w = job.workers
    try:
        parts = partition(dataset, n_workers=w.count, split=w.split, seed=w.seed,
                          dirichlet_alpha=w.dirichlet_alpha)
    except InputError as exc:  # its key paths (workers.count ...) are the job file's
        raise InputError(exc.problems, source=exc.source or str(job.path)) from None
    try:
        problem = build_problem(dataset, parts, model=job.model, regularization=job.regularization,
                                options=job.model_options, allow_code=job.allow_code, base_dir=job.path.parent)
        x0 = _start_point(job, problem.dim)
        if job.start.kind == "zeros" and job.model == "mlp":
            # x0 = 0 is a saddle of a two-layer perceptron (all hidden units alike): seeded start.
            x0 = problem.default_start(job.workers.seed)
    except MemoryError:  # e.g. a typo'd svmlight index 10^12 makes the dimension 10^12
        raise InputError(f"data: {dataset.n_samples} samples x {dataset.n_features} features over "
                         f"{w.count} workers do not fit in memory ({dataset.source}); is a feature "
                         f"index far too large?", source=str(job.path)) from None
    grads, losses = problem.local_grads(x0[None, :], with_loss=True)
    if not (np.all(np.isfinite(grads)) and np.all(np.isfinite(losses))):
        raise InputError(f"start: the model's loss or gradient at the start point is not finite "
                         f"(start.scale, start.file or regularization too large?)", source=str(job.path))
    target = absolute_target(problem, x0, grad_norm_sq=job.target.grad_norm_sq,
                             relative=job.target.relative)
    if not np.isfinite(target) or target <= 0:
        raise InputError(f"target.grad_norm_sq: the gradient at the start point is zero, so a "
                         f"relative target is 0; set target.relative: false", source=str(job.path))
    return Workspace(job=job, dataset=dataset, parts=parts, problem=problem, x0=x0, target=target)


def _start_point(job: Job, dim: int) -> np.ndarray:
    start = job.start
    if start.kind == "zeros":
        return np.zeros(dim)
    if start.kind == "random":
        return np.random.default_rng(start.seed).normal(0.0, start.scale, dim)
    try:
        # our own handle: np.load may leave its own open on errors
        with _quiet_array_header(), open(start.path, "rb") as fh:
            head = fh.read(6)
            fh.seek(0)
            if head.startswith(b"PK"):
                raise ValueError("an .npz archive; save the vector with numpy.save (.npy)")
            if head != b"\x93NUMPY":
                raise ValueError("not a .npy file (write it with numpy.save)")
            x0 = np.load(fh, allow_pickle=False)
    except (OSError, ValueError, EOFError, MemoryError, tokenize.TokenError) as exc:  # numpy's header parser
        raise InputError(f"start.file: cannot read {start.path}: {exc}", source=str(job.path)) from None
    if x0.dtype.kind not in "iuf":
        raise InputError(f"start.file: must hold real numbers, got dtype {x0.dtype}", source=str(job.path))
    x0 = np.asarray(x0, dtype=np.float64).ravel()
    if x0.shape != (dim,):
        raise InputError(f"start.file: must hold a vector of length {dim} (the data's dimension), "
                         f"got shape {x0.shape}", source=str(job.path))
    if not np.all(np.isfinite(x0)):
        raise InputError("start.file: holds NaN or inf", source=str(job.path))
    return x0
