"""report.html and sweep.html: one self-contained file each, plots drawn by matplotlib as inline
SVG (the figures and the rules behind them are in report_plots.py). No network requests, scripts or
web fonts; every number is written by formatting.py, as in the terminal and the Markdown reports.
"""

from __future__ import annotations

import html

from .formatting import (NOT_APPLICABLE, counted, fmt_change, fmt_count, fmt_error, fmt_kept, fmt_mb, fmt_ms, fmt_points,
                         fmt_rank, fmt_ratio, fmt_share, fmt_value)
from .metrics import HIGHER_IS_BETTER
from .report import summary_line, weights_size
from .report_plots import (latency_rounds_fig, layer_time_fig, layer_tooltip, overview_fig, params_fig, spectrum_fig,
                           suggest_budget, svg, sweep_fig)

CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", sans-serif; margin: 2rem auto; max-width: 1100px;
       padding: 0 1rem; color: #1a1a1a; line-height: 1.45; }
h1 { font-size: 1.6rem; } h2 { font-size: 1.25rem; margin-top: 2rem; border-bottom: 1px solid #ccc; }
table { border-collapse: collapse; margin: 0.5rem 0; font-size: 0.9rem; }
th, td { border: 1px solid #ccc; padding: 0.25rem 0.5rem; text-align: right; }
th { background: #f2f2f2; } td:first-child, th:first-child { text-align: left; }
code { font-size: 0.9em; }
.summary td:first-child { font-weight: 600; } .summary td { text-align: left; }
.skipped td { text-align: left; }
.grid { display: grid; grid-template-columns: repeat(auto-fill, minmax(420px, 1fr)); gap: 0.75rem; }
figure { margin: 0; border: 1px solid #e0e0e0; padding: 0.25rem; break-inside: avoid; }
figure svg { width: 100%; height: auto; display: block; }
figure.chart { max-width: 760px; }
figcaption { font-size: 0.8rem; color: #444; }
p.suggested { font-size: 1.05rem; } tr.suggested td { background: #fff3cc; }
.bad { color: #b00020; font-weight: 600; } .good { color: #006b3c; font-weight: 600; }
@media print { body { margin: 0; max-width: none; } h2 { break-after: avoid; } section { break-inside: avoid; }
               .grid { grid-template-columns: repeat(2, 1fr); } }
"""


#: Per-layer spectrum figures drawn at most (the largest layers): each takes ~0.15 s and a model with
#: hundreds of layers would otherwise spend more time on plots than on the SVDs.
SPECTRUM_FIGURES = 12


def _spectrum_layers(layers: list[dict], spectra: dict) -> list[dict]:
    """The layers whose spectra are drawn: all of them, or the SPECTRUM_FIGURES largest, in model order."""
    have = [e for e in layers if e["name"] in spectra]
    if len(have) <= SPECTRUM_FIGURES:
        return have
    keep = {e["name"] for e in sorted(have, key=lambda e: -e["params_before"])[:SPECTRUM_FIGURES]}
    return [e for e in have if e["name"] in keep]


def spectrum_figure(entry: dict, spectrum) -> str:
    return svg(spectrum_fig(entry, spectrum))


def overview_figure(layers: list[dict]) -> str:
    """The all-layers chart, each bar and label with its layer's full name as a tooltip."""
    tips = {}
    for i, e in enumerate(layers):
        tips[f"ov-bar-{i}"] = tips[f"ov-label-{i}"] = layer_tooltip(e)
    return svg(overview_fig(layers, gid="ov"), tips)


def params_figure(layers: list[dict]) -> str:
    return svg(params_fig(layers, gid="pp"), {f"pp-label-{i}": layer_tooltip(e) for i, e in enumerate(layers)})


def _shape(e: dict) -> str:
    return "×".join(map(str, e["matrix_shape"]))


def _int8_section(report: dict) -> list[str]:
    """The int8 comparison: what most edge deployments decide on, so it comes first."""
    q = report.get("int8")
    if not q:
        return []
    esc, name = html.escape, q["metric"]
    better = HIGHER_IS_BETTER.get(name, True)
    rows = [[esc(v["name"]), fmt_mb(v["size_bytes"]), fmt_value(name, v["metric"]),
             esc(fmt_change(name, v["metric"] - v["delta"], v["metric"], better)),
             NOT_APPLICABLE if v.get("latency_ms") is None else fmt_ms(v["latency_ms"])] for v in q["variants"]]
    how = ", ".join(esc(str(q[k])) for k in ("quantization", "runtime") if q.get(k))
    return ["<section id=\"int8\"><h2>int8 on top</h2>", f"<p>{how}; change against the original.</p>" if how else "",
            _table(["variant", "size on disk", esc(name), "change", "median latency"], rows, "int8"), "</section>"]


def _review_sections(report: dict) -> list[str]:
    """What a reviewer reads first: the layers with the largest output error, and per-class
    accuracy (the classes that lost most) when the held-out set has labels."""
    from .report import worst_classes

    esc = html.escape
    out = []
    flagged = sorted((e for e in report["layers"] if e.get("output_error") is not None and e["rank"] is not None),
                     key=lambda e: -e["output_error"])[:5]
    if flagged:
        rows = [[f"<code>{esc(e['name'])}</code>", esc(e["kind"]), _shape(e), fmt_rank(e["rank"]),
                 fmt_error(e["output_error"], e["rank"]), fmt_error(e["weight_error"], e["rank"])] for e in flagged]
        out += ["<section id=\"review\"><h2>Layers to review</h2><p>The factorized layers with the largest relative "
                "output error on held-out inputs.</p>",
                _table(["layer", "kind", "matrix", "rank", "output error", "weight error"], rows, "flagged"), "</section>"]
    m = report.get("metric")
    if m and m.get("per_class"):
        rows = [[str(r["class"]), fmt_count(r["samples"]), fmt_value("top1", r["before"]), fmt_value("top1", r["after"]),
                 esc(fmt_change("top1", r["before"], r["after"], True))] for r in worst_classes(m, len(m["per_class"]))]
        out += ["<section id=\"per-class\"><h2>Per class</h2><p>Held-out " + esc(m["name"]) + " per class, the classes "
                "that lost most first: an average can hide a class that collapsed.</p>",
                _table(["class", "samples", "before", "after", "change"], rows, "per-class"), "</section>"]
    sr = report.get("search")
    if sr:
        name = m["name"] if m else ""
        chooser = "the selection set" if sr.get("selection") else "the held-out set, so the held-out figure is optimistic"
        rows = [[f"<code>{esc(t['budget'])}</code>", fmt_value(name, t["metric"]), fmt_points(name, t["drop"]),
                 "yes" if t["within"] else "no"] for t in sr["tried"]]
        out += [f"<section id=\"search\"><h2>Budget search</h2><p>Chosen: <code>{esc(sr['chosen'])}</code>, the "
                f"smallest params budget within a drop of {esc(fmt_points(name, sr['keep_within']))}; chosen on {chooser}.</p>",
                _table(["budget", "metric", "drop", "within"], rows, "search"), "</section>"]
    return out


#: Layers whose cost tables are plotted (the slowest dense ones): enough to review the plan's big moves.
TIME_FIGURES = 8


def _latency_section(report: dict) -> list[str]:
    """A latency plan: the check's rounds, and time against rank for the slowest layers."""
    lp = report.get("latency_plan")
    if not lp:
        return []
    esc = html.escape
    out = ["<section id=\"latency-plan\"><h2>Latency plan</h2>",
           f"<p>Cost tables {esc(lp['source'])}; the original {fmt_ms(lp['original_ms'])}, of which "
           f"{fmt_ms(lp['rest_ms'])} outside the selected layers; plan predicted at {fmt_ms(lp['predicted_ms'])} "
           f"(limit {fmt_ms(lp['limit_ms'])}).</p>"]
    if lp["rounds"]:
        out.append(f"<figure class=\"chart\">{svg(latency_rounds_fig(lp))}<figcaption>Each round of the check on "
                   "this CPU: the plan's predicted time and the rewrite's measured time, both as a share of the "
                   "original's; vermillion line: the budget.</figcaption></figure>")
    elif lp.get("why_unchecked"):
        out.append(f"<p class=\"bad\">Not checked on this CPU: {esc(lp['why_unchecked'])}.</p>")
    tables = {t["name"]: t for t in lp.get("tables", [])}
    ranked = sorted((e for e in report["layers"] if e["name"] in tables), key=lambda e: -tables[e["name"]]["dense_ms"])
    if ranked:
        out.append(f"<p>Time against rank of the {min(len(ranked), TIME_FIGURES)} slowest layers (dense), as the "
                   "plan counts it: circles measured, line fitted (never falling with rank), dashed line the dense "
                   "layer, vermillion line the chosen rank.</p><div class=\"grid\">")
        for e in ranked[:TIME_FIGURES]:
            caption = f"<code>{esc(e['name'])}</code> {_shape(e)}: " + (
                "stays dense" if e["rank"] is None else f"rank {e['rank']}")
            out.append(f"<figure>{svg(layer_time_fig(tables[e['name']], e['rank'], lp['layer_scale']))}"
                       f"<figcaption>{caption}</figcaption></figure>")
        out.append("</div>")
    return out + ["</section>"]


def _table(head: list[str] | None, rows: list[list[str]], cls: str = "", row_classes: list[str] | None = None) -> str:
    out = [f'<table class="{cls}">' if cls else "<table>"]
    if head:
        out.append("<tr>" + "".join(f"<th>{html.escape(h)}</th>" for h in head) + "</tr>")
    for i, row in enumerate(rows):
        rc = row_classes[i] if row_classes else ""
        out.append((f'<tr class="{rc}">' if rc else "<tr>") + "".join(f"<td>{c}</td>" for c in row) + "</tr>")
    return "\n".join(out + ["</table>"])


def _page(title: str, body: list[str]) -> str:
    return "\n".join([
        "<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{html.escape(title)}</title>", f"<style>{CSS}</style></head><body>", *body, "</body></html>", ""])


def _summary_rows(report: dict) -> list[list[str]]:
    t, b, m = report["totals"], report["budget"], report.get("metric")
    esc = html.escape
    rows = [
        ["model", f"<code>{esc(str(report['sources'].get('model', '')))}</code>"],
        ["budget", f"<code>{esc(b['given'])}</code>" + (f" — limit {fmt_count(b['limit'])} {b['units']}, "
                                                       f"under by {fmt_count(b['under_by'])}" if b["limit"] is not None else "")],
        ["method", esc(report["method"]) + (" + sequential refits" if report.get("sequential") else "")
         + (" + recovery" if report.get("recovery") else "")],
        ["parameters (selected layers)", f"{fmt_count(t['params_before'])} → {fmt_count(t['params_after'])} "
                                         f"({fmt_share(t['params_ratio'])})"],
        ["parameters (whole model)", f"{fmt_count(t['model_params_before'])} → {fmt_count(t['model_params_after'])}"],
        [f"size ({esc(t.get('weight_dtype', 'float32'))} weights)",
         f"{weights_size(t, 'before')} → {weights_size(t, 'after')}"],
    ]
    if "flops_before" in t:
        rows.append(["multiply-adds per sample", f"{fmt_count(t['flops_before'])} → {fmt_count(t['flops_after'])} "
                                                 f"({fmt_share(t['flops_ratio'])})"])
    if m:
        worse = m["delta"] < 0 if m["higher_is_better"] else m["delta"] > 0
        rows.append([f"held-out {esc(m['name'])}", f"{fmt_value(m['name'], m['before'])} → {fmt_value(m['name'], m['after'])} "
                     f"<span class=\"{'bad' if worse else 'good'}\">"
                     f"({esc(fmt_change(m['name'], m['before'], m['after'], m['higher_is_better']))})</span> "
                     f"on {esc(counted(m))}"])
    lat = report.get("latency")
    if lat:
        rows.append(["CPU latency", f"{fmt_ms(lat['before_ms'])} → {fmt_ms(lat['after_ms'])} ({fmt_ratio(lat['speedup'])} "
                     f"speed; FLOPs predict {fmt_ratio(lat['predicted_speedup'] or 1)}) — {esc(lat['runtime'])}, batch "
                     f"{lat['batch']}, {lat['threads']} thread(s)"])
    return rows


def render_report_html(report: dict, spectra: dict) -> str:
    """The whole report.html as a string."""
    esc = html.escape
    body = ["<h1>Factorization report</h1>", f"<p>{esc(summary_line(report))}.</p>",
            "<section><h2>Summary</h2>", _table(None, _summary_rows(report), "summary"), "</section>"]
    body += _int8_section(report)
    body += _review_sections(report)
    body += _latency_section(report)
    body += ["<section id=\"overview\"><h2>All layers</h2>", f"<figure>{overview_figure(report['layers'])}"
             "<figcaption>Bars, one per layer in model order and labelled by its name (hover for the full name): the "
             "share of parameters each layer keeps; grey bars: layers left dense (100%). Vermillion diamonds: output "
             "error of the factorized layers on held-out inputs (right axis). Both axes start at zero.</figcaption>"
             "</figure></section>"]
    many = len(report["layers"]) > 40
    body += ["<section><h2>Parameters per layer</h2>", "<details><summary>show the chart</summary>" if many else "",
             f"<figure>{params_figure(report['layers'])}"
             "<figcaption>Grey: before; blue, hatched: after.</figcaption></figure>", "</details>" if many else "",
             "</section>"]
    label = "W·S (whitened)" if report["method"] == "whitened" else ("pivoted-QR steps" if report["method"] == "columns" else "W")
    body += [f"<section><h2>Spectra</h2><details open><summary>per-layer spectra</summary><p>Per layer: the "
             f"singular values of {label} and the share of energy discarded at each rank, both on log scales. "
             "Solid vermillion line: chosen rank; dashed grey line: break-even rank (at or above it two factors "
             "save nothing).</p><div class=\"grid\">"]
    plotted = _spectrum_layers(report["layers"], spectra)
    if len(plotted) < sum(1 for e in report["layers"] if e["name"] in spectra):
        body.append(f"<p>The {len(plotted)} largest layers are plotted; the table below lists every layer.</p>")
    for e in plotted:
        caption = f"<code>{esc(e['name'])}</code> {esc(e['kind'])} {_shape(e)}: " + (
            "stays dense" if e["rank"] is None else f"rank {e['rank']}, energy kept {fmt_share(e['energy_kept'])}")
        body.append(f"<figure>{spectrum_figure(e, spectra[e['name']])}<figcaption>{caption}</figcaption></figure>")
    body.append("</div></details></section>")
    head = ["layer", "kind", "matrix", "rank", "break-even", "params before", "params after", "energy kept", "weight error"]
    has_out = any("output_error" in e for e in report["layers"])
    if has_out:
        head.append("output error")
    table = []
    for e in report["layers"]:
        row = [f"<code>{esc(e['name'])}</code>", esc(e["kind"]), _shape(e), fmt_rank(e["rank"]), str(e["break_even_rank"]),
               fmt_count(e["params_before"]), fmt_count(e["params_after"]), fmt_kept(e["energy_kept"], e["rank"]),
               fmt_error(e["weight_error"], e["rank"])]
        if has_out:
            row.append(fmt_error(e.get("output_error"), e["rank"]))
        table.append(row)
    body += ["<section id=\"layers\"><h2>Layers</h2>", _table(head, table, "layers"), "</section>"]
    if report["skipped"]:
        body += ["<section><h2>Skipped layers</h2>",
                 _table(["layer", "kind", "reason"], [[f"<code>{esc(s['name'])}</code>", esc(s["kind"]), esc(s["reason"])]
                                                      for s in report["skipped"]], "skipped"), "</section>"]
    cal = report.get("calibration")
    if cal:
        body += ["<section><h2>Calibration</h2>", f"<p>{fmt_count(cal['samples'])} samples from "
                 f"<code>{esc(cal['source'])}</code>; Gram matrices {fmt_mb(cal['gram_bytes'])}; "
                 f"peak process memory {fmt_mb(cal['peak_rss_bytes'])}.</p>"]
        body += [f"<p class=\"bad\">warning: {esc(w)}</p>" for w in cal["warnings"]] + ["</section>"]
    body.append(f"<p><small>factorize-weights {esc(report['tool_version'])}, {esc(report['created'])}</small></p>")
    return _page("Factorization report", body)


# ---------------------------------------------------------------- sweep.html


def _drop(m: dict) -> float:
    return m["before"] - m["after"] if m["higher_is_better"] else m["after"] - m["before"]


def sweep_suggestion(sweep: dict, allowed_drop: float | None = None):
    """The sweep's suggested budget (report_plots.suggest_budget) on its points; ``allowed_drop``
    defaults to the document's ``keep_within`` when it carries one. None without a held-out metric."""
    points = [p for p in sweep["points"] if p.get("metric")]
    if not points:
        return None
    if allowed_drop is None:
        allowed_drop = sweep.get("keep_within")
    return suggest_budget([(p["budget"], p["params_ratio_pct"], _drop(p["metric"])) for p in points], allowed_drop,
                          points[0]["metric"]["name"])


def _ms(median: float, spread) -> str:
    return f"{fmt_ms(median)} [{fmt_ms(spread[0], unit=False)}–{fmt_ms(spread[1])}]"


def _sweep_baseline(points: list[dict]) -> list[list[str]]:
    """The original model as the first row of the points table."""
    if not points:
        return []
    p, m, lat = points[0], points[0].get("metric"), points[0].get("latency")
    return [["original", fmt_share(1.0), fmt_count(p["params_before"]), "0",
             "" if not m else fmt_value(m["name"], m["before"]), "",
             "" if not lat else _ms(lat["before_ms"], lat["before_spread_ms"])]]


def render_sweep_html(sweep: dict, allowed_drop: float | None = None) -> str:
    """The whole sweep.html as a string; ``allowed_drop`` (the metric's units) chooses the
    suggested budget when given (see :func:`sweep_suggestion`)."""
    esc = html.escape
    points = sweep["points"]
    body = ["<h1>Budget sweep</h1>", f"<p>{len(points)} budgets, method <code>{esc(sweep['method'])}</code>, "
            f"spectra and calibration computed once ({sweep['wall_seconds']['prepare']:.2f} s), then "
            f"{sweep['wall_seconds']['points']:.2f} s for all points.</p>"]
    sug = sweep_suggestion(sweep, allowed_drop)
    chosen = sug.budget if sug else None
    if sug is not None:
        said = f"<code>{esc(sug.budget)}</code> — {esc(sug.why)}" if sug.budget else f"none — {esc(sug.why)}"
        body.append(f"<p class=\"suggested\" id=\"suggested\"><strong>Suggested budget:</strong> {said}.</p>")
    if points and all(p.get("metric") for p in points):
        fig, _ = sweep_fig(points, suggested=chosen)
        ring = "; black ring and dotted line: the suggested budget" if chosen else ""
        body.append(f"<figure class=\"chart\">{svg(fig)}<figcaption>Held-out metric against parameters kept; grey "
                    f"diamond and dashed line: the original model{ring}.</figcaption></figure>")
        if all(p.get("latency") for p in points):
            fig, notes = sweep_fig(points, latency=True, suggested=chosen)
            body.append(f"<figure class=\"chart\">{svg(fig)}"
                        "<figcaption>Held-out metric against measured CPU latency (median; bars: 10th to 90th "
                        "percentile); grey diamond: the original model" + ("; black ring: the suggested budget" if chosen
                                                                          else "") + ". The latency axis covers the "
                        "medians and their bars, not single slow runs" + "".join(f"; {esc(n)}" for n in notes)
                        + ".</figcaption></figure>")
    name = points[0]["metric"]["name"] if points and points[0].get("metric") else "metric"
    head = ["budget", "params kept", "parameters after", "layers factorized", f"held-out {name}", f"change in {name}",
            "median latency [p10-p90]"]
    rows, marks = _sweep_baseline(points), [""] * len(_sweep_baseline(points))
    for p in points:
        m, lat = p.get("metric"), p.get("latency")
        rows.append([f"<code>{esc(p['budget'])}</code>" + (" (suggested)" if p["budget"] == chosen else ""),
                     fmt_share(p["params_ratio_pct"] / 100), fmt_count(p["params_after"]), str(p["layers_factorized"]),
                     "" if not m else fmt_value(m["name"], m["after"]),
                     "" if not m else esc(fmt_change(m["name"], m["before"], m["after"], m["higher_is_better"])),
                     "" if not lat else _ms(lat["after_ms"], lat["after_spread_ms"])])
        marks.append("suggested" if p["budget"] == chosen else "")
    body += ["<h2>Points</h2>", _table(head, rows, "points", marks)]
    return _page("Budget sweep", body)
