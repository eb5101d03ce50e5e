"""Plots and the HTML/Markdown report of a finished tuning run.

:func:`write_report` reads the run folder that ``tune`` leaves (``summary.json``
and the Optuna study it names) and writes into ``RUN_DIR/report``: a
self-contained ``report.html`` (PNGs inline as data URIs, no script, no
external resource), ``report.md`` (for terminals and review; it links the PNGs
beside it), the PNGs, and ``report_data.json`` with every number the figures
show.

Data and drawing are separate (DEVELOPERS.md, "Code habits"): the numbers of each figure come from
a function tests call (``curve_band``, ``search_history``, ``step_response``,
``worker_smoothness``, ``best_per_method``, ``importance``); the ``_draw_*``
functions only draw. Matplotlib is used through its Agg canvas directly, not
pyplot, so no global backend state changes.
"""

from __future__ import annotations

import base64
import html
import io
import json
import math
import re
import warnings
from pathlib import Path

import numpy as np
import optuna
from optuna.trial import TrialState

from ._yaml import atomic_write_bytes, atomic_write_text
from .errors import InputError
from .search import trial_value

__all__ = ["write_report", "report_data", "curve_band", "seconds_curve", "has_seconds", "search_history",
           "step_response", "worker_smoothness", "best_per_method", "importance", "varying_params", "why",
           "why_sentence", "target_info", "GRID_POINTS", "CAUTION"]

#: Points of the common log-spaced bits grid of the convergence band.
GRID_POINTS = 200
CAUTION = ("A simulated gain is a forecast, not a measurement: confirm the chosen config on a short real "
           "run before starting a long one.")


# ------------------------------------------------------------------ plot data
def target_info(summary: dict) -> dict:
    """The run's target: ``kind`` (grad_norm_sq or loss_gap), absolute ``threshold``, the
    summary's curve key, an axis ``label``, and f_ref with its note for a loss gap.
    Summaries written before loss-gap targets existed hold only ``target_grad_norm_sq``."""
    t = summary.get("target")
    if isinstance(t, dict) and t.get("kind") == "loss_gap":
        return {"kind": "loss_gap", "threshold": float(t["absolute"]), "curve": "loss_gap",
                "label": "f − f_ref", "f_ref": t.get("f_ref"), "note": t.get("note") or ""}
    threshold = t["absolute"] if isinstance(t, dict) else summary["target_grad_norm_sq"]
    return {"kind": "grad_norm_sq", "threshold": float(threshold), "curve": "grad_norm_sq",
            "label": "‖∇f‖²", "f_ref": None, "note": ""}


def seconds_curve(summary: dict, curve: dict) -> np.ndarray:
    """Simulated seconds at a summary curve's recorded rounds, by the objective's own formula
    (cost.NetworkModel.seconds_curve: latency, compute per gradient pass, uplink and downlink
    bits over their bandwidths), so the last point is the trajectory's objective value. An
    uneven network's curve carries the engine's own seconds (cost.NetworkModel.round_seconds)."""
    from .cost import NetworkModel

    if "seconds" in curve:
        return np.asarray(curve["seconds"], dtype=np.float64)
    net = NetworkModel(**summary["network"])
    return net.seconds_curve(curve["rounds"], curve["gradient_passes"], curve["uplink_bits"], curve["downlink_bits"])


def _worker_shares(summary: dict) -> list[float] | None:
    """Mean over the winner's curves of each worker's slowest-time share (None: an even network)."""
    curves = summary.get("curves", {}).get("winner") or [{}]
    if "worker_shares" not in curves[0]:
        return None
    return [float(v) for v in np.mean([c["worker_shares"] for c in curves], axis=0)]


def has_seconds(summary: dict) -> bool:
    """Whether the run minimised simulated seconds and its curves carry what seconds need."""
    curves = summary.get("curves", {}).get("winner") or [{}]
    return bool(summary.get("network")) and "downlink_bits" in curves[0]


def curve_band(summary: dict, which: str, *, points: int = GRID_POINTS, x: str = "uplink_bits") -> dict:
    """The target's metric against uplink bits per worker over the validation seeds of ``which``
    (``x="seconds"``: against simulated seconds, :func:`seconds_curve`; the keys stay ``bits``
    and ``end_bits`` for either axis, ``x`` names it).

    The metric is ||grad f||^2, or f - f_ref for a loss-gap target (``metric``
    names it; the per-seed ends are ``end_<metric>``).
    Each seed's curve (points with bits > 0 and a finite positive metric)
    is interpolated linearly in (log10 bits, log10 ||grad f||^2) onto a grid
    log-spaced from the smallest first bit count to the largest last one. A seed
    counts only inside its own bits range (no extrapolation). ``mean`` is the
    geometric mean (the mean in log space, the plot's scale) where every seed
    covers the point, else nan; ``lo``/``hi`` are the min/max over the seeds
    covering the point; ``end_*`` are each seed's last point (where it stopped).
    """
    curves = summary["curves"][which]
    t = target_info(summary)
    end = f"end_{t['curve']}"
    out = {"which": which, "seeds": len(curves), "target": t["threshold"], "metric": t["kind"], "x": x,
           "status": [c.get("status") for c in curves], "end_bits": [], end: []}
    kept = []
    for c in curves:
        b = seconds_curve(summary, c) if x == "seconds" else np.asarray(c["uplink_bits"], float)
        g = np.asarray(c[t["curve"]], float)
        keep = (b > 0) & np.isfinite(g) & (g > 0)
        if keep.any():
            kept.append((b[keep], g[keep]))
            out["end_bits"].append(float(b[keep][-1]))
            out[end].append(float(g[keep][-1]))
    if not kept:
        return {**out, "bits": [], "mean": [], "lo": [], "hi": [], "count": []}
    bits = np.geomspace(min(b[0] for b, _ in kept), max(b[-1] for b, _ in kept), points)  # exact ends
    ys = np.full((len(kept), points), np.nan)
    for i, (b, g) in enumerate(kept):
        inside = (bits >= b[0]) & (bits <= b[-1])
        ys[i, inside] = np.interp(np.log10(bits[inside]), np.log10(b), np.log10(g))
    count = np.isfinite(ys).sum(axis=0)
    full = count == len(kept)
    mean = np.full(points, np.nan)
    mean[full] = 10.0 ** ys[:, full].mean(axis=0)
    # fmin/fmax skip nan without the all-nan RuntimeWarning of nanmin.
    return {**out, "bits": bits, "mean": mean, "lo": 10.0 ** np.fmin.reduce(ys, axis=0),
            "hi": 10.0 ** np.fmax.reduce(ys, axis=0), "count": count}


