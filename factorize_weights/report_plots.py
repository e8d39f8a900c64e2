"""The figures of report.html and sweep.html (matplotlib), and the small rules they follow.

Each figure has a builder returning the matplotlib Figure (``*_fig``: tests inspect its Axes before
it becomes SVG); :func:`svg` turns a figure into an inline ``<svg>`` element, with ``<title>``
tooltips on chosen elements. The rules are pure functions with their own tests:

- :func:`layer_labels`: short chart labels for dotted layer names;
- :func:`log_ticks`: several readable labels on any log axis, however few decades it spans;
- :func:`robust_limits`: a latency axis that a few slow runs do not stretch;
- :func:`suggest_budget`: the budget a sweep suggests, and the rule that chose it.

Colours are the Okabe-Ito palette (distinguishable with the common colour-vision deficiencies) and
every series also differs in marker, line style or hatching.
"""

from __future__ import annotations

import html
import io
import math
from collections import Counter
from typing import NamedTuple

import numpy as np

from .formatting import abbreviate, common_prefix, fmt_count, fmt_ms, fmt_points, fmt_share
from .metrics import PERCENT

# Okabe & Ito, "Color Universal Design" (2008): safe for protanopia, deuteranopia, tritanopia
BLUE, ORANGE, VERMILLION, GREEN, GREY, LIGHT = "#0072B2", "#E69F00", "#D55E00", "#009E73", "#666666", "#BBBBBB"


def pyplot():
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    plt.rcParams.update({"svg.fonttype": "none", "font.size": 9, "axes.spines.top": False,
                         "axes.spines.right": False, "figure.dpi": 100})
    return plt


def svg(fig, titles: dict[str, str] | None = None) -> str:
    """The figure as an inline <svg> element (text kept as text, no fonts embedded); ``titles``
    maps an artist's gid to a tooltip, written as the SVG <title> of that artist's group."""
    import matplotlib.pyplot as plt

    buf = io.StringIO()
    # no metadata block: no dates (reproducible files) and no namespace URLs in the page
    fig.savefig(buf, format="svg", metadata={"Creator": None, "Date": None, "Format": None, "Type": None})
    plt.close(fig)
    text = buf.getvalue()
    text = text[text.index("<svg"):]
    for gid, tip in (titles or {}).items():
        text = text.replace(f'<g id="{gid}">', f'<g id="{gid}"><title>{html.escape(tip)}</title>', 1)
    return text


# ---------------------------------------------------------------- layer names on a chart

#: labels longer than this are abbreviated
LABEL_CHARS = 16


def layer_labels(names: list[str]) -> tuple[list[str], str]:
    """Distinct chart labels for layer names, in order, and the prefix they all lost: the common
    prefix goes, then labels longer than LABEL_CHARS are abbreviated (:func:`abbreviate`) unless
    that would make two labels equal (those stay whole)."""
    prefix = common_prefix(names, keep=1)  # a chart label may be the last part alone
    rest = [n[len(prefix):] for n in names]
    short = [abbreviate(r) if len(r) > LABEL_CHARS else r for r in rest]
    counts = Counter(short)
    labels = [s if counts[s] == 1 else r for s, r in zip(short, rest)]
    return (labels if len(set(labels)) == len(labels) else rest), prefix


def _label_layout(labels: list[str], axes_width_in: float, fontsize: float) -> tuple[int, int]:
    """(rotation, step) for category labels along an x axis: horizontal where the longest fits its
    slot, else vertical; where even vertical labels would touch, only every ``step``-th is labelled."""
    slot = axes_width_in * 72 / max(len(labels), 1)  # points per bar
    longest = max((len(t) for t in labels), default=1) * 0.62 * fontsize  # DejaVu Sans averages 0.6 em
    if longest <= 0.85 * slot:
        return 0, 1
    return 90, max(1, math.ceil(1.3 * fontsize / slot))


# ---------------------------------------------------------------- log axes

_SUPERSCRIPT = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")


