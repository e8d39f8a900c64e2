"""Latency budgets end to end: the cost tables a run plans with (a profile file made on the target
CPU, the cache, or measured here) and the check of a plan on this CPU, tightened until the
rewritten model meets the budget in a side-by-side timing with the original.

The time a plan takes depends on its ranks and shapes only, never on the factor values, so the
check times plain factors of the planned ranks; the calibrated factors (refits, recovery) are
made once, for the plan that passed.
"""

from __future__ import annotations

import dataclasses
import importlib.metadata
import time

import numpy as np

from . import costs
from . import latency as latency_mod
from .allocate import Plan, allocate
from .backends import backend_for
from .budget import Budget
from .config import CompressConfig
from .errors import InputError
from .progress import bar
from .records import LayerRecord

#: Rounds of the end-to-end check: the plan is re-made at most this many times after the first.
CHECK_ROUNDS = 3
#: Each re-plan aims this much below what the last measurement asks for, so that one round
#: usually suffices (the measured/predicted ratio itself moves when ranks change).
MARGIN = 0.98
#: A plan that met the budget by more than this share of it (beyond the measurement error) is
#: loosened: the CPU beat the prediction, and the time left over buys accuracy.
LOOSE = 0.04


def runtime_of(backend) -> dict:
    name = backend.RUNTIME
    try:
        version = importlib.metadata.version(name)
    except importlib.metadata.PackageNotFoundError:
        version = "unknown"
    return {"name": name, "version": version}


def shapes_of(batch) -> dict:
    """``{input name: shape}`` of a timed batch (``"inputs"`` for a single array)."""
    if isinstance(batch, dict):
        return {str(k): [int(d) for d in v.shape] for k, v in sorted(batch.items())}
    return {"inputs": [int(d) for d in batch.shape]}


def measure_profile(model, records: list[LayerRecord], batch, config: CompressConfig) -> costs.LatencyProfile:
    """Cost tables of ``records`` and the whole model's time on ``batch``, in the model's runtime,
    with ``config.latency_threads`` threads; one layer at a time."""
    backend = backend_for(model)
    threads = config.latency_threads
    t0 = time.perf_counter()
    with backend.timing([model], threads):
        (whole,) = latency_mod.measure_many([backend.timer(model, batch, threads)], warmup=config.latency_warmup,
                                            repeats=max(config.latency_repeats, 1), sample_seconds=costs.SAMPLE_SECONDS)
        timers = backend.layer_timers(model, records, batch, threads)
        tables = {}
        for r in bar(records, config, "cost tables"):
            if r.name not in timers:
                continue  # not reached by this input: it costs nothing at run time
            t = timers.pop(r.name)  # its input and sessions are released once it is measured
            ranks = costs.grid_ranks(*r.matrix_shape, rank_step=config.rank_step, min_rank=config.min_rank)
            tables[r.name] = costs.measure_table(r.name, t["shape"], t["make"], ranks, baseline=t.get("baseline"),
                                                 calls=t.get("calls", 1))
    return costs.LatencyProfile(
        runtime=runtime_of(backend), threads=threads, batch=config.latency_batch, input_shapes=shapes_of(batch),
        layers=costs.structure(records), whole_ms=whole["median_ms"], whole_spread_ms=[whole["p10_ms"], whole["p90_ms"]],
        tables=tables, created=costs.now(), seconds=time.perf_counter() - t0)


def _cache_key(profile_fields: dict) -> dict:
    return {**profile_fields, "machine": costs.machine(), "profile_version": costs.PROFILE_VERSION}


def costs_for(model, records: list[LayerRecord], heldout, config: CompressConfig) -> costs.LatencyProfile:
    """The cost tables a latency budget plans with: ``config.latency_profile`` checked against this
    model and run, else tables cached from an earlier run on this CPU, else measured now (and
    cached)."""
    backend = backend_for(model)
    batch = latency_mod.batch_of(heldout.inputs, config.latency_batch)
    layers = costs.structure(records)
    runtime = runtime_of(backend)
    what = {"layers": layers, "runtime": runtime, "threads": config.latency_threads, "batch": config.latency_batch,
            "input_shapes": shapes_of(batch), "rank_step": config.rank_step, "min_rank": config.min_rank}
    if config.latency_profile:
        profile = costs.load_profile(config.latency_profile)
        costs.check_profile(profile, layers=layers, runtime=runtime["name"], threads=config.latency_threads,
                            batch=config.latency_batch, input_shapes=what["input_shapes"],
                            where=f"--latency-profile {config.latency_profile}")
        return profile.restricted(r.name for r in records)
    path = costs.cache_path(_cache_key(what))
    if path.is_file():
        try:
            profile = costs.load_profile(path, flag="cached profile")
            profile.source = f"cached from an earlier run ({path})"
            return profile
        except InputError:
            pass  # a damaged cache entry is measured again
    profile = measure_profile(model, records, batch, config)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        profile.save(path)
    except OSError:
        pass  # a cache that cannot be written only costs the next run a measurement
    return profile


def _time_plan(prep, plan: Plan, batch, config: CompressConfig, rewrite) -> dict:
    """The original and ``rewrite(plan)`` (any factors of the plan's ranks), timed side by side
    (samples of several calls for a fast model, so the medians are tight)."""
    backend = prep.backend
    candidate = rewrite(plan)
    threads = config.latency_threads
    with backend.timing([prep.model, candidate], threads):
        before, after = latency_mod.measure_many(
            [backend.timer(prep.model, batch, threads), backend.timer(candidate, batch, threads)],
            warmup=config.latency_warmup, repeats=config.latency_repeats, sample_seconds=costs.SAMPLE_SECONDS)
    return {"before_ms": before["median_ms"], "after_ms": after["median_ms"],
            "before_spread_ms": [before["p10_ms"], before["p90_ms"]],
            "after_spread_ms": [after["p10_ms"], after["p90_ms"]], "repeats": config.latency_repeats}


