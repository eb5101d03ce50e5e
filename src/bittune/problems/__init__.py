"""Models with batched local gradients (DESIGN.md, "Package layout")."""

from __future__ import annotations

from typing import Sequence

import numpy as np
import scipy.sparse as sp

from ._shards import Shards
from .base import Problem
from .least_squares import LeastSquares
from .logistic import LogisticNonconvex

__all__ = ["Problem", "LogisticNonconvex", "LeastSquares", "MODELS", "problem_from_arrays", "build_problem"]

MODELS: dict[str, type[Problem]] = {
    LogisticNonconvex.name: LogisticNonconvex,
    LeastSquares.name: LeastSquares,
}


def problem_from_arrays(
    model: str, rows: Sequence, targets: Sequence[np.ndarray], *, regularization: float
) -> Problem:
    """A problem from per-worker row blocks and targets (labels +-1 for logistic)."""
    cls = MODELS[model]
    if cls is LogisticNonconvex:
        # Fold the labels into the rows: the loss depends on b_j a_j only.
        signed = []
        for r, t in zip(rows, targets):
            t = np.asarray(t, dtype=np.float64)
            if sp.issparse(r):
                signed.append(sp.csr_matrix(sp.diags(t) @ r, dtype=np.float64))
            else:
                signed.append(np.asarray(r, dtype=np.float64) * t[:, None])
        rows = signed
    else:
        rows = [r if sp.issparse(r) else np.asarray(r, dtype=np.float64) for r in rows]
    return cls(Shards(list(rows), [np.asarray(t, dtype=np.float64) for t in targets]), regularization=regularization)


def build_problem(dataset, parts: Sequence[np.ndarray], *, model: str, regularization: float) -> Problem:
    """Split a loaded dataset over workers (``parts``: row indices per worker)."""
    from ..data import binary_labels

    y = dataset.y
    if model == LogisticNonconvex.name:
        y = binary_labels(y, source=dataset.source)
    X = dataset.X
    rows = [X[np.asarray(idx)] for idx in parts]
    targets = [y[np.asarray(idx)] for idx in parts]
    return problem_from_arrays(model, rows, targets, regularization=regularization)
