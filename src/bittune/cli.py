"""Command-line front end: one small function per command, each returning an exit code.

Logs and progress go to stderr; results go to stdout, as one JSON document
with ``--json`` (DESIGN.md, "Commands and exit codes").
"""

from __future__ import annotations

import argparse
import json
import sys
import traceback

from . import __version__
from .errors import EXIT, BittuneError

__all__ = ["main", "build_parser"]


def _cmd_replay(args: argparse.Namespace) -> int:
    from .config import load_config
    from .job import load_job
    from .replay import replay, summarize
    from .workspace import open_job

    cfg = load_config(args.config)
    ws = open_job(load_job(args.job))
    runs = replay(ws, cfg, seeds=range(args.seed, args.seed + args.seeds))
    doc = summarize(runs)
    doc["config"] = str(args.config)
    doc["problem"] = ws.summary()
    if args.json:
        _emit_json(doc)
    else:
        comp = cfg.compressor.get("name")
        print(f"{cfg.method} + {comp} {_params(cfg.compressor)} at step {cfg.step_size:g} on "
              f"{ws.problem.n_workers} workers, d = {ws.problem.dim}, "
              f"target ||grad f||^2 <= {ws.target:.3g}")
        print(f"{'seed':>6} {'status':<9} {'rounds':>8} {'uplink bits/worker':>20}")
        for r in runs:
            print(f"{r.seed:>6} {r.status:<9} {r.rounds:>8} {r.uplink_bits:>20,.0f}")
        if "mean_bits_per_worker" in doc:
            print(f"reached on {doc['reached']} of {len(runs)} seeds; mean {doc['mean_bits_per_worker']:,.0f} "
                  f"bits/worker (sd {doc['std_bits_per_worker']:,.0f}), mean {doc['mean_rounds']:.1f} rounds")
        else:
            print(f"reached on none of {len(runs)} seeds")
    return EXIT["ok"] if doc["all_reached"] else EXIT["no_candidate"]


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
    p.add_argument("--seeds", type=_positive_int, default=5, help="number of random seeds (default 5)")
    p.add_argument("--seed", type=_nonneg_int, default=0, help="first seed (default 0)")
    p.add_argument("--json", action="store_true", help="print one JSON document on stdout")
    p.set_defaults(func=_cmd_replay)
    return ap


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
        print(f"bittune: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("bittune: interrupted", file=sys.stderr)
        return EXIT["interrupted"]
    except Exception as exc:  # a bug: say so, show the traceback when asked
        if args.debug:
            traceback.print_exc()
        print(f"bittune: internal error: {type(exc).__name__}: {exc} (rerun with --debug for the "
              f"traceback)", file=sys.stderr)
        return EXIT["internal"]


if __name__ == "__main__":
    raise SystemExit(main())