def _reached_all(t) -> bool:
    status = t.user_attrs.get("status")
    return bool(status) and t.user_attrs.get("reached") == len(status)


def _completed(study) -> list:
    return sorted((t for t in study.get_trials(deepcopy=False, states=(TrialState.COMPLETE,))
                   if (v := trial_value(t)) is not None and math.isfinite(v)), key=lambda t: t.number)


def search_history(study) -> dict:
    """Trial value against trial number; pruned trials at the mean bits they spent before the stop."""
    trials = sorted(study.get_trials(deepcopy=False), key=lambda t: t.number)
    done = _completed(study)
    values = np.array([trial_value(t) for t in done], float)
    pruned = [t for t in trials if t.state == TrialState.PRUNED]
    return {
        "complete": {"number": [t.number for t in done], "value": values,
                     "seed_point": [bool(t.user_attrs.get("seed_point")) for t in done],
                     "reached_all": [_reached_all(t) for t in done]},
        "best": {"number": [t.number for t in done], "value": np.minimum.accumulate(values)},
        "pruned": {"number": [t.number for t in pruned],
                   "bits_spent": [float(np.mean(t.user_attrs["bits"])) if t.user_attrs.get("bits") else math.nan
                                  for t in pruned]},
        "failed": {"number": [t.number for t in trials if t.state == TrialState.FAIL]},
        "counts": {s.name.lower(): sum(t.state == s for t in trials) for s in TrialState},
        "seed_points": sum(bool(t.user_attrs.get("seed_point")) for t in trials),
    }


def _compressor(params: dict) -> str:
    name = params[f"{params['method']}.compressor"]
    density = [v for k, v in params.items() if k.startswith(name + ".")]
    return f"{name}:{density[0]}" if density else name


def step_response(study) -> dict:
    """Completed trials' value against their step-size multiplier, grouped by method."""
    out: dict = {}
    for t in _completed(study):
        m = t.params["method"]
        row = out.setdefault(m, {"number": [], "step_mult": [], "value": [], "reached_all": [], "compressor": []})
        row["number"].append(t.number)
        # EF21 draws its step over its search anchor (docs/theory.md §2.9): that multiplier here
        row["step_mult"].append(float(t.params.get(f"{m}.step_mult", t.params.get(f"{m}.anchor_mult"))))
        row["value"].append(trial_value(t))
        row["reached_all"].append(_reached_all(t))
        row["compressor"].append(_compressor(t.params))
    return {"methods": out}


def worker_smoothness(summary: dict) -> dict:
    """Per-worker smoothness estimates L_i and their closed-form bounds (nan where none is known)."""
    c = summary["constants"]
    est = np.asarray(c["L_workers"], float)
    bound = c.get("bound_L_workers")
    bound = np.array([math.nan if v is None else v for v in (bound or [None] * len(est))], float)
    return {"worker": list(range(len(est))), "estimate": est, "bound": bound,
            "samples": list(summary.get("problem", {}).get("worker_sizes") or [None] * len(est)),
            "L": float(c["L"]), "bound_L": c.get("bound_L"), "L_qm": float(np.sqrt(np.mean(est ** 2)))}


def best_per_method(study) -> dict:
    """The lowest completed value per method, best first; methods tried but never completed apart."""
    best: dict = {}
    for t in _completed(study):
        m = t.params["method"]
        if m not in best or trial_value(t) < trial_value(best[m]):
            best[m] = t
    order = sorted(best, key=lambda m: trial_value(best[m]))
    tried = {t.params["method"] for t in study.get_trials(deepcopy=False) if "method" in t.params}
    return {"method": order, "best": [trial_value(best[m]) for m in order],
            "number": [best[m].number for m in order], "reached_all": [_reached_all(best[m]) for m in order],
            "none_completed": sorted(tried - set(best))}


def varying_params(study) -> list[str]:
    """Parameters that took more than one value over the completed trials (in first-seen order).

    A parameter fixed by the job (one method, one compressor) carries no information about what
    mattered, so the importance plot leaves it out."""
    seen: dict[str, set] = {}
    for t in _completed(study):
        for k, v in t.params.items():
            seen.setdefault(k, set()).add(v)
    return [k for k, values in seen.items() if len(values) > 1]


