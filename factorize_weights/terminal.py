"""What the terminal shows: an aligned plain-text layer table sized to the terminal and a short
summary (Markdown stays in report.md). Numbers carry enough significant digits for their scale;
a change of a metric is always said as a *drop* or a *gain* in words, never by a bare sign.
"""

from __future__ import annotations

import os
import shutil
import sys

from .report import BYTES_PER_PARAM, next_steps, weights_size
from .formatting import (abbreviate, common_prefix, counted, fmt_change, fmt_count, fmt_error, fmt_kept, fmt_mb, fmt_ms,
                         fmt_rank, fmt_ratio, fmt_share, fmt_value, NOT_APPLICABLE)

__all__ = ["fmt_change", "fmt_value", "table", "layer_rows", "summary", "counted"]
#: columns of the layer table left out first on a narrow terminal (report.md keeps them)
OPTIONAL_LAYER_COLUMNS = ("break-even", "params before", "kind", "energy kept", "matrix")


def table(head: list[str], rows: list[list[str]], width: int | None = None, right_from: int = 2,
          optional: tuple[str, ...] = (), whole: str = "report.md") -> list[str]:
    """An aligned plain-text table; columns from ``right_from`` on are right-aligned. When it is
    wider than ``width`` (the terminal's; no limit when the output is not a terminal and COLUMNS
    is unset, so logs keep everything), in this order: the first column's dotted names lose the
    prefix they all share (``common_prefix``); they are abbreviated, every part but the last two
    to its first letter with indices kept (``abbreviate``), while they stay distinct; the
    ``optional`` columns are left out, in the order given; the names are cut in the middle
    (``...``). A last line then says what was shortened and where the whole table is (``whole``)."""
    if width is None:
        width = shutil.get_terminal_size((120, 24)).columns \
            if "COLUMNS" in os.environ or sys.stdout.isatty() else 1 << 30
    head, rows = list(head), [list(r) for r in rows]

    def too_wide():
        widths = [max(len(str(r[i])) for r in [head] + rows) for i in range(len(head))]
        return sum(widths) + 2 * (len(widths) - 1) - width

    said = []
    if too_wide() > 0:
        names = [str(r[0]) for r in rows]
        prefix = common_prefix(names)
        if prefix:
            for r in rows:
                r[0] = str(r[0])[len(prefix):]
            said.append(f"names without their common prefix {prefix!r}")
    if too_wide() > 0:
        short = [abbreviate(str(r[0])) for r in rows]
        if len(set(short)) == len({str(r[0]) for r in rows}) and any(n != str(r[0]) for n, r in zip(short, rows)):
            for r, n in zip(rows, short):
                r[0] = n
            said.append("names abbreviated")
    dropped = []
    for name in optional:
        if too_wide() <= 0 or name not in head:
            continue
        i = head.index(name)
        head.pop(i)
        for r in rows:
            r.pop(i)
        right_from -= i < right_from
        dropped.append(name)
    if dropped:
        said.append(f"column{'s' if len(dropped) > 1 else ''} {', '.join(dropped)} left out")
    over = too_wide()
    if over > 0:
        cut = max(12, max(len(str(r[0])) for r in [head] + rows) - over)
        cut_rows = [[_middle(str(r[0]), cut)] + r[1:] for r in rows]
        if cut_rows != rows:
            rows = cut_rows
            said.append("long names cut")
    widths = [max(len(str(r[i])) for r in [head] + rows) for i in range(len(head))]

    def line(cells):
        return "  ".join(str(c).rjust(w) if i >= right_from else str(c).ljust(w)
                         for i, (c, w) in enumerate(zip(cells, widths))).rstrip()

    note = [f"(shortened to fit the terminal: {'; '.join(said)}; {whole} has the whole table)"] if said else []
    return [line(head), line(["-" * w for w in widths])] + [line(r) for r in rows] + note


