"""SIGKILL `bittune tune` at moments set by its observed progress (the study created, a count of
finished trials in its journal), then rerun: nothing finished is lost, no config is
ever half-written, and the previous config stays intact until a complete new one replaces it."""

from __future__ import annotations

import signal
import subprocess
import sys
from pathlib import Path

import optuna
import pytest
import yaml
from optuna.trial import TrialState

from bittune.config import load_config
from bittune.search import open_storage
from conftest import journal_study, wait_for

ROOT = Path(__file__).resolve().parents[1]
PREVIOUS = "bittune_config: 1\nmethod: gd\ncompressor: {name: identity}\nstep_size: 0.01\n"


def _count(run_dir: Path) -> int | None:
    """Finished (complete or pruned) trials in the run's journal; None before the study exists."""
    study = journal_study(run_dir)
    if study is None:
        return None
    return len(study.get_trials(deepcopy=False, states=(TrialState.COMPLETE, TrialState.PRUNED)))


def _finished(run_dir: Path) -> dict[int, float]:
    study = journal_study(run_dir)
    if study is None:
        return {}
    return {t.number: t.value for t in study.get_trials(deepcopy=False, states=(TrialState.COMPLETE,))}


@pytest.mark.slow
def test_kills_at_observed_progress_never_lose_trials_or_half_write_the_config(tmp_path):
    subprocess.run([sys.executable, str(ROOT / "examples/frost/make_data.py"), "--out", str(tmp_path / "st.svm"),
                    "--nights", "120"], check=True, capture_output=True)
    job = tmp_path / "job.yaml"
    job.write_text("""
data: st.svm
model: logistic_nonconvex
regularization: 0.01
workers: {count: 8, split: dirichlet, seed: 0}
target: {grad_norm_sq: 1e-5, relative: true}
budget: {max_rounds: 5000}
search: {methods: [diana, marina], compressors: [rand_k, dither], trials: 30, seeds: 2}
""")
    out = tmp_path / "config.yaml"
    out.write_text(PREVIOUS)
    cmd = [sys.executable, "-m", "bittune.cli", "tune", str(job), "-o", str(out)]
    run_dir = tmp_path / "config.run"
    # Kill moments follow observed progress, not the clock (a loaded machine stretches every
    # phase): once the study exists (probe done), after 3, 8, 14, 20 and 26 finished trials, and
    # as soon as all 30 have finished (selection, report and config write are then under way).
    # Each rerun resumes, so a threshold already met waits for one more finished trial instead.
    thresholds = [0, 3, 8, 14, 20, 26, 30]
    kills = 0
    seen: dict[int, float] = {}
    for threshold in thresholds:
        start = _count(run_dir)
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        if threshold == 0 and start is None:
            what = "the study in config.run/study.journal was created"
            wait_for(lambda: _count(run_dir) is not None, what=what, every=0.02, alive=proc)
        else:
            goal = 30 if threshold == 30 else max(threshold, (start or 0) + 1)
            if (start or 0) < goal:
                wait_for(lambda: (_count(run_dir) or 0) >= goal, every=0.02, alive=proc,
                         what=f"{goal} finished trials in the journal (had {start})")
        if proc.poll() is None:
            proc.send_signal(signal.SIGKILL)
            kills += 1
        proc.wait()
        text = out.read_text()
        if text != PREVIOUS:  # replaced: then it must be a complete, valid config
            cfg = load_config(out)
            assert "expected" in cfg.extra and "provenance" in cfg.extra
        now = _finished(run_dir)
        for number, value in seen.items():  # no completed trial is ever lost or changed
            assert now.get(number) == value, f"trial {number} was {value}, now {now.get(number)}"
        seen = now
    assert kills >= 4
    final = subprocess.run(cmd, capture_output=True, text=True)
    assert final.returncode == 0, final.stderr
    cfg = load_config(out)
    assert cfg.extra["expected"]["reached_all"] is True
    done = _finished(tmp_path / "config.run")
    for number, value in seen.items():
        assert done.get(number) == value
    storage = open_storage(str(tmp_path / "config.run" / "study.journal"))
    study = optuna.load_study(study_name=optuna.get_all_study_summaries(storage)[0].study_name, storage=storage)
    finished = study.get_trials(deepcopy=False, states=(TrialState.COMPLETE, TrialState.PRUNED))
    assert len(finished) == 30
    assert yaml.safe_load(out.read_text())["bittune_config"] == 1