def fmt_tick(v: float) -> str:
    """A log-axis tick label: plain decimals from 0.001 to 9999 (``0.005``, ``1``, ``200``), powers of
    ten with unicode superscripts beyond (``10⁻⁶``, ``2×10⁵``): plain text, no mathtext."""
    if v <= 0 or not math.isfinite(v):
        return ""
    e = math.floor(math.log10(v) + 1e-9)
    if -3 <= e <= 3:
        return f"{v:.6g}"
    m = round(v / 10.0**e, 3)
    power = f"10{str(e).translate(_SUPERSCRIPT)}"
    return power if m == 1 else f"{m:g}×{power}"


def log_ticks(axis, lo: float, hi: float) -> None:
    """Major ticks on a log ``axis`` (``ax.yaxis``) spanning ``lo..hi`` so that at least three carry
    labels: 1-2-5 steps within one or two decades, 1-3 up to four, whole decades (every n-th, at
    most six labels) beyond; minor ticks unlabelled."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

    decades = math.log10(hi / lo) if lo > 0 and hi > lo else 0.0
    if decades < 0.8:
        subs: tuple = (1.0, 1.5, 2.0, 3.0, 4.0, 5.0, 7.0)
    elif decades < 2.2:
        subs = (1.0, 2.0, 5.0)
    elif decades < 4.5:
        subs = (1.0, 3.0)
    else:
        subs = (1.0,)
    axis.set_major_locator(LogLocator(base=10, subs=subs, numticks=6 if subs == (1.0,) else 40))
    axis.set_major_formatter(FuncFormatter(lambda v, _pos: fmt_tick(v)))
    axis.set_minor_locator(LogLocator(base=10, subs=np.arange(2, 10) if decades < 4.5 else (1.0,), numticks=60))
    axis.set_minor_formatter(NullFormatter())


def visible_tick_labels(ax, which: str = "y") -> list[str]:
    """The non-empty major tick labels inside an axis' view limits (what a reader sees)."""
    axis = ax.yaxis if which == "y" else ax.xaxis
    lo, hi = sorted(ax.get_ylim() if which == "y" else ax.get_xlim())
    locs = [v for v in axis.get_majorticklocs() if lo * (1 - 1e-9) <= v <= hi * (1 + 1e-9)]
    return [t for t in axis.get_major_formatter().format_ticks(locs) if t]


# ---------------------------------------------------------------- report.html figures


def spectrum_fig(entry: dict, spectrum):
    """Singular values on a log scale with the chosen and break-even ranks, and the share of energy
    discarded at each rank (log scale: near 100% kept, only a log scale shows the rest)."""
    from matplotlib.ticker import MaxNLocator

    plt = pyplot()
    fig, (ax, bx) = plt.subplots(1, 2, figsize=(5.6, 2.5))
    s = np.asarray(spectrum.singular_values, dtype=float)
    ranks = np.arange(1, len(s) + 1)
    positive = s > 0
    ax.semilogy(ranks[positive], s[positive], color=BLUE, lw=1.4)
    discarded = 1.0 - spectrum.energy_curve()
    shown = discarded > 1e-10  # a log scale cannot show nothing discarded (the full rank) or rounding noise
    bx.semilogy(ranks[shown], discarded[shown], color=BLUE, lw=1.4)
    discarded = discarded[shown]
    for axis, values in ((ax, s[positive]), (bx, discarded)):
        lo, hi = (float(values.min()), float(values.max())) if len(values) else (0.1, 1.0)
        if hi <= lo * 1.0001:
            lo, hi = lo / 2, hi * 2
        axis.set_ylim(lo / 1.15, hi * 1.15)
        log_ticks(axis.yaxis, lo / 1.15, hi * 1.15)
        axis.axvline(entry["break_even_rank"], color=GREY, ls="--", lw=1, label=f"break-even rank {entry['break_even_rank']}")
        if entry["rank"] is not None:
            axis.axvline(entry["rank"], color=VERMILLION, ls="-", lw=1.6, label=f"chosen rank {entry['rank']}")
        axis.set_xlim(0, max(len(s), entry["break_even_rank"]) + 1)
        axis.xaxis.set_major_locator(MaxNLocator(nbins=4, integer=True, min_n_ticks=3))
        axis.set_xlabel("rank")
    ax.set_ylabel("singular value")
    bx.set_ylabel("energy discarded")
    handles, labels = ax.get_legend_handles_labels()
    fig.legend(handles, labels, loc="upper center", ncol=2, frameon=False, fontsize=8)
    # a fixed layout: tight_layout took most of the time per figure (measured on a 12-layer model)
    fig.subplots_adjust(left=0.14, right=0.98, bottom=0.19, top=0.86, wspace=0.5)
    return fig


