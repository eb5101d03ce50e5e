"""The main job: probe, theory, search, select, write the config.

``tune`` runs every stage of docs/design.md's data flow in order and writes the
config atomically. Parallel trials run in ``jobs`` processes (joblib), each
with its own sampler seed from ``SeedSequence(seed).spawn`` and
single-threaded numerics, all sharing one Optuna storage; a killed run
restarted with the same run directory resumes from that storage.
"""

from __future__ import annotations

import datetime as _dt
import os
import re
import threading
import time
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import optuna
from optuna.trial import TrialState

from . import __version__
from .config import SEED_DIGITS, UNITS, sig, write_config
from .errors import EXIT, InputError
from .front import FRONT_SIZE, PREFER_RULES
from .job import Job, data_digest, load_job
from .probe import probe_workspace
from .progress import Progress
from .report import write_report
from .search import (COUNTED, FRONT_DIRECTIONS, Objective, Space, enqueue_seeds, fail_stale_trials, link_kwargs,
                     mask_url, open_storage, open_study, run_trials, search_seeds, trial_value)
from .select import GAIN_RESAMPLES, Selection, select, transfer_entry
from .workspace import open_job

__all__ = ["TuneResult", "tune", "study_name", "check_study_name", "STUDY_NAME", "worker_main"]


@dataclass
class TuneResult:
    exit_code: int
    config: dict
    selection: Selection
    study_name: str
    storage: str
    trials: dict
    report: dict | None = None  # paths written by the report


def objective_unit(job: Job) -> str:
    """How a trial's value reads in progress lines."""
    return "s simulated" if job.objective == "seconds" else "bits/worker"  # front: its first objective, bits


def study_name(job: Job) -> str:
    """A study belongs to one job file and one data file."""
    return f"bittune-{job.digest[:10]}-{data_digest(job)[:10]}"


#: A study name a scheduler may fix (``tune --study NAME``): letters, digits, '.', '_', '-',
#: starting with a letter or digit, at most 128 characters (safe in a shell line, a file name
#: and Optuna's database column; our own rule).
STUDY_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,127}")


def check_study_name(name: str) -> str:
    """``name`` if it is a sane study name, else InputError naming ``--study``."""
    if not isinstance(name, str) or not STUDY_NAME.fullmatch(name):
        shown = repr(name) if not isinstance(name, str) or len(name) <= 40 else repr(name[:37] + "...")
        why = "is empty" if name == "" else ("is longer than 128 characters" if isinstance(name, str)
                                             and len(name) > 128 else "has characters other than letters, "
                                             "digits, '.', '_' and '-' (or does not start with a letter or digit)")
        raise InputError(f"--study: the study name {why}, got {shown}")
    return name


@dataclass
class Prepared:
    """The stages before the search: job, problem, probe, theory-relative space."""

    job: Job
    ws: object
    constants: object
    report: object
    space: Space
    overrides: dict
    network: object = None  # NetworkModel for the objective "seconds"


def apply_overrides(job: Job, overrides: dict) -> Job:
    """Command-line and retune changes to the job's search settings."""
    from dataclasses import replace

    from .job import MAX_JOBS

    for key in ("trials", "jobs", "seed"):
        value = overrides.get(key)
        if value is not None and value < (0 if key == "seed" else 1):
            raise InputError(f"--{key}: must be an integer >= {0 if key == 'seed' else 1}, got {value}")
    if overrides.get("jobs") is not None and overrides["jobs"] > MAX_JOBS:
        raise InputError(f"--jobs: at most {MAX_JOBS} processes, got {overrides['jobs']}")
    job = replace(job, search=replace(job.search, **overrides)) if overrides else job
    if job.search.jobs > job.search.trials:  # more processes than trials would only sit idle
        job = replace(job, search=replace(job.search, jobs=job.search.trials))
    return job


