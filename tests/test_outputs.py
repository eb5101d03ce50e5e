"""What a tuned config tells its reader: replayable figures, gains with intervals, units, paths."""

from __future__ import annotations

import io
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import yaml

from bittune.cli import main
from bittune.config import SEED_DIGITS, load_config, sig
from bittune.select import GAIN_LEVEL, paired_gain
from bittune.tune import tune
from bittune.progress import Progress

ROOT = Path(__file__).resolve().parents[1]


# ---------------------------------------------------------------- paired bootstrap
def test_gain_interval_is_a_point_when_the_ratio_is_the_same_on_every_seed():
    # Closed form: if baseline = c x winner seed by seed, every resample has ratio c.
    winner = np.array([10.0, 13.0, 9.0, 11.0, 12.0])
    g = paired_gain(3.0 * winner, winner, seed=1)
    assert g.ratio == pytest.approx(3.0, rel=1e-15)
    assert g.low == pytest.approx(3.0, rel=1e-12) and g.high == pytest.approx(3.0, rel=1e-12)


def test_gain_interval_matches_a_plain_numpy_percentile_bootstrap():
    """Reference: the percentile interval written out with numpy (Efron & Tibshirani 1993, ch. 13):
    resample seed indices with replacement, take the ratio of means, read the 2.5% and 97.5% points."""
    rng = np.random.default_rng(7)
    winner = rng.lognormal(10.0, 0.3, 8)
    baseline = 2.0 * winner * rng.lognormal(0.0, 0.1, 8)
    g = paired_gain(baseline, winner, seed=3)
    idx = np.random.default_rng(11).integers(0, 8, size=(200_000, 8))
    ratios = baseline[idx].mean(axis=1) / winner[idx].mean(axis=1)
    lo, hi = np.percentile(ratios, [100 * (1 - GAIN_LEVEL) / 2, 100 * (1 + GAIN_LEVEL) / 2])
    # Monte Carlo error of a 2.5% quantile from 9999 resamples: sd(ratio) sqrt(.025 .975 / 9999) / phi(1.96)
    # ~ 0.027 sd(ratio); sd(ratio) is about 4% of the ratio here, so 1% of the ratio is over 7 such errors.
    assert g.low == pytest.approx(lo, rel=0.01) and g.high == pytest.approx(hi, rel=0.01)
    assert g.low < g.ratio < g.high
    assert g.ratio == pytest.approx(baseline.mean() / winner.mean(), rel=1e-15)


def test_one_seed_has_no_interval():
    g = paired_gain(np.array([4.0]), np.array([2.0]))
    assert g.ratio == 2.0 and g.low is None and g.to_dict()["interval"] is None


# ---------------------------------------------------------------- a tuned config
@pytest.fixture(scope="module")
def tuned(tmp_path_factory):
    folder = tmp_path_factory.mktemp("outputs")
    subprocess.run([sys.executable, str(ROOT / "examples/frost/make_data.py"), "--out",
                    str(folder / "data" / "stations.svm"), "--nights", "60"], check=True, capture_output=True)
    (folder / "data" / "job.yaml").write_text("""
data: stations.svm
model: logistic_nonconvex
regularization: 0.01
workers: {count: 8, split: dirichlet, seed: 0}
target: {grad_norm_sq: 1e-4, relative: true}
budget: {max_rounds: 3000}
search: {methods: [diana, marina, ef21], compressors: [rand_k, top_k, dither], trials: 16, seeds: 2,
         validation_seeds: 4}
""")
    out = folder / "out" / "config.yaml"
    out.parent.mkdir()
    log = Progress(total=16, stream=io.StringIO())  # not a terminal: plain lines
    result = tune(folder / "data" / "job.yaml", output=out, progress=log)
    result.log = log.stream.getvalue()
    return folder, out, result


