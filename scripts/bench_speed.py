"""Calibrated and plain compress against the floor of what they must do, on the two pretrained
encoders (not a test): writes reports/calibration_speed.md.

    python scripts/bench_speed.py [--models minilm,mpnet] [--budget params=0.8] [--out FILE]

Per model, each in its own process (so peak RSS is per run):
- floor: load the model folder; a bare SVD of every selected matrix (``numpy.linalg.svd(W,
  full_matrices=False)``, float64, the matrices taken out of the model before the timer starts);
  one forward pass of the original over the calibration set (batches of 64, ``torch.no_grad``);
- plain: load + ``fw.compress`` without calibration data (held-out evaluation included);
- calibrated: load + ``fw.compress`` with the calibration set (the default with data: whitened,
  sequential refits, allocation by output effect), held-out evaluation included.
Latency timing is off in both (``latency_repeats=0``): it measures the result, not the tool.
Targets from issue 20: plain <= 1.5 x (load + bare SVD); calibrated <= 3 x (load + bare SVD + one
calibration forward); output-effect probes <= the calibration pass.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))


def child(model_key: str, mode: str, budget: str) -> dict:
    import numpy as np
    import torch

    import factorize_weights as fw
    import pretrained
    from factorize_weights.backends import torch_backend as tb

    t0 = time.perf_counter()
    folder, held, cal = getattr(pretrained, model_key)()
    model = tb.load_pretrained(folder)
    out = {"load": time.perf_counter() - t0}
    heldout = fw.load_heldout(str(held))
    calib = fw.load_heldout(str(cal), flag="--calibration")
    if mode == "floor":
        mats = [m.weight.detach().numpy().astype(np.float64) for _, m in model.named_modules()
                if isinstance(m, torch.nn.Linear)]
        t1 = time.perf_counter()
        for w in mats:
            np.linalg.svd(w, full_matrices=False)
        out["svd"] = time.perf_counter() - t1
        t2 = time.perf_counter()
        n = len(next(iter(calib.inputs.values())))
        with torch.no_grad():
            for start in range(0, n, 64):
                model(**{k: torch.from_numpy(v[start:start + 64]) for k, v in calib.inputs.items()})
        out["forward"] = time.perf_counter() - t2
        out["layers"] = len(mats)
    else:
        config = fw.CompressConfig(budget=budget, quiet=True, latency_repeats=0)
        t1 = time.perf_counter()
        result = fw.compress(model, config, heldout=heldout, calibration=calib if mode == "calibrated" else None)
        out["compress"] = time.perf_counter() - t1
        out["stages"] = result.report["wall_seconds"]
        out["metric"] = result.report["metric"]
        out["allocation"] = result.report.get("allocation")
        out["passes"] = (result.report.get("calibration") or {}).get("passes")
    out["total"] = time.perf_counter() - t0
    out["peak_gib"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20
    return out


def run(model_key: str, mode: str, budget: str) -> dict:
    proc = subprocess.run([sys.executable, __file__, "--child", model_key, mode, "--budget", budget],
                          capture_output=True, text=True, check=True)
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--models", default="minilm,mpnet")
    parser.add_argument("--budget", default="params=0.8")
    parser.add_argument("--out", default=str(ROOT / "reports" / "calibration_speed.md"))
    parser.add_argument("--child", nargs=2)
    args = parser.parse_args()
    if args.child:
        print(json.dumps(child(*args.child, args.budget)))
        return
    import torch

    t0 = time.perf_counter()
    rows = {}
    for key in args.models.split(","):
        rows[key] = {mode: run(key, mode, args.budget) for mode in ("floor", "plain", "calibrated")}
        print(key, json.dumps(rows[key])[:300], flush=True)
    lines = ["# Calibration speed against its floor", "",
             f"Written by `scripts/bench_speed.py` on {platform.machine()}, {os.cpu_count()} cores, torch "
             f"{torch.__version__} with {torch.get_num_threads()} threads, Python {platform.python_version()}; "
             f"budget `{args.budget}`; every run in its own process, one after another in one run "
             f"({(time.perf_counter() - t0) / 60:.1f} min). One run each: these machines are noisy (a second "
             "process on one core slowed LAPACK's eigendecompositions 5-20 times in this session), so the "
             "ratios are the figure, not the seconds.", "",
             "| model | load s | bare SVD s | calibration forward s | plain s (incl. load) | plain / (load + SVD) "
             "| calibrated s (incl. load) | calibrated / floor | probes s (passes) | calibration pass s "
             "| sequential refit s (passes) | peak RSS calibrated |",
             "|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|"]
    for key, r in rows.items():
        f, p, c = r["floor"], r["plain"], r["calibrated"]
        floor = f["load"] + f["svd"] + f["forward"]
        st = c["stages"]
        lines.append(
            f"| {key} | {f['load']:.1f} | {f['svd']:.1f} | {f['forward']:.1f} | {p['total']:.1f} | "
            f"{p['total'] / (f['load'] + f['svd']):.2f} | {c['total']:.1f} | {c['total'] / floor:.2f} | "
            f"{st.get('effects', 0):.1f} ({(c['allocation'] or {}).get('probe_passes', 0)}) | {st.get('calibrate', 0):.1f} | "
            f"{st.get('rewrite', 0):.1f} ({c['passes']}) | {c['peak_gib']:.2f} GiB |")
    lines += ["", "Stages of each calibrated run (seconds, the report's `wall_seconds`) and the metric:", ""]
    for key, r in rows.items():
        c, p = r["calibrated"], r["plain"]
        stages = ", ".join(f"{k} {v:.1f}" for k, v in c["stages"].items())
        lines.append(f"- {key}: {stages}; held-out {c['metric']['name']} {c['metric']['after']:.4f} calibrated, "
                     f"{p['metric']['after']:.4f} plain")
    Path(args.out).write_text("\n".join(lines) + "\n", encoding="utf-8")
    print(f"wrote {args.out}")


if __name__ == "__main__":
    main()
