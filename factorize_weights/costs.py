"""Measured time per layer, for latency budgets: a cost table per layer (dense, and its factor
pair at a grid of ranks, each timed on the layer's real input shape in the deployment runtime),
fitted into a monotone time-versus-rank curve, plus the measured time of the whole model.

Backend-neutral: a backend hands out, per layer, the input shape it saw and a factory
``make(rank)`` of zero-argument callables (``rank=None``: the dense layer) that run that one
layer once in its runtime. What is done with the timings lives here.

A latency profile is this set of tables with what it was measured for (model structure, input
shapes, runtime and version, threads, batch) and on what (the CPU). It is written as JSON by the
``profile`` command on the target device, and read by ``compress --latency-profile`` elsewhere;
without one, the tables are measured on this machine and cached (:func:`cache_path`).
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import os
import platform
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .errors import InputError
from .latency import measure_many
from .records import LayerRecord, max_saving_rank

#: Ranks timed per layer besides dense (spread geometrically over the allowed ranks); the curve
#: between them is interpolated. Six points catch the steps of blocked matmul kernels well enough
#: for allocation (common practice: kernel time is piecewise smooth in each dimension).
GRID = 6
#: Timed rounds per layer (each round times every grid point once, in rotating order), and untimed
#: rounds first. The median of 9 is stable to a few percent on a quiet core.
TABLE_REPEATS, TABLE_WARMUP = 9, 2
#: One timed sample runs the layer this long at least (several calls when one is shorter), so the
#: clock's resolution and Python's call overhead stay small against what is measured.
SAMPLE_SECONDS = 2e-3
#: Version of the profile file layout (bumped when a field changes meaning).
PROFILE_VERSION = 1


def isotonic(values) -> np.ndarray:
    """The non-decreasing sequence nearest to ``values`` in least squares (pool adjacent
    violators; Barlow et al. 1972, common practice for monotone fits)."""
    blocks: list[list[float]] = []  # [mean, weight]
    for v in np.asarray(values, dtype=float).tolist():
        blocks.append([v, 1.0])
        while len(blocks) > 1 and blocks[-2][0] > blocks[-1][0]:
            (m2, w2), (m1, w1) = blocks.pop(), blocks.pop()
            blocks.append([(m1 * w1 + m2 * w2) / (w1 + w2), w1 + w2])
    return np.concatenate([np.full(int(w), m) for m, w in blocks]) if blocks else np.zeros(0)


@dataclass
class CostTable:
    """One layer's measured time (milliseconds per call).

    Attributes
    ----------
    name : str
    input_shape : list of int
        The shape of the input the layer was timed on (the real one, traced from the model).
    ranks : list of int
        The ranks whose factor pairs were timed, ascending.
    factor_ms : list of float
        Median time of the factor pair at each rank.
    dense_ms : float
        Median time of the dense layer.
    spread : list of float
        Median over the grid of (p90 - p10) / median: how noisy the table is.
    """

    name: str
    input_shape: list
    ranks: list
    factor_ms: list
    dense_ms: float
    spread: float = 0.0

    def time_ms(self, ranks) -> np.ndarray:
        """Fitted time of the factor pair at ``ranks``: the isotonic fit of the measured medians,
        linear between grid points, linear through the origin's side below the first and flat
        beyond the last (ranks there are not allowed anyway)."""
        r = np.asarray(ranks, dtype=float)
        if not self.ranks:
            return np.full(r.shape, np.inf)
        fit = isotonic(self.factor_ms)
        return np.interp(r, np.asarray(self.ranks, dtype=float), fit)

    def faster_ranks(self, ranks) -> np.ndarray:
        """Of ``ranks``, those whose fitted time is below the dense layer's (break-even by time)."""
        ranks = np.asarray(ranks, dtype=int)
        return ranks[self.time_ms(ranks) < self.dense_ms]

    def to_dict(self) -> dict:
        return {"name": self.name, "input_shape": list(self.input_shape), "ranks": list(self.ranks),
                "factor_ms": [float(t) for t in self.factor_ms], "dense_ms": float(self.dense_ms),
                "spread": float(self.spread)}


