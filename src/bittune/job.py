"""The job spec: schema, defaults, validation, clear errors.

A job file is YAML; paths in it are relative to the job file's folder. Every
section is declared once in :data:`SECTIONS` (key -> :class:`~bittune._yaml.Param`),
so a new section is a table entry plus its dataclass, not new code paths.
All problems of a file are reported together in one :class:`InputError`,
each starting with its key path (``workers.count: must be an integer >= 1, got 0``).
"""

from __future__ import annotations

import hashlib
import json
import os
import warnings
from copy import deepcopy
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from bittune._yaml import (
    REQUIRED, Param, check_mapping, key_text, parse_yaml, read_bytes, show, unknown_key,
)
from bittune.compressors import parse_spec
from bittune.errors import InputError
from bittune.front import PREFER_RULES

__all__ = [
    "DataSpec", "WorkersSpec", "TargetSpec", "BudgetSpec", "StartSpec", "ProbeSpec", "SearchSpec", "NetworkSpec",
    "AssumeSpec", "EngineSpec", "Job",
    "load_job", "parse_job", "data_digest", "MODELS", "SPLITS", "DATA_FORMATS", "SECTIONS",
]

#: Most parallel processes a tune may start (search.jobs, --jobs): a bound on memory and file
#: handles (our choice, no source; far above the cores of one machine).
MAX_JOBS = 64

MODELS = ("logistic_nonconvex", "least_squares", "softmax", "mlp", "plugin")
OBJECTIVES = ("bits", "seconds", "front")
#: ``prefer``: the point of the front the config holds (bittune.front.choose).
PREFER = tuple(PREFER_RULES)
METHOD_NAMES = ("gd", "dcgd", "diana", "marina", "pp_marina", "vr_marina", "ef21")
COMPRESSOR_NAMES = ("identity", "rand_k", "top_k", "dither", "natural", "natural_dither", "perm_k")
SPLITS = ("iid", "by_label", "dirichlet", "column")
DATA_FORMATS = ("svmlight", "csv", "npz")
#: File extension -> data format, used when ``data.format`` is not given.
_EXTENSIONS = {".svm": "svmlight", ".svmlight": "svmlight", ".libsvm": "svmlight",
               ".txt": "svmlight", ".csv": "csv", ".npz": "npz"}
#: Models whose oracle runs in float32 (``engine.precision``); the others keep arrays of their own
#: in float64 (``Problem.float32_ok``).
_FLOAT32_MODELS = ("logistic_nonconvex", "least_squares")
#: Default ``regularization`` per model.
_DEFAULT_REGULARIZATION = {"logistic_nonconvex": 0.1, "least_squares": 0.0, "softmax": 1e-3, "mlp": 1e-4,
                           "plugin": 0.0}  # softmax/mlp/plugin: our choice, no source


@dataclass(frozen=True)
class DataSpec:
    path: Path
    format: str
    label_column: str | None
    group_column: str | None


@dataclass(frozen=True)
class WorkersSpec:
    count: int
    split: str
    seed: int
    dirichlet_alpha: float


@dataclass(frozen=True)
class TargetSpec:
    """Exactly one kind: ``grad_norm_sq`` (||grad f(x)||^2 <= eps, times ||grad f(x0)||^2 when
    ``relative``) or ``loss_gap`` (f(x) - f_ref <= delta, always absolute; ``relative`` is False)."""

    grad_norm_sq: float | None
    relative: bool
    loss_gap: float | None = None

    @property
    def kind(self) -> str:
        return "loss_gap" if self.loss_gap is not None else "grad_norm_sq"


@dataclass(frozen=True)
class BudgetSpec:
    max_rounds: int
    max_bits_per_worker: float | None


@dataclass(frozen=True)
class NetworkSpec:
    latency: float
    uplink_bandwidth: float
    downlink_bandwidth: float
    compute_seconds: float | None
    #: Uneven network (network.workers): per worker a dict latency, uplink_bandwidth,
    #: compute_seconds (None: measured) and compute_scale (the measured time's factor); None: even.
    workers: tuple | None = None


