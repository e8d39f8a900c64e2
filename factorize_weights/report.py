"""report.json (a public interface: fields are added, never renamed) and report.md."""

from __future__ import annotations

import datetime as _dt
import platform

import numpy as np

from ._version import __version__
from .allocate import Plan
from .config import CompressConfig
from .data import HeldOut
from .metrics import MetricResult
from .records import LayerRecord
from .spectra import Spectrum
from .report_latency import latency_plan_lines
from .formatting import (counted, fmt_change, fmt_count, fmt_error, fmt_kept, fmt_mb, fmt_ms, fmt_points, fmt_rank,
                         fmt_ratio, fmt_value)


def _layer_entry(record: LayerRecord, spectrum: Spectrum, rank: int | None, method: str,
                 measured_error: float | None) -> dict:
    kept = 1.0 if rank is None else float(spectrum.energy_fraction(rank))
    entry = {
        "name": record.name,
        "kind": record.kind,
        "shape": list(record.weight_shape),
        "matrix_shape": list(record.matrix_shape),
        "rank": rank,
        "break_even_rank": spectrum.break_even_rank,
        "max_rank": min(record.matrix_shape),
        "params_before": record.params,
        "params_after": record.factorized_params(rank),
        "energy_kept": kept,
        # measured from the factors actually written (equals the spectrum's tail for an exact SVD)
        "weight_error": 0.0 if rank is None else (
            measured_error if measured_error is not None else float(spectrum.relative_error(rank))),
        "method": "dense" if rank is None else method,
        "svd": spectrum.method,
    }
    if record.positions is not None:  # multiply-adds per sample (weights only)
        m, n = record.matrix_shape
        entry["flops_before"] = m * n * record.positions
        entry["flops_after"] = (m * n if rank is None else rank * (m + n)) * record.positions
    return entry


def spectrum_summary(spectrum: Spectrum) -> dict:
    s = spectrum.singular_values
    return {
        "method": spectrum.method,
        "seed": spectrum.seed,
        "oversampling": spectrum.oversampling,
        "power_iterations": spectrum.power_iterations,
        "computed": int(len(s)),
        "frobenius_norm": float(np.sqrt(spectrum.total_energy)),
        "singular_values": [float(v) for v in s],
        "energy_curve": [float(v) for v in spectrum.energy_curve()],
    }


#: Storage of one weight in each floating dtype a model may keep its weights in
BYTES_PER_PARAM = {"float64": 8, "float32": 4, "float16": 2, "bfloat16": 2}


def weights_size(totals: dict, which: str) -> str:
    """``float16 12.3 MB``: the whole model's weights before or after in the dtype they are kept in."""
    return f"{fmt_mb(totals.get('bytes_per_param', 4) * totals[f'model_params_{which}'])}"


