"""The orchestrator: the only place where discovery, spectra, allocation, rewrite, evaluation and
reporting meet. The CLI and the Python API both call these functions.

    discover -> spectra -> allocate -> factorize/rewrite -> evaluate -> report -> save
"""

from __future__ import annotations

import dataclasses
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from tqdm.auto import tqdm

from . import latency as latency_mod
from . import report as report_mod
from .allocate import Plan, allocate, check_feasible
from .backends import backend_for, backend_of
from .budget import parse_budget
from .columns import column_factors, column_spectrum
from .config import CompressConfig
from .data import HeldOut
from .errors import InputError
from .factors import split_factors, svd_factors
from .metrics import MetricAccumulator, MetricResult, check_metric, default_metric
from .records import LayerRecord, max_saving_rank
from .spectra import Spectrum, choose_method, compute_spectrum, exact_svd
from .whiten import whitened_factors, whitened_svd


def _bar(iterable, config: CompressConfig, desc: str, total=None, unit="layer"):
    """A progress bar on stderr that stays away when quiet or when stderr is not a terminal."""
    disable = config.quiet or not sys.stderr.isatty()
    return tqdm(iterable, desc=desc, total=total, disable=disable, leave=False, unit=unit)


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


def compute_spectra(records: list[LayerRecord], config: CompressConfig | None = None) -> dict[str, Spectrum]:
    """Spectrum of every selected layer (exact or randomized as ``config.svd`` says)."""
    config = config or CompressConfig()
    out = {}
    for record in _bar(selected(records), config, "spectra"):
        try:
            out[record.name] = compute_spectrum(
                record.name,
                backend_of(record).weight_matrix(record),
                svd=config.svd,
                seed=config.seed,
                oversampling=config.oversampling,
                power_iterations=config.power_iterations,
            )
        except ValueError as exc:  # NaN/Inf in a weight is the user's model, not our bug
            raise InputError(str(exc)) from exc
    return out


def compute_factors(records: list[LayerRecord], plan: Plan, config: CompressConfig | None = None,
                    calibration=None, method: str | None = None, cache: dict | None = None):
    """``{name: (A, X)}`` for every layer the plan gives a rank; A (m, k), X (k, n), float64.

    With a ``cache`` dict, each layer's full (exact or whitened) SVD is kept there on first use,
    so later budgets of the same prepared run only slice it instead of decomposing again.
    """
    config = config or CompressConfig()
    method = method or config.resolved_method(calibration is not None)
    factors = {}
    chosen = [r for r in selected(records) if plan.ranks.get(r.name) is not None]
    for record in _bar(chosen, config, "factors"):
        w, rank = backend_of(record).weight_matrix(record), plan.ranks[record.name]
        exact = choose_method(record.matrix_shape, config.svd) == "exact"
        if method == "whitened":
            wh = calibration.whitenings[record.name]
            usv = None if cache is None else _cached(cache, record.name, lambda: whitened_svd(w, wh))
            factors[record.name] = whitened_factors(w, wh, rank, split=config.split, usv=usv)
        elif method == "columns":
            a, x, _ = column_factors(w, rank)
            factors[record.name] = (a, x)
        elif exact and cache is not None:
            factors[record.name] = split_factors(*_cached(cache, record.name, lambda: exact_svd(w)), rank, config.split)
        else:  # randomized sketches depend on the rank: nothing to reuse
            factors[record.name] = svd_factors(
                w, rank, split=config.split, svd="exact" if exact else "randomized",
                seed=config.seed, oversampling=config.oversampling, power_iterations=config.power_iterations,
            )
    return factors


def _cached(cache: dict, key: str, compute):
    if key not in cache:
        cache[key] = compute()
    return cache[key]


def weight_errors(records: list[LayerRecord], factors: dict) -> dict[str, float]:
    """Measured ``||W - A X||_F / ||W||_F`` of each factorized layer (float64)."""
    out = {}
    for record in records:
        if record.name in factors:
            w = backend_of(record).weight_matrix(record)
            a, x = factors[record.name]
            norm = np.linalg.norm(w)
            out[record.name] = float(np.linalg.norm(w - a @ x) / norm) if norm > 0 else 0.0
    return out


def factorize(model, records: list[LayerRecord], plan: Plan, config: CompressConfig | None = None):
    """The rewritten copy of ``model`` with every layer the plan ranks split into two factors."""
    return backend_for(model).rewrite(model, records, compute_factors(records, plan, config))


def check_fits(model, data: HeldOut, flag: str = "--heldout") -> np.ndarray:
    """Run the first batch of ``data`` through ``model``; refuse data that does not fit it."""
    first, _ = next(data.batches(batch_size=min(len(data), 8)))
    try:
        outputs = backend_for(model).predict(model, first, source=f"{flag} {data.source}")
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


