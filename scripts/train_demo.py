"""Train the embedded demo model (the bay-digit reader) and write its weights and data splits.

    python scripts/train_demo.py            # writes factorize_weights/demo/{bay_digits.safetensors,
                                            #   heldout.npz, calibration.npz}

Data: UCI optical-recognition digits as shipped in scikit-learn (1,797 8x8 images, 10 classes),
split once with a fixed seed into train (60%), calibration (10%) and held-out (30%), stratified by
class. The held-out split is never seen in training. Deterministic on one machine (fixed seeds,
one thread).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np
import torch
from torch import nn

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from factorize_weights.demo import CALIBRATION, HELDOUT, ONNX, WEIGHTS, build_model  # noqa: E402


def splits(seed: int = 7):
    from sklearn.datasets import load_digits
    from sklearn.model_selection import train_test_split

    digits = load_digits()
    x = (digits.images / 16.0).astype(np.float32)[:, None]  # (N, 1, 8, 8) in [0, 1]
    y = digits.target.astype(np.int64)
    x_rest, x_held, y_rest, y_held = train_test_split(x, y, test_size=0.3, stratify=y, random_state=seed)
    x_train, x_cal, y_train, y_cal = train_test_split(
        x_rest, y_rest, test_size=1 / 7, stratify=y_rest, random_state=seed
    )
    return (x_train, y_train), (x_cal, y_cal), (x_held, y_held)


def shift(batch: torch.Tensor, generator: torch.Generator) -> torch.Tensor:
    """Random translation by up to one pixel (zero fill): cheap augmentation for 8x8 digits."""
    dx, dy = (int(v) for v in torch.randint(-1, 2, (2,), generator=generator))
    out = torch.roll(batch, shifts=(dy, dx), dims=(2, 3))
    if dy == 1:
        out[:, :, 0] = 0
    elif dy == -1:
        out[:, :, -1] = 0
    if dx == 1:
        out[:, :, :, 0] = 0
    elif dx == -1:
        out[:, :, :, -1] = 0
    return out


def export(model: nn.Module) -> None:
    """The same network as ONNX (opset 17, dynamic batch), for the ONNX half of the demo."""
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the TorchScript exporter announces its deprecation
        torch.onnx.export(model.eval(), (torch.zeros(1, 1, 8, 8),), str(ONNX), dynamo=False,
                          input_names=["image"], output_names=["logits"], opset_version=17,
                          dynamic_axes={"image": {0: "batch"}, "logits": {0: "batch"}})
    print(f"wrote {ONNX.name}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--epochs", type=int, default=60)
    parser.add_argument("--weight-decay", type=float, default=0.05)
    parser.add_argument("--dry-run", action="store_true", help="train and report, write nothing")
    parser.add_argument("--onnx-only", action="store_true",
                        help="do not train: export the committed weights to bay_digits.onnx")
    args = parser.parse_args()
    if args.onnx_only:
        from factorize_weights.backends.torch_backend import build_model as load

        export(load("factorize_weights.demo:build_model", WEIGHTS))
        return
    torch.manual_seed(0)
    torch.set_num_threads(1)
    (xt, yt), (xc, yc), (xh, yh) = splits()
    model = build_model()
    opt = torch.optim.AdamW(model.parameters(), lr=2e-3, weight_decay=args.weight_decay)
    sched = torch.optim.lr_scheduler.CosineAnnealingLR(opt, args.epochs)
    gen = torch.Generator().manual_seed(0)
    x_train, y_train = torch.from_numpy(xt), torch.from_numpy(yt)
    for epoch in range(args.epochs):
        model.train()
        order = torch.randperm(len(x_train), generator=gen)
        for start in range(0, len(order), 64):
            idx = order[start : start + 64]
            loss = nn.functional.cross_entropy(model(shift(x_train[idx], gen)), y_train[idx])
            opt.zero_grad()
            loss.backward()
            opt.step()
        sched.step()
    model.eval()
    with torch.no_grad():
        acc = (model(torch.from_numpy(xh)).argmax(1).numpy() == yh).mean() * 100
    print(f"held-out top-1 {acc:.2f}% on {len(yh)} samples (train {len(yt)}, calibration {len(yc)})")
    if args.dry_run:
        return
    from safetensors.torch import save_model

    save_model(model, str(WEIGHTS))
    export(model)
    np.savez_compressed(HELDOUT, inputs=xh, labels=yh)
    np.savez_compressed(CALIBRATION, inputs=xc, labels=yc)
    print(f"wrote {WEIGHTS.name}, {HELDOUT.name}, {CALIBRATION.name} in {WEIGHTS.parent}")


if __name__ == "__main__":
    main()