@dataclass(frozen=True)
class AssumeSpec:
    """What the user states about f that the probe cannot measure."""

    pl_mu: float | None  # Polyak-Lojasiewicz constant: (1/2)||grad f||^2 >= mu (f - f_inf)


@dataclass(frozen=True)
class EngineSpec:
    """How the simulations run: ``precision`` of the trajectory arithmetic (the probe and the
    gradient check always run in float64)."""

    precision: str = "float64"


@dataclass(frozen=True)
class ProbeSpec:
    runs: int
    run_rounds: int
    points_per_run: int
    power_iters: int
    safety: float
    gradient_tolerance: float
    seed: int
    lower_bound: float | None


@dataclass(frozen=True)
class SearchSpec:
    methods: list
    compressors: list
    trials: int
    jobs: int
    seeds: int
    seed: int
    step_range: tuple
    sync_range: tuple
    shift_range: tuple
    levels_range: tuple
    pruner: str
    validation_seeds: int
    finalists: int
    backoff_factor: float
    backoff_steps: int
    backoff_tolerance: float
    bits_cap_factor: float
    trial_batch: int = 1
    #: Not a job key: retune's narrowed multiplier range over an anchored method's search anchor (the
    #: theory rule's ``search_range`` when None; docs/design.md, "Nightly retuning").
    anchor_range: tuple | None = None


@dataclass(frozen=True)
class StartSpec:
    kind: str  # "zeros" | "random" | "file"
    seed: int | None
    scale: float
    path: Path | None


@dataclass(frozen=True)
class Job:
    path: Path  # the job file (absolute when read by load_job)
    data: DataSpec
    model: str
    regularization: float
    workers: WorkersSpec
    target: TargetSpec
    budget: BudgetSpec
    start: StartSpec
    probe: ProbeSpec
    search: SearchSpec
    objective: str
    network: NetworkSpec
    model_options: dict
    raw: dict = field(repr=False)
    digest: str  # sha256 hex of the job file bytes (and of a plugin model's .py file)
    allow_code: bool = False  # --allow-code: a plugin model may be imported
    assume: AssumeSpec = AssumeSpec(pl_mu=None)
    engine: EngineSpec = EngineSpec()
    prefer: str | None = None  # objective front: bits | seconds | balanced (bittune.front.choose)
    #: The server's compressor spec (downlink.compressor, a parse_spec dict); None: dense broadcast.
    downlink: dict | None = None
    #: Stochastic gradients: rows b each worker draws with replacement per gradient evaluation
    #: (docs/theory.md §2.12); None: full local gradients. Checked against the shards by open_job.
    minibatch: int | None = None


#: Top-level keys that hold a single value ("" section).
TOP = {
    "model": Param("choice", options=MODELS, default=REQUIRED),
    # the default depends on the model, filled in by parse_job
    "regularization": Param("real", low=0.0),
    # front: a two-objective study over (bits, seconds) and a validated front (docs/design.md, "The front")
    "objective": Param("choice", options=OBJECTIVES, default="bits"),
    # which point of the validated front the config holds (objective front only; default balanced)
    "prefer": Param("choice", options=PREFER),
    # model plugin: "module:function" or "path/file.py:function" (runs only with --allow-code)
    "plugin": Param("str"),
    # stochastic gradients: b rows per worker per gradient evaluation, drawn with replacement
    # (absent: full local gradients); at most the smallest worker's rows (workspace.open_job)
    "minibatch": Param("int", low=1),
}

