"""Several budgets in one go (``sweep``) and the smallest budget within an accuracy loss
(``compress --keep-within``). Both prepare spectra and calibration statistics once and reuse them.
"""

from __future__ import annotations

import csv
import io
import json
import math
import time
from pathlib import Path

from ._version import __version__
from .allocate import check_feasible
from .budget import parse_budget
from .config import CompressConfig
from .errors import InputError
from .pipeline import Prepared, prepare, realize
from .metrics import DROP_UNITS
from .progress import bar
from .terminal import fmt_change

POINT_UNITS = DROP_UNITS  # the name sweep callers use


def parse_budget_list(text: str) -> list[str]:
    """``params=0.8,0.6,0.4`` -> ["params=0.8", "params=0.6", "params=0.4"]; a part without a kind
    takes the previous part's kind."""
    out, kind = [], None
    for part in (p.strip() for p in text.split(",")):
        if not part:
            raise InputError(f"--budgets {text!r}: an empty entry (two commas in a row?)")
        if "=" in part:
            kind = part.split("=", 1)[0].strip()
        elif kind is None:
            raise InputError(f"--budgets {text!r}: the first entry needs a kind, e.g. params=0.8,0.6")
        else:
            part = f"{kind}={part}"
        parse_budget(part)
        out.append(part)
    if not out:
        raise InputError(f"--budgets {text!r}: no budgets given")
    if len(set(out)) != len(out):
        raise InputError(f"--budgets {text!r}: a budget is listed twice")
    return out


def drop_of(metric) -> float:
    """How much worse the factorized model is, in the metric's own units (positive = worse)."""
    return metric.before - metric.after if metric.higher_is_better else metric.after - metric.before


def _point(result, budget: str) -> dict:
    report = result.report
    t = report["totals"]
    layers = [e for e in report["layers"] if e["rank"] is not None]
    return {
        "budget": budget,
        "params_before": t["params_before"],
        "params_after": t["params_after"],
        "params_ratio_pct": 100 * t["params_ratio"],
        "flops_ratio_pct": 100 * t["flops_ratio"] if "flops_ratio" in t else None,
        "layers_factorized": t["layers_factorized"],
        "mean_weight_error": (sum(e["weight_error"] for e in layers) / len(layers)) if layers else 0.0,
        "weight_error_squared_sum": sum(e["weight_error"] ** 2 for e in report["layers"]),
        "metric": report["metric"],
        "latency": report["latency"],
        "ranks": {e["name"]: e["rank"] for e in report["layers"]},
    }


def sweep(model, config: CompressConfig, budgets: list[str], *, heldout=None, calibration=None,
          out=None, force: bool = False, save_models: bool = False, sources: dict | None = None) -> dict:
    """Compress at every budget, reusing one preparation; write sweep.json/.csv/.md/.html."""
    from . import store

    if out is not None:
        store.check_out_dir(out, force, store.input_paths(sources, heldout, calibration))
    if save_models and out is None:
        raise InputError("--save-models needs --out")
    t0 = time.perf_counter()
    prep = prepare(model, config, heldout, calibration, budgets=budgets, model_source=(sources or {}).get("model"))
    t_prepare = time.perf_counter() - t0
    points, results = [], []
    t0 = time.perf_counter()
    for budget in bar(budgets, config, "sweep", unit="budget"):
        result = realize(prep, budget, sources=sources, layer_errors=False)
        points.append(_point(result, budget))
        if save_models:
            results.append((budget, result))
        del result  # this budget's model is freed before the next one is built
    t_points = time.perf_counter() - t0
    doc = {"tool_version": __version__, "method": prep.method, "sequential": prep.sequential,
           "sources": sources or {}, "config": config.to_dict(), "points": points,
           "heldout": None if heldout is None else {"source": heldout.source, "sha256": heldout.sha256},
           "calibration": None if prep.calibration is None else prep.calibration.summary(),
           "wall_seconds": {"prepare": round(t_prepare, 3), "points": round(t_points, 3)}}
    if out is not None:
        _write_sweep(Path(out), doc, results, force)
    return doc


def _slug(budget: str) -> str:
    return budget.replace("=", "-").replace(".", "_")


def _write_sweep(out: Path, doc: dict, results, force: bool) -> None:
    from . import store
    from .report_html import render_sweep_html

    with store.atomic_folder(out, force) as tmp:
        (tmp / "sweep.json").write_text(json.dumps(doc, indent=2, allow_nan=False) + "\n", encoding="utf-8")
        (tmp / "sweep.csv").write_text(render_csv(doc), encoding="utf-8")
        (tmp / "sweep.md").write_text(render_markdown(doc), encoding="utf-8")
        (tmp / "sweep.html").write_text(render_sweep_html(doc), encoding="utf-8")
        for budget, result in results:
            folder = tmp / _slug(budget)
            folder.mkdir()
            store.write_run_files(folder, result.model, result.records, result.plan, result.report,
                                  CompressConfig(**{**doc["config"], "budget": budget}), spectra=result.spectra)


