"""Held-out accuracy of every factorization method at several budgets (not a test): writes
reports/accuracy.md.

    python scripts/bench_accuracy.py [--recover 200]

Models: the embedded demo CNN and the patch encoder of examples/ (a small transformer trained with
light weight decay, so less redundant). Data: the demo's UCI digits splits: calibration (180
images) for everything data-aware, held-out (540 images) only for measuring.
Rows per budget: uniform rank (what a user writes by hand: the same fraction of min(out, in) as
rank in every layer, plain SVD; and the same with the first and last layers left dense, a common
hand-written refinement), allocated plain SVD under the error-sum (default) and energy-product
data-free rules, whitened, whitened + sequential under the old rule and the new default (allocation
by measured output effect), columns (pivoted QR), and whitened + recovery.
"""

from __future__ import annotations

import argparse
import platform
import sys
import time
from pathlib import Path

import torch

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "scripts"))

import factorize_weights as fw  # noqa: E402
from bench_demo import uniform_plan  # noqa: E402
from factorize_weights import demo  # noqa: E402

BUDGETS = (0.8, 0.6, 0.5, 0.3, 0.2, 0.1)


def variants(recover_steps: int):
    return [
        ("allocated plain SVD, error-sum (default without data)", {"method": "svd", "allocation": "error-sum"}, False),
        ("allocated plain SVD, energy-product", {"method": "svd", "allocation": "energy-product"}, False),
        ("whitened", {"method": "whitened", "sequential": False, "allocation": "error-sum"}, True),
        ("whitened + sequential, error-sum (old default with data)", {"method": "whitened", "sequential": True,
                                                                      "allocation": "error-sum", "rows_ridge": 0.0},
         True),
        ("whitened + sequential, output effect (new default with data)", {"method": "whitened", "sequential": True},
         True),
        ("columns (pivoted QR)", {"method": "columns", "allocation": "error-sum"}, False),
        (f"whitened + recovery ({recover_steps} steps)", {"method": "whitened", "sequential": False,
                                                         "allocation": "error-sum", "recover": recover_steps}, True),
    ]


def fidelity(original, small, heldout):
    """(agreement %, relative logit error) against the original on the held-out inputs."""
    import numpy as np

    from factorize_weights.backends import torch_backend

    a = torch_backend.predict(original, heldout.inputs)
    b = torch_backend.predict(small, heldout.inputs)
    return 100 * float(np.mean(a.argmax(1) == b.argmax(1))), float(np.linalg.norm(a - b) / np.linalg.norm(a))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--recover", type=int, default=200)
    args = parser.parse_args()
    torch.set_num_threads(2)
    heldout, calibration = fw.load_heldout(demo.HELDOUT), fw.load_heldout(demo.CALIBRATION, flag="--calibration")
    models = {
        "demo CNN": fw.build_model(demo.MODEL_SPEC, demo.WEIGHTS),
        "patch encoder": fw.build_model(f"{ROOT}/examples/patch_encoder.py:build_encoder",
                                        ROOT / "examples" / "patch_encoder.safetensors"),
    }
    sections = []
    t_start = time.perf_counter()
    for label, model in models.items():
        rows = []
        records = fw.discover(model)
        chosen = fw.selected(records)
        for value in BUDGETS:
            budget = f"params={value}"
            for name, ends in (("uniform rank, every layer", False), ("uniform rank, first/last dense", True)):
                plan = uniform_plan(chosen, fw.parse_budget(budget), keep_ends=ends)
                small = fw.factorize(model, records, plan, fw.CompressConfig(quiet=True))
                m = fw.evaluate(model, small, heldout, "top1", fw.CompressConfig(quiet=True))
                rows.append((budget, name, plan.cost_after / plan.cost_before, m) + fidelity(model, small, heldout))
            for name, options, needs_cal in variants(args.recover):
                config = fw.CompressConfig(budget=budget, quiet=True, latency_repeats=0, error_samples=0,
                                           metric="top1", **options)
                result = fw.compress(model, config, heldout=heldout, calibration=calibration if needs_cal else None)
                kept = result.report["totals"]["params_ratio"]
                rows.append((budget, name, kept, result.metric) + fidelity(model, result.model, heldout))
                print(label, budget, name, f"{result.metric.after:.2f}", flush=True)
        sections.append((label, model, rows))
    elapsed = time.perf_counter() - t_start
    lines = [
        "# Accuracy: factorization methods at several parameter budgets",
        "",
        "Written by `scripts/bench_accuracy.py`. Held-out: 540 UCI digits images never used for",
        "training or calibration; calibration: 180 other images (the demo's calibration split). Every",
        "row except the *uniform rank* ones allocates ranks globally under the same budget; *params kept* is the",
        "share of the selected layers' parameters after factorization. *Agreement* is the share of",
        "held-out images on which the compressed model's top class equals the original's; *logit error*",
        "is ||f(x) - g(x)||_F / ||f(x)||_F of the logits over the held-out set (lower is better), which",
        "still separates the methods where top-1 no longer can.",
        "",
        "These two models were trained here. Models that other people trained (EfficientNet-Lite0 and",
        "all-MiniLM-L6-v2, from registry packages) are measured in `accuracy_pretrained.md`",
        "(`scripts/bench_pretrained.py`), and calibration sets unlike the deployment data in",
        "`calibration_match.md`.",
        "",
        f"Machine: {platform.machine()}, Python {platform.python_version()}, torch {torch.__version__}; "
        f"whole benchmark {elapsed:.0f} s.",
    ]
    for label, model, rows in sections:
        base = rows[0][3].before
        lines += ["", f"## {label} ({fw.inspect_model(model, fw.CompressConfig(quiet=True))['model_params']:,} parameters, "
                      f"held-out top-1 {base:.2f}%)", "",
                  "| budget | method | params kept | top-1 | delta (points) | agreement | logit error |",
                  "|---|---|---:|---:|---:|---:|---:|"]
        for budget, name, kept, metric, agree, err in rows:
            lines.append(f"| {budget} | {name} | {100 * kept:.1f}% | {metric.after:.2f}% | {metric.delta:+.2f} | "
                         f"{agree:.2f}% | {err:.4f} |")
    out = ROOT / "reports" / "accuracy.md"
    out.write_text("\n".join(lines) + "\n", encoding="utf-8")
    print(f"wrote {out}")


if __name__ == "__main__":
    main()
