"""The one typed configuration of a run; CLI flags map one-to-one onto its fields."""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

from .errors import InputError
from .factors import SPLITS
from .metrics import METRICS
from .spectra import SVD_METHODS

METHODS = ("auto", "svd", "whitened", "columns")
ALLOCATIONS = ("auto", "output", "energy-product", "error-sum")


@dataclass
class CompressConfig:
    """Settings of one ``compress`` run (``inspect`` reads the spectrum fields only).

    Every field has a CLI flag of the same name with dashes (``rank_step`` -> ``--rank-step``).
    """

    budget: str = "params=0.5"  # half the selected layers' parameters: a safe first try
    method: str = "auto"  # whitened with --calibration data, else svd (data-free)
    svd: str = "auto"  # exact below 1024 on the smaller side, randomized above (speed)
    seed: int = 0  # randomized SVD test matrix; fixed so runs repeat
    oversampling: int = 10  # Halko et al.'s usual p; error within a few % of optimal
    power_iterations: int = 2  # q=2 brings slowly decaying spectra to ~1.00x optimal error
    split: str = "balanced"  # singular values shared by both factors (see factors.py)
    rank_step: int = 1  # 8 or 16 suits SIMD kernels; 1 lets the allocator choose freely
    min_rank: int = 1  # lowest rank a factorized layer may get
    only: tuple[str, ...] = ()  # name globs of layers to consider (empty: all)
    skip: tuple[str, ...] = ()  # name globs of layers to leave dense
    output: str | None = None  # which output the metrics read: an entry name or tuple index (None: the first)
    metric: str | None = None  # None: top1 with class labels, mse with float targets, else cosine
    batch_size: int = 256  # held-out batch size (memory, not accuracy)
    error_samples: int = 256  # held-out samples used for the per-layer output error
    latency_batch: int = 1  # edge inference usually serves one request at a time
    latency_threads: int = 1  # one core: the common budget on a shared gateway, and the least noisy
    latency_warmup: int = 5  # untimed runs first (allocations, caches)
    latency_repeats: int = 30  # timed runs per model; 0 turns latency measurement off
    # refit layers in forward order to the original outputs; None: on for whitened (it won or tied
    # every row of reports/accuracy.md), off otherwise
    sequential: bool | None = None
    # most passes a sequential refit makes (groups of consecutive layers, fitted in forward order);
    # one per layer is the exact layer-by-layer refit
    sequential_groups: int = 64
    # how ranks are shared out (allocate.py): "output" measures each layer's effect on the model's
    # output on calibration data (effects.py); "energy-product" keeps the most of the product of the
    # layers' kept energy fractions (no layer is crushed to save a little elsewhere); "error-sum"
    # minimises the sum of the layers' own normalized errors. "auto" is "output" with calibration data
    # and a PyTorch model, else "error-sum" (energy-product won on EfficientNet-Lite0 at 0.7 and lost
    # on MiniLM at 0.9, 0.8 and 0.3: reports/accuracy_pretrained.md)
    allocation: str = "auto"
    effect_samples: int = 32  # calibration samples the output-effect probes run on
    # weight each output row's error by the |gamma|/sqrt(var+eps) of an eval-mode BatchNorm that reads
    # the layer's output; off by default: on EfficientNet-Lite0 it lowered agreement (measured,
    # reports/accuracy_pretrained.md)
    bn_weights: bool = False
    # layers fed by an eval-mode BatchNorm use the input statistics it promises: without calibration,
    # each is truncated for its output error on them (the plan is unchanged); with calibration, its
    # measured moments are shrunk toward them instead of toward the identity. None: on for PyTorch
    # models (the chains are found by one forward pass, so it needs --heldout or --calibration).
    # Measured on EfficientNet-Lite0 (reports/accuracy_pretrained.md); models without BatchNorm are
    # unchanged
    bn_inputs: bool | None = None
    recover: int = 0  # fine-tuning steps of the factors after factorization (needs calibration); 0: off
    recover_lr: float | None = None  # None: chosen by short trials on the validation slice (backends/torch_backend/recovery.py)
    # ridge on the calibration moments, relative to their mean diagonal: 1% (common practice) kept
    # sequential refits from zeroing directions 180 calibration images never visit (measured:
    # demo logit error at params=0.3 0.022 -> 0.004)
    ridge: float = 0.01
    # per layer, raise the ridge to the Ledoit-Wolf shrinkage of its calibration moments (stats.py):
    # large where a layer has few calibration rows per input feature (a classifier fed 256 pooled
    # vectors of 1280 features), negligible where it has many
    shrinkage: bool = True
    # with shrinkage, and as its floor: each layer's relative ridge is at least rows_ridge x its input
    # width / its calibration rows. Ledoit-Wolf assumes independent rows; calibration rows rarely
    # are (crops of a few photographs, positions of one image), and where a layer sees few rows per
    # feature (a classifier after pooling) the whitened factors then fit the calibration set and
    # not the data the model will see. 0.1 was chosen on EfficientNet-Lite0 (0.05/0.1/0.2/0.5
    # measured; reports/accuracy_pretrained.md); it binds only below 10 rows per feature
    rows_ridge: float = 0.1
    allow_overlap: bool = False  # refuse the same file as calibration and held-out set unless set
    export_onnx: bool = False  # also write the factorized PyTorch model as model.onnx (checked)
    int8: bool = False  # also compare dynamic int8 quantization on top (ONNX, onnxruntime)
    quiet: bool = False  # no progress bars

    def __post_init__(self) -> None:
        self.only = tuple(self.only)
        self.skip = tuple(self.skip)
        self.validate()

    def validate(self) -> None:
        """Raise :class:`InputError` naming the field, the allowed values and the value given."""
        choices = {"method": METHODS, "svd": SVD_METHODS, "split": SPLITS, "allocation": ALLOCATIONS}
        for name, allowed in choices.items():
            value = getattr(self, name)
            if value not in allowed:
                raise InputError(f"--{name.replace('_', '-')} must be one of {', '.join(allowed)}; got {value!r}")
        if self.metric is not None and self.metric not in METRICS:
            raise InputError(f"--metric must be one of {', '.join(METRICS)}; got {self.metric!r}")
        if not (isinstance(self.ridge, (int, float)) and 0 <= self.ridge < 1):
            raise InputError(f"--ridge must be in [0, 1); got {self.ridge!r}")
        if not (isinstance(self.rows_ridge, (int, float)) and 0 <= self.rows_ridge <= 10):
            raise InputError(f"--rows-ridge must be in [0, 10]; got {self.rows_ridge!r}")
        if self.recover_lr is not None and not (isinstance(self.recover_lr, (int, float)) and 0 < self.recover_lr < 1):
            raise InputError(f"--recover-lr must be in (0, 1); got {self.recover_lr!r}")
        minimum = {"recover": 0, "effect_samples": 1, "sequential_groups": 1, "rank_step": 1, "min_rank": 1, "batch_size": 1, "oversampling": 0,
                   "power_iterations": 0, "error_samples": 0, "seed": 0, "latency_batch": 1,
                   "latency_threads": 1, "latency_warmup": 0, "latency_repeats": 0}
        for name, low in minimum.items():
            value = getattr(self, name)
            if not isinstance(value, int) or isinstance(value, bool) or value < low:
                raise InputError(
                    f"--{name.replace('_', '-')} must be an integer in [{low}, inf); got {value!r}"
                )

    @classmethod
    def from_mapping(cls, values: dict) -> "CompressConfig":
        """Build from a dict, refusing unknown keys by name."""
        known = {f.name for f in dataclasses.fields(cls)}
        unknown = sorted(set(values) - known)
        if unknown:
            raise InputError(f"unknown configuration key(s): {', '.join(unknown)}")
        return cls(**values)

    def to_dict(self) -> dict:
        d = dataclasses.asdict(self)
        d["only"] = list(self.only)
        d["skip"] = list(self.skip)
        return d

    def resolved_sequential(self, method: str) -> bool:
        return (method == "whitened") if self.sequential is None else bool(self.sequential)

    def resolved_allocation(self, calibrated: bool, backend_format: str) -> str:
        """``auto`` becomes ``output`` with calibration data on a PyTorch model, else ``error-sum``."""
        if self.allocation == "auto":
            return "output" if calibrated and backend_format == "torch" else "error-sum"
        return self.allocation

    def resolved_bn_inputs(self, backend_format: str) -> bool:
        """``None`` becomes on for a PyTorch model."""
        if self.bn_inputs is None:
            return backend_format == "torch"
        return bool(self.bn_inputs)

    def resolved_method(self, calibrated: bool) -> str:
        """``auto`` becomes ``whitened`` with calibration data and ``svd`` without."""
        if self.method == "auto":
            return "whitened" if calibrated else "svd"
        return self.method
