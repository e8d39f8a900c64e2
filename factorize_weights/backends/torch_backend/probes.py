"""Probes: one forward pass on a sample that measures what planning needs (output positions and
activation size, overridden forward() checks, BatchNorm row scales and input statistics) and the
order in which layers are called."""

from __future__ import annotations

import functools

import numpy as np
import torch
from torch import nn

from .layers import _KINDS, OVERRIDE_MISMATCH
from .running import _run_once
from ...records import LayerRecord


def measure_positions(model: nn.Module, records: list[LayerRecord], sample: np.ndarray) -> int:
    """Set each record's output positions per sample by one forward pass on one sample: 1 for a
    linear layer on (N, in), T for (N, T, in), the output length or area for a convolution; a
    layer called several times per forward counts every call. Returns an estimate of the activation
    memory one sample needs (:class:`_ActivationSize`).

    The pass runs four probes at once, each a class of its own: :class:`_ForwardCheck` (do
    overridden forward()s compute what their base class computes?), :class:`_Positions`,
    :class:`_RowScales` (BatchNorms that read a layer's output) and :class:`_ActivationSize`, plus
    the BatchNorm-chain trace (:func:`_trace_normalized_inputs`)."""
    hooks: list = []
    check = _ForwardCheck(records)
    positions = _Positions(records, check.names)
    scales = _RowScales(positions)
    size = _ActivationSize()
    check.attach(hooks)
    scales.attach(model, hooks)
    produced = _trace_normalized_inputs(model, records, hooks)
    positions.attach(hooks)
    size.attach(model, hooks)
    rows = min(8 if check.names else 1, len(next(iter(sample.values())) if isinstance(sample, dict) else sample))
    _run_once(model, sample, hooks, rows=rows)
    for record in records:
        if record.name in produced and record.positions is not None:
            record.input_stats, record.input_from = produced[record.name]
    check.finish(rows)
    return size.per_sample(rows)