def _middle(text: str, n: int) -> str:
    return text if len(text) <= n else text[: (n - 3) // 2] + "..." + text[-(n - 3 - (n - 3) // 2):]


def layer_rows(report: dict) -> tuple[list[str], list[list[str]]]:
    has_out = any(e.get("output_error") is not None for e in report["layers"])
    has_time = any(e.get("time_ms") for e in report["layers"])  # a latency budget: its measured costs
    head = ["layer", "kind", "matrix", "rank", "break-even", "params before", "params after", "energy kept",
            "weight error"] + (["output error"] if has_out else []) + (["ms dense", "ms planned"] if has_time else [])
    rows = []
    for e in report["layers"]:
        row = [e["name"], e["kind"], "x".join(str(v) for v in e["matrix_shape"]),
               fmt_rank(e["rank"]), str(e["break_even_rank"]), fmt_count(e["params_before"]),
               fmt_count(e["params_after"]), fmt_kept(e["energy_kept"], e["rank"]), fmt_error(e["weight_error"], e["rank"])]
        if has_out:
            row.append(fmt_error(e.get("output_error"), e["rank"]))
        if has_time:
            t = e.get("time_ms")
            row += [fmt_ms(t["dense"], unit=False), fmt_ms(t["planned"], unit=False)] if t else [NOT_APPLICABLE] * 2
        rows.append(row)
    return head, rows


def latency_line(lat: dict) -> str:
    """The side-by-side timing of the original and the result, in one line."""
    flops = f"FLOPs predict {fmt_ratio(lat['predicted_speedup'] or 1)}; " if lat.get("predicted_speedup") else ""
    return (f"latency {fmt_ms(lat['before_ms'])} -> {fmt_ms(lat['after_ms'])} ({fmt_ratio(lat['speedup'])}; {flops}"
            f"{lat['runtime']}, batch {lat['batch']}, {lat['threads']} thread{'s' if lat['threads'] != 1 else ''})"
            + ("; SLOWER than the original on this CPU" if lat["speedup"] < 1 else ""))


def profile_rows(profile) -> tuple[list[str], list[list[str]]]:
    """A profile's tables: per layer its input, dense time, the fastest factor pair measured and
    the largest timed rank still faster than dense (break-even by time)."""
    head = ["layer", "input", "dense ms", "fastest ms", "at rank", "faster up to rank", "ranks timed"]
    rows = []
    for t in profile.tables.values():
        i = min(range(len(t.factor_ms)), key=t.factor_ms.__getitem__) if t.factor_ms else None
        faster = [k for k, ms in zip(t.ranks, t.factor_ms) if ms < t.dense_ms]
        rows.append([t.name, "x".join(str(d) for d in t.input_shape), fmt_ms(t.dense_ms, unit=False),
                     NOT_APPLICABLE if i is None else fmt_ms(t.factor_ms[i], unit=False),
                     NOT_APPLICABLE if i is None else str(t.ranks[i]),
                     str(max(faster)) if faster else "none (stays dense)", str(len(t.ranks))])
    return head, rows


def latency_budget_lines(report: dict) -> list[str]:
    """A latency budget: what was predicted from the cost tables, and what the check measured."""
    b, lp = report["budget"], report.get("latency_plan") or {}
    lines = [f"budget {b['given']}: predicted {fmt_ms(b['used'])} of {fmt_ms(b['limit'])} allowed (original "
             f"{fmt_ms(b['before'])}; cost tables {lp.get('source', 'measured here')})"]
    rounds = lp.get("rounds") or []
    if rounds:
        r = next((r for r in reversed(rounds) if r["predicted_ms"] == b["used"]), rounds[-1])
        verdict = "met" if lp.get("met") else "NOT met"
        share = lp.get("delivered_share")
        lines.append(f"checked on this CPU: {verdict}, measured {fmt_ms(r['measured_ms'])} against the original's "
                     f"{fmt_ms(r['original_measured_ms'])} ({fmt_share(r['measured_ratio'])})"
                     + (f"; {fmt_share(share)} of the predicted saving delivered" if share is not None else "")
                     + (f"; {len(rounds)} timing rounds" if len(rounds) > 1 else ""))
    elif lp.get("why_unchecked"):
        lines.append(f"not checked on this CPU: {lp['why_unchecked']}")
    return lines


def summary(report: dict, out=None, files: list[str] | None = None, hints: tuple[str, ...] = ()) -> list[str]:
    """The few lines after the table: budget, parameters and size, metric, latency, files, and
    what next (how to load the result, whether it is faster; ``hints`` from the caller)."""
    t, b = report["totals"], report["budget"]
    lines = []
    if b["units"] == "ms":
        lines += latency_budget_lines(report)
    elif b["limit"] is not None:
        lines.append(f"budget {b['given']}: {'met' if b['met'] else 'NOT met'} ({b['used']:,.0f} of {b['limit']:,.0f} "
                     f"{b['units']} allowed)")
    else:
        lines.append(f"budget {b['given']}: every layer within it")
    whole = t["model_params_after"] / t["model_params_before"] if t["model_params_before"] else 1.0
    # each count beside its own share: the selected layers' (what the budget is of) and the whole model's
    lines.append(f"parameters: selected layers {fmt_count(t['params_before'])} -> {fmt_count(t['params_after'])} "
                 f"({fmt_share(t['params_ratio'])}); whole model {fmt_count(t['model_params_before'])} -> "
                 f"{fmt_count(t['model_params_after'])} ({fmt_share(whole)}); {t.get('weight_dtype', 'float32')} "
                 f"{weights_size(t, 'before')} -> {weights_size(t, 'after')}")
    m = report.get("metric")
    if m:
        lines.append(f"held-out {m['name']} {fmt_value(m['name'], m['before'])} -> {fmt_value(m['name'], m['after'])} "
                     f"({fmt_change(m['name'], m['before'], m['after'], m['higher_is_better'])}; {counted(m)})")
    lat = report.get("latency")
    if lat:
        lines.append(latency_line(lat))
    q = report.get("int8")
    if q:
        lines += int8_lines(q)
    steps = next_steps(report, out) + list(hints)
    if out is not None:
        lines.append(f"wrote {str(out).rstrip('/')}/ ({', '.join(files or [])})")
    if steps:
        lines += ["next:"] + [f"  {s}" for s in steps]
    if out is None:
        lines.append("nothing was written (no --out)")
    return lines


def int8_lines(q: dict) -> list[str]:
    """The int8 comparison as a small aligned table (it is what most edge deployments decide on)."""
    head = ["variant", "size", q["metric"], "change", "median ms"]
    rows = []
    for v in q["variants"]:
        before = v["metric"] - v["delta"]
        rows.append([v["name"], fmt_mb(v["size_bytes"]), fmt_value(q["metric"], v["metric"]),
                     fmt_change(q["metric"], before, v["metric"], q["metric"] not in ("mse",)),
                     NOT_APPLICABLE if v["latency_ms"] is None else fmt_ms(v["latency_ms"], unit=False)])
    return [f"int8 ({q['quantization']}; {q['runtime']}, batch {q['batch']}, {q['threads']} thread(s)):"] + \
        ["  " + line for line in table(head, rows, right_from=1)]


def inspect_lines(report: dict) -> list[str]:
    """``inspect``: every layer's shape, break-even rank and the ranks that keep 90% / 99% of its
    energy, in the same aligned table as ``compress``."""
    head = ["layer", "kind", "matrix", "params", "break-even", "rank 90% energy", "rank 99% energy", "top singular value"]
    rows = [[e["name"], e["kind"], "x".join(map(str, e["matrix_shape"])), fmt_count(e["params"]),
             str(e["break_even_rank"]), str(e["rank_for_energy_90"]), str(e["rank_for_energy_99"]),
             f"{e['spectrum']['singular_values'][0]:.4g}"] for e in report["layers"]]
    dtype = report.get("weight_dtype", "float32")
    size = fmt_mb(BYTES_PER_PARAM.get(dtype, 4) * report["model_params"])
    lines = [f"model parameters: {fmt_count(report['model_params'])} ({dtype} {size})", ""]
    lines += table(head, rows, optional=("break-even", "kind", "top singular value", "matrix"), whole="--json")
    if report["skipped"]:
        lines += ["", "skipped:"] + [f"  {s['name']} ({s['kind']}): {s['reason']}" for s in report["skipped"]]
    return lines


def sweep_lines(doc: dict) -> list[str]:
    """``sweep``: one row per budget after the original's, aligned like the other commands."""
    points = doc["points"]
    name = next((p["metric"]["name"] for p in points if p["metric"]), None)
    head = ["budget", "kept", "params after", "factorized", "weight error"]
    head += [f"held-out {name}", "change"] if name else []
    has_lat = any(p["latency"] for p in points)
    head += ["latency ms"] if has_lat else []
    rows = []
    if points:
        p0 = points[0]
        row = ["original", "100.0%", fmt_count(p0["params_before"]), "0", "—"]
        row += [fmt_value(name, p0["metric"]["before"]), ""] if name else []
        row += [fmt_ms(p0["latency"]["before_ms"], unit=False) if p0["latency"] else "—"] if has_lat else []
        rows.append(row)
    for p in points:
        m, lat = p["metric"], p["latency"]
        row = [p["budget"], f"{p['params_ratio_pct']:.1f}%", fmt_count(p["params_after"]), str(p["layers_factorized"]),
               f"{p['mean_weight_error']:.4g}"]
        if name:
            row += [fmt_value(name, m["after"]), fmt_change(name, m["before"], m["after"], m["higher_is_better"])] if m \
                else ["—", ""]
        if has_lat:
            row += [fmt_ms(lat["after_ms"], unit=False) if lat else "—"]
        rows.append(row)
    secs = doc["wall_seconds"]
    return [f"sweep, method {doc['method']}: spectra and calibration once ({secs['prepare']:.2f} s), "
            f"all points {secs['points']:.2f} s", ""] + table(head, rows, right_from=1, whole="sweep.md")