def importance(study) -> dict:
    """Optuna's parameter importances (its default evaluator) over the parameters that vary in the study,
    or why there are none."""
    out = {"ok": False, "params": [], "importance": [], "trials": len(_completed(study)), "reason": None,
           "notes": []}
    params = varying_params(study)
    if not params:
        out["reason"] = (f"not enough trials to compare: no parameter took more than one value in the "
                         f"{out['trials']} completed trials")
        return out
    try:
        # Optuna warns rather than raises on small or degenerate studies ("too small", "will be
        # equal", sparse regimes of a conditional parameter), and ``normalize`` is experimental.
        # pytest runs with filterwarnings=error and a CLI user needs no Python warning, so they are
        # recorded here: "will be equal" means "not enough trials"; sparse regimes become a note.
        # Optuna 5's default evaluator (PED-ANOVA) scores conditional params per regime; other
        # evaluators (fANOVA, MDI) would only use params present in every completed trial.
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            # A front study's importances are those for its first objective, bits (Optuna needs a target).
            target = trial_value if len(study.directions) > 1 else None
            raw = optuna.importance.get_param_importances(study, params=params, normalize=False, target=target)
    except Exception as exc:  # too few trials, a single-valued space, a missing optional package
        out["reason"] = f"not enough trials ({type(exc).__name__}: {exc})"
        return out
    messages = [str(w.message) for w in caught]
    total = float(sum(raw.values()))
    if any("will be equal" in m for m in messages) or not total > 0:
        out["reason"] = f"not enough trials ({out['trials']} completed; importances not separable)"
        return out
    sparse = sorted({p for m in messages for p in re.findall(r"parameter `([^`]+)` have less than", m)})
    if sparse:
        out["notes"] = [f"few trials in some regimes of {', '.join(sparse)}: their importance may be inaccurate"]
    return {**out, "ok": True, "params": list(raw), "importance": [float(v) / total for v in raw.values()]}


def _cost_row(label: str, e: dict, seeds: str) -> dict:
    bits, rounds = float(e["mean_bits_per_worker"]), float(e["mean_rounds"])
    return {"label": label, "bits_per_round": bits / rounds if rounds else math.nan, "rounds": rounds,
            "bits": bits, "seeds": seeds, "reached_all": e["reached"] == e["seeds"]}


def why(summary: dict, study) -> dict:
    """The winner beside the runner-up method and tuned GD: mean uplink bits per worker per round, rounds
    and total (mean over seeds). The runner-up is the best finalist of another method on the fresh seeds,
    else that method's best trial on the search seeds (``seeds`` says which), else None."""
    sel = summary["selection"]
    w = sel["winner"]
    out = {"winner": _cost_row(f"{w['method']} + {w['compressor']}", w, "fresh"), "runner_up": None, "gd": None}
    others = [e for e in sel["finalists"] if e["method"] != w["method"] and e["reached"] == e["seeds"]]
    if others:
        e = min(others, key=lambda e: e["mean_bits_per_worker"])
        out["runner_up"] = _cost_row(f"{e['method']} + {e['compressor']}", e, "fresh")
    else:
        best: dict = {}
        for t in _completed(study):
            m = t.params["method"]
            if m != w["method"] and _reached_all(t) and (m not in best or trial_value(t) < trial_value(best[m])):
                best[m] = t
        if best:
            t = min(best.values(), key=trial_value)
            row = {"mean_bits_per_worker": float(np.mean(t.user_attrs["bits"])),
                   "mean_rounds": float(np.mean(t.user_attrs["rounds"])), "reached": 1, "seeds": 1}
            out["runner_up"] = _cost_row(f"{t.params['method']} + {_compressor(t.params)}", row, "search")
    if sel.get("gd"):
        out["gd"] = _cost_row("uncompressed GD with a tuned step", sel["gd"], "fresh")
    gain = (sel.get("gains") or {}).get("over_tuned_gd")
    out["gain_over_tuned_gd"] = gain
    return out


def why_sentence(d: dict) -> str:
    """One sentence: why this config, in bits per round x rounds = total (rounded as the config's figures)."""
    from .config import sig

    d = {k: ({**v, "bits": sig(v["bits"]), "rounds": sig(v["rounds"])} if isinstance(v, dict) and "bits" in v
             else v) for k, v in d.items()}

    def part(r: dict) -> str:
        seeds = "" if r["seeds"] == "fresh" else " on the search seeds"
        return (f"{r['label']} ({_bits(r['bits_per_round'])} bits per round × {_fmt(r['rounds'], '.4g')} rounds = "
                f"{_bits(r['bits'])}{seeds})")
    w = d["winner"]
    text = (f"Why this config: {w['label']} needs {_bits(w['bits_per_round'])} uplink bits per worker per round × "
            f"{_fmt(w['rounds'], '.4g')} rounds = {_bits(w['bits'])} bits per worker")
    rivals = [part(r) for r in (d["runner_up"], d["gd"]) if r is not None]
    if d["runner_up"] is not None:
        rivals[0] = "the runner-up method, " + rivals[0] + ","
    if rivals:
        text += ", against " + " and ".join(rivals)
    g = d.get("gain_over_tuned_gd")
    if g:
        ci = g.get("interval")
        text += (f": {'at least ' if g['lower_bound'] else ''}{g['ratio']:.3g}× fewer bits than tuned GD"
                 + (f" ({g['level']:.0%} paired bootstrap interval {ci[0]:.3g}–{ci[1]:.3g})" if ci else ""))
    return text + " (means over the fresh seeds unless marked)."


def front_data(summary: dict, study) -> dict | None:
    """A front study's points (bits, seconds): every completed trial on the search seeds (mean over them),
    the study's non-dominated trials, the finalists and the written front on the fresh seeds, the chosen one."""
    sel = summary["selection"]
    if not sel.get("front"):
        return None
    trials = [t for t in _completed(study) if t.user_attrs.get("seconds")]
    best = {t.number for t in study.best_trials}

    def points(rows):
        return {"bits": [float(r["mean_bits_per_worker"]) for r in rows],
                "seconds": [float(r["mean_seconds"]) for r in rows],
                "label": [f"{r['method']} + {r['compressor']}" for r in rows]}

    return {"trials": {"bits": [float(np.mean(t.user_attrs["bits"])) for t in trials],
                       "seconds": [float(np.mean(t.user_attrs["seconds"])) for t in trials],
                       "reached_all": [_reached_all(t) for t in trials],
                       "non_dominated": [t.number in best for t in trials]},
            "finalists": points(sel["front_finalists"]), "front": points(sel["front"]),
            "chosen": points([r for r in sel["front"] if r.get("chosen")]), "prefer": sel.get("prefer")}