#: Section name -> key -> constraint. Declare a new section here.
SECTIONS: dict[str, dict[str, Param]] = {
    "data": {
        "path": Param("str", default=REQUIRED),
        "format": Param("choice", options=DATA_FORMATS),  # None: from the extension
        "label_column": Param("str"),
        "group_column": Param("str"),
    },
    "workers": {
        "count": Param("int", low=1, default=REQUIRED),
        "split": Param("choice", options=SPLITS, default=REQUIRED),
        "seed": Param("int", low=0, default=0),
        "dirichlet_alpha": Param("real", low=0, closed="right", default=1.0),
    },
    "target": {  # exactly one of grad_norm_sq and loss_gap (checked by _check_target)
        "grad_norm_sq": Param("real", low=0, closed="right"),
        "relative": Param("bool", default=True),  # grad_norm_sq only
        "loss_gap": Param("real", low=0, closed="right"),  # f(x) - f_ref, f_ref found by L-BFGS-B
    },
    "budget": {
        "max_rounds": Param("int", low=1, default=REQUIRED),
        "max_bits_per_worker": Param("real", low=0, closed="right"),
    },
    "mlp": {  # the model mlp
        "hidden": Param("int", low=1, default=16),
        "activation": Param("choice", options=("tanh", "relu"), default="tanh"),
        "loss": Param("choice", options=("logistic", "squared"), default="logistic"),
    },
    "network": {  # the objective "seconds"; defaults: a metered edge link (our choice, no source)
        "latency": Param("real", low=0, default=0.05),
        "uplink_bandwidth": Param("real", low=0, closed="right", default=1e6),
        "downlink_bandwidth": Param("real", low=0, closed="right", default=1e7),
        "compute_seconds": Param("real", low=0),  # default: measured by the probe
    },
    "assume": {  # optional statements about f: the PL theory rules (docs/theory.md §2.7, §2.9) use pl_mu
        "pl_mu": Param("real", low=0, closed="right"),
    },
    "engine": {  # float32 halves the bytes each data pass streams (README, "Performance")
        "precision": Param("choice", options=("float64", "float32"), default="float64"),
    },
    "probe": {
        # Upper bounds keep a typo from hanging the probe (our choice, no source).
        "runs": Param("int", low=1, high=100, default=3),
        "run_rounds": Param("int", low=1, high=100_000, default=30),
        "points_per_run": Param("int", low=1, high=100, default=4),
        "power_iters": Param("int", low=1, high=10_000, default=30),
        "safety": Param("real", low=1.0, default=1.0),
        "gradient_tolerance": Param("real", low=0, closed="right", default=1e-5),
        "seed": Param("int", low=0, default=0),
        "lower_bound": Param("real"),  # a known lower bound of f; default: the model's
    },
    "search": {
        # vr_marina is opt-in: with bits as the objective it only adds gradient noise to
        # MARINA; it pays when compute counts (objective: seconds) and the probe's calL costs time.
        "methods": Param("choices", options=METHOD_NAMES, default=[m for m in METHOD_NAMES if m != "vr_marina"]),
        "compressors": Param("choices", options=COMPRESSOR_NAMES,
                             default=["rand_k", "top_k", "dither", "natural"]),
        "trials": Param("int", low=1, default=60),
        "jobs": Param("int", low=1, high=MAX_JOBS, default=1),  # see MAX_JOBS
        "seeds": Param("int", low=1, default=3),
        "seed": Param("int", low=0, default=0),
        "step_range": Param("range", low=0, closed="right", default=(0.5, 4096.0)),
        "sync_range": Param("range", low=0, closed="right", default=(0.1, 10.0)),
        "shift_range": Param("range", low=0, closed="right", default=(0.1, 10.0)),
        "levels_range": Param("range", low=1, default=(1.0, 16.0)),
        "pruner": Param("choice", options=("median", "none"), default="median"),
        "validation_seeds": Param("int", low=1, default=5),
        "finalists": Param("int", low=1, default=3),
        "backoff_factor": Param("real", low=1, closed="right", default=2.0),
        "backoff_steps": Param("int", low=0, default=3),
        "backoff_tolerance": Param("real", low=0, default=0.05),
        "bits_cap_factor": Param("real", low=1, closed="right", default=4.0),
        # Trials kept in one refilling engine batch (bittune.batch); 1: one at a time. T = 8 measured
        # 4.4x faster search, but with 8 trials in flight TPE tuned MARINA + PermK 1.15x dearer in
        # benchmarks/quality.py (docs/design.md, "Batched trials"): speed is opt-in, quality the default.
        "trial_batch": Param("int", low=1, high=64, default=1),
    },
    "start": {
        "seed": Param("int", low=0),
        "scale": Param("real", low=0, closed="right", default=1.0),
        "file": Param("str"),
    },
}
#: One entry of a network.workers list; a missing key takes the network section's value.
WORKER_LINK = {
    "latency": Param("real", low=0),
    "uplink_bandwidth": Param("real", low=0, closed="right"),
    "compute_seconds": Param("real", low=0),
}
#: network.workers given as a draw (docs/design.md, "Round time with uneven workers"): speed
#: factors s_i = exp(spread z_i), z_i ~ N(0, 1) from the seed, then the last ``stragglers``
#: workers at s_i / slowdown; worker i has uplink bandwidth s_i x and compute time 1/s_i x the
#: section's values.
WORKER_DRAW = {
    "stragglers": Param("int", low=0, default=0),
    "slowdown": Param("real", low=1, default=10.0),
    "spread": Param("real", low=0, default=0.0),
    "seed": Param("int", low=0, default=0),
}
#: Methods with a published bidirectional form (a downlink compressor): docs/theory.md §2.11.
BIDIRECTIONAL = ("ef21",)