def overview_fig(layers: list[dict], gid: str = "ov"):
    """All layers at a glance, whatever their number: the share of parameters each keeps (bars in
    model order, labelled by name; grey: left dense) and its output error where measured (diamonds,
    right axis). Both axes start at zero. Bars and labels get gids ``{gid}-bar-i``/``{gid}-label-i``."""
    plt = pyplot()
    n = len(layers)
    labels, prefix = layer_labels([e["name"] for e in layers])
    fontsize = 8 if n <= 24 else 7
    width = min(max(7.5, 1.4 + 0.13 * n), 16.0)
    rotation, step = _label_layout(labels, width - 1.4, fontsize)
    label_height = 0.2 if rotation == 0 else 0.5 * fontsize * max(len(t) for t in labels) / 72
    fig, ax = plt.subplots(figsize=(width, 2.5 + label_height))
    x = np.arange(n)
    kept = [100 * e["params_after"] / max(e["params_before"], 1) for e in layers]
    dense = [e["rank"] is None for e in layers]
    bars = ax.bar(x, kept, width=0.8, color=[LIGHT if d else BLUE for d in dense])
    for i, b in enumerate(bars):
        b.set_gid(f"{gid}-bar-{i}")
    from matplotlib.patches import Patch

    handles = [Patch(color=BLUE, label="parameters kept, factorized (%)")]
    handles += [Patch(color=LIGHT, label="left dense (100%)")] if any(dense) else []
    ax.set_ylim(0, 105)
    ax.set_xlim(-0.6, n - 0.4)
    ax.set_ylabel("parameters kept (%)")
    ax.set_xticks(x[::step], labels[::step], rotation=rotation, fontsize=fontsize)
    for i, t in zip(x[::step], ax.get_xticklabels()):
        t.set_gid(f"{gid}-label-{i}")
    ax.set_xlabel("layer, in model order" + (f", names after {prefix!r}" if prefix else "")
                  + (f"; one bar in {step} labelled (hover a bar for its name)" if step > 1 else ""))
    errs = [(i, e["output_error"]) for i, e in enumerate(layers) if e.get("output_error") is not None and e["rank"]]
    if errs:
        bx = ax.twinx()
        bx.plot([i for i, _ in errs], [v for _, v in errs], ls="none", marker="D", ms=4, color=VERMILLION,
                label="output error (right axis)")
        bx.set_ylim(0, 1.1 * max(v for _, v in errs) or 1.0)
        bx.set_ylabel("output error")
        bx.spines["right"].set_visible(True)
        handles += bx.get_legend_handles_labels()[0]
    ax.legend(handles=handles, loc="lower left", bbox_to_anchor=(0, 1.0), ncol=3, frameon=False, fontsize=8)
    fig.tight_layout()
    return fig


def layer_tooltip(e: dict) -> str:
    what = "left dense" if e["rank"] is None else f"rank {e['rank']}"
    text = f"{e['name']}: {what}, {fmt_share(e['params_after'] / max(e['params_before'], 1))} of its parameters kept"
    if e.get("output_error") is not None and e["rank"] is not None:
        text += f", output error {e['output_error']:.4g}"
    return text


def params_fig(layers: list[dict], gid: str = "pp"):
    """Parameters per layer before and after, horizontal bars (hatched after), from zero."""
    from matplotlib.ticker import FuncFormatter

    plt = pyplot()
    labels, prefix = layer_labels([e["name"] for e in layers])
    fig, ax = plt.subplots(figsize=(7.5, 0.32 * len(labels) + 1.1))
    y = np.arange(len(labels))
    ax.barh(y - 0.2, [e["params_before"] for e in layers], 0.4, color=GREY, label="before")
    ax.barh(y + 0.2, [e["params_after"] for e in layers], 0.4, color=BLUE, hatch="//", edgecolor="white",
            label="after")
    ax.set_yticks(y, labels)
    for i, t in enumerate(ax.get_yticklabels()):
        t.set_gid(f"{gid}-label-{i}")
    ax.invert_yaxis()
    ax.set_xlim(left=0)
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: fmt_count(v)))
    ax.set_xlabel("parameters" + (f" (layer names after {prefix!r})" if prefix else ""))
    ax.legend(frameon=False)
    fig.tight_layout()
    return fig


