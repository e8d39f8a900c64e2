"""Calibration: second moments of every selected layer's inputs, whitenings, sequential refits
and short recovery. Part of the orchestrator (it calls backends); the math is in whiten.py.
"""

from __future__ import annotations

import resource
import sys
from dataclasses import dataclass, field

import numpy as np

from .backends import backend_for, backend_of
from .config import CompressConfig
from .data import HeldOut
from .errors import InputError
from .records import LayerRecord
from .spectra import Spectrum
from .whiten import Whitening, regression_target, whitened_factors, whitened_spectrum, whitening


@dataclass
class Calibration:
    """What the calibration pass measured.

    Attributes
    ----------
    data : HeldOut
        The calibration set (never the held-out set unless the user allowed the overlap).
    stats : dict of layer name to {"gram": (n, n) float64, "rows": int, "samples": int}
    whitenings : dict of layer name to Whitening
    warnings : list of str
    """

    data: HeldOut
    stats: dict
    whitenings: dict[str, Whitening]
    warnings: list[str] = field(default_factory=list)
    damping: float = 0.0

    def summary(self) -> dict:
        gram_bytes = int(sum(st["gram"].nbytes for st in self.stats.values()))
        return {
            "source": self.data.source,
            "sha256": self.data.sha256,
            "samples": len(self.data),
            "rows": {name: st["rows"] for name, st in self.stats.items()},
            "gram_bytes": gram_bytes,
            "peak_rss_bytes": _peak_rss(),
            "warnings": list(self.warnings),
            "ridge": self.damping,
        }


def _peak_rss() -> int:
    """The process's peak resident memory so far (Linux reports KiB, macOS bytes)."""
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return int(peak if sys.platform == "darwin" else peak * 1024)


def _batches(data: HeldOut, config: CompressConfig, desc: str = "calibration"):
    from .pipeline import _bar

    total = -(-len(data) // config.batch_size)
    return (x for x, _ in _bar(data.batches(config.batch_size), config, desc, total, "batch"))


def calibrate(model, records: list[LayerRecord], data: HeldOut, config: CompressConfig) -> Calibration:
    """Stream the calibration set once; a Gram matrix and its whitening per selected layer."""
    chosen = [r for r in records if r.skip_reason is None]
    stats = backend_for(model).gram_statistics(model, chosen, _batches(data, config))
    whitenings, warnings = {}, []
    for record in chosen:
        st = stats[record.name]
        if st["gram"] is None:
            raise InputError(f"--calibration {data.source}: layer {record.name!r} never ran on the calibration inputs")
        n = record.matrix_shape[1]
        wh = whitening(_ridge(st["gram"], config.damping))
        if st["rows"] < n:
            warnings.append(
                f"layer {record.name!r}: {st['rows']} calibration rows for {n} input features; its input "
                + (f"second moment is rank-deficient (a ridge of {config.damping:g} x its mean diagonal keeps it usable)"
                   if config.damping > 0 else "second moment is rank-deficient and was only floored (--damping 0)")
            )
        whitenings[record.name] = wh
    return Calibration(data, stats, whitenings, warnings, config.damping)


def whitened_spectra(records: list[LayerRecord], cal: Calibration) -> dict[str, Spectrum]:
    """Spectra of W S per selected layer: the allocator then trades calibration output error."""
    out = {}
    for record in records:
        if record.skip_reason is None:
            w = backend_of(record).weight_matrix(record)
            out[record.name] = whitened_spectrum(record.name, w, cal.whitenings[record.name])
    return out


def sequential_factors(model, records: list[LayerRecord], ranks: dict, cal: Calibration, config: CompressConfig):
    """Refit layers in forward order to the original outputs from the inputs the already
    compressed upstream layers produce (reduced-rank regression, then whitened truncation)."""
    backend = backend_for(model)
    chosen = {r.name: r for r in records if r.skip_reason is None and ranks.get(r.name) is not None}
    order = [n for n in backend.call_order(model, list(chosen.values()), _first_inputs(cal.data)) if n in chosen]
    factors, fits = {}, {}
    current = model
    for name in order:
        record = chosen[name]
        st = backend.cross_statistics(model, current, record, _batches(cal.data, config))
        # the same ridge on both moments: where the calibration data says nothing, M stays W
        wh_new = whitening(_ridge(st["gram"], config.damping))
        target = regression_target(backend.weight_matrix(record), _ridge(st["cross"], config.damping, st["gram"]), wh_new)
        factors[name] = whitened_factors(target, wh_new, ranks[name], split=config.split)
        fits[name] = {"method": wh_new.method, "damping": wh_new.damping}
        current = backend.rewrite(model, records, factors)
    return factors, fits


def _ridge(matrix: np.ndarray, alpha: float, reference: np.ndarray | None = None) -> np.ndarray:
    """``matrix + alpha * mean(diag(reference)) * I``: a relative ridge (common practice, e.g. 1%
    of the mean input energy) that keeps directions the calibration set never visits."""
    if alpha <= 0:
        return matrix
    ref = matrix if reference is None else reference
    lam = alpha * float(np.mean(np.diag(ref)))
    return matrix + lam * np.eye(matrix.shape[0])


def _first_inputs(data: HeldOut):
    x, _ = next(data.batches(1))
    return x


def recover(original, factorized, records, cal: Calibration, config: CompressConfig, metric: str | None) -> dict:
    """Fine-tune the factor pairs on the calibration inputs (PyTorch only)."""
    from .backends import torch_backend, torch_recovery

    if backend_for(original) is not torch_backend:
        raise InputError("--recover fine-tunes PyTorch factor pairs; an ONNX model has no trainable factors")
    if not torch_backend.factor_parameters(factorized):
        raise InputError("--recover: the plan factorized no layer, so there are no factors to fine-tune")
    if isinstance(cal.data.inputs, dict):
        raise InputError(f"--calibration {cal.data.source}: recovery needs one 'inputs' array")
    sample = torch_backend.predict(original, cal.data.inputs[:2])
    # KL on logits for classifiers (2-D outputs, a classification metric or none); MSE otherwise
    classifier = sample.ndim == 2 and sample.shape[1] > 1 and metric in (None, "top1", "top5", "agreement")
    loss = "kl" if classifier else "mse"
    return torch_recovery.recover(original, factorized, cal.data.inputs, steps=config.recover, loss=loss,
                                  lr=config.recover_lr, seed=config.seed, quiet=config.quiet)