def report_data(summary: dict, study) -> dict:
    """Every number the figures show (what ``report_data.json`` holds)."""
    out = {"convergence": {w: curve_band(summary, w) for w in ("winner", "baseline")}}
    front = front_data(summary, study)
    if front is not None:
        out["front"] = front
    if has_seconds(summary):
        out["convergence_seconds"] = {w: curve_band(summary, w, x="seconds") for w in ("winner", "baseline")}
    return {**out, "history": search_history(study), "step": step_response(study),
            "smoothness": worker_smoothness(summary), "methods": best_per_method(study),
            "importance": importance(study), "why": why(summary, study)}


# -------------------------------------------------------------------- drawing
def _figure(width: float = 7.5, height: float = 4.2):
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=100, layout="constrained")
    return fig, fig.add_subplot()


def _png(fig, ax=None, *, ncols: int = 3) -> bytes:
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    if ax is not None:  # legend under the axes, clear of the points
        fig.legend(*ax.get_legend_handles_labels(), loc="outside lower center", ncols=ncols, fontsize=7)
    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", metadata={"Software": None})
    return buf.getvalue()


METHOD_COLORS = {"diana": "tab:blue", "marina": "tab:orange", "ef21": "tab:green", "dcgd": "tab:purple",
                 "gd": "tab:brown"}


def _scatter(ax, x, y, mask, *, label: str, hollow: bool = False, color="tab:blue", **kw) -> None:
    if np.any(mask):
        fill = {"facecolors": "none", "edgecolors": color} if hollow else {"color": color}
        ax.scatter(np.asarray(x)[mask], np.asarray(y)[mask], s=22, label=label, **fill, **kw)


def _draw_convergence(bands: dict, labels: dict, ylabel: str = "‖∇f‖²", xlabel: str = "uplink bits per worker"
                      ) -> bytes:
    fig, ax = _figure(7.5, 4.8)
    for which, color in (("baseline", "tab:gray"), ("winner", "tab:blue")):
        d = bands[which]
        if not len(d["bits"]):
            continue
        cover = np.asarray(d["count"]) > 0
        x, lo, hi = (np.asarray(d[k])[cover] for k in ("bits", "lo", "hi"))
        ax.fill_between(x, lo, hi, color=color, alpha=0.25, lw=0, label=f"{labels[which]}: min–max over "
                        f"{d['seeds']} seeds")
        ax.plot(x, lo, x, hi, color=color, lw=0.6, alpha=0.6)  # edges: visible where one seed is left
        ax.plot(d["bits"], d["mean"], color=color, lw=2, label=f"{labels[which]}: geometric mean")
        ax.scatter(d["end_bits"], d[f"end_{d['metric']}"], color=color, s=14, marker="|",
                   label=f"{labels[which]}: end of each seed")
    target = bands["winner"]["target"]
    ax.axhline(target, color="tab:red", ls="--", lw=1, label=f"target {target:.3g}")
    ax.set(xscale="log", yscale="log", xlabel=xlabel, ylabel=ylabel, title="Convergence on fresh seeds")
    return _png(fig, ax, ncols=2)


def _draw_history(d: dict) -> bytes:
    fig, ax = _figure(7.5, 4.8)
    c = d["complete"]
    seed, ok = np.asarray(c["seed_point"], bool), np.asarray(c["reached_all"], bool)
    for mask, marker, label in ((~seed, "o", "searched"), (seed, "D", "theory seed point")):
        _scatter(ax, c["number"], c["value"], mask & ok, marker=marker, label=label)
        _scatter(ax, c["number"], c["value"], mask & ~ok, marker=marker, hollow=True,
                 label=f"{label}, missed target (penalised)")
    p = d["pruned"]
    _scatter(ax, p["number"], p["bits_spent"], np.isfinite(p["bits_spent"]), marker="x", color="tab:gray",
             label="pruned (bits spent)")
    ax.step(c["number"], d["best"]["value"], where="post", color="tab:orange", lw=1.5, label="running best")
    failed = d["counts"].get("fail", 0)
    ax.set(yscale="log", xlabel="trial number", ylabel="mean uplink bits per worker",
           title="Search history" + (f" ({failed} failed trials not shown)" if failed else ""))
    return _png(fig, ax)


def _draw_front(d: dict) -> bytes:
    fig, ax = _figure(7.5, 4.8)
    t = d["trials"]
    ok, nd = np.asarray(t["reached_all"], bool), np.asarray(t["non_dominated"], bool)
    _scatter(ax, t["bits"], t["seconds"], ok & ~nd, color="tab:gray", label="trials (search seeds)")
    _scatter(ax, t["bits"], t["seconds"], ok & nd, color="tab:blue", label="non-dominated trials (search seeds)")
    f, c = d["finalists"], d["front"]
    ax.scatter(f["bits"], f["seconds"], marker="s", facecolors="none", edgecolors="tab:green",
               label="validated (fresh seeds)")
    order = np.argsort(c["bits"])
    ax.step(np.asarray(c["bits"])[order], np.asarray(c["seconds"])[order], where="post", color="tab:green",
            lw=1.2, label="front written to the config")
    ax.scatter(d["chosen"]["bits"], d["chosen"]["seconds"], marker="*", s=220, color="tab:orange", zorder=5,
               label=f"chosen (prefer: {d['prefer']})")
    ax.set(xscale="log", yscale="log", xlabel="mean uplink bits per worker", ylabel="mean simulated seconds",
           title="Bits against seconds to target")
    return _png(fig, ax)


