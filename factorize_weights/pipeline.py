"""The orchestrator: the only place where discovery, spectra, allocation, rewrite, evaluation and
reporting meet. The CLI and the Python API both call these functions.

    discover -> spectra -> allocate -> factorize/rewrite -> evaluate -> report -> save
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import latency as latency_mod
from . import effects as effects_mod
from . import methods
from . import report as report_mod
from .allocate import Plan, allocate, check_feasible
from .backends import backend_for, backend_of
from .budget import parse_budget
from .calibrate import calibrate, recover, sequential_refit
from .config import CompressConfig
from .data import HeldOut
from .errors import InputError
from .metrics import MetricAccumulator, MetricResult, check_metric, default_metric
from .progress import bar
from .records import LayerRecord
from .spectra import Spectrum, checked_matrix, compute_spectrum
from .stats import Prior, relative_error, weight_error


#: Memory for one batch's activations: evaluation and calibration batches are cut to fit it
#: (measured per sample on the first input), so 224x224 images at batch 256 do not take gigabytes.
ACTIVATION_BYTES = 256 * 2**20


@dataclass
class CompressResult:
    """What :func:`compress` returns.

    Attributes
    ----------
    model : the factorized copy (the original is untouched)
    plan : Plan
    records : list of LayerRecord (all, skipped included)
    spectra : dict of layer name to Spectrum
    metric : MetricResult or None
    report : dict
        The content of ``report.json``.
    """

    model: object
    plan: Plan
    records: list[LayerRecord]
    spectra: dict[str, Spectrum]
    metric: MetricResult | None
    report: dict
    layer_errors: dict[str, float] = field(default_factory=dict)


def selected(records: list[LayerRecord]) -> list[LayerRecord]:
    return [r for r in records if r.skip_reason is None]


def _weight(record: LayerRecord) -> np.ndarray:
    return backend_of(record).weight_matrix(record)


def decompose(records: list[LayerRecord], method, config: CompressConfig, calibration=None,
              bn_inputs: bool = False) -> dict:
    """One decomposition per selected layer (``{name: Decomposition}``); with calibration, each
    layer's Gram matrix is released as soon as that layer is done. With ``bn_inputs``, a layer fed
    by an eval-mode BatchNorm uses the input statistics that BatchNorm promises: with calibration,
    as the target its measured moments are shrunk toward (instead of the identity); without (plain
    SVD), it is truncated for its output error on them, at the ranks its weights' own spectrum
    plans."""
    out = {}
    for record in bar(selected(records), config, f"{method.name} decomposition"):
        prior = Prior.from_stats(record.input_stats()) if bn_inputs and record.input_stats is not None else None
        moments = calibration.release(record.name, shrink=config.shrinkage, prior=prior) if calibration is not None else None
        try:
            scale = record.row_scale if config.bn_weights else None
            out[record.name] = methods.row_weighted(
                method, record.name, _weight(record), scale, dtype=record.dtype, moments=moments,
                scaled_by=record.scaled_by, ridge_value=calibration.ridge_for(record.name) if calibration else None,
                prior=prior)
            if prior is not None and moments is None and isinstance(method, methods.PlainSvd):  # no data
                weighted = methods.row_weighted(
                    methods.Whitened(config.ridge), record.name, _weight(record), scale, dtype=record.dtype,
                    moments=prior.matrix(), scaled_by=record.scaled_by)
                out[record.name] = methods.with_plan_spectrum(weighted, out[record.name])
        except ValueError as exc:  # NaN/Inf in a weight is the user's model, not our bug
            raise InputError(str(exc)) from exc
    return out


def compute_spectra(records: list[LayerRecord], config: CompressConfig | None = None) -> dict[str, Spectrum]:
    """Spectrum (singular values only) of every selected layer's weights, as ``config.svd`` says."""
    config = config or CompressConfig()
    out = {}
    for record in bar(selected(records), config, "spectra"):
        try:
            out[record.name] = compute_spectrum(record.name, _weight(record), svd=config.svd, seed=config.seed,
                                                oversampling=config.oversampling,
                                                power_iterations=config.power_iterations)
        except ValueError as exc:
            raise InputError(str(exc)) from exc
    return out