def prepare(job_path, overrides: dict, log, *, allow_code: bool = False) -> Prepared:
    """Load the job, build the problem, run the probe (exit 3 on a bad gradient), build the space."""
    from dataclasses import replace

    optuna.logging.set_verbosity(optuna.logging.WARNING)  # our own progress lines instead
    overrides = {k: v for k, v in overrides.items() if v is not None}
    job = replace(apply_overrides(load_job(job_path), overrides), allow_code=allow_code)
    ws = open_job(job)
    log.note(f"problem: {ws.problem.n_workers} workers, d = {ws.problem.dim}, "
             f"{int(ws.problem.worker_sizes.sum())} samples; target {ws.target_text()}")
    if ws.reference is not None:
        r = ws.reference
        log.note(f"f_ref = {r['value']:.10g} by L-BFGS-B ({r['iterations']} iterations, {r['message']}; "
                 f"||grad f||^2 = {r['grad_norm_sq']:.3g} there): {r['note']}")
    constants, report = probe_workspace(ws)
    if ws.reference is not None:  # stored with the probe's constants: workers and reports reuse it
        constants.extra["f_ref"] = dict(ws.reference)
    log.note(f"probe: gradient check passed (max rel. error {report.gradient_check.max_rel_error:.1e}); "
             f"L = {constants.L:.4g}, L_qm = {constants.L_qm:.4g}, L_pm = {constants.L_pm:.4g} "
             f"({report.oracle_calls} oracle calls, {report.seconds:.1f} s)")
    vectors, _ = ws.problem.local_grads(report.points)
    space = Space(job.search, constants, target=ws.theory_target(constants.L), contraction_vectors=vectors)
    link_kwargs(ws.problem, None, job.downlink)  # a downlink k above d: exit 2 before any trial
    return Prepared(job, ws, constants, report, space, overrides, network_model(job, ws))



def network_model(job: Job, ws):
    """The job's network model when it minimises seconds or a front (compute time measured if not given)."""
    if job.objective not in ("seconds", "front"):
        return None
    from .cost import NetworkModel, measure_compute_seconds

    net = job.network
    compute = net.compute_seconds
    if compute is None:
        compute = measure_compute_seconds(ws.problem, ws.x0)
    workers = None
    if net.workers is not None:  # uneven: a missing compute time is the measured one times its factor
        workers = tuple((w["latency"], w["uplink_bandwidth"],
                         compute * w["compute_scale"] if w["compute_seconds"] is None else w["compute_seconds"])
                        for w in net.workers)
    return NetworkModel(latency=net.latency, uplink_bandwidth=net.uplink_bandwidth,
                        downlink_bandwidth=net.downlink_bandwidth, compute_seconds=compute, workers=workers)


def respace(prep: Prepared, overrides: dict) -> Prepared:
    """The same problem and probe with other search settings (no second probe)."""
    overrides = {**prep.overrides, **{k: v for k, v in overrides.items() if v is not None}}
    job = apply_overrides(prep.job, overrides)
    vectors, _ = prep.ws.problem.local_grads(prep.report.points)
    space = Space(job.search, prep.constants, target=prep.ws.theory_target(prep.constants.L),
                  contraction_vectors=vectors)
    return Prepared(job, prep.ws, prep.constants, prep.report, space, overrides, prep.network)


def check_existing_study(job: Job, storage_url: str, name: str | None = None):
    """Refuse (exit 2) a study of that name (``tune --study``; None: :func:`study_name`) that exists
    for another job or data file, before anything is written; returns the opened storage, or None
    when there is nothing to check yet (no journal file)."""
    key = "storage" if name is None else "--study"
    name = study_name(job) if name is None else name
    if not ("://" in storage_url or Path(storage_url).is_file()):
        return None
    store = open_storage(storage_url)
    try:
        _check_study(optuna.load_study(study_name=name, storage=store), job, key=key, write=False)
    except KeyError:
        pass
    return store