# ---------------------------------------------------------------- sweep.html


def robust_limits(medians, lows, highs, *, cutoff: float = 5.0, floor: float | None = 0.0):
    """Axis limits for medians with p10-p90 bars that a few slow runs do not stretch; returns
    ``(lo, hi, outlier)`` with one flag per median.

    A median further than ``cutoff`` robust deviations from the middle median is an outlier (drawn
    at the axis edge); the deviation is 1.4826 x the median absolute deviation (consistent with
    the standard deviation for normal data), at least 5% of the middle median. The axis covers every
    other median and its bar, a bar's end clipped to at most the medians' own range (at least 10%
    of the middle median) beyond the outermost median, with 5% margins; never below ``floor``.
    """
    m, lo_, hi_ = (np.asarray(v, dtype=float) for v in (medians, lows, highs))
    c = float(np.median(m))
    scale = max(1.4826 * float(np.median(np.abs(m - c))), 0.05 * abs(c), 1e-12)
    out = np.abs(m - c) > cutoff * scale
    keep = m[~out]
    span = max(float(keep.max() - keep.min()), 0.1 * abs(c), 1e-12)
    lo = max(min(float(lo_[~out].min()), float(keep.min())), float(keep.min()) - span)
    hi = min(max(float(hi_[~out].max()), float(keep.max())), float(keep.max()) + span)
    pad = 0.05 * (hi - lo)
    lo, hi = lo - pad, hi + pad
    if floor is not None:
        lo = max(lo, floor)
    return lo, hi, out.tolist()


class Suggestion(NamedTuple):
    budget: str | None
    rule: str  # "within", "knee", "flat", "least-drop" or "none"
    why: str


def suggest_budget(points: list[tuple[str, float, float]], allowed_drop: float | None = None,
                   metric: str = "") -> Suggestion:
    """The budget a sweep suggests. ``points``: ``(budget, parameters kept in %, drop)``, the drop
    in the metric's own units, positive = worse than the original.

    - With an ``allowed_drop``: the smallest budget (fewest parameters) whose drop stays within it.
    - Without: the knee of the metric-against-parameters curve (the original model at 100% closes
      it): both axes scaled to [0, 1], the point farthest above the chord from the smallest budget
      to the largest (Satopaa et al. 2011, "Kneedle"). A flat metric has no knee: the smallest
      budget; with no point above the chord, the smallest budget of least drop.
    """
    if not points:
        return Suggestion(None, "none", "no points")
    pts = sorted(points, key=lambda p: (p[1], p[0]))
    if allowed_drop is not None:
        within = [p for p in pts if p[2] <= allowed_drop + 1e-12]
        if not within:
            return Suggestion(None, "none", f"no budget stays within the allowed drop of {fmt_points(metric, allowed_drop)}")
        best = within[0]
        return Suggestion(best[0], "within", f"the smallest budget whose drop ({fmt_points(metric, best[2])}) stays "
                                             f"within the allowed {fmt_points(metric, allowed_drop)}")
    drops = np.array([p[2] for p in pts])
    if drops.max() - drops.min() <= 1e-9 * (1 + np.abs(drops).max()):
        same = "the same as the original's" if abs(drops[0]) <= 1e-12 else f"a drop of {fmt_points(metric, drops[0])}"
        return Suggestion(pts[0][0], "flat", f"the held-out metric is flat, {same} at every budget: the smallest budget")
    curve = pts + ([("original", 100.0, 0.0)] if pts[-1][1] < 100.0 else [])
    x = np.array([p[1] for p in curve], dtype=float)
    g = -np.array([p[2] for p in curve], dtype=float)  # goodness: up is better
    xn = (x - x[0]) / max(x[-1] - x[0], 1e-12)
    gn = (g - g.min()) / max(g.max() - g.min(), 1e-12)
    chord = gn[0] + (gn[-1] - gn[0]) * xn
    above = (gn - chord)[: len(pts)] / math.hypot(1.0, gn[-1] - gn[0])  # perpendicular distance
    i = int(np.argmax(above))
    if len(curve) >= 3 and above[i] > 1e-9:
        return Suggestion(pts[i][0], "knee", f"the knee of the metric-against-parameters curve (the point farthest "
                                             f"above the chord from the smallest budget to the "
                                             f"{'original' if curve[-1][0] == 'original' else 'largest budget'}; "
                                             f"drop {fmt_points(metric, pts[i][2])})")
    least = min(p[2] for p in pts)
    best = next(p for p in pts if p[2] <= least + 1e-12)
    return Suggestion(best[0], "least-drop", f"no knee in the curve: the smallest budget with the least drop "
                                             f"({fmt_points(metric, best[2])})")