def grid_ranks(m: int, n: int, *, rank_step: int = 1, min_rank: int = 1) -> list[int]:
    """Up to :data:`GRID` ranks from the smallest allowed to the largest saving one, spaced
    geometrically (time grows about linearly in rank; low ranks are where kernels misbehave)."""
    top = max_saving_rank(m, n)
    low = -(-max(min_rank, rank_step) // rank_step) * rank_step
    if top < low:
        return []
    points = np.geomspace(low, top, GRID) if top > low else np.array([low])
    ranks = sorted({int(max(low, min(top, round(p / rank_step) * rank_step))) for p in points})
    return [r for r in ranks if r <= top]


#: A layer timed alone is never taken as cheaper than this (seconds): a floor for what is left
#: after the runtime's per-call overhead is subtracted.
FLOOR_SECONDS = 1e-7


def measure_table(name: str, input_shape, make, ranks: list[int], *, baseline=None, calls: int = 1,
                  repeats: int = TABLE_REPEATS, warmup: int = TABLE_WARMUP,
                  clock=time.perf_counter) -> CostTable:
    """The cost table of one layer: ``make(None)`` and ``make(rank)`` for each rank of ``ranks``
    timed side by side (``latency.measure_many``, samples of at least :data:`SAMPLE_SECONDS`).
    ``baseline``, when given, runs the same call path with no work (an identity in the runtime):
    its median is subtracted from every time, so a per-call overhead the layer does not pay inside
    the model is not counted. ``calls``: how
    often one forward pass runs the layer (the table is per forward pass)."""
    fns = [make(None)] + [make(int(k)) for k in ranks] + ([baseline] if baseline is not None else [])
    results = measure_many(fns, warmup=max(warmup, 1), repeats=repeats, sample_seconds=SAMPLE_SECONDS, clock=clock)
    base = results.pop()["median_ms"] if baseline is not None else 0.0
    dense, factors = results[0], results[1:]
    spread = float(np.median([(r["p90_ms"] - r["p10_ms"]) / r["median_ms"] for r in results if r["median_ms"] > 0]))

    def ms(t: float) -> float:
        return max(t - base, FLOOR_SECONDS * 1e3) * calls

    return CostTable(name, [int(d) for d in input_shape], [int(k) for k in ranks],
                     [ms(r["median_ms"]) for r in factors], ms(dense["median_ms"]), spread)


# ---------------------------------------------------------------- profiles


def machine() -> dict:
    """What the timings were measured on: the CPU model as the OS names it, cores, platform."""
    cpu = platform.processor() or ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.lower().startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    return {"cpu": cpu or platform.machine(), "cores": os.cpu_count() or 1,
            "platform": f"{platform.system()} {platform.machine()}"}


def structure(records: list[LayerRecord]) -> list[dict]:
    """The layers a profile is valid for: name, kind and matrix shape of each selected layer."""
    return [{"name": r.name, "kind": r.kind, "matrix": list(r.matrix_shape)} for r in records]


def fingerprint(layers: list[dict]) -> str:
    return hashlib.sha256(json.dumps(layers, sort_keys=True).encode()).hexdigest()[:16]


@dataclass
class LatencyProfile:
    """Cost tables of every selected layer and the whole model's time, with what they hold for."""

    runtime: dict  # {"name": "torch" | "onnxruntime", "version": ...}
    threads: int
    batch: int
    input_shapes: dict  # {input name: shape} of the timed batch
    layers: list  # structure(records)
    whole_ms: float  # the original model, end to end, median
    whole_spread_ms: list  # [p10, p90]
    tables: dict[str, CostTable]
    machine: dict = field(default_factory=machine)
    created: str = ""
    seconds: float = 0.0  # how long the measurement took
    source: str = "measured here"  # or the profile file it was read from

    @property
    def model_key(self) -> str:
        return fingerprint(self.layers)

    @property
    def rest_ms(self) -> float:
        """Time of everything that is not a selected layer: the whole model's measured time less
        the selected layers' dense times (at least 0)."""
        return max(self.whole_ms - sum(t.dense_ms for t in self.tables.values()), 0.0)

    @property
    def layer_scale(self) -> float:
        """Layers timed alone can add up to more than the whole model (warm caches, thread pools
        kept busy between layers); their times are then scaled down by this factor so that dense
        layers plus the rest make the whole."""
        total = sum(t.dense_ms for t in self.tables.values())
        return min(1.0, self.whole_ms / total) if total > 0 else 1.0

    def restricted(self, names) -> "LatencyProfile":
        """The profile for a run that selects only ``names``: the other layers' time joins the rest."""
        names = set(names)
        if names >= set(self.tables):
            return self
        return dataclasses.replace(self, tables={n: t for n, t in self.tables.items() if n in names},
                                   layers=[d for d in self.layers if d["name"] in names])

    def layer_time(self, name: str, rank) -> dict | None:
        """A layer's time in a plan: dense and at ``rank`` (None: dense), fitted from its table and
        scaled as the allocator scales it; None when the timed batch does not reach the layer."""
        table = self.tables.get(name)
        if table is None:
            return None
        dense = table.dense_ms * self.layer_scale
        return {"dense": dense, "planned": dense if rank is None else float(table.time_ms([rank])[0]) * self.layer_scale}

    def same_machine(self) -> bool:
        here = machine()
        return self.machine.get("cpu") == here["cpu"] and self.machine.get("cores") == here["cores"]

    def to_dict(self) -> dict:
        return {"kind": "factorize-weights latency profile", "version": PROFILE_VERSION, "created": self.created,
                "machine": self.machine, "runtime": self.runtime, "threads": self.threads, "batch": self.batch,
                "input_shapes": self.input_shapes, "model": {"fingerprint": self.model_key, "layers": self.layers},
                "whole_ms": self.whole_ms, "whole_spread_ms": self.whole_spread_ms, "seconds": self.seconds,
                "tables": [t.to_dict() for t in self.tables.values()]}

    def save(self, path: str | Path) -> None:
        """Write the profile atomically (a temporary file renamed into place)."""
        path = Path(path)
        tmp = path.with_name(f".{path.name}.tmp{os.getpid()}")
        tmp.write_text(json.dumps(self.to_dict(), indent=1) + "\n")
        os.replace(tmp, path)


def load_profile(path: str | Path, flag: str = "--latency-profile") -> LatencyProfile:
    """A profile file read back; a missing, unreadable or damaged file is refused naming it."""
    path = Path(path)
    where = f"{flag} {path}"
    try:
        doc = json.loads(path.read_text())
    except FileNotFoundError:
        raise InputError(f"{where}: no such file (write one with: factorize-weights profile MODEL ... --out {path.name})")
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputError(f"{where}: not a readable profile ({type(exc).__name__}: {exc})") from None
    if not isinstance(doc, dict) or doc.get("kind") != "factorize-weights latency profile":
        raise InputError(f"{where}: not a latency profile written by factorize-weights profile")
    if doc.get("version") != PROFILE_VERSION:
        raise InputError(f"{where}: profile version {doc.get('version')!r}; this version reads {PROFILE_VERSION} "
                         "(write it again with this version's profile command)")
    try:
        tables = {}
        for t in doc["tables"]:
            table = CostTable(str(t["name"]), [int(d) for d in t["input_shape"]], [int(k) for k in t["ranks"]],
                              [float(x) for x in t["factor_ms"]], float(t["dense_ms"]), float(t.get("spread", 0.0)))
            if len(table.ranks) != len(table.factor_ms) or table.ranks != sorted(set(table.ranks)):
                raise ValueError(f"table {table.name!r}: ranks and times do not match")
            if not all(math.isfinite(x) and x > 0 for x in table.factor_ms + [table.dense_ms]):
                raise ValueError(f"table {table.name!r}: times must be positive numbers")
            tables[table.name] = table
        profile = LatencyProfile(
            runtime=dict(doc["runtime"]), threads=int(doc["threads"]), batch=int(doc["batch"]),
            input_shapes={str(k): [int(d) for d in v] for k, v in doc["input_shapes"].items()},
            layers=list(doc["model"]["layers"]), whole_ms=float(doc["whole_ms"]),
            whole_spread_ms=[float(x) for x in doc["whole_spread_ms"]], tables=tables, machine=dict(doc["machine"]),
            created=str(doc.get("created", "")), seconds=float(doc.get("seconds", 0.0)), source=str(path))
    except (KeyError, TypeError, ValueError, AttributeError) as exc:
        raise InputError(f"{where}: damaged profile ({type(exc).__name__}: {exc})") from None
    if not (math.isfinite(profile.whole_ms) and profile.whole_ms > 0):
        raise InputError(f"{where}: damaged profile (whole_ms must be a positive number)")
    return profile


def check_profile(profile: LatencyProfile, *, layers: list[dict], runtime: str, threads: int, batch: int,
                  input_shapes: dict, where: str) -> None:
    """Refuse a profile measured for another model, runtime, thread count or input shape."""
    if profile.runtime.get("name") != runtime:
        raise InputError(f"{where}: measured in {profile.runtime.get('name')}, but this model runs in {runtime}")
    have = {d["name"]: d for d in profile.layers}
    want = {d["name"]: d for d in layers}
    missing = [n for n in want if n not in have]
    if missing:
        raise InputError(f"{where}: made for another model: it has no table for layer {missing[0]!r}"
                         + (f" (and {len(missing) - 1} more)" if len(missing) > 1 else ""))
    for name, d in want.items():
        if have[name].get("matrix") != d["matrix"] or have[name].get("kind") != d["kind"]:
            raise InputError(f"{where}: made for another model: layer {name!r} is {have[name].get('kind')} "
                             f"{have[name].get('matrix')} there, {d['kind']} {d['matrix']} here")
    if profile.threads != threads:
        raise InputError(f"{where}: measured with {profile.threads} thread(s); this run times {threads} "
                         f"(give --latency-threads {profile.threads}, or profile again)")
    if profile.batch != batch or profile.input_shapes != input_shapes:
        raise InputError(f"{where}: measured for {_shapes(profile.input_shapes)}; this run times "
                         f"{_shapes(input_shapes)} (batch {batch}; profile again with these inputs)")


def _shapes(shapes: dict) -> str:
    return ", ".join(f"{k} {'x'.join(str(d) for d in v)}" for k, v in shapes.items())


def cache_path(key: dict) -> Path:
    """Where tables measured here are kept between runs: the user's cache folder
    (``$XDG_CACHE_HOME``, else ``~/.cache``), one file per model, runtime, shapes, threads and CPU."""
    root = Path(os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache") / "factorize-weights" / "latency"
    digest = hashlib.sha256(json.dumps(key, sort_keys=True).encode()).hexdigest()[:20]
    return root / f"{digest}.json"


def now() -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%S%z")
