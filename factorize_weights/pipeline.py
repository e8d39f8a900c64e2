"""The orchestrator: the only place where discovery, spectra, allocation, rewrite, evaluation and
reporting meet. The CLI and the Python API both call these functions.

    discover -> spectra -> allocate -> factorize/rewrite -> evaluate -> report -> save
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from . import effects as effects_mod
from . import latency_budget, methods
from . import report as report_mod
from .allocate import Plan, allocate, check_feasible
from .backends import backend_for, backend_of
from .budget import parse_budget
from .calibrate import calibrate, recover, sequential_refit
from .config import CompressConfig
from .data import HeldOut
from .errors import InputError
from .evaluation import (batch_size_for, check_fits, check_heldout, check_overlap, evaluate_prepared, reference_outputs,
                         layer_output_errors, measure_latency)
from .metrics import MetricResult
from .progress import bar
from .records import LayerRecord
from .resolve import Facts, facts_for, resolve
from .spectra import Spectrum, checked_matrix, compute_spectrum
from .stats import OutputMoments, Prior, weight_error


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
    plain = methods.make("svd", config)
    for record in bar(selected(records), config, f"{method.name} decomposition"):
        prior = Prior.from_stats(record.input_stats()) if bn_inputs and record.input_stats is not None else None
        layer_method, moments = method, None
        if calibration is not None and calibration.uncalibrated(record.name):
            layer_method = plain  # too wide for any statistic within the memory budget (a warning says so)
        elif calibration is not None:
            moments = calibration.release(record.name, shrink=config.shrinkage, prior=prior)
        try:
            # output-side statistics hold W's own products: a row weighting could not be applied to them
            scale = record.row_scale if config.bn_weights and not isinstance(moments, OutputMoments) else None
            out[record.name] = methods.row_weighted(
                layer_method, record.name, _weight(record), scale, dtype=record.dtype, moments=moments,
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
    """``{name: (A, X)}`` (float64) for every layer the plan ranks, by the configuration's method
    (``auto`` is plain SVD here: this staged step has no calibration data; whitened factors come
    from :func:`prepare` and :func:`realize` with ``calibration``)."""
    config = config or CompressConfig()
    chosen = [r for r in selected(records) if plan.ranks.get(r.name) is not None]
    method = resolve(config, Facts()).method  # refuses method="whitened" without calibration data
    decs = decompose(chosen, methods.make(method, config), config)
    return dict(PlannedFactors(chosen, plan.ranks, decs, config.split))


def factorize(model, records: list[LayerRecord], plan: Plan, config: CompressConfig | None = None):
    """The rewritten copy of ``model`` with every layer the plan ranks split into two factors."""
    return backend_for(model).rewrite(model, records, compute_factors(records, plan, config))


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
    latency: object = None  # costs.LatencyProfile when a budget is a latency
    allocation_note: str | None = None  # why ``auto`` did not probe outputs, when it did not

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
    parsed = [parse_budget(b) for b in (budgets or [config.budget])]
    run = resolve(config, facts_for(backend, config, heldout=heldout, calibration=calibration, budgets=budgets))
    method = run.method
    check_overlap(heldout, calibration, config.allow_overlap)
    records = backend.discover(model, only=config.only, skip=config.skip)
    chosen = selected(records)
    checkable = heldout is not None or calibration is not None  # overridden forward()s are checked on data
    if not chosen and not (checkable and any(r.options.get("check_forward") for r in records)):
        found = _all_skipped(records) if records else "no linear or convolution layers found"
        where = f"{model_source}: " if model_source else ""
        raise InputError(f"{where}nothing to factorize: {found}")
    _check_weights(backend, chosen)  # the weights before any data: a NaN weight is named as such, not as bad data
    metric_name = check_heldout(model, heldout, config.metric, config.output) if heldout is not None else None
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
            raise InputError(f"{where}nothing to factorize: {_all_skipped(records)}")
    for budget in parsed:
        check_feasible(chosen, budget, rank_step=config.rank_step, min_rank=config.min_rank)
    profile = None
    if any(b.kind == "latency" for b in parsed):  # measured (or read) before any SVD, and checked
        t1 = time.perf_counter()
        profile = latency_budget.costs_for(model, chosen, heldout, config)
        timings["latency_tables"] = time.perf_counter() - t1
        for budget in parsed:
            check_feasible(chosen, budget, rank_step=config.rank_step, min_rank=config.min_rank, latency=profile)
    sequential = run.sequential
    cal, order = None, [[r.name] for r in chosen]
    if calibration is not None:
        if sequential:
            order = backend.call_stages(model, chosen, calibration.inputs)
        t1 = time.perf_counter()
        cal = calibrate(model, records, calibration, config, size, moments=method == "whitened")
        timings["calibrate"] = time.perf_counter() - t1
    t1 = time.perf_counter()
    # BatchNorm input statistics where the resolver allows them and some layer has them
    bn_inputs = run.bn_inputs and method != "columns" and any(r.input_stats is not None for r in chosen)
    decompositions = decompose(records, methods.make(method, config), config,
                               cal if method == "whitened" else None, bn_inputs=bn_inputs)
    timings["decompose"] = time.perf_counter() - t1
    effects = {}
    allocation, why = run.allocation, None
    if allocation == "output" and config.allocation == "auto":  # chosen for the user: only where it is affordable
        probes = sum(len(effects_mod.probe_ranks(decompositions[r.name].spectrum, *r.matrix_shape)) for r in chosen)
        cost = effects_mod.probe_passes(probes, config.effect_samples, len(calibration))
        if cost > effects_mod.PROBE_PASS_LIMIT:
            allocation = "error-sum"
            why = (f"output-effect probes would cost {cost:.0f} passes over the calibration set ({probes} probes of "
                   f"{min(config.effect_samples, len(calibration))} samples), more than {effects_mod.PROBE_PASS_LIMIT}: "
                   "ranks shared by the layers' own errors instead (--allocation output probes anyway)")
    if allocation == "output":
        t1 = time.perf_counter()
        effects = measure_effects(model, chosen, decompositions, calibration, config, size)
        timings["effects"] = time.perf_counter() - t1
    reference = reference_outputs(model, heldout, size, config.output) if heldout is not None else []
    timings["prepare"] = time.perf_counter() - t0
    return Prepared(model, config, records, decompositions, method, sequential, heldout, cal, metric_name,
                    reference, timings, size, order, effects, allocation, bn_inputs, profile, why)


def _all_skipped(records: list[LayerRecord]) -> str:
    """'N layer(s) found, all skipped' and why, the commonest reasons first (an --only or --skip
    that leaves nothing is named)."""
    from collections import Counter

    reasons = Counter(r.skip_reason or "not selected" for r in records).most_common()
    why = "; ".join(f"{n} {reason}" for reason, n in reasons[:2]) + ("; ..." if len(reasons) > 2 else "")
    return f"{len(records)} layer(s) found, all skipped ({why})"


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
                    objective=prep.allocation, latency=prep.latency)


def plan_for(model, config: CompressConfig, heldout: HeldOut | None = None, calibration: HeldOut | None = None):
    """discover -> (calibrate) -> decompose -> allocate: (records, spectra, plan, calibration)."""
    prep = prepare(model, config, heldout, calibration)
    return prep.records, prep.spectra, plan_budget(prep, config.budget), prep.calibration


def timing_rewrite(prep: Prepared, plan: Plan):
    """The model at ``plan``'s ranks with the prepared decompositions' own factors, no refits: what
    a timing needs (time depends on the ranks only), at the cost of one rewrite."""
    return prep.backend.rewrite(prep.model, prep.records,
                                PlannedFactors(prep.records, plan.ranks, prep.decompositions, prep.config.split))


def realize(prep: Prepared, budget: str, *, sources: dict | None = None, latency: bool = True,
            layer_errors: bool = True) -> CompressResult:
    """Allocate ``budget`` on the prepared decompositions, factorize (refit), (recover), evaluate
    and report."""
    config, model, backend = prep.config, prep.model, prep.backend
    timings = dict(prep.timings)
    t0 = time.perf_counter()
    plan = plan_budget(prep, budget)
    timings["plan"] = time.perf_counter() - t0
    latency_plan = None
    if plan.budget.kind == "latency":  # checked end to end on this CPU, tightened while it misses
        t0 = time.perf_counter()
        plan, latency_plan = latency_budget.check_plan(
            prep, plan, latency_budget.replanner(prep, plan.budget, plan.limit), lambda p: timing_rewrite(prep, p))
        timings["latency_check"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    factors = PlannedFactors(prep.records, plan.ranks, prep.decompositions, config.split)
    fits, measured = {}, factors.weight_errors
    if prep.sequential and len(factors):
        factorized, fits, measured = sequential_refit(model, prep.records, plan.ranks, prep.calibration, config,
                                                      prep.order, fixed=factors)
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
        metric = evaluate_prepared(prep, factorized)
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
        weight_dtype=backend.weight_dtype(model),
        timings=timings, latency=lat, error_samples=min(config.error_samples, len(heldout)) if heldout is not None else 0,
        method=prep.method, calibration=prep.calibration, fits=fits, recovery=recovery, sequential=prep.sequential,
        decompositions=prep.decompositions, effects=prep.effects, allocation=prep.allocation,
        allocation_note=prep.allocation_note,
        bn_inputs=prep.bn_inputs, latency_profile=prep.latency, latency_plan=latency_plan,
    )
    return CompressResult(factorized, plan, prep.records, prep.spectra, metric, report, errors)


def profile_latency(model, heldout: HeldOut, config: CompressConfig | None = None):
    """The cost tables a latency budget plans with, measured on this CPU (the ``profile``
    command): the selected layers as ``compress`` would find them, timed on a batch of
    ``config.latency_batch`` samples of ``heldout`` with ``config.latency_threads`` threads."""
    config = config or CompressConfig()
    backend = backend_for(model)
    model = backend.normalize(model)
    check_fits(model, heldout, "--heldout", config.output)
    records = backend.discover(model, only=config.only, skip=config.skip)
    backend.measure_positions(model, records, heldout.inputs)  # overridden forward()s are checked here, as in compress
    chosen = selected(records)
    if not chosen:
        raise InputError(f"nothing to profile: {_all_skipped(records) if records else 'no linear or convolution layers found'}")
    batch = latency_budget.latency_mod.batch_of(heldout.inputs, config.latency_batch)
    return latency_budget.measure_profile(model, chosen, batch, config)


def inspect_model(model, config: CompressConfig | None = None) -> dict:
    """Spectra and break-even ranks of every layer, no rewrite (the ``inspect`` command)."""
    config = config or CompressConfig()
    backend = backend_for(model)
    model = backend.normalize(model)
    records = backend.discover(model, only=config.only, skip=config.skip)
    spectra = compute_spectra(records, config)
    return report_mod.inspect_report(records, spectra, backend.count_params(model), backend.weight_dtype(model))