def _draw_step(d: dict) -> bytes:
    fig, ax = _figure(7.5, 4.8)
    for m, row in sorted(d["methods"].items()):
        ok, color = np.asarray(row["reached_all"], bool), METHOD_COLORS.get(m, "tab:gray")
        _scatter(ax, row["step_mult"], row["value"], ok, color=color, label=m)
        _scatter(ax, row["step_mult"], row["value"], ~ok, color=color, hollow=True, label=f"{m}, missed (penalised)")
    ax.axvline(1.0, color="k", lw=0.8, ls=":", label="theory step")
    ax.set(xscale="log", yscale="log", xlabel="step-size multiplier over the theory step",
           ylabel="mean uplink bits per worker", title="Bits to target against step size (completed trials)")
    return _png(fig, ax)


def _draw_smoothness(d: dict) -> bytes:
    fig, ax = _figure()
    w = np.asarray(d["worker"])
    ax.bar(w - 0.2, d["estimate"], width=0.4, color="tab:blue", label="estimate L_i")
    if np.isfinite(d["bound"]).any():
        ax.bar(w + 0.2, d["bound"], width=0.4, color="tab:gray", label="closed-form bound")
    ax.axhline(d["L"], color="tab:red", ls="--", lw=1, label=f"L of f = {d['L']:.4g}")
    ax.axhline(d["L_qm"], color="tab:green", ls=":", lw=1, label=f"quadratic mean of L_i = {d['L_qm']:.4g}")
    ax.set(xticks=w, xlabel="worker", ylabel="smoothness constant", title="Per-worker smoothness")
    return _png(fig, ax)


def _draw_methods(d: dict) -> bytes:
    fig, ax = _figure(6.0, 3.6)
    bars = ax.bar(d["method"], d["best"], color=[METHOD_COLORS.get(m, "tab:gray") for m in d["method"]],
                  hatch=[None if ok else "//" for ok in d["reached_all"]])
    ax.bar_label(bars, labels=[f"{v:,.0f}" for v in d["best"]], fontsize=8)
    if max(d["best"]) > 30 * min(d["best"]):
        ax.set_yscale("log")
    none = f"; no completed trial: {', '.join(d['none_completed'])}" if d["none_completed"] else ""
    ax.set(ylabel="best mean uplink bits per worker", title=f"Best trial per method{none}")
    return _png(fig)


def _draw_importance(d: dict) -> bytes:
    fig, ax = _figure(6.0, 0.9 + 0.35 * len(d["params"]))
    ax.barh(d["params"][::-1], d["importance"][::-1], color="tab:blue")
    ax.set(xlabel="importance (share of the total)", title="Parameter importance (Optuna)")
    return _png(fig)


# ------------------------------------------------------------------- document
def _fmt(x, spec: str = ".4g") -> str:
    if x is None:
        return "—"
    if isinstance(x, (bool, np.bool_)):
        return "yes" if x else "no"
    if isinstance(x, (int, np.integer)):
        return f"{x:,}"
    if isinstance(x, (float, np.floating)):
        return f"{x:{spec}}" if math.isfinite(x) else str(x)
    return str(x)


def _bits(x) -> str:
    return _fmt(x, ",.0f")


EVAL_HEAD = ["method", "compressor", "step", "sync p", "shift rate", "reached", "mean bits/worker", "sd", "rounds",
             "chosen"]
CONSTANTS = (("L", "smoothness of f"), ("L_am", "mean of L_i"), ("L_qm", "quadratic mean of L_i"),
             ("L_max", "max of L_i"), ("L_plus", "mean-squared smoothness L₊"), ("L_pm", "Hessian variance L±"),
             ("delta0", "f(x0) − lower bound"), ("grad_sq0", "‖∇f(x0)‖²"),
             ("heterogeneity0", "(1/n) Σ ‖∇f_i(x0) − ∇f(x0)‖²"), ("safety", "safety factor in the estimates"))
#: Shown only when the job uses them (vr_marina; assume.pl_mu).
OPTIONAL_CONSTANTS = (("L_sample", "average smoothness calL (VR-MARINA)"),
                      ("pl_mu", "PL constant μ stated by the job (assume.pl_mu)"))


def _eval_rows(evals: list[dict], winner: dict) -> list[list[str]]:
    same = lambda e: all(e[k] == winner[k] for k in ("method", "compressor", "step_size"))  # noqa: E731
    return [[e["method"], e["compressor"], _fmt(e["step_size"]), _fmt(e["sync_probability"]), _fmt(e["shift_rate"]),
             f"{e['reached']}/{e['seeds']}", _bits(e["mean_bits_per_worker"]), _bits(e["std_bits_per_worker"]),
             _fmt(e["mean_rounds"], ".1f"), "✓" if same(e) else ""] for e in evals]


def _rows_table(rows: list[dict]) -> tuple:
    head = list(dict.fromkeys(k for r in rows for k in r))
    return ("table", head, [[_fmt(r.get(k)) for k in head] for r in rows])


