"""From a job to what every command simulates on: problem, start point, target.

This is the "problem" stage of docs/design.md's data flow: load the data, split it
over the simulated workers, build the batched oracle, resolve the start point
and the absolute target. Every command that simulates starts here.

A target is either ``grad_norm_sq`` (stop at ||grad f(x)||^2 <= eps) or
``loss_gap`` (stop at f(x) - f_ref <= delta). For the latter, f_ref is found
once here by L-BFGS-B on f = (1/n) sum_i f_i from the start point
(:func:`reference_loss`); ``tune`` stores it with the probe constants so that
worker processes reuse it instead of recomputing it.
"""

from __future__ import annotations

import tokenize
from dataclasses import dataclass
from typing import Any

import numpy as np

from .data import Dataset, _quiet_array_header, check_learnable, load_data, partition
from .errors import InputError
from .job import Job
from .problems import Problem, build_problem, label_kind
from .simulate import absolute_target

__all__ = ["Workspace", "open_job", "reference_loss", "model_convexity", "REFERENCE_OPTIONS", "check_minibatch"]

#: L-BFGS-B settings for f_ref (scipy.optimize.minimize option names). Tight on
#: purpose: f_ref should be far more accurate than any loss gap a job asks for;
#: ftol 1e-15 is a relative decrease near float64 precision (our choice, no source).
REFERENCE_OPTIONS = {"maxiter": 10_000, "maxfun": 20_000, "gtol": 1e-10, "ftol": 1e-15, "maxcor": 20}


@dataclass
class Workspace:
    job: Job
    dataset: Dataset
    parts: list[np.ndarray]
    problem: Problem
    x0: np.ndarray
    target: float  # absolute threshold on the stopping metric: ||grad f||^2, or f - f_ref (loss gap)
    reference: dict | None = None  # loss-gap targets: f_ref and how it was found (reference_loss)

    @property
    def loss_ref(self) -> float | None:
        """f_ref for a loss-gap target, else None (what :func:`bittune.simulate.simulate` takes)."""
        return None if self.reference is None else float(self.reference["value"])

    @property
    def target_kind(self) -> str:
        """``grad_norm_sq`` or ``loss_gap``."""
        return "grad_norm_sq" if self.reference is None else "loss_gap"

    def theory_target(self, L: float) -> float:
        """The target on ||grad f||^2 that theory rules are evaluated at.

        For a gradient target, the target itself. For a loss gap delta there is
        no non-convex rate to f - f_ref, so the rules get 2 L delta: an L-smooth
        f with f_ref = inf f has ||grad f(x)||^2 <= 2 L (f(x) - f_ref) (the
        descent lemma; Nesterov, Introductory Lectures on Convex Optimization,
        2004, eq. 2.1.7 - from memory). It only ranks compressor densities (the
        ranking does not depend on the level) and leaves the theory steps
        unchanged; predicted rounds and bits are not reported for such targets.
        """
        if self.reference is None:
            return float(self.target)
        return 2.0 * float(L) * float(self.target)

    def target_text(self) -> str:
        """The target in words: ``||grad f||^2 <= 1e-06`` or ``f - f_ref <= 0.001 (f_ref = 0.3466)``."""
        if self.reference is None:
            return f"||grad f||^2 <= {self.target:.3g}"
        return f"f - f_ref <= {self.target:.3g} (f_ref = {self.loss_ref:.6g})"

    def target_doc(self) -> dict:
        """The target as outputs state it: its kind, the job's value, the absolute threshold, f_ref."""
        t = self.job.target
        if self.reference is None:
            return {"kind": "grad_norm_sq", "grad_norm_sq": float(t.grad_norm_sq), "relative": bool(t.relative),
                    "absolute": float(self.target)}
        return {"kind": "loss_gap", "loss_gap": float(t.loss_gap), "absolute": float(self.target),
                "f_ref": self.loss_ref, "note": self.reference.get("note", "")}

    def summary(self) -> dict:
        p = self.problem
        out = {
            "samples": int(self.dataset.n_samples),
            "dimension": int(p.dim),
            "workers": int(p.n_workers),
            "worker_sizes": [int(s) for s in p.worker_sizes],
            "model": self.job.model,
            "target_kind": self.target_kind,
        }
        if self.job.minibatch is not None:  # stochastic gradients (docs/theory.md §2.12)
            out["minibatch"] = int(self.job.minibatch)
        if self.reference is None:
            out["target_grad_norm_sq"] = float(self.target)
        else:
            out.update(target_loss_gap=float(self.target), f_ref=self.loss_ref)
        return out


