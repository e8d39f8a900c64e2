"""How much it matters that calibration data looks like the deployment data (not a test): writes
reports/calibration_match.md.

    python scripts/bench_calibration_match.py

EfficientNet-Lite0's 1280 -> 1000 classifier alone is factorized with the tool's whitened
decomposition (methods.Whitened, the default ridge) on the classifier inputs of four calibration
sets, at four ranks, and scored by top-class agreement with the original on one held-out set:
500 crops from the *right* halves of five photographs (scripts/pretrained.py, HELD_PHOTOS).

- other photographs: 256 crops of six other photographs (the calibration set of
  bench_pretrained.py);
- more photographs: 1024 crops of those six and eleven more (matplotlib's, imgaug's and mahotas's
  sample photographs, scikit-image's eight greyscale ones; scripts/pretrained.py, MORE_PHOTOS);
- same scenes: 256 crops from the *left* halves of the same five photographs (no pixel shared with
  the held-out crops), as a camera at the deployment site would give;
- the held-out crops themselves: an in-sample fit, not a valid procedure; the ceiling of what
  calibration statistics can do for this layer;
- no data: plain SVD of the weights.

Every other layer is exact, so the differences are those of the classifier's calibration alone.
About 4 minutes on 2 cores.
"""

from __future__ import annotations

import os
import platform
import sys
import time
from pathlib import Path

import numpy as np
import torch

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(Path(__file__).resolve().parent))

import pretrained  # noqa: E402
from factorize_weights.methods import PlainSvd, Whitened  # noqa: E402

RANKS = (367, 250, 173, 153)  # 367 and 173: the ranks the calibrated plans give the classifier at params=0.9 and 0.8


def main() -> None:
    torch.set_num_threads(2)
    t0 = time.perf_counter()
    model, _, _ = pretrained.efficientnet_lite0()
    held = pretrained.photo_crops(pretrained.HELD_PHOTOS, 500, 11, half="right")
    sets = {
        "other photographs (256 crops of 6)": pretrained.photo_crops(pretrained.CAL_PHOTOS, 256, 2),
        "more photographs (1024 crops of 17: the six and 11 from four packages)": pretrained.photo_crops(
            pretrained.CAL_PHOTOS + pretrained.MORE_PHOTOS, 1024, 2),
        "same scenes, other half (256 crops)": pretrained.photo_crops(pretrained.HELD_PHOTOS, 256, 12, half="left"),
        "the held-out crops themselves (in-sample ceiling)": held,
    }
    feats = []
    handle = model._fc.register_forward_hook(lambda m, a, o: feats.append(a[0].detach().double().numpy()))

    def inputs(x):
        feats.clear()
        with torch.no_grad():
            for i in range(0, len(x), 32):
                model(torch.from_numpy(x[i:i + 32]))
        return np.concatenate(feats)

    x_held = inputs(held)
    w = model._fc.weight.detach().double().numpy()
    b = model._fc.bias.detach().double().numpy()
    reference = (x_held @ w.T + b).argmax(1)

    def agreement(dec, rank):
        a, x = dec.factors(rank)
        return 100.0 * float(np.mean((x_held @ (a @ x).T + b).argmax(1) == reference))

    rows = [("no data (plain SVD)", PlainSvd().decompose("_fc", w))]
    for name, data in sets.items():
        x = inputs(data)
        rows.append((name, Whitened().decompose("_fc", w, moments=x.T @ x)))
    handle.remove()
    lines = ["# Calibration that looks like the deployment data", "",
             "Written by `scripts/bench_calibration_match.py` (see its docstring). EfficientNet-Lite0's classifier "
             "(1280 → 1000) alone is factorized; every other layer is exact. Metric: top-class agreement with the "
             "original on 500 crops from the right halves of five photographs.", "",
             f"Machine: {platform.machine()}, {os.cpu_count()} cores, 2 torch threads, Python "
             f"{platform.python_version()}, torch {torch.__version__}; {time.perf_counter() - t0:.0f} s.", "",
             "| calibration inputs of the classifier | " + " | ".join(f"rank {r}" for r in RANKS) + " |",
             "|---|" + "---:|" * len(RANKS)]
    for name, dec in rows:
        lines.append(f"| {name} | " + " | ".join(f"{agreement(dec, r):.1f}%" for r in RANKS) + " |")
    out = ROOT / "reports" / "calibration_match.md"
    out.write_text("\n".join(lines) + "\n", encoding="utf-8")
    print("\n".join(lines))


if __name__ == "__main__":
    main()
