"""Nightly retuning: drift, warm start, and a keep-or-replace decision a scheduler can act on.

A retune probes tonight's data and compares the constants with those stored
in the config in use (the drift table). A changed dimension or worker count is
a new problem: a full tuning runs. Otherwise the previous winner (and the
previous study's best trials, when its storage is reachable) are re-expressed
in tonight's theory-relative units, clipped into tonight's ranges and run
first; with small drift the ranges narrow around the previous winner and the
trial budget is smaller than a fresh tune's.

The previous config then runs on the same fresh seeds as tonight's winner.
The new config replaces it only if it reaches the target on every seed and
needs fewer bits by more than a margin, in a paired one-sided test that is
significant (scipy.stats.ttest_rel), or if the previous config now fails.
Noise alone does not flip the config night after night.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .config import Config, config_to_dict, load_config, write_config
from .report import write_report
from .errors import EXIT, InputError
from .search import SYNCED, Candidate, open_storage, trial_value
from .select import Evaluation, evaluate, select
from .progress import Progress
from .tune import (_config_doc, _plain, check_existing_study, check_paths, hold_run_dir, objective_unit, prepare,
                   respace, run_search, trial_counts, write_summary)

__all__ = ["RetuneResult", "retune", "drift_table", "decide", "HISTORY_FIELDS", "history_rows"]

#: Constants compared between nights (docs/design.md, "Nightly retuning": smoothness, Delta0, heterogeneity).
DRIFT_KEYS = ("L", "L_am", "L_qm", "L_max", "L_plus", "L_pm", "delta0", "grad_sq0", "heterogeneity0", "samples")
#: Default decision settings: margin 3%, level 5% (issue text); drift threshold ours (no source).
MARGIN, LEVEL, DRIFT_THRESHOLD = 0.03, 0.05, 0.5


@dataclass
class RetuneResult:
    exit_code: int
    decision: str  # "replaced" | "kept" | "failed" | "new_problem"
    config: dict
    drift: list[dict]
    written: Path | None


def drift_table(previous: dict, current: dict, *, dimension: tuple[int, int], workers: tuple[int, int]) -> list[dict]:
    """Rows {quantity, previous, current, ratio}; ratio = current / previous."""
    rows = [{"quantity": "dimension", "previous": dimension[0], "current": dimension[1],
             "ratio": dimension[1] / dimension[0]},
            {"quantity": "workers", "previous": workers[0], "current": workers[1], "ratio": workers[1] / workers[0]}]
    for key in DRIFT_KEYS:
        a, b = previous.get(key), current.get(key)
        if a is None or b is None:
            continue
        rows.append({"quantity": key, "previous": float(a), "current": float(b),
                     "ratio": float(b) / float(a) if a else math.inf})
    pw, cw = previous.get("L_workers"), current.get("L_workers")
    if pw is not None and cw is not None and len(pw) == len(cw):
        ratios = np.asarray(cw, dtype=float) / np.asarray(pw, dtype=float)
        far = int(np.argmax(np.abs(np.log(ratios))))
        rows.append({"quantity": f"L_workers (largest change, worker {far})", "previous": float(pw[far]),
                     "current": float(cw[far]), "ratio": float(ratios[far])})
    return rows


def drift_size(rows: list[dict]) -> float:
    """Largest relative change max(r, 1/r) - 1 over the drift table."""
    sizes = [max(r["ratio"], 1 / r["ratio"]) - 1 for r in rows if r["ratio"] and math.isfinite(r["ratio"])]
    return max(sizes, default=0.0)


def decide(new: Evaluation, old: Evaluation, *, margin: float = MARGIN, level: float = LEVEL) -> tuple[str, str, float]:
    """(decision, reason, p-value) from paired runs of tonight's winner and the previous config."""
    from scipy import stats

    if not new.all_reached and not old.all_reached:
        return "failed", "neither config reaches the target on every fresh seed", math.nan
    if not old.all_reached:
        return "replaced", "the previous config no longer reaches the target on every fresh seed", math.nan
    if not new.all_reached:
        return "kept", "tonight's best does not reach the target on every fresh seed", math.nan
    unit = "bits" if new.network is None else "seconds"
    diff = new.costs - old.costs
    if np.allclose(diff, diff[0]):  # no spread: the t statistic is undefined; the sign decides
        p = 0.0 if diff[0] < 0 else 1.0
    else:
        p = float(stats.ttest_rel(new.costs, old.costs, alternative="less").pvalue)
    gain = 1.0 - new.mean_cost / old.mean_cost
    # The same quantity the selection reports: mean cost on the fresh (validation) seeds, not the
    # search seeds the progress lines show while trials run.
    seeds = f"on the {len(new.runs)} fresh seeds"
    if gain > margin and p < level:
        return "replaced", f"{gain:.1%} fewer {unit} {seeds} (paired t-test p = {p:.3g} < {level})", p
    return "kept", (f"{gain:.1%} fewer {unit} {seeds} is not enough (needs > {margin:.0%} and p < {level}; "
                    f"p = {p:.3g})"), p


