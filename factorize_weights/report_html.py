"""report.html and sweep.html: one self-contained file each, plots drawn by matplotlib as inline
SVG. No network requests, scripts or web fonts; colours from the Okabe-Ito palette (distinguishable
with the common colour-vision deficiencies) and every series also differs in line style or marker.
"""

from __future__ import annotations

import html
import io

import numpy as np

from .report import fmt_int, fmt_metric, summary_line
from .terminal import fmt_change

# Okabe & Ito, "Color Universal Design" (2008): safe for protanopia, deuteranopia, tritanopia
BLUE, ORANGE, VERMILLION, GREEN, GREY = "#0072B2", "#E69F00", "#D55E00", "#009E73", "#666666"

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
.bad { color: #b00020; font-weight: 600; } .good { color: #006b3c; font-weight: 600; }
@media print { body { margin: 0; max-width: none; } h2 { break-after: avoid; } section { break-inside: avoid; }
               .grid { grid-template-columns: repeat(2, 1fr); } }
"""


def _svg(fig) -> str:
    """The figure as an inline <svg> element (text kept as text, no fonts embedded)."""
    import matplotlib.pyplot as plt

    buf = io.StringIO()
    # no metadata block: no dates (reproducible files) and no namespace URLs in the page
    fig.savefig(buf, format="svg", metadata={"Creator": None, "Date": None, "Format": None, "Type": None})
    plt.close(fig)
    text = buf.getvalue()
    return text[text.index("<svg"):]


def _pyplot():
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    plt.rcParams.update({"svg.fonttype": "none", "font.size": 9, "axes.spines.top": False,
                         "axes.spines.right": False, "figure.dpi": 100})
    return plt


def spectrum_figure(entry: dict, spectrum) -> str:
    """Singular values on a log scale with the chosen and break-even ranks, and the energy curve."""
    plt = _pyplot()
    fig, (ax, bx) = plt.subplots(1, 2, figsize=(6.4, 2.6))
    s = np.asarray(spectrum.singular_values, dtype=float)
    ranks = np.arange(1, len(s) + 1)
    positive = s > 0
    ax.semilogy(ranks[positive], s[positive], color=BLUE, lw=1.4)
    discarded = np.maximum(1.0 - spectrum.energy_curve(), 1e-12)  # near 100% kept, a log scale shows the rest
    bx.semilogy(ranks, discarded, color=BLUE, lw=1.4)
    for axis in (ax, bx):
        axis.axvline(entry["break_even_rank"], color=GREY, ls="--", lw=1, label=f"break-even {entry['break_even_rank']}")
        if entry["rank"] is not None:
            axis.axvline(entry["rank"], color=VERMILLION, ls="-", lw=1.6, label=f"chosen rank {entry['rank']}")
        axis.set_xlabel("rank")
    ax.set_ylabel("singular value")
    bx.set_ylabel("energy discarded")
    ax.legend(fontsize=8, frameon=False, loc="upper right")
    from matplotlib.ticker import MaxNLocator

    for axis in (ax, bx):
        axis.xaxis.set_major_locator(MaxNLocator(integer=True))
    # a fixed layout and plain tick labels: tight_layout and TeX-style log labels took most of the
    # time per figure (0.35 s; measured on a 12-layer model)
    from matplotlib.ticker import LogFormatter, NullFormatter

    for axis in (ax, bx):
        axis.yaxis.set_major_formatter(LogFormatter(labelOnlyBase=True))
        axis.yaxis.set_minor_formatter(NullFormatter())
    fig.subplots_adjust(left=0.13, right=0.98, bottom=0.2, top=0.95, wspace=0.45)
    return _svg(fig)


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


def _review_sections(report: dict) -> list[str]:
    """What a reviewer reads first: the layers with the largest output error, and per-class
    accuracy (the classes that lost most) when the held-out set has labels."""
    from .report import worst_classes

    esc = html.escape
    out = []
    flagged = sorted((e for e in report["layers"] if e.get("output_error") is not None and e["rank"] is not None),
                     key=lambda e: -e["output_error"])[:5]
    if flagged:
        rows = [[f"<code>{esc(e['name'])}</code>", esc(e["kind"]), "×".join(map(str, e["matrix_shape"])), str(e["rank"]),
                 f"{e['output_error']:.4g}", f"{e['weight_error']:.4g}"] for e in flagged]
        out += ["<section id=\"review\"><h2>Layers to review</h2><p>The factorized layers with the largest relative "
                "output error on held-out inputs.</p>",
                _table(["layer", "kind", "matrix", "rank", "output error", "weight error"], rows, "flagged"), "</section>"]
    m = report.get("metric")
    if m and m.get("per_class"):
        rows = [[str(r["class"]), str(r["samples"]), f"{r['before']:.2f}%", f"{r['after']:.2f}%",
                 esc(fmt_change("top1", r["before"], r["after"], True))] for r in worst_classes(m, len(m["per_class"]))]
        out += ["<section id=\"per-class\"><h2>Per class</h2><p>Held-out " + esc(m["name"]) + " per class, the classes "
                "that lost most first: an average can hide a class that collapsed.</p>",
                _table(["class", "samples", "before", "after", "change"], rows, "per-class"), "</section>"]
    sr = report.get("search")
    if sr:
        chooser = "the selection set" if sr.get("selection") else "the held-out set, so the held-out figure is optimistic"
        rows = [[f"<code>{esc(t['budget'])}</code>", f"{t['metric']:.4g}", f"{t['drop']:.4g}", "yes" if t["within"] else "no"]
                for t in sr["tried"]]
        out += [f"<section id=\"search\"><h2>Budget search</h2><p>Chosen: <code>{esc(sr['chosen'])}</code>, the "
                f"smallest params budget within a drop of {sr['keep_within']:g} {esc(sr['unit'])}; chosen on {chooser}.</p>",
                _table(["budget", "metric", "drop", "within"], rows, "search"), "</section>"]
    return out


def _size(n: int) -> str:
    return f"{n / 2**20:.2f} MiB" if n >= 2**20 else f"{n / 2**10:.1f} KiB"


def overview_figure(layers: list[dict]) -> str:
    """All layers at a glance, whatever their number: the share of parameters each keeps (bars, in
    model order) and its output error where measured (dots, right axis)."""
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(7.5, 2.6))
    x = np.arange(len(layers))
    kept = [100 * e["params_after"] / max(e["params_before"], 1) for e in layers]
    ax.bar(x, kept, width=0.8, color=BLUE, label="parameters kept (%)")
    ax.set_ylim(0, 105)
    ax.set_ylabel("parameters kept (%)")
    ax.set_xlabel("layer (model order)")
    from matplotlib.ticker import MaxNLocator

    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    errs = [(i, e["output_error"]) for i, e in enumerate(layers) if e.get("output_error") is not None and e["rank"]]
    if errs:
        bx = ax.twinx()
        bx.plot([i for i, _ in errs], [v for _, v in errs], ls="none", marker="D", ms=4, color=VERMILLION,
                label="output error")
        bx.set_ylabel("output error")
        bx.spines["right"].set_visible(True)
    fig.tight_layout()
    return _svg(fig)


def params_figure(layers: list[dict]) -> str:
    """Parameters per layer before and after, horizontal bars (hatched after)."""
    plt = _pyplot()
    names = [e["name"] for e in layers]
    fig, ax = plt.subplots(figsize=(7.5, 0.32 * len(names) + 1.0))
    y = np.arange(len(names))
    ax.barh(y - 0.2, [e["params_before"] for e in layers], 0.4, color=GREY, label="before")
    ax.barh(y + 0.2, [e["params_after"] for e in layers], 0.4, color=BLUE, hatch="//", edgecolor="white",
            label="after")
    ax.set_yticks(y, names)
    ax.invert_yaxis()
    ax.set_xlabel("parameters")
    ax.legend(frameon=False)
    fig.tight_layout()
    return _svg(fig)


def _table(head: list[str] | None, rows: list[list[str]], cls: str = "") -> str:
    out = [f'<table class="{cls}">' if cls else "<table>"]
    if head:
        out.append("<tr>" + "".join(f"<th>{html.escape(h)}</th>" for h in head) + "</tr>")
    out += ["<tr>" + "".join(f"<td>{c}</td>" for c in row) + "</tr>" for row in rows]
    return "\n".join(out + ["</table>"])


def _page(title: str, body: list[str]) -> str:
    return "\n".join([
        "<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{html.escape(title)}</title>", f"<style>{CSS}</style></head><body>", *body, "</body></html>", ""])


def render_report_html(report: dict, spectra: dict) -> str:
    """The whole report.html as a string."""
    t, b, m = report["totals"], report["budget"], report.get("metric")
    esc = html.escape
    rows = [
        ["model", f"<code>{esc(str(report['sources'].get('model', '')))}</code>"],
        ["budget", f"<code>{esc(b['given'])}</code>" + (f" — limit {fmt_int(b['limit'])} {b['units']}, "
                                                       f"under by {fmt_int(b['under_by'])}" if b["limit"] is not None else "")],
        ["method", esc(report["method"]) + (" + sequential refits" if report.get("sequential") else "")
         + (" + recovery" if report.get("recovery") else "")],
        ["parameters (selected layers)", f"{fmt_int(t['params_before'])} → {fmt_int(t['params_after'])} "
                                         f"({100 * t['params_ratio']:.1f}%)"],
        ["parameters (whole model)", f"{fmt_int(t['model_params_before'])} → {fmt_int(t['model_params_after'])}"],
        ["size (float32 weights)",
         f"{t['model_params_before'] * 4 / 2**20:.2f} MiB → {t['model_params_after'] * 4 / 2**20:.2f} MiB"],
    ]
    if "flops_before" in t:
        rows.append(["multiply-adds per sample", f"{fmt_int(t['flops_before'])} → {fmt_int(t['flops_after'])} "
                                                 f"({100 * t['flops_ratio']:.1f}%)"])
    if m:
        worse = m["delta"] < 0 if m["higher_is_better"] else m["delta"] > 0
        rows.append([f"held-out {esc(m['name'])}", f"{fmt_metric(m['name'], m['before'])} → {fmt_metric(m['name'], m['after'])} "
                     f"<span class=\"{'bad' if worse else 'good'}\">"
                     f"({esc(fmt_change(m['name'], m['before'], m['after'], m['higher_is_better']))})</span> "
                     f"on {m['samples']} samples"])
    lat = report.get("latency")
    if lat:
        rows.append(["CPU latency", f"{lat['before_ms']:.3f} → {lat['after_ms']:.3f} ms (×{lat['speedup']:.2f}; "
                     f"FLOPs predict ×{lat['predicted_speedup'] or 1:.2f}) — {esc(lat['runtime'])}, batch {lat['batch']}, "
                     f"{lat['threads']} thread(s)"])
    body = ["<h1>Factorization report</h1>", f"<p>{esc(summary_line(report))}.</p>",
            "<section><h2>Summary</h2>", _table(None, rows, "summary"), "</section>"]
    body += _review_sections(report)
    body += ["<section id=\"overview\"><h2>All layers</h2>", f"<figure>{overview_figure(report['layers'])}"
             "<figcaption>Blue bars: share of parameters each layer keeps (100%: dense); vermillion diamonds: "
             "output error of the factorized layers on held-out inputs.</figcaption></figure></section>"]
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
        if e["name"] in spectra:
            caption = f"<code>{esc(e['name'])}</code> {esc(e['kind'])} {'×'.join(map(str, e['matrix_shape']))}: " + (
                "stays dense" if e["rank"] is None else f"rank {e['rank']}, energy kept {100 * e['energy_kept']:.1f}%")
            body.append(f"<figure>{spectrum_figure(e, spectra[e['name']])}<figcaption>{caption}</figcaption></figure>")
    body.append("</div></details></section>")
    head = ["layer", "kind", "matrix", "rank", "break-even", "params before", "params after", "energy kept", "weight error"]
    has_out = any("output_error" in e for e in report["layers"])
    if has_out:
        head.append("output error")
    table = []
    for e in report["layers"]:
        row = [f"<code>{esc(e['name'])}</code>", esc(e["kind"]), "×".join(map(str, e["matrix_shape"])),
               "dense" if e["rank"] is None else str(e["rank"]), str(e["break_even_rank"]), fmt_int(e["params_before"]),
               fmt_int(e["params_after"]), f"{100 * e['energy_kept']:.2f}%", f"{e['weight_error']:.4f}"]
        if has_out:
            row.append("" if e.get("output_error") is None else f"{e['output_error']:.4f}")
        table.append(row)
    body += ["<section><h2>Layers</h2>", _table(head, table), "</section>"]
    if report["skipped"]:
        body += ["<section><h2>Skipped layers</h2>",
                 _table(["layer", "kind", "reason"], [[f"<code>{esc(s['name'])}</code>", esc(s["kind"]), esc(s["reason"])]
                                                      for s in report["skipped"]], "skipped"), "</section>"]
    q = report.get("int8")
    if q:
        body += ["<section><h2>int8 on top</h2>", _table(["variant", "size on disk", esc(q["metric"]), "delta", "median ms"],
                 [[esc(v["name"]), _size(v['size_bytes']), fmt_metric(q["metric"], v["metric"]),
                   f"{v['delta']:+.2f}", "" if v["latency_ms"] is None else f"{v['latency_ms']:.3f}"]
                  for v in q["variants"]]), "</section>"]
    cal = report.get("calibration")
    if cal:
        body += ["<section><h2>Calibration</h2>", f"<p>{cal['samples']} samples from <code>{esc(cal['source'])}</code>; "
                 f"Gram matrices {cal['gram_bytes'] / 2**20:.1f} MiB; "
                 f"peak process memory {cal['peak_rss_bytes'] / 2**20:.0f} MiB.</p>"]
        body += [f"<p class=\"bad\">warning: {esc(w)}</p>" for w in cal["warnings"]] + ["</section>"]
    body.append(f"<p><small>factorize-weights {esc(report['tool_version'])}, {esc(report['created'])}</small></p>")
    return _page("Factorization report", body)


def sweep_figure(points: list[dict], x_key: str, x_label: str, *, line: bool = True,
                 baseline_x: float | None = None, spread: bool = False) -> str:
    """Held-out metric against ``x_key``; the original model as a baseline point at ``baseline_x``;
    with ``spread``, latency error bars from the 10th to the 90th percentile."""
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(6.0, 3.6))
    points = sorted(points, key=lambda p: p[x_key])
    xs = [p[x_key] for p in points]
    ys = [p["metric"]["after"] for p in points]
    xerr = None
    if spread:
        xerr = [[max(x - p["latency"]["after_spread_ms"][0], 0.0) for p, x in zip(points, xs)],
                [max(p["latency"]["after_spread_ms"][1] - x, 0.0) for p, x in zip(points, xs)]]
    ax.errorbar(xs, ys, xerr=xerr, color=BLUE, marker="o", lw=1.5 if line else 0, elinewidth=1, capsize=3,
                label="factorized")
    before = points[0]["metric"]["before"]
    ax.axhline(before, color=GREY, ls="--", lw=1)
    if baseline_x is not None:
        bxerr = None
        if spread:
            lo, hi = points[0]["latency"]["before_spread_ms"]
            bxerr = [[max(baseline_x - lo, 0.0)], [max(hi - baseline_x, 0.0)]]
        ax.errorbar([baseline_x], [before], xerr=bxerr, color=GREY, marker="D", lw=0, elinewidth=1, capsize=3,
                    label="original")
    offsets = [(5, -11), (5, 6), (5, -22), (5, 17)]  # staggered, so labels of nearby points do not overprint
    for i, (p, x, y) in enumerate(zip(points, xs, ys)):
        ax.annotate(p["budget"], (x, y), textcoords="offset points", xytext=offsets[i % len(offsets)], fontsize=7,
                    clip_on=True)
    ax.margins(x=0.12, y=0.15)  # room for the labels inside the axes
    ax.set_xlabel(x_label)
    ax.set_ylabel(f"held-out {points[0]['metric']['name']}")
    ax.legend(frameon=False, fontsize=8)
    fig.tight_layout()
    return _svg(fig)


def _ms(median: float, spread) -> str:
    return f"{median:.3f} [{spread[0]:.3f}-{spread[1]:.3f}]"


def _sweep_baseline(points: list[dict]) -> list[list[str]]:
    """The original model as the first row of the points table."""
    if not points:
        return []
    p, m, lat = points[0], points[0].get("metric"), points[0].get("latency")
    return [["original", "100.0%", fmt_int(p["params_before"]), "0",
             "" if not m else fmt_metric(m["name"], m["before"]), "",
             "" if not lat else _ms(lat["before_ms"], lat["before_spread_ms"])]]


def render_sweep_html(sweep: dict) -> str:
    esc = html.escape
    points = sweep["points"]
    body = ["<h1>Budget sweep</h1>", f"<p>{len(points)} budgets, method <code>{esc(sweep['method'])}</code>, "
            f"spectra and calibration computed once ({sweep['wall_seconds']['prepare']:.2f} s), then "
            f"{sweep['wall_seconds']['points']:.2f} s for all points.</p>"]
    if points and points[0].get("metric"):
        chart = sweep_figure(points, 'params_ratio_pct', 'parameters kept (% of selected layers)', baseline_x=100.0)
        body.append(f"<figure class=\"chart\">{chart}"
                    "<figcaption>Held-out metric against parameters kept; grey diamond and dashed line: the original "
                    "model.</figcaption></figure>")
        if all(p.get("latency") for p in points):
            for p in points:
                p["_after_ms"] = p["latency"]["after_ms"]
            base_ms = points[0]["latency"]["before_ms"]
            chart = sweep_figure(points, '_after_ms', 'measured median latency (ms)', line=False, baseline_x=base_ms,
                                 spread=True)
            body.append(f"<figure class=\"chart\">{chart}"
                        "<figcaption>Held-out metric against measured CPU latency (median; bars: 10th to 90th "
                        "percentile); grey diamond: the original model.</figcaption></figure>")
            for p in points:
                p.pop("_after_ms")
    name = points[0]["metric"]["name"] if points and points[0].get("metric") else "metric"
    head = ["budget", "params kept", "parameters after", "layers factorized", f"held-out {name}", f"change in {name}",
            "median ms [p10-p90]"]
    rows = _sweep_baseline(points) + [[f"<code>{esc(p['budget'])}</code>", f"{p['params_ratio_pct']:.1f}%",
                                       fmt_int(p["params_after"]),
             str(p["layers_factorized"]), "" if not p.get("metric") else fmt_metric(p["metric"]["name"], p["metric"]["after"]),
             "" if not p.get("metric") else esc(fmt_change(p["metric"]["name"], p["metric"]["before"], p["metric"]["after"],
                                                  p["metric"]["higher_is_better"])),
             "" if not p.get("latency") else _ms(p["latency"]["after_ms"], p["latency"]["after_spread_ms"])] for p in points]
    body += ["<h2>Points</h2>", _table(head, rows)]
    return _page("Budget sweep", body)
