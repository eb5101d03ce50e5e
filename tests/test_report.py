"""The report: plot data checked against hand-made studies and closed forms, the HTML in headless
Chromium, and ``write_report`` on a real run folder."""

from __future__ import annotations

import base64
import io
import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import optuna
import pytest
import yaml
from matplotlib.image import imread
from optuna.distributions import CategoricalDistribution, FloatDistribution, IntDistribution
from optuna.trial import TrialState, create_trial

from bittune.errors import InputError
from bittune.report import (GRID_POINTS, CAUTION, best_per_method, curve_band, importance, search_history,
                            step_response, why, why_sentence, worker_smoothness, write_report)
from bittune.search import open_storage
from bittune.tune import tune
from conftest import Quiet

ROOT = Path(__file__).resolve().parents[1]
STEP = FloatDistribution(0.5, 4096.0, log=True)
DIST = {"method": CategoricalDistribution(["diana", "marina", "ef21"]),
        "diana.compressor": CategoricalDistribution(["rand_k", "dither"]), "rand_k.k": IntDistribution(1, 38, log=True),
        "dither.levels": IntDistribution(1, 16, log=True), "diana.step_mult": STEP,
        "diana.shift_mult": FloatDistribution(0.25, 4.0, log=True),
        "marina.compressor": CategoricalDistribution(["rand_k"]),
        "marina.step_mult": STEP, "marina.sync_mult": FloatDistribution(0.25, 16.0, log=True),
        "ef21.compressor": CategoricalDistribution(["top_k"]), "top_k.k": IntDistribution(1, 38, log=True),
        "ef21.step_mult": STEP}


def _params(rng, method: str) -> dict:
    comp = "dither" if method == "diana" and rng.random() < 0.5 else ("top_k" if method == "ef21" else "rand_k")
    p = {"method": method, f"{method}.compressor": comp}
    p[{"rand_k": "rand_k.k", "dither": "dither.levels", "top_k": "top_k.k"}[comp]] = int(rng.integers(1, 9))
    p[f"{method}.step_mult"] = float(np.exp(rng.uniform(np.log(0.5), np.log(4096.0))))
    if method == "diana":
        p["diana.shift_mult"] = float(np.exp(rng.uniform(np.log(0.25), np.log(4.0))))
    if method == "marina":
        p["marina.sync_mult"] = float(np.exp(rng.uniform(np.log(0.25), np.log(16.0))))
    return p


def _tiny_study(seed: int = 0):
    """In-memory study: 16 completed (diana, marina), 5 pruned (one ef21), 1 failed; returns what went in."""
    rng = np.random.default_rng(seed)
    study = optuna.create_study(direction="minimize")
    truth = {"complete": [], "pruned": [], "failed": []}
    for number in range(22):
        kind = "failed" if number == 9 else ("pruned" if number % 4 == 3 else "complete")
        method = "ef21" if number == 19 else ("diana", "marina")[number % 2]
        params = _params(rng, method)
        dists = {k: DIST[k] for k in params}
        bits = [float(v) for v in rng.uniform(2e3, 2e5, size=3)]
        reached = 3 if rng.random() < 0.8 else 2
        attrs = {"seed_point": number < 4, "bits": bits, "reached": reached, "status": ["reached"] * reached +
                 ["stalled"] * (3 - reached), "worker": 0}
        if kind == "complete":
            value = float(np.mean(bits))
            study.add_trial(create_trial(params=params, distributions=dists, value=value, user_attrs=attrs,
                                         intermediate_values={0: 1.5, 1: 0.5}))
            truth["complete"].append((number, method, value, params[f"{method}.step_mult"], reached == 3))
        elif kind == "pruned":
            study.add_trial(create_trial(params=params, distributions=dists, state=TrialState.PRUNED,
                                         user_attrs={**attrs, "reached": 0}, intermediate_values={0: 2.0}))
            truth["pruned"].append((number, float(np.mean(bits))))
        else:
            study.add_trial(create_trial(params=params, distributions=dists, state=TrialState.FAIL, user_attrs={}))
            truth["failed"].append(number)
    return study, truth