def check_heldout(model, heldout: HeldOut, metric: str | None) -> str:
    """Run the first held-out batch through ``model``; return the metric to use."""
    outputs = check_fits(model, heldout, "--heldout")
    name = metric or default_metric(heldout.labels, outputs)
    check_metric(name, heldout.labels, outputs)
    return name


def evaluate(original, factorized, heldout: HeldOut, metric: str | None = None, config: CompressConfig | None = None) -> MetricResult:
    """The held-out metric of ``original`` (before) and ``factorized`` (after)."""
    config = config or CompressConfig()
    name = check_heldout(original, heldout, metric)
    predict = backend_for(original).predict
    triples = ((x, predict(original, x), y) for x, y in heldout.batches(config.batch_size))
    return _score(name, factorized, triples, -(-len(heldout) // config.batch_size), config)


def _score(metric: str, factorized, triples, total: int, config: CompressConfig) -> MetricResult:
    """Stream ``(inputs, original outputs, labels)`` batches into the metric of ``factorized``."""
    acc = MetricAccumulator(metric)
    predict = backend_for(factorized).predict
    for inputs, reference, labels in _bar(triples, config, "evaluate", total, "batch"):
        acc.update(reference, predict(factorized, inputs), labels)
    return acc.result()


@dataclass
class Prepared:
    """Everything about a run that does not depend on the budget: layers, spectra, calibration
    statistics and the original model's held-out outputs. Sweeps and budget searches reuse it."""

    model: object
    config: CompressConfig
    records: list[LayerRecord]
    spectra: dict[str, Spectrum]
    method: str
    sequential: bool
    heldout: HeldOut | None = None
    calibration: object = None  # calibrate.Calibration
    metric_name: str | None = None
    reference: list = field(default_factory=list)  # [(original outputs, labels)] per held-out batch
    timings: dict = field(default_factory=dict)
    decompositions: dict | None = None  # per-layer SVDs kept for later budgets (reuse=True)

    @property
    def backend(self):
        return backend_for(self.model)

    @property
    def selected(self) -> list[LayerRecord]:
        return selected(self.records)


def prepare(model, config: CompressConfig, heldout: HeldOut | None = None, calibration: HeldOut | None = None,
            *, budgets: list[str] | None = None, reuse: bool = False) -> Prepared:
    """Validate, discover, (calibrate) and compute spectra once. Every budget in ``budgets``
    (default: ``config.budget``) is parsed and checked for feasibility before the first SVD.
    With ``reuse`` (several budgets will be realized) each layer's SVD is kept after first use."""
    from .calibrate import calibrate, whitened_spectra

    t0 = time.perf_counter()
    backend = backend_for(model)
    is_torch = backend.FORMAT == "torch"
    method = config.resolved_method(calibration is not None)
    parsed = [parse_budget(b) for b in (budgets or [config.budget])]
    if method == "whitened" and calibration is None:
        raise InputError("--method whitened needs --calibration data (the inputs whose outputs it preserves)")
    if (config.sequential or config.recover) and calibration is None:  # asked for explicitly
        raise InputError(f"{'--sequential' if config.sequential else '--recover'} needs --calibration data")
    if config.sequential and method != "whitened":
        raise InputError(f"--sequential refits whitened factors; it cannot be combined with --method {method}")
    if config.recover and not is_torch:
        raise InputError("--recover fine-tunes PyTorch factor pairs; an ONNX model has no trainable factors")
    _check_overlap(heldout, calibration, config.allow_overlap)
    metric_name = check_heldout(model, heldout, config.metric) if heldout is not None else None
    records = backend.discover(model, only=config.only, skip=config.skip)
    chosen = selected(records)
    if not chosen:
        found = f"{len(records)} layer(s) found, all skipped" if records else "no linear or convolution layers found"
        raise InputError(f"nothing to factorize: {found}")
    if any(b.kind == "flops" for b in parsed) and heldout is None:
        raise InputError("a flops budget needs --heldout (to measure layer output sizes)")
    if heldout is not None:  # one sample tells each layer's output positions, hence its FLOPs
        backend.measure_positions(model, records, heldout.inputs)
    for budget in parsed:
        check_feasible(chosen, budget, rank_multiple=config.rank_multiple, min_rank=config.min_rank)
    cal = None
    if calibration is not None:
        check_fits(model, calibration, "--calibration")
        cal = calibrate(model, records, calibration, config)
    if method == "whitened":
        spectra = whitened_spectra(records, cal)
    elif method == "columns":
        spectra = {r.name: column_spectrum(r.name, backend.weight_matrix(r), max_saving_rank(*r.matrix_shape))
                   for r in _bar(chosen, config, "pivoted QR")}
    else:
        spectra = compute_spectra(records, config)
    reference = []
    if heldout is not None:
        for inputs, labels in heldout.batches(config.batch_size):
            reference.append((backend.predict(model, inputs), labels))
    prep = Prepared(model, config, records, spectra, method, config.resolved_sequential(method), heldout, cal,
                    metric_name, reference, decompositions={} if reuse else None)
    prep.timings["prepare"] = time.perf_counter() - t0
    return prep


def plan_budget(prep: Prepared, budget: str) -> Plan:
    chosen = prep.selected
    return allocate(chosen, [prep.spectra[r.name] for r in chosen], parse_budget(budget),
                    rank_multiple=prep.config.rank_multiple, min_rank=prep.config.min_rank)


def plan_for(model, config: CompressConfig, heldout: HeldOut | None = None, calibration: HeldOut | None = None):
    """discover -> (calibrate) -> spectra -> allocate: (records, spectra, plan, calibration)."""
    prep = prepare(model, config, heldout, calibration)
    return prep.records, prep.spectra, plan_budget(prep, config.budget), prep.calibration


def _check_overlap(heldout: HeldOut | None, calibration: HeldOut | None, allow: bool) -> None:
    if heldout is None or calibration is None or allow:
        return
    same = heldout.source == calibration.source or (heldout.sha256 is not None and heldout.sha256 == calibration.sha256)
    if not same and isinstance(heldout.inputs, np.ndarray) and isinstance(calibration.inputs, np.ndarray):
        same = heldout.inputs.shape == calibration.inputs.shape and np.array_equal(heldout.inputs, calibration.inputs)
    if same:
        raise InputError(
            f"--calibration {calibration.source} is the same data as --heldout {heldout.source}: the accuracy "
            "would be measured on what the factors were fitted to (give --allow-overlap to do it anyway)"
        )


def _evaluate_prepared(prep: Prepared, factorized) -> MetricResult:
    """The held-out metric against the original's outputs cached by :func:`prepare`."""
    batches = prep.heldout.batches(prep.config.batch_size)
    triples = ((x, ref, y) for (x, _), (ref, y) in zip(batches, prep.reference))
    return _score(prep.metric_name, factorized, triples, len(prep.reference), prep.config)


def realize(prep: Prepared, budget: str, *, sources: dict | None = None, latency: bool = True,
            layer_errors: bool = True) -> CompressResult:
    """Allocate ``budget`` on prepared spectra, factorize, (recover), evaluate and report."""
    from .calibrate import recover, sequential_factors

    config, model, backend = prep.config, prep.model, prep.backend
    timings = dict(prep.timings)
    t0 = time.perf_counter()
    plan = plan_budget(prep, budget)
    fits = {}
    if prep.sequential:
        factors, fits = sequential_factors(model, prep.records, plan.ranks, prep.calibration, config)
    else:
        factors = compute_factors(prep.records, plan, config, prep.calibration, prep.method, prep.decompositions)
    factorized = backend.rewrite(model, prep.records, factors)
    recovery = None
    if config.recover:
        recovery = recover(model, factorized, prep.records, prep.calibration, config, prep.metric_name)
        factors = backend.read_factors(factorized, list(factors))
    measured = weight_errors(prep.records, factors)
    if hasattr(backend, "check"):
        backend.check(factorized)  # onnx.checker, full check: a failure here is our bug
    timings["rewrite"] = time.perf_counter() - t0
    metric, errors, lat = None, {}, None
    heldout = prep.heldout
    if heldout is not None:
        t0 = time.perf_counter()
        metric = _evaluate_prepared(prep, factorized)
        names = [n for n, k in plan.ranks.items() if k is not None]
        if layer_errors and config.error_samples > 0 and names:
            batches = (x for x, _ in heldout.batches(config.batch_size, limit=config.error_samples))
            errors = backend.layer_output_errors(model, factorized, names, batches)
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
) -> CompressResult:
    """Plan, rewrite, evaluate, report and (with ``out``) save, in one call.

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
    """
    from . import store

    config = config or CompressConfig()
    if out is not None:
        store.check_out_dir(out, force, input_paths(sources, heldout, calibration))
    check_outputs_requested(model, config, heldout, out)
    prep = prepare(model, config, heldout, calibration)
    result = realize(prep, config.budget, sources=sources)
    save_result(result, prep, out, force)
    return result


def inspect_model(model, config: CompressConfig | None = None) -> dict:
    """Spectra and break-even ranks of every layer, no rewrite (the ``inspect`` command)."""
    config = config or CompressConfig()
    backend = backend_for(model)
    records = backend.discover(model, only=config.only, skip=config.skip)
    spectra = compute_spectra(records, config)
    return report_mod.inspect_report(records, spectra, backend.count_params(model))


def measure_latency(original, factorized, heldout: HeldOut, config: CompressConfig) -> dict:
    """Median CPU latency of both models on one batch of ``config.latency_batch`` held-out samples,
    in the model's own runtime (onnxruntime for ONNX, eager torch for PyTorch)."""
    backend = backend_for(original)
    batch = latency_mod.batch_of(heldout.inputs, config.latency_batch)
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
