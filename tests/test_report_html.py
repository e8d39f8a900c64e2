"""report.html and sweep.html: bars labelled by layer name, axes from zero, readable log axes, an
outlier-robust latency axis, the suggested budget, and the one number formatter. The figures are
inspected as matplotlib Axes before they become SVG; the pages are built from the demo."""

from __future__ import annotations

import html
import json
import re

import numpy as np
import pytest

from factorize_weights.cli import main
from factorize_weights.report_html import render_report_html, render_sweep_html
from factorize_weights.report_plots import (abbreviate, fmt_tick, layer_labels, overview_fig, params_fig, robust_limits,
                                            spectrum_fig, suggest_budget, sweep_fig, visible_tick_labels)
from factorize_weights.spectra import Spectrum

DEMO_LAYERS = ["0", "2", "5", "9", "11", "13"]  # the demo CNN's layer names (nn.Sequential indices)


@pytest.fixture(scope="module")
def demo_report(tmp_path_factory):
    out = tmp_path_factory.mktemp("report") / "run"
    assert main(["compress", "--demo", "--budget", "params=0.3", "--out", str(out), "-q", "--latency-repeats", "3"]) == 0
    return json.loads((out / "report.json").read_text()), (out / "report.html").read_text()


@pytest.fixture(scope="module")
def demo_sweep(tmp_path_factory):
    out = tmp_path_factory.mktemp("sweep") / "s"
    assert main(["sweep", "--demo", "--budgets", "params=0.8,0.5,0.3,0.2", "--out", str(out), "-q",
                 "--latency-repeats", "3", "--method", "svd"]) == 0
    return json.loads((out / "sweep.json").read_text()), (out / "sweep.html").read_text()


def _layers(names: list[str]) -> list[dict]:
    """Report layer entries by hand: every 7th left dense, the others at varied shares with an output error."""
    out = []
    for i, n in enumerate(names):
        dense = i % 7 == 0
        out.append({"name": n, "kind": "linear", "matrix_shape": [64, 64], "rank": None if dense else 4 + i % 5,
                    "break_even_rank": 32, "params_before": 4096, "params_after": 4096 if dense else 512 * (1 + i % 5),
                    "energy_kept": 1.0 if dense else 0.8, "weight_error": 0.0 if dense else 0.3,
                    "output_error": 0.0 if dense else 0.01 * (1 + i % 9)})
    return out


def _bert(blocks: int) -> list[str]:
    parts = ("attention.self.query", "attention.self.key", "attention.self.value", "attention.output.dense",
             "intermediate.dense", "output.dense")
    return [f"bert.encoder.layer.{b}.{p}" for b in range(blocks) for p in parts]


# ---------------------------------------------------------------- 1. bars labelled by layer name


def test_overview_bars_carry_the_layer_names_in_order(demo_report):
    report, page = demo_report
    assert [e["name"] for e in report["layers"]] == DEMO_LAYERS
    # the SVG text of each bar label, in order, with the full name in its <title> tooltip
    found = re.findall(r'<g id="ov-label-(\d+)"><title>([^<]*)</title>\s*<text[^>]*>([^<]*)</text>', page)
    assert [int(i) for i, _, _ in found] == list(range(len(DEMO_LAYERS)))
    assert [html.unescape(t) for _, _, t in found] == DEMO_LAYERS  # not the positions 0..5
    assert all(html.unescape(tip).startswith(f"{name}:") for (_, tip, _), name in zip(found, DEMO_LAYERS))
    assert len(re.findall(r'<g id="ov-bar-\d+"><title>', page)) == len(DEMO_LAYERS)


def test_long_names_lose_their_common_prefix_and_are_abbreviated():
    labels, prefix = layer_labels(_bert(2))
    assert prefix == "bert.encoder.layer."
    assert labels[:3] == ["0.a.self.query", "0.a.self.key", "0.a.self.value"]
    assert labels[4] == "0.intermediate.dense" and len(set(labels)) == len(labels)
    # alone, nothing is shared: indices and the last two parts stay whole
    assert abbreviate("bert.encoder.layer.0.attention.self.query") == "b.e.l.0.a.self.query"
    assert layer_labels(["bert.encoder.layer.0.attention.self.query"])[0] == ["b.e.l.0.a.self.query"]
    # abbreviations that would collide keep those names whole
    labels, _ = layer_labels(["encoder.attention.block.query", "embedding.attention.block.query", "x"])
    assert labels == ["encoder.attention.block.query", "embedding.attention.block.query", "x"]


def _label_boxes(fig, ax):
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    return [t for t in ax.get_xticklabels() if t.get_visible() and t.get_text()], renderer


