"""Replay: simulate a config on a job and summarise bits and rounds to target."""

from __future__ import annotations

import numpy as np

from .compressors import make_compressor
from .config import Config, check_config_fits
from .simulate import Trajectory, simulate
from .workspace import Workspace

__all__ = ["replay", "summarize"]


def replay(ws: Workspace, cfg: Config, *, seeds, source: str = "config") -> list[Trajectory]:
    """Simulate ``cfg`` (read from ``source``) on the workspace's problem, one trajectory per seed."""
    p = ws.problem
    check_config_fits(cfg, dimension=p.dim, workers=p.n_workers, source=source)
    comp = make_compressor(cfg.compressor, p.dim, key="compressor", n_workers=p.n_workers)
    params = {}
    if cfg.method in ("marina", "pp_marina") and cfg.sync_probability is not None:
        params["sync_probability"] = cfg.sync_probability
    if cfg.method == "pp_marina" and cfg.clients is not None:
        params["clients"] = cfg.clients
    if cfg.method == "diana" and cfg.shift_rate is not None:
        params["shift_rate"] = cfg.shift_rate
    return simulate(p, method=cfg.method, compressor=comp, step_size=cfg.step_size, seeds=seeds,
                    target=ws.target, max_rounds=ws.job.budget.max_rounds, x0=ws.x0, params=params,
                    max_bits_per_worker=ws.job.budget.max_bits_per_worker)


def summarize(runs: list[Trajectory]) -> dict:
    """The replay document: per-seed lists plus mean and spread over the seeds that reached."""
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
    if ok.any():
        doc["mean_bits_per_worker"] = float(bits[ok].mean())
        doc["std_bits_per_worker"] = float(bits[ok].std(ddof=1)) if ok.sum() > 1 else 0.0
        doc["mean_rounds"] = float(rounds[ok].mean())
    return doc