def build_report(
    *,
    config: CompressConfig,
    plan: Plan,
    records: list[LayerRecord],
    spectra: dict[str, Spectrum],
    metric: MetricResult | None,
    layer_errors: dict[str, float],
    weight_errors: dict[str, float],
    heldout: HeldOut | None,
    sources: dict,
    model_params: tuple[int, int],
    timings: dict[str, float],
    weight_dtype: str = "float32",
    error_samples: int,
    latency: dict | None = None,
    method: str = "svd",
    calibration=None,
    fits: dict | None = None,
    recovery: dict | None = None,
    sequential: bool = False,
    decompositions: dict | None = None,
    effects: dict | None = None,
    allocation: str = "error-sum",
    allocation_note: str | None = None,
    bn_inputs: bool = False,
    latency_profile=None,
    latency_plan: dict | None = None,
) -> dict:
    """The content of ``report.json``."""
    chosen = [r for r in records if r.skip_reason is None]
    layers = []
    for record in chosen:
        # a layer too wide for any calibration statistic kept plain factors (calibrate.StatisticsPlan)
        own = "svd" if calibration is not None and calibration.uncalibrated(record.name) else method
        entry = _layer_entry(record, spectra[record.name], plan.ranks[record.name], own,
                             weight_errors.get(record.name))
        if calibration is not None:
            if record.name in calibration.moments:
                entry["calibration_rows"] = calibration.moments[record.name].rows
            extra = decompositions[record.name].extra if decompositions else {}
            if "whitening" in extra:
                entry["whitening"] = dict(extra["whitening"])
            if own == "whitened" and entry["rank"] is not None and not sequential and not recovery:
                # Eckart-Young on W S: the relative output error on the calibration inputs
                entry["calibration_output_error"] = float(spectra[record.name].relative_error(entry["rank"]))
            if fits and record.name in fits:
                entry["sequential_fit"] = fits[record.name]
        if heldout is not None:
            entry["output_error"] = layer_errors.get(record.name, 0.0 if entry["rank"] is None else None)
        if record.scaled_by is not None and config.bn_weights:  # the error after this normalization was minimised
            entry["error_weighted_by"] = record.scaled_by
        if record.input_from is not None and bn_inputs and method == "svd":  # inputs weighted by a prior
            entry["input_statistics_from"] = record.input_from
        if effects and record.name in effects:
            entry["output_effect"] = effects[record.name].to_dict()
        if latency_profile is not None:
            entry["time_ms"] = latency_profile.layer_time(record.name, entry["rank"])
        layers.append(entry)
    params_before = sum(e["params_before"] for e in layers)
    params_after = sum(e["params_after"] for e in layers)
    budget = plan.budget.to_dict()
    budget.update(
        {
            "units": plan.units,
            "limit": plan.limit,
            "used": plan.cost_after,
            "before": plan.cost_before,
            "under_by": plan.slack,
            "met": plan.limit is None or plan.cost_after <= plan.limit,
            "rank_step": plan.rank_step,
            "min_rank": plan.min_rank,
        }
    )
    return {
        "tool_version": __version__,
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "sources": sources,
        "budget": budget,
        "method": method,
        "sequential": bool(sequential),
        "bn_inputs": bool(bn_inputs),
        "recovery": recovery,
        "allocation": _allocation(allocation, effects, timings, config, allocation_note),
        "warnings": plan_warnings(layers, allocation) + ([allocation_note] if allocation_note else []),
        "calibration": None if calibration is None else calibration.summary(plan.ranks, fits),
        "factor_split": config.split,
        "svd": {"requested": config.svd, "seed": config.seed, "oversampling": config.oversampling,
                "power_iterations": config.power_iterations},
        "totals": {
            "params_before": params_before,
            "params_after": params_after,
            "params_ratio": params_after / params_before if params_before else 1.0,
            "model_params_before": model_params[0],
            "model_params_after": model_params[1],
            "weight_dtype": weight_dtype,
            "bytes_per_param": BYTES_PER_PARAM.get(weight_dtype, 4),
            "layers_selected": len(chosen),
            "layers_factorized": sum(1 for e in layers if e["rank"] is not None),
            **_flop_totals(layers),
        },
        "metric": None if metric is None else metric.to_dict(),
        "heldout": None if heldout is None else {
            "source": heldout.source, "sha256": heldout.sha256, "samples": len(heldout),
            "output_error_samples": error_samples,
        },
        "latency": _latency_entry(latency, layers),
        "latency_plan": latency_plan,
        "skipped": [{"name": r.name, "kind": r.kind, "reason": r.skip_reason} for r in records if r.skip_reason],
        "layers": layers,
        "config": config.to_dict(),
        "environment": {"python": platform.python_version(), "machine": platform.machine(), **_versions()},
        "wall_seconds": {k: round(v, 3) for k, v in timings.items()},
    }


def _latency_entry(latency: dict | None, layers: list[dict]) -> dict | None:
    """The measured latency plus the FLOP ratio the plan predicts for the selected layers."""
    if latency is None:
        return None
    flops = _flop_totals(layers)
    ratio = flops.get("flops_ratio")
    return {**latency, "flop_ratio": ratio, "predicted_speedup": (1.0 / ratio) if ratio else None}