def test_search_history_running_best_and_markers():
    study, truth = _tiny_study()
    d = search_history(study)
    numbers, values = [t[0] for t in truth["complete"]], np.array([t[2] for t in truth["complete"]])
    assert d["complete"]["number"] == numbers
    np.testing.assert_array_equal(d["complete"]["value"], values)
    np.testing.assert_array_equal(d["best"]["value"], np.minimum.accumulate(values))
    assert d["complete"]["seed_point"] == [n < 4 for n in numbers]
    assert d["complete"]["reached_all"] == [t[4] for t in truth["complete"]]
    assert d["pruned"]["number"] == [t[0] for t in truth["pruned"]]
    # Pruned trials sit at the mean of the bits they spent (the same numbers, same order of summation).
    np.testing.assert_allclose(d["pruned"]["bits_spent"], [t[1] for t in truth["pruned"]], rtol=1e-15)
    assert d["failed"]["number"] == truth["failed"]
    assert (d["counts"]["complete"], d["counts"]["pruned"], d["counts"]["fail"]) == (16, 5, 1)
    assert d["seed_points"] == 4


def test_step_response_and_best_per_method_match_the_trials():
    study, truth = _tiny_study()
    steps = step_response(study)["methods"]
    assert set(steps) == {"diana", "marina"}  # ef21 has only a pruned trial
    for method, row in steps.items():
        mine = [t for t in truth["complete"] if t[1] == method]
        assert row["number"] == [t[0] for t in mine]
        assert row["step_mult"] == [t[3] for t in mine] and row["value"] == [t[2] for t in mine]
        assert all(re.fullmatch(r"(rand_k|dither):\d+", c) for c in row["compressor"])
    best = best_per_method(study)
    expect = {m: min(t[2] for t in truth["complete"] if t[1] == m) for m in ("diana", "marina")}
    assert dict(zip(best["method"], best["best"])) == expect
    assert best["best"] == sorted(best["best"])  # best first
    assert best["none_completed"] == ["ef21"]
    for m, n in zip(best["method"], best["number"]):
        assert study.trials[n].value == expect[m] and study.trials[n].params["method"] == m


def _power_law_summary(rng, target: float = 1e-4) -> tuple[dict, list]:
    """Three seeds with g = C * bits^-a sampled at random bit counts (a straight line in log-log)."""
    laws, curves = [], []
    for n_points, (lo, hi) in zip((40, 25, 60), ((1e3, 5e4), (2e3, 8e4), (1.5e3, 3e4))):
        C, a = float(rng.uniform(10, 1000)), float(rng.uniform(0.5, 2.0))
        bits = np.concatenate([[0.0], np.sort(np.exp(rng.uniform(np.log(lo), np.log(hi), n_points)))])
        bits[1], bits[-1] = lo, hi
        g = np.where(bits > 0, C * np.maximum(bits, 1.0) ** -a, 50.0)  # round 0 at bits 0 is dropped (log)
        curves.append({"seed": len(laws), "status": "reached", "rounds": list(range(len(bits))),
                       "uplink_bits": bits.tolist(), "grad_norm_sq": g.tolist()})
        laws.append((C, a, lo, hi))
    return {"target_grad_norm_sq": target, "curves": {"winner": curves, "baseline": []}}, laws


