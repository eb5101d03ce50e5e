"""Replay: simulate a config on a job and summarise bits and rounds to target.

A loss-gap job needs f_ref. :func:`stored_reference` takes it from the
config's ``constants.f_ref`` when the config was tuned on this very job file
and data file (the sha256 sums in its ``provenance``); otherwise ``open_job``
computes it again on the job's data.
"""

from __future__ import annotations

import math

import numpy as np

from .compressors import make_compressor, parse_spec
from .errors import InputError
from .config import Config, check_config_fits
from .job import Job, data_digest
from .simulate import Trajectory, simulate
from .search import SYNCED, link_kwargs, stall_window
from ._yaml import REQUIRED, Param, check_mapping
from .workspace import Workspace, check_minibatch

__all__ = ["replay", "summarize", "stored_reference", "config_seeds", "check_not_swapped", "config_minibatch"]


def check_not_swapped(config_path, job_path) -> None:
    """Exit 2 with a hint when CONFIG is a job file or JOB a config (given the other way round)."""
    from ._yaml import load_yaml
    from .errors import InputError

    for path, want, other in ((config_path, "config", "job"), (job_path, "job", "config")):
        try:
            doc = load_yaml(path)
        except InputError:
            continue  # the loader itself reports it when the file is read for real, with its line
        is_config = isinstance(doc, dict) and "bittune_config" in doc
        is_job = isinstance(doc, dict) and "data" in doc and not is_config
        if (want == "config" and is_job) or (want == "job" and is_config):
            raise InputError(f"{path}: looks like a {other} file; did you swap the config and the job? "
                             f"usage: bittune replay CONFIG --job JOB")


def config_seeds(cfg: Config) -> list[int] | None:
    """The validation seeds a tuned config was judged on (``expected.validation_seeds``), else None.

    Replaying on them reproduces the config's ``expected`` figures: the same
    trajectories, since a trajectory's random numbers depend on its seed only
    (DEVELOPERS.md, Randomness), with the same stopping rules as the selection.
    """
    exp = cfg.extra.get("expected")
    seeds = exp.get("validation_seeds") if isinstance(exp, dict) else None
    if not isinstance(seeds, list) or not seeds:
        return None
    if not all(isinstance(s, int) and not isinstance(s, bool) and s >= 0 for s in seeds):
        return None
    return list(seeds)


def replay(ws: Workspace, cfg: Config, *, seeds, source: str = "config") -> list[Trajectory]:
    """Simulate ``cfg`` (read from ``source``) on the workspace's problem, one trajectory per seed."""
    p = ws.problem
    check_config_fits(cfg, dimension=p.dim, workers=p.n_workers, source=source)
    comp = make_compressor(cfg.compressor, p.dim, key="compressor", n_workers=p.n_workers)
    params = {}
    if cfg.method in SYNCED and cfg.sync_probability is not None:
        params["sync_probability"] = cfg.sync_probability
    if cfg.method == "pp_marina" and cfg.clients is not None:
        params["clients"] = cfg.clients
    if cfg.method == "vr_marina" and cfg.minibatch is not None:
        params["minibatch"] = cfg.minibatch
    if cfg.method == "diana" and cfg.shift_rate is not None:
        params["shift_rate"] = cfg.shift_rate
    # The selection's stopping rules (the stall window too), so replaying a config on its own
    # validation seeds gives back its expected figures.
    return simulate(p, method=cfg.method, compressor=comp, step_size=cfg.step_size, seeds=seeds,
                    target=ws.target, max_rounds=ws.job.budget.max_rounds, x0=ws.x0, params=params,
                    max_bits_per_worker=ws.job.budget.max_bits_per_worker, loss_ref=ws.loss_ref,
                    stall_window=stall_window(cfg.method, params, comp),
                    precision=cfg.precision or "float64",  # as tuned, whatever the job says now
                    **link_kwargs(p, None, config_downlink(cfg, source), cfg.method,
                                  minibatch=config_minibatch(cfg, p, source)))


def config_minibatch(cfg: Config, problem=None, source: str = "config") -> int | None:
    """The minibatch b a config was tuned with (its ``gradients.minibatch``: stochastic gradients,
    docs/theory.md §2.12), else None (full batch); checked against ``problem``'s shards."""
    sec = cfg.extra.get("gradients")
    if sec is None:
        return None
    if not isinstance(sec, dict):
        raise InputError(f"{source}: gradients: must be a mapping with the key minibatch")
    problems: list[str] = []
    got = check_mapping({"minibatch": sec.get("minibatch")}, {"minibatch": Param("int", low=1, default=REQUIRED)},
                        prefix="gradients.", problems=problems)
    if problems:
        raise InputError(problems, source=source)
    b = got.get("minibatch")
    if problem is not None:
        check_minibatch(b, problem, source=source, key="gradients.minibatch")
    return b


def config_downlink(cfg: Config, source: str = "config") -> dict | None:
    """The server's compressor spec a config was tuned with (its ``downlink`` section), else None:
    EF21-BC (docs/theory.md §2.11) replays with the broadcast it was tuned on."""
    sec = cfg.extra.get("downlink")
    if sec is None:
        return None
    if not isinstance(sec, dict) or sec.get("compressor") is None:
        raise InputError(f"{source}: downlink.compressor: required in a downlink section")
    return parse_spec(sec["compressor"], key="downlink.compressor")


def stored_reference(cfg: Config, job: Job) -> dict | None:
    """The config's f_ref record if it was found on this job file and data file, else None."""
    consts, prov = cfg.extra.get("constants"), cfg.extra.get("provenance")
    ref = consts.get("f_ref") if isinstance(consts, dict) else None
    if job.target.kind != "loss_gap" or not isinstance(ref, dict) or not isinstance(prov, dict):
        return None
    value = ref.get("value")
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        return None
    if prov.get("job_sha256") != job.digest:
        return None
    try:
        data = data_digest(job)
    except OSError:
        return None
    return dict(ref) if prov.get("data_sha256") == data else None


def summarize(runs: list[Trajectory], *, loss_ref: float | None = None) -> dict:
    """The replay document: per-seed lists plus mean and spread over the seeds that reached.

    With ``loss_ref`` (a loss-gap target) it also holds ``f_ref`` and each seed's
    ``final_loss_gap`` f(x) - f_ref at the last iterate.
    """
    bits = np.array([r.uplink_bits for r in runs])
    rounds = np.array([r.rounds for r in runs])
    ok = np.array([r.reached for r in runs])
    doc = {
        "seeds": [r.seed for r in runs],
        "status": [r.status for r in runs],
        "rounds": [int(r) for r in rounds],
        "bits_per_worker": [float(b) for b in bits],
        "downlink_bits_per_worker": [float(r.downlink_bits) for r in runs],
        "final_grad_norm_sq": [float(r.grad_norm_sq[-1]) for r in runs],
        "reached": int(ok.sum()),
        "all_reached": bool(ok.all()),
    }
    if loss_ref is not None:
        doc["f_ref"] = float(loss_ref)
        doc["final_loss_gap"] = [float(r.progress[-1]) for r in runs]
    if ok.any():
        doc["mean_bits_per_worker"] = float(bits[ok].mean())
        doc["std_bits_per_worker"] = float(bits[ok].std(ddof=1)) if ok.sum() > 1 else 0.0
        doc["mean_rounds"] = float(rounds[ok].mean())
    return doc
