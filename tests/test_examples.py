"""The own-data examples: each job file validates, loads its generated data and passes the probe."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from bittune.job import load_job
from bittune.probe import probe_workspace
from bittune.workspace import open_job

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = ROOT / "examples" / "own_data"
JOBS = sorted(p.name for p in EXAMPLES.glob("*.yaml"))


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    out = tmp_path_factory.mktemp("own_data")
    subprocess.run([sys.executable, str(EXAMPLES / "make_data.py"), "--out", str(out)], check=True,
                   capture_output=True)
    for name in JOBS:
        shutil.copy(EXAMPLES / name, out / name)
    return out


def test_there_is_an_example_for_each_format_and_target():
    assert JOBS == ["csv_groups.yaml", "loss_gap.yaml", "npz.yaml"]


@pytest.mark.parametrize("name", JOBS)
def test_each_example_job_validates_and_probes(folder, name):
    ws = open_job(load_job(folder / name))
    constants, report = probe_workspace(ws)
    assert report.gradient_check.passed
    assert ws.problem.n_workers == load_job(folder / name).workers.count
    assert np.isfinite(constants.L) and constants.L > 0


def test_the_csv_example_gives_each_group_its_own_worker(folder):
    """Reference: the group column counted directly with numpy (rows per greenhouse)."""
    cells = np.loadtxt(folder / "greenhouses.csv", delimiter=",", skiprows=1, dtype=str, usecols=0)
    _, counts = np.unique(cells, return_counts=True)
    ws = open_job(load_job(folder / "csv_groups.yaml"))
    assert sorted(ws.problem.worker_sizes.tolist()) == sorted(counts.tolist())


@pytest.mark.slow
@pytest.mark.parametrize("name", JOBS)
def test_each_example_job_tunes(folder, name, tmp_path):
    from bittune.tune import tune
    from conftest import Quiet

    result = tune(folder / name, output=tmp_path / "c.yaml", trials=8, progress=Quiet())
    assert result.exit_code == 0 and result.selection.winner.all_reached
