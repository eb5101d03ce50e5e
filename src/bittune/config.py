"""The output config a launcher reads: schema, validation, atomic write, load.

```yaml
bittune_config: 1
method: marina
compressor: {name: rand_k, k: 6}
step_size: 0.25
sync_probability: 0.05      # marina only
shift_rate: 0.1             # diana only (optional)
problem: {dimension: 123, workers: 12}
```
Other top-level sections (``target``, ``expected``, ``baseline``, ``gains``,
``units``, ``constants``, ``provenance``, ``retune``, ``front``, ``transfer``, ...) are free-form and
kept verbatim; a key that looks like a typo
of a known one is an error. All problems are reported together, key paths named.
"""

from __future__ import annotations

import difflib
import math
import os
import warnings
from copy import deepcopy
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from bittune._yaml import (
    REQUIRED, Param, atomic_write_text, check_mapping, dump_yaml, key_text, load_yaml, show, unknown_key,
)
from bittune.errors import InputError

__all__ = [
    "Config", "METHODS", "COMPRESSORS", "FORMAT_VERSION", "parse_config", "load_config",
    "config_to_dict", "write_config", "check_config_fits", "sig", "UNITS", "REPORTED_DIGITS", "SEED_DIGITS",
]

FORMAT_VERSION = 1
METHODS = ("gd", "dcgd", "diana", "marina", "pp_marina", "vr_marina", "ef21")
#: Compressor name -> its parameters.
COMPRESSORS: dict[str, dict[str, Param]] = {
    "identity": {},
    "rand_k": {"k": Param("int", low=1, default=REQUIRED)},
    "top_k": {"k": Param("int", low=1, default=REQUIRED)},
    "dither": {"levels": Param("int", low=1, default=REQUIRED)},
    "natural": {},
    "natural_dither": {"levels": Param("int", low=1, default=REQUIRED)},
    "perm_k": {},  # its density is fixed by the dimension and the worker count
}
_PROBABILITY = Param("real", low=0, high=1, closed="right")
#: Top-level single values.
TOP = {
    "method": Param("choice", options=METHODS, default=REQUIRED),
    "step_size": Param("real", low=0, closed="right", default=REQUIRED),
    "sync_probability": _PROBABILITY,
    "shift_rate": _PROBABILITY,
    "clients": Param("int", low=1),
    "minibatch": Param("int", low=1),
    # the engine precision the config was tuned with (replay uses it); absent: float64
    "precision": Param("choice", options=("float64", "float32")),
}
#: Method-specific keys: key -> {method: required?}. Any other method rejects the key.
METHOD_KEYS = {
    "sync_probability": {"marina": True, "pp_marina": True, "vr_marina": True},
    "shift_rate": {"diana": False},  # None: the method's default
    "clients": {"pp_marina": False},  # None: all n workers (r = n); needs TOP["clients"] to be read
    "minibatch": {"vr_marina": True},  # rows per worker per compressed round
}
PROBLEM = {"dimension": Param("int", low=1), "workers": Param("int", low=1)}
#: Free-form sections written by later stages (listed so typos of them are caught).
#: ``baseline`` (tuned uncompressed GD), ``gains`` (over it and over theory, with intervals) and ``units``
#: came later: configs without them load as before.
FREE_SECTIONS = ("target", "expected", "baseline", "gains", "units", "constants", "provenance", "retune",
                 "front", "transfer", "network_shares", "downlink", "gradients")
_KNOWN = ["bittune_config", *TOP, "compressor", "problem"]
#: A section of one's own is a typo only this close to a known key (difflib ratio; 0.75 keeps
#: `expectd` -> expected (0.93) and lets a `notes` section (0.6 to `units`) through; no source).
TYPO_CUTOFF = 0.75


def _looks_like_a_typo(key: str) -> bool:
    """Close to a known key (difflib, TYPO_CUTOFF), or a known key cut short (``step`` for
    ``step_size``, ``sync`` for ``sync_probability``); common practice, no source."""
    known = _KNOWN + list(FREE_SECTIONS)
    return bool(difflib.get_close_matches(key, known, cutoff=TYPO_CUTOFF)) or any(
        k.startswith(key) for k in known if len(key) >= 3)


