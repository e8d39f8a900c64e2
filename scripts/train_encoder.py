"""Train the benchmark's patch encoder (examples/patch_encoder.py) on the demo's training split.

    python scripts/train_encoder.py        # writes examples/patch_encoder.safetensors

Same UCI digits splits as the demo (train 60%, calibration 10%, held-out 30%), fixed seeds.
"""

from __future__ import annotations

import sys
from pathlib import Path

import torch
from torch import nn

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "examples"))
sys.path.insert(0, str(ROOT / "scripts"))

from patch_encoder import build_encoder  # noqa: E402
from train_demo import shift, splits  # noqa: E402

OUT = ROOT / "examples" / "patch_encoder.safetensors"


def main(epochs: int = 120) -> None:
    torch.manual_seed(0)
    torch.set_num_threads(2)
    (xt, yt), _, (xh, yh) = splits()
    model = build_encoder()
    opt = torch.optim.AdamW(model.parameters(), lr=1e-3, weight_decay=1e-4)
    sched = torch.optim.lr_scheduler.OneCycleLR(opt, max_lr=2e-3, total_steps=epochs * -(-len(xt) // 64))
    gen = torch.Generator().manual_seed(0)
    x_train, y_train = torch.from_numpy(xt), torch.from_numpy(yt)
    for epoch in range(epochs):
        model.train()
        order = torch.randperm(len(x_train), generator=gen)
        for start in range(0, len(order), 64):
            idx = order[start : start + 64]
            loss = nn.functional.cross_entropy(model(shift(x_train[idx], gen)), y_train[idx], label_smoothing=0.05)
            opt.zero_grad()
            loss.backward()
            opt.step()
            sched.step()
        if (epoch + 1) % 20 == 0:
            model.eval()
            with torch.no_grad():
                acc = (model(torch.from_numpy(xh)).argmax(1).numpy() == yh).mean() * 100
            print(f"epoch {epoch + 1}: held-out top-1 {acc:.2f}%", flush=True)
    from safetensors.torch import save_model

    save_model(model.eval(), str(OUT))
    print(f"wrote {OUT}")


if __name__ == "__main__":
    main()
