"""ONNX backend: find Gemm/MatMul/Conv nodes with constant weights, split them, run with onnxruntime.

Semantics follow the ONNX operator specification (onnx.ai, Operators.md):

- ``Gemm``: ``Y = alpha * A' @ B' + beta * C`` with ``A' = A^T`` if ``transA``, ``B' = B^T`` if
  ``transB``. With a constant ``B`` the layer's matrix view (out x in) is ``alpha * B`` when
  ``transB = 1`` and ``alpha * B^T`` when ``transB = 0``.
- ``MatMul`` with a constant 2-D weight on the right, ``Y = X @ W`` (W: in x out): the matrix view is
  ``W^T``. On the left, ``Y = W @ X`` (W: out x in): the matrix view is ``W``.
- ``Conv`` with ``group = 1``: weight (M, C, k...) viewed as (M, C * prod(k)).

A chosen node becomes two nodes with fresh names: the first holds X (k x n) and does all the
spatial work (same pads/strides/dilations/auto_pad), the second holds A (m x k) and the bias.

One concern per file: ``model`` (the model in memory, loading), ``layers`` (discovery, matrix
views, rewrite, save), ``running`` (onnxruntime sessions, feeds, timing, int8), ``paired`` (layer
inputs for calibration), ``layer_timing`` (each node and its factor pair run alone, for latency).
"""

from __future__ import annotations

from pathlib import Path

from .layer_timing import input_shapes, layer_timers  # noqa: F401
from .layers import check, count_params, discover, rewrite, save, size_bytes, weight_dtype, weight_matrix  # noqa: F401
from .model import TWO_GB, OnnxModel, load, looks_like_onnx  # noqa: F401
from .paired import (  # noqa: F401
    UNFOLD_CHUNK_BYTES, PairedRuns, call_stages, layer_rows, paired_runs, read_factors, save_model, stream_inputs,
    stream_paired_inputs,
)
from .running import (  # noqa: F401
    feed, graph_inputs, measure_positions, normalize, predict, quantize_int8, replacement_errors,
    stream_layer_outputs, timer, timing,
)

FORMAT = "onnx"
NAME = "ONNX"  # in messages
RUNTIME = "onnxruntime"

#: What this backend can do beyond the common interface (the resolver refuses from this table).
CAPABILITIES = frozenset({
    "output_effects",  # replacement_errors: a rank-k weight fed in place of the stored one
    "int8",  # quantize_int8: onnxruntime dynamic quantization
})


def rebuild(model, folder: Path, layers: list[dict]) -> OnnxModel:
    """An ONNX result folder's ``model.onnx`` is the factorized model itself: loaded as it is."""
    return load(Path(folder) / "model.onnx")

