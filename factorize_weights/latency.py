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


def measure_many(fns, *, warmup: int = 5, repeats: int = 30, sample_seconds: float = 0.0,
                 clock=time.perf_counter) -> list[dict]:
    """Time several callables side by side: ``warmup`` untimed calls each, then ``repeats``
    rounds of one timed sample each, the order rotating every round so drift hits all alike.

    A sample is one call, or with ``sample_seconds`` > 0 as many calls as make the mean callable
    last that long (chosen once, after the warm-up; the sample is their mean), so a fast callable
    is not timed at the clock's resolution and Python's call overhead. Per callable: the median
    and the 10th and 90th percentile milliseconds per call."""
    for _ in range(warmup):
        for fn in fns:
            fn()
    calls = 1
    if sample_seconds > 0:
        t0 = clock()
        for fn in fns:
            fn()
        calls = max(1, int(np.ceil(sample_seconds / max((clock() - t0) / max(len(fns), 1), 1e-9))))
    times = [[] for _ in fns]
    for i in range(repeats):
        order = list(range(len(fns)))
        order = order[i % len(fns):] + order[: i % len(fns)]
        for j in order:
            fn = fns[j]
            t0 = clock()
            for _ in range(calls):
                fn()
            times[j].append((clock() - t0) / calls)
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