def sweep_fig(points: list[dict], *, latency: bool = False, suggested: str | None = None):
    """Held-out metric against parameters kept (``latency=False``) or against measured median
    latency with p10-p90 bars on an outlier-robust axis (:func:`robust_limits`); the original as a
    grey diamond and dashed line; the suggested budget ringed. Returns ``(figure, notes)``, the
    notes saying which points or bars lie beyond the axis."""
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(6.0, 3.6))
    first = points[0]  # the original as measured beside the first budget, as in the points table
    points = sorted(points, key=lambda p: p["latency"]["after_ms"] if latency else p["params_ratio_pct"])
    ys = [p["metric"]["after"] for p in points]
    before = first["metric"]["before"]
    notes: list[str] = []
    if latency:
        lat = [p["latency"] for p in points]
        base = first["latency"]
        med = [base["before_ms"]] + [v["after_ms"] for v in lat]
        lows = [base["before_spread_ms"][0]] + [v["after_spread_ms"][0] for v in lat]
        highs = [base["before_spread_ms"][1]] + [v["after_spread_ms"][1] for v in lat]
        lo, hi, out = robust_limits(med, lows, highs)
        names = ["the original"] + [p["budget"] for p in points]
        for name, m, a, b, o in zip(names, med, lows, highs, out):
            if o:
                notes.append(f"{name} (median {fmt_ms(m)}) lies beyond the axis and is drawn at its edge")
            elif b > hi or a < lo:
                notes.append(f"the p10-p90 bar of {name} ({fmt_ms(a)} to {fmt_ms(b)}) is cut at the axis edge")
        xs = [min(max(m, lo), hi) for m in med]
        xerr = [[max(x - max(a, lo), 0.0) for x, a in zip(xs, lows)], [max(min(b, hi) - x, 0.0) for x, b in zip(xs, highs)]]
        base_x, xs, bxerr = xs[0], xs[1:], [[xerr[0][0]], [xerr[1][0]]]
        xerr = [xerr[0][1:], xerr[1][1:]]
        edge = [o for o in out[1:]]
        ax.set_xlim(lo, hi)
        ax.set_xlabel("measured median latency (ms)")
    else:
        xs, xerr, base_x, bxerr, edge = [p["params_ratio_pct"] for p in points], None, 100.0, None, [False] * len(points)
        ax.set_xlim(0, 108)
        ax.set_xlabel("parameters kept (% of selected layers)")
    handles = [ax.errorbar(xs, ys, xerr=xerr, color=BLUE, marker="o", lw=0 if latency else 1.5, elinewidth=1,
                           capsize=3, label="factorized")]
    ax.axhline(before, color=GREY, ls="--", lw=1)
    handles.append(ax.errorbar([base_x], [before], xerr=bxerr, color=GREY, marker="D", lw=0, elinewidth=1, capsize=3,
                               label="original"))
    for x, y, e in zip(xs, ys, edge):
        if e:
            ax.plot([x], [y], marker=">" if x >= ax.get_xlim()[1] else "<", ms=9, color=VERMILLION, ls="none", clip_on=False)
    if suggested is not None and suggested in [p["budget"] for p in points]:
        i = [p["budget"] for p in points].index(suggested)
        handles += ax.plot([xs[i]], [ys[i]], ls="none", marker="o", ms=14, mfc="none", mec="black", mew=1.5,
                           label=f"suggested: {suggested}")
        if not latency:
            ax.axvline(xs[i], color="black", ls=":", lw=1)
    offsets = [(6, -12), (6, 7), (6, -23), (6, 18)]  # staggered, so labels of nearby points do not overprint
    for i, (p, x, y) in enumerate(zip(points, xs, ys)):
        ax.annotate(p["budget"], (x, y), textcoords="offset points", xytext=offsets[i % len(offsets)], fontsize=7,
                    clip_on=True)
    values = ys + [before]
    span = max(values) - min(values)
    pad = max(0.25 * span, 0.01 * abs(before), 1e-6)  # a flat metric gets a narrow band, not matplotlib's ±5%
    name = points[0]["metric"]["name"]
    top = max(values) + pad
    if name in PERCENT and max(values) <= 100.0:
        top = min(top, 100.0 + 0.1 * pad)  # no room above 100%
    ax.set_ylim(min(values) - pad, top)
    ax.set_ylabel(f"held-out {name}")
    ax.legend(handles=handles, frameon=False, fontsize=8, loc="lower left", bbox_to_anchor=(0, 1.0), ncol=3)
    fig.tight_layout()
    return fig, notes


