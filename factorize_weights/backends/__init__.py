"""Model-format backends. Each knows one format and nothing else (see DESIGN.md).

A backend module offers: ``discover``, ``weight_matrix``, ``rewrite``, ``predict``,
``measure_positions``, ``layer_output_errors``, ``count_params``, ``gram_statistics``,
``cross_statistics``, ``call_order`` and ``timer``, plus the constants ``FORMAT`` and ``RUNTIME``;
the pipeline picks one with :func:`backend_for`.
"""

from __future__ import annotations

import importlib


def get(name: str):
    """The backend module called ``name`` (``"torch"`` or ``"onnx"``), imported on first use."""
    if name not in ("torch", "onnx"):
        raise ValueError(f"unknown backend {name!r}")
    return importlib.import_module(f".{name}_backend", __name__)


def backend_for(model):
    """The backend that handles ``model``: ONNX for an :class:`OnnxModel`, else PyTorch."""
    if type(model).__name__ == "OnnxModel":
        return get("onnx")
    return get("torch")


def backend_of(record):
    return get(record.backend)