def _flop_totals(layers: list[dict]) -> dict:
    if not layers or any("flops_before" not in e for e in layers):
        return {}
    before = sum(e["flops_before"] for e in layers)
    after = sum(e["flops_after"] for e in layers)
    return {"flops_before": before, "flops_after": after, "flops_ratio": after / before if before else 1.0}


def inspect_report(records: list[LayerRecord], spectra: dict[str, Spectrum], model_params: int,
                   weight_dtype: str = "float32") -> dict:
    """What ``inspect`` prints: per layer its shapes, break-even and spectrum; no plan."""
    layers = []
    for r in records:
        if r.skip_reason:
            continue
        s = spectra[r.name]
        ranks = {f"rank_for_energy_{int(t * 100)}": _rank_for(s, t) for t in (0.9, 0.99)}
        layers.append({
            "name": r.name, "kind": r.kind, "shape": list(r.weight_shape),
            "matrix_shape": list(r.matrix_shape), "params": r.params,
            "break_even_rank": s.break_even_rank, **ranks, "spectrum": spectrum_summary(s),
        })
    return {
        "tool_version": __version__,
        "model_params": model_params,
        "weight_dtype": weight_dtype,
        "layers": layers,
        "skipped": [{"name": r.name, "kind": r.kind, "reason": r.skip_reason} for r in records if r.skip_reason],
    }


def _rank_for(s: Spectrum, target: float) -> int | None:
    """Smallest rank keeping ``target`` of the energy, or None if it needs the full matrix."""
    curve = s.energy_curve()
    hits = np.nonzero(curve >= target - 1e-12)[0]
    return int(hits[0]) + 1 if len(hits) else None


# ---------------------------------------------------------------- text renderings


fmt_int = fmt_count  # the names the renderers of this module use
fmt_metric = fmt_value


def speed_verdict(report: dict) -> str | None:
    """Whether the result is faster or slower than the original where it was measured (the
    factorized model, and the int8 variants when they were compared), or None when nothing was timed."""
    lat, q = report.get("latency"), report.get("int8")
    said = []
    if lat:
        how = f"{lat['runtime']}, batch {lat['batch']}, {lat['threads']} thread{'s' if lat['threads'] != 1 else ''}"
        if lat["speedup"] < 1:
            said.append(f"SLOWER than the original on this CPU ({fmt_ratio(lat['speedup'])} speed, {how}): try a "
                        "smaller budget, or time it where it will run (docs/latency.md)")
        else:
            said.append(f"{fmt_ratio(lat['speedup'])} the original's speed on this CPU ({how})")
    if q:
        ms = {v["name"]: v["latency_ms"] for v in q["variants"]}
        if ms.get("factorized+int8") and ms.get("factorized") and ms["factorized+int8"] > ms["factorized"]:
            said.append(f"factorized+int8 is SLOWER than the float32 factorized model in {q['runtime']} "
                        f"({fmt_ms(ms['factorized+int8'])} against {fmt_ms(ms['factorized'])})")
    return "; ".join(said) or None


def next_steps(report: dict, out) -> list[str]:
    """How to use the result: in Python (rebuilt from the original), in onnxruntime where there is
    an .onnx file, and whether it is faster or slower than the original."""
    if out is None:
        return []
    out = str(out).rstrip("/")
    src, files = report.get("sources") or {}, report.get("files") or {}
    lines = []
    if src.get("model") and "open_args" in src:  # opened by name (the CLI): the same names open it again
        args = "".join(f", {k}={v!r}" for k, v in src["open_args"].items())
        lines.append(f"Python: small = factorize_weights.load_factorized(factorize_weights.open_model("
                     f"{src['model']!r}{args}), {out!r})")
    for name in ("model.onnx", "model.int8.onnx"):
        if name in files:
            lines.append(f"onnxruntime: onnxruntime.InferenceSession({out + '/' + name!r})")
    size = sum(files.values())
    if size:
        lines.append("size on disk: " + ", ".join(f"{n} {fmt_mb(b)}" for n, b in files.items()))
    verdict = speed_verdict(report)
    if verdict:
        lines.append(f"speed: {verdict}")
    return lines


