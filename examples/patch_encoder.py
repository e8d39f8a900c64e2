"""A small transformer encoder for the accuracy benchmark (scripts/bench_accuracy.py).

Task (our own framing of the UCI digits): each 8x8 image is cut into sixteen 2x2 patches, read as a
sequence of 16 tokens of 4 pixels; a pre-norm transformer encoder (3 blocks, width 96, 4 heads,
feed-forward 384) classifies the sequence. Attention projections are separate nn.Linear layers so
every dense layer can be factorized. Trained by scripts/train_encoder.py with light weight decay,
so it is less redundant than the demo CNN.

    factorize-weights compress --model examples/patch_encoder.py:build_encoder \\
        --weights examples/patch_encoder.safetensors --budget params=0.5 \\
        --heldout factorize_weights/demo/heldout.npz --calibration factorize_weights/demo/calibration.npz
"""

from __future__ import annotations

import math

import torch
from torch import nn

WIDTH, HEADS, HIDDEN, BLOCKS, TOKENS = 96, 4, 384, 3, 16


class Attention(nn.Module):
    def __init__(self, width: int = WIDTH, heads: int = HEADS):
        super().__init__()
        self.heads = heads
        self.q, self.k, self.v, self.o = (nn.Linear(width, width) for _ in range(4))

    def forward(self, x):  # (N, T, D)
        n, t, d = x.shape
        h = self.heads

        def split(z):  # (N, T, D) -> (N, h, T, D/h)
            return z.view(n, t, h, d // h).transpose(1, 2)

        q, k, v = split(self.q(x)), split(self.k(x)), split(self.v(x))
        att = torch.softmax(q @ k.transpose(-2, -1) / math.sqrt(d // h), dim=-1)  # (N, h, T, T)
        return self.o((att @ v).transpose(1, 2).reshape(n, t, d))


class Block(nn.Module):
    def __init__(self):
        super().__init__()
        self.norm1, self.norm2 = nn.LayerNorm(WIDTH), nn.LayerNorm(WIDTH)
        self.attn = Attention()
        self.up, self.down = nn.Linear(WIDTH, HIDDEN), nn.Linear(HIDDEN, WIDTH)

    def forward(self, x):
        x = x + self.attn(self.norm1(x))
        return x + self.down(torch.nn.functional.gelu(self.up(self.norm2(x))))


class PatchEncoder(nn.Module):
    """Input (N, 1, 8, 8) in [0, 1]; output (N, 10) logits."""

    def __init__(self):
        super().__init__()
        self.embed = nn.Linear(4, WIDTH)
        self.position = nn.Parameter(torch.zeros(1, TOKENS, WIDTH))
        self.blocks = nn.Sequential(*[Block() for _ in range(BLOCKS)])
        self.norm = nn.LayerNorm(WIDTH)
        self.head = nn.Linear(WIDTH, 10)

    def forward(self, x):
        n = x.shape[0]
        patches = x.reshape(n, 4, 2, 4, 2).permute(0, 1, 3, 2, 4).reshape(n, TOKENS, 4)  # (N, 16, 4)
        z = self.blocks(self.embed(patches) + self.position)
        return self.head(self.norm(z).mean(dim=1))


def build_encoder() -> nn.Module:
    return PatchEncoder()
