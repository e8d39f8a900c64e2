"""ONNX extras of a run: a PyTorch result exported and checked in onnxruntime, and the int8
comparison (original, factorized, int8-only, factorized+int8, side by side). Both formats meet
here, so this lives among the backends."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .. import latency as latency_mod
from ..config import CompressConfig
from ..data import HeldOut
from ..metrics import MetricAccumulator
from . import onnx_backend, torch_backend

def export_checked(model, heldout: HeldOut, work: Path):
    """Export a factorized PyTorch model to ONNX and check it against torch in onnxruntime on the
    first held-out batch; returns (path of the file written in ``work``, report entry)."""
    path = work / "model.onnx"
    inputs, _ = next(heldout.batches(64))
    torch_backend.export_onnx(model, inputs, path)
    exported = onnx_backend.load(path)
    onnx_backend.check(exported)
    expected = torch_backend.predict(model, inputs)
    got = onnx_backend.predict(exported, inputs)
    diff = float(np.max(np.abs(expected - got))) if expected.size else 0.0
    scale = float(np.max(np.abs(expected))) if expected.size else 0.0
    tolerance = 1e-4 * scale + 1e-5  # float32 kernels differ in summation order (common practice)
    if expected.shape != got.shape or diff > tolerance:
        raise RuntimeError(f"exported ONNX model disagrees with torch: max |diff| {diff:.3g} > {tolerance:.3g}")
    return path, {"file": "model.onnx", "checked_with": "onnxruntime", "samples": int(expected.shape[0]),
                  "max_abs_diff": diff, "tolerance": tolerance}


def int8_comparison(original, factorized, heldout: HeldOut, metric: str, config: CompressConfig,
                    exported_path: Path | None, work: Path):
    """Original, factorized, int8-only and factorized+int8, side by side in onnxruntime: size on
    disk, held-out metric and latency (unless ``latency_repeats`` is 0). Returns (path of the
    factorized+int8 file in ``work``, report entry)."""
    if not isinstance(original, onnx_backend.OnnxModel):  # a PyTorch run with --export-onnx
        inputs, _ = next(heldout.batches(8))
        torch_backend.export_onnx(original, inputs, work / "original.onnx")
        original, factorized = onnx_backend.load(work / "original.onnx"), onnx_backend.load(exported_path)
    variants = {"original": original, "factorized": factorized,
                "int8": onnx_backend.quantize_int8(original), "factorized+int8": onnx_backend.quantize_int8(factorized)}
    accs = {name: MetricAccumulator(metric) for name in variants}
    for inputs, labels in heldout.batches(config.batch_size):
        reference = onnx_backend.predict(original, inputs)
        mask = inputs.get("attention_mask") if isinstance(inputs, dict) else None  # sequence metrics count real tokens
        for name, model in variants.items():
            accs[name].update(reference, onnx_backend.predict(model, inputs), labels, mask, inputs)
    times = [None] * len(variants)
    if config.latency_repeats > 0:
        batch = latency_mod.batch_of(heldout.inputs, config.latency_batch)
        with onnx_backend.timing(list(variants.values()), config.latency_threads):
            times = latency_mod.measure_many(
                [onnx_backend.timer(m, batch, config.latency_threads) for m in variants.values()],
                warmup=config.latency_warmup, repeats=config.latency_repeats)
    rows = []
    for (name, model), acc, t in zip(variants.items(), accs.values(), times):
        path = work / f"{name.replace('+', '_')}.int8cmp.onnx"
        onnx_backend.save(model, path, external=False)
        result = acc.result()
        rows.append({"name": name, "size_bytes": path.stat().st_size, "metric": result.after,
                     "delta": result.after - accs["original"].result().after,
                     "latency_ms": None if t is None else t["median_ms"],
                     "latency_spread_ms": None if t is None else [t["p10_ms"], t["p90_ms"]]})
    entry = {"metric": metric, "runtime": "onnxruntime", "quantization": "dynamic, int8 weights (QInt8)",
             "batch": config.latency_batch, "threads": config.latency_threads, "variants": rows,
             "file": "model.int8.onnx"}
    return work / "factorized_int8.int8cmp.onnx", entry
