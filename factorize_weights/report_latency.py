"""report.md's latency-plan section: where a latency budget's cost tables came from and each round
of its end-to-end check (report.json ``latency_plan``)."""

from __future__ import annotations


def latency_plan_lines(report: dict) -> list[str]:
    """report.md: where a latency plan's costs came from, and each round of its end-to-end check."""
    lp = report.get("latency_plan")
    if not lp:
        return []
    b = report["budget"]
    m = lp.get("profile_machine") or {}
    lines = ["", "## Latency plan", "",
             f"Cost tables {lp['source']} (CPU {m.get('cpu', '?')}, {m.get('cores', '?')} cores): the original "
             f"{lp['original_ms']:.4f} ms, of which {lp['rest_ms']:.4f} ms outside the selected layers"
             + (f" (layer times scaled by {lp['layer_scale']:.3f} to fit the whole)" if lp["layer_scale"] < 1 else "")
             + f". Budget `{b['given']}`: at most {lp['limit_ms']:.4f} ms; the plan kept is predicted at "
             f"{lp['predicted_ms']:.4f} ms."]
    if lp.get("why_unchecked"):
        lines += ["", f"Not checked on this CPU: {lp['why_unchecked']}."]
    if lp["rounds"]:
        lines += ["", "Checked on this CPU, the rewrite at the planned ranks against the original, side by side:", "",
                  "| round | predicted ms | measured ms | original measured ms | ratio | tolerance | met |",
                  "|---:|---:|---:|---:|---:|---:|---|"]
        lines += [f"| {i} | {r['predicted_ms']:.4f} | {r['measured_ms']:.4f} | {r['original_measured_ms']:.4f} | "
                  f"{r['measured_ratio']:.3f} | {r['tolerance']:.3f} | {'yes' if r['met'] else 'no'} |"
                  for i, r in enumerate(lp["rounds"], 1)]
        if lp.get("delivered_share") is not None:
            lines += ["", f"The CPU delivered {100 * lp['delivered_share']:.0f}% of the predicted saving."]
    return lines