def render_csv(doc: dict) -> str:
    buf = io.StringIO()
    writer = csv.writer(buf)
    writer.writerow(["budget", "params_before", "params_after", "params_ratio_pct", "layers_factorized",
                     "mean_weight_error", "metric", "metric_before", "metric_after", "metric_delta",
                     "latency_before_ms", "latency_after_ms"])
    for p in doc["points"]:
        m, lat = p["metric"] or {}, p["latency"] or {}
        writer.writerow([p["budget"], p["params_before"], p["params_after"], f"{p['params_ratio_pct']:.3f}",
                         p["layers_factorized"], f"{p['mean_weight_error']:.6f}", m.get("name", ""),
                         m.get("before", ""), m.get("after", ""), m.get("delta", ""),
                         lat.get("before_ms", ""), lat.get("after_ms", "")])
    return buf.getvalue()


def _name(doc: dict) -> str:
    m = doc["points"][0]["metric"] if doc["points"] else None
    return m["name"] if m else "metric"


def _ms(median: float, spread) -> str:
    return f"{median:.3f} [{spread[0]:.3f}-{spread[1]:.3f}]"


def render_markdown(doc: dict) -> str:
    lines = ["# Budget sweep", "", f"Method `{doc['method']}`; spectra and calibration once "
             f"({doc['wall_seconds']['prepare']:.2f} s), all points {doc['wall_seconds']['points']:.2f} s.", "",
             f"| budget | params kept | parameters after | layers factorized | mean weight error | held-out {_name(doc)} "
             f"| change in {_name(doc)} | latency ms [p10-p90] |",
             "|---|---:|---:|---:|---:|---:|---:|---:|"]
    if doc["points"]:
        p0 = doc["points"][0]
        m0, l0 = p0["metric"], p0["latency"]
        lines.append(f"| original | 100.0% | {p0['params_before']:,} | 0 | 0 | "
                     f"{'' if not m0 else format(m0['before'], '.4g')} |  | "
                     f"{'' if not l0 else _ms(l0['before_ms'], l0['before_spread_ms'])} |")
    for p in doc["points"]:
        m, lat = p["metric"], p["latency"]
        after = "" if not m else format(m["after"], ".4g")
        delta = "" if not m else fmt_change(m["name"], m["before"], m["after"], m["higher_is_better"])
        ms = "" if not lat else _ms(lat["after_ms"], lat["after_spread_ms"])
        lines.append(f"| `{p['budget']}` | {p['params_ratio_pct']:.1f}% | {p['params_after']:,} | {p['layers_factorized']} | "
                     f"{p['mean_weight_error']:.4f} | {after} | {delta} | {ms} |")
    return "\n".join(lines) + "\n"


def search_budget(prep: Prepared, keep_within: float, *, steps: int = 7) -> tuple[str, dict, object]:
    """The smallest params fraction whose held-out drop is at most ``keep_within``, by bisection.

    Returns (budget, search record for the report, result at that budget or None when the answer
    is params=1, i.e. nothing can be factorized within the drop).
    """
    if prep.heldout is None:
        raise InputError("--keep-within needs --heldout (the drop is measured on it)")
    chosen = prep.selected
    lo = 1.0  # the smallest fraction on a coarse ladder that some plan can meet
    for f in (0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1.0):
        try:
            check_feasible(chosen, parse_budget(f"params={f}"), rank_step=prep.config.rank_step,
                           min_rank=prep.config.min_rank)
            lo = f
            break
        except InputError:
            continue
    tried, best = [], None
    progress = bar(None, prep.config, "budget search", total=steps + 1, unit="budget")

    def evaluate(f: float):
        budget = f"params={f:.4f}".rstrip("0").rstrip(".")
        result = realize(prep, budget, latency=False, layer_errors=False)
        progress.update(1)
        d = drop_of(result.metric)
        tried.append({"budget": budget, "metric": result.metric.after, "drop": d, "within": d <= keep_within})
        return d <= keep_within, budget, result

    ok, budget, result = evaluate(lo)
    if ok:
        best = (budget, result)
    else:
        hi = 1.0
        for _ in range(steps):
            mid = math.floor((lo + hi) / 2 * 1e4) / 1e4
            if mid <= lo or mid >= hi:
                break
            ok, budget, result = evaluate(mid)
            if ok:
                hi, best = mid, (budget, result)
            else:
                lo = mid
    progress.close()
    record = {"keep_within": keep_within, "unit": POINT_UNITS[prep.metric_name], "evaluations": len(tried),
              "tried": tried, "chosen": best[0] if best else "params=1"}
    return (best[0], record, best[1]) if best else ("params=1", record, None)
