"""One resolver, before any work: a configuration plus facts about the data and the backend become a
resolved run (method, refits, allocation, statistics) or one clear refusal.

Every cross-option rule is one row of :data:`RULES`: an id, the condition under which the run is
refused, and the message. ``tests/test_refusals.py`` has a case for every id (a meta-test fails
when a rule has none). What a backend can do is read from its declared ``CAPABILITIES``; no
format is named here.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

from .config import CompressConfig
from .errors import InputError


@dataclass(frozen=True)
class Facts:
    """What is known before any work: the data given, the backend's capabilities and the budgets."""

    capabilities: frozenset = frozenset()
    backend_name: str = "this"  # the backend's NAME, for messages only ("an ONNX model ...")
    heldout: bool = False
    calibration: bool = False
    out: bool | None = None  # None: not known here (prepare); the output rules wait for compress
    budget_kinds: tuple = ()  # the kinds of every budget the run will plan ("params", "error", ...)
    keep_within: bool = False
    selection: bool = False

    def can(self, capability: str) -> bool:
        return capability in self.capabilities


@dataclass(frozen=True)
class Resolved:
    """The run's choices after ``auto`` and ``None`` are decided."""

    method: str  # svd, whitened or columns
    sequential: bool  # sequential refits of whitened factors
    allocation: str  # output, energy-product or error-sum
    bn_inputs: bool  # use BatchNorm input statistics where a layer has them (decided per layer later)


def resolve_method(c: CompressConfig, f: Facts) -> str:
    """``auto`` becomes ``whitened`` with calibration data and ``svd`` without."""
    return ("whitened" if f.calibration else "svd") if c.method == "auto" else c.method


def _sequential(c: CompressConfig, f: Facts) -> bool:
    return (resolve_method(c, f) == "whitened") if c.sequential is None else bool(c.sequential)


def _allocation(c: CompressConfig, f: Facts) -> str:
    """``auto`` becomes ``output`` with calibration data on a backend that can probe outputs."""
    if c.allocation == "auto":
        return "output" if f.calibration and f.can("output_effects") else "error-sum"
    return c.allocation


def _bn_inputs(c: CompressConfig, f: Facts) -> bool:
    """``None`` is on where the backend reads BatchNorm statistics, except where a per-layer budget
    (error=, energy=) would be broken by plain factors weighted by them."""
    if c.bn_inputs is None:
        return f.can("bn_statistics") and not (resolve_method(c, f) != "whitened" and _per_layer(f))
    return bool(c.bn_inputs)


def _a(f: Facts) -> str:
    """'an ONNX' / 'a PyTorch': the article and the backend's name."""
    return ("an " if f.backend_name[:1].upper() in "AEIOU" else "a ") + f.backend_name


def _per_layer(f: Facts) -> bool:
    return any(k in ("energy", "error") for k in f.budget_kinds)


@dataclass(frozen=True)
class Rule:
    id: str
    refused: Callable[[CompressConfig, Facts], bool]
    message: Callable[[CompressConfig, Facts], str] | str