# ---------------------------------------------------------------- latency plans


def layer_time_fig(table: dict, rank, scale: float = 1.0):
    """One layer's cost table: the factor pair's measured time at each timed rank (circles), the
    non-decreasing fit the plan reads (line), the dense layer's time (dashed) and the chosen rank
    (vertical line; none when the layer stays dense). Times as the allocator counts them (scaled)."""
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(3.6, 2.4))
    ranks = np.asarray(table["ranks"], dtype=float)
    measured = np.asarray(table["factor_ms"], dtype=float) * scale
    from .costs import isotonic

    if len(ranks):
        ax.plot(ranks, isotonic(measured), color=BLUE, lw=1.4, label="fitted")
        ax.plot(ranks, measured, "o", color=BLUE, mfc="white", ms=4, label="factor pair, measured")
    dense = table["dense_ms"] * scale
    ax.axhline(dense, color=GREY, ls="--", lw=1, label=f"dense {fmt_ms(dense)}")
    if rank is not None:
        ax.axvline(rank, color=VERMILLION, lw=1.6, label=f"chosen rank {rank}")
    top = max([dense] + measured.tolist())
    ax.set_ylim(0, top * 1.15)
    ax.set_xlim(0, (ranks.max() if len(ranks) else 1) * 1.05)
    ax.set_xlabel("rank")
    ax.set_ylabel("ms per forward pass")
    ax.legend(fontsize=7, frameon=False, loc="lower right")
    fig.subplots_adjust(left=0.2, right=0.97, bottom=0.19, top=0.95)
    return fig


def latency_rounds_fig(latency_plan: dict):
    """The end-to-end check: each round's predicted and measured time of the rewrite, as a share of
    the original's (measured in the same loop), against the budget's limit."""
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(4.2, 2.4))
    rounds = latency_plan["rounds"]
    x = np.arange(1, len(rounds) + 1)
    predicted = [r["predicted_ms"] / latency_plan["original_ms"] for r in rounds]
    measured = [r["measured_ratio"] for r in rounds]
    ax.bar(x - 0.18, predicted, 0.36, color=LIGHT, edgecolor=GREY, label="predicted")
    ax.bar(x + 0.18, measured, 0.36, color=BLUE, hatch="//", edgecolor="white", label="measured")
    limit = latency_plan["limit_ms"] / latency_plan["original_ms"]
    ax.axhline(limit, color=VERMILLION, lw=1.4, label=f"limit {fmt_share(limit)}")
    ax.set_xticks(x)
    ax.set_xlabel("check round")
    ax.set_ylabel("time / original's")
    ax.set_ylim(0, max(predicted + measured + [limit, 1.0]) * 1.1)
    ax.legend(fontsize=7, frameon=False, loc="upper right", ncol=3)
    fig.subplots_adjust(left=0.16, right=0.97, bottom=0.2, top=0.88)
    return fig