def _versions() -> dict:
    """Versions of the libraries that computed the result (those already imported; nothing is
    imported just to ask)."""
    import sys

    out = {}
    for name in ("numpy", "scipy", "torch", "onnx", "onnxruntime"):
        module = sys.modules.get(name)
        if module is not None:
            out[name] = str(getattr(module, "__version__", "unknown"))
    return out


def _int8_change(metric: str, v: dict) -> str:
    before = v["metric"] - v["delta"]
    return fmt_change(metric, before, v["metric"], metric not in ("mse",))


def summary_line(report: dict) -> str:
    t = report["totals"]
    b = report["budget"]
    text = (
        f"budget {b['given']}: selected layers {fmt_int(t['params_before'])} -> {fmt_int(t['params_after'])} "
        f"parameters ({100 * t['params_ratio']:.1f}%), whole model {fmt_int(t['model_params_before'])} -> "
        f"{fmt_int(t['model_params_after'])} ({t.get('weight_dtype', 'float32')} {weights_size(t, 'before')} -> "
        f"{weights_size(t, 'after')})"
    )
    if "flops_before" in t:
        text += (f"; multiply-adds per sample {fmt_int(t['flops_before'])} -> {fmt_int(t['flops_after'])} "
                 f"({100 * t['flops_ratio']:.1f}%)")
    if b["units"] == "ms":
        text += f"; predicted {fmt_ms(b['used'])} of {fmt_ms(b['limit'])} allowed (original {fmt_ms(b['before'])})"
    elif b["limit"] is not None:
        text += f"; limit {fmt_int(b['limit'])} {b['units']}, under by {fmt_int(b['under_by'])}"
    lat = report.get("latency")
    if lat:
        text += (f"; latency ({lat['runtime']}, batch {lat['batch']}, {lat['threads']} thread"
                 f"{'s' if lat['threads'] != 1 else ''}) {fmt_ms(lat['before_ms'])} -> {fmt_ms(lat['after_ms'])} "
                 f"({fmt_ratio(lat['speedup'])}; FLOPs predict {fmt_ratio(lat['predicted_speedup'] or 1)})")
    m = report.get("metric")
    if m:
        change = fmt_change(m["name"], m["before"], m["after"], m["higher_is_better"])
        text += (
            f"; held-out {m['name']} {fmt_metric(m['name'], m['before'])} -> "
            f"{fmt_metric(m['name'], m['after'])} ({change}, {counted(m)})"
        )
    return text


def layer_table(report: dict) -> list[str]:
    has_out = any("output_error" in e for e in report["layers"])
    has_time = any(e.get("time_ms") for e in report["layers"])
    head = ["layer", "kind", "matrix", "rank", "break-even", "params before", "params after", "energy kept", "weight error"]
    if has_out:
        head.append("output error")
    if has_time:
        head += ["ms dense", "ms planned"]
    rows = ["| " + " | ".join(head) + " |", "|" + "|".join(["---"] * 3 + ["---:"] * (len(head) - 3)) + "|"]
    for e in report["layers"]:
        cells = [
            f"`{e['name']}`", e["kind"], "x".join(str(v) for v in e["matrix_shape"]),
            fmt_rank(e["rank"]), str(e["break_even_rank"]),
            fmt_int(e["params_before"]), fmt_int(e["params_after"]),
            fmt_kept(e["energy_kept"], e["rank"]), fmt_error(e["weight_error"], e["rank"]),
        ]
        if has_out:
            cells.append(fmt_error(e.get("output_error"), e["rank"]))
        if has_time:
            t = e.get("time_ms")
            cells += [f"{t['dense']:.4f}", f"{t['planned']:.4f}"] if t else ["—", "—"]
        rows.append("| " + " | ".join(cells) + " |")
    return rows


# a factorized layer keeping less than this share of its own energy, in a plan made without any
# data about the output, gets a warning: the rank that saves the most there may destroy the layer
AGGRESSIVE_KEPT = 0.5