def test_curve_band_is_the_log_space_mean_of_the_seeds():
    rng = np.random.default_rng(7)
    summary, laws = _power_law_summary(rng)
    d = curve_band(summary, "winner")
    bits, mean = np.asarray(d["bits"]), np.asarray(d["mean"], float)
    assert len(bits) == GRID_POINTS and d["target"] == 1e-4 and d["seeds"] == 3
    # Grid: log-spaced from the smallest first positive bits to the largest last ones.
    assert (bits[0], bits[-1]) == (1e3, 8e4)
    # rtol 1e-9: constant log step up to float64 rounding of log10 near 4.
    np.testing.assert_allclose(np.diff(np.log10(bits)), np.log10(80) / (GRID_POINTS - 1), rtol=1e-9)
    covered = np.array([[lo <= b <= hi for (_, _, lo, hi) in laws] for b in bits])
    np.testing.assert_array_equal(d["count"], covered.sum(axis=1))
    full = covered.all(axis=1)
    assert full.any() and (~full).any()
    assert np.isnan(mean[~full]).all()
    # Independent recomputation with numpy.interp in log space, seed by seed.
    interp = np.full((GRID_POINTS, 3), np.nan)
    for i, c in enumerate(summary["curves"]["winner"]):
        b, g = np.array(c["uplink_bits"][1:]), np.array(c["grad_norm_sq"][1:])
        ok = covered[:, i]
        interp[ok, i] = 10 ** np.interp(np.log10(bits[ok]), np.log10(b), np.log10(g))
    # rtol 1e-10: the same interpolation, only the order of float operations differs.
    np.testing.assert_allclose(mean[full], np.exp(np.log(interp[full]).mean(axis=1)), rtol=1e-10)
    np.testing.assert_allclose(d["lo"], np.nanmin(interp, axis=1), rtol=1e-10)
    np.testing.assert_allclose(d["hi"], np.nanmax(interp, axis=1), rtol=1e-10)
    # Closed form: log-log interpolation of a power law is exact, so the geometric mean of the
    # seeds is prod(C_i)^(1/3) * bits^(-mean a_i) (rtol 1e-9: log10/exp round trips in float64).
    C, a = np.array([law[0] for law in laws]), np.array([law[1] for law in laws])
    np.testing.assert_allclose(mean[full], np.exp(np.log(C).mean()) * bits[full] ** -a.mean(), rtol=1e-9)
    assert d["end_bits"] == [law[3] for law in laws]
    assert curve_band(summary, "baseline")["bits"] == []


def test_worker_smoothness_passes_estimates_and_bounds():
    summary = {"constants": {"L": 3.0, "L_workers": [1.0, 2.0, 4.0], "bound_L_workers": [1.5, None, 4.0],
                             "bound_L": 3.5}, "problem": {"worker_sizes": [10, 20, 30]}}
    d = worker_smoothness(summary)
    np.testing.assert_array_equal(d["estimate"], [1.0, 2.0, 4.0])
    np.testing.assert_array_equal(d["bound"], [1.5, np.nan, 4.0])
    assert d["worker"] == [0, 1, 2] and d["samples"] == [10, 20, 30] and d["bound_L"] == 3.5
    assert d["L_qm"] == pytest.approx(np.sqrt(7.0), rel=1e-15)  # sqrt((1 + 4 + 16) / 3), closed form
    del summary["constants"]["bound_L_workers"]
    assert np.isnan(worker_smoothness(summary)["bound"]).all()


