"""The command line: replay on the demo scenario, JSON output, exit codes."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from bittune.cli import main

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The demo scenario's generator, at a small size, plus its job file."""
    folder = tmp_path_factory.mktemp("frost")
    subprocess.run([sys.executable, str(ROOT / "examples/frost/make_data.py"), "--out", str(folder / "stations.svm"),
                    "--nights", "80"], check=True, capture_output=True)
    job = (ROOT / "examples/frost/job.yaml").read_text()
    (folder / "job.yaml").write_text(job)
    cfg = (ROOT / "configs/frost-marina.yaml").read_text()
    (folder / "config.yaml").write_text(cfg)
    return folder


def test_replay_json_is_one_document_with_the_documented_keys(demo, capsys):
    code = main(["replay", str(demo / "config.yaml"), "--job", str(demo / "job.yaml"), "--seeds", "3", "--json"])
    out = capsys.readouterr().out
    doc = json.loads(out)  # exactly one JSON document: json.loads rejects trailing text
    assert code == 0
    for key in ("status", "rounds", "bits_per_worker"):
        assert len(doc[key]) == 3
    assert doc["status"] == ["reached"] * 3
    # Bits: one dense start message (32 d) plus, per round, either a dense sync
    # (32 d) or Rand-K with k = 4 (32 k): bounded on both sides by the rounds.
    d = doc["problem"]["dimension"]
    for r, b in zip(doc["rounds"], doc["bits_per_worker"]):
        assert 32 * d + 32 * 4 * (r - 1) <= b <= 32 * d * r


def test_replay_human_output_and_seed_offset(demo, capsys):
    code = main(["replay", str(demo / "config.yaml"), "--job", str(demo / "job.yaml"), "--seeds", "2", "--seed", "5"])
    out = capsys.readouterr().out
    assert code == 0
    assert "marina + rand_k" in out and "\n     5 reached" in out and "\n     6 reached" in out


def test_replay_is_reproducible(demo, capsys):
    args = ["replay", str(demo / "config.yaml"), "--job", str(demo / "job.yaml"), "--seeds", "2", "--json"]
    main(args)
    first = json.loads(capsys.readouterr().out)
    main(args)
    assert json.loads(capsys.readouterr().out)["bits_per_worker"] == first["bits_per_worker"]


def test_bad_config_exits_2_naming_the_key(demo, tmp_path, capsys):
    bad = tmp_path / "bad.yaml"
    bad.write_text((demo / "config.yaml").read_text().replace("step_size: 1.0", "step_size: -1"))
    code = main(["replay", str(bad), "--job", str(demo / "job.yaml"), "--json"])
    captured = capsys.readouterr()
    assert code == 2
    assert captured.out == ""  # nothing on stdout on error
    assert "step_size" in captured.err


def test_config_for_another_dimension_exits_2(demo, tmp_path, capsys):
    bad = tmp_path / "dim.yaml"
    bad.write_text((demo / "config.yaml").read_text().replace("dimension: 38", "dimension: 50"))
    assert main(["replay", str(bad), "--job", str(demo / "job.yaml")]) == 2
    assert "dimension" in capsys.readouterr().err


def test_missing_job_file_exits_2(demo, tmp_path, capsys):
    assert main(["replay", str(demo / "config.yaml"), "--job", str(tmp_path / "nope.yaml")]) == 2
    assert "nope.yaml" in capsys.readouterr().err


def test_console_script_runs(demo):
    exe = Path(sys.executable).with_name("bittune")
    proc = subprocess.run([str(exe), "replay", str(demo / "config.yaml"), "--job", str(demo / "job.yaml"),
                           "--seeds", "1", "--json"], capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    assert json.loads(proc.stdout)["status"] == ["reached"]


def test_random_start_from_the_job(demo, tmp_path, capsys):
    job = tmp_path / "job.yaml"
    text = (demo / "job.yaml").read_text().replace("data: stations.svm", f"data: {demo / 'stations.svm'}")
    job.write_text(text + "start:\n  seed: 4\n  scale: 0.1\n")
    from bittune.job import load_job
    from bittune.workspace import open_job

    ws = open_job(load_job(job))
    # Reference: numpy's seeded Generator draws the same start.
    np.testing.assert_array_equal(ws.x0, np.random.default_rng(4).normal(0.0, 0.1, ws.problem.dim))
