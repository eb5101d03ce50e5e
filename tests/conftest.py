"""Shared fixtures: small problems built from open or generated data."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

from bittune.problems import problem_from_arrays


class Quiet:
    """A progress object for tune/retune that prints nothing (their ``progress`` argument)."""

    total = 0

    def note(self, text):
        pass

    def trials(self, *args):
        pass


def breast_cancer_problem(n_workers: int = 5, *, model: str = "logistic_nonconvex", reg: float = 0.1):
    """scikit-learn's bundled breast-cancer data (open dataset), standardised, split in order."""
    from sklearn.datasets import load_breast_cancer

    X, y = load_breast_cancer(return_X_y=True)
    X = (X - X.mean(axis=0)) / X.std(axis=0)
    y = np.where(y == 1, 1.0, -1.0)
    parts = np.array_split(np.arange(len(y)), n_workers)
    return problem_from_arrays(model, [X[p] for p in parts], [y[p] for p in parts], regularization=reg)


def random_problem(*, model: str, sparse: bool, seed: int, sizes=(5, 9, 6, 8), dim: int = 7, reg: float = 0.1):
    """Unequal worker sizes (padding is exercised), Gaussian or sparse rows."""
    import scipy.sparse as sp

    rng = np.random.default_rng(seed)
    rows, targets = [], []
    for s in sizes:
        r = rng.standard_normal((s, dim))
        if sparse:
            r = sp.csr_matrix(r * (rng.random(r.shape) < 0.4))
        rows.append(r)
        if model == "logistic_nonconvex":
            targets.append(np.where(rng.random(s) < 0.5, -1.0, 1.0))
        else:
            targets.append(rng.standard_normal(s))
    return problem_from_arrays(model, rows, targets, regularization=reg), rows, targets


@pytest.fixture(scope="session")
def cancer():
    return breast_cancer_problem()


def wait_for(condition, *, what: str, timeout: float = 300.0, every: float = 0.1, alive=None):
    """Poll ``condition()`` until it returns something truthy and return that; fail naming
    ``what`` after ``timeout`` seconds (generous: the machine may be loaded) or as soon as the
    process ``alive`` (a Popen) has exited without the condition holding. Exceptions from
    ``condition`` (a storage read while another process writes) count as "not yet"."""
    import time

    deadline = time.monotonic() + timeout
    while True:
        try:
            value = condition()
        except Exception:  # noqa: BLE001 - a half-written journal or a study not yet created
            value = None
        if value:
            return value
        if alive is not None and alive.poll() is not None:
            pytest.fail(f"{what}: did not happen before the process exited (code {alive.returncode})")
        if time.monotonic() > deadline:
            pytest.fail(f"{what}: did not happen within {timeout:.0f} s")
        time.sleep(every)


def journal_study(run_dir):
    """The study in a run folder's journal, read through optuna; None before the study exists."""
    from pathlib import Path

    import optuna

    from bittune.search import open_storage

    journal = Path(run_dir) / "study.journal"
    if not journal.exists():
        return None
    storage = open_storage(str(journal))
    summaries = optuna.get_all_study_summaries(storage)
    if not summaries:
        return None
    return optuna.load_study(study_name=summaries[0].study_name, storage=storage)


def tune_cli_in(folder, job_text: str):
    """Write ``job_text`` to folder/job.yaml and run ``bittune tune`` on it in a subprocess (output
    folder/out/config.yaml, 2 trials). Returns the process and whether the folder's files are as
    before (nothing written)."""
    (folder / "job.yaml").write_text(job_text)
    (folder / "out").mkdir(exist_ok=True)  # outputs need an existing folder (README, "What bittune checks")
    before = sorted(str(p.relative_to(folder)) for p in folder.rglob("*"))
    proc = subprocess.run([sys.executable, "-m", "bittune.cli", "tune", str(folder / "job.yaml"),
                           "-o", str(folder / "out" / "config.yaml"), "--trials", "2"],
                          capture_output=True, text=True, timeout=300)
    return proc, sorted(str(p.relative_to(folder)) for p in folder.rglob("*")) == before