def _candidate(cfg: Config) -> Candidate:
    return Candidate(cfg.method, dict(cfg.compressor), float(cfg.step_size), cfg.sync_probability, cfg.shift_rate,
                     clients=cfg.clients if cfg.method == "pp_marina" else None,
                     minibatch=cfg.minibatch if cfg.method == "vr_marina" else None)


def _warm_params(space, cands: list[Candidate]) -> list[dict]:
    """Candidates in tonight's theory-relative units, clipped into tonight's ranges (dropped if not searchable)."""
    s = space.spec
    out, seen = [], set()
    for c in cands:
        if c.method not in space.methods or c.compressor["name"] not in space.compressors[c.method]:
            continue
        clients = None
        if c.method == "pp_marina":
            clients = int(min(max(c.clients or space.constants.n_workers, 1), space.constants.n_workers))
        minibatch = None
        if c.method == "vr_marina":
            minibatch = int(min(max(c.minibatch or 1, 1), space.max_minibatch))
        t = space.theory(c.method, c.compressor, clients, minibatch)
        params = {"method": c.method, f"{c.method}.compressor": c.compressor["name"],
                  **space.step_params(c.method, c.compressor, c.step_size / t.step_size)}
        dp = space._density_param(c.compressor["name"])
        if dp is not None:
            pname, lo, hi = dp
            params[pname] = int(min(max(c.compressor[pname.split(".")[1]], lo), hi))
        if c.method in SYNCED:
            params[f"{c.method}.sync_mult"] = _clip(
                (c.sync_probability or t.sync_probability) / t.sync_probability, s.sync_range)
        if clients is not None:
            params["pp_marina.clients"] = clients
        if minibatch is not None:
            params["vr_marina.minibatch"] = minibatch
        if c.method == "diana":
            params["diana.shift_mult"] = _clip((c.shift_rate or t.shift_rate) / t.shift_rate, s.shift_range)
        key = tuple(sorted(params.items()))
        if key not in seen:
            seen.add(key)
            out.append(params)
    return out


def _clip(v: float, bounds) -> float:
    return float(min(max(v, bounds[0]), bounds[1]))


def _previous_best(cfg: Config, path: Path, count: int = 3) -> list[Candidate]:
    """The previous study's best few candidates, when its storage can be read (else none).

    A storage file path in ``provenance`` is relative to the config's folder (older configs: absolute)."""
    prov = cfg.extra.get("provenance") or {}
    url, name = prov.get("storage"), prov.get("study")
    if isinstance(url, str) and "://" not in url:
        url = str(Path(path).parent / url)  # an absolute path stays as it is
    if not url or not name or ("://" not in url and not Path(url).exists()):
        return []
    try:
        import optuna
        from optuna.trial import TrialState

        study = optuna.load_study(study_name=name, storage=open_storage(url))
        trials = sorted((t for t in study.get_trials(deepcopy=False, states=(TrialState.COMPLETE,))
                         if t.values is not None and "candidate" in t.user_attrs), key=trial_value)
    except Exception:  # an unreachable or foreign storage only costs the warm start
        return []
    out = []
    for t in trials[:count]:
        c = t.user_attrs["candidate"]
        out.append(Candidate(c["method"], dict(c["compressor"]), float(c["step_size"]),
                             c.get("sync_probability"), c.get("shift_rate"), clients=c.get("clients"),
                             minibatch=c.get("minibatch")))
    return out


