"""CPU latency, measured: warm-up, then interleaved timed runs of the original and the
factorized model so that machine noise hits both alike; medians and spread are reported.

Backend-neutral: a backend hands out a zero-argument callable that runs one batch.
"""

from __future__ import annotations

import time

import numpy as np


def _stats(times_s: list[float]) -> dict:
    ms = np.asarray(times_s) * 1e3
    return {"median_ms": float(np.median(ms)), "p10_ms": float(np.percentile(ms, 10)),
            "p90_ms": float(np.percentile(ms, 90))}


def measure_many(fns, *, warmup: int = 5, repeats: int = 30) -> list[dict]:
    """Time several callables side by side: ``warmup`` untimed calls each, then ``repeats``
    rounds of one timed call each, the order rotating every round so drift hits all alike."""
    for _ in range(warmup):
        for fn in fns:
            fn()
    times = [[] for _ in fns]
    for i in range(repeats):
        order = list(range(len(fns)))
        order = order[i % len(fns):] + order[: i % len(fns)]
        for j in order:
            t0 = time.perf_counter()
            fns[j]()
            times[j].append(time.perf_counter() - t0)
    return [_stats(t) for t in times]


def compare(run_before, run_after, *, warmup: int = 5, repeats: int = 30) -> dict:
    """Median latency of two callables measured side by side (see :func:`measure_many`)."""
    b, a = measure_many([run_before, run_after], warmup=warmup, repeats=repeats)
    return {
        "before_ms": b["median_ms"],
        "after_ms": a["median_ms"],
        "before_spread_ms": [b["p10_ms"], b["p90_ms"]],
        "after_spread_ms": [a["p10_ms"], a["p90_ms"]],
        "speedup": b["median_ms"] / a["median_ms"] if a["median_ms"] > 0 else None,
        "warmup": warmup,
        "repeats": repeats,
    }


def batch_of(inputs, batch: int):
    """The first ``batch`` samples, tiled when the set is smaller (arrays or dicts of arrays)."""
    def take(arr):
        reps = -(-batch // arr.shape[0])
        return np.concatenate([arr] * reps)[:batch] if reps > 1 else arr[:batch]

    if isinstance(inputs, dict):
        return {k: take(v) for k, v in inputs.items()}
    return take(inputs)