def _document(s: dict, data: dict, figures: dict, *, drift, extra_sections) -> tuple[str, list]:
    """The report as blocks: ("h", text), ("p", text), ("note", text), ("list", items),
    ("img", figure name, caption), ("table", header, rows); rendered to Markdown and HTML."""
    sel, prob, w, b = s["selection"], s["problem"], s["selection"]["winner"], s["selection"]["baseline"]
    sizes, t = prob["worker_sizes"], target_info(s)
    goal = f"{t['label']} ≤ {t['threshold']:.3g}" + (f" with f_ref = {t['f_ref']:.6g} ({t['note']})"
                                                     if t["kind"] == "loss_gap" else "")
    doc: list = [("p", why_sentence(data["why"])),
                 ("p", f"Job {s['job']}; config {s['config']}; study {s['study']} in {s['storage']}."),
                 ("p", f"Model {prob['model']}, {prob['samples']:,} samples, d = {prob['dimension']}, "
                       f"{prob['workers']} workers (sizes {min(sizes):,}–{max(sizes):,}); "
                       f"target {goal}." + (f" Stochastic gradients: every worker draws {prob['minibatch']} of its "
                                            f"rows with replacement per gradient evaluation."
                                            if prob.get("minibatch") else ""))]
    extras = "".join(f", {name} {_fmt(w.get(k))}" for k, name in (
        ("sync_probability", "sync probability"), ("shift_rate", "shift rate"), ("clients", "clients per round"),
        ("minibatch", "minibatch b'")) if w.get(k) is not None)
    if w.get("mean_gradient_evals_per_worker") is not None:
        extras += f"; {_bits(w['mean_gradient_evals_per_worker'])} gradient evaluations per worker on average"
    doc += [("h", "Result"), ("p", f"Chosen: {w['method']} + {w['compressor']}, step {_fmt(w['step_size'])}{extras}."),
            ("p", f"Expected on {w['seeds']} fresh seeds: {_bits(w['mean_bits_per_worker'])} uplink bits per worker "
                  f"(sd {_bits(w['std_bits_per_worker'])}, range {_bits(min(w['bits_per_worker']))}–"
                  f"{_bits(max(w['bits_per_worker']))}), {w['mean_rounds']:.1f} rounds (sd {w['std_rounds']:.1f}); "
                  f"reached the target on {w['reached']} of {w['seeds']} seeds.")]
    if w["reached"] < w["seeds"]:
        doc.append(("note", "Best effort: no candidate reached the target on every fresh seed."))
    missed = b["reached"] < b["seeds"]
    doc += [("p", f"Gain over theory: {'at least ' if missed else ''}{sel['gain_over_theory']:.1f}× fewer uplink bits "
                  f"than the theory setting {b['method']} + {b['compressor']} (step {_fmt(b['step_size'])}: "
                  f"{_bits(b['mean_bits_per_worker'])} bits per worker, reached on {b['reached']} of {b['seeds']} seeds"
                  + ("; it stopped short of the target on some seeds, so its bits are a lower bound)." if missed
                     else ").") + _interval_text((sel.get("gains") or {}).get("over_theory"))),
            *([("p", _gd_text(sel))] if sel.get("gd") else []),
            ("note", CAUTION),
            ("img", "convergence", f"{t['label']} against uplink bits per worker, chosen config and theory "
                                   "baseline: line = geometric mean over the fresh seeds, band = min–max, "
                                   "ticks = each seed's end.")]
    if "convergence_seconds" in figures:
        net = s["network"]
        doc.append(("img", "convergence_seconds",
                    f"{t['label']} against simulated seconds (the search's objective: latency {net['latency']:g} s "
                    f"+ compute {net['compute_seconds']:.3g} s per gradient pass + uplink bits / "
                    f"{net['uplink_bandwidth']:g} bit/s + downlink bits / {net['downlink_bandwidth']:g} bit/s per "
                    "round), same seeds and band as above."
                    + (" Workers' links differ: a round lasts as long as the slowest worker it waits for." if
                       net.get("workers") else "")))
    shares = _worker_shares(s)
    if shares is not None:
        doc.append(("p", "Time shares (docs/design.md, \u201cRound time with uneven workers\u201d): the fraction of "
                         "the chosen run's simulated seconds spent in rounds each worker was the slowest one waited "
                         "for, mean over the fresh seeds: "
                         + ", ".join(f"worker {i} {v:.1%}" for i, v in enumerate(shares)) + "."))
    if "front" in figures:
        fr = data["front"]
        doc += [("h", "Front"),
                ("p", f"objective: front. {len(fr['front']['bits'])} validated non-dominated settings are written to "
                      f"the config's front section; prefer: {fr['prefer']} chose "
                      f"{', '.join(fr['chosen']['label'])} (before the step back-off)."),
                ("table", ["setting", "mean bits/worker", "mean seconds"],
                 [[lab, _bits(b), _fmt(sec)] for lab, b, sec in zip(fr["front"]["label"], fr["front"]["bits"],
                                                                   fr["front"]["seconds"])]),
                ("img", "front", "Mean uplink bits against mean simulated seconds: the search's trials, the "
                                 "validated finalists and the written front, the chosen point starred.")]
    h, m = data["history"], data["methods"]
    doc += [("h", "Search"),
            ("p", f"{s['search']['trials']} trials over {', '.join(s['search']['methods'])} on seeds "
                  f"{s['search']['seeds']}: {h['counts']['complete']} completed, {h['counts']['pruned']} pruned, "
                  f"{h['counts']['fail']} failed; {h['seed_points']} theory seed points ran first. A trial that missed "
                  "the target on a seed has a penalised value, not bits."
                  + (f" No completed trial for: {', '.join(m['none_completed'])}." if m["none_completed"] else "")),
            ("img", "history", "Trial value against trial number, with the running best."),
            ("img", "step", "Completed trials: value against the step-size multiplier, coloured by method.")]
    if "methods" in figures:
        doc += [("table", ["method", "best mean bits/worker", "trial", "reached all seeds"],
                 [[k, _bits(v), str(n), _fmt(r)] for k, v, n, r in zip(m["method"], m["best"], m["number"],
                                                                         m["reached_all"])]),
                ("img", "methods", "Best trial per method.")]
    imp = data["importance"]
    doc.append(("h", "Parameter importance"))
    if imp["ok"]:
        doc += [("p", f"Optuna's default importance evaluator on {imp['trials']} completed trials (share of the total)."
                 + "".join(f" Note: {n}." for n in imp["notes"])),
                ("table", ["parameter", "importance"], [[p, f"{v:.3f}"] for p, v in zip(imp["params"],
                                                                                      imp["importance"])]),
                ("img", "importance", "Parameter importance.")]
    else:
        doc.append(("p", f"Not shown: {imp['reason']}."))
    doc += [("h", "Finalists and back-off"),
            ("p", f"Finalists re-run on the fresh seeds {sel['seeds']}:"),
            ("table", EVAL_HEAD, _eval_rows(sel["finalists"], w)),
            ("p", "Back-off of the best finalist's step (kept while the mean bits stay within tolerance):"
                  if sel["backoff"] else "No back-off run.")]
    doc += [("table", EVAL_HEAD, _eval_rows(sel["backoff"], w))] if sel["backoff"] else []
    c, sm = s["constants"], data["smoothness"]
    bounded = np.isfinite(sm["bound"]).all()
    bounds = {"L": c.get("bound_L")} | ({"L_am": np.mean(sm["bound"]), "L_max": np.max(sm["bound"]),
                                          "L_qm": np.sqrt(np.mean(np.square(sm["bound"])))} if bounded else {})
    doc += [("h", "Problem constants"),
            ("p", f"Gradient check: max relative error {s['probe']['max_rel_error']:.1e} (tolerance "
                  f"{s['probe']['tolerance']:g}); {s['probe']['oracle_calls']} oracle calls."),
            ("table", ["constant", "meaning", "estimate", "closed-form bound"],
             [[k, meaning, _fmt(c.get(k)), _fmt(bounds.get(k))] for k, meaning in CONSTANTS]
             + [[k, meaning, _fmt(c[k]), "—"] for k, meaning in OPTIONAL_CONSTANTS if c.get(k) is not None]),
            ("table", ["worker", "samples", "L_i estimate", "L_i bound"],
             [[str(i), _fmt(n), _fmt(e), _fmt(bd)] for i, n, e, bd in
              zip(sm["worker"], sm["samples"], sm["estimate"], sm["bound"])]),
            ("img", "smoothness", "Per-worker smoothness: estimate and closed-form bound.")]
    base = (b["method"], b["compressor"])
    rows = [[r["method"], r["compressor"], _fmt(r["step_size"]), _fmt(r["sync_probability"]), _fmt(r["shift_rate"]),
             _fmt(r["predicted_rounds"], ".3g"), _fmt(r["predicted_bits_per_worker"], ".3g"),
             "★" if (r["method"], r["compressor"]) == base else ""] for r in s["theory"]]
    if not any(r[-1] for r in rows):  # the baseline's density came from a finer grid than the table's
        rows.append([*base, _fmt(b["step_size"]), _fmt(b["sync_probability"]), _fmt(b["shift_rate"]), "—", "—",
                     "★ (finer density grid)"])
    doc += [("h", "Theory settings"),
            ("p", "Published step-size rules at a few densities of each allowed compressor (★ = the baseline)."
             + (" The non-convex rules predict rounds to a target on ‖∇f‖² only: for a loss-gap target they "
                "give no prediction (the PL rules of assume.pl_mu do)." if t["kind"] == "loss_gap" else "")),
            ("table", ["method", "compressor", "step", "sync p", "shift rate", "predicted rounds",
                       "predicted bits/worker", "baseline"], rows),
            ("list", sorted({f"{r['method']}: {r['source']}" for r in s["theory"]}))]
    # Optional section: drift since the previous config, filled by retunes (absent on a fresh tune).
    doc += [("h", "Drift since the previous config"),
            _rows_table(drift) if drift else ("p", "None recorded: a fresh tune, not a retune.")]
    for sec in extra_sections or ():
        doc += [("h", sec["title"])] + ([("p", sec["text"])] if sec.get("text") else [])
        doc += [_rows_table(sec["rows"])] if sec.get("rows") else []
    return f"bittune report: {Path(s['job']).name}", doc


