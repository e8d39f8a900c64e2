"""The one number formatter: every output (terminal, report.md, report.html, sweep.md) writes its
numbers through these functions, so a figure reads the same everywhere.

- sizes in MB (decimal megabytes, 10^6 bytes, as file managers and ``ls -h --si`` show them);
- times in ms; ratios as ``x1.23``; shares as ``30.0%``;
- metric values: percentages with two decimals, anything else with four significant digits
  (0.000338 stays 0.000338, never 0.00);
- a change of a metric is said as a *drop* or a *gain* in words, in points for percentage metrics;
- a layer left dense shows ``dense`` for its rank and ``—`` where a figure of its factors would be.
"""

from __future__ import annotations

from .metrics import PERCENT

DENSE = "dense"
NOT_APPLICABLE = "—"


def fmt_count(n) -> str:
    """``489,226``."""
    return f"{int(n):,}"


def fmt_mb(nbytes: float) -> str:
    """``1.96 MB``, ``0.59 MB``, ``123 MB``, ``1,234 MB`` (three significant digits, at least two
    decimals under 10 MB)."""
    mb = nbytes / 1e6
    if mb >= 100:
        return f"{mb:,.0f} MB"
    return f"{mb:.1f} MB" if mb >= 10 else f"{mb:.2f} MB"


def fmt_ms(ms: float, unit: bool = True) -> str:
    """``0.425 ms``, ``12.3 ms``, ``1,234 ms`` (three significant digits); without the unit for a
    column headed in ms."""
    text = f"{ms:,.0f}" if ms >= 1000 else (f"{ms:.3g}" if ms >= 1 else f"{ms:.3f}")
    return f"{text} ms" if unit else text


def fmt_ratio(x: float | None) -> str:
    """``x1.03``; ``—`` when unknown."""
    return NOT_APPLICABLE if x is None else f"x{x:.2f}"


def fmt_share(r: float, digits: int = 1) -> str:
    """A fraction as a percentage: ``0.3 -> 30.0%``."""
    return f"{100 * r:.{digits}f}%"


def fmt_value(name: str, value: float) -> str:
    """A metric value: percentages with two decimals; anything else with four significant digits."""
    return f"{value:.2f}%" if name in PERCENT else f"{value:.4g}"


def fmt_points(name: str, amount: float) -> str:
    """An amount of a metric, such as a drop or a limit: ``0.93 points`` for percentage metrics,
    ``0.0123`` (four significant digits) for the others."""
    return f"{amount:.2f} points" if name in PERCENT else f"{amount:.4g}"


def fmt_change(name: str, before: float, after: float, higher_is_better: bool) -> str:
    """``drop 0.62 points`` / ``gain 0.19 points`` / ``no change``; error metrics (lower is better)
    also as a ratio, so a regression from 0.000338 to 0.00468 reads "x13.8 worse"."""
    worse = (before - after) if higher_is_better else (after - before)
    if worse == 0:
        return "no change"
    text = f"{'drop' if worse > 0 else 'gain'} {fmt_points(name, abs(worse))}"
    if not higher_is_better and before > 0:
        ratio = after / before
        text += f", x{ratio:.3g} {'worse' if ratio > 1 else 'better'}"
    return text


def fmt_error(value: float | None, rank) -> str:
    """A layer's weight or output error: ``—`` for a layer left dense (nothing was approximated)
    or where it was not measured."""
    if rank is None or value is None:
        return NOT_APPLICABLE
    return f"{value:.4g}"


def fmt_kept(value: float, rank) -> str:
    """A layer's energy kept: ``—`` for a layer left dense."""
    return NOT_APPLICABLE if rank is None else fmt_share(value, 2)


def fmt_rank(rank) -> str:
    return DENSE if rank is None else str(rank)


def common_prefix(names: list[str], keep: int = 2) -> str:
    """The dotted prefix (whole parts, ending in ".") that every name shares, leaving each name at
    least its last ``keep`` parts: ``bert.encoder.layer.0.attention.self.query`` and
    ``bert.encoder.layer.1.output.dense`` share ``bert.encoder.layer.``."""
    if len(names) < 2:
        return ""
    split = [n.split(".") for n in names]
    most = min(len(p) for p in split) - keep
    n = 0
    while n < most and len({p[n] for p in split}) == 1:
        n += 1
    return ".".join(split[0][:n]) + "." if n else ""


def abbreviate(name: str) -> str:
    """Every part but the last two to its first letter (two when it starts with "_"), indices
    kept: ``encoder.layer.0.attention.self.query`` becomes ``e.l.0.a.self.query``."""
    parts = name.split(".")
    head, tail = parts[:-2], parts[-2:]
    return ".".join([p if p.isdigit() else p[: 2 if p.startswith("_") else 1] for p in head] + tail)


def counted(metric: dict) -> str:
    """What a metric was counted over: samples, or positions of sequences (and what masked them);
    perplexity also gives the mean loss it is the exponential of."""
    pos = metric.get("per_position")
    if pos is None:
        return f"{metric['samples']} samples"
    by = f", {' and '.join(pos['masked_by'])} honoured" if pos["masked_by"] else ""
    loss = metric.get("loss")
    if loss is None:
        return f"{pos['positions']} positions{by}"
    return (f"mean loss {loss['before']:.4g} -> {loss['after']:.4g} nats per token; "
            f"{pos['positions']} next tokens{by}")