#: Sections whose absence is reported as ``<name>: required`` (others act as ``{}``).
_REQUIRED_SECTIONS = ("data",)
#: A plain string given for these sections stands for ``{key: string}``.
_SHORTHAND = {"data": "path"}
#: key -> (the setting that must hold for it to be used, human condition).
_USED_ONLY_IF = {
    "workers.dirichlet_alpha": (lambda v: v["workers"].get("split") == "dirichlet",
                                "workers.split is dirichlet"),
    "start.scale": (lambda v: v["start"].get("seed") is not None, "start.seed is set"),
    **{f"mlp.{k}": (lambda v: v[""].get("model") == "mlp", "model is mlp") for k in ("hidden", "activation", "loss")},
    # a front study prunes no trial and has no single best to scale a cost cap from (docs/design.md, "The front")
    **{f"search.{k}": (lambda v: v[""].get("objective") != "front", "objective is bits or seconds")
       for k in ("pruner", "bits_cap_factor")},
    **{f"network.{k}": (lambda v: v[""].get("objective") in ("seconds", "front"), "objective is seconds or front")
       for k in ("latency", "uplink_bandwidth", "downlink_bandwidth", "compute_seconds")},
}


def data_digest(job: Job) -> str:
    """sha256 of the job's data file (provenance, study names, a stored f_ref's validity)."""
    return hashlib.sha256(Path(job.data.path).read_bytes()).hexdigest()


def load_job(path: str | os.PathLike) -> Job:
    """Read and validate a job file (see the module docstring)."""
    p = Path(path)
    data = read_bytes(p)
    mapping = parse_yaml(data, source=str(p))
    job = parse_job(mapping, base_dir=p.absolute().parent, source=str(p),
                    digest=hashlib.sha256(data).hexdigest())
    plugin = job.model_options.get("plugin", "")
    module = plugin.rpartition(":")[0]
    if module.endswith(".py") and Path(module).is_file():
        # The user's model is part of the job: a study tuned with one version of the file must
        # not be resumed or joined with another (the digest names the study's job).
        both = hashlib.sha256(data + b"\0plugin\0" + Path(module).read_bytes())
        job = replace(job, digest=both.hexdigest())
    return replace(job, path=p.absolute())