def _median_error(spread_ms: list, repeats: int) -> float:
    """Standard error of a median of ``repeats`` timings from their 10th-90th percentile width:
    sigma ~ width / 2.563 for a normal spread, and the median's error is 1.2533 sigma / sqrt(n)
    (the large-sample variance of a median is pi/2 sigma^2 / n: common statistics, quoted from memory)."""
    return 1.2533 * (spread_ms[1] - spread_ms[0]) / 2.563 / np.sqrt(max(repeats, 1))


def check_plan(prep, plan: Plan, replan, rewrite) -> tuple[Plan, dict]:
    """Time the plan's rewrite (``rewrite(plan)``: a model with factors of its ranks) against the
    original on this CPU. While it misses the budget by more than its measurement error (two
    standard errors of the medians), or meets it with more than :data:`LOOSE` of it to spare,
    re-plan for a predicted time scaled by the measured shortfall or surplus (``replan(aim_ms)``
    gives the plan for an absolute aim) and time again, at most :data:`CHECK_ROUNDS` times. The
    plan kept is the slowest that met the budget, else the fastest measured. Returns it and what
    was measured."""
    config, profile, budget = prep.config, prep.latency, plan.budget
    summary = {"source": profile.source, "profile_machine": profile.machine, "limit_ms": plan.limit,
               "original_ms": profile.whole_ms, "rest_ms": profile.rest_ms, "layer_scale": profile.layer_scale,
               "rounds": [], "checked": False, "tables": [t.to_dict() for t in profile.tables.values()]}
    if not profile.same_machine():
        summary["why_unchecked"] = (f"the profile was made on another CPU ({profile.machine.get('cpu')}); time the "
                                    "result there (factorize-weights evaluate ... on that machine)")
        return plan, _finish(summary, plan, None)
    batch = latency_mod.batch_of(prep.heldout.inputs, config.latency_batch)
    aim = plan.limit
    met_plans, fastest, seen = [], None, set()
    for i in range(CHECK_ROUNDS + 1):
        seen.add(tuple(sorted(plan.ranks.items(), key=lambda kv: kv[0])))
        t = _time_plan(prep, plan, batch, config, rewrite)
        ratio = t["after_ms"] / t["before_ms"]
        se_after = _median_error(t["after_spread_ms"], t["repeats"])
        se_before = _median_error(t["before_spread_ms"], t["repeats"])
        if budget.absolute:  # milliseconds as measured
            achieved, goal, slack = t["after_ms"], budget.value, 2 * se_after
        else:  # a fraction of the original's time, both measured now
            achieved, goal = ratio, budget.value
            slack = 2 * ratio * float(np.hypot(se_after / t["after_ms"], se_before / t["before_ms"]))
        met = achieved <= goal + slack
        summary["rounds"].append({"ranks": dict(plan.ranks), "predicted_ms": plan.cost_after, "measured_ms": t["after_ms"],
                                  "original_measured_ms": t["before_ms"], "measured_ratio": ratio,
                                  "spread_ms": t["after_spread_ms"], "tolerance": slack, "met": met})
        if met:
            met_plans.append((achieved, plan))
        if fastest is None or achieved < fastest[0]:
            fastest = (achieved, plan)
        # met and close to the budget (within the error, or LOOSE of it): nothing to gain from another round
        if (met and achieved >= goal * (1 - LOOSE) - slack) or i == CHECK_ROUNDS:
            break
        aim = aim * goal / achieved * MARGIN  # lower when it missed; higher when the CPU beat the prediction
        try:
            plan = replan(aim)
        except InputError:  # no plan is predicted that fast: keep the fastest one measured
            summary["stopped"] = "no faster plan exists"
            break
        if tuple(sorted(plan.ranks.items(), key=lambda kv: kv[0])) in seen:
            summary["stopped"] = "the re-made plan was one already timed"
            break
    # the plan kept: of those that met the budget, the slowest (it keeps the most of the model);
    # when none did, the fastest measured
    best = (max(met_plans, key=lambda m: m[0])[1], None, True) if met_plans else (fastest[1], None, False)
    plan, _, met = best
    summary["checked"] = True
    return plan, _finish(summary, plan, met)


def _finish(summary: dict, plan: Plan, met) -> dict:
    summary["met"] = met
    summary["predicted_ms"] = plan.cost_after
    kept = [r for r in summary["rounds"] if r["predicted_ms"] == plan.cost_after]
    if kept:
        r = kept[-1]
        # the share of the predicted saving the CPU delivered, both as fractions of the original
        predicted_saving = 1 - plan.cost_after / plan.cost_before
        measured_saving = 1 - r["measured_ratio"]
        summary["delivered_share"] = measured_saving / predicted_saving if predicted_saving > 0 else None
    return summary


def replanner(prep, budget: Budget, limit_ms: float, allocate_fn=allocate):
    """``aim_ms -> Plan``: the prepared run allocated for an absolute predicted time (the plan
    still states the user's budget and its limit)."""
    def replan(aim_ms: float) -> Plan:
        chosen = prep.selected
        inner = dataclasses.replace(budget, value=aim_ms, absolute=True, text=f"latency={aim_ms:.4f}ms")
        plan = allocate_fn(chosen, [prep.decompositions[r.name].spectrum for r in chosen], inner,
                           rank_step=prep.config.rank_step, min_rank=prep.config.min_rank,
                           effects=[prep.effects.get(r.name) for r in chosen] if prep.effects else None,
                           objective=prep.allocation, latency=prep.latency)
        return dataclasses.replace(plan, budget=budget, limit=limit_ms)
    return replan