@pytest.mark.parametrize("names", [DEMO_LAYERS, _bert(12), _bert(25)], ids=["6 layers", "72 layers", "150 layers"])
def test_overview_labels_do_not_collide(names):
    fig = overview_fig(_layers(names))
    ax = fig.axes[0]
    labels, renderer = _label_boxes(fig, ax)
    boxes = sorted((t.get_window_extent(renderer) for t in labels), key=lambda b: b.x0)
    assert all(a.x1 <= b.x0 + 0.5 for a, b in zip(boxes, boxes[1:]))  # pixels: neighbours do not overlap
    short = layer_labels(names)[0]
    texts = [t.get_text() for t in labels]
    step = len(short) // len(texts) if len(texts) < len(short) else 1
    assert texts == short[::step]  # names (every step-th when there are very many), never positions
    assert len(texts) >= min(len(names), 70)
    assert all(b.y0 >= 0 for b in boxes)  # nothing cut off at the bottom of the figure


# ---------------------------------------------------------------- 2. bar axes start at zero


def test_axes_where_a_bar_length_is_the_figure_start_at_zero(demo_report):
    report, _ = demo_report
    fig = overview_fig(report["layers"])
    left, right = fig.axes[0], fig.axes[1]
    assert left.get_ylim()[0] == 0
    assert right.get_ylim()[0] == 0  # the output-error axis: matplotlib's autoscale started near the smallest error
    assert params_fig(report["layers"]).axes[0].get_xlim()[0] == 0


# ---------------------------------------------------------------- 3. readable spectrum axes


def _spectrum(values) -> Spectrum:
    s = np.asarray(values, dtype=float)
    return Spectrum("fc", (len(s), len(s)), s, float(np.sum(s**2)))


@pytest.mark.parametrize("values", [np.linspace(1.6, 0.7, 9),  # less than one decade: the demo's first conv
                                    np.logspace(1, -6, 512)], ids=["narrow", "wide"])
