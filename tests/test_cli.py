"""The command line: replay on the demo scenario, JSON output, exit codes."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from bittune.cli import main
from conftest import tune_cli_in

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
    import re

    text = re.sub(r"(?m)^step_size: .*$", "step_size: -1", (demo / "config.yaml").read_text())
    assert "step_size: -1" in text
    bad.write_text(text)
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


def test_swapped_config_and_job_exit_2_and_say_so(demo, capsys):
    code = main(["replay", str(demo / "job.yaml"), "--job", str(demo / "config.yaml")])
    err = capsys.readouterr().err
    assert code == 2
    assert "job.yaml: looks like a job file; did you swap" in err


def test_a_config_given_as_the_job_exits_2(demo, capsys):
    code = main(["replay", str(demo / "config.yaml"), "--job", str(demo / "config.yaml")])
    assert code == 2
    assert "looks like a config file; did you swap" in capsys.readouterr().err


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


def test_probe_json_has_the_documented_keys_and_matches_the_bounds(demo, capsys, tmp_path):
    out_file = tmp_path / "constants.yaml"
    code = main(["probe", str(demo / "job.yaml"), "--json", "-o", str(out_file)])
    doc = json.loads(capsys.readouterr().out)
    assert code == 0
    s = doc["smoothness"]
    for key in ("L", "L_workers", "L_am", "L_qm", "L_max", "L_plus", "L_pm"):
        assert key in s
    assert doc["gradient_check"]["passed"] is True
    assert doc["gradient_check"]["max_rel_error"] < 1e-5
    # docs/theory.md §3.2: for logistic + non-convex regulariser the closed form is an
    # upper bound, attained at x = 0 (the demo's start): estimates within 1%.
    b = doc["closed_form_bounds"]
    assert s["L"] <= b["L"] * 1.01 and s["L"] >= b["L"] * 0.99
    np.testing.assert_allclose(s["L_workers"], b["L_workers"], rtol=1e-2)
    # Chain L_- <= L_+ <= L_qm (docs/theory.md §3.1), with 1e-6 slack for estimation rounding.
    assert s["L"] <= s["L_plus"] * (1 + 1e-6) and s["L_plus"] <= s["L_qm"] * (1 + 1e-6)
    import yaml

    saved = yaml.safe_load(out_file.read_text())
    assert saved["bittune_constants"] == 1 and saved["smoothness"]["L"] == s["L"]


def test_probe_human_output_shows_estimate_beside_bound(demo, capsys):
    assert main(["probe", str(demo / "job.yaml")]) == 0
    out = capsys.readouterr().out
    assert "gradient check" in out and "passed" in out and "bound" in out and "oracle calls" in out


def test_probe_exits_3_on_a_wrong_gradient(demo, capsys, monkeypatch):
    from bittune.problems.logistic import LogisticNonconvex

    original = LogisticNonconvex._reg_grad
    # A deliberately wrong gradient: the regulariser's part doubled.
    monkeypatch.setattr(LogisticNonconvex, "_reg_grad", lambda self, Xw: 2.0 * original(self, Xw))
    code = main(["probe", str(demo / "job.yaml"), "--json"])
    captured = capsys.readouterr()
    assert code == 3
    assert captured.out == ""
    assert "worker" in captured.err


def test_theory_json_rows(demo, capsys):
    code = main(["theory", str(demo / "job.yaml"), "--json", "--method", "marina", "--method", "ef21",
                 "--compressor", "rand_k:4", "--compressor", "top_k:4"])
    doc = json.loads(capsys.readouterr().out)
    assert code == 0
    pairs = {(r["method"], r["compressor"]) for r in doc["rows"]}
    # top_k is biased: MARINA needs an unbiased compressor, EF21 takes both.
    assert pairs == {("marina", "rand_k:4"), ("ef21", "rand_k:4"), ("ef21", "top_k:4")}
    for r in doc["rows"]:
        for key in ("step_size", "sync_probability", "predicted_rounds", "predicted_bits_per_worker"):
            assert key in r
        if r["method"] == "marina":
            # MARINA's p = zeta/d (Gorbunov et al. 2021, Corollary 2.1, from memory): 4/38.
            assert abs(r["sync_probability"] - 4 / 38) < 1e-12


def test_theory_rejects_a_bad_compressor_spec(demo, capsys):
    assert main(["theory", str(demo / "job.yaml"), "--compressor", "rand_k:0"]) == 2
    assert "--compressor" in capsys.readouterr().err


def test_tune_on_degenerate_data_exits_2_and_writes_nothing(tmp_path):
    """One class only (every label 1): `bittune tune` names the cause, exits 2 and leaves
    neither the config nor its run folder behind (README, "What bittune checks")."""
    rng = np.random.default_rng(7)
    rows = "\n".join(f"1 1:{a:.3f} 2:{b:.3f}" for a, b in rng.normal(size=(8, 2)))
    (tmp_path / "one.svm").write_text(rows + "\n")
    proc, unchanged = tune_cli_in(tmp_path, "data: one.svm\nmodel: logistic_nonconvex\nworkers: {count: 2, split: iid}\n"
                                            "target: {grad_norm_sq: 1e-3}\nbudget: {max_rounds: 100}\n")
    assert proc.returncode == 2, proc.stderr
    assert "one.svm: every label is 1 (8 rows): a classifier needs both classes" in proc.stderr
    assert proc.stdout == ""
    assert unchanged  # no config, no run folder