_NEEDS_CAL = "needs --calibration data"
RULES: tuple[Rule, ...] = (
    Rule("whitened-needs-calibration", lambda c, f: c.method == "whitened" and not f.calibration,
         f"--method whitened {_NEEDS_CAL} (the inputs whose outputs it preserves)"),
    Rule("sequential-needs-calibration", lambda c, f: c.sequential is True and not f.calibration,
         f"--sequential {_NEEDS_CAL}"),
    Rule("recover-needs-calibration", lambda c, f: c.recover > 0 and not f.calibration, f"--recover {_NEEDS_CAL}"),
    Rule("sequential-needs-whitened", lambda c, f: c.sequential is True and resolve_method(c, f) != "whitened",
         lambda c, f: f"--sequential refits whitened factors; it cannot be combined with --method {resolve_method(c, f)}"),
    Rule("recover-needs-capability", lambda c, f: c.recover > 0 and not f.can("recovery"),
         lambda c, f: f"--recover fine-tunes the factor pairs; {_a(f)} model has no trainable factors (compress the "
                      "PyTorch model it came from)"),
    Rule("bn-weights-needs-capability", lambda c, f: c.bn_weights and not f.can("bn_statistics"),
         lambda c, f: f"bn_weights reads BatchNorm modules, which {_a(f)} model does not expose"),
    Rule("bn-inputs-needs-capability", lambda c, f: c.bn_inputs is True and not f.can("bn_statistics"),
         lambda c, f: f"--bn-inputs reads BatchNorm modules, which {_a(f)} model does not expose"),
    Rule("bn-needs-data", lambda c, f: (c.bn_weights or c.bn_inputs is True) and not (f.heldout or f.calibration),
         lambda c, f: f"{'--bn-inputs' if c.bn_inputs else 'bn_weights'} needs --heldout or --calibration "
                      "(one forward pass finds the BatchNorms)"),
    Rule("bn-inputs-per-layer-budget",
         lambda c, f: c.bn_inputs is True and resolve_method(c, f) != "whitened" and _per_layer(f),
         "--bn-inputs: an error= or energy= budget bounds each layer's own weight error, which factors weighted by "
         "BatchNorm statistics do not keep; give --no-bn-inputs or a params= or flops= budget"),
    Rule("flops-needs-heldout", lambda c, f: "flops" in f.budget_kinds and not f.heldout,
         "a flops budget needs --heldout (to measure layer output sizes)"),
    Rule("latency-needs-heldout", lambda c, f: "latency" in f.budget_kinds and not f.heldout,
         "a latency budget needs --heldout (a batch of it is what the models and layers are timed on)"),
    Rule("latency-needs-timing", lambda c, f: "latency" in f.budget_kinds and c.latency_repeats == 0,
         "a latency budget is checked by timing the result: --latency-repeats 0 turns timing off"),
    Rule("profile-needs-latency-budget", lambda c, f: c.latency_profile is not None and "latency" not in f.budget_kinds,
         "--latency-profile holds the cost tables of a latency budget; give --budget latency=F (or latency=12ms)"),
    Rule("output-allocation-needs-calibration", lambda c, f: c.allocation == "output" and not f.calibration,
         f"--allocation output {_NEEDS_CAL} (the inputs its probes run on)"),
    Rule("output-allocation-needs-capability", lambda c, f: c.allocation == "output" and not f.can("output_effects"),
         lambda c, f: f"--allocation output: {_a(f)} model cannot be probed at its output; use --allocation "
                      "energy-product or error-sum"),
    Rule("export-needs-capability", lambda c, f: c.export_onnx and not f.can("export_onnx"),
         lambda c, f: f"--export-onnx writes an ONNX copy of a PyTorch model; {_a(f)} model cannot be exported "
                      "(an ONNX model is ONNX already)"),
    Rule("export-needs-heldout", lambda c, f: c.export_onnx and not f.heldout,
         "--export-onnx needs --heldout (an example input to export with and check on)"),
    Rule("export-needs-out", lambda c, f: c.export_onnx and f.out is False,
         "--export-onnx needs --out (the folder model.onnx is written to)"),
    Rule("int8-needs-heldout", lambda c, f: c.int8 and not f.heldout, "--int8 needs --heldout (to compare the variants)"),
    Rule("int8-needs-out", lambda c, f: c.int8 and f.out is False,
         "--int8 needs --out (the folder model.int8.onnx is written to)"),
    Rule("int8-needs-onnx", lambda c, f: c.int8 and not f.can("int8") and not c.export_onnx,
         "--int8 quantizes ONNX models: give an ONNX model, or add --export-onnx"),
    Rule("keep-within-needs-heldout", lambda c, f: f.keep_within and not f.heldout,
         "--keep-within needs --heldout (the drop is measured on it)"),
    Rule("selection-needs-keep-within", lambda c, f: f.selection and not f.keep_within,
         "--selection is the data --keep-within chooses the budget on; give --keep-within too"),
)


def check(config: CompressConfig, facts: Facts) -> None:
    """Raise the first rule's refusal that applies (rules are in the order a user meets them)."""
    for rule in RULES:
        if rule.refused(config, facts):
            raise InputError(rule.message(config, facts) if callable(rule.message) else rule.message)


def resolve(config: CompressConfig, facts: Facts) -> Resolved:
    """The resolved run, or the one refusal that applies (:class:`InputError`)."""
    check(config, facts)
    return Resolved(method=resolve_method(config, facts), sequential=_sequential(config, facts),
                    allocation=_allocation(config, facts), bn_inputs=_bn_inputs(config, facts))


def facts_for(backend, config: CompressConfig, *, heldout=None, calibration=None, out=..., budgets=None,
              keep_within=None, selection=None) -> Facts:
    """The facts of a run from what the caller was given (no data is read); ``out`` left out means
    the output folder is not known at this stage."""
    from .budget import parse_budget

    kinds = tuple(parse_budget(b).kind for b in (budgets or [config.budget]))
    return Facts(capabilities=frozenset(getattr(backend, "CAPABILITIES", ())),
                 backend_name=getattr(backend, "NAME", "this"), heldout=heldout is not None,
                 calibration=calibration is not None, out=None if out is ... else out is not None,
                 budget_kinds=kinds,
                 keep_within=keep_within is not None, selection=selection is not None)