def _narrowed(spec, cand: Candidate, space) -> dict:
    """Search overrides around the previous winner (small drift)."""
    t = space.theory(cand.method, cand.compressor, cand.clients, cand.minibatch)
    out = {"methods": [cand.method],
           "compressors": [cand.compressor["name"]] if cand.method != "gd" else list(spec.compressors)}
    # An anchored method draws its step over its search anchor (Space._anchor): narrow that range.
    anchor = space._anchor(cand.method, cand.compressor)
    key, unit, (lo, hi) = ("step_range", t.step_size, spec.step_range) if anchor is None else \
        ("anchor_range", *anchor)
    m = cand.step_size / unit
    out[key] = (max(lo, min(m / 4, hi)), min(hi, max(m * 4, lo)))
    if cand.method in SYNCED and cand.sync_probability:
        s = cand.sync_probability / t.sync_probability
        out["sync_range"] = (max(spec.sync_range[0], min(s / 3, spec.sync_range[1])),
                             min(spec.sync_range[1], max(s * 3, spec.sync_range[0])))
    return out


def retune(job_path, *, previous, output, **kwargs) -> RetuneResult:
    """Retune on tonight's data against the config in use; see the module docstring.

    Every output path and the storage URL are checked first (exit 2); the run folder is held
    locked (exit 8 while another process holds it) from the search to the last file written."""
    from .job import load_job
    from .paths import check_folder

    previous, output = Path(previous), Path(output)
    run_dir = Path(kwargs["run_dir"]) if kwargs.get("run_dir") else output.parent / f"{output.stem}.run"
    storage_url = kwargs.get("storage") or str(run_dir / "study.journal")
    check_paths(load_job(job_path), output=output, run_dir=run_dir, report_dir=kwargs.get("report_dir"),
                storage_url=storage_url, previous=previous)
    if kwargs.get("history") is not None:
        check_folder(kwargs["history"], key="--history")
    kwargs["lock"] = lambda log: hold_run_dir(run_dir, storage_url, log)
    return _retune(job_path, previous=previous, output=output, **kwargs)