def parse_job(mapping: dict, *, base_dir: Path, source: str, digest: str | None = None) -> Job:
    """Validate a job mapping; relative paths are resolved against ``base_dir``.

    ``digest`` is the sha256 of the job file's bytes; when the mapping did not
    come from a file it defaults to the sha256 of the mapping as canonical JSON.
    Raises one :class:`InputError` listing every problem found.
    """
    if not isinstance(mapping, dict):
        raise InputError(f"top level: must be a mapping of job sections, got {show(mapping)}",
                         source=source)
    problems: list[str] = []
    known = list(TOP) + list(SECTIONS) + ["downlink"]
    problems += [unknown_key(key_text(k), k, known) for k in mapping if k not in known]
    values = {"": check_mapping({k: mapping.get(k) for k in TOP}, TOP, prefix="", problems=problems)}
    for name, schema in SECTIONS.items():
        raw = mapping.get(name)
        if raw is None and name in _REQUIRED_SECTIONS:
            problems.append(f"{name}: required")
            values[name] = {}
            continue
        if isinstance(raw, str) and name in _SHORTHAND:
            raw = {_SHORTHAND[name]: raw}
        if name == "network" and isinstance(raw, dict) and "workers" in raw:
            raw = {k: v for k, v in raw.items() if k != "workers"}  # checked by _check_workers
        if raw is not None and not isinstance(raw, dict):
            problems.append(f"{name}: must be a mapping, got {show(raw)}")
            values[name] = {}
            continue
        values[name] = check_mapping(raw or {}, schema, prefix=f"{name}.", problems=problems)
    given = {f"{s}.{key_text(k)}" for s in SECTIONS if isinstance(mapping.get(s), dict)
             for k, v in mapping[s].items() if v is not None}
    data, start = _check_data(values, base_dir, problems), _check_start(values, base_dir, problems)
    _check_target(mapping.get("target"), values, problems)
    net_raw = mapping.get("network")
    links = _check_workers(net_raw.get("workers") if isinstance(net_raw, dict) else None, values, problems)
    downlink = _check_downlink(mapping.get("downlink"), values, problems)
    model = values[""].get("model")
    if values["engine"].get("precision") == "float32" and model is not None and model not in _FLOAT32_MODELS:
        problems.append(f"engine.precision: float32 is available for the models {', '.join(_FLOAT32_MODELS)}, "
                        f"not {model} (use float64)")
    if values[""].get("prefer") is not None and values[""].get("objective") != "front":
        problems.append(f"prefer: only used with objective: front (it picks a point of the bits-seconds front), "
                        f"but the objective is {values[''].get('objective')}; remove prefer or set objective: front")
    if problems:
        raise InputError(problems, source=source)
    if values[""].get("model") == "plugin" and not values[""].get("plugin"):
        raise InputError(["plugin: required for model plugin ('module:function' or 'path/file.py:function')"],
                         source=source)
    for key, (used, condition) in _USED_ONLY_IF.items():
        if key in given and not used(values):
            warnings.warn(f"{source}: {key}: ignored unless {condition}", UserWarning, stacklevel=2)
    top = values[""]
    if top["regularization"] is None:
        top["regularization"] = _DEFAULT_REGULARIZATION[top["model"]]
    if digest is None:
        canonical = json.dumps(mapping, sort_keys=True, default=str).encode()
        digest = hashlib.sha256(canonical).hexdigest()
    return Job(
        path=Path(source), data=data, model=top["model"], regularization=top["regularization"],
        workers=WorkersSpec(**values["workers"]), target=TargetSpec(**values["target"]),
        budget=BudgetSpec(**values["budget"]), start=start, probe=ProbeSpec(**values["probe"]),
        search=SearchSpec(**values["search"]), objective=top["objective"],
        prefer=top["prefer"] or "balanced" if top["objective"] == "front" else None,
        model_options=_model_options(top, values, base_dir),
        network=NetworkSpec(**values["network"], workers=links), downlink=downlink,
        raw=deepcopy(mapping), digest=digest, assume=AssumeSpec(**values["assume"]),
        engine=EngineSpec(**values["engine"]), minibatch=top["minibatch"],
    )