def run_search(prep: Prepared, *, run_dir: Path, storage_url: str, log, warm: list[dict] | None = None,
               workers_only: bool = False, name: str | None = None, store=None):
    """Create or resume the study, enqueue warm-start and theory seeds, run the trials; returns the study.

    With ``workers_only`` no trial runs here: ``bittune worker`` processes (on
    this or other machines) run them, and this waits until the budget is spent.
    ``name`` is the study's name (``tune --study``); None: :func:`study_name`. ``store``: the
    storage :func:`check_existing_study` opened (callers check before they lock the run folder).
    """
    job, spec, space = prep.job, prep.job.search, prep.space
    key = "storage" if name is None else "--study"
    name = study_name(job) if name is None else name
    # Inputs are valid and the model passed its check: only now touch the disk.
    run_dir.mkdir(parents=True, exist_ok=True)
    store = store or open_storage(storage_url)
    directions = list(FRONT_DIRECTIONS) if job.objective == "front" else ["minimize"]
    study = optuna.create_study(study_name=name, storage=store, directions=directions, load_if_exists=True)
    _check_study(study, job, key=key)
    if "://" not in storage_url:  # one machine: whatever is RUNNING was left by a killed run
        stale = fail_stale_trials(study)
        if stale:
            log.note(f"resume: {stale} trial(s) left running by a stopped run marked failed")
    # (database storages rely on heartbeats instead: other machines may be running trials now)
    if not study.user_attrs.get("seeded"):
        for params in warm or []:
            study.enqueue_trial(params, user_attrs={"warm_start": True})
    seeded = enqueue_seeds(study, space)
    if seeded:
        log.note(f"search: {len(warm or [])} warm-start and {seeded} theory seed points enqueued; "
                 f"{spec.trials} trials, {spec.jobs} process(es)")
    else:
        done = len(study.get_trials(deepcopy=False, states=COUNTED))
        log.note(f"resume: {done} trial(s) already done of {spec.trials}")
    study.set_user_attr("constants", _plain(prep.constants.to_dict()))
    study.set_user_attr("probe_points", _plain(prep.report.points.tolist()))
    study.set_user_attr("network", None if prep.network is None else prep.network.to_dict())
    study.set_user_attr("budget", spec.trials)
    study.set_user_attr("search_overrides", _plain(prep.overrides))

    seeds = np.random.SeedSequence(spec.seed).spawn(spec.jobs)
    sampler_seeds = [int(s.generate_state(1)[0]) for s in seeds]
    watcher = _Watcher(study, log, spec.trials)
    watcher.start()
    try:
        if workers_only:
            log.note(f"waiting for workers: bittune worker --job {job.path} --storage {mask_url(storage_url)} "
                     f"--study {name}")
            _wait_for_budget(study, spec.trials)
        elif spec.jobs == 1:
            ws = prep.ws
            objective = Objective(problem=ws.problem, space=space, x0=ws.x0, target=ws.target,
                                  max_rounds=job.budget.max_rounds, max_bits=job.budget.max_bits_per_worker,
                                  seeds=search_seeds(spec), worker=0, network=prep.network, loss_ref=ws.loss_ref,
                                  precision=job.engine.precision, front=job.objective == "front",
                                  downlink=job.downlink, minibatch=job.minibatch)
            run_trials(open_study(store, name, sampler_seed=sampler_seeds[0], pruner=spec.pruner), objective,
                       budget=spec.trials)
        else:
            from joblib import Parallel, delayed

            Parallel(n_jobs=spec.jobs, backend="loky")(
                delayed(worker_main)(str(job.path), storage_url, name, spec.trials, sampler_seeds[i], i,
                                     prep.overrides, job.allow_code)
                for i in range(spec.jobs))
    finally:
        watcher.stop()
    return study


def _wait_for_budget(study, budget: int, poll: float = 1.0) -> None:
    """Wait until the workers have finished the budget, recovering trials of crashed machines."""
    from .search import recover_stale_trials

    while True:
        finished = study.get_trials(deepcopy=False, states=(TrialState.COMPLETE, TrialState.PRUNED))
        if len(finished) >= budget:
            return
        time.sleep(poll)
        recover_stale_trials(study)


def tune(job_path, *, output, trials: int | None = None, jobs: int | None = None, seed: int | None = None,
         run_dir=None, storage: str | None = None, report_dir=None, workers_only: bool = False,
         allow_code: bool = False, progress=None, study: str | None = None) -> TuneResult:
    """Tune the job and write the config to ``output`` and the report (default: RUN_DIR/report).

    ``study`` fixes the study's name (``--study``, e.g. for a scheduler that starts the
    workers itself); None makes one from the job and data digests (:func:`study_name`).
    """
    if study is not None:
        check_study_name(study)
    output = Path(output)
    run_dir = Path(run_dir) if run_dir else output.parent / f"{output.stem}.run"
    storage_url = storage or str(run_dir / "study.journal")
    job0 = load_job(job_path)
    check_paths(job0, output=output, run_dir=run_dir, report_dir=report_dir, storage_url=storage_url)
    log = progress or Progress(total=trials or job0.search.trials, unit=objective_unit(job0))
    prep = prepare(job_path, {"trials": trials, "jobs": jobs, "seed": seed}, log, allow_code=allow_code)
    store = check_existing_study(prep.job, storage_url, study)  # before the run folder's lock file is made
    with hold_run_dir(run_dir, storage_url, log):
        study = run_search(prep, run_dir=run_dir, storage_url=storage_url, log=log, workers_only=workers_only,
                           name=study, store=store)
        log.note("select: validating the best candidates on fresh seeds")
        selection = select(prep.ws, prep.space, study, prep.network, log=log)
        config = _config_doc(prep, selection, study.study_name, storage_url, output)
        write_config(output, config)
        write_summary(run_dir, prep=prep, output=output, selection=selection, study=study.study_name,
                      storage=storage_url)
        try:
            paths = write_report(run_dir, out_dir=report_dir)
        except OSError as exc:
            from ._yaml import NO_SPACE
            from .errors import WriteError

            if exc.errno not in NO_SPACE:
                raise
            raise WriteError(f"{Path(report_dir) if report_dir else run_dir / 'report'}: cannot write the report "
                             f"({os.strerror(exc.errno)}); the config {output} is written and complete") from None
    log.note(f"report: {paths['html']}")
    code = EXIT["ok"] if selection.all_reached else EXIT["no_candidate"]
    log.note(f"wrote {output}" + ("" if selection.all_reached else " (best effort: no candidate reached the "
                                                                     "target on every fresh seed)"))
    return TuneResult(code, config, selection, study.study_name, storage_url, trial_counts(study), paths)


