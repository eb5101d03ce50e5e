"""Models with batched local gradients (docs/design.md, "Package layout")."""

from __future__ import annotations

from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np
import scipy.sparse as sp

from ..errors import InputError
from ._shards import Shards
from .base import Problem
from .least_squares import LeastSquares
from .logistic import LogisticNonconvex
from .mlp import ACTIVATIONS, LOSSES, MLP, default_start
from .plugin import PluginProblem, load_plugin, split_plugin_spec
from .softmax import Softmax, class_labels

__all__ = [
    "Problem", "LogisticNonconvex", "LeastSquares", "Softmax", "MLP", "PluginProblem",
    "MODELS", "MODEL_NAMES", "MODEL_OPTIONS", "PLUGIN",
    "problem_from_arrays", "build_problem", "model_options", "load_plugin", "split_plugin_spec", "default_start",
    "class_labels", "label_kind",
]

MODELS: dict[str, type[Problem]] = {
    LogisticNonconvex.name: LogisticNonconvex,
    LeastSquares.name: LeastSquares,
    Softmax.name: Softmax,
    MLP.name: MLP,
}
#: The user-model name: not a :class:`Problem` subclass (see ``plugin.py``).
PLUGIN = PluginProblem.name
#: Every name a job's ``model`` may take.
MODEL_NAMES = (*MODELS, PLUGIN)
#: Model-specific options (job keys ``model.<key>``) with their defaults;
#: ``None`` marks a required one.
MODEL_OPTIONS: dict[str, dict[str, Any]] = {
    MLP.name: {"hidden": 16, "activation": "tanh", "loss": "logistic"},
    PLUGIN: {"plugin": None},
}


def model_options(model: str, options: Mapping[str, Any] | None) -> dict[str, Any]:
    """Validate the model-specific options, fill in defaults; errors name ``model.<key>``.

    A key whose value is None counts as not given (a parsed job may hold every key).
    """
    if model not in MODEL_NAMES:
        raise InputError(f"model: must be one of {', '.join(MODEL_NAMES)}, got {model!r}")
    allowed = MODEL_OPTIONS.get(model, {})
    given = {k: v for k, v in (options or {}).items() if v is not None}  # None: not given
    problems = [f"model.{k}: not an option of model {model} (options: {', '.join(allowed) or 'none'})"
                for k in given if k not in allowed]
    out = {**allowed, **{k: v for k, v in given.items() if k in allowed}}
    if model == MLP.name:
        h = out["hidden"]
        if isinstance(h, bool) or not isinstance(h, (int, np.integer)) or h < 1:
            problems.append(f"model.hidden: must be an integer >= 1, got {h!r}")
        for key, choices in (("activation", ACTIVATIONS), ("loss", LOSSES)):
            if out[key] not in choices:
                problems.append(f"model.{key}: must be one of {', '.join(choices)}, got {out[key]!r}")
    if model == PLUGIN:
        if out["plugin"] is None:
            problems.append("model.plugin: required for model plugin ('module:function' or "
                            "'path/to/file.py:function')")
        else:
            try:
                split_plugin_spec(out["plugin"])
            except InputError as exc:
                problems += exc.problems
    if problems:
        raise InputError(problems)
    return out


def label_kind(model: str, options: Mapping[str, Any] | None = None) -> str:
    """How ``model`` reads the labels: ``binary`` (logistic losses), ``classes`` (softmax) or
    ``real`` (least squares, a squared-loss MLP, a plugin: raw values); see ``data.LABEL_KINDS``."""
    opts = model_options(model, options)
    if model == LogisticNonconvex.name or (model == MLP.name and opts["loss"] == "logistic"):
        return "binary"
    return "classes" if model == Softmax.name else "real"


def problem_from_arrays(
    model: str,
    rows: Sequence,
    targets: Sequence[np.ndarray],
    *,
    regularization: float,
    options: Mapping[str, Any] | None = None,
    classes: np.ndarray | None = None,
) -> Problem:
    """A problem from per-worker row blocks and targets.

    Targets: labels +-1 for logistic_nonconvex and for mlp with the logistic
    loss; class labels for softmax (mapped to 0..C-1 over ``classes``, by
    default the sorted distinct labels of all workers); real values otherwise.
    """
    cls = MODELS.get(model)
    if cls is None:
        raise InputError(f"model: must be one of {', '.join(MODELS)} here, got {model!r}")
    opts = model_options(model, options)
    targets = [np.asarray(t, dtype=np.float64) for t in targets]
    if cls is LogisticNonconvex:
        # Fold the labels into the rows: the loss depends on b_j a_j only.
        signed = []
        for r, t in zip(rows, targets):
            if sp.issparse(r):
                signed.append(sp.csr_matrix(sp.diags(t) @ r, dtype=np.float64))
            else:
                signed.append(np.asarray(r, dtype=np.float64) * t[:, None])
        rows = signed
    else:
        rows = [r if sp.issparse(r) else np.asarray(r, dtype=np.float64) for r in rows]
    if cls is Softmax:
        if classes is None:
            _, classes = class_labels(np.concatenate(targets), source="targets")
        classes = np.asarray(classes, dtype=np.float64)
        codes = [np.searchsorted(classes, t) for t in targets]
        for i, (c, t) in enumerate(zip(codes, targets)):
            bad = t[(c >= classes.size) | (classes[np.minimum(c, classes.size - 1)] != t)]
            if bad.size:
                raise ValueError(f"targets[{i}] holds label {bad[0]:g}, which is not in classes")
        return Softmax(Shards(list(rows), [c.astype(np.float64) for c in codes]),
                       regularization=regularization, classes=classes)
    return cls(Shards(list(rows), targets), regularization=regularization, **opts)


def build_problem(
    dataset,
    parts: Sequence[np.ndarray],
    *,
    model: str,
    regularization: float,
    options: Mapping[str, Any] | None = None,
    allow_code: bool = False,
    base_dir: str | Path | None = None,
) -> Problem | PluginProblem:
    """Split a loaded dataset over workers (``parts``: row indices per worker).

    ``options`` are the model-specific job keys (``MODEL_OPTIONS``). For the
    ``plugin`` model, ``allow_code`` must be True (the ``--allow-code`` flag)
    and a relative plugin path is taken from ``base_dir`` (the job's folder).
    """
    from ..data import binary_labels

    opts = model_options(model, options)
    y = dataset.y
    classes = None
    kind = label_kind(model, opts)
    where = getattr(dataset, "label_source", dataset.source)
    if kind == "binary":
        y = binary_labels(y, source=where)
    elif kind == "classes":
        _, classes = class_labels(y, source=where)  # over all rows: every worker has C classes
    X = dataset.X
    rows = [X[np.asarray(idx)] for idx in parts]
    targets = [y[np.asarray(idx)] for idx in parts]
    if model == PLUGIN:
        factory = load_plugin(opts["plugin"], allow_code=allow_code, base_dir=base_dir)
        return PluginProblem(factory, rows, targets, regularization=regularization, spec=opts["plugin"])
    return problem_from_arrays(model, rows, targets, regularization=regularization, options=opts,
                               classes=classes)
