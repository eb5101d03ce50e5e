"""User models: a loss written by the user, imported from the job's ``model.plugin``.

The job names a **factory** as ``module:function`` (an importable module) or
``path/to/file.py:function`` (a file, relative to the job file's folder). It
is called once per simulated worker with that worker's data::

    model = factory(X, y)

``X`` holds the worker's rows as read (a dense float64 array, or a scipy CSR
matrix for svmlight data), ``y`` the worker's raw labels (float64, as in the
file). ``model`` is either a callable ``model(w) -> (loss, grad)`` or an
object with a method ``loss_and_grad(w) -> (loss, grad)``: ``loss`` a float,
``grad`` an array of shape (D,), for a parameter vector ``w`` of shape (D,).
Optional attributes of ``model`` (all workers must agree on ``dim``):

* ``dim``: D (default: the number of features);
* ``loss(w) -> float``: used when only values are needed (default: the first
  part of ``loss_and_grad``);
* ``smoothness``: an upper bound on this worker's L_i; when every worker
  gives one, :meth:`PluginProblem.smoothness_bounds` returns them (plus the
  ridge term) and their mean as the bound on L (L <= mean_i L_i by the
  triangle inequality, docs/theory.md §3.1); otherwise the probe estimates them;
* ``lower_bound``: a lower bound on this worker's loss (default 0: the loss is
  assumed non-negative; the job's ``probe.lower_bound`` overrides).

The job's ``regularization`` adds (lam/2)||w||^2 to every worker's loss.

Importing runs the user's code, so :func:`load_plugin` refuses unless the
caller allows it explicitly (the ``--allow-code`` flag). A user model is
**outside the fast path**: :class:`PluginProblem` calls the user's function
once per worker and per trajectory, a Python loop over B x n calls per
oracle call, where the built-in models make a handful of batched calls.
"""

from __future__ import annotations

import hashlib
import importlib
import importlib.util
import sys
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np

from .base import check_iterates

from ..errors import InputError

__all__ = ["PluginProblem", "load_plugin", "split_plugin_spec"]

KEY = "model.plugin"


def _is_path(target: str) -> bool:
    return target.endswith(".py") or "/" in target or "\\" in target


def _import_file(path: Path):
    """Execute ``path`` as a fresh module, registered under a name unique to the path."""
    if not path.is_file():
        raise FileNotFoundError(f"no such file: {path}")
    tag = hashlib.sha256(str(path).encode()).hexdigest()[:12]
    name = f"_bittune_plugin_{tag}"
    spec = importlib.util.spec_from_file_location(name, path)
    if spec is None or spec.loader is None:
        raise ImportError(f"cannot load {path} as a Python module")
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module  # dataclasses and pickling look modules up by name
    try:
        spec.loader.exec_module(module)
    except BaseException:
        sys.modules.pop(name, None)
        raise
    return module


def split_plugin_spec(spec: str) -> tuple[str, str]:
    """(module or file, attribute) of ``spec``; InputError naming ``model.plugin`` if malformed.

    Imports nothing: job validation can call it before ``--allow-code`` is known.
    """
    if not isinstance(spec, str) or ":" not in spec:
        raise InputError(f"{KEY}: must be 'module:function' or 'path/to/file.py:function', got {spec!r}")
    target, _, attr = spec.rpartition(":")  # rpartition: a Windows drive letter keeps its colon
    if not target.strip() or not all(part.isidentifier() for part in attr.split(".")):
        raise InputError(f"{KEY}: must be 'module:function' or 'path/to/file.py:function', got {spec!r}")
    return target, attr