class PlannedFactors(Mapping):
    """``{name: (A, X)}`` for every layer a plan ranks, made on access from the decompositions (so
    a rewrite holds one layer's factors at a time). Each access records the measured relative
    weight error ``||W - A X||_F / ||W||_F`` in :attr:`weight_errors`."""

    def __init__(self, records: list[LayerRecord], ranks: dict, decompositions: dict, split: str):
        self._records = {r.name: r for r in records}
        self._ranks = {n: k for n, k in ranks.items() if k is not None}
        self._decompositions, self._split = decompositions, split
        self.weight_errors: dict[str, float] = {}

    def __getitem__(self, name):
        a, x = self._decompositions[name].factors(self._ranks[name], self._split)
        self.weight_errors[name] = weight_error(_weight(self._records[name]), a, x)
        return a, x

    def __iter__(self):
        return iter(self._ranks)

    def __len__(self):
        return len(self._ranks)


def compute_factors(records: list[LayerRecord], plan: Plan, config: CompressConfig | None = None) -> dict:
    """``{name: (A, X)}`` (float64) for every layer the plan ranks, from plain SVD factors."""
    config = config or CompressConfig()
    chosen = [r for r in selected(records) if plan.ranks.get(r.name) is not None]
    decs = decompose(chosen, methods.make("svd", config), config)
    return dict(PlannedFactors(chosen, plan.ranks, decs, config.split))


def factorize(model, records: list[LayerRecord], plan: Plan, config: CompressConfig | None = None):
    """The rewritten copy of ``model`` with every layer the plan ranks split into two factors."""
    return backend_for(model).rewrite(model, records, compute_factors(records, plan, config))


def check_fits(model, data: HeldOut, flag: str = "--heldout", output: str | None = None) -> np.ndarray:
    """Run the first batch of ``data`` through ``model``; refuse data that does not fit it."""
    first, _ = next(data.batches(batch_size=min(len(data), 8)))
    try:
        outputs = backend_for(model).predict(model, first, source=f"{flag} {data.source}", output=output)
    except InputError:
        raise
    except Exception as exc:
        message = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InputError(
            f"{flag} {data.source}: inputs of shape {data.sample_shape} per sample "
            f"do not fit the model ({type(exc).__name__}: {message[:300]})"
        ) from exc
    if not np.all(np.isfinite(outputs)):
        raise InputError(f"{flag} {data.source}: the original model gives NaN or Inf outputs")
    return outputs


def check_heldout(model, heldout: HeldOut, metric: str | None, output: str | None = None) -> str:
    """Run the first held-out batch through ``model``; return the metric to use."""
    outputs = check_fits(model, heldout, "--heldout", output)
    name = metric or default_metric(heldout.labels, outputs)
    check_metric(name, heldout.labels, outputs)
    return name


