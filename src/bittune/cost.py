"""What a trial minimises: uplink bits per worker, or simulated seconds under a network model.

Seconds per round = compute time of a local gradient + latency
+ uplink bits / uplink bandwidth + downlink bits / downlink bandwidth
(a synchronous round waits for the message; the per-worker mean message size
is used, exact for fixed-size compressors). Summed over the rounds a
trajectory ran. A minibatch method (VR-MARINA) pays compute per sampled
gradient: its compute time is ``gradient_passes`` full local gradients.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["NetworkModel", "measure_compute_seconds", "cost_function"]


@dataclass(frozen=True)
class NetworkModel:
    latency: float  # seconds per round trip
    uplink_bandwidth: float  # bits per second, worker to server
    downlink_bandwidth: float  # bits per second, server to worker
    compute_seconds: float  # one worker's local gradient

    def seconds(self, run) -> float:
        """Simulated wall-clock seconds of a finished trajectory (what the search minimises)."""
        return float(self.seconds_at(run.rounds, run.gradient_passes, run.uplink_bits, run.downlink_bits))

    def seconds_at(self, rounds, passes, uplink_bits, downlink_bits):
        """The one cost formula: seconds after ``rounds`` rounds that computed ``passes`` full
        local gradients and sent ``uplink_bits`` / received ``downlink_bits`` per worker.
        Scalars or arrays (elementwise, the same operations in the same order: a curve's last
        point equals :meth:`seconds` of its trajectory exactly)."""
        return (rounds * self.latency + passes * self.compute_seconds
                + uplink_bits / self.uplink_bandwidth + downlink_bits / self.downlink_bandwidth)

    def seconds_curve(self, rounds, passes, uplink_bits, downlink_bits) -> np.ndarray:
        """Seconds at recorded rounds from the cumulative curves (a trajectory's or a summary's)."""
        return np.asarray(self.seconds_at(np.asarray(rounds, dtype=np.float64), np.asarray(passes, np.float64),
                                          np.asarray(uplink_bits, np.float64), np.asarray(downlink_bits, np.float64)))

    def to_dict(self) -> dict:
        return {"latency": self.latency, "uplink_bandwidth": self.uplink_bandwidth,
                "downlink_bandwidth": self.downlink_bandwidth, "compute_seconds": self.compute_seconds}


def measure_compute_seconds(problem, x0: np.ndarray, *, repeat: int = 5) -> float:
    """One worker's local-gradient time on this machine: best of ``repeat`` full oracle calls / n."""
    import time

    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        problem.local_grads(np.asarray(x0)[None, :])
        best = min(best, time.perf_counter() - t0)
    return float(best / problem.n_workers)


def cost_function(network: NetworkModel | None):
    """run -> cost: uplink bits per worker (network None) or simulated seconds."""
    if network is None:
        return lambda run: float(run.uplink_bits)
    return network.seconds