def _interval_text(gain: dict | None) -> str:
    ci = (gain or {}).get("interval")
    return f" Paired bootstrap interval ({gain['level']:.0%}, fresh seeds): {ci[0]:.3g}–{ci[1]:.3g}." if ci else ""


def _gd_text(sel: dict) -> str:
    from .config import sig

    g, gain = sel["gd"], sel["gains"]["over_tuned_gd"]
    ci = gain.get("interval")
    return (f"Gain over tuned GD: {'at least ' if gain['lower_bound'] else ''}{gain['ratio']:.3g}× fewer uplink bits "
            + (f"({gain['level']:.0%} paired percentile bootstrap interval over the fresh seeds "
               f"{ci[0]:.3g}–{ci[1]:.3g}; Efron & Tibshirani 1993) " if ci else "")
            + f"than uncompressed GD with its step tuned over the search's step ladder (step {_fmt(g['step_size'])}: "
            f"{_bits(sig(g['mean_bits_per_worker']))} bits per worker in {_fmt(g['mean_rounds'], '.4g')} rounds, "
            f"reached on {g['reached']} of {g['seeds']} seeds).")


def _markdown(title: str, doc: list, files: dict) -> str:
    cell = lambda t: str(t).replace("|", "\\|")  # noqa: E731
    out = [f"# {title}"]
    for kind, *rest in doc:
        if kind == "h":
            out.append(f"## {rest[0]}")
        elif kind == "p":
            out.append(rest[0])
        elif kind == "note":
            out.append(f"> **Caution.** {rest[0]}")
        elif kind == "list":
            out.append("\n".join(f"- {i}" for i in rest[0]))
        elif kind == "img" and rest[0] in files:
            out.append(f"![{rest[1]}]({files[rest[0]]})")
        elif kind == "table":
            out.append("\n".join(["| " + " | ".join(map(cell, rest[0])) + " |", "|" + "---|" * len(rest[0])]
                                 + ["| " + " | ".join(map(cell, r)) + " |" for r in rest[1]]))
    return "\n\n".join(out) + "\n"