def _retune(job_path, *, previous, output, lock, trials: int | None = None, jobs: int | None = None,
           seed: int | None = None, run_dir=None, storage: str | None = None, history=None,
           margin: float = MARGIN, level: float = LEVEL, drift_threshold: float = DRIFT_THRESHOLD,
           report_dir=None, allow_code: bool = False, progress=None) -> RetuneResult:
    previous, output = Path(previous), Path(output)
    prev = load_config(previous)
    if "constants" not in prev.extra:
        raise InputError("--previous: the config has no constants section (write it with bittune tune)")
    run_dir = Path(run_dir) if run_dir else output.parent / f"{output.stem}.run"
    storage_url = storage or str(run_dir / "study.journal")
    log = progress or Progress(total=trials or 0)
    first = prepare(job_path, {"jobs": jobs, "seed": seed}, log, allow_code=allow_code)
    ws, spec = first.ws, first.job.search
    dims = (prev.dimension or -1, ws.problem.dim)
    workers = (prev.workers or -1, ws.problem.n_workers)
    current = first.constants.to_dict()
    current["samples"] = int(ws.problem.worker_sizes.sum())
    drift = drift_table(prev.extra["constants"], current, dimension=dims, workers=workers)
    new_problem = dims[0] != dims[1] or workers[0] != workers[1]
    size = drift_size(drift)
    prev_cand = _candidate(prev)
    if new_problem:
        log.note(f"drift: the problem changed (dimension {dims[0]} -> {dims[1]}, workers {workers[0]} -> "
                 f"{workers[1]}): a new problem, full tuning")
        overrides, warm_cands = {"trials": trials or spec.trials}, []
    else:
        small = size <= drift_threshold
        log.note(f"drift: largest change {size:.0%} ({'small: narrowed search' if small else 'large: full ranges'})")
        overrides = {"trials": trials or max(10, spec.trials // 3)}
        if small and prev_cand.method in first.space.methods:
            overrides.update(_narrowed(spec, prev_cand, first.space))
        warm_cands = [prev_cand] + _previous_best(prev, previous)
    prep = respace(first, overrides)
    log.total, log.unit = prep.job.search.trials, objective_unit(prep.job)
    warm = _warm_params(prep.space, warm_cands)
    store = check_existing_study(prep.job, storage_url)  # before the run folder's lock file is made
    with lock(log):
        study = run_search(prep, run_dir=run_dir, storage_url=storage_url, log=log, warm=warm, store=store)
        log.note("select: validating tonight's best and the previous config on the same fresh seeds")
        selection = select(ws, prep.space, study, prep.network, log=log)
        if new_problem:
            decision, reason, p = ("replaced", "new problem (dimension or worker count changed)", math.nan)
            old_eval = None
            if not selection.all_reached:
                decision, reason = "failed", "new problem and no candidate reaches the target on every fresh seed"
        else:
            old_eval = evaluate(ws, [prev_cand], selection.seeds, prep.network)[0]
            decision, reason, p = decide(selection.winner, old_eval, margin=margin, level=level)
            log.note(f"select: on the {len(selection.seeds)} fresh seeds tonight's best needs "
                     f"{selection.winner.mean_cost:,.4g} {objective_unit(prep.job)} (the search's best above is "
                     f"on the search seeds), the previous config {old_eval.mean_cost:,.4g}")
        section = {
            "decision": decision, "reason": reason, "p_value": None if math.isnan(p) else p,
            "margin": margin, "level": level, "drift_size": size, "new_problem": new_problem,
            "drift": drift, "trials": trial_counts(study),
            "new": selection.winner.summary(), "previous": None if old_eval is None else old_eval.summary(),
            "previous_config": str(previous.absolute()), "time_utc": _now(),
        }
        if ws.reference is not None:  # a loss gap: f_ref is found again on tonight's data (the previous is shown)
            old = prev.extra["constants"].get("f_ref") if isinstance(prev.extra["constants"], dict) else None
            section["f_ref"] = {"previous": old.get("value") if isinstance(old, dict) else None,
                                "current": ws.loss_ref, "note": ws.reference["note"]}
        if decision == "replaced":
            doc = _config_doc(prep, selection, study.study_name, storage_url, output)
        else:
            doc = config_to_dict(prev)
            doc.pop("retune", None)
        doc["retune"] = _plain(section)
        code = {"replaced": EXIT["ok"], "kept": EXIT["kept_previous"], "failed": EXIT["no_candidate"]}[decision]
        same_file = output.absolute() == previous.absolute()
        written = None
        if not (decision != "replaced" and same_file):
            write_config(output, doc)
            written = output
        write_summary(run_dir, prep=prep, output=output, selection=selection, study=study.study_name,
                      storage=storage_url, extra={"retune": _plain(section)})
        paths = write_report(run_dir, out_dir=report_dir, drift=_plain(drift), extra_sections=[{
            "title": "Retune decision", "text": f"{decision}: {reason}",
            "rows": [dict(configuration=k, **{f: (v or {}).get(f) for f in ("method", "compressor", "step_size",
                                                                              "reached", "mean_bits_per_worker")})
                     for k, v in (("tonight", section["new"]), ("previous", section["previous"]))]}])
        log.note(f"report: {paths['html']}")
        if history is not None:
            _record_history(Path(history), doc, section)
        log.note(f"decision: {decision} ({reason})" + (f"; wrote {written}" if written else "; nothing written"))
        return RetuneResult(code, decision, doc, drift, written)


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


# ------------------------------------------------------------------- history
HISTORY_FIELDS = ("night", "decision", "method", "compressor", "step_size", "bits_per_worker", "previous_bits")


def _record_history(folder: Path, doc: dict, section: dict) -> Path:
    """Add one night: NAME.yaml (the config written or kept) and NAME.json (the summary); never overwrite."""
    from ._yaml import atomic_write_text

    folder.mkdir(parents=True, exist_ok=True)
    stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    base, n = f"{stamp}-{section['decision']}", 0
    while (folder / f"{base}.yaml").exists() or (folder / f"{base}.json").exists():
        n += 1
        base = f"{stamp}-{section['decision']}-{n}"
    write_config(folder / f"{base}.yaml", doc)
    prev = section.get("previous") or {}
    row = {"night": section["time_utc"], "decision": section["decision"], "method": doc["method"],
           "compressor": ":".join([doc["compressor"]["name"], *(str(v) for k, v in doc["compressor"].items()
                                                                if k != "name")]),
           "step_size": doc["step_size"],
           "bits_per_worker": (section["new"] if section["decision"] == "replaced" else prev or section["new"]
                               ).get("mean_bits_per_worker"),
           "previous_bits": prev.get("mean_bits_per_worker"), "reason": section["reason"]}
    atomic_write_text(folder / f"{base}.json", json.dumps(_plain(row), indent=1))
    return folder / f"{base}.json"


def history_rows(folder) -> list[dict]:
    """The nights recorded in a history folder, oldest first."""
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(f"history: not a folder: {folder}")
    rows = []
    for path in sorted(folder.glob("*.json")):
        try:
            rows.append(json.loads(path.read_text()))
        except (OSError, ValueError) as exc:
            raise InputError(f"{path}: not a history record ({exc})") from None
    return rows

