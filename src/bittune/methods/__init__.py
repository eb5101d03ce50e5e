"""The optimizers, simulated on all workers and B trajectories at once."""

from __future__ import annotations

from .base import Method, dense_bits
from .dcgd import DCGD
from .diana import DIANA
from .ef21 import EF21
from .gd import GD
from .marina import MARINA
from .pp_marina import PPMARINA
from .vr_marina import VRMARINA

__all__ = ["Method", "METHODS", "make_method", "dense_bits", "GD", "DCGD", "DIANA", "MARINA", "PPMARINA",
           "VRMARINA", "EF21"]

#: Registry by config name. A new method is one file here plus its entry.
METHODS: dict[str, type[Method]] = {m.name: m for m in (GD, DCGD, DIANA, MARINA, PPMARINA, VRMARINA, EF21)}


def make_method(name: str, *, compressor, n_workers: int, dim: int, batch: int, **params) -> Method:
    """Instantiate a method by name for a batch of ``batch`` trajectories."""
    try:
        cls = METHODS[name]
    except KeyError:
        raise ValueError(f"method must be one of {', '.join(METHODS)}, got {name!r}") from None
    return cls(compressor=compressor, n_workers=n_workers, dim=dim, batch=batch, **params)
