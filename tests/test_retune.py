"""Nightly retuning: keep on no drift, replace when the old step breaks, fall back on a new problem."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import optuna
import pytest
import yaml

from bittune.cli import main
from bittune.retune import decide, retune
from bittune.search import open_storage
from bittune.tune import tune
from conftest import Quiet

ROOT = Path(__file__).resolve().parents[1]
MAKE = ROOT / "examples/frost/make_data.py"


def _data(folder: Path, name: str, *args: str) -> Path:
    path = folder / name
    subprocess.run([sys.executable, str(MAKE), "--out", str(path), "--nights", "50", *args], check=True,
                   capture_output=True)
    return path


def _job(folder: Path, data: Path, trials: int = 24) -> Path:
    job = folder / f"job-{data.stem}.yaml"
    job.write_text(f"""
data: {data}
model: logistic_nonconvex
regularization: 0.01
workers: {{count: 6, split: iid, seed: 0}}
target: {{grad_norm_sq: 1e-4, relative: true}}
budget: {{max_rounds: 4000}}
search: {{methods: [marina, diana], compressors: [rand_k, dither], trials: {trials}, seeds: 2,
          validation_seeds: 5}}
""")
    return job


@pytest.fixture(scope="module")
def night0(tmp_path_factory):
    folder = tmp_path_factory.mktemp("nights")
    data = _data(folder, "night0.svm")
    job = _job(folder, data)
    tune(job, output=folder / "prod.yaml", progress=Quiet())
    return folder, job


@pytest.mark.slow
def test_no_drift_keeps_the_previous_config_with_fewer_trials(night0, tmp_path):
    folder, job = night0
    result = retune(job, previous=folder / "prod.yaml", output=tmp_path / "night1.yaml", history=tmp_path / "h",
                    progress=Quiet())
    assert result.exit_code == 5 and result.decision == "kept"
    section = result.config["retune"]
    ran = section["trials"]["complete"] + section["trials"]["pruned"]
    assert ran < 24  # a fresh tune of this job runs 24 trials
    # Every constant is unchanged on the same data (ratios 1 up to probe rounding).
    for row in result.drift:
        assert abs(row["ratio"] - 1.0) < 1e-6
    # Written file: the previous config plus tonight's evidence.
    written = yaml.safe_load((tmp_path / "night1.yaml").read_text())
    prev = yaml.safe_load((folder / "prod.yaml").read_text())
    assert written["step_size"] == prev["step_size"] and written["retune"]["decision"] == "kept"


@pytest.mark.slow
def test_warm_start_trials_come_first_inside_tonights_ranges(night0, tmp_path):
    folder, job = night0
    retune(job, previous=folder / "prod.yaml", output=tmp_path / "n.yaml", progress=Quiet())
    trials = sorted(_trials_of(tmp_path / "n.run"), key=lambda t: t.number)
    warm = [t for t in trials if t.user_attrs.get("warm_start")]
    assert warm and [t.number for t in warm] == list(range(len(warm)))
    for t in trials:
        for name, dist in t.distributions.items():
            value = t.params[name]
            if hasattr(dist, "choices"):
                assert value in dist.choices
            else:
                assert dist.low <= value <= dist.high  # inside tonight's (narrowed) ranges


def _trials_of(run_dir: Path):
    storage = open_storage(str(run_dir / "study.journal"))
    (summary,) = optuna.get_all_study_summaries(storage)
    return optuna.load_study(study_name=summary.study_name, storage=storage).get_trials(deepcopy=False)


@pytest.mark.slow
def test_rescaled_features_break_the_old_step_and_are_replaced(night0, tmp_path, capsys):
    folder, _ = night0
    # Features x sqrt(10): L grows 10x (L is quadratic in the data scale, docs/theory.md §3.2).
    job = _job(tmp_path, _data(tmp_path, "night1.svm", "--scale", "3.16227766"))
    code = main(["retune", str(job), "--previous", str(folder / "prod.yaml"), "-o", str(tmp_path / "n.yaml"),
                 "--json"])
    doc = json.loads(capsys.readouterr().out)
    assert code == 0 and doc["decision"] == "replaced"
    rows = {r["quantity"]: r for r in doc["drift"]}
    assert abs(rows["L"]["ratio"] - 10.0) < 0.5
    prev = yaml.safe_load((folder / "prod.yaml").read_text())
    new = yaml.safe_load((tmp_path / "n.yaml").read_text())
    assert new["step_size"] < prev["step_size"]
    assert doc["previous"]["reached"] < doc["previous"]["seeds"]


@pytest.mark.slow
def test_changed_dimension_falls_back_to_full_tuning(night0, tmp_path):
    folder, _ = night0
    import numpy as np
    from sklearn.datasets import load_svmlight_file

    X, y = load_svmlight_file(str(folder / "night0.svm"))  # scikit-learn as a reader only
    wider = tmp_path / "wider.npz"
    Xd = X.toarray()
    np.savez(wider, X=np.hstack([Xd, Xd[:, :2] * 0.5]), y=y)
    job = _job(tmp_path, wider, trials=12)
    result = retune(job, previous=folder / "prod.yaml", output=tmp_path / "n.yaml", progress=Quiet())
    assert result.config["retune"]["new_problem"] is True
    assert result.decision == "replaced" and result.exit_code == 0
    assert result.config["problem"]["dimension"] == 40
    t = result.config["retune"]["trials"]
    assert t["complete"] + t["pruned"] == 12  # the job's full budget, not a retune's third


def test_output_equal_to_previous_is_left_alone_when_kept(night0, tmp_path):
    folder, job = night0
    prod = folder / "prod-same.yaml"  # beside the original: its provenance paths (relative to it) still hold
    prod.write_text((folder / "prod.yaml").read_text())
    before = prod.read_bytes()
    result = retune(job, previous=prod, output=prod, trials=10, progress=Quiet())
    assert result.decision == "kept" and result.written is None
    assert prod.read_bytes() == before


def test_history_gains_one_entry_per_run_and_never_loses_one(night0, tmp_path, capsys):
    folder, job = night0
    hist = tmp_path / "hist"
    for k in range(2):
        retune(job, previous=folder / "prod.yaml", output=tmp_path / f"n{k}.yaml", trials=10, history=hist,
               progress=Quiet())
        assert len(list(hist.glob("*.json"))) == k + 1 and len(list(hist.glob("*.yaml"))) == k + 1
    assert main(["history", str(hist), "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)["nights"]
    assert [r["decision"] for r in rows] == ["kept", "kept"]


def test_decision_rule_needs_margin_and_significance():
    """Paired one-sided t-test (scipy.stats.ttest_rel) plus a 3% margin."""
    import numpy as np

    from bittune.search import Candidate
    from bittune.select import Evaluation

    class R:
        def __init__(self, bits, reached=True):
            self.uplink_bits, self.reached, self.rounds, self.status, self.seed = bits, reached, 1, "reached", 0

    c = Candidate("gd", {"name": "identity"}, 1.0)
    old = Evaluation(c, [R(b) for b in (100.0, 110.0, 90.0, 105.0, 95.0)])
    noisy = Evaluation(c, [R(b) for b in (99.0, 112.0, 88.0, 104.0, 96.0)])  # 0.2% better: noise
    better = Evaluation(c, [R(b * 0.8 + d) for b, d in zip((100.0, 110.0, 90.0, 105.0, 95.0),
                                                            (0.5, -0.5, 0.3, 0.0, -0.2))])
    assert decide(noisy, old)[0] == "kept"
    decision, reason, p = decide(better, old)
    assert decision == "replaced" and p < 0.05
    assert "fewer bits on the 5 fresh seeds" in reason  # the quantity named: fresh, not search, seeds
    # Reference p-value from scipy directly.
    from scipy import stats

    assert p == pytest.approx(stats.ttest_rel(better.bits, old.bits, alternative="less").pvalue)
    broken = Evaluation(c, [R(1e9, reached=False) for _ in range(5)])
    assert decide(old, broken)[0] == "replaced"
    assert decide(broken, broken)[0] == "failed"
    assert np.isnan(decide(broken, broken)[2])


@pytest.mark.parametrize("method", ["marina", "diana"])
def test_small_drift_narrows_the_step_in_the_units_the_method_searches(method):
    """MARINA's step is drawn over its theory step (search.step_range), DIANA's over its search anchor
    1/(2L) (docs/theory.md §2.3): retune's x/÷4 window around the previous step lands in that unit."""
    from dataclasses import replace

    import numpy as np

    from bittune.constants import Constants
    from bittune.job import SECTIONS, SearchSpec
    from bittune.retune import _narrowed
    from bittune.search import Candidate, Space

    defaults = {k: p.default for k, p in SECTIONS["search"].items()}
    spec = SearchSpec(**{**defaults, "methods": ["marina", "diana"], "compressors": ["rand_k"], "seeds": 2})
    # f(x) = 1/2 x^T diag(a) x on identical workers: L = L_QM = max a = 2 (Nesterov 2004, §1.2.2, from memory).
    c = Constants(n_workers=4, dim=8, L=2.0, L_workers=np.full(4, 2.0), L_plus=2.0, L_pm=0.0, delta0=1.0,
                  grad_sq0=1.0, local_grad_sq0=1.0, heterogeneity0=0.0)
    space = Space(spec, c, target=1e-6)
    comp = {"name": "rand_k", "k": 2}
    t = space.theory(method, comp)
    unit = t.step_size if t.search_anchor is None else t.search_anchor
    assert (t.search_anchor is None) == (method == "marina")
    prev = Candidate(method, comp, step_size=3.0 * unit, sync_probability=t.sync_probability,
                     shift_rate=t.shift_rate)
    over = _narrowed(spec, prev, space)
    key = "step_range" if method == "marina" else "anchor_range"
    assert over[key] == pytest.approx((0.75, 12.0))  # 3 x/÷ 4, inside both default ranges
    narrowed = Space(replace(spec, **over), c, target=1e-6)
    name, lo, hi = narrowed.step_param(method, comp)
    assert (lo, hi) == pytest.approx((0.75, 12.0))
    assert name == f"{method}.{'anchor_mult' if key == 'anchor_range' else 'step_mult'}"