def load_plugin(spec: str, *, allow_code: bool, base_dir: str | Path | None = None) -> Callable[..., Any]:
    """The factory named by ``spec`` (``module:function`` or ``file.py:function``).

    Raises :class:`InputError` naming ``model.plugin`` when ``allow_code`` is
    False (checked before anything is imported), when ``spec`` is malformed,
    when the import fails (whatever the module raises), when the attribute
    is missing, and when it is not callable. A relative file path is taken
    from ``base_dir`` (the job file's folder), or the current folder.
    """
    target, attr = split_plugin_spec(spec)
    if not allow_code:
        raise InputError(f"{KEY}: {spec!r} names Python code that bittune would import and run; "
                         f"pass --allow-code to allow it")
    try:
        if _is_path(target):
            path = Path(target).expanduser()
            if not path.is_absolute():
                path = Path(base_dir if base_dir is not None else ".") / path
            module = _import_file(path.resolve())
        else:
            module = importlib.import_module(target)
    except Exception as exc:  # anything the user's module raises while it is imported
        raise InputError(f"{KEY}: cannot import {target!r}: {type(exc).__name__}: {exc}") from exc
    obj: Any = module
    for part in attr.split("."):
        if not hasattr(obj, part):
            raise InputError(f"{KEY}: {target!r} has no attribute {attr!r}")
        obj = getattr(obj, part)
    if not callable(obj):
        raise InputError(f"{KEY}: {spec!r} must name a callable factory(X, y), got {type(obj).__name__}")
    return obj