def _check_workers(raw, values: dict, problems: list[str]) -> tuple | None:
    """network.workers: a list of one link per worker, or a draw (WORKER_DRAW); None when absent."""
    if raw is None:
        return None
    net, n = values["network"], values["workers"].get("count")
    if values[""].get("objective") not in ("seconds", "front"):
        warnings.warn("network.workers: ignored unless objective is seconds or front", UserWarning, stacklevel=3)
    base = {k: net.get(k) for k in WORKER_LINK}
    if isinstance(raw, list):
        if n is not None and len(raw) != n:
            problems.append(f"network.workers: must list one entry per worker ({n}, workers.count), "
                            f"got {len(raw)}")
            return None
        out = []
        for i, entry in enumerate(raw):
            key = f"network.workers[{i}]"
            if not isinstance(entry, dict):
                problems.append(f"{key}: must be a mapping of {', '.join(WORKER_LINK)}, got {show(entry)}")
                continue
            got = check_mapping(entry, WORKER_LINK, prefix=f"{key}.", problems=problems)
            out.append({**base, **{k: v for k, v in got.items() if v is not None}, "compute_scale": 1.0})
        return tuple(out)
    if not isinstance(raw, dict):
        problems.append(f"network.workers: must be a list of per-worker links or a mapping of "
                        f"{', '.join(WORKER_DRAW)}, got {show(raw)}")
        return None
    got = check_mapping(raw, WORKER_DRAW, prefix="network.workers.", problems=problems)
    if n is None or len(got) < len(WORKER_DRAW) or None in (base["latency"], base["uplink_bandwidth"]):
        return None
    if got["stragglers"] > n:
        problems.append(f"network.workers.stragglers: at most the {n} workers (workers.count), "
                        f"got {got['stragglers']}")
        return None
    speed = np.exp(got["spread"] * np.random.default_rng(got["seed"]).standard_normal(n))
    speed[n - got["stragglers"]:] /= got["slowdown"]
    out = []
    for s in speed.tolist():
        c = base["compute_seconds"]
        out.append({"latency": base["latency"], "uplink_bandwidth": base["uplink_bandwidth"] * s,
                    "compute_seconds": None if c is None else c / s, "compute_scale": 1.0 / s})
    return tuple(out)


def _check_downlink(raw, values: dict, problems: list[str]) -> dict | None:
    """downlink: {compressor: SPEC}, for search methods with a bidirectional form only."""
    if raw is None:
        return None
    if not isinstance(raw, dict):
        problems.append(f"downlink: must be a mapping with the key compressor, got {show(raw)}")
        return None
    problems.extend(unknown_key("downlink." + key_text(k), k, ["compressor"]) for k in raw if k != "compressor")
    if raw.get("compressor") is None:
        problems.append("downlink.compressor: required")
        return None
    try:
        spec = parse_spec(raw["compressor"], key="downlink.compressor")
    except InputError as exc:
        problems.extend(exc.problems)
        return None
    others = [m for m in values["search"].get("methods") or () if m not in BIDIRECTIONAL]
    if others:
        problems.append(f"downlink.compressor: only {', '.join(BIDIRECTIONAL)} has a bidirectional form; "
                        f"search.methods also lists {', '.join(others)} (drop them or the downlink)")
        return None
    return spec


def _model_options(top: dict, values: dict, base_dir: Path) -> dict:
    """Options handed to the model: the mlp section, or the plugin spec (path made absolute)."""
    if top["model"] == "mlp":
        return dict(values["mlp"])
    if top["model"] == "plugin":
        spec = top["plugin"]
        module, _, func = spec.rpartition(":")
        if module.endswith(".py"):
            spec = f"{_resolve(base_dir, module)}:{func}"
        return {"plugin": spec}
    return {}


def _resolve(base_dir: Path, text: str) -> Path:
    """Absolute, normalised path of ``text`` relative to ``base_dir`` (``~`` expanded)."""
    return Path(os.path.abspath(Path(base_dir) / Path(text).expanduser()))


