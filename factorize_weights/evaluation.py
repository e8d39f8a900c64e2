"""Measuring a model on held-out data: checking that data fits, the metric before and after
(streamed batch by batch), per-layer output errors, and side-by-side CPU latency."""

from __future__ import annotations

import numpy as np

from . import latency as latency_mod
from .backends import backend_for
from .config import CompressConfig
from .data import HeldOut
from .errors import InputError
from .metrics import MetricAccumulator, MetricResult, check_metric, default_metric
from .progress import bar
from .stats import relative_error

#: Memory for one batch's activations: evaluation and calibration batches are cut to fit it
#: (measured per sample on the first input), so 224x224 images at batch 256 do not take gigabytes.
ACTIVATION_BYTES = 256 * 2**20


def check_fits(model, data: HeldOut, flag: str = "--heldout", output: str | None = None) -> np.ndarray:
    """Run the first batch of ``data`` through ``model``, then the samples holding each integer
    input's extremes (:func:`extreme_rows`); refuse data that does not fit it. Returns the first
    batch's outputs."""
    found = []
    for batch in (first_batch(data), extreme_rows(data)):
        if batch is None:
            continue
        try:
            found.append(backend_for(model).predict(model, batch, source=f"{flag} {data.source}", output=output))
        except InputError:
            raise
        except Exception as exc:
            message = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
            raise InputError(
                f"{flag} {data.source}: inputs of shape {data.sample_shape} per sample "
                f"do not fit the model ({type(exc).__name__}: {message[:300]})"
            ) from exc
        if not np.all(np.isfinite(found[-1])):
            raise InputError(f"{flag} {data.source}: the original model gives NaN or Inf outputs")
    return found[0]


def extreme_rows(data: HeldOut):
    """The samples past the first batch that hold the least or the largest value of an integer
    input (token ids out of an embedding's range anywhere in the set are found up front, not in
    the middle of a calibration pass), as one batch; None when there are none."""
    named = data.inputs if isinstance(data.inputs, dict) else {"inputs": data.inputs}
    first, rows = min(len(data), 8), set()
    for arr in named.values():
        if arr.dtype.kind in "iu" and arr.size and len(arr) > first:
            flat = arr.reshape(len(arr), -1)
            rows.update((int(flat.min(axis=1).argmin()), int(flat.max(axis=1).argmax())))
    rows = sorted(r for r in rows if r >= first)
    if not rows:
        return None
    return {k: v[rows] for k, v in data.inputs.items()} if isinstance(data.inputs, dict) else data.inputs[rows]


def first_batch(data: HeldOut):
    """The batch :func:`check_fits` runs: the first few samples."""
    return next(data.batches(batch_size=min(len(data), 8)))[0]


def check_heldout(model, heldout: HeldOut, metric: str | None, output: str | None = None, flag: str = "--heldout") -> str:
    """Run the first held-out batch through ``model``; return the metric to use. ``flag`` names
    the data in errors (``--selection`` scores a metric too)."""
    outputs = check_fits(model, heldout, flag, output)
    name = metric or default_metric(heldout.labels, outputs)
    try:
        check_metric(name, heldout.labels, outputs, first_batch(heldout))
    except InputError as exc:
        if flag == "--heldout":
            raise
        raise InputError(f"{flag} {heldout.source}: {exc}") from exc
    return name