def check_paths(job: Job, *, output: Path, run_dir: Path, report_dir, storage_url: str,
                previous=None, key: str = "-o") -> None:
    """Every path a tune or retune writes, and its storage URL, checked before anything runs (exit 2)."""
    from .paths import check_folder, check_output, job_inputs
    from .storage import check_url

    inputs = job_inputs(job) + ([Path(previous)] if previous else [])
    check_output(output, key=key, kind="config", inputs=inputs, allow=[previous] if previous else [])
    check_folder(run_dir, key="--run-dir")
    if report_dir:
        check_folder(report_dir, key="--report")
    check_url(storage_url)


@contextmanager
def hold_run_dir(run_dir: Path, storage_url: str, log):
    """Create the run folder and hold its lock (a second tune there exits busy, code 8); a journal
    lock a killed run left behind is cleared, since no other bittune process can hold it now."""
    from .storage import RunLock, clear_stale_journal_lock

    created = not run_dir.exists()
    run_dir.mkdir(parents=True, exist_ok=True)
    try:
        with RunLock(run_dir):
            clear_stale_journal_lock(storage_url, log)
            yield
    except BaseException:
        # e.g. an unreachable database: a run folder this call made and nothing used is not left behind
        if created and {p.name for p in run_dir.iterdir()} <= {RunLock.NAME}:
            import shutil

            shutil.rmtree(run_dir, ignore_errors=True)
        raise


def trial_counts(study) -> dict:
    return {s.name.lower(): len(study.get_trials(deepcopy=False, states=(s,)))
            for s in (TrialState.COMPLETE, TrialState.PRUNED, TrialState.FAIL)}


def worker_main(job_path: str, storage_url: str, name: str, budget: int | None = None,
                sampler_seed: int | None = None, index: int = 0, overrides: dict | None = None,
                allow_code: bool = False) -> int:
    """One worker process (``--jobs`` or ``bittune worker``): rebuild the problem, read the probe's
    constants, search settings and budget from the study, run trials until the budget is spent."""
    from threadpoolctl import threadpool_limits

    from .constants import Constants
    from .cost import NetworkModel
    from .problems import _shards

    optuna.logging.set_verbosity(optuna.logging.WARNING)
    _shards.set_threads(1)  # the processes already fill the cores
    with threadpool_limits(1):
        job = load_job(job_path)
        from .storage import check_url

        check_url(storage_url, must_exist=True)  # a worker joins a study: it creates no storage
        store = open_storage(storage_url)
        try:
            probe = optuna.load_study(study_name=name, storage=store)
        except KeyError:
            raise InputError(f"--study: no study named {name!r} in {mask_url(storage_url)}") from None
        attrs = probe.user_attrs
        _check_study(probe, job, key="--study", write=False)  # this job file and this data
        if "constants" not in attrs:
            raise InputError(f"--study: study {name!r} has no probe constants yet (start the coordinator first)")
        overrides = attrs.get("search_overrides", {}) if overrides is None else overrides
        from dataclasses import replace

        job = replace(apply_overrides(job, overrides), allow_code=allow_code)
        constants = Constants.from_dict(attrs["constants"])
        # A loss-gap target's f_ref comes from the study (found once by the coordinator), not
        # recomputed: every process then stops at the same level.
        ws = open_job(job, reference=constants.extra.get("f_ref"))
        if sampler_seed is None:
            sampler_seed = int(np.random.SeedSequence().generate_state(1)[0])  # fresh entropy per worker
        study = open_study(store, name, sampler_seed=sampler_seed, pruner=job.search.pruner)
        # Same space as the coordinator's: constants and probe points from the study.
        vectors, _ = ws.problem.local_grads(np.asarray(attrs["probe_points"]))
        space = Space(job.search, constants, target=ws.theory_target(constants.L), contraction_vectors=vectors)
        net = attrs.get("network")
        network = None if net is None else NetworkModel(**net)
        objective = Objective(problem=ws.problem, space=space, x0=ws.x0, target=ws.target,
                              max_rounds=job.budget.max_rounds, max_bits=job.budget.max_bits_per_worker,
                              seeds=search_seeds(job.search), worker=index, network=network, loss_ref=ws.loss_ref,
                              precision=job.engine.precision, front=job.objective == "front",
                              downlink=job.downlink, minibatch=job.minibatch)
        return run_trials(study, objective, budget=budget or int(attrs.get("budget", job.search.trials)))


