"""Generate the demo scenario: frost alerts in a cooperative of hill orchards.

Twelve weather stations, one per orchard, each learn from their own evening
readings whether the coming night will freeze (label 1) or not (label 0). The
stations share one model but reach the cooperative's server over a metered
cellular uplink, so every bit they send costs money. The data are invented:
a seeded generator draws station climates, nightly weather and the frost
outcome from a hidden logistic rule.

Features (38), in the units the stations report them (so their scales spread
over two orders of magnitude, as raw sensor data do): five strongly
correlated evening temperatures (16:00-20:00, degrees C), dew point (degrees
C), relative humidity (fraction), wind speed (m/s), cloud cover (fraction),
soil temperature (degrees C), pressure change (hPa), snow cover flag,
elevation (km) and slope aspect of the station, 12 month indicators and 12
weather-type indicators (one-hot, so the file is sparse).

    python make_data.py --out stations.svm [--nights 600] [--seed 7] [--drift 0.0] [--scale 1.0]
"""

from __future__ import annotations

import argparse
import os
import tempfile
from pathlib import Path

import numpy as np

N_STATIONS = 12


def generate(*, nights: int, seed: int, drift: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """Rows (stations x nights, 38) and 0/1 frost labels, station by station."""
    rng = np.random.default_rng(seed)
    elevation = rng.uniform(0.2, 1.6, N_STATIONS)  # km
    aspect = rng.uniform(-1.0, 1.0, N_STATIONS)  # -1 north .. 1 south facing
    base_temp = 9.0 - 5.5 * elevation + 2.0 * aspect + rng.normal(0, 1.0, N_STATIONS)
    rows, labels = [], []
    w_hidden = None
    for s in range(N_STATIONS):
        month = rng.integers(0, 12, nights)
        season = np.cos(2 * np.pi * (month - 0.5) / 12.0)  # +1 in winter
        t16 = base_temp[s] - 7.0 * season + rng.normal(0, 3.0, nights) + drift
        temps = [t16]
        for _ in range(4):  # each hour cools a little: strongly correlated features
            temps.append(temps[-1] - rng.uniform(0.4, 1.4, nights))
        temps = np.array(temps).T
        humidity = np.clip(rng.beta(5, 3, nights) + 0.05 * season, 0, 1)
        dew = temps[:, -1] - (1.0 - humidity) * 12.0
        wind = rng.gamma(2.0, 1.5, nights)
        cloud = rng.beta(1.2, 1.5, nights)
        soil = temps[:, 0] * 0.6 + rng.normal(0, 1.5, nights)
        dpress = rng.normal(0, 4.0, nights)
        snow = (rng.random(nights) < np.clip(0.25 * season - 0.05 + 0.2 * elevation[s], 0, 1)).astype(float)
        wtype = rng.integers(0, 12, nights)
        dense = np.column_stack([
            temps, dew, humidity, wind, cloud, soil,
            dpress, snow, np.full(nights, elevation[s]), np.full(nights, aspect[s]),
        ])
        onehot = np.zeros((nights, 24))
        onehot[np.arange(nights), month] = 1.0
        onehot[np.arange(nights), 12 + wtype] = 1.0
        x = np.hstack([dense, onehot])
        unit = np.concatenate([[10.0] * 5, [10.0, 1.0, 5.0, 1.0, 10.0, 10.0, 1.0, 1.0, 1.0], np.ones(24)])
        if w_hidden is None:
            w_hidden = np.concatenate([
                [-0.6, -0.8, -1.0, -1.4, -2.2], [-1.2], [0.8], [-0.9], [-1.6], [-0.7],
                [0.3], [0.9], [0.5], [-0.4], rng.normal(0, 0.4, 24),
            ])
        # The hidden rule sees the readings on a common scale (x / unit).
        logit = (x / unit) @ w_hidden + 1.2 + rng.normal(0, 0.3, nights)
        y = (rng.random(nights) < 1.0 / (1.0 + np.exp(-logit))).astype(int)
        rows.append(x)
        labels.append(y)
    return np.vstack(rows), np.concatenate(labels)


def write_svmlight(path: Path, X: np.ndarray, y: np.ndarray) -> None:
    """svmlight text, 1-based indices, zeros omitted; written atomically."""
    lines = ["# frost alerts: 12 orchard stations, label 1 = frost tonight (generated)"]
    for xi, yi in zip(X, y):
        nz = np.flatnonzero(xi)
        lines.append(f"{yi} " + " ".join(f"{j + 1}:{xi[j]:.6g}" for j in nz))
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=".tmp-")
    try:
        with os.fdopen(fd, "w") as fh:
            fh.write("\n".join(lines) + "\n")
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        os.unlink(tmp)
        raise


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=Path(__file__).with_name("stations.svm"))
    ap.add_argument("--nights", type=int, default=600)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--drift", type=float, default=0.0, help="warm every evening by this many degrees")
    ap.add_argument("--scale", type=float, default=1.0,
                    help="multiply every reading by this factor (a firmware update that changes units)")
    args = ap.parse_args()
    X, y = generate(nights=args.nights, seed=args.seed, drift=args.drift)
    X = X * args.scale
    write_svmlight(args.out, X, y)
    print(f"wrote {args.out} ({X.shape[0]} nights x {X.shape[1]} features, {y.mean():.0%} frost)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