def plan_warnings(layers: list[dict], allocation: str) -> list[str]:
    """Warnings about the plan itself (the terminal prints them first)."""
    if allocation == "output":
        return []
    low = [e for e in layers if e["rank"] is not None and e["energy_kept"] < AGGRESSIVE_KEPT]
    if not low:
        return []
    worst = min(low, key=lambda e: e["energy_kept"])
    return [f"{len(low)} layer(s) keep less than {AGGRESSIVE_KEPT:.0%} of their energy (lowest: {worst['name']} at "
            f"rank {worst['rank']}, {worst['energy_kept']:.1%}); without calibration data the plan cannot see what that "
            "does to the output: give --calibration data (ranks then follow each layer's measured effect) or a milder --budget"]


def _allocation(allocation: str, effects: dict | None, timings: dict, config, note: str | None = None) -> dict:
    """How ranks were shared out: by measured effect on the output (and what that cost) or by the
    layers' own errors (energy-product or error-sum), and why not by output when ``auto`` chose so."""
    if not effects:
        return {"by": allocation, **({"why": note} if note else {})}
    passes = sum(len(e.ranks) for e in effects.values())
    return {"by": "output", "probe_samples": config.effect_samples, "probe_passes": passes + 1,
            "seconds": round(float(timings.get("effects", 0.0)), 3),
            "reference": "Yuan et al. 2023, ASVD (arXiv 2311.05821), sensitivity measurement"}