SUMMARY = "summary.json"
#: Curves in the summary keep at most this many points per seed (thinned evenly, ends kept).
CURVE_POINTS = 400


def trajectory_curves(runs, *, loss_gap: bool) -> list[dict]:
    """Each run's curves as the summary keeps them: at most CURVE_POINTS rounds (evenly thinned,
    first and last kept), with the cumulative uplink and downlink bits and gradient passes the
    report's seconds curves are computed from (cost.NetworkModel.seconds_curve)."""
    out = []
    for r in runs:
        keep = np.unique(np.linspace(0, len(r.grad_norm_sq) - 1, min(CURVE_POINTS, len(r.grad_norm_sq)))
                         .round().astype(int))
        out.append({"seed": r.seed, "status": r.status, "rounds": keep.tolist(),
                    "uplink_bits": r.uplink_curve[keep].tolist(), "downlink_bits": r.downlink_curve[keep].tolist(),
                    "gradient_passes": r.passes_curve[keep].tolist(), "grad_norm_sq": r.grad_norm_sq[keep].tolist()})
        if loss_gap:
            out[-1]["loss_gap"] = r.progress[keep].tolist()  # f(x^k) - f_ref
        if r.seconds_curve is not None:  # an uneven network: the engine's round-by-round seconds
            out[-1]["seconds"] = r.seconds_curve[keep].tolist()
            out[-1]["worker_shares"] = r.worker_shares.tolist()
    return out


def write_summary(run_dir: Path, *, prep: Prepared, output: Path, selection: Selection, study: str,
                  storage: str, extra: dict | None = None) -> Path:
    """Everything the report needs that is not in the study: one JSON file in the run folder."""
    import json

    from ._yaml import atomic_write_text
    from .storage import without_secrets

    ws, job, constants, report, space = prep.ws, prep.job, prep.constants, prep.report, prep.space

    def curves(evaluation):
        return trajectory_curves(evaluation.runs, loss_gap=ws.reference is not None)

    rows = []
    for method in space.methods:
        comps = [c for name in space.compressors[method] for c in space.density_options(name, 6)]
        best = space.theory_density(method)  # the baseline's setting, which a coarse grid may miss
        comps += [] if best in comps else [best]
        rows += [space.theory(method, comp).to_dict() for comp in comps]
    if ws.reference is not None:  # no published non-convex rate to a loss gap: steps only, unless a PL
        # rule (assume.pl_mu) predicted the gap itself (theory._pl_rounds)
        rows = [r if "linear_rate" in r else {**r, "predicted_rounds": None, "predicted_bits_per_worker": None}
                for r in rows]
    gc = report.gradient_check
    doc = {
        "bittune_summary": 1,
        "job": str(job.path), "config": str(Path(output).absolute()), "study": study, "storage": without_secrets(storage),
        "problem": ws.summary(), "target": ws.target_doc(),
        "target_grad_norm_sq": float(ws.target) if ws.reference is None else None,
        "constants": constants.to_dict(),
        "probe": {"max_rel_error": gc.max_rel_error, "passed": gc.passed, "tolerance": gc.threshold,
                  "oracle_calls": report.oracle_calls, "seconds": report.seconds},
        "theory": rows,
        "search": {"methods": list(space.methods), "seeds": search_seeds(job.search),
                   "step_range": list(job.search.step_range), "trials": job.search.trials},
        "selection": {
            "seeds": selection.seeds,
            "winner": selection.winner.summary(), "baseline": selection.baseline.summary(),
            "finalists": [e.summary() for e in selection.finalists],
            "backoff": [e.summary() for e in selection.backoff],
            "gain_over_theory": selection.gain(), "all_reached": selection.all_reached,
            "gd": None if selection.gd is None else selection.gd.summary(),
            "gd_ladder": [e.summary() for e in selection.gd_ladder],
            "gains": {k: g.to_dict() for k, g in selection.gains(job.search.seed).items()},
            "transfer": [transfer_entry(e, r) for e, r in zip(selection.finalists, selection.resampled)],
            "front": [dict(e.summary(), chosen=e is selection.chosen) for e in selection.front],
            "front_finalists": [e.summary() for e in selection.finalists] if selection.front else [],
            "prefer": selection.prefer,
        },
        "curves": {"winner": curves(selection.winner), "baseline": curves(selection.baseline),
                   **({} if selection.gd is None else {"gd": curves(selection.gd)})},
        # objective seconds: the network model the search costed trials with (the report's seconds curves)
        "network": None if prep.network is None else prep.network.to_dict(),
        **(extra or {}),
    }
    path = Path(run_dir) / SUMMARY
    atomic_write_text(path, json.dumps(_plain(doc), indent=1, allow_nan=True))
    return path


