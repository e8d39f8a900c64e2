"""``compress`` in one call: refuse what cannot be honoured, prepare, realize one budget (or search
the smallest within a drop, ``--keep-within``), then write the output folder atomically. The CLI's
``compress`` calls exactly this; it builds on :mod:`.pipeline` and :mod:`.sweep`, neither of which
imports it.
"""

from __future__ import annotations

import dataclasses
import time
from pathlib import Path

from .backends import backend_for
from .config import CompressConfig
from .data import HeldOut
from .errors import InputError
from .evaluation import check_heldout, check_overlap, reference_outputs
from .pipeline import CompressResult, Prepared, prepare, realize
from .resolve import check, facts_for
from .sweep import search_budget

def save_result(result: CompressResult, prep: Prepared, out, force: bool) -> None:
    """Export/int8 extras (when asked) and the output folder, atomically."""
    import tempfile

    from . import store
    from .backends import exports  # both formats: imported only when a run asks for them

    config, report, extra = prep.config, result.report, {}
    with tempfile.TemporaryDirectory(prefix="factorize-weights-") as work:
        work = Path(work)
        if config.export_onnx:
            extra["model.onnx"], report["export"] = exports.export_checked(result.model, prep.heldout, work)
        if config.int8:
            t0 = time.perf_counter()
            extra["model.int8.onnx"], report["int8"] = exports.int8_comparison(
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
        store.check_out_dir(out, force, store.input_paths(sources, heldout, calibration))
    # every cross-option rule before any work (prepare resolves again, with the same facts)
    check(config, facts_for(backend_for(model), config, heldout=heldout, calibration=calibration, out=out,
                            budgets=["params=1"] if keep_within is not None else None, keep_within=keep_within,
                            selection=selection))
    source = (sources or {}).get("model")
    if keep_within is None:
        prep = prepare(model, config, heldout, calibration, model_source=source)
        result = realize(prep, config.budget, sources=sources)
    else:
        measured_by = None
        if selection is not None:
            check_overlap(heldout, selection, False, "--selection")
            check_overlap(selection, calibration, config.allow_overlap, against="--selection")
            # both sets fit and score one metric before the search (the held-out set is used after it)
            measured_by = check_heldout(model, heldout, config.metric, config.output)
            chosen_by = check_heldout(model, selection, config.metric, config.output, flag="--selection")
            if chosen_by != measured_by:
                raise InputError(f"--selection {selection.source}: would choose the budget by {chosen_by}, but --heldout "
                                 f"{heldout.source} is scored by {measured_by} (labels in one and not the other?); "
                                 "give --metric, or two sets of the same kind")
        prep = prepare(model, config, selection or heldout, calibration, budgets=["params=1"], model_source=source)
        t_search = time.perf_counter()
        budget, search, _ = search_budget(prep, keep_within)
        prep.timings["search"] = time.perf_counter() - t_search
        search["selection"] = None if selection is None else {
            "source": selection.source, "sha256": selection.sha256, "samples": len(selection)}
        if selection is not None:  # the result is measured on the held-out set, which played no part
            prep.heldout, prep.metric_name = heldout, measured_by
            prep.reference = reference_outputs(model, heldout, prep.batch_size, config.output)
        prep.config = config = dataclasses.replace(config, budget=budget)
        result = realize(prep, budget, sources=sources)
        result.report["search"] = search
    # the whole run up to here (preparation, any search, the final budget); writing is timed apart
    result.report["wall_seconds"]["total"] = round(time.perf_counter() - t_start, 3)
    save_result(result, prep, out, force)
    return result