def render_markdown(report: dict) -> str:
    lines = ["# Factorization report", "", summary_line(report) + ".", ""]
    steps = next_steps(report, "OUT") if report.get("files") else []
    if steps:  # the folder's own path is not known to a report read elsewhere: OUT stands for it
        lines += ["## What next", "", "With `OUT` the folder of this report:", ""] + [f"- {x}" for x in steps] + [""]
    q = report.get("int8")
    if q:
        lines += ["## int8 on top", "", f"{q['quantization']}; {q['runtime']}, batch {q['batch']}, "
                  f"{q['threads']} thread(s). Metric: {q['metric']} (change against the original).", "",
                  "| variant | size on disk | metric | change | median ms |", "|---|---:|---:|---:|---:|"]
        lines += [f"| {v['name']} | {fmt_mb(v['size_bytes'])} | {fmt_metric(q['metric'], v['metric'])} | "
                  f"{_int8_change(q['metric'], v)} | {'—' if v['latency_ms'] is None else format(v['latency_ms'], '.3f')} |"
                  for v in q["variants"]]
        lines.append("")
    b = report["budget"]
    what = {"svd": "truncated SVD of the weights", "whitened": "whitened truncated SVD on calibration inputs",
            "columns": "columns of W chosen by pivoted QR, least-squares second factor"}[report["method"]]
    if report.get("sequential"):
        what += ", refitted sequentially to the original outputs"
    if report.get("recovery"):
        rec = report["recovery"]
        what += f", then {rec['steps_run']} recovery steps ({rec['loss']}, learning rate {rec['lr']:g}"
        what += " chosen by short trials)" if rec.get("lr_trials") else ")"
        if rec.get("kept") == "before":
            what += "; the fine-tuned factors did not beat the starting ones on the validation slice, so those were kept"
    alloc = report.get("allocation") or {}
    if alloc.get("by") == "output":
        what += (f"; ranks shared by each layer's measured effect on the model output ({alloc['probe_passes']} probe "
                 f"passes over {alloc['probe_samples']} calibration samples, {alloc['seconds']:.1f} s)")
    lines.append(
        f"Method `{report['method']}` ({what}; {report['factor_split']} split), ranks chosen globally "
        f"under `{b['given']}`; rank step {b['rank_step']}, minimum rank {b['min_rank']}. "
        "Weight error is the relative Frobenius error of the layer matrix; output error is the relative "
        "error of the layer's output on held-out inputs."
    )
    lat = report.get("latency")
    if lat:
        lines += ["", "## CPU latency", "",
                  f"{lat['runtime']}, batch {lat['batch']}, {lat['threads']} thread(s), {lat['warmup']} warm-up and "
                  f"{lat['repeats']} timed runs each, interleaved; medians with the 10th-90th percentile spread.", "",
                  "| model | median ms | spread ms |", "|---|---:|---:|",
                  f"| original | {lat['before_ms']:.3f} | {lat['before_spread_ms'][0]:.3f}-{lat['before_spread_ms'][1]:.3f} |",
                  f"| factorized | {lat['after_ms']:.3f} | {lat['after_spread_ms'][0]:.3f}-{lat['after_spread_ms'][1]:.3f} |",
                  "", f"Measured speedup x{lat['speedup']:.2f}; the plan's FLOP ratio "
                  f"{lat['flop_ratio'] if lat['flop_ratio'] is None else round(lat['flop_ratio'], 3)} predicts "
                  f"x{lat['predicted_speedup'] or 1:.2f}."]
    lines += latency_plan_lines(report)
    cal = report.get("calibration")
    if cal:
        lines += ["", f"Calibration: {cal['samples']} samples from `{cal['source']}` (SHA-256 "
                  f"{(cal['sha256'] or 'n/a')[:16]}...), Gram matrices {fmt_mb(cal['gram_bytes'])}, "
                  f"peak process memory {fmt_mb(cal['peak_rss_bytes'])}."]
        lines += [f"- warning: {w}" for w in cal["warnings"]]
    if report.get("export"):
        e = report["export"]
        lines += ["", f"Exported `{e['file']}`, checked with {e['checked_with']} on {e['samples']} samples: "
                  f"max |difference| {e['max_abs_diff']:.3g} (tolerance {e['tolerance']:.3g})."]
    sr = report.get("search")
    if sr:
        name = (report.get("metric") or {}).get("name", "")
        chooser = "the selection set" if sr.get("selection") else "the held-out set (so the held-out figure is optimistic)"
        lines += ["", "## Budget search", "",
                  f"The smallest params budget whose drop stays within {fmt_points(name, sr['keep_within'])}, chosen on "
                  f"{chooser}: `{sr['chosen']}` after {sr['evaluations']} evaluations.", "",
                  "| budget | metric | drop | within |", "|---|---:|---:|---|"]
        lines += [f"| `{t['budget']}` | {fmt_value(name, t['metric'])} | {fmt_points(name, t['drop'])} | "
                  f"{'yes' if t['within'] else 'no'} |"
                  for t in sr["tried"]]
    lines += per_class_lines(report)
    lines += ["", "## Layers", ""] + layer_table(report)
    if report["skipped"]:
        lines += ["", "## Skipped layers", "", "| layer | kind | reason |", "|---|---|---|"]
        lines += [f"| `{s['name']}` | {s['kind']} | {s['reason']} |" for s in report["skipped"]]
    lines += ["", f"factorize-weights {report['tool_version']}, {report['created']}", ""]
    return "\n".join(lines)


def worst_classes(metric: dict, n: int = 5) -> list[dict]:
    """The classes that lost most (before - after, largest first), at most ``n``."""
    rows = sorted(metric.get("per_class") or [], key=lambda r: r["after"] - r["before"])
    return rows[:n]


def per_class_lines(report: dict) -> list[str]:
    m = report.get("metric")
    if not m or not m.get("per_class"):
        return []
    lines = ["", "## Per class", "", f"Held-out {m['name']} per class, the classes that lost most first "
             "(an average can hide a class that collapsed).", "",
             "| class | samples | before | after | change |", "|---:|---:|---:|---:|---|"]
    for r in sorted(m["per_class"], key=lambda r: r["after"] - r["before"]):
        lines.append(f"| {r['class']} | {r['samples']} | {r['before']:.2f}% | {r['after']:.2f}% | "
                     f"{fmt_change('top1', r['before'], r['after'], True)} |")
    return lines


def schema(name: str = "report") -> dict:
    """The JSON Schema shipped for ``report.json`` (``name="report"``) or ``sweep.json``."""
    import json
    from importlib import resources

    return json.loads(resources.files("factorize_weights").joinpath("schemas", f"{name}.schema.json").read_text())