#: Significant digits of the figures a config reports (expected bits, rounds, gains); the settings a
#: launcher uses (step size, sync probability, shift rate) stay exact. Four digits: finer than the
#: seed-to-seed spread of any figure seen so far (common practice, no source).
REPORTED_DIGITS = 4
#: Significant digits of per-seed bit counts: exact below 10^6 bits for whole counts, and within half a
#: bit in 10^6 otherwise.
SEED_DIGITS = 6
#: The unit of every key of that name anywhere in a written config (its ``units`` section).
UNITS = {
    "step_size": "parameter units per unit of gradient (x <- x - step_size * direction)",
    "sync_probability": "probability per round of a dense sync round",
    "shift_rate": "fraction of the gap a shift closes per round",
    "bits_per_worker": "uplink bits per worker (worker to server), one entry per seed",
    "mean_bits_per_worker": "uplink bits per worker (worker to server) to reach the target",
    "std_bits_per_worker": "uplink bits per worker (sample standard deviation over the seeds)",
    "rounds": "rounds (one step of the method each), one entry per seed",
    "mean_rounds": "rounds to reach the target",
    "std_rounds": "rounds (sample standard deviation over the seeds)",
    "seconds": "seconds simulated under the job's network model, one entry per seed",
    "mean_seconds": "seconds simulated under the job's network model to reach the target",
    "std_seconds": "seconds simulated (sample standard deviation over the seeds)",
    "mean_gradient_evals_per_worker": "per-sample gradient evaluations per worker",
    "ratio": "baseline mean cost / chosen mean cost (no unit; the cost is the objective: bits or seconds)",
    "interval": "the ratio's paired percentile bootstrap interval at `level` over the validation seeds",
    "target_grad_norm_sq": "squared gradient norm ||grad f||^2 (absolute)",
    "target_loss_gap": "loss gap f(x) - f_ref (absolute, loss units)",
    "L": "loss units per parameter unit squared (also L_am, L_qm, L_max, L_plus, L_pm, L_sample, L_workers: "
         "Lipschitz constants of gradients; README, 'The constants')",
    "delta0": "loss units: f(x0) - lower bound",
    "grad_sq0": "squared gradient norm at x0",
    "minibatch": "rows per worker per gradient evaluation (gradients: every method; top level: VR-MARINA's b')",
    "noise_variance": "squared gradient units: variance of one worker's minibatch gradient (also noise_variance_x0)",
}


def sig(value, digits: int = REPORTED_DIGITS):
    """``value`` rounded to ``digits`` significant digits (lists and None pass through)."""
    if isinstance(value, (list, tuple)):
        return [sig(v, digits) for v in value]
    if not isinstance(value, (float, np.floating)):
        return value  # counts (int), flags, names and None stay as they are
    value = float(value)
    return float(f"{value:.{digits}g}") if math.isfinite(value) else value


@dataclass(frozen=True)
class Config:
    method: str
    compressor: dict
    step_size: float
    sync_probability: float | None
    shift_rate: float | None
    dimension: int | None
    workers: int | None
    extra: dict = field(default_factory=dict)  # other top-level sections, kept verbatim
    clients: int | None = None  # pp_marina: clients per compressed round (None: all)
    minibatch: int | None = None  # vr_marina: rows per worker per compressed round
    precision: str | None = None  # engine precision tuned with (None: float64, older configs)


def parse_config(mapping: Any, *, source: str) -> Config:
    """Validate a config mapping; raise one :class:`InputError` listing every problem."""
    if not isinstance(mapping, dict):
        raise InputError(f"top level: must be a mapping, got {show(mapping)}", source=source)
    problems: list[str] = []
    version = mapping.get("bittune_config")
    if version is None:
        problems.append("bittune_config: required (the format version)")
    elif isinstance(version, bool) or version != FORMAT_VERSION:
        problems.append(f"bittune_config: unsupported format version {show(version)} "
                        f"(this bittune reads version {FORMAT_VERSION})")
    top = check_mapping(mapping, TOP, prefix="", problems=problems, allow_unknown=True)
    method = top.get("method")
    for key, by_method in METHOD_KEYS.items():
        if method is None or key not in top:
            continue
        if top[key] is not None and method not in by_method:
            problems.append(f"{key}: not used by method {method}")
        elif top[key] is None and by_method.get(method):
            problems.append(f"{key}: required for method {method}")
    compressor = _check_compressor(mapping.get("compressor"), problems)
    problem = mapping.get("problem")
    if problem is not None and not isinstance(problem, dict):
        problems.append(f"problem: must be a mapping, got {show(problem)}")
        problem = None
    sizes = check_mapping(problem or {}, PROBLEM, prefix="problem.", problems=problems)
    extra = {}
    for key, value in mapping.items():
        if key in _KNOWN:
            continue
        if not isinstance(key, str):
            problems.append(unknown_key(key_text(key), key, _KNOWN))
        elif key not in FREE_SECTIONS and _looks_like_a_typo(key):
            problems.append(unknown_key(key, key, _KNOWN + list(FREE_SECTIONS)))
        else:
            extra[key] = deepcopy(value)
    if problems:
        raise InputError(problems, source=source)
    return Config(method=method, compressor=compressor, step_size=top["step_size"],
                  sync_probability=top["sync_probability"], shift_rate=top["shift_rate"],
                  clients=top["clients"], minibatch=top["minibatch"], precision=top["precision"],
                  dimension=sizes["dimension"], workers=sizes["workers"], extra=extra)