def test_importance_ranks_the_parameter_that_matters_and_admits_too_few_trials():
    rng = np.random.default_rng(3)
    study = optuna.create_study(direction="minimize")
    dists = {"method": CategoricalDistribution(["diana"]), "diana.step_mult": STEP,
             "diana.shift_mult": DIST["diana.shift_mult"]}
    for _ in range(60):
        step, shift = float(np.exp(rng.uniform(np.log(0.5), np.log(4096)))), float(rng.uniform(0.25, 4.0))
        value = 1e4 * (1 + (np.log(step) - np.log(100.0)) ** 2) * rng.uniform(0.98, 1.02)  # only the step matters
        study.add_trial(create_trial(params={"method": "diana", "diana.step_mult": step, "diana.shift_mult": shift},
                                     distributions=dists, value=value))
    d = importance(study)  # pytest's filterwarnings=error: any warning escaping would fail here
    assert d["ok"] and d["trials"] == 60
    # By construction the value depends on the step alone (shift is noise): it must rank first and carry
    # most of the total (the 0.5 threshold is ours, common practice, no source).
    assert d["params"][0] == "diana.step_mult" and d["importance"][0] > 0.5
    assert sum(d["importance"]) == pytest.approx(1.0, rel=1e-12)  # shares of the total
    # Only what varied: the method is fixed in this study, so it is not a bar.
    assert set(d["params"]) == {"diana.step_mult", "diana.shift_mult"}
    one = optuna.create_study(direction="minimize")
    one.add_trial(study.trials[0])
    for small in (one, optuna.create_study(direction="minimize")):
        d = importance(small)
        assert not d["ok"] and d["reason"].startswith("not enough trials") and d["params"] == []
    flat = optuna.create_study(direction="minimize")  # a single-valued space: nothing to separate
    for v in rng.uniform(1, 2, 20):
        flat.add_trial(create_trial(params={"method": "diana"}, distributions={"method": dists["method"]},
                                    value=float(v)))
    assert not importance(flat)["ok"]


# ------------------------------------------------------------ real run folder
@pytest.fixture(scope="module")
def run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("report")
    subprocess.run([sys.executable, str(ROOT / "examples/frost/make_data.py"), "--out", str(folder / "stations.svm"),
                    "--nights", "60"], check=True, capture_output=True)
    (folder / "job.yaml").write_text("""
data: stations.svm
model: logistic_nonconvex
regularization: 0.01
workers: {count: 6, split: iid, seed: 1}
target: {grad_norm_sq: 1e-4, relative: true}
budget: {max_rounds: 3000}
search:
  methods: [marina, diana]
  compressors: [rand_k, top_k]
  trials: 12
  seeds: 2
  validation_seeds: 3
""")
    tune(folder / "job.yaml", output=folder / "c.yaml", progress=Quiet())
    return folder


@pytest.mark.slow
def test_the_report_opens_with_why_this_config(run):
    import json as _json

    paths = write_report(run / "c.run")
    summary = _json.loads((run / "c.run" / "summary.json").read_text())
    study = optuna.load_study(study_name=summary["study"], storage=open_storage(str(run / "c.run" / "study.journal")))
    d = why(summary, study)
    w, gd = summary["selection"]["winner"], summary["selection"]["gd"]
    # bits per round x rounds = total, each from the selection's means on the fresh seeds
    assert d["winner"]["bits"] == w["mean_bits_per_worker"] and d["winner"]["rounds"] == w["mean_rounds"]
    assert d["winner"]["bits_per_round"] == pytest.approx(w["mean_bits_per_worker"] / w["mean_rounds"], rel=1e-12)
    assert d["gd"]["bits"] == gd["mean_bits_per_worker"]
    # GD sends 32 d bits per round (one dense float32 message; README, What is simulated and counted)
    assert d["gd"]["bits_per_round"] == pytest.approx(32 * summary["problem"]["dimension"], rel=1e-12)
    assert d["runner_up"] is not None and not d["runner_up"]["label"].startswith(w["method"] + " ")
    md = paths["markdown"].read_text().split("\n\n")
    assert md[1] == why_sentence(d) and md[1].startswith(f"Why this config: {w['method']} + {w['compressor']}")
    assert "fewer bits than tuned GD" in md[1]


