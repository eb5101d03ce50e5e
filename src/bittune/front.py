"""The bits-versus-seconds front (``objective: front``): non-dominated points, the thinned front, ``prefer``.

A front study minimises two costs at once, uplink bits per worker and simulated
seconds under the job's network (docs/design.md, "The front"). Selection
validates the study's non-dominated trials (Optuna's ``study.best_trials``) on
fresh seeds; the points kept are those no other validated point dominates on
their mean costs there, at most :data:`FRONT_SIZE` of them, and ``prefer`` picks
the config's point among them:

* ``bits``: the least mean bits (ties: the fewer seconds);
* ``seconds``: the fewest mean seconds (ties: the fewer bits);
* ``balanced``: the least product bits x seconds. It is the point where the front
  touches the steepest line of slope -1 in log-log axes, so a 1% saving of one
  cost is worth a 1% loss of the other; being a product it does not depend on
  the units (or on normalising each cost by its minimum over the front).
"""

from __future__ import annotations

import numpy as np

__all__ = ["FRONT_SIZE", "FRONT_TRIALS", "PREFER_RULES", "non_dominated", "thin", "choose"]

#: Most front points a config lists (the issue's bound).
FRONT_SIZE = 5
#: Most non-dominated trials of the study that are validated on fresh seeds (evenly spread along the
#: study's front by bits); our choice, no source: twice FRONT_SIZE leaves room for points the fresh
#: seeds show to be dominated.
FRONT_TRIALS = 10
#: ``prefer``'s choices (the job's options) and how :func:`choose` picks by each (the config's ``front.rule``).
PREFER_RULES = {"bits": "least mean bits per worker", "seconds": "fewest mean simulated seconds",
                "balanced": "least product mean bits x mean seconds (unit-free; a 1% saving of one cost is "
                            "worth a 1% loss of the other)"}


def non_dominated(costs) -> np.ndarray:
    """Mask of the rows of ``costs`` (n, 2) that no other row dominates (<= in both, < in one).

    Exact duplicates are all kept. Vectorised over all pairs (n is at most FRONT_TRIALS)."""
    c = np.asarray(costs, dtype=np.float64).reshape(-1, 2)
    le = (c[:, None, :] <= c[None, :, :]).all(axis=2)  # le[j, i]: row j <= row i in both
    lt = (c[:, None, :] < c[None, :, :]).any(axis=2)
    return ~(le & lt).any(axis=0)


def thin(costs, size: int = FRONT_SIZE, *, keep: int | None = None) -> list[int]:
    """At most ``size`` indices of the points ``costs`` (n, 2), evenly spread by rank along the first cost
    (both ends kept), always including index ``keep``; sorted by the first cost."""
    c = np.asarray(costs, dtype=np.float64).reshape(-1, 2)
    order = list(np.lexsort((c[:, 1], c[:, 0])))
    if len(order) <= size:
        return [int(i) for i in order]
    picks = {int(order[int(j)]) for j in np.round(np.linspace(0, len(order) - 1, size)).astype(int)}
    if keep is not None and keep not in picks:
        # drop the pick nearest to ``keep`` by rank, never an end
        inner = [i for i in picks if i not in (order[0], order[-1])]
        rank = order.index(keep)
        picks.discard(min(inner, key=lambda i: abs(order.index(i) - rank)))
        picks.add(int(keep))
    return sorted(picks, key=order.index)


def choose(costs, prefer: str) -> int:
    """Index of the point ``prefer`` picks among ``costs`` (n, 2) of (bits, seconds); see the module text."""
    c = np.asarray(costs, dtype=np.float64).reshape(-1, 2)
    if prefer == "bits":
        return int(np.lexsort((c[:, 1], c[:, 0]))[0])
    if prefer == "seconds":
        return int(np.lexsort((c[:, 0], c[:, 1]))[0])
    if prefer == "balanced":
        return int(np.lexsort((c[:, 0], c[:, 0] * c[:, 1]))[0])
    raise ValueError(f"prefer: must be bits, seconds or balanced, got {prefer!r}")
