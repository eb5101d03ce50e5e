"""Command-line front end: one small function per command, each returning an exit code.

Logs and progress go to stderr; results go to stdout, as one JSON document
with ``--json`` (docs/design.md, "Commands and exit codes").
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import traceback
from pathlib import Path

import numpy as np

from . import __version__
from .errors import EXIT, BittuneError, InputError
from ._yaml import NO_SPACE
from .job import METHOD_NAMES
from .storage import redact

__all__ = ["main", "build_parser"]


def _load_job(args: argparse.Namespace):
    """The job file, with the --allow-code permission attached."""
    from dataclasses import replace

    from .job import load_job

    return replace(load_job(args.job), allow_code=bool(getattr(args, "allow_code", False)))


def _cmd_replay(args: argparse.Namespace) -> int:
    from .config import load_config, sig
    from .replay import check_not_swapped, config_seeds, replay, stored_reference, summarize
    from .workspace import open_job

    check_not_swapped(args.config, args.job)
    cfg = load_config(args.config)
    job = _load_job(args)
    ws = open_job(job, reference=stored_reference(cfg, job))  # f_ref of a loss gap: the config's if same job
    seeds = config_seeds(cfg) if args.seeds is None and args.seed is None else None
    if seeds is None:  # asked for, or a config without validation seeds: S..S+N-1 (default 0..4)
        first = 0 if args.seed is None else args.seed
        seeds = list(range(first, first + (5 if args.seeds is None else args.seeds)))
    runs = replay(ws, cfg, seeds=seeds, source=str(args.config))
    doc = summarize(runs, loss_ref=ws.loss_ref)
    doc["config"] = str(args.config)
    doc["problem"] = ws.summary()
    if args.json:
        _emit_json(doc)
    else:
        comp = cfg.compressor.get("name")
        print(f"{cfg.method} + {comp} {_params(cfg.compressor)} at step {cfg.step_size:g} on "
              f"{ws.problem.n_workers} workers, d = {ws.problem.dim}, "
              f"target {ws.target_text()}")
        if args.seeds is None and args.seed is None and seeds == config_seeds(cfg):
            print("seeds: the config's validation seeds (its `expected` figures); --seed/--seeds pick others")
        print(f"{'seed':>6} {'status':<9} {'rounds':>8} {'uplink bits/worker':>20}")
        for r in runs:
            print(f"{r.seed:>6} {r.status:<9} {r.rounds:>8} {r.uplink_bits:>20,.0f}")
        if "mean_bits_per_worker" in doc:  # rounded as a config's `expected` figures are (config.sig)
            print(f"reached on {doc['reached']} of {len(runs)} seeds; mean {sig(doc['mean_bits_per_worker']):,.0f} "
                  f"bits/worker (sd {sig(doc['std_bits_per_worker']):,.0f}), mean {sig(doc['mean_rounds']):g} rounds")
        else:
            print(f"reached on none of {len(runs)} seeds")
    return EXIT["ok"] if doc["all_reached"] else EXIT["no_candidate"]


def _cmd_probe(args: argparse.Namespace) -> int:
    from ._yaml import atomic_write_text, dump_yaml
    from .probe import probe_workspace
    from .workspace import open_job

    job = _load_job(args)
    if args.output:
        from .paths import check_output, job_inputs

        check_output(args.output, key="-o", kind="constants", inputs=job_inputs(job))
    ws = open_job(job)
    constants, report = probe_workspace(ws)
    doc = _probe_doc(ws, constants, report)
    if args.output:
        atomic_write_text(args.output, dump_yaml({"bittune_constants": 1, **doc}))
    if args.json:
        _emit_json(doc)
    else:
        _print_probe(ws, constants, report)
        if args.output:
            print(f"constants written to {args.output}")
    return EXIT["ok"]


def _probe_doc(ws, constants, report) -> dict:
    c = constants.to_dict()
    smooth = {k: c[k] for k in ("L", "L_workers", "L_am", "L_qm", "L_max", "L_plus", "L_pm")}
    bounds = None
    if constants.bound_L is not None:
        bw = np.asarray(constants.bound_L_workers)
        bounds = {"L": float(constants.bound_L), "L_workers": [float(v) for v in bw],
                  "L_am": float(bw.mean()), "L_qm": float(np.sqrt(np.mean(bw ** 2))), "L_max": float(bw.max())}
    gc = report.gradient_check
    return {
        "job": str(ws.job.path),
        "job_digest": ws.job.digest,
        "problem": ws.summary(),
        "smoothness": smooth,
        "closed_form_bounds": bounds,
        "safety": constants.safety,
        "delta0": constants.delta0,
        "grad_norm_sq0": constants.grad_sq0,
        "local_grad_norm_sq0": constants.local_grad_sq0,
        "heterogeneity0": constants.heterogeneity0,
        "gradient_check": {"max_rel_error": gc.max_rel_error, "passed": gc.passed,
                           "tolerance": gc.threshold, "worst_worker": int(gc.worst[0])},
        "cost": {"oracle_calls": report.oracle_calls, "seconds": report.seconds,
                 "probe_points": int(len(report.points)), "raised_to_secant": report.raised},
        "constants": c,
        # half of every worker's rows against all of them (None: the model has no per-sample rows)
        "sample_stability": report.sample_stability,
    }


def _print_probe(ws, constants, report) -> None:
    gc = report.gradient_check
    print(f"gradient check: largest relative error {gc.max_rel_error:.2e} over {gc.points} points x "
          f"{gc.directions} directions x {ws.problem.n_workers} workers (tolerance {gc.threshold:g}): "
          f"{'passed' if gc.passed else 'FAILED'}")
    has_bound = constants.bound_L is not None
    bw = np.asarray(constants.bound_L_workers) if has_bound else None
    print(f"\nsmoothness (local estimates x safety {constants.safety:g}" +
          ("; closed-form bounds beside)" if has_bound else ")"))
    rows = [("L (of f)", constants.L, constants.bound_L if has_bound else None),
            ("L_am", constants.L_am, float(bw.mean()) if has_bound else None),
            ("L_qm", constants.L_qm, float(np.sqrt(np.mean(bw ** 2))) if has_bound else None),
            ("L_max", constants.L_max, float(bw.max()) if has_bound else None),
            ("L_plus", constants.L_plus, None), ("L_pm", constants.L_pm, None)]
    print(f"  {'constant':<10} {'estimate':>10} {'bound':>10} {'ratio':>7}")
    for name, est, bound in rows:
        tail = f"{bound:>10.4g} {est / bound:>7.2f}" if bound else f"{'':>10} {'':>7}"
        print(f"  {name:<10} {est:>10.4g} {tail}")
    print(f"\n  {'worker':<10} {'L_i':>10} {'bound':>10} {'samples':>8}")
    for i, li in enumerate(constants.L_workers):
        b = f"{bw[i]:>10.4g}" if has_bound else f"{'':>10}"
        print(f"  {i:<10} {li:>10.4g} {b} {int(ws.problem.worker_sizes[i]):>8}")
    print(f"\nDelta0 = f(x0) - lower bound = {constants.delta0:.4g}; ||grad f(x0)||^2 = {constants.grad_sq0:.4g}; "
          f"heterogeneity (1/n) sum ||grad f_i - grad f||^2 = {constants.heterogeneity0:.4g}")
    print(f"probe cost: {report.oracle_calls} oracle calls on {len(report.points)} probe points, "
          f"{report.seconds:.2f} s; {report.raised} estimates raised to a secant ratio")
    if constants.minibatch is not None:  # docs/theory.md §2.12
        print(f"gradient noise (minibatch {constants.minibatch}, rows with replacement): sigma^2 = "
              f"{constants.noise_variance0:.4g} at x0, {constants.noise_variance:.4g} the largest over the probe "
              f"points (variance of one worker's minibatch gradient, mean over workers)")
    st = report.sample_stability
    if st is not None:
        moved = ", ".join(f"{k} {v:.3f}" if v is not None else f"{k} -" for k, v in st["ratio"].items())
        print(f"sample stability (half of each worker's rows / all rows, at {st['points']} points): {moved}; "
              f"{st['oracle_calls']} extra oracle calls, {st['seconds']:.2f} s (ratios near 1: the sample is "
              f"large enough)")


def _cmd_theory(args: argparse.Namespace) -> int:
    from .compressors import make_compressor
    from .probe import probe_workspace
    from .theory import theory_table
    from .workspace import open_job

    ws = open_job(_load_job(args))
    d = ws.problem.dim
    methods = tuple(args.method) if args.method else METHOD_NAMES
    if "vr_marina" in methods and not getattr(ws.problem, "has_samples", False):
        if args.method:
            raise InputError(f"--method vr_marina: the model {ws.job.model} has no per-sample gradients")
        methods = tuple(m for m in methods if m != "vr_marina")
    compressors = None
    if args.compressor:
        compressors = [make_compressor(spec, d, key="--compressor", n_workers=ws.problem.n_workers).label()
                       for spec in args.compressor]
    constants, report = probe_workspace(ws, sample_smoothness="vr_marina" in methods)
    grads, _ = ws.problem.local_grads(report.points)
    # A loss-gap target has no published non-convex rate: steps at the surrogate 2 L delta, no
    # predictions; the PL rules (assume.pl_mu) predict the gap itself (theory._pl_rounds).
    rows = theory_table(constants, target=ws.theory_target(constants.L), methods=methods, compressors=compressors,
                        contraction_vectors=grads)
    if not rows:
        raise InputError("--compressor: no compressor given fits the methods asked for "
                         "(gd takes identity; dcgd, diana, marina take unbiased compressors)")
    if args.json:
        docs = [r.to_dict() for r in rows]
        if ws.reference is not None:
            docs = [r if "linear_rate" in r else {**r, "predicted_rounds": None, "predicted_bits_per_worker": None}
                    for r in docs]
        _emit_json({"job": str(ws.job.path), "problem": ws.summary(), "target": ws.target_doc(),
                    "target_grad_norm_sq": ws.target if ws.reference is None else None, "rows": docs})
        return EXIT["ok"]
    if ws.reference is not None:
        print(f"a loss-gap target has no published non-convex rate: predicted rounds and bits only under "
              f"assume.pl_mu; {ws.reference['note']}")
    if constants.pl_mu is not None:
        print(f"under PL with mu = {constants.pl_mu:g} (assume.pl_mu): PL rules where published, rate = "
              f"1 - step mu per round")
    print(f"theory settings for {ws.problem.n_workers} workers, d = {d}, target {ws.target_text()} "
          f"(L = {constants.L:.4g}, L_qm = {constants.L_qm:.4g}, Delta0 = {constants.delta0:.4g})")
    pl = constants.pl_mu is not None
    print(f"{'method':<9} {'compressor':<16} {'step':>10} {'sync p':>8} {'shift':>7} {'rounds':>16} "
          f"{'bits/worker':>14}" + (f" {'rate':>10}" if pl else "") + "  source")
    for r in rows:
        p = f"{r.sync_probability:>8.3g}" if r.sync_probability is not None else f"{'':>8}"
        a = f"{r.shift_rate:>7.3g}" if r.shift_rate is not None else f"{'':>7}"
        if ws.reference is None or r.rate is not None:
            k, bits = f"{r.predicted_rounds:>16,}", f"{r.predicted_bits_per_worker:>14.4g}"
        else:
            k, bits = f"{'n/a':>16}", f"{'n/a':>14}"
        rate = "" if not pl else (f" {r.rate:>10.6g}" if r.rate is not None else f" {'-':>10}")
        print(f"{r.method:<9} {r.compressor:<16} {r.step_size:>10.4g} {p} {a} {k} {bits}{rate}  {r.source}")
    return EXIT["ok"]


def _cmd_tune(args: argparse.Namespace) -> int:
    from .compressors import spec_text
    from .tune import tune

    if args.workers_only and not args.storage:
        raise InputError("--workers-only: needs --storage (a database the workers can reach)")
    result = tune(args.job, output=args.output, trials=args.trials, jobs=args.jobs, seed=args.seed,
                  run_dir=args.run_dir, storage=args.storage, report_dir=args.report, workers_only=args.workers_only,
                  allow_code=args.allow_code, study=args.study)
    cfg, exp = result.config, result.config["expected"]
    if args.json:
        _emit_json({"config": str(args.output), "exit_code": result.exit_code, "study": result.study_name,
                    "storage": cfg["provenance"]["storage"], "trials": result.trials,
                    "method": cfg["method"], "compressor": cfg["compressor"], "step_size": cfg["step_size"],
                    "sync_probability": cfg.get("sync_probability"), "shift_rate": cfg.get("shift_rate"),
                    "expected": exp, "baseline": cfg.get("baseline"), "gains": cfg.get("gains"),
                    "front": cfg.get("front"), "transfer": cfg.get("transfer"),
                    "finalists": [e.summary() for e in result.selection.finalists],
                    "backoff": [e.summary() for e in result.selection.backoff]})
    else:
        base = exp["theory_baseline"]
        # The gains are in the objective's cost: simulated seconds for seconds and front (docs/design.md, "The front").
        unit = " in simulated seconds" if cfg.get("gains", {}).get("objective", "bits") != "bits" else ""
        print(f"chosen: {cfg['method']} + {spec_text(cfg['compressor'])}, step {cfg['step_size']:.4g}"
              + (f", sync probability {cfg['sync_probability']:.3g}" if cfg.get("sync_probability") else "")
              + (f", shift rate {cfg['shift_rate']:.3g}" if cfg.get("shift_rate") else ""))
        print(f"expected on {len(exp['validation_seeds'])} fresh seeds: {exp['mean_bits_per_worker']:,.0f} uplink "
              f"bits/worker (sd {exp['std_bits_per_worker']:,.0f}), {exp['mean_rounds']:.0f} rounds")
        print(f"theory baseline ({base['method']} + {base['compressor']}): {base['mean_bits_per_worker']:,.0f} "
              f"bits/worker, reached on {base['reached']} of {len(exp['validation_seeds'])} seeds; "
              f"gain {exp['gain_over_theory']:.1f}x" + (" or more" if exp["gain_is_lower_bound"] else "") + unit)
        gd = cfg.get("gains", {}).get("over_tuned_gd")
        if gd:
            ci, gd_cfg = gd["interval"], cfg["baseline"]
            print(f"tuned GD baseline (step {gd_cfg['step_size']:.4g}): "
                  f"{gd_cfg['mean_bits_per_worker']:,.0f} bits/worker"
                  + (f", {gd_cfg['mean_seconds']:.4g} s" if gd_cfg.get("mean_seconds") is not None else "")
                  + f"; gain {gd['ratio']:.3g}x"
                  + (f" (95% paired bootstrap interval {ci[0]:.3g}-{ci[1]:.3g})" if ci else "")
                  + (" or more" if gd["lower_bound"] else "") + unit)
        if exp.get("mean_seconds") is not None:
            print(f"simulated wall clock: {exp['mean_seconds']:.4g} s to target (theory baseline "
                  f"{base['mean_seconds']:.4g} s)")
        moved = cfg.get("transfer", {}).get("chosen")
        if moved:
            print(f"transfer check: {moved['transfer_ratio']:.3g}x the cost on a bootstrap resample of the data, "
                  f"reached on {moved['reached_resample']} of {moved['seeds']} seeds")
        if cfg.get("front"):
            pts = cfg["front"]["points"]
            print(f"front ({len(pts)} points, prefer: {cfg['front']['prefer']}): " + "; ".join(
                f"{'*' if p['chosen'] else ''}{p['method']} + {spec_text(p['compressor'])} step {p['step_size']:.3g}: "
                f"{p['mean_bits_per_worker']:,.0f} bits "
                f"{p['mean_seconds']:.4g} s" for p in pts))
        print(f"config: {args.output}")
        print(f"report: {result.report['html']}")
    return result.exit_code


def _cmd_worker(args: argparse.Namespace) -> int:
    from .tune import worker_main

    ran = worker_main(args.job, args.storage, args.study, budget=args.trials, sampler_seed=args.seed,
                      index=args.index, allow_code=args.allow_code)
    if args.json:
        _emit_json({"study": args.study, "trials_run": ran})
    else:
        print(f"worker {args.index}: ran {ran} trial(s) of study {args.study}")
    return EXIT["ok"]


def _cmd_report(args: argparse.Namespace) -> int:
    from ._yaml import NO_SPACE
    from .errors import WriteError
    from .paths import check_folder
    from .report import write_report

    if args.output is not None:
        check_folder(args.output, key="-o")  # a file, or under a read-only or missing root: exit 2
    try:
        paths = write_report(args.run_dir, out_dir=args.output)
    except OSError as exc:
        if exc.errno not in NO_SPACE:
            raise
        where = args.output or Path(args.run_dir) / "report"
        raise WriteError(f"{where}: cannot write the report ({os.strerror(exc.errno)})") from None
    if args.json:
        _emit_json({k: str(v) for k, v in paths.items()})
    else:
        print(f"report: {paths['html']}")
        print(f"summary: {paths['markdown']}")
    return EXIT["ok"]


def _cmd_retune(args: argparse.Namespace) -> int:
    from .retune import retune

    result = retune(args.job, previous=args.previous, output=args.output, trials=args.trials, jobs=args.jobs,
                    seed=args.seed, run_dir=args.run_dir, storage=args.storage, history=args.history,
                    margin=args.margin, level=args.level, drift_threshold=args.drift_threshold,
                    report_dir=args.report, allow_code=args.allow_code)
    section = result.config["retune"]
    if args.json:
        _emit_json({"decision": result.decision, "exit_code": result.exit_code, "reason": section["reason"],
                    "written": None if result.written is None else str(result.written),
                    "p_value": section["p_value"], "drift": section["drift"], "new": section["new"],
                    "previous": section["previous"], "trials": section["trials"]})
        return result.exit_code
    print(f"{'quantity':<40} {'previous':>12} {'tonight':>12} {'ratio':>8}")
    for row in result.drift:
        print(f"{row['quantity']:<40} {row['previous']:>12.4g} {row['current']:>12.4g} {row['ratio']:>8.3f}")
    new, old = section["new"], section["previous"]
    print(f"tonight's best: {new['method']} + {new['compressor']}, step {new['step_size']:.4g}: "
          f"{new['mean_bits_per_worker']:,.0f} bits/worker on {new['seeds']} fresh seeds, "
          f"reached {new['reached']}/{new['seeds']}")
    if old:
        print(f"previous config: {old['method']} + {old['compressor']}, step {old['step_size']:.4g}: "
              f"{old['mean_bits_per_worker']:,.0f} bits/worker on the same seeds, "
              f"reached {old['reached']}/{old['seeds']}")
    print(f"decision: {result.decision} ({section['reason']})")
    print(f"config: {result.written}" if result.written else "config: not written (the previous file is kept)")
    return result.exit_code


def _cmd_history(args: argparse.Namespace) -> int:
    from .retune import history_rows

    rows = history_rows(args.folder)
    if args.json:
        _emit_json({"nights": rows})
        return EXIT["ok"]
    print(f"{'night (UTC)':<21} {'decision':<9} {'method':<7} {'compressor':<11} {'step':>10} {'bits/worker':>12}")
    for r in rows:
        bits = r.get("bits_per_worker")
        print(f"{r['night']:<21} {r['decision']:<9} {r['method']:<7} {r['compressor']:<11} {r['step_size']:>10.4g} "
              f"{'' if bits is None else f'{bits:,.0f}':>12}")
    return EXIT["ok"]


def _params(spec: dict) -> str:
    rest = {k: v for k, v in spec.items() if k != "name"}
    return ", ".join(f"{k}={v}" for k, v in rest.items())


def _emit_json(doc: dict) -> None:
    sys.stdout.write(json.dumps(doc, indent=2) + "\n")


def build_parser() -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(prog="bittune", description=(
        "Tune communication-compressed distributed optimizers before the expensive run."))
    ap.add_argument("--version", action="version", version=f"bittune {__version__}")
    ap.add_argument("--debug", action="store_true", help="show tracebacks of internal errors")
    sub = ap.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = sub.add_parser("replay", help="simulate a config on a job: bits and rounds to target")
    p.add_argument("config", help="config file (YAML) to simulate")
    p.add_argument("--job", required=True, help="job file (YAML)")
    p.add_argument("--seeds", type=_positive_int,
                   help="number of random seeds (default: the config's validation seeds, else 5)")
    p.add_argument("--seed", type=_nonneg_int,
                   help="first seed (default: the config's validation seeds, else 0)")
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout")
    p.set_defaults(func=_cmd_replay)

    p = sub.add_parser("tune", help="the main job: probe, theory, search, select; writes a config")
    p.add_argument("job", help="job file (YAML)")
    p.add_argument("-o", "--output", required=True, help="config file to write (YAML)")
    _search_options(p, trials_help="trial budget (overrides search.trials)")
    p.add_argument("--workers-only", action="store_true",
                   help="run no trial here: enqueue the seeds, wait for `bittune worker` processes to spend the "
                        "budget, then select and write the config (needs --storage)")
    p.add_argument("--study", metavar="NAME",
                   help="the study's name, for `bittune worker --study NAME` (default: made from the job and data "
                        "digests); letters, digits, '.', '_', '-'")
    p.add_argument("--json", action="store_true", help="print one JSON summary document on stdout")
    p.set_defaults(func=_cmd_tune)

    p = sub.add_parser("worker", help="join a running study (from this or another machine) and run trials")
    p.add_argument("--job", required=True, help="the same job file as the coordinator's (data path may differ)")
    p.add_argument("--storage", required=True, help="the study's storage URL")
    p.add_argument("--study", required=True, help="the study name (printed by the coordinator, or its --study)")
    p.add_argument("--trials", type=_positive_int, help="global budget (default: the coordinator's)")
    p.add_argument("--seed", type=_nonneg_int, help="this worker's sampler seed (default: fresh entropy)")
    p.add_argument("--index", type=_nonneg_int, default=0, help="a tag recorded on this worker's trials")
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout")
    p.set_defaults(func=_cmd_worker)

    p = sub.add_parser("report", help="rebuild the report of a finished run from its storage and summary")
    p.add_argument("run_dir", help="the run folder (holds summary.json)")
    p.add_argument("-o", "--output", help="report folder (default: RUN_DIR/report)")
    p.add_argument("--json", action="store_true", help="print the written paths as one JSON document")
    p.set_defaults(func=_cmd_report)

    p = sub.add_parser("retune", help="nightly: retune on fresh data against the config in use")
    p.add_argument("job", help="job file (YAML) pointing at tonight's data")
    p.add_argument("--previous", required=True, help="the config in use")
    p.add_argument("-o", "--output", required=True,
                   help="config to write (a replacement, or the previous config with tonight's evidence; "
                        "when it equals --previous it is written only on replacement)")
    _search_options(p, trials_help="trial budget (default: a third of search.trials, >= 10)")
    p.add_argument("--history", help="folder that keeps every night's config and summary")
    p.add_argument("--margin", type=float, default=0.03, help="bits saving needed to replace (default 0.03)")
    p.add_argument("--level", type=float, default=0.05, help="significance level of the paired test (default 0.05)")
    p.add_argument("--drift-threshold", type=float, default=0.5,
                   help="largest relative change of a constant still called small drift (default 0.5)")
    p.add_argument("--json", action="store_true", help="print one JSON summary document on stdout")
    p.set_defaults(func=_cmd_retune)

    p = sub.add_parser("history", help="the nights recorded by retune --history")
    p.add_argument("folder", help="history folder")
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout")
    p.set_defaults(func=_cmd_history)

    p = sub.add_parser("probe", help="gradient check and smoothness constants of a job's problem")
    p.add_argument("job", help="job file (YAML)")
    p.add_argument("-o", "--output", help="also write the constants to this YAML file")
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout")
    p.set_defaults(func=_cmd_probe)

    p = sub.add_parser("theory", help="theory-safe settings and predicted bits for every method x compressor")
    p.add_argument("job", help="job file (YAML)")
    p.add_argument("--method", action="append", choices=list(METHOD_NAMES),
                   help="only this method (repeatable)")
    p.add_argument("--compressor", action="append", metavar="SPEC",
                   help="only this compressor: identity, rand_k:K, top_k:K, dither:S, natural, natural_dither:S, "
                        "perm_k (repeatable)")
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout")
    p.set_defaults(func=_cmd_theory)
    for name, parser in sub.choices.items():
        if name not in ("report", "history"):
            parser.add_argument("--allow-code", action="store_true",
                                help="allow a job's model plugin (Python code named in the job) to be imported")
    return ap


def _search_options(p: argparse.ArgumentParser, *, trials_help: str) -> None:
    """The options tune and retune share."""
    p.add_argument("--trials", type=_positive_int, help=trials_help)
    p.add_argument("--jobs", type=_positive_int, help="parallel processes (overrides search.jobs)")
    p.add_argument("--seed", type=_nonneg_int, help="search seed (overrides search.seed)")
    p.add_argument("--run-dir", help="folder for the study storage (default: beside the output, NAME.run)")
    p.add_argument("--storage", help="Optuna storage URL (default: a journal file in the run folder)")
    p.add_argument("--report", help="folder for the report (default: RUN_DIR/report)")


def _positive_int(text: str) -> int:
    value = int(text)
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be an integer >= 1, got {text}")
    return value


def _nonneg_int(text: str) -> int:
    value = int(text)
    if value < 0:
        raise argparse.ArgumentTypeError(f"must be an integer >= 0, got {text}")
    return value


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        return int(args.func(args))
    except BittuneError as exc:
        print(redact(f"bittune: error: {exc}"), file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("bittune: interrupted", file=sys.stderr)
        return EXIT["interrupted"]
    except OSError as exc:
        if exc.errno in NO_SPACE:  # full disk, quota, read-only: name the file, not a bug
            if args.debug:
                print(redact(traceback.format_exc()), file=sys.stderr, end="")
            print(redact(f"bittune: error: {exc.filename or 'a file'}: cannot write ({exc.strerror})"),
                  file=sys.stderr)
            return EXIT["disk"]
        return _internal(args, exc)
    except Exception as exc:  # a bug: say so, show the traceback when asked
        return _internal(args, exc)


def _internal(args, exc: Exception) -> int:
    if args.debug:
        print(redact(traceback.format_exc()), file=sys.stderr, end="")
    print(redact(f"bittune: internal error: {type(exc).__name__}: {exc} (rerun with --debug for the "
                 f"traceback)"), file=sys.stderr)
    return EXIT["internal"]


if __name__ == "__main__":
    raise SystemExit(main())