def open_job(job: Job, *, reference: dict | None = None) -> Workspace:
    """Load and split the job's data and build its problem (raises InputError on bad input).

    For a loss-gap target, ``reference`` is a stored f_ref (the dict
    :func:`reference_loss` returns, e.g. from a study's probe constants); when
    None, f_ref is computed here. It is ignored for a gradient target.
    """
    spec = job.data
    dataset = load_data(spec.path, format=spec.format, label_column=spec.label_column,
                        group_column=spec.group_column)
    # Degenerate data (constant features, one class, a label column that holds no classes)
    # stop here, before the split, for every command.
    check_learnable(dataset, labels=label_kind(job.model, job.model_options))
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
    check_minibatch(job.minibatch, problem, source=str(job.path))
    grads, losses = problem.local_grads(x0[None, :], with_loss=True)
    if not (np.all(np.isfinite(grads)) and np.all(np.isfinite(losses))):
        if job.model == "plugin":  # the user's code is the culprit, not the start settings
            bad = [i for i in range(grads.shape[1])
                   if not (np.all(np.isfinite(grads[0, i])) and np.all(np.isfinite(losses[0, i])))]
            what = "gradient" if not np.all(np.isfinite(grads)) else "loss"
            raise InputError(f"plugin: {job.model_options.get('plugin')}: the {what} returned at the start "
                             f"point is not finite (worker(s) {bad[:5]}{' ...' if len(bad) > 5 else ''}); "
                             f"check that function's loss_and_grad", source=str(job.path))
        raise InputError("start: the model's loss or gradient at the start point is not finite "
                         "(start.scale, start.file or regularization too large?)", source=str(job.path))
    if job.target.kind == "loss_gap":
        if reference is None:
            reference = reference_loss(problem, x0, model=job.model, regularization=job.regularization,
                                       source=str(job.path))
        gap0 = float(losses[0].mean()) - float(reference["value"])
        if gap0 <= job.target.loss_gap:
            raise InputError(f"target.loss_gap: the start point already meets it (f(x0) - f_ref = {gap0:.4g} <= "
                             f"{job.target.loss_gap:g}, f_ref = {reference['value']:.6g}); choose a smaller "
                             f"loss_gap", source=str(job.path))
        return Workspace(job=job, dataset=dataset, parts=parts, problem=problem, x0=x0,
                         target=float(job.target.loss_gap), reference=dict(reference))
    target = absolute_target(problem, x0, grad_norm_sq=job.target.grad_norm_sq,
                             relative=job.target.relative)
    if not np.isfinite(target) or target <= 0:
        raise InputError("target.grad_norm_sq: the gradient at the start point is zero, so a "
                         "relative target is 0; set target.relative: false", source=str(job.path))
    return Workspace(job=job, dataset=dataset, parts=parts, problem=problem, x0=x0, target=target)


def check_minibatch(b: int | None, problem, *, source: str, key: str = "minibatch") -> None:
    """A minibatch b (None: full batch) must fit every worker's shard (b <= min_i m_i, rows drawn with
    replacement from each) and needs a model with per-sample gradients; else InputError naming ``key``."""
    if b is None:
        return
    if not getattr(problem, "has_samples", False):
        raise InputError(f"{key}: the model {getattr(problem, 'name', '?')!r} has no per-sample gradients "
                         f"(a plugin gives whole-worker losses only); remove {key}", source=source)
    sizes = np.asarray(problem.worker_sizes)
    if b > int(sizes.min()):
        raise InputError(f"{key}: must be at most the smallest worker's row count {int(sizes.min())} "
                         f"(worker {int(np.argmin(sizes))}), got {b}", source=source)


def model_convexity(model: str, regularization: float) -> str:
    """``convex``, ``non-convex`` or ``unknown`` (a plugin) for a job's model.

    Least squares and softmax carry a ridge term on a convex loss; the logistic
    loss is convex and only its regulariser lam sum x^2/(1+x^2) is not, so
    logistic_nonconvex with lam = 0 is plain (convex) logistic regression.
    A two-layer perceptron is non-convex.
    """
    if model in ("least_squares", "softmax") or (model == "logistic_nonconvex" and regularization == 0):
        return "convex"
    return "unknown" if model == "plugin" else "non-convex"


_NOTES = {
    "convex": "f_ref is the minimum of f found by L-BFGS-B (the model is convex)",
    "non-convex": "f_ref is the value at a local minimum found by L-BFGS-B (the model is non-convex)",
    "unknown": "f_ref is the value at a local minimum found by L-BFGS-B (the plugin model may be non-convex)",
}


def reference_loss(problem, x0: np.ndarray, *, model: str, regularization: float,
                   source: str | None = None) -> dict[str, Any]:
    """f_ref = min f by ``scipy.optimize.minimize(method="L-BFGS-B", jac=True)`` from ``x0``.

    f = (1/n) sum_i f_i, the function the engine reports (``problem.full_loss``);
    one oracle pass gives f and its gradient. Returns plain types: ``value``,
    ``success``, ``message``, ``iterations``, ``evaluations``, ``grad_norm_sq``
    (||grad f||^2 at the minimiser), ``start_loss`` (f(x0)), ``convexity``,
    ``solver``, ``options`` and a ``note`` saying whether f_ref is a global or a
    local minimum value. Raises InputError (key ``target.loss_gap``) when no
    finite value is found.
    """
    from scipy.optimize import minimize

    def fun(x: np.ndarray) -> tuple[float, np.ndarray]:
        with np.errstate(over="ignore", invalid="ignore"):  # trial points of the line search
            grads, loss = problem.local_grads(x[None, :], with_loss=True)
        return float(loss[0].mean()), grads[0].mean(axis=0)

    x0 = np.asarray(x0, dtype=np.float64)
    res = minimize(fun, x0.copy(), jac=True, method="L-BFGS-B", options=dict(REFERENCE_OPTIONS))
    value, g = fun(np.asarray(res.x, dtype=np.float64))
    start = fun(x0)[0]
    if not (np.isfinite(value) and np.all(np.isfinite(g))):
        raise InputError(f"target.loss_gap: L-BFGS-B found no finite minimum of f from the start point "
                         f"({res.message}); use a grad_norm_sq target", source=source)
    convexity = model_convexity(model, regularization)
    note = _NOTES[convexity]
    if not res.success:
        note += f"; L-BFGS-B stopped early ({res.message}), so f_ref may lie a little above the minimum"
    return {"value": min(value, start), "success": bool(res.success), "message": str(res.message),
            "iterations": int(res.nit), "evaluations": int(res.nfev), "grad_norm_sq": float(g @ g),
            "start_loss": float(start), "convexity": convexity,
            "solver": "scipy.optimize.minimize(method='L-BFGS-B', jac=True)", "options": dict(REFERENCE_OPTIONS),
            "note": note}


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