@pytest.mark.slow
def test_write_report_is_reproducible_and_says_what_the_run_found(run, tmp_path):
    first = write_report(run / "c.run")
    second = write_report(run / "c.run", out_dir=tmp_path / "again")
    assert first["html"] == run / "c.run" / "report" / "report.html"
    assert set(first) == set(second) >= {"html", "markdown", "data", "convergence", "history", "step", "smoothness",
                                         "methods"}
    assert first["data"].read_bytes() == second["data"].read_bytes()  # the figures' numbers, identical
    data = json.loads(first["data"].read_text())
    summary = json.loads((run / "c.run" / "summary.json").read_text())
    study = optuna.load_study(study_name=summary["study"], storage=open_storage(summary["storage"]))
    assert len(data["history"]["complete"]["number"]) + len(data["history"]["pruned"]["number"]) == 12
    values = [t.value for t in sorted(study.trials, key=lambda t: t.number) if t.state == TrialState.COMPLETE]
    np.testing.assert_array_equal(data["history"]["best"]["value"], np.minimum.accumulate(values))
    for name in set(first) - {"html", "markdown", "data"}:
        assert first[name].read_bytes() == second[name].read_bytes()  # Agg output is deterministic
        assert imread(first[name]).shape[2] in (3, 4)
    assert not [p for p in first["html"].parent.iterdir() if p.name.startswith(".")]  # no temp file left
    config = yaml.safe_load((run / "c.yaml").read_text())
    md = first["markdown"].read_text()
    assert f"Chosen: {config['method']} + " in md and CAUTION in md
    assert f"{summary['selection']['gain_over_theory']:.1f}× fewer uplink bits" in md
    base = summary["selection"]["baseline"]
    assert ("at least" in md) == (base["reached"] < base["seeds"])
    for png in re.findall(r"\]\((\w+\.png)\)", md):
        assert (first["markdown"].parent / png).exists()
    for row in summary["theory"] + [base]:
        assert f"| {row['method']} | {row['compressor']} |" in md
    assert len(re.findall(r"\| ★", md)) == 1  # the baseline is marked once in the theory table


@pytest.mark.slow
def test_gain_is_a_lower_bound_when_the_baseline_missed_and_extra_sections_show(run, tmp_path):
    summary = json.loads((run / "c.run" / "summary.json").read_text())
    base = summary["selection"]["baseline"]
    base["reached"] = base["seeds"] - 1
    (tmp_path / "summary.json").write_text(json.dumps(summary))  # the study stays where the run put it
    drift = [{"quantity": "L", "previous": 1.0, "now": 1.25}]
    paths = write_report(tmp_path, drift=drift, extra_sections=[{"title": "Retune decision", "text": "kept <old>"}])
    md, page = paths["markdown"].read_text(), paths["html"].read_text()
    assert f"at least {summary['selection']['gain_over_theory']:.1f}×" in md
    assert "| quantity | previous | now |" in md and "| L | 1 | 1.25 |" in md
    assert "## Retune decision" in md and "<h2>Retune decision</h2>" in page and "kept &lt;old&gt;" in page
    with pytest.raises(InputError, match="summary.json: not found"):
        write_report(tmp_path / "nowhere")


def _chromium_exe() -> str:
    """Chromium's path; a missing browser fails in CI (CI=true) and skips locally."""
    exe = shutil.which("chromium")
    if exe is None:
        reason = "chromium is not installed (Debian package 'chromium'; .ci/run installs it)"
        if os.environ.get("CI") == "true":
            pytest.fail(reason)
        pytest.skip(reason)
    return exe


def _chromium(exe: str, page: Path, tmp: Path) -> tuple[Path, str]:
    shot = tmp / f"{page.stem}.png"
    proc = subprocess.run([exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                           "--disable-background-networking", "--disable-component-update", "--disable-sync",
                           f"--user-data-dir={tmp / ('profile-' + page.stem)}", "--enable-logging=stderr", "--v=0",
                           f"--screenshot={shot}", "--window-size=1200,2000", page.as_uri()],
                          capture_output=True, text=True, timeout=600)  # a hang guard only (loaded machine)
    return shot, proc.stderr


def _console_errors(stderr: str) -> list[str]:
    # Chromium logs page console messages as "...:CONSOLE..." (recent builds at INFO level even for
    # console.error); the report has no script, so any console line is a fault.
    return [line for line in stderr.splitlines() if "Uncaught" in line or ":CONSOLE" in line]