def _existing_file(key: str, base_dir: Path, text: str, problems: list[str]) -> Path:
    if "\0" in text:
        problems.append(f"{key}: a path cannot hold a NUL character, got {show(text)}")
        return Path(base_dir) / text.replace("\0", "")
    try:
        p = _resolve(base_dir, text)
    except RuntimeError as exc:  # expanduser: ``~nobody-here`` or no home folder
        problems.append(f"{key}: cannot expand {show(text)}: {exc}")
        return Path(base_dir) / text
    try:
        if not p.exists():
            problems.append(f"{key}: file not found: {p}")
        elif not p.is_file():
            problems.append(f"{key}: not a file: {p}")
    except OSError as exc:  # e.g. a name longer than the file system allows
        problems.append(f"{key}: cannot use the path {show(str(p))}: {exc.strerror}")
    return p


def _check_data(values: dict, base_dir: Path, problems: list[str]) -> DataSpec | None:
    """Path exists; format given or inferred; columns fit the format and the split."""
    v = values["data"]
    if "path" not in v:
        return None
    path = _existing_file("data.path", base_dir, v["path"], problems)
    fmt = v.get("format") or _EXTENSIONS.get(path.suffix.lower())
    if fmt is None:
        if "format" not in v:  # given but invalid: already reported
            return None
        problems.append(f"data.format: cannot infer the format from the extension "
                        f"{path.suffix!r} of {path.name}; set it to one of {', '.join(DATA_FORMATS)}")
        return None
    if fmt == "csv" and "label_column" in v and v["label_column"] is None:
        problems.append("data.label_column: required for csv data")
    if fmt != "csv":
        problems += [f"data.{k}: only used for csv data, but the format is {fmt}"
                     for k in ("label_column", "group_column") if v.get(k) is not None]
    if values["workers"].get("split") == "column":
        if fmt == "csv" and "group_column" in v and v["group_column"] is None:
            problems.append("data.group_column: required for workers.split: column")
        elif fmt == "svmlight":
            problems.append("workers.split: column needs group ids, which svmlight data cannot "
                            "hold (use csv with data.group_column, or npz with an array 'groups')")
    return DataSpec(path=path, format=fmt, label_column=v.get("label_column"),
                    group_column=v.get("group_column"))


def _check_target(raw: Any, values: dict, problems: list[str]) -> None:
    """Exactly one of grad_norm_sq and loss_gap; relative only with grad_norm_sq.

    A loss-gap target is absolute (f(x) - f_ref <= delta), so ``relative`` given
    with it is an error rather than silently ignored; ``values["target"]["relative"]``
    becomes False for it.
    """
    if raw is not None and not isinstance(raw, dict):
        return  # already reported: "target: must be a mapping"
    given = {k for k, v in (raw or {}).items() if v is not None}
    if "grad_norm_sq" in given and "loss_gap" in given:
        problems.append("target: give exactly one of grad_norm_sq (a target on ||grad f||^2) and loss_gap "
                        "(a target on f(x) - f_ref), not both")
    elif not given & {"grad_norm_sq", "loss_gap"}:
        problems.append("target.grad_norm_sq: required")
        problems.append("target: give grad_norm_sq (stop at ||grad f(x)||^2 <= eps) or loss_gap "
                        "(stop at f(x) - f_ref <= delta)")
    elif "loss_gap" in given:
        if "relative" in given:
            problems.append("target.relative: only used with target.grad_norm_sq; a loss_gap target is "
                            "absolute (f(x) - f_ref <= delta), remove relative")
        values["target"]["relative"] = False


def _check_start(values: dict, base_dir: Path, problems: list[str]) -> StartSpec:
    """zeros (default), random (seed, scale) or file; never both seed and file."""
    v: dict[str, Any] = values["start"]
    seed, scale, file = v.get("seed"), v.get("scale", 1.0), v.get("file")
    if seed is not None and file is not None:
        problems.append("start: give either seed (random start) or file, not both")
    if file is not None:
        return StartSpec(kind="file", seed=None, scale=scale,
                         path=_existing_file("start.file", base_dir, file, problems))
    if seed is not None:
        return StartSpec(kind="random", seed=seed, scale=scale, path=None)
    return StartSpec(kind="zeros", seed=None, scale=scale, path=None)