@pytest.mark.slow
def test_replay_without_seeds_gives_back_the_expected_section(tuned, capsys):
    folder, out, _ = tuned
    cfg = yaml.safe_load(out.read_text())
    exp = cfg["expected"]
    assert main(["replay", str(out), "--job", str(folder / "data" / "job.yaml"), "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    # Same seeds, same counter-based random numbers, same stopping rules: the same trajectories.
    assert doc["seeds"] == exp["validation_seeds"]
    assert doc["rounds"] == exp["rounds"]
    assert sig(doc["bits_per_worker"], SEED_DIGITS) == exp["bits_per_worker"]
    assert sig(doc["mean_bits_per_worker"]) == exp["mean_bits_per_worker"]
    assert sig(doc["std_bits_per_worker"]) == exp["std_bits_per_worker"]
    assert sig(doc["mean_rounds"]) == exp["mean_rounds"]
    # Other seeds when asked for.
    assert main(["replay", str(out), "--job", str(folder / "data" / "job.yaml"), "--seeds", "2", "--json"]) in (0, 4)
    assert json.loads(capsys.readouterr().out)["seeds"] == [0, 1]


@pytest.mark.slow
def test_config_states_the_gain_over_tuned_gd_with_an_interval(tuned):
    folder, out, result = tuned
    cfg = yaml.safe_load(out.read_text())
    sel = result.selection
    base, gains = cfg["baseline"], cfg["gains"]
    assert base["method"] == "gd" and base["compressor"] == "identity"
    # GD's ladder: the search's seed ladder (x1 ... x256 over the theory step), on the search seeds.
    assert [r["step_mult"] for r in base["ladder"]] == [1.0, 2.0, 4.0, 16.0, 64.0, 256.0]
    assert all(r["seeds"] == 2 for r in base["ladder"])
    assert base["step_mult"] in [r["step_mult"] for r in base["ladder"] if r["reached"] == 2]
    # Validated on the winner's fresh seeds.
    assert [r.seed for r in sel.gd.runs] == cfg["expected"]["validation_seeds"]
    g = gains["over_tuned_gd"]
    assert g["ratio"] == sig(sel.gd.mean_bits / sel.winner.mean_bits)
    lo, hi = g["interval"]
    assert lo <= g["ratio"] <= hi and g["level"] == 0.95
    t = gains["over_theory"]
    assert t["ratio"] == cfg["expected"]["gain_over_theory"]
    assert "Efron & Tibshirani 1993" in gains["interval_method"]


@pytest.mark.slow
def test_config_has_units_rounded_figures_exact_settings_and_relative_paths(tuned):
    folder, out, result = tuned
    cfg = yaml.safe_load(out.read_text())
    for key in ("step_size", "mean_bits_per_worker", "mean_rounds", "ratio"):
        assert cfg["units"][key]
    assert "uplink" in cfg["units"]["mean_bits_per_worker"] and "rounds" in cfg["units"]["mean_rounds"]
    w = result.selection.winner
    assert cfg["step_size"] == w.candidate.step_size  # exact: the launcher uses it
    if w.candidate.sync_probability is not None:
        assert cfg["sync_probability"] == w.candidate.sync_probability
    exp = cfg["expected"]
    for key in ("mean_bits_per_worker", "std_bits_per_worker", "mean_rounds"):
        assert len(f"{exp[key]:.12g}".replace(".", "").replace("-", "").strip("0")) <= 4
    prov = cfg["provenance"]
    assert prov["job"] == "../data/job.yaml" and prov["data"] == "../data/stations.svm"
    assert (out.parent / prov["storage"]).exists()
    load_config(out)  # the written config passes its own schema


@pytest.mark.slow
def test_every_long_phase_reports_done_over_total(tuned):
    lines = tuned[2].log.splitlines()
    assert any(ln.startswith("[bittune] search: 16/16 trials") for ln in lines)
    for phase in ("validation", "back-off", "baselines"):
        mine = [ln for ln in lines if ln.startswith(f"[bittune] {phase}: ")]
        assert mine, phase
        done, total = mine[-1].split(": ")[1].split(" ")[0].split("/")
        assert done == total


def test_gd_ladder_is_the_search_ladder_clipped_to_the_range(cancer):
    from types import SimpleNamespace

    from bittune.compressors import make_compressor
    from bittune.constants import Constants
    from bittune.search import SEED_LADDER, Space
    from bittune.select import gd_ladder
    from bittune.theory import theory_point

    per, L = cancer.smoothness_bounds()
    consts = Constants(n_workers=cancer.n_workers, dim=cancer.dim, L=L, L_workers=per, L_plus=L, L_pm=0.1,
                       delta0=0.7, grad_sq0=1.0, local_grad_sq0=1.0, heterogeneity0=0.1)
    spec = SimpleNamespace(methods=["marina"], compressors=["rand_k"], levels_range=(1, 16), step_range=(0.5, 4096))
    space = Space(spec, consts, target=1e-3)
    gd_step = theory_point("gd", make_compressor("identity", cancer.dim), consts, target=1e-3).step_size
    full = gd_ladder(space)
    assert [c.step_mult for c in full] == list(SEED_LADDER)
    assert [c.step_size for c in full] == pytest.approx([m * gd_step for m in SEED_LADDER], rel=1e-15)
    assert all(c.method == "gd" and c.compressor == {"name": "identity"} for c in full)
    # A retune's narrowed range belongs to its previous method; the job's own range is passed instead.
    assert [c.step_mult for c in gd_ladder(space, (2.0, 20.0))] == [2.0, 4.0, 16.0, 20.0]