@pytest.mark.slow
def test_html_renders_in_headless_chromium_and_every_image_decodes(run, tmp_path):
    exe = _chromium_exe()
    paths = write_report(run / "c.run", out_dir=tmp_path / "report")
    page = paths["html"].read_text()
    assert not re.search(r"(src|href)=\"(?!data:)", page)  # nothing external: every resource is inline
    images = re.findall(r"src=\"data:image/png;base64,([A-Za-z0-9+/=]+)\"", page)
    assert len(images) == len([k for k in paths if k not in ("html", "markdown", "data")])
    for b64 in images:
        raw = base64.b64decode(b64, validate=True)
        pixels = imread(io.BytesIO(raw), format="png")
        assert pixels.ndim == 3 and min(pixels.shape[:2]) > 100 and pixels.std() > 0.01
    shot, stderr = _chromium(exe, paths["html"], tmp_path)
    assert _console_errors(stderr) == [], stderr
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    pixels = imread(shot)[..., :3]
    assert pixels.shape[:2] == (2000, 1200)
    # Text and figures cover well over 2% of a 1200x2000 page (a blank page covers 0%).
    assert (pixels.min(axis=2) < 0.9).mean() > 0.02
    # Control: the detector sees a console error when there is one.
    bad = tmp_path / "bad.html"
    bad.write_text("<!doctype html><body><script>console.error('broken');</script></body>")
    assert _console_errors(_chromium(exe, bad, tmp_path)[1])


@pytest.mark.parametrize("method, params", [("marina", {"sync_probability": 0.2}),
                                            ("vr_marina", {"sync_probability": 0.2, "minibatch": 8})])
def test_seconds_curve_ends_at_the_objectives_seconds_exactly(cancer, method, params):
    """The report's seconds curve and the search objective are one formula (cost.py): the last
    point of each seed's curve, after the summary's JSON round trip, equals the objective's
    seconds for that trajectory bit for bit, downlink and fractional gradient passes included."""
    from bittune.compressors import make_compressor
    from bittune.cost import NetworkModel, cost_function
    from bittune.report import has_seconds, seconds_curve
    from bittune.simulate import simulate
    from bittune.tune import trajectory_curves

    # slow links so that every term weighs: 20 ms latency, 0.3 ms per pass, 64 kbit/s up, 256 kbit/s down
    net = NetworkModel(latency=0.02, uplink_bandwidth=6.4e4, downlink_bandwidth=2.56e5, compute_seconds=3e-4)
    d = cancer.dim
    g0 = cancer.full_grad(np.zeros(d))
    runs = simulate(cancer, method=method, compressor=make_compressor("rand_k:3", d), step_size=0.05,
                    seeds=[0, 1, 2], target=1e-3 * float(g0 @ g0), max_rounds=300, params=params)
    summary = json.loads(json.dumps({"network": net.to_dict(), "target": {"kind": "grad_norm_sq", "absolute": 1.0},
                                     "curves": {"winner": trajectory_curves(runs, loss_gap=False)}}))
    assert has_seconds(summary)
    objective = cost_function(net)
    for run, curve in zip(runs, summary["curves"]["winner"]):
        secs = seconds_curve(summary, curve)
        assert secs[-1] == objective(run)  # exact: same operations in the same order
        # every point by hand (README, "The wall-clock objective"): the server broadcasts 32 d bits
        # per round; rtol 1e-12: the same sums in another order
        k = np.asarray(curve["rounds"], float)
        hand = (k * net.latency + np.asarray(curve["gradient_passes"]) * net.compute_seconds
                + np.asarray(curve["uplink_bits"]) / net.uplink_bandwidth + 32 * d * k / net.downlink_bandwidth)
        np.testing.assert_allclose(secs, hand, rtol=1e-12)
    if method == "vr_marina":  # minibatch rounds: gradient passes are not the round count
        assert any(r.gradient_passes != r.rounds for r in runs)
    band = curve_band(summary, "winner", x="seconds")
    np.testing.assert_array_equal(band["end_bits"], [objective(r) for r in runs])