def test_log_axes_show_several_labels_and_x_labels_do_not_collide(values):
    entry = {"rank": 4, "break_even_rank": len(values) // 2}
    fig = spectrum_fig(entry, _spectrum(values))
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    for ax in fig.axes:
        assert ax.get_yscale() == "log"
        assert len(visible_tick_labels(ax, "y")) >= 3  # LogFormatter(labelOnlyBase=True) showed one ("10^0")
        boxes = sorted((t.get_window_extent(renderer) for t in ax.get_xticklabels() if t.get_visible() and t.get_text()),
                       key=lambda b: b.x0)
        assert len(boxes) >= 3 and all(a.x1 < b.x0 for a, b in zip(boxes, boxes[1:]))


def test_log_tick_labels_read_as_numbers():
    assert [fmt_tick(v) for v in (0.01, 0.05, 1.0, 200.0, 1e-6, 2e5)] == ["0.01", "0.05", "1", "200", "10⁻⁶", "2×10⁵"]


# ---------------------------------------------------------------- 4. outlier-robust latency axis


def _point(budget: str, pct: float, after: float, ms: float, spread=(0.05, 0.05), before: float = 99.0) -> dict:
    return {"budget": budget, "params_before": 1000, "params_after": int(10 * pct), "params_ratio_pct": pct,
            "layers_factorized": 2,
            "metric": {"name": "top1", "before": before, "after": after, "delta": after - before, "higher_is_better": True,
                       "samples": 100},
            "latency": {"before_ms": 1.4, "before_spread_ms": [1.35, 1.45], "after_ms": ms,
                        "after_spread_ms": [ms - spread[0], ms + spread[1]]}}


def test_latency_axis_covers_the_non_outliers_tightly():
    # the original at 1.4 ms and budgets at 1.0-1.3 ms; one budget's median is 25 ms (a noisy run)
    med = [1.4, 1.0, 1.1, 1.2, 1.3, 25.0]
    lo, hi, out = robust_limits(med, [m - 0.05 for m in med], [m + 0.05 for m in med])
    assert out == [False] * 5 + [True]
    assert lo <= 0.95 and hi >= 1.45  # every other median and its bar is shown
    assert hi - lo <= 1.3 * (1.45 - 0.95)  # and the axis is not stretched towards 25 ms
    # a single slow run in one bar (its p90 at 9 ms) does not stretch the axis either
    lo, hi, out = robust_limits(med[:5], [m - 0.05 for m in med[:5]], [m + 0.05 for m in med[:4]] + [9.0])
    assert not any(out) and hi < 2.0

    points = [_point("params=0.8", 80, 99.0, 1.3), _point("params=0.5", 50, 98.9, 1.2), _point("params=0.3", 30, 98.5, 1.1),
              _point("params=0.2", 20, 97.0, 1.0, spread=(0.05, 8.0)), _point("params=0.1", 10, 90.0, 25.0)]
    fig, notes = sweep_fig(points, latency=True)
    lo, hi = fig.axes[0].get_xlim()
    assert lo <= 0.95 and 1.45 <= hi < 2.0
    assert any("params=0.1" in n and "beyond the axis" in n for n in notes)
    assert any("params=0.2" in n and "cut" in n for n in notes)


# ---------------------------------------------------------------- 5. the suggested budget


def test_suggested_budget_within_the_allowed_drop_and_at_the_knee():
    points = [("params=0.8", 80.0, 0.0), ("params=0.5", 50.0, 0.1), ("params=0.3", 30.0, 0.4), ("params=0.2", 20.0, 2.0),
              ("params=0.1", 10.0, 9.0)]
    s = suggest_budget(points, allowed_drop=0.5, metric="top1")
    assert (s.budget, s.rule) == ("params=0.3", "within") and "0.50 points" in s.why
    assert suggest_budget(points, allowed_drop=0.05).budget == "params=0.8"
    assert suggest_budget(points, allowed_drop=-1.0).budget is None
    # no allowed drop: the knee. By hand: both axes scaled to [0, 1] with the original at (100%, drop 0),
    # the chord from (10%, drop 9) is y = x; params=0.3 (x 2/9, y 8.6/9) sits 0.733 above it, params=0.2
    # 0.667, params=0.5 0.544: the last budget before the metric falls away
    s = suggest_budget(points)
    assert (s.budget, s.rule) == ("params=0.3", "knee") and "knee" in s.why
    # a flat metric has no knee: the smallest budget, and the rule says so
    s = suggest_budget([("params=0.5", 50.0, 0.0), ("params=0.2", 20.0, 0.0)], metric="top1")
    assert (s.budget, s.rule) == ("params=0.2", "flat") and "flat" in s.why


def test_sweep_html_states_and_marks_the_suggested_budget(demo_sweep):
    doc, page = demo_sweep
    assert 'id="suggested"' in page and "Suggested budget:" in page
    # the demo loses nothing at any of these budgets: the smallest one, by the flat-metric rule
    assert all(p["metric"]["after"] == p["metric"]["before"] for p in doc["points"])
    assert "<code>params=0.2</code> — the held-out metric is flat" in page
    assert '<tr class="suggested"><td><code>params=0.2</code> (suggested)' in page
    assert page.count("suggested: params=0.2") == 2  # the legend entry of the ring on both plots
    points = [_point("params=0.8", 80, 99.0, 1.3), _point("params=0.5", 50, 98.8, 1.2), _point("params=0.3", 30, 98.2, 1.1)]
    sweep = {"method": "svd", "wall_seconds": {"prepare": 1.0, "points": 1.0}, "points": points}
    page = render_sweep_html(sweep, allowed_drop=0.5)
    assert "<code>params=0.5</code> — the smallest budget whose drop (0.20 points) stays within the allowed 0.50 points" \
        in page
    assert "the knee" in render_sweep_html(sweep)


# ---------------------------------------------------------------- 6. the one number formatter


def test_sizes_in_mb_and_dense_layers_as_dense_and_dash(demo_report):
    report, page = demo_report
    assert "MiB" not in page and "KiB" not in page
    assert "1.96 MB → 0.59 MB" in page  # 489,226 and 146,762 float32 parameters, in 10^6 bytes
    table = page[page.index('<table class="layers">'):]
    row = table[table.index("<tr><td><code>0</code>"):]
    cells = re.findall(r"<td>(.*?)</td>", row[: row.index("</tr>")])
    e = report["layers"][0]
    assert e["rank"] is None and cells[3] == "dense"
    assert cells[7:] == ["—", "—", "—"]  # energy kept, weight error, output error: nothing was approximated
    assert "0.0000" not in table


def test_int8_comes_first_with_sizes_in_mb(demo_report):
    report, _ = demo_report
    report = dict(report, int8={"metric": "top1", "quantization": "onnxruntime dynamic int8", "runtime": "onnxruntime",
                                "batch": 1, "threads": 1,
                                "variants": [{"name": "original", "size_bytes": 1_957_000, "metric": 99.26, "delta": 0.0,
                                              "latency_ms": 0.5},
                                             {"name": "factorized+int8", "size_bytes": 151_000, "metric": 98.7,
                                              "delta": -0.56, "latency_ms": None}]})
    page = render_report_html(report, {})
    sections = re.findall(r'<section id="([^"]+)">', page)
    assert sections[0] == "int8" and sections.index("int8") < sections.index("review")
    int8 = page[page.index('<section id="int8">'):]
    int8 = int8[: int8.index("</section>")]
    assert "1.96 MB" in int8 and "0.15 MB" in int8 and "—" in int8 and "drop 0.56 points" in int8
