"""Per-layer timing for latency budgets: the input shape each layer sees (one traced forward pass)
and callables that run the dense layer, or its factor pair at a rank, once in eager PyTorch."""

from __future__ import annotations

import numpy as np
import torch
from torch import nn

from ...records import LayerRecord
from .layers import FactorPair, _factor_pair
from .running import call


def input_shapes(model: nn.Module, records: list[LayerRecord], batch, calls: dict | None = None) -> dict[str, list[int]]:
    """The shape of the (first) input each record's module sees on ``batch`` (its first call);
    ``calls``, when given, is filled with how often each was called."""
    shapes: dict[str, list[int]] = {}
    calls = {} if calls is None else calls
    hooks = []

    def hook(name):
        def pre(module, args):
            if args and isinstance(args[0], torch.Tensor):
                shapes.setdefault(name, list(args[0].shape))
                calls[name] = calls.get(name, 0) + 1
        return pre

    for r in records:
        hooks.append(model.get_submodule(r.name).register_forward_pre_hook(hook(r.name)))
    try:
        with torch.inference_mode():
            call(model, batch)
    finally:
        for h in hooks:
            h.remove()
    return shapes


def layer_timers(model: nn.Module, records: list[LayerRecord], batch, threads: int) -> dict:
    """``{name: {"shape", "make", "calls"}}`` for each record the batch reaches: ``make(None)``
    runs the dense layer once on a random input of its traced shape, ``make(k)`` the factor pair
    of rank k the rewrite would build (random factors: time does not depend on the values), in
    inference mode. A module call costs the same inside the model, so there is no baseline to
    subtract. Threads are set by :func:`timing` around the measurement."""
    calls: dict[str, int] = {}
    shapes = input_shapes(model, records, batch, calls)
    out = {}
    for r in records:
        if r.name not in shapes:
            continue
        module = model.get_submodule(r.name)
        if isinstance(module, FactorPair):
            module = r.handle
        out[r.name] = {"shape": shapes[r.name], "make": _maker(module, r, shapes[r.name]), "calls": calls[r.name]}
    return out


def _maker(module: nn.Module, record: LayerRecord, shape: list[int]):
    """``make(rank)`` for one layer. The random input is made on the first call and shared by the
    callables of that layer; nothing is held before (every layer's input at once would be every
    activation of the model)."""
    w = module.weight
    m, n = record.matrix_shape
    held: list = []

    def make(rank):
        if not held:
            gen = torch.Generator().manual_seed(0)
            held.append(torch.randn(*shape, generator=gen, dtype=torch.float32).to(dtype=w.dtype, device=w.device))
        x = held[0]
        if rank is None:
            layer = module
        else:
            rng = np.random.default_rng(rank)
            layer = _factor_pair(module, record, rng.standard_normal((m, rank)) / np.sqrt(rank),
                                 rng.standard_normal((rank, n)) / np.sqrt(n))

        def run():
            with torch.inference_mode():
                return layer(x)
        return run

    return make
