"""The embedded demo: a bay-digit reader for a parcel depot.

Scenario (invented): at the Kittiwake Quay parcel depot, couriers hand-write a one-digit bay number
on every parcel tag; a camera on the sorting line's gateway crops each digit to 8x8 pixels and a
small CNN reads it. The gateway is an old industrial PC, so the model must shrink without getting
worse at reading bays.

The network is trained by ``scripts/train_demo.py`` on the UCI optical-recognition digits that
ship inside scikit-learn (Alpaydin & Kaynak 1998; ``sklearn.datasets.load_digits``); its weights and
the held-out and calibration splits live next to this file, so the demo needs no training and no
network.
"""

from __future__ import annotations

from pathlib import Path

HERE = Path(__file__).resolve().parent
WEIGHTS = HERE / "bay_digits.safetensors"
ONNX = HERE / "bay_digits.onnx"  # the same network exported to ONNX (input "image", output "logits")
HELDOUT = HERE / "heldout.npz"
CALIBRATION = HERE / "calibration.npz"
MODEL_SPEC = "factorize_weights.demo:build_model"


#: ``--demo`` choices: (model spec, weights): the factory and its checkpoint, or the exported file
#: (which holds its weights)
VARIANTS = {"torch": (MODEL_SPEC, str(WEIGHTS)), "onnx": (str(ONNX), None)}


def spec(variant: str = "torch") -> tuple[str, str | None]:
    """(model spec, weights) of the demo variant (a key of :data:`VARIANTS`)."""
    return VARIANTS[variant]


def build_model():
    """The bay-digit reader (an ``nn.Module``): input (N, 1, 8, 8) in [0, 1], output (N, 10) logits."""
    from torch import nn  # imported here, so the CLI can list the demo variants without torch

    return nn.Sequential(
        nn.Conv2d(1, 32, 3, padding=1),  # (N, 32, 8, 8)
        nn.ReLU(),
        nn.Conv2d(32, 64, 3, padding=1),  # (N, 64, 8, 8)
        nn.ReLU(),
        nn.MaxPool2d(2),  # (N, 64, 4, 4)
        nn.Conv2d(64, 128, 3, padding=1),  # (N, 128, 4, 4)
        nn.ReLU(),
        nn.MaxPool2d(2),  # (N, 128, 2, 2)
        nn.Flatten(),  # (N, 512)
        nn.Linear(512, 512),
        nn.ReLU(),
        nn.Linear(512, 256),
        nn.ReLU(),
        nn.Linear(256, 10),
    )