def evaluate(original, factorized, heldout: HeldOut, metric: str | None = None,
             config: CompressConfig | None = None) -> MetricResult:
    """The held-out metric of ``original`` (before) and ``factorized`` (after)."""
    config = config or CompressConfig()
    name = check_heldout(original, heldout, metric, config.output)
    backend = backend_for(original)
    size = batch_size_for(config, backend.measure_positions(original, backend.discover(original), heldout.inputs))
    triples = ((x, backend.predict(original, x, output=config.output), y) for x, y in heldout.batches(size))
    return score(name, factorized, triples, -(-len(heldout) // size), config)


def batch_size_for(config: CompressConfig, per_sample_bytes: int) -> int:
    """``config.batch_size``, cut so that one batch's activations fit :data:`ACTIVATION_BYTES`."""
    return max(1, min(config.batch_size, ACTIVATION_BYTES // max(int(per_sample_bytes), 1)))


def score(metric: str, factorized, triples, total: int, config: CompressConfig) -> MetricResult:
    """Stream ``(inputs, original outputs, labels)`` batches into the metric of ``factorized``."""
    acc = MetricAccumulator(metric)
    predict = backend_for(factorized).predict
    for inputs, reference, labels in bar(triples, config, "evaluate", total, "batch"):
        mask = inputs.get("attention_mask") if isinstance(inputs, dict) else None  # sequence metrics count real tokens
        acc.update(reference, predict(factorized, inputs, output=config.output), labels, mask, inputs)
    return acc.result()


def check_overlap(heldout: HeldOut | None, calibration: HeldOut | None, allow: bool,
                   flag: str = "--calibration", against: str = "--heldout") -> None:
    if heldout is None or calibration is None or allow:
        return
    same = heldout.source == calibration.source or (heldout.sha256 is not None and heldout.sha256 == calibration.sha256)
    if not same and isinstance(heldout.inputs, np.ndarray) and isinstance(calibration.inputs, np.ndarray):
        same = heldout.inputs.shape == calibration.inputs.shape and np.array_equal(heldout.inputs, calibration.inputs)
    if same:
        raise InputError(
            f"{flag} {calibration.source} is the same data as {against} {heldout.source}: the accuracy "
            "would be measured on what was used to fit or choose" + (" (give --allow-overlap to do it anyway)"
                                                                     if flag == "--calibration" else "")
        )


#: The original's held-out outputs are kept for every evaluation while they fit this; larger ones (a
#: language model's logits: samples x positions x vocabulary floats) are recomputed batch by batch
REFERENCE_BYTES = 512 * 2**20


class Recomputed:
    """The original's held-out outputs, run again at every use instead of kept (see
    :data:`REFERENCE_BYTES`): an iterable of (outputs, labels) per batch, like the kept list."""

    def __init__(self, model, heldout: HeldOut, batch_size: int, output: str | None):
        self.model, self.heldout, self.batch_size, self.output = model, heldout, batch_size, output

    def __len__(self) -> int:
        return -(-len(self.heldout) // self.batch_size)

    def __iter__(self):
        predict = backend_for(self.model).predict
        for inputs, labels in self.heldout.batches(self.batch_size):
            yield predict(self.model, inputs, output=self.output), labels


def reference_outputs(model, heldout: HeldOut, batch_size: int, output: str | None):
    """The original's outputs on every held-out batch: kept in a list when the whole set's fit
    :data:`REFERENCE_BYTES` (judged from the first batch), else a :class:`Recomputed`."""
    predict = backend_for(model).predict
    batches = heldout.batches(batch_size)
    inputs, labels = next(batches)
    first = predict(model, inputs, output=output)
    if first.nbytes * -(-len(heldout) // batch_size) > REFERENCE_BYTES:
        return Recomputed(model, heldout, batch_size, output)
    return [(first, labels)] + [(predict(model, x, output=output), y) for x, y in batches]


def evaluate_prepared(prep, factorized) -> MetricResult:
    """The held-out metric against the original's outputs cached by :func:`prepare`."""
    batches = prep.heldout.batches(prep.batch_size)
    triples = ((x, ref, y) for (x, _), (ref, y) in zip(batches, prep.reference))
    return score(prep.metric_name, factorized, triples, len(prep.reference), prep.config)


def layer_output_errors(prep, factorized, names: list[str]) -> dict[str, float]:
    """Relative output error ``||f(x) - g(x)||_F / ||f(x)||_F`` of each factorized layer on the
    inputs the original layer sees, over the first ``config.error_samples`` held-out samples."""
    num, den = dict.fromkeys(names, 0.0), dict.fromkeys(names, 0.0)

    def sink(name, exact, approx):
        exact = np.asarray(exact, dtype=np.float64)
        num[name] += float(np.sum((exact - np.asarray(approx, dtype=np.float64)) ** 2))
        den[name] += float(np.sum(exact * exact))

    batches = (x for x, _ in prep.heldout.batches(prep.batch_size, limit=prep.config.error_samples))
    prep.backend.stream_layer_outputs(prep.model, factorized, names, batches, sink)
    return {n: relative_error(num[n], den[n]) for n in names}


def measure_latency(original, factorized, heldout: HeldOut, config: CompressConfig) -> dict:
    """Median CPU latency of both models on one batch of ``config.latency_batch`` held-out samples,
    in the model's own runtime (onnxruntime for ONNX, eager torch for PyTorch)."""
    backend = backend_for(original)
    batch = latency_mod.batch_of(heldout.inputs, config.latency_batch)
    with backend.timing([original, factorized], config.latency_threads):
        result = latency_mod.compare(
            backend.timer(original, batch, config.latency_threads),
            backend.timer(factorized, batch, config.latency_threads),
            warmup=config.latency_warmup, repeats=config.latency_repeats,
        )
    return {"runtime": backend.RUNTIME, "batch": config.latency_batch, "threads": config.latency_threads, **result}
