"""Generate the own-data examples: small invented files in the two formats bittune reads besides svmlight.

* ``greenhouses.csv``: six greenhouses of a plant nursery log, every hour, five
  climate readings and whether a misting valve needed service within the day
  (label 0/1). The ``greenhouse`` column says which greenhouse (= which
  worker) a row belongs to; each greenhouse keeps its own rows.
* ``hives.npz``: eight apiaries weigh their hives every evening and record six
  sound and climate features; the target is the day's weight change in grams
  (a regression: arrays ``X``, ``y`` and ``groups``, one apiary per group).

Everything is drawn by a seeded ``numpy.random.Generator`` from hidden linear
rules (invented; no real measurements).

    python make_data.py [--out FOLDER] [--seed 11]
"""

from __future__ import annotations

import argparse
import os
import tempfile
from pathlib import Path

import numpy as np

GREENHOUSES, APIARIES = 6, 8


def greenhouses(rng: np.random.Generator) -> str:
    """CSV text: header, then one row per hour and greenhouse."""
    lines = ["greenhouse,temperature_c,humidity,light_klux,co2_ppm_k,water_l,needs_service"]
    w = np.array([0.25, 3.0, -0.15, 1.2, -0.08])
    for g in range(GREENHOUSES):
        hours = int(rng.integers(60, 140))
        shift = rng.normal(0.0, 1.0, 5) * [2.0, 0.05, 3.0, 0.1, 2.0]  # each greenhouse its own climate
        X = rng.normal([22.0, 0.7, 18.0, 0.6, 12.0], [3.0, 0.1, 6.0, 0.15, 4.0], (hours, 5)) + shift
        logit = (X - [22.0, 0.7, 18.0, 0.6, 12.0]) @ w + rng.normal(0.0, 0.5, hours)
        y = (logit > 0).astype(int)
        lines += [f"g{g + 1}," + ",".join(f"{v:.4g}" for v in row) + f",{label}" for row, label in zip(X, y)]
    return "\n".join(lines) + "\n"


def hives(rng: np.random.Generator) -> dict:
    """Arrays X (rows, 6), y (grams per day) and groups (apiary ids)."""
    X, y, groups = [], [], []
    w = np.array([40.0, -25.0, 12.0, 8.0, -30.0, 5.0])
    for a in range(APIARIES):
        days = int(rng.integers(40, 90))
        Xa = rng.normal(0.0, 1.0, (days, 6)) * [1.0, 0.5, 2.0, 1.0, 0.3, 3.0] + rng.normal(0.0, 0.5, 6)
        X.append(Xa)
        y.append(Xa @ w / 100.0 + rng.normal(0.0, 0.2, days))  # hundreds of grams per day
        groups.append(np.full(days, a))
    return {"X": np.vstack(X), "y": np.concatenate(y), "groups": np.concatenate(groups)}


def _atomic(path: Path, write) -> None:
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=path.suffix, dir=path.parent)
    os.close(fd)
    try:
        write(tmp)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=str(Path(__file__).parent), help="folder to write into (default: here)")
    ap.add_argument("--seed", type=int, default=11)
    args = ap.parse_args(argv)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(args.seed)
    text = greenhouses(rng)
    _atomic(out / "greenhouses.csv", lambda tmp: Path(tmp).write_text(text))
    arrays = hives(rng)
    _atomic(out / "hives.npz", lambda tmp: np.savez(open(tmp, "wb"), **arrays))
    print(f"wrote {out / 'greenhouses.csv'} and {out / 'hives.npz'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
