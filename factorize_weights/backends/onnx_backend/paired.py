"""Layer inputs for calibration: each layer's input read from a probe session that exposes it as an
output, turned into rows of the matrix view (numpy im2col for a Conv), one model or two side by side."""

from __future__ import annotations

from pathlib import Path
from typing import Iterator

import numpy as np

from ...data import real_rows, token_mask
from ...errors import InputError
from ...records import LayerRecord
from .layers import save
from .model import OnnxModel
from .running import _activations

# ---------------------------------------------------------------- calibration statistics

UNFOLD_CHUNK_BYTES = 64 * 2**20


def _conv_pads(record: LayerRecord, spatial_in: tuple[int, ...]) -> list[tuple[int, int]]:
    """(begin, end) padding per spatial axis, resolving auto_pad as the ONNX spec defines it."""
    o = record.options
    kernel = record.weight_shape[2:]
    nd = len(kernel)
    strides = list(o.get("strides", [1] * nd))
    dil = list(o.get("dilations", [1] * nd))
    auto = o.get("auto_pad", b"NOTSET")
    auto = auto.decode() if isinstance(auto, bytes) else auto
    if auto in ("SAME_UPPER", "SAME_LOWER"):
        pads = []
        for size, k, s, d in zip(spatial_in, kernel, strides, dil):
            out = -(-size // s)
            total = max((out - 1) * s + (k - 1) * d + 1 - size, 0)
            small = total // 2
            pads.append((small, total - small) if auto == "SAME_UPPER" else (total - small, small))
        return pads
    if auto == "VALID":
        return [(0, 0)] * nd
    p = list(o.get("pads", [0] * (2 * nd)))
    return list(zip(p[:nd], p[nd:]))


def _conv_rows(record: LayerRecord, x: np.ndarray) -> Iterator[np.ndarray]:
    """Unfolded patches (rows, C*prod(kernel)), ordered like ``weight.reshape(M, -1)``, chunked."""
    kernel = record.weight_shape[2:]
    nd = len(kernel)
    o = record.options
    strides = list(o.get("strides", [1] * nd))
    dil = list(o.get("dilations", [1] * nd))
    pads = _conv_pads(record, x.shape[2:])
    n = record.matrix_shape[1]
    dtype = _row_dtype(x)
    per_sample = max(n * dtype.itemsize * int(np.prod(x.shape[2:])), 1)
    step = max(1, UNFOLD_CHUNK_BYTES // per_sample)
    for start in range(0, x.shape[0], step):
        chunk = np.pad(x[start : start + step].astype(dtype, copy=False), [(0, 0), (0, 0)] + pads)
        span = [(k - 1) * d + 1 for k, d in zip(kernel, dil)]
        win = np.lib.stride_tricks.sliding_window_view(chunk, span, axis=tuple(range(2, 2 + nd)))
        # win: (N, C, out..., span...) -> take dilated taps, then stride the output positions
        taps = win[(...,) + tuple(slice(None, None, d) for d in dil)]
        taps = taps[(slice(None), slice(None)) + tuple(slice(None, None, s) for s in strides)]
        # (N, C, out..., k...) -> (N, out..., C, k...) -> (rows, C*prod(k))
        order = [0] + list(range(2, 2 + nd)) + [1] + list(range(2 + nd, 2 + 2 * nd))
        yield np.ascontiguousarray(taps.transpose(order)).reshape(-1, n)


def _row_dtype(x: np.ndarray) -> np.dtype:
    """Rows keep the model's precision: float64 stays, anything else is float32 (stats.py says why
    products in float32 are safe)."""
    return np.dtype(np.float64 if x.dtype == np.float64 else np.float32)


def layer_rows(record: LayerRecord, x: np.ndarray, mask: np.ndarray | None = None) -> Iterator[np.ndarray]:
    """The node's activation input as rows of the matrix view's input space (float32, or float64
    for a float64 model); with a token ``mask`` ((N, T) booleans, data.token_mask), the rows of a
    per-token input (N, T, in) at real tokens only."""
    o = record.options
    x = np.asarray(x)
    if o["op"] != "Conv" and o.get("side") != "left":
        x = real_rows(x, mask)
    if o["op"] == "Conv":
        yield from _conv_rows(record, x)
    elif o["op"] == "Gemm":
        yield (x.T if o["transA"] else x).astype(_row_dtype(x), copy=False)
    elif o["side"] == "left":  # W @ X: X (..., in, cols) holds one sample per column
        yield np.swapaxes(x, -1, -2).reshape(-1, x.shape[-2]).astype(_row_dtype(x), copy=False)
    else:
        yield x.reshape(-1, x.shape[-1]).astype(_row_dtype(x), copy=False)




def _count(batch) -> int:
    return len(next(iter(batch.values()))) if isinstance(batch, dict) else len(batch)


def stream_inputs(model: OnnxModel, records: list[LayerRecord], batches, sink) -> int:
    """Every selected node's activation input (exposed as extra graph outputs of one probe session
    per model), as blocks of rows: ``sink(name, rows)``. Returns the number of samples."""
    samples = 0
    for batch in batches:
        values = _activations(model, batch)
        samples += _count(batch)
        mask = token_mask(batch)
        for r in records:
            for rows in layer_rows(r, values[r.options["activation"]], mask):
                sink(r.name, rows)
    return samples


def stream_paired_inputs(original: OnnxModel, current: OnnxModel, records: list[LayerRecord], batches, sink) -> int:
    """``sink(name, x, x_new)``: each node's activation input in ``original`` and in ``current`` (the
    same graph with nodes already split; activation names are unchanged), as paired row blocks.
    One probe session per model."""
    samples = 0
    for batch in batches:
        before, after = _activations(original, batch), _activations(current, batch)
        samples += _count(batch)
        mask = token_mask(batch)
        for r in records:
            act = r.options["activation"]
            for x, y in zip(layer_rows(r, before[act], mask), layer_rows(r, after[act], mask)):
                sink(r.name, x, y)
    return samples


class PairedRuns:
    """Whole-graph paired passes, group after group (ONNX graphs are not cut into blocks)."""

    def __init__(self, original: OnnxModel, current: OnnxModel, records, batches: list):
        self.original, self.current, self.batches = original, current, batches

    def stream(self, records: list[LayerRecord], sink) -> int:
        return stream_paired_inputs(self.original, self.current, records, self.batches, sink)


def paired_runs(original: OnnxModel, current: OnnxModel, records: list[LayerRecord], batches: list) -> PairedRuns:
    """The runner of a sequential refit's paired passes."""
    return PairedRuns(original, current, records, batches)


def call_stages(model: OnnxModel, records: list[LayerRecord], sample) -> list[list[str]]:
    """ONNX nodes are stored in topological order: that is the forward order. Consecutive nodes
    that read the same activation (none feeds another) share a stage."""
    stages: list[list[str]] = []
    for r in records:
        if stages and stages[-1][-1][1] == r.options["activation"]:
            stages[-1].append((r.name, r.options["activation"]))
        else:
            stages.append([(r.name, r.options["activation"])])
    return [[name for name, _ in stage] for stage in stages]


def read_factors(model: OnnxModel, names: list[str]):
    raise InputError("an ONNX model has no trainable factors to read back")


def save_model(model: OnnxModel, folder: Path) -> list[str]:
    """Write ``folder/model.onnx`` (plus ``model.onnx.data`` for external data); the file names."""
    save(model, Path(folder) / "model.onnx")
    return sorted(p.name for p in Path(folder).iterdir() if p.name.startswith("model.onnx"))
