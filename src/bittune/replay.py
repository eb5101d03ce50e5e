"""Replay: simulate a config on a job and summarise bits and rounds to target.

A loss-gap job needs f_ref. :func:`stored_reference` takes it from the
config's ``constants.f_ref`` when the config was tuned on this very job file
and data file (the sha256 sums in its ``provenance``); otherwise ``open_job``
computes it again on the job's data.
"""

from __future__ import annotations

import math

import numpy as np

from .compressors import make_compressor
from .config import Config, check_config_fits
from .job import Job, data_digest
from .simulate import Trajectory, simulate
from .search import SYNCED
from .workspace import Workspace

__all__ = ["replay", "summarize", "stored_reference"]


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
    return simulate(p, method=cfg.method, compressor=comp, step_size=cfg.step_size, seeds=seeds,
                    target=ws.target, max_rounds=ws.job.budget.max_rounds, x0=ws.x0, params=params,
                    max_bits_per_worker=ws.job.budget.max_bits_per_worker, loss_ref=ws.loss_ref,
                    precision=cfg.precision or "float64")  # as tuned, whatever the job says now


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
