"""The one typed configuration of a run. Each field carries its own metadata (help, group, allowed
values, whether the command line shows it), and the CLI options, the run file and the validation
are all generated from it: an option lives in one place.

A field with ``cli=False`` is for the Python API only (kept for benchmarks that reproduce older
rows; the command line does not offer it, and the README says why each was demoted).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

from .errors import InputError
from .factors import SPLITS
from .metrics import METRICS
from .spectra import SVD_METHODS

METHODS = ("auto", "svd", "whitened", "columns")
ALLOCATIONS = ("auto", "output", "energy-product", "error-sum")

#: Option groups in the order ``--help`` shows them, and the commands each belongs to.
GROUPS = {
    "layers and spectra": ("inspect", "compress", "sweep"),
    "factors": ("compress", "sweep"),
    "calibration (data-aware factors; never the held-out set)": ("compress", "sweep"),
    "evaluation and output": ("compress", "sweep"),
    "latency (measured on the CPU when --heldout is given)": ("compress", "sweep"),
    "advanced (defaults suit almost every model)": ("inspect", "compress", "sweep"),
}
_G = list(GROUPS)
SPECTRA, FACTORS, CALIBRATION, EVALUATION, LATENCY, ADVANCED = _G


def opt(default, help: str = "", *, group: str | None = None, choices: tuple | None = None, low=None, high=None,
        open_low: bool = False, open_high: bool = False, metavar: str | None = None, commands: tuple | None = None,
        cli: bool = True, flag: str | None = None):
    """A configuration field with its metadata. ``low``/``high`` bound numbers (excluded when
    ``open_low``/``open_high``); ``commands`` narrows the group's commands; ``flag`` overrides the option
    name derived from the field name (``rank_step`` -> ``--rank-step``)."""
    meta = {"help": help, "group": group, "choices": choices, "low": low, "high": high, "open_low": open_low,
            "open_high": open_high, "metavar": metavar, "commands": commands, "cli": cli and group is not None, "flag": flag}
    if isinstance(default, tuple):
        return dataclasses.field(default_factory=lambda: default, metadata=meta)
    return dataclasses.field(default=default, metadata=meta)


@dataclass
class CompressConfig:
    """Settings of one ``compress`` run (``inspect`` reads the spectrum fields only).

    Every field with a group has a CLI flag of the same name with dashes (``rank_step`` ->
    ``--rank-step``); the comment beside a default says why it is that value.
    """

    budget: str = opt("params=0.5")  # half the selected layers' parameters: a safe first try
    method: str = opt("auto", "svd (weights only), whitened (calibrated on real inputs), columns (pivoted-QR "
                      "columns); auto: whitened with --calibration, else svd", group=FACTORS, choices=METHODS)
    svd: str = opt("auto", "exact, randomized, or auto (randomized only where the choosable ranks are well below "
                   "the smaller side)", group=SPECTRA, choices=SVD_METHODS)  # auto: exact below 1024 (speed)
    seed: int = opt(0, "seed of the randomized SVD", group=SPECTRA, low=0, metavar="N")  # fixed so runs repeat
    # Halko et al.'s usual p; error within a few % of optimal
    oversampling: int = opt(10, "randomized SVD oversampling p", group=ADVANCED, low=0, metavar="P")
    # q=2 brings slowly decaying spectra to ~1.00x optimal error
    power_iterations: int = opt(2, "randomized SVD power iterations q", group=ADVANCED, low=0, metavar="Q")
    # singular values shared by both factors (factors.py); "left" gives the same product A @ X, so
    # the same model outputs: Python API only
    split: str = opt("balanced", choices=SPLITS)
    # 8 or 16 suits SIMD kernels; 1 lets the allocator choose freely
    rank_step: int = opt(1, "round ranks to multiples of N (e.g. 8)", group=FACTORS, low=1, metavar="N")
    min_rank: int = opt(1, "lowest rank of a factorized layer", group=FACTORS, low=1, metavar="N")
    only: tuple[str, ...] = opt((), "consider only layers matching GLOB (repeatable)", group=SPECTRA, metavar="GLOB")
    skip: tuple[str, ...] = opt((), "leave layers matching GLOB dense (repeatable)", group=SPECTRA, metavar="GLOB")
    output: str | None = opt(None, "which model output the metrics read: an entry of a dict or output object, or "
                             "an index into a tuple (default: the first tensor)", group=EVALUATION, metavar="NAME")
    metric: str | None = opt(None, "default: top1 with class labels, mse with float targets, else cosine",
                             group=EVALUATION, choices=METRICS)
    # memory, not accuracy
    batch_size: int = opt(256, "largest held-out and calibration batch (cut to fit 256 MiB of activations)",
                          group=EVALUATION, low=1, metavar="N")
    error_samples: int = opt(256, "held-out samples for the per-layer output errors", group=ADVANCED, low=0,
                             metavar="N", commands=("compress", "sweep"))
    # edge inference usually serves one request at a time
    latency_batch: int = opt(1, "batch size of the timed runs", group=LATENCY, low=1, metavar="N")
    # one core: the common budget on a shared gateway, and the least noisy
    latency_threads: int = opt(1, "CPU threads", group=LATENCY, low=1, metavar="N")
    # allocations, caches
    latency_warmup: int = opt(5, "untimed runs first", group=ADVANCED, low=0, metavar="N",
                              commands=("compress", "sweep"))
    latency_repeats: int = opt(30, "timed runs per model (0: off)", group=LATENCY, low=0, metavar="N")
    # None: a latency budget's cost tables are measured on this CPU (and cached in the user's cache folder)
    latency_profile: str | None = opt(None, "with --budget latency=...: per-layer cost tables written by the "
                                      "profile command on the target CPU (default: measured here, cached)",
                                      group=LATENCY, metavar="FILE", commands=("compress", "sweep"))
    # refit layers in forward order to the original outputs; None: on for whitened (it won or tied
    # every row of reports/accuracy.md), off otherwise
    sequential: bool | None = opt(None, "refit layers in forward order to the original outputs (reduced-rank "
                                  "regression); on by default with whitened factors", group=CALIBRATION)
    # most passes a sequential refit makes (groups of consecutive layers, fitted in forward order);
    # one per layer is the exact layer-by-layer refit
    sequential_groups: int = opt(64, "most passes of a sequential refit: layers are refitted in N groups in "
                                 "forward order (one group per layer is exact layer by layer)", group=ADVANCED,
                                 low=1, metavar="N", commands=("compress", "sweep"))
    # how ranks are shared out (allocate.py): "output" measures each layer's effect on the model's
    # output on calibration data (effects.py); "energy-product" keeps the most of the product of the
    # layers' kept energy fractions (no layer is crushed to save a little elsewhere); "error-sum"
    # minimises the sum of the layers' own normalized errors. "auto" is "output" with calibration data
    # and a backend that can probe outputs, else "error-sum" (energy-product won on EfficientNet-Lite0
    # at 0.7 and lost on MiniLM at 0.9, 0.8 and 0.3: reports/accuracy_pretrained.md)
    allocation: str = opt("auto", "output: share ranks by each layer's measured effect on the model's output "
                          "(needs --calibration); energy-product: keep the most of the product of the layers' kept "
                          "energy; error-sum: least summed layer error; auto: output when it can, else error-sum",
                          group=FACTORS, choices=ALLOCATIONS)
    effect_samples: int = opt(32, "calibration samples the output-effect probes run on", group=ADVANCED, low=1,
                              metavar="N", commands=("compress", "sweep"))
    # weight each output row's error by the |gamma|/sqrt(var+eps) of an eval-mode BatchNorm that reads
    # the layer's output. Python API only: its one measurement is a loss (EfficientNet-Lite0 at
    # params=0.7, 50.2% -> 27.8% agreement, equal elsewhere; reports/accuracy_pretrained.md)
    bn_weights: bool = opt(False)
    # layers fed by an eval-mode BatchNorm use the input statistics it promises: without calibration,
    # each is truncated for its output error on them (the plan is unchanged); with calibration, its
    # measured moments are shrunk toward them instead of toward the identity. None: on where the
    # backend reads BatchNorm statistics (the chains are found by one forward pass, so it needs
    # --heldout or --calibration). Measured on EfficientNet-Lite0 (reports/accuracy_pretrained.md);
    # models without BatchNorm are unchanged
    bn_inputs: bool | None = opt(None, "layers fed by an eval-mode BatchNorm (and an elementwise activation, "
                                 "average pooling) use the input statistics it was trained to produce: without "
                                 "calibration, each is truncated for its output error on them; with calibration, "
                                 "its moments are shrunk toward them instead of the identity (default: on where "
                                 "the model has them; found by one forward pass on --heldout or --calibration)",
                                 group=CALIBRATION)
    # fine-tuning steps of the factors after factorization (needs calibration); 0: off
    recover: int = opt(0, "fine-tune only the factors for up to STEPS steps on the calibration inputs",
                       group=CALIBRATION, low=0, metavar="STEPS")
    # None: chosen by short trials on the validation slice (backends/torch_backend/recovery.py)
    recover_lr: float | None = opt(None, "recovery learning rate (default: the largest of 1e-3, 1e-4, 1e-5 and 1e-6 "
                                   "that stays stable over a 10-step trial)", group=CALIBRATION, low=0, high=1,
                                   open_low=True, open_high=True, metavar="LR")  # a zero rate learns nothing
    # the ridge floor on the calibration moments, relative to their mean diagonal: 1% (common
    # practice) kept sequential refits from zeroing directions 180 calibration images never visit
    # (measured: demo logit error at params=0.3 0.022 -> 0.004)
    ridge: float = opt(0.01, "least ridge added to the calibration moments, as a fraction of their mean diagonal",
                       group=CALIBRATION, low=0, high=1, open_high=True, metavar="A")
    # per layer, raise the ridge to the Ledoit-Wolf shrinkage of its calibration moments (stats.py):
    # large where a layer has few calibration rows per input feature (a classifier fed 256 pooled
    # vectors of 1280 features), negligible where it has many
    shrinkage: bool = opt(True, "raise each layer's ridge to the Ledoit-Wolf shrinkage of its calibration moments "
                          "(large when a layer has few calibration rows per input feature)", group=CALIBRATION)
    # with shrinkage, and as its floor: each layer's relative ridge is at least rows_ridge x its input
    # width / its calibration rows. Ledoit-Wolf assumes independent rows; calibration rows rarely
    # are (crops of a few photographs, positions of one image). 0.1 was chosen on EfficientNet-Lite0
    # (0.05/0.1/0.2/0.5 measured; reports/accuracy_pretrained.md), so it is a constant of the
    # estimator, not an option: Python API only (benchmarks set 0 to reproduce the older rows)
    rows_ridge: float = opt(0.1, low=0, high=10)
    # None: half the memory available when calibration starts (calibrate.STATS_SHARE)
    stats_memory: float | None = opt(None, "memory the calibration statistics may take, in GiB (default: half the "
                                     "available memory); wider layers keep their m x m output moment instead of "
                                     "the n x n input Gram, or plain factors", group=ADVANCED, low=0,
                                     open_low=True, metavar="GIB", commands=("compress", "sweep"))
    allow_overlap: bool = opt(False, "allow the same data for --calibration and --heldout", group=CALIBRATION)
    export_onnx: bool = opt(False, "also write model.onnx, checked against the original in onnxruntime",
                            group=EVALUATION, commands=("compress",))
    int8: bool = opt(False, "also quantize to int8 (onnxruntime dynamic) and compare original, factorized, int8-only "
                     "and factorized+int8 (size, metric, latency)", group=EVALUATION, commands=("compress",))
    quiet: bool = opt(False)  # no progress bars (the common -q flag)

    def __post_init__(self) -> None:
        self.only = tuple(self.only)
        self.skip = tuple(self.skip)
        self.validate()

    def validate(self) -> None:
        """Raise :class:`InputError` naming the field, the allowed values and the value given."""
        for f in dataclasses.fields(self):
            check_value(f, getattr(self, f.name))

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


def flag_of(f: dataclasses.Field) -> str:
    """The command-line name of a field: ``--rank-step`` for ``rank_step``."""
    return f.metadata.get("flag") or "--" + f.name.replace("_", "-")


def cli_fields(command: str) -> list[dataclasses.Field]:
    """The configuration fields ``command`` offers as options, in declaration order."""
    out = []
    for f in dataclasses.fields(CompressConfig):
        m = f.metadata
        if m.get("cli") and command in (m.get("commands") or GROUPS[m["group"]]):
            out.append(f)
    return out


def check_value(f: dataclasses.Field, value) -> None:
    """One field's value against its metadata and type (InputError naming the option)."""
    m, name = f.metadata, flag_of(f)
    if m.get("choices") is not None:
        if value is None and "None" in str(f.type):
            return
        if value not in m["choices"]:
            raise InputError(f"{name} must be one of {', '.join(m['choices'])}; got {value!r}")
        return
    kind = str(f.type)
    if value is None and "None" in kind:
        return
    if kind.startswith("int"):
        if not isinstance(value, int) or isinstance(value, bool) or (m["low"] is not None and value < m["low"]):
            raise InputError(f"{name} must be an integer in [{m['low']}, inf); got {value!r}")
    elif kind.startswith("float"):
        low, high = m["low"], m["high"]
        ok = isinstance(value, (int, float)) and not isinstance(value, bool) and value == value
        if ok and low is not None:
            ok = value > low if m["open_low"] else value >= low
        if ok and high is not None:
            ok = value < high if m["open_high"] else value <= high
        if not ok:
            left = "(" if m["open_low"] else "["
            right = "inf)" if high is None else f"{high}{')' if m['open_high'] else ']'}"
            raise InputError(f"{name} must be in {left}{low}, {right}; got {value!r}")