def evaluate(original, factorized, heldout: HeldOut, metric: str | None = None, config: CompressConfig | None = None) -> MetricResult:
    """The held-out metric of ``original`` (before) and ``factorized`` (after)."""
    config = config or CompressConfig()
    name = check_heldout(original, heldout, metric, config.output)
    backend = backend_for(original)
    size = batch_size_for(config, backend.measure_positions(original, backend.discover(original), heldout.inputs))
    triples = ((x, backend.predict(original, x, output=config.output), y) for x, y in heldout.batches(size))
    return _score(name, factorized, triples, -(-len(heldout) // size), config)


def batch_size_for(config: CompressConfig, per_sample_bytes: int) -> int:
    """``config.batch_size``, cut so that one batch's activations fit :data:`ACTIVATION_BYTES`."""
    return max(1, min(config.batch_size, ACTIVATION_BYTES // max(int(per_sample_bytes), 1)))


def _score(metric: str, factorized, triples, total: int, config: CompressConfig) -> MetricResult:
    """Stream ``(inputs, original outputs, labels)`` batches into the metric of ``factorized``."""
    acc = MetricAccumulator(metric)
    predict = backend_for(factorized).predict
    for inputs, reference, labels in bar(triples, config, "evaluate", total, "batch"):
        acc.update(reference, predict(factorized, inputs, output=config.output), labels)
    return acc.result()


@dataclass
class Prepared:
    """Everything about a run that does not depend on the budget: layers, one decomposition per
    layer, calibration statistics and the original model's held-out outputs. Sweeps and budget
    searches reuse it."""

    model: object
    config: CompressConfig
    records: list[LayerRecord]
    decompositions: dict
    method: str
    sequential: bool
    heldout: HeldOut | None = None
    calibration: object = None  # calibrate.Calibration
    metric_name: str | None = None
    reference: list = field(default_factory=list)  # [(original outputs, labels)] per held-out batch
    timings: dict = field(default_factory=dict)
    batch_size: int = 256
    order: list = field(default_factory=list)  # selected layer names in forward order, in stages
    effects: dict = field(default_factory=dict)  # {name: effects.Effect} when allocating by output effect
    allocation: str = "error-sum"  # the resolved config.allocation
    bn_inputs: bool = False  # the resolved config.bn_inputs: BatchNorm input statistics weight plain factors

    @property
    def backend(self):
        return backend_for(self.model)

    @property
    def selected(self) -> list[LayerRecord]:
        return selected(self.records)

    @property
    def spectra(self) -> dict[str, Spectrum]:
        return {name: d.spectrum for name, d in self.decompositions.items()}


def prepare(model, config: CompressConfig, heldout: HeldOut | None = None, calibration: HeldOut | None = None,
            *, budgets: list[str] | None = None, model_source: str | None = None) -> Prepared:
    """Validate, discover, calibrate (one pass) and decompose every selected layer once. Every
    budget in ``budgets`` (default: ``config.budget``) is parsed and checked for feasibility
    before the first SVD."""
    timings = {"prepare": 0.0}  # the whole preparation; calibrate and decompose are parts of it
    t0 = time.perf_counter()
    backend = backend_for(model)
    model = backend.normalize(model)  # e.g. attention modules whose projections no Linear computes
    method = config.resolved_method(calibration is not None)
    parsed = [parse_budget(b) for b in (budgets or [config.budget])]
    if method == "whitened" and calibration is None:
        raise InputError("--method whitened needs --calibration data (the inputs whose outputs it preserves)")
    if (config.sequential or config.recover) and calibration is None:  # asked for explicitly
        raise InputError(f"{'--sequential' if config.sequential else '--recover'} needs --calibration data")
    if config.sequential and method != "whitened":
        raise InputError(f"--sequential refits whitened factors; it cannot be combined with --method {method}")
    if config.recover and backend.FORMAT != "torch":
        raise InputError("--recover fine-tunes PyTorch factor pairs; an ONNX model has no trainable factors")
    for flag, on in (("--bn-weights", config.bn_weights), ("--bn-inputs", config.bn_inputs is True)):
        if on and backend.FORMAT != "torch":
            raise InputError(f"{flag} reads PyTorch BatchNorm modules; an ONNX model has none to read")
        if on and heldout is None and calibration is None:
            raise InputError(f"{flag} needs --heldout or --calibration (one forward pass finds the BatchNorms)")
    _check_overlap(heldout, calibration, config.allow_overlap)
    records = backend.discover(model, only=config.only, skip=config.skip)
    chosen = selected(records)
    checkable = heldout is not None or calibration is not None  # overridden forward()s are checked on data
    if not chosen and not (checkable and any(r.options.get("check_forward") for r in records)):
        found = f"{len(records)} layer(s) found, all skipped" if records else "no linear or convolution layers found"
        where = f"{model_source}: " if model_source else ""
        raise InputError(f"{where}nothing to factorize: {found}")
    _check_weights(backend, chosen)  # the weights before any data: a NaN weight is named as such, not as bad data
    metric_name = check_heldout(model, heldout, config.metric, config.output) if heldout is not None else None
    if any(b.kind == "flops" for b in parsed) and heldout is None:
        raise InputError("a flops budget needs --heldout (to measure layer output sizes)")
    if calibration is not None:  # before anything runs on it
        check_fits(model, calibration, "--calibration", config.output)
    size = config.batch_size
    sample = heldout if heldout is not None else calibration
    if sample is not None:  # one sample tells each layer's output positions (FLOPs) and memory
        size = batch_size_for(config, backend.measure_positions(model, records, sample.inputs))
        before = {r.name for r in chosen}
        _check_weights(backend, [r for r in selected(records) if r.name not in before])  # forward()s that matched
        chosen = selected(records)
        if not chosen:
            where = f"{model_source}: " if model_source else ""
            raise InputError(f"{where}nothing to factorize: {len(records)} layer(s) found, all skipped")
    for budget in parsed:
        check_feasible(chosen, budget, rank_step=config.rank_step, min_rank=config.min_rank)
    sequential = config.resolved_sequential(method)
    cal, order = None, [[r.name] for r in chosen]
    if calibration is not None:
        if sequential:
            order = backend.call_stages(model, chosen, calibration.inputs)
        t1 = time.perf_counter()
        cal = calibrate(model, records, calibration, config, size, moments=method == "whitened")
        timings["calibrate"] = time.perf_counter() - t1
    t1 = time.perf_counter()
    bn_inputs = config.resolved_bn_inputs(backend.FORMAT)
    if bn_inputs and method != "whitened" and any(not b.is_global for b in parsed):
        # plain factors weighted by BatchNorm statistics have more weight error than the spectrum
        # that plans them promises: an error= or energy= budget would be broken silently
        if config.bn_inputs:
            raise InputError("--bn-inputs: an error= or energy= budget bounds each layer's own weight error, which "
                             "factors weighted by BatchNorm statistics do not keep; give --no-bn-inputs or a params= "
                             "or flops= budget")
        bn_inputs = False
    bn_inputs = bn_inputs and method != "columns" and any(r.input_stats is not None for r in chosen)
    decompositions = decompose(records, methods.make(method, config), config,
                               cal if method == "whitened" else None, bn_inputs=bn_inputs)
    timings["decompose"] = time.perf_counter() - t1
    effects = {}
    allocation = config.resolved_allocation(calibration is not None, backend.FORMAT)
    if allocation == "output":
        if calibration is None:
            raise InputError("--allocation output needs --calibration data (the inputs its probes run on)")
        if backend.FORMAT != "torch":
            raise InputError("--allocation output probes PyTorch models only; use --allocation energy-product or error-sum for ONNX")
        t1 = time.perf_counter()
        effects = measure_effects(model, chosen, decompositions, calibration, config, size)
        timings["effects"] = time.perf_counter() - t1
    reference = []
    if heldout is not None:
        for inputs, labels in heldout.batches(size):
            reference.append((backend.predict(model, inputs, output=config.output), labels))
    timings["prepare"] = time.perf_counter() - t0
    return Prepared(model, config, records, decompositions, method, sequential, heldout, cal, metric_name,
                    reference, timings, size, order, effects, allocation, bn_inputs)


def measure_effects(model, chosen: list[LayerRecord], decompositions: dict, calibration: HeldOut,
                    config: CompressConfig, batch_size: int) -> dict:
    """Each layer's measured effect on the output at a few ranks (effects.py): len(LEVELS) passes
    per layer over the first ``config.effect_samples`` calibration samples."""
    backend = backend_for(model)
    batches = [x for x, _ in calibration.batches(min(batch_size, config.effect_samples), limit=config.effect_samples)]
    probes = []
    for record in chosen:
        dec = decompositions[record.name]
        for rank in effects_mod.probe_ranks(dec.spectrum, *record.matrix_shape):
            probes.append((record.name, rank, float(1.0 - dec.spectrum.energy_fraction(rank))))
    trials = ((name, *decompositions[name].factors(rank, config.split)) for name, rank, _ in probes)
    by_name = {r.name: r for r in chosen}
    out = {r.name: effects_mod.Effect(r.name, [], [], []) for r in chosen}
    measured = backend.replacement_errors(model, by_name, trials, batches, config.output)
    for (name, rank, own), (err, energy) in zip(probes, bar(measured, config, "output effects", total=len(probes))):
        out[name].ranks.append(rank)
        out[name].errors.append(err / energy if energy > 0 else 0.0)
        out[name].own.append(own)
    return out


def _check_weights(backend, records: list[LayerRecord]) -> None:
    for record in records:
        try:
            checked_matrix(record.name, backend.weight_matrix(record))
        except ValueError as exc:
            raise InputError(str(exc)) from exc


def plan_budget(prep: Prepared, budget: str) -> Plan:
    chosen = prep.selected
    return allocate(chosen, [prep.decompositions[r.name].spectrum for r in chosen], parse_budget(budget),
                    rank_step=prep.config.rank_step, min_rank=prep.config.min_rank,
                    effects=[prep.effects.get(r.name) for r in chosen] if prep.effects else None,
                    objective=prep.allocation)


def plan_for(model, config: CompressConfig, heldout: HeldOut | None = None, calibration: HeldOut | None = None):
    """discover -> (calibrate) -> decompose -> allocate: (records, spectra, plan, calibration)."""
    prep = prepare(model, config, heldout, calibration)
    return prep.records, prep.spectra, plan_budget(prep, config.budget), prep.calibration


def _check_overlap(heldout: HeldOut | None, calibration: HeldOut | None, allow: bool,
                   flag: str = "--calibration") -> None:
    if heldout is None or calibration is None or allow:
        return
    same = heldout.source == calibration.source or (heldout.sha256 is not None and heldout.sha256 == calibration.sha256)
    if not same and isinstance(heldout.inputs, np.ndarray) and isinstance(calibration.inputs, np.ndarray):
        same = heldout.inputs.shape == calibration.inputs.shape and np.array_equal(heldout.inputs, calibration.inputs)
    if same:
        raise InputError(
            f"{flag} {calibration.source} is the same data as --heldout {heldout.source}: the accuracy "
            "would be measured on what was used to fit or choose" + (" (give --allow-overlap to do it anyway)"
                                                                     if flag == "--calibration" else "")
        )


def _evaluate_prepared(prep: Prepared, factorized) -> MetricResult:
    """The held-out metric against the original's outputs cached by :func:`prepare`."""
    batches = prep.heldout.batches(prep.batch_size)
    triples = ((x, ref, y) for (x, _), (ref, y) in zip(batches, prep.reference))
    return _score(prep.metric_name, factorized, triples, len(prep.reference), prep.config)


def layer_output_errors(prep: Prepared, factorized, names: list[str]) -> dict[str, float]:
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


def realize(prep: Prepared, budget: str, *, sources: dict | None = None, latency: bool = True,
            layer_errors: bool = True) -> CompressResult:
    """Allocate ``budget`` on the prepared decompositions, factorize (refit), (recover), evaluate
    and report."""
    config, model, backend = prep.config, prep.model, prep.backend
    timings = dict(prep.timings)
    t0 = time.perf_counter()
    plan = plan_budget(prep, budget)
    timings["plan"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    factors = PlannedFactors(prep.records, plan.ranks, prep.decompositions, config.split)
    fits, measured = {}, factors.weight_errors
    if prep.sequential and len(factors):
        factorized, fits, measured = sequential_refit(model, prep.records, plan.ranks, prep.calibration, config,
                                                      prep.order)
    else:
        factorized = backend.rewrite(model, prep.records, factors)
    recovery = None
    if config.recover:
        recovery = recover(model, factorized, prep.records, prep.calibration, config, prep.metric_name)
        by_name = {r.name: r for r in prep.records}
        measured = {n: weight_error(_weight(by_name[n]), *af)
                    for n, af in backend.read_factors(factorized, list(factors)).items()}
    backend.check(factorized)  # a failure here is our bug (the ONNX checker, full check)
    timings["rewrite"] = time.perf_counter() - t0
    metric, errors, lat = None, {}, None
    heldout = prep.heldout
    if heldout is not None:
        t0 = time.perf_counter()
        metric = _evaluate_prepared(prep, factorized)
        names = [n for n, k in plan.ranks.items() if k is not None]
        if layer_errors and config.error_samples > 0 and names:
            errors = layer_output_errors(prep, factorized, names)
        timings["evaluate"] = time.perf_counter() - t0
        if latency and config.latency_repeats > 0:
            t0 = time.perf_counter()
            lat = measure_latency(model, factorized, heldout, config)
            timings["latency"] = time.perf_counter() - t0
    cfg = dataclasses.replace(config, budget=budget) if budget != config.budget else config
    report = report_mod.build_report(
        config=cfg, plan=plan, records=prep.records, spectra=prep.spectra, metric=metric,
        layer_errors=errors, weight_errors=measured, heldout=heldout, sources=sources or {},
        model_params=(backend.count_params(model), backend.count_params(factorized)),
        timings=timings, latency=lat, error_samples=min(config.error_samples, len(heldout)) if heldout is not None else 0,
        method=prep.method, calibration=prep.calibration, fits=fits, recovery=recovery, sequential=prep.sequential,
        decompositions=prep.decompositions, effects=prep.effects, allocation=prep.allocation,
        bn_inputs=prep.bn_inputs,
    )
    return CompressResult(factorized, plan, prep.records, prep.spectra, metric, report, errors)


def input_paths(sources: dict | None, *data) -> tuple:
    """Files a run reads (model, weights, run file, data): an output folder must not hold them."""
    sources = sources or {}
    paths = [sources.get("model"), sources.get("weights"), (sources.get("config_file") or {}).get("path")]
    if paths[0] and ":" in str(paths[0]) and not str(paths[0]).lower().endswith(".onnx"):
        paths[0] = str(paths[0]).rpartition(":")[0]
    paths += [d.source for d in data if d is not None]
    return tuple(p for p in paths if p and Path(str(p)).exists())


def check_outputs_requested(model, config: CompressConfig, heldout, out) -> None:
    """Refuse export/int8 requests that cannot be honoured, before any work."""
    backend = backend_for(model)
    if config.export_onnx:
        if backend.FORMAT != "torch":
            raise InputError("--export-onnx is for PyTorch models; this model is ONNX already")
        if heldout is None:
            raise InputError("--export-onnx needs --heldout (an example input to export with and check on)")
        if out is None:
            raise InputError("--export-onnx needs --out (the folder model.onnx is written to)")
    if config.int8:
        if heldout is None:
            raise InputError("--int8 needs --heldout (to compare the variants)")
        if out is None:
            raise InputError("--int8 needs --out (the folder model.int8.onnx is written to)")
        if backend.FORMAT == "torch" and not config.export_onnx:
            raise InputError("--int8 quantizes ONNX models: give an ONNX model, or add --export-onnx")


def save_result(result: CompressResult, prep: Prepared, out, force: bool) -> None:
    """Export/int8 extras (when asked) and the output folder, atomically."""
    from . import store

    import tempfile

    config, report, extra = prep.config, result.report, {}
    with tempfile.TemporaryDirectory(prefix="factorize-weights-") as work:
        work = Path(work)
        if config.export_onnx:
            extra["model.onnx"], report["export"] = export_checked(result.model, prep.heldout, work)
        if config.int8:
            t0 = time.perf_counter()
            extra["model.int8.onnx"], report["int8"] = int8_comparison(
                prep.model, result.model, prep.heldout, prep.metric_name, config, extra.get("model.onnx"), work)
            report["wall_seconds"]["int8"] = round(time.perf_counter() - t0, 3)
        if out is not None:
            sources = report.get("sources") or {}
            if sources.get("layout") == "model-folder":  # config, tokenizer...: the folder stays a model folder
                extra.update(store.folder_companions(Path(sources["model"]), work, taken=set(extra)))
            store.write_run(out, result.model, result.records, result.plan, report, config, force=force,
                            extra=extra, spectra=result.spectra)


def compress(
    model,
    config: CompressConfig | None = None,
    *,
    heldout: HeldOut | None = None,
    out: str | Path | None = None,
    force: bool = False,
    sources: dict | None = None,
    calibration: HeldOut | None = None,
    keep_within: float | None = None,
    selection: HeldOut | None = None,
) -> CompressResult:
    """Plan, rewrite, evaluate, report and (with ``out``) save, in one call. The CLI's
    ``compress`` calls exactly this.

    Parameters
    ----------
    model : torch.nn.Module or OnnxModel
        Not modified; the result holds a factorized copy.
    config : CompressConfig
    heldout : HeldOut, optional
        Enables the before/after metric, per-layer output errors and latency.
    out : path, optional
        Folder to write the model, ``plan.json``, ``report.json``, ``report.md`` and
        ``report.html`` into, atomically. A non-empty folder is refused unless ``force``.
    sources : dict, optional
        Provenance recorded in the report (model spec, weights path and hash).
    calibration : HeldOut, optional
        Inputs for calibrated (whitened) factors, sequential refits and recovery; must not be
        the held-out set unless ``config.allow_overlap``.
    keep_within : float, optional
        Instead of ``config.budget``: the smallest params fraction whose held-out drop is at most
        this (in the metric's units), found by bisection on one preparation; the report's
        ``search`` entry lists every budget tried. Needs ``heldout``.
    selection : HeldOut, optional
        With ``keep_within``: the data the budget is chosen on (a third split, refused if it is the
        held-out set), so the held-out figure stays an honest estimate. Without it the held-out set
        chooses, and the report says so.
    """
    from . import store

    config = config or CompressConfig()
    t_start = time.perf_counter()
    if out is not None:
        store.check_out_dir(out, force, input_paths(sources, heldout, calibration))
    check_outputs_requested(model, config, heldout, out)
    source = (sources or {}).get("model")
    if keep_within is None:
        prep = prepare(model, config, heldout, calibration, model_source=source)
        result = realize(prep, config.budget, sources=sources)
    else:
        from .sweep import search_budget  # sweep builds on this module

        if heldout is None:
            raise InputError("--keep-within needs --heldout (the drop is measured on it)")
        if selection is not None:
            _check_overlap(heldout, selection, False, "--selection")
            _check_overlap(selection, calibration, config.allow_overlap)
        prep = prepare(model, config, selection or heldout, calibration, budgets=["params=1"], model_source=source)
        t_search = time.perf_counter()
        budget, search, _ = search_budget(prep, keep_within)
        prep.timings["search"] = time.perf_counter() - t_search
        search["selection"] = None if selection is None else {
            "source": selection.source, "sha256": selection.sha256, "samples": len(selection)}
        if selection is not None:  # the result is measured on the held-out set, which played no part
            prep.heldout, prep.metric_name = heldout, check_heldout(model, heldout, config.metric, config.output)
            prep.reference = [(prep.backend.predict(model, x, output=config.output), y)
                              for x, y in heldout.batches(prep.batch_size)]
        prep.config = config = dataclasses.replace(config, budget=budget)
        result = realize(prep, budget, sources=sources)
        result.report["search"] = search
    # the whole run up to here (preparation, any search, the final budget); writing is timed apart
    result.report["wall_seconds"]["total"] = round(time.perf_counter() - t_start, 3)
    save_result(result, prep, out, force)
    return result


def inspect_model(model, config: CompressConfig | None = None) -> dict:
    """Spectra and break-even ranks of every layer, no rewrite (the ``inspect`` command)."""
    config = config or CompressConfig()
    backend = backend_for(model)
    model = backend.normalize(model)
    records = backend.discover(model, only=config.only, skip=config.skip)
    spectra = compute_spectra(records, config)
    return report_mod.inspect_report(records, spectra, backend.count_params(model))


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


def export_checked(model, heldout: HeldOut, work: Path):
    """Export a factorized PyTorch model to ONNX and check it against torch in onnxruntime on the
    first held-out batch; returns (path of the file written in ``work``, report entry)."""
    from .backends import onnx_backend, torch_backend

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
    from .backends import onnx_backend, torch_backend

    if not isinstance(original, onnx_backend.OnnxModel):  # a PyTorch run with --export-onnx
        inputs, _ = next(heldout.batches(8))
        torch_backend.export_onnx(original, inputs, work / "original.onnx")
        original, factorized = onnx_backend.load(work / "original.onnx"), onnx_backend.load(exported_path)
    variants = {"original": original, "factorized": factorized,
                "int8": onnx_backend.quantize_int8(original), "factorized+int8": onnx_backend.quantize_int8(factorized)}
    accs = {name: MetricAccumulator(metric) for name in variants}
    for inputs, labels in heldout.batches(config.batch_size):
        reference = onnx_backend.predict(original, inputs)
        for name, model in variants.items():
            accs[name].update(reference, onnx_backend.predict(model, inputs), labels)
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
