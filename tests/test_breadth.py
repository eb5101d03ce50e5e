"""The wider catalogue end to end: softmax on digits, a user model, PP-MARINA and PermK in the search."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from bittune.cli import main
from bittune.tune import tune
from conftest import Quiet

ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.slow
def test_softmax_on_digits_split_by_label_beats_theory(tmp_path):
    """scikit-learn's bundled digits data (open dataset, 10 classes), 10 workers split by label."""
    from sklearn.datasets import load_digits

    X, y = load_digits(return_X_y=True)
    np.savez(tmp_path / "digits.npz", X=X / 16.0, y=y.astype(float))
    job = tmp_path / "job.yaml"
    job.write_text("""
data: digits.npz
model: softmax
regularization: 0.001
workers: {count: 10, split: by_label, seed: 0}
target: {grad_norm_sq: 1e-3, relative: true}
budget: {max_rounds: 3000}
search: {methods: [marina, diana], compressors: [rand_k, dither], trials: 24, seeds: 2, validation_seeds: 4}
""")
    result = tune(job, output=tmp_path / "c.yaml", progress=Quiet())
    sel = result.selection
    assert result.exit_code == 0 and sel.winner.all_reached
    assert sel.winner.mean_bits < sel.baseline.mean_bits  # beats theory on the same fresh seeds
    assert result.config["problem"]["dimension"] == 64 * 10  # W is d x C


@pytest.mark.slow
def test_user_model_goes_through_probe_theory_and_tune(tmp_path, capsys):
    import subprocess
    import sys

    subprocess.run([sys.executable, str(ROOT / "examples/frost/make_data.py"), "--out", str(tmp_path / "st.svm"),
                    "--nights", "60"], check=True, capture_output=True)
    plugin = ROOT / "examples/custom_loss/huber_logistic.py"
    job = tmp_path / "job.yaml"
    job.write_text(f"""
data: st.svm
model: plugin
plugin: {plugin}:make_worker
workers: {{count: 6, split: iid, seed: 0}}
target: {{grad_norm_sq: 1e-4, relative: true}}
budget: {{max_rounds: 3000}}
search: {{methods: [marina, pp_marina], compressors: [rand_k, perm_k], trials: 12, seeds: 2}}
""")
    assert main(["probe", str(job), "--json"]) == 2  # code named in a job needs --allow-code
    assert "--allow-code" in capsys.readouterr().err
    assert main(["probe", str(job), "--json", "--allow-code"]) == 0
    assert json.loads(capsys.readouterr().out)["gradient_check"]["passed"] is True
    assert main(["theory", str(job), "--json", "--allow-code", "--method", "marina",
                 "--compressor", "perm_k"]) == 0
    rows = json.loads(capsys.readouterr().out)["rows"]
    assert rows and rows[0]["compressor"] == "perm_k" and rows[0]["sync_probability"] == pytest.approx(1 / 6)
    code = main(["tune", str(job), "-o", str(tmp_path / "c.yaml"), "--allow-code", "--json"])
    doc = json.loads(capsys.readouterr().out)
    assert code == 0 and doc["method"] in ("marina", "pp_marina")
    assert main(["replay", str(tmp_path / "c.yaml"), "--job", str(job), "--allow-code", "--json", "--seeds", "2"]) == 0