STYLE = ("body{font-family:sans-serif;max-width:60rem;margin:2rem auto;padding:0 1rem;color:#222}"
         "table{border-collapse:collapse;margin:1rem 0;font-size:.9rem}td,th{border:1px solid #ccc;padding:.2rem .5rem;"
         "text-align:left}th{background:#f3f3f3}img{max-width:100%}figure{margin:1rem 0}figcaption{font-size:.85rem;"
         "color:#555}.note{background:#fff6db;border-left:4px solid #e0a800;padding:.5rem 1rem}")


def _html(title: str, doc: list, images: dict) -> str:
    e = html.escape
    out = [f"<!doctype html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>{e(title)}</title>"
           f"<link rel=\"icon\" href=\"data:,\"><style>{STYLE}</style></head><body><h1>{e(title)}</h1>"]
    for kind, *rest in doc:
        if kind == "h":
            out.append(f"<h2>{e(rest[0])}</h2>")
        elif kind == "p":
            out.append(f"<p>{e(rest[0])}</p>")
        elif kind == "note":
            out.append(f"<p class=\"note\"><strong>Caution.</strong> {e(rest[0])}</p>")
        elif kind == "list":
            out.append("<ul>" + "".join(f"<li>{e(i)}</li>" for i in rest[0]) + "</ul>")
        elif kind == "img" and rest[0] in images:
            src = "data:image/png;base64," + base64.b64encode(images[rest[0]]).decode("ascii")
            out.append(f"<figure><img src=\"{src}\" alt=\"{e(rest[1])}\">"
                       f"<figcaption>{e(rest[1])}</figcaption></figure>")
        elif kind == "table":
            head = "".join(f"<th>{e(h)}</th>" for h in rest[0])
            body = "".join("<tr>" + "".join(f"<td>{e(c)}</td>" for c in r) + "</tr>" for r in rest[1])
            out.append(f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>")
    return "\n".join(out) + "\n</body></html>\n"


# ------------------------------------------------------------------ entry point
def _jsonable(x):
    if isinstance(x, dict):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple, np.ndarray)):
        return [_jsonable(v) for v in x]
    if isinstance(x, (np.bool_, np.integer, np.floating)):
        x = x.item()
    return None if isinstance(x, float) and not math.isfinite(x) else x


def _load(run_dir: Path) -> tuple[dict, optuna.Study]:
    from .search import open_storage

    path = run_dir / "summary.json"
    try:
        summary = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise InputError(f"{path}: not found (is {run_dir} the run folder of a finished `bittune tune`?)") from None
    except json.JSONDecodeError as exc:
        raise InputError(f"{path}:{exc.lineno}: not valid JSON ({exc.msg})") from None
    storage = summary["storage"]
    if "://" not in storage and (run_dir / Path(storage).name).exists():
        storage = str(run_dir / Path(storage).name)  # the run folder may have moved since
    return summary, optuna.load_study(study_name=summary["study"], storage=open_storage(storage))


def write_report(run_dir, *, out_dir=None, drift: list[dict] | None = None,
                 extra_sections: list[dict] | None = None) -> dict[str, Path]:
    """Write report.html, report.md, report_data.json and the PNGs of a finished run; returns their paths.

    ``out_dir`` defaults to ``run_dir/report``. ``drift``: rows (dicts) of the optional drift table a
    retune passes. ``extra_sections``: more sections, each ``{"title": str, "text": str (optional),
    "rows": list[dict] (optional)}``.
    """
    run_dir = Path(run_dir)
    summary, study = _load(run_dir)
    out = Path(out_dir) if out_dir is not None else run_dir / "report"
    out.mkdir(parents=True, exist_ok=True)
    data = report_data(summary, study)
    sel = summary["selection"]
    labels = {k: f"{'chosen' if k == 'winner' else 'theory'} {sel[k]['method']} + {sel[k]['compressor']}"
              for k in ("winner", "baseline")}
    images = {"convergence": _draw_convergence(data["convergence"], labels, target_info(summary)["label"]),
              "history": _draw_history(data["history"]), "step": _draw_step(data["step"]),
              "smoothness": _draw_smoothness(data["smoothness"])}
    if "convergence_seconds" in data:
        images["convergence_seconds"] = _draw_convergence(data["convergence_seconds"], labels,
                                                          target_info(summary)["label"], "simulated seconds")
    if len(summary["search"]["methods"]) > 1 and data["methods"]["method"]:
        images["methods"] = _draw_methods(data["methods"])
    if data["importance"]["ok"]:
        images["importance"] = _draw_importance(data["importance"])
    if "front" in data:
        images["front"] = _draw_front(data["front"])
    paths = {name: out / f"{name}.png" for name in images}
    for name, png in images.items():
        atomic_write_bytes(paths[name], png)
    for name in {"methods", "importance", "convergence_seconds", "front"} - set(images):  # an earlier report's figure
        (out / f"{name}.png").unlink(missing_ok=True)
    title, doc = _document(summary, data, images, drift=drift, extra_sections=extra_sections)
    paths["data"], paths["markdown"], paths["html"] = out / "report_data.json", out / "report.md", out / "report.html"
    atomic_write_text(paths["data"], json.dumps(_jsonable(data), indent=1, sort_keys=True, allow_nan=False))
    atomic_write_text(paths["markdown"], _markdown(title, doc, {k: p.name for k, p in paths.items()}))
    atomic_write_text(paths["html"], _html(title, doc, images))
    return paths