def _check_study(study: optuna.Study, job: Job, *, key: str = "storage", write: bool = True) -> None:
    """A study is resumed or joined only by the job file and data it was made for (exit 2 otherwise,
    naming ``key``: ``--study`` when the user chose the name); ``write`` records both digests."""
    want = len(FRONT_DIRECTIONS) if job.objective == "front" else 1
    if any(d != optuna.study.StudyDirection.MINIMIZE for d in study.directions):
        raise InputError(f"{key}: study {study.study_name!r} exists and maximises; bittune's studies minimise bits")
    if len(study.directions) != want:
        raise InputError(f"{key}: study {study.study_name!r} exists with {len(study.directions)} objective(s); "
                         f"this job's objective {job.objective} has {want}")
    hint = "; choose another --study name" if key == "--study" else ""
    for attr, mine, what in (("job_digest", job.digest, "job file"), ("data_digest", data_digest(job), "data file")):
        digest = study.user_attrs.get(attr)
        if digest is None:
            if write:
                study.set_user_attr(attr, mine)
        elif digest != mine:
            raise InputError(f"{key}: study {study.study_name!r} exists and belongs to another {what} "
                             f"(digest {digest[:12]}, this job's {mine[:12]}){hint}")


def _relative(path, base: Path) -> str:
    """``path`` relative to the folder ``base`` (a config's folder), as a POSIX-style string."""
    import os

    return Path(os.path.relpath(Path(path).absolute(), Path(base).absolute())).as_posix()