class _ActivationSize:
    """Activation memory one sample needs: :data:`LIVE_OUTPUTS` times the largest module output
    inside the model, at most the sum of all of them, plus three times the model's own output
    (kept, and copied to float64 for the metrics). Without gradients a module's output is freed once
    the next ones have read it, so the sum overstates the peak many times: EfficientNet-Lite0's
    outputs sum to 391 MiB a sample while a batch of 16 (64) grew the process by 8 (14) MiB a
    sample, and its largest output is 4.7 MiB (measured). The model's output is counted apart
    because it is not freed: a language model's logits (positions x vocabulary) are its largest
    tensor by far, and six of them would cut its batches to one sample."""

    def __init__(self):
        self.sizes: list[tuple[int, int]] = []  # (data pointer, bytes) of every leaf module output
        self.final: dict[int, int] = {}  # data pointer -> bytes of the tensors the model returns

    def attach(self, model: nn.Module, hooks: list) -> None:
        hooks += [m.register_forward_hook(self._count) for m in model.modules() if not list(m.children())]
        hooks.append(model.register_forward_hook(self._returned))

    def _count(self, module, args, output) -> None:
        if isinstance(output, torch.Tensor):
            self.sizes.append((output.data_ptr(), output.numel() * output.element_size()))

    def _returned(self, module, args, output) -> None:
        for t in _tensors(output):
            self.final[t.data_ptr()] = t.numel() * t.element_size()

    def per_sample(self, rows: int) -> int:
        inner = [size for ptr, size in self.sizes if ptr not in self.final]
        total, largest = sum(inner), max(inner, default=0)
        return int((min(total, LIVE_OUTPUTS * largest) + 3 * sum(self.final.values())) // max(rows, 1))


def _tensors(value) -> list:
    """The tensors in a model's output: a tensor, or those in a tuple, list, dict or output object."""
    if isinstance(value, torch.Tensor):
        return [value]
    if isinstance(value, dict) or hasattr(value, "values") and callable(value.values):
        value = list(value.values())
    if isinstance(value, (tuple, list)):
        return [t for v in value for t in _tensors(v)]
    return []


class _ForwardCheck:
    """Layers whose class overrides ``forward()`` are admitted only when, on the sample's real
    inputs, the base class's forward gives the same output (to :data:`OVERRIDE_TOLERANCE` of the
    output's scale); otherwise the reason is recorded as the layer's skip reason."""

    def __init__(self, records: list[LayerRecord]):
        self.records = [r for r in records if r.skip_reason is not None and r.options.get("check_forward")]
        self.names = {r.name for r in self.records}
        self.differences = {r.name: [] for r in self.records}
        self.why: dict[str, str] = {}  # why the base class's output could not be compared (first seen)
        self.bases = {r.name: next(cls for cls in _KINDS if isinstance(r.handle, cls)) for r in self.records}

    def attach(self, hooks: list) -> None:
        for record in self.records:
            hooks.append(record.handle.register_forward_hook(
                lambda m, a, o, record=record: self._compare(m, a, o, record)))

    def _fail(self, record: LayerRecord, why: str) -> None:
        self.why.setdefault(record.name, why)
        self.differences[record.name].append(float("inf"))

    def _compare(self, module, args, output, record: LayerRecord) -> None:
        base = self.bases[record.name]
        if len(args) != 1 or not isinstance(output, torch.Tensor):
            return self._fail(record, f"it is called with {len(args)} positional inputs" if len(args) != 1
                              else f"it returns a {type(output).__name__}, not a tensor")
        try:
            plain = base.forward(module, args[0])
        except Exception as exc:
            return self._fail(record, f"{base.__name__}.forward fails on its inputs ({type(exc).__name__})")
        if plain.shape != output.shape:  # e.g. padding of its own
            return self._fail(record, f"its output shape {tuple(output.shape)} is not {base.__name__}'s "
                                      f"{tuple(plain.shape)} on the sample inputs")
        scale = float(output.abs().max()) if output.numel() else 0.0
        self.differences[record.name].append(float((plain - output).abs().max()) / max(scale, 1e-30))

    def finish(self, rows: int) -> None:
        for record in self.records:
            seen = self.differences[record.name]
            worst = max(seen) if seen else float("inf")
            cls, base = type(record.handle).__name__, self.bases[record.name].__name__
            if seen and worst <= OVERRIDE_TOLERANCE:
                record.skip_reason = None  # the rewrite computes what the layer computed, on real inputs
                record.options["forward_checked"] = f"{cls}.forward matched {base}.forward on {rows} sample input(s)"
            elif not seen:
                record.skip_reason = f"class {cls} overrides forward() and the sample never called it"
            elif record.name in self.why:
                record.skip_reason = (f"class {cls} overrides forward() and {self.why[record.name]}, "
                                      "so two plain factors would change it")
            else:
                record.skip_reason = OVERRIDE_MISMATCH.format(cls=cls, base=base, diff=worst)
                record.positions = None
                record.row_scale = record.scaled_by = None


class _Positions:
    """Output positions per sample of every candidate layer (and the latest output of one, which
    :class:`_RowScales` reads)."""

    def __init__(self, records: list[LayerRecord], checked: set):
        self.records = [r for r in records if r.skip_reason is None or r.name in checked]
        self.last = [None, None]  # the latest output of a candidate layer, and its record

    def attach(self, hooks: list) -> None:
        for record in self.records:
            record.positions = 0
            record.row_scale = record.scaled_by = None
            record.input_stats = record.input_from = None
            hooks.append(record.handle.register_forward_hook(lambda m, a, o, record=record: self._count(o, record)))

    def _count(self, output, record: LayerRecord) -> None:
        self.last[0], self.last[1] = (output, record) if isinstance(output, torch.Tensor) else (None, None)
        shape = output.shape
        # linear: every position of (N, ..., out) but the batch (empty product: 1); conv: (N, C, *spatial)
        record.positions += int(np.prod(shape[1:-1])) if record.kind == "linear" else int(np.prod(shape[2:]))


class _RowScales:
    """An eval-mode BatchNorm that reads a candidate layer's output directly gives that layer's rows
    the weights |gamma| / sqrt(var + eps) (``record.row_scale``, used by ``bn_weights``)."""

    def __init__(self, positions: _Positions):
        self.last = positions.last

    def attach(self, model: nn.Module, hooks: list) -> None:
        for name, bn in model.named_modules():
            if isinstance(bn, nn.modules.batchnorm._BatchNorm):
                hooks.append(bn.register_forward_pre_hook(lambda m, a, name=name: self._scaled(m, a, name)))

    def _scaled(self, module, args, name: str) -> None:
        out, record = self.last
        if out is not None and args and args[0] is out and not module.training \
                and module.running_var is not None and record.row_scale is None \
                and args[0].dim() >= 2 and args[0].shape[1] == record.matrix_shape[0]:
            gamma = module.weight.detach().abs() if module.weight is not None else torch.ones_like(module.running_var)
            record.row_scale = (gamma / torch.sqrt(module.running_var.detach() + module.eps)).double().numpy()
            record.scaled_by = name
        self.last[0] = self.last[1] = None


# outputs of the largest size that may be alive at once in an inference pass (a block's input, its
# output, a skip connection, the scores and probabilities of attention; common practice, with margin)
LIVE_OUTPUTS = 6

# traced tensors kept alive at once while finding BatchNorm -> activation -> layer chains
TRACE_WINDOW = 6

# elementwise activations an input prior passes through (applied to quadrature points as they are)
_ELEMENTWISE = (nn.ReLU, nn.ReLU6, nn.LeakyReLU, nn.ELU, nn.SELU, nn.CELU, nn.GELU, nn.SiLU, nn.Hardswish,
                nn.Hardsigmoid, nn.Hardtanh, nn.Sigmoid, nn.Tanh, nn.Mish, nn.Softplus)
_PASS = (nn.Identity, nn.Dropout, nn.Flatten)  # eval mode: the values pass unchanged
_POOL = (nn.AdaptiveAvgPool1d, nn.AdaptiveAvgPool2d, nn.AdaptiveAvgPool3d, nn.AvgPool1d, nn.AvgPool2d, nn.AvgPool3d)
# E over N(0, 1) by the trapezoid rule on a fine grid: activations have kinks (ReLU, ReLU6), where
# Gauss-Hermite nodes converge slowly (64 of them were 0.6% off a ReLU's mean; measured)
_NODES = np.linspace(-10.0, 10.0, 4001)
_WEIGHTS = np.exp(-0.5 * _NODES ** 2)
_WEIGHTS = _WEIGHTS / _WEIGHTS.sum()


def activation_moments(beta: np.ndarray, gamma: np.ndarray, act: nn.Module | None) -> tuple[np.ndarray, np.ndarray]:
    """Mean and variance of ``act(z)`` per channel for ``z ~ N(beta, gamma^2)``, by quadrature on
    4001 points (the activation module itself is evaluated at them)."""
    z = torch.from_numpy(beta[None, :] + np.abs(gamma)[None, :] * _NODES[:, None])  # (points, C) float64
    with torch.no_grad():
        f = (act(z.clone()) if act is not None else z).double().numpy()
    mean = _WEIGHTS @ f
    return mean, np.maximum(_WEIGHTS @ (f * f) - mean * mean, 0.0)


def _input_statistics(bn, act, taps: int) -> tuple[np.ndarray, np.ndarray, int]:
    """(mean and variance per channel of ``act`` over the BatchNorm's N(beta, gamma^2), kernel
    taps); computed only when a layer's truncation uses them (--bn-inputs), not on every discovery."""
    channels = int(bn.running_var.numel())
    gamma = bn.weight.detach().double().numpy() if bn.weight is not None else np.ones(channels)
    beta = bn.bias.detach().double().numpy() if bn.bias is not None else np.zeros(channels)
    mean, var = activation_moments(beta, gamma, act)
    return mean, var, taps


def _key(t: torch.Tensor) -> tuple:
    return (t.data_ptr(), t.numel(), t.dtype)


def _trace_normalized_inputs(model: nn.Module, records: list[LayerRecord], hooks: list) -> dict:
    """Hooks that, during the next forward pass, find the layers whose input is an eval-mode
    BatchNorm's output, possibly through one elementwise activation module, average pooling and
    pass-through modules (dropout, flatten; a view of the same storage counts as the same tensor).
    The returned dict fills after the pass: ``{layer name: (a call giving (mean and variance
    per input channel, kernel taps), "bn -> act -> pool")}``, the statistics an eval-mode BatchNorm
    promises on the data it was trained on: its output is N(beta, gamma^2) per channel under the usual Gaussian reading, which the
    activation maps as :func:`activation_moments` computes (independent channels assumed).
    Average pooling keeps the mean; the variance is kept as an upper bound (the spatial correlation
    is unknown)."""
    chains: dict[tuple, tuple] = {}  # tensor key -> (bn module, bn name, activation, path)
    # the latest TRACE_WINDOW traced tensors, kept alive so that their storage is not reused while
    # their keys are in ``chains``; an older one leaves with its key (a chain is read by the next
    # few modules), so the trace holds a few outputs, never every one of a deep model
    alive: dict[tuple, torch.Tensor] = {}
    found: dict[str, tuple] = {}

    def track(output: torch.Tensor, chain: tuple) -> None:
        key = _key(output)
        alive.pop(key, None)  # an in-place step keeps the key: it moves to the newest place
        chains[key], alive[key] = chain, output
        if len(alive) > TRACE_WINDOW:
            oldest = next(iter(alive))
            del alive[oldest], chains[oldest]

    def on_bn(module, args, output, name):
        if not module.training and module.running_var is not None and isinstance(output, torch.Tensor):
            track(output, (module, name, None, name))

    def on_step(module, args, output, name):
        if not args or not isinstance(args[0], torch.Tensor) or not isinstance(output, torch.Tensor):
            return
        src = chains.get(_key(args[0]))
        if src is None:
            return
        bn, bn_name, act, path = src
        if isinstance(module, _ELEMENTWISE):
            if act is not None or "pool" in path:  # one activation, before any pooling
                return
            track(output, (bn, bn_name, module, f"{path} -> {name}"))
        elif isinstance(module, _POOL):
            track(output, (bn, bn_name, act, f"{path} -> {name} (pool)"))
        else:
            track(output, src)

    def on_layer(module, args, record):
        if record.name in found or not args or not isinstance(args[0], torch.Tensor):
            return
        x = args[0]
        src = chains.get(_key(x))
        if src is None:
            return
        bn, _, act, path = src
        channels = int(bn.running_var.numel())
        wanted = record.handle.in_channels if record.kind != "linear" else record.handle.in_features
        if channels != wanted or getattr(record.handle, "groups", 1) != 1 or \
                (record.kind == "linear" and x.dim() != 2):
            return
        taps = 1 if record.kind == "linear" else int(np.prod(record.handle.kernel_size))
        found[record.name] = (functools.partial(_input_statistics, bn, act, taps), path)

    for name, module in model.named_modules():
        if isinstance(module, nn.modules.batchnorm._BatchNorm):
            hooks.append(module.register_forward_hook(lambda m, a, o, name=name: on_bn(m, a, o, name)))
        elif isinstance(module, _ELEMENTWISE + _PASS + _POOL):
            hooks.append(module.register_forward_hook(lambda m, a, o, name=name: on_step(m, a, o, name)))
    for record in records:
        hooks.append(record.handle.register_forward_pre_hook(lambda m, a, record=record: on_layer(m, a, record)))
    hooks.append(_Release(alive, chains))
    return found


class _Release:
    """Drops the traced tensors when the hooks are removed (after the pass)."""

    def __init__(self, alive: dict, chains: dict):
        self.alive, self.chains = alive, chains

    def remove(self) -> None:
        self.alive.clear()
        self.chains.clear()


# largest relative difference at which an overridden forward() counts as the base class's: float32
# round-off of the same arithmetic done in another order (common practice)
OVERRIDE_TOLERANCE = 1e-5


def call_stages(model: nn.Module, records: list[LayerRecord], sample: np.ndarray) -> list[list[str]]:
    """The records in the order one forward pass (on the first sample) first calls them, as stages:
    consecutive layers that read the very same input tensor (attention's q, k and v projections)
    share a stage, since none of them feeds another. Sets each record's ``calls`` (calls per
    forward pass). Records never called go last, one stage each."""
    order: list[str] = []
    keys: dict[str, tuple] = {}
    for r in records:
        r.calls = 0

    def hook(module, args, output, record):
        record.calls += 1
        if record.name not in keys:
            x = args[0]
            keys[record.name] = (x.data_ptr(), tuple(x.shape), tuple(x.stride()))
            order.append(record.name)

    hooks = [r.handle.register_forward_hook(lambda m, a, o, r=r: hook(m, a, o, r)) for r in records]
    _run_once(model, sample, hooks)
    stages: list[list[str]] = []
    for name in order:
        if stages and keys[stages[-1][-1]] == keys[name]:
            stages[-1].append(name)
        else:
            stages.append([name])
    return stages + [[r.name] for r in records if r.name not in keys]