class PluginProblem:
    """The batched oracle of :class:`bittune.problems.Problem` around a user's per-worker loss.

    ``rows``/``targets``: one entry per worker. ``spec`` is only used in messages.
    Public methods as for the built-in models: ``local_grads`` on (B, D) or
    (B, n, D) iterates, ``local_losses``, ``full_grad``, ``full_loss``,
    ``smoothness_bounds``, ``loss_lower_bound``. Every call loops over
    trajectories and workers in Python (see the module docstring).
    """

    name = "plugin"
    #: The user's function gives whole-worker losses only: no minibatch oracle (VR-MARINA).
    has_samples = False
    #: The user's code is imported from a file path: a worker process may not import it again.
    portable = False

    def __init__(
        self,
        factory: Callable[..., Any],
        rows: Sequence,
        targets: Sequence[np.ndarray],
        *,
        regularization: float = 0.0,
        spec: str = "the plugin",
    ):
        if len(rows) != len(targets) or len(rows) < 1:
            raise ValueError(f"rows and targets must be non-empty and of equal length, "
                             f"got {len(rows)} and {len(targets)}")
        self.spec = spec
        self.regularization = float(regularization)
        self._models, self._value_and_grad, self._value = [], [], []
        for i, (r, t) in enumerate(zip(rows, targets)):
            try:
                model = factory(r, np.asarray(t, dtype=np.float64))
            except Exception as exc:  # the user's code, on the user's data
                raise InputError(f"{KEY}: {spec} failed on worker {i}'s data: {type(exc).__name__}: {exc}") from exc
            vg = getattr(model, "loss_and_grad", model)
            if not callable(vg):
                raise InputError(f"{KEY}: {spec} must return a callable loss_and_grad(w) or an object with "
                                 f"such a method; worker {i} got {type(model).__name__}")
            value = getattr(model, "loss", None)
            self._models.append(model)
            self._value_and_grad.append(vg)
            self._value.append(value if callable(value) else None)
        dims = [self._attr(i, "dim", default=rows[i].shape[1]) for i in range(len(rows))]
        if any(isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 1 for v in dims):
            raise InputError(f"{KEY}: {spec}: dim must be an integer >= 1, got {dims}")
        if len(set(dims)) != 1:
            raise InputError(f"{KEY}: {spec}: the workers' models disagree on dim: {sorted(set(dims))}")
        self._dim = int(dims[0])
        self._sizes = np.array([r.shape[0] for r in rows], dtype=np.int64)

    def _attr(self, i: int, name: str, *, default):
        return getattr(self._models[i], name, default)

    @property
    def n_workers(self) -> int:
        return len(self._models)

    @property
    def dim(self) -> int:
        return self._dim

    @property
    def worker_sizes(self) -> np.ndarray:
        return self._sizes

    # --------------------------------------------------------------- oracle
    def _check(self, X) -> np.ndarray:
        return check_iterates(X, n_workers=self.n_workers, dim=self.dim)

    def _call(self, i: int, w: np.ndarray, *, need_grad: bool) -> tuple[float, np.ndarray | None]:
        w = w.copy()  # the user's code may write into it
        try:
            if not need_grad and self._value[i] is not None:
                return float(self._value[i](w)), None
            out = self._value_and_grad[i](w)
            value, grad = out
            value = float(value)
            grad = np.asarray(grad, dtype=np.float64)
        except Exception as exc:  # the user's code: name it rather than crash as a bittune bug
            raise InputError(f"{KEY}: {self.spec} raised on worker {i}: {type(exc).__name__}: {exc} "
                             f"(loss_and_grad(w) must return (float, array of shape ({self.dim},)))") from exc
        if grad.shape != (self.dim,):
            raise InputError(f"{KEY}: {self.spec}: worker {i}'s gradient has shape {grad.shape}, "
                             f"expected ({self.dim},)")
        return value, grad

    def local_grads(
        self, X: np.ndarray, *, with_loss: bool = False
    ) -> tuple[np.ndarray, np.ndarray | None]:
        """Gradients (B, n, D) of every f_i, and their values (B, n) if asked."""
        X = self._check(X)
        B, n = X.shape[0], self.n_workers
        grads = np.empty((B, n, self.dim))
        loss = np.empty((B, n))
        for b in range(B):
            for i in range(n):
                loss[b, i], grads[b, i] = self._call(i, X[b] if X.ndim == 2 else X[b, i], need_grad=True)
        Xw = X if X.ndim == 3 else X[:, None, :]
        grads += self.regularization * Xw
        if not with_loss:
            return grads, None
        return grads, loss + 0.5 * self.regularization * (Xw * Xw).sum(axis=-1)

    def local_losses(self, X: np.ndarray) -> np.ndarray:
        """Values (B, n) of every f_i."""
        X = self._check(X)
        B, n = X.shape[0], self.n_workers
        loss = np.empty((B, n))
        for b in range(B):
            for i in range(n):
                loss[b, i] = self._call(i, X[b] if X.ndim == 2 else X[b, i], need_grad=False)[0]
        Xw = X if X.ndim == 3 else X[:, None, :]
        return loss + 0.5 * self.regularization * (Xw * Xw).sum(axis=-1)

    def full_grad(self, x: np.ndarray) -> np.ndarray:
        """Gradient of f at one point, shape (D,)."""
        g, _ = self.local_grads(np.asarray(x, dtype=np.float64)[None, :])
        return g[0].mean(axis=0)

    def full_loss(self, x: np.ndarray) -> float:
        """f at one point."""
        return float(self.local_losses(np.asarray(x, dtype=np.float64)[None, :])[0].mean())

    # ---------------------------------------------------------- constants
    def _numbers(self, name: str) -> np.ndarray | None:
        """The attribute ``name`` of every worker's model as floats, or None if one lacks it."""
        values = [self._attr(i, name, default=None) for i in range(self.n_workers)]
        if any(v is None for v in values):
            return None
        try:
            out = np.array([float(v) for v in values])
        except (TypeError, ValueError):
            raise InputError(f"{KEY}: {self.spec}: {name} must be a number, got {values}") from None
        if not np.all(np.isfinite(out)):
            raise InputError(f"{KEY}: {self.spec}: {name} must be finite, got {out.tolist()}")
        return out

    def smoothness_bounds(self) -> tuple[np.ndarray, float]:
        """The models' ``smoothness`` + lam per worker, and their mean for f (docs/theory.md §3.1)."""
        per = self._numbers("smoothness")
        if per is None:
            raise NotImplementedError(f"{self.spec}: no 'smoothness' attribute on every worker's model")
        if np.any(per < 0):
            raise InputError(f"{KEY}: {self.spec}: smoothness must be >= 0, got {per.tolist()}")
        per = per + self.regularization
        return per, float(per.mean())

    def loss_lower_bound(self) -> float:
        """Mean of the models' ``lower_bound`` (the ridge term is >= 0), or 0 if one lacks it."""
        low = self._numbers("lower_bound")
        return 0.0 if low is None else float(low.mean())

    def worker_loss_lower_bound(self) -> float:
        """The same mean: each model's ``lower_bound`` bounds its own worker's loss."""
        return self.loss_lower_bound()