def _config_doc(prep: Prepared, sel: Selection, name: str, storage: str, output: Path | None = None) -> dict:
    ws, job, constants, spec = prep.ws, prep.job, prep.constants, prep.job.search
    w, b = sel.winner.summary(), sel.baseline.summary()
    doc = {"bittune_config": 1, **sel.winner.candidate.to_config(), "precision": job.engine.precision,
           "problem": {"dimension": int(ws.problem.dim), "workers": int(ws.problem.n_workers)}}
    doc["target"] = ws.target_doc()  # the kind, the job's value, the absolute threshold (and f_ref)
    doc["expected"] = {
        "validation_seeds": sel.seeds,
        "reached_all": bool(sel.all_reached),
        # Figures rounded for reading. Per-seed bits keep SEED_DIGITS digits (they are fractions only
        # because they are means over the workers); rounds are counts and stay exact.
        "mean_bits_per_worker": sig(w["mean_bits_per_worker"]), "std_bits_per_worker": sig(w["std_bits_per_worker"]),
        "mean_rounds": sig(w["mean_rounds"]), "std_rounds": sig(w["std_rounds"]),
        "bits_per_worker": sig(w["bits_per_worker"], SEED_DIGITS), "rounds": w["rounds"],
        "mean_gradient_evals_per_worker": sig(w["mean_gradient_evals_per_worker"]),
        "theory_baseline": {k: (b[k] if k in ("step_size", "sync_probability", "shift_rate") else sig(b[k]))
                            for k in ("method", "compressor", "step_size", "sync_probability", "shift_rate",
                                      "reached", "mean_bits_per_worker", "std_bits_per_worker", "mean_rounds")},
        "objective": job.objective,
        "gain_over_theory": sig(sel.gain()),
        "gain_is_lower_bound": not sel.baseline.all_reached,
        **({"target_grad_norm_sq": float(ws.target)} if ws.reference is None
           else {"target_loss_gap": float(ws.target), "f_ref": ws.loss_ref}),
    }
    if prep.network is not None:
        doc["expected"].update(mean_seconds=sig(w["mean_seconds"]), std_seconds=sig(w["std_seconds"]),
                               seconds=w["seconds"], network=prep.network.to_dict())
        doc["expected"]["theory_baseline"]["mean_seconds"] = sig(b["mean_seconds"])
    if sel.winner_resample is not None:
        doc["expected"]["transfer_ratio"] = sig(transfer_entry(sel.winner, sel.winner_resample)["transfer_ratio"])
    if "worker_shares" in w:  # an uneven network (docs/design.md, "Round time with uneven workers")
        doc["network_shares"] = {
            "slowest_share": sig(w["worker_shares"]),
            "note": "per worker, the fraction of the chosen run's simulated seconds in rounds where it was the "
                    "slowest worker the server waited for (mean over expected.validation_seeds)"}
    if job.downlink is not None:  # EF21-BC (docs/theory.md §2.11)
        doc["downlink"] = {"compressor": dict(job.downlink),
                           "mean_bits_per_worker": sig(w["mean_downlink_bits_per_worker"])}
    if job.minibatch is not None:  # stochastic gradients (docs/theory.md §2.12); replay reads minibatch
        doc["gradients"] = {
            "minibatch": int(job.minibatch),
            "noise_variance": sig(constants.noise_variance), "noise_variance_x0": sig(constants.noise_variance0),
            "note": "every worker draws minibatch rows of its shard with replacement per gradient evaluation; "
                    "noise_variance: the variance of one worker's minibatch gradient (mean over workers), the "
                    "largest over the probe points (x0 and along its runs)"}
    if sel.gd is not None:
        doc["baseline"] = _gd_section(sel, prep)
    doc["gains"] = {"objective": job.objective, "validation_seeds": len(sel.seeds),
                    **{k: {kk: sig(vv) for kk, vv in g.to_dict().items()} for k, g in sel.gains(spec.seed).items()},
                    "interval_method": f"paired percentile bootstrap over the validation seeds, {GAIN_RESAMPLES} "
                                       f"resamples (Efron & Tibshirani 1993, ch. 13)"}
    if sel.resampled:
        doc["transfer"] = _transfer_section(sel)
    if job.objective == "front":
        doc["front"] = _front_section(sel)
    if not sel.all_reached:
        doc["best_effort"] = True
    c = constants.to_dict()
    doc["constants"] = {k: c[k] for k in ("L", "L_am", "L_qm", "L_max", "L_plus", "L_pm", "delta0",
                                          "grad_sq0", "heterogeneity0", "safety", "L_workers")}
    if c.get("L_sample") is not None:  # VR-MARINA's average smoothness
        doc["constants"]["L_sample"] = c["L_sample"]
    if c.get("pl_mu") is not None:  # stated by the job (assume.pl_mu), used by the theory baseline
        doc["constants"]["pl_mu"] = c["pl_mu"]
    if ws.reference is not None:
        doc["constants"]["f_ref"] = dict(ws.reference)  # value and how L-BFGS-B found it
    doc["constants"]["samples"] = int(ws.problem.worker_sizes.sum())
    doc["constants"]["worker_samples"] = [int(v) for v in ws.problem.worker_sizes]
    data_path = job.data.path
    # Paths relative to the config's folder (the config can move together with its job and data).
    here = Path(output).parent if output is not None else Path.cwd()
    store = mask_url(storage) if "://" in storage else _relative(storage, here)
    doc["provenance"] = {
        "bittune": __version__, "optuna": optuna.__version__,
        "time_utc": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "paths_relative_to": "the config file's folder",
        "job": _relative(job.path, here), "job_sha256": job.digest,
        "data": _relative(data_path, here), "data_sha256": data_digest(job),
        "study": name, "storage": store, "seed": int(spec.seed), "trials": int(spec.trials),
        "search_seeds": search_seeds(spec),
    }
    doc["units"] = {k: v for k, v in UNITS.items()
                    if k not in ("mean_seconds", "std_seconds", "seconds") or prep.network is not None}
    return _plain(doc)


def _transfer_section(sel: Selection) -> dict:
    """The transfer check: every finalist and the chosen config on the data resample (select.transfer_entry)."""
    def rounded(entry: dict) -> dict:
        return {k: sig(v) if k.endswith("ratio") else v for k, v in entry.items()}

    return {"note": "each worker's shard resampled with replacement (a bootstrap, seeded by provenance.seed), the "
                    "target redefined on it as in the job; the same expected.validation_seeds. Ratios: mean cost on "
                    "the resample / on the sample; a finalist that misses on the resample ranks after those that pass",
            "chosen": rounded(transfer_entry(sel.winner, sel.winner_resample)),
            "finalists": [rounded(transfer_entry(e, r)) for e, r in zip(sel.finalists, sel.resampled)]}