def _check_compressor(raw: Any, problems: list[str]) -> dict:
    """``{name: ..., <its parameters>}``; a plain string is the name alone."""
    if raw is None:
        problems.append("compressor: required")
        return {}
    if isinstance(raw, str):
        raw = {"name": raw}
    if not isinstance(raw, dict):
        problems.append(f"compressor: must be a mapping with a name, got {show(raw)}")
        return {}
    name = check_mapping(raw, {"name": Param("choice", options=tuple(COMPRESSORS), default=REQUIRED)},
                         prefix="compressor.", problems=problems, allow_unknown=True).get("name")
    if name is None:
        return {}
    schema = COMPRESSORS[name]
    all_params = sorted({k for params in COMPRESSORS.values() for k in params})
    for key in raw:
        if key == "name" or key in schema:
            continue
        if key in all_params:
            problems.append(f"compressor.{key}: not used by compressor {name}")
        else:
            problems.append(unknown_key(f"compressor.{key_text(key)}", key, ["name", *schema]))
    return {"name": name, **check_mapping(raw, schema, prefix="compressor.", problems=problems,
                                          allow_unknown=True)}


def load_config(path: str | os.PathLike) -> Config:
    """Read and validate a config file."""
    return parse_config(load_yaml(path), source=str(path))


def config_to_dict(cfg: Config) -> dict:
    """Plain mapping in the documented key order; unset optional keys left out."""
    out: dict[str, Any] = {"bittune_config": FORMAT_VERSION, "method": cfg.method,
                           "compressor": dict(cfg.compressor), "step_size": cfg.step_size}
    for key in ("sync_probability", "shift_rate", "clients", "minibatch", "precision"):
        if getattr(cfg, key) is not None:
            out[key] = getattr(cfg, key)
    sizes = {k: getattr(cfg, k) for k in ("dimension", "workers") if getattr(cfg, k) is not None}
    if sizes:
        out["problem"] = sizes
    out.update(cfg.extra)
    return out


def write_config(path: str | os.PathLike, cfg_or_dict: Config | dict) -> None:
    """Validate, then write the config atomically (nothing is written on bad input)."""
    cfg = cfg_or_dict
    if not isinstance(cfg, Config):
        cfg = parse_config(cfg, source=str(path))
    atomic_write_text(path, dump_yaml(config_to_dict(cfg)))


def check_config_fits(cfg: Config, *, dimension: int, workers: int, source: str) -> None:
    """Raise :class:`InputError` if ``cfg`` cannot run on a problem of this size.

    A config tuned for another dimension, or a Top-K/Rand-K with ``k`` above the
    dimension, is an error; a different worker count only warns (the config
    still runs, but its tuning may no longer be the best).
    """
    problems = []
    if cfg.dimension is not None and cfg.dimension != dimension:
        problems.append(f"problem.dimension: the config was tuned for dimension {cfg.dimension}, "
                        f"this problem has dimension {dimension}")
    k = cfg.compressor.get("k")
    if k is not None and k > dimension:
        problems.append(f"compressor.k: must be <= the dimension {dimension}, got {k}")
    if cfg.clients is not None and cfg.clients > workers:
        problems.append(f"clients: must be <= the number of workers {workers}, got {cfg.clients}")
    if problems:
        raise InputError(problems, source=source)
    if cfg.workers is not None and cfg.workers != workers:
        warnings.warn(f"{source}: problem.workers: the config was tuned for {cfg.workers} workers, "
                      f"this problem has {workers}", UserWarning, stacklevel=2)
