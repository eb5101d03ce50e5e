"""What a trial minimises: uplink bits per worker, or simulated seconds under a network model.

Seconds per round = compute time of a local gradient + latency
+ uplink bits / uplink bandwidth + downlink bits / downlink bandwidth
(a synchronous round waits for the message; the per-worker mean message size
is used, exact for fixed-size compressors). Summed over the rounds a
trajectory ran. A minibatch method (VR-MARINA) pays compute per sampled
gradient: its compute time is ``gradient_passes`` full local gradients.

Uneven network (``workers`` given, docs/design.md "Round time with uneven workers"):
a synchronous round lasts max over the workers it waits for of
(latency_i + compute_i * passes_i + uplink_bits_i / uplink_bandwidth_i), plus the
broadcast's bits / downlink bandwidth. The engine sums it round by round
(:meth:`NetworkModel.round_seconds`, its one place) into the trajectory's
``seconds_curve``; :meth:`NetworkModel.seconds` reads it.
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
    #: Uneven network: per worker (latency, uplink_bandwidth, compute_seconds); None: every worker
    #: has the fields above. Mappings with those keys are accepted (a stored ``to_dict``).
    workers: tuple | None = None

    def __post_init__(self) -> None:
        if self.workers is not None:
            rows = tuple((float(w["latency"]), float(w["uplink_bandwidth"]), float(w["compute_seconds"]))
                         if isinstance(w, dict) else tuple(float(v) for v in w) for w in self.workers)
            object.__setattr__(self, "workers", rows)

    @property
    def uneven(self) -> bool:
        return self.workers is not None

    def worker_arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Per-worker latency, uplink bandwidth and compute seconds, (n,) each."""
        a = np.asarray(self.workers, dtype=np.float64)
        return a[:, 0], a[:, 1], a[:, 2]

    def round_seconds(self, uplink_bits, passes, waited, downlink_bits) -> tuple[np.ndarray, np.ndarray]:
        """One synchronous round of an uneven network, for B trajectories at once.

        ``uplink_bits`` and ``passes`` (full local gradients) are (B, n); ``waited`` (B, n) marks
        the workers the server waits for (None: all); ``downlink_bits`` (B,) is the broadcast.
        Returns the round's seconds (B,) and the index of the slowest waited worker (B,)."""
        lat, bw, comp = self.worker_arrays()
        t = lat + comp * passes + np.asarray(uplink_bits, np.float64) / bw
        if waited is not None:
            t = np.where(waited, t, -np.inf)
        who = np.argmax(t, axis=1)
        slowest = np.take_along_axis(t, who[:, None], axis=1)[:, 0]
        return slowest + np.asarray(downlink_bits, np.float64) / self.downlink_bandwidth, who

    def seconds(self, run) -> float:
        """Simulated wall-clock seconds of a finished trajectory (what the search minimises)."""
        if self.uneven:
            if getattr(run, "seconds_curve", None) is None:
                raise ValueError("an uneven network needs the engine's seconds curve (simulate(network=...))")
            return float(run.seconds_curve[-1])
        return float(self.seconds_at(run.rounds, run.gradient_passes, run.uplink_bits, run.downlink_bits))

    def seconds_at(self, rounds, passes, uplink_bits, downlink_bits):
        """The one cost formula: seconds after ``rounds`` rounds that computed ``passes`` full
        local gradients and sent ``uplink_bits`` / received ``downlink_bits`` per worker.
        Scalars or arrays (elementwise, the same operations in the same order: a curve's last
        point equals :meth:`seconds` of its trajectory exactly).

        Uneven network: the slowest worker's total, max_i (rounds latency_i + passes compute_i
        + uplink_bits / bandwidth_i), plus the downlink term. With ``uplink_bits`` a bound on
        every worker's bits it bounds the engine's round-by-round sum from above (the miss
        floor, the first pruning checkpoint); it is not the engine's seconds."""
        if self.uneven:
            lat, bw, comp = self.worker_arrays()
            r, p, u = (np.asarray(v, np.float64)[..., None] for v in (rounds, passes, uplink_bits))
            worst = (r * lat + p * comp + u / bw).max(axis=-1)
            return worst + downlink_bits / self.downlink_bandwidth
        return (rounds * self.latency + passes * self.compute_seconds
                + uplink_bits / self.uplink_bandwidth + downlink_bits / self.downlink_bandwidth)

    def seconds_curve(self, rounds, passes, uplink_bits, downlink_bits) -> np.ndarray:
        """Seconds at recorded rounds from the cumulative curves (a trajectory's or a summary's)."""
        return np.asarray(self.seconds_at(np.asarray(rounds, dtype=np.float64), np.asarray(passes, np.float64),
                                          np.asarray(uplink_bits, np.float64), np.asarray(downlink_bits, np.float64)))

    def to_dict(self) -> dict:
        out = {"latency": self.latency, "uplink_bandwidth": self.uplink_bandwidth,
               "downlink_bandwidth": self.downlink_bandwidth, "compute_seconds": self.compute_seconds}
        if self.uneven:
            out["workers"] = [{"latency": a, "uplink_bandwidth": b, "compute_seconds": c} for a, b, c in self.workers]
        return out


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
