"""CPU latency of factorized models, measured (not a test): writes reports/latency.md.

    python scripts/bench_latency.py [--repeats 50] [--threads 1]

Two models: the embedded demo CNN, and a transformer-sized stack of six feed-forward blocks
(384 -> 1536 -> 384 with residual and LayerNorm, random weights: latency does not depend on what
the weights are). Each is compressed at several params budgets and timed at batch 1 and 32, in
onnxruntime and in eager torch, original and factorized interleaved in the same loop. The table
puts the FLOP ratio the plan predicts beside the time ratio the CPU delivered.
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import tempfile
from pathlib import Path

import numpy as np
import torch
from torch import nn

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import factorize_weights as fw  # noqa: E402
from factorize_weights import demo, latency  # noqa: E402
from factorize_weights.backends import onnx_backend, torch_backend  # noqa: E402
from factorize_weights.pipeline import plan_for  # noqa: E402


class Block(nn.Module):
    def __init__(self, width=384, hidden=1536):
        super().__init__()
        self.norm = nn.LayerNorm(width)
        self.up = nn.Linear(width, hidden)
        self.down = nn.Linear(hidden, width)

    def forward(self, x):  # (N, 384)
        return x + self.down(torch.nn.functional.gelu(self.up(self.norm(x))))


def ffn_stack() -> nn.Module:
    torch.manual_seed(0)
    return nn.Sequential(*[Block() for _ in range(6)]).eval()


def time_pair(backend, original, factorized, inputs, threads, repeats):
    """Threads and eval mode set once around the loop; each timed call is the forward pass alone."""
    with backend.timing([original, factorized], threads):
        return latency.compare(backend.timer(original, inputs, threads), backend.timer(factorized, inputs, threads),
                               warmup=5, repeats=repeats)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=50)
    parser.add_argument("--threads", type=int, default=1)
    args = parser.parse_args()
    models = {
        "demo CNN (489k params)": (fw.build_model(demo.MODEL_SPEC, demo.WEIGHTS), np.load(demo.HELDOUT)["inputs"]),
        "FFN stack 6 x (384-1536-384) (7.1M params)": (
            ffn_stack(), np.random.default_rng(0).standard_normal((64, 384)).astype(np.float32)),
    }
    rows = []
    tmp = Path(tempfile.mkdtemp())
    for label, (model, data) in models.items():
        onnx_path = tmp / "model.onnx"
        torch_backend.export_onnx(model, data[:2], onnx_path)
        onnx_model = onnx_backend.load(onnx_path)
        for budget in ("params=0.8", "params=0.5", "params=0.3"):
            config = fw.CompressConfig(budget=budget, quiet=True)
            held = fw.HeldOut(data, None, "bench")
            for runtime, original in (("onnxruntime", onnx_model), ("torch", model)):
                backend = onnx_backend if runtime == "onnxruntime" else torch_backend
                records, _, plan, _ = plan_for(original, config, held)
                factorized = fw.factorize(original, records, plan, config)
                chosen = fw.selected(records)
                flops_before = sum(r.weight_params * r.positions for r in chosen)
                flops_after = sum((r.weight_params if plan.ranks[r.name] is None else
                                   plan.ranks[r.name] * sum(r.matrix_shape)) * r.positions for r in chosen)
                for batch in (1, 32):
                    t = time_pair(backend, original, factorized, latency.batch_of(data, batch), args.threads, args.repeats)
                    rows.append((label, budget, runtime, batch, flops_after / flops_before, t))
                    print(label, budget, runtime, batch, f"{flops_after / flops_before:.3f}",
                          f"{t['before_ms']:.3f} -> {t['after_ms']:.3f} ms", flush=True)
    import onnxruntime

    lines = [
        "# CPU latency: predicted FLOP ratio against measured time ratio",
        "",
        "Written by `scripts/bench_latency.py`. Each row compresses the model at the budget with the",
        "global allocator (plain truncated SVD), then times original and factorized side by side",
        f"(interleaved, 5 warm-up runs, {args.repeats} timed runs each): medians, with the 10th-90th",
        "percentile spread in brackets. *FLOP ratio* is the multiply-adds of the selected layers after",
        "over before, as the plan predicts; *time ratio* is the measured median after over before",
        "(below 1 is faster). *Delivered* is the share of the predicted saving the CPU delivered:",
        "(1 - time ratio) / (1 - FLOP ratio). The timed call is the forward pass alone: eval mode and",
        "the thread count are set once outside the loop (earlier versions set them inside every timed",
        "call, which charged the factorized model, with more modules, for walking them).",
        "",
        f"Machine: {platform.machine()}, {os.cpu_count()} logical cores, Python {platform.python_version()}, "
        f"torch {torch.__version__}, onnxruntime {onnxruntime.__version__}; {args.threads} thread(s) "
        "(torch.set_num_threads / intra_op_num_threads).",
        "",
        "| model | budget | runtime | batch | FLOP ratio | before ms | after ms | time ratio | delivered |",
        "|---|---|---|---:|---:|---:|---:|---:|---:|",
    ]
    for label, budget, runtime, batch, fr, t in rows:
        ratio = t["after_ms"] / t["before_ms"]
        delivered = (1 - ratio) / (1 - fr) if fr < 1 else float("nan")
        b, a = t["before_spread_ms"], t["after_spread_ms"]
        lines.append(
            f"| {label} | {budget} | {runtime} | {batch} | {fr:.3f} | {t['before_ms']:.3f} [{b[0]:.3f}-{b[1]:.3f}] | "
            f"{t['after_ms']:.3f} [{a[0]:.3f}-{a[1]:.3f}] | {ratio:.3f} | {100 * delivered:.0f}% |"
        )
    out = ROOT / "reports" / "latency.md"
    out.write_text("\n".join(lines) + "\n", encoding="utf-8")
    print(f"wrote {out}")


if __name__ == "__main__":
    main()
