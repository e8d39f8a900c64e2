"""What the terminal shows: an aligned plain-text layer table sized to the terminal and a short
summary (Markdown stays in report.md). Numbers carry enough significant digits for their scale;
a change of a metric is always said as a *drop* or a *gain* in words, never by a bare sign.
"""

from __future__ import annotations

import os
import shutil
import sys

from .metrics import PERCENT
#: columns of the layer table left out first on a narrow terminal (report.md keeps them)
OPTIONAL_LAYER_COLUMNS = ("break-even", "params before", "kind", "energy kept", "matrix")


def fmt_value(name: str, value: float) -> str:
    """A metric value: percentages with two decimals; anything else with four significant digits
    (0.000338 stays 0.000338, never 0.00)."""
    return f"{value:.2f}%" if name in PERCENT else f"{value:.4g}"


def fmt_change(name: str, before: float, after: float, higher_is_better: bool) -> str:
    """``drop 0.62 points`` / ``gain 0.19 points`` / ``no change``; error metrics (lower is better)
    also as a ratio, so a regression from 0.000338 to 0.00468 reads "x13.8 worse"."""
    worse = (before - after) if higher_is_better else (after - before)
    if worse == 0:
        return "no change"
    word = "drop" if worse > 0 else "gain"
    unit = " points" if name in PERCENT else ""
    text = f"{word} {abs(worse):.4g}{unit}"
    if not higher_is_better and before > 0:
        ratio = after / before
        text += f", x{ratio:.3g} {'worse' if ratio > 1 else 'better'}"
    return text


def table(head: list[str], rows: list[list[str]], width: int | None = None, right_from: int = 2,
          optional: tuple[str, ...] = ()) -> list[str]:
    """An aligned plain-text table; columns from ``right_from`` on are right-aligned. When it is
    wider than ``width`` (the terminal's; no limit when the output is not a terminal and COLUMNS
    is unset, so logs keep everything), in this order: the first column's dotted names are
    abbreviated, every part but the last to its first letter with indices kept
    (``_blocks.13._project_conv`` becomes ``_b.13._project_conv``) while they stay distinct; the
    ``optional`` columns are left out, in the order given; the names are cut in the middle
    (``...``). A last line then says what was shortened."""
    if width is None:
        width = shutil.get_terminal_size((120, 24)).columns \
            if "COLUMNS" in os.environ or sys.stdout.isatty() else 1 << 30
    head, rows = list(head), [list(r) for r in rows]

    def too_wide():
        widths = [max(len(str(r[i])) for r in [head] + rows) for i in range(len(head))]
        return sum(widths) + 2 * (len(widths) - 1) - width

    said = []
    if too_wide() > 0:
        short = [_abbreviate(str(r[0])) for r in rows]
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
        rows = [[_middle(str(r[0]), cut)] + r[1:] for r in rows]
        said.append("long names cut")
    widths = [max(len(str(r[i])) for r in [head] + rows) for i in range(len(head))]

    def line(cells):
        return "  ".join(str(c).rjust(w) if i >= right_from else str(c).ljust(w)
                         for i, (c, w) in enumerate(zip(cells, widths))).rstrip()

    note = [f"(shortened to fit the terminal: {'; '.join(said)}; report.md has the whole table)"] if said else []
    return [line(head), line(["-" * w for w in widths])] + [line(r) for r in rows] + note


def _abbreviate(name: str) -> str:
    parts = name.split(".")
    return ".".join([p if p.isdigit() else p[: 2 if p.startswith("_") else 1] for p in parts[:-1]] + parts[-1:])


def _middle(text: str, n: int) -> str:
    return text if len(text) <= n else text[: (n - 3) // 2] + "..." + text[-(n - 3 - (n - 3) // 2):]


def layer_rows(report: dict) -> tuple[list[str], list[list[str]]]:
    has_out = any(e.get("output_error") is not None for e in report["layers"])
    head = ["layer", "kind", "matrix", "rank", "break-even", "params before", "params after", "energy kept",
            "weight error"] + (["output error"] if has_out else [])
    rows = []
    for e in report["layers"]:
        row = [e["name"], e["kind"], "x".join(str(v) for v in e["matrix_shape"]),
               "dense" if e["rank"] is None else str(e["rank"]), str(e["break_even_rank"]),
               f"{e['params_before']:,}", f"{e['params_after']:,}", f"{100 * e['energy_kept']:.2f}%",
               f"{e['weight_error']:.4g}"]
        if has_out:
            row.append("" if e.get("output_error") is None else f"{e['output_error']:.4g}")
        rows.append(row)
    return head, rows


def summary(report: dict, out=None, files: list[str] | None = None) -> list[str]:
    """The few lines after the table: budget, parameters and size, metric, latency, files."""
    t, b = report["totals"], report["budget"]
    lines = []
    if b["limit"] is not None:
        lines.append(f"budget {b['given']}: {'met' if b['met'] else 'NOT met'} ({b['used']:,.0f} of {b['limit']:,.0f} "
                     f"{b['units']} allowed)")
    else:
        lines.append(f"budget {b['given']}: every layer within it")
    mb = 4 / 1e6  # float32 bytes, in MB
    whole = t["model_params_after"] / t["model_params_before"] if t["model_params_before"] else 1.0
    # each count beside its own share: the selected layers' (what the budget is of) and the whole model's
    lines.append(f"parameters: selected layers {t['params_before']:,} -> {t['params_after']:,} "
                 f"({100 * t['params_ratio']:.1f}%); whole model {t['model_params_before']:,} -> "
                 f"{t['model_params_after']:,} ({100 * whole:.1f}%); float32 "
                 f"{t['model_params_before'] * mb:.2f} -> {t['model_params_after'] * mb:.2f} MB")
    m = report.get("metric")
    if m:
        lines.append(f"held-out {m['name']} {fmt_value(m['name'], m['before'])} -> {fmt_value(m['name'], m['after'])} "
                     f"({fmt_change(m['name'], m['before'], m['after'], m['higher_is_better'])}; {counted(m)})")
    lat = report.get("latency")
    if lat:
        lines.append(f"latency {lat['before_ms']:.3g} -> {lat['after_ms']:.3g} ms (x{lat['speedup']:.2f}; FLOPs predict "
                     f"x{lat['predicted_speedup'] or 1:.2f}; {lat['runtime']}, batch {lat['batch']}, "
                     f"{lat['threads']} thread{'s' if lat['threads'] != 1 else ''})"
                     + ("; SLOWER than the original on this CPU" if lat["speedup"] < 1 else ""))
    if out is None:
        lines.append("nothing was written (no --out)")
    else:
        lines.append(f"wrote {str(out).rstrip('/')}/ ({', '.join(files or [])})")
    return lines


def counted(metric: dict) -> str:
    """What a metric was counted over: samples, or positions of sequences (and what masked them)."""
    pos = metric.get("per_position")
    if pos is None:
        return f"{metric['samples']} samples"
    by = f", {' and '.join(pos['masked_by'])} honoured" if pos["masked_by"] else ""
    return f"{pos['positions']} positions{by}"