def _front_section(sel: Selection) -> dict:
    """The validated front: at most front.FRONT_SIZE settings with their mean bits and seconds on the fresh seeds."""
    moved = {id(e): r for e, r in zip(sel.finalists, sel.resampled)}
    points = []
    for e in sel.front:
        s = e.summary()
        point = {**e.candidate.to_config(), "mean_bits_per_worker": sig(s["mean_bits_per_worker"]),
                 "mean_seconds": sig(s["mean_seconds"]), "reached": s["reached"], "seeds": s["seeds"],
                 "chosen": e is sel.chosen}
        if id(e) in moved:
            t = transfer_entry(e, moved[id(e)])
            point.update(transfer_passed=t["passed"], transfer_ratio=sig(t["transfer_ratio"]))
        points.append(point)
    return {"prefer": sel.prefer, "rule": PREFER_RULES[sel.prefer],
            "note": f"the study's non-dominated trials validated on expected.validation_seeds; kept: those that "
                    f"reached the target on every seed and that no other dominates on (mean bits, mean seconds), at "
                    f"most {FRONT_SIZE}, by bits. The chosen point is listed as validated; the config's step is "
                    f"that point's after the back-off (expected holds its figures)",
            "points": points}



def _gd_section(sel: Selection, prep: Prepared) -> dict:
    """The tuned uncompressed baseline: its ladder on the search seeds, its best step on the fresh seeds."""
    g = sel.gd.summary()
    out = {"note": "uncompressed GD, its step tuned over the search's step ladder on the search seeds, then run "
                   "on expected.validation_seeds",
           "method": "gd", "compressor": g["compressor"], "step_size": g["step_size"],
           "step_mult": sig(sel.gd.candidate.step_mult), "reached": g["reached"],
           "mean_bits_per_worker": sig(g["mean_bits_per_worker"]), "std_bits_per_worker": sig(g["std_bits_per_worker"]),
           "mean_rounds": sig(g["mean_rounds"]), "bits_per_worker": sig(g["bits_per_worker"], SEED_DIGITS),
           "rounds": g["rounds"]}
    if prep.network is not None:
        out["mean_seconds"] = sig(g["mean_seconds"])
    out["ladder"] = [{"step_mult": sig(e.candidate.step_mult), "step_size": float(e.candidate.step_size),
                      "reached": int(sum(r.reached for r in e.runs)), "seeds": len(e.runs),
                      "mean_bits_per_worker": sig(e.mean_bits)} for e in sel.gd_ladder]
    out["ladder_seeds"] = "search seeds (provenance.search_seeds)"
    return out


def _plain(doc):
    if isinstance(doc, dict):
        return {k: _plain(v) for k, v in doc.items()}
    if isinstance(doc, (list, tuple)):
        return [_plain(v) for v in doc]
    if isinstance(doc, (np.floating, np.integer, np.bool_)):
        return doc.item()
    return doc


class _Watcher(threading.Thread):
    """Polls the study and reports progress while trials run (in this or other processes)."""

    def __init__(self, study, log, total: int, interval: float = 1.0):
        super().__init__(daemon=True)
        self.study, self.log, self.total, self.interval = study, log, total, interval
        self._stop_event = threading.Event()
        self._last = None

    def run(self) -> None:
        while not self._stop_event.wait(self.interval):
            self._poll()

    def stop(self) -> None:
        self._stop_event.set()
        self.join()
        self._poll()

    def _poll(self) -> None:
        try:
            trials = self.study.get_trials(deepcopy=False)
        except Exception:  # a storage hiccup must not kill the run; the next poll retries
            return
        done = sum(t.state in (TrialState.COMPLETE, TrialState.PRUNED) for t in trials)
        pruned = sum(t.state == TrialState.PRUNED for t in trials)
        failed = sum(t.state == TrialState.FAIL for t in trials)
        values = [trial_value(t) for t in trials if t.state == TrialState.COMPLETE
                  and t.user_attrs.get("reached") == len(t.user_attrs.get("status", [None]))]
        best = min(values) if values else None
        state = (done, best, pruned, failed)
        if state != self._last:
            self._last = state
            self.log.trials(done, best, pruned, failed)
