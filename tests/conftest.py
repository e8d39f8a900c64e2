"""Shared fixtures. Tests run on the CPU with one torch thread so timings and results repeat."""

from __future__ import annotations

import numpy as np
import pytest
import torch

torch.set_num_threads(1)


def planted(m: int, n: int, singular_values, seed: int = 0) -> np.ndarray:
    """An m x n matrix with exactly the given singular values (random orthonormal U, V)."""
    rng = np.random.default_rng(seed)
    r = len(singular_values)
    u, _ = np.linalg.qr(rng.standard_normal((m, r)))
    v, _ = np.linalg.qr(rng.standard_normal((n, r)))
    return (u * np.asarray(singular_values, dtype=float)) @ v.T


@pytest.fixture
def rng():
    return np.random.default_rng(12345)
