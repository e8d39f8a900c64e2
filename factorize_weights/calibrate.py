"""Calibration: the second moments of every selected layer's inputs (one forward sweep), sequential
refits (one paired sweep per group of layers) and short recovery. Part of the orchestrator: it
calls a backend through its interface; the statistics are in stats.py and the math in whiten.py.

Cost, in passes over the calibration set:

- moments: one forward pass of the original model; a Gram matrix per selected layer;
- sequential refits, per budget: the layers are split into at most ``config.sequential_groups``
  consecutive groups in forward order (cut further where a group's paired moments, C and G', two
  n x n float64 matrices per layer, would exceed :data:`PAIRED_BYTES`); per group one pass of the
  original and of the working copy, then the group's layers are refitted and patched into the
  working copy in place, so the next group sees them (see :func:`sequential_refit`).
"""

from __future__ import annotations

import resource
import sys
from dataclasses import dataclass, field

import numpy as np

from .backends import backend_for
from .config import CompressConfig
from .data import HeldOut
from .errors import InputError
from .methods import Whitened, floored_scale, unscale_rows
from .progress import bar
from .records import LayerRecord
from .stats import CrossMoments, Moments, OutputMoments, Prior, ridge, shrinkage_ridge, weight_error
from .whiten import regression_product, whitening

#: Below this relative change of a layer's inputs (float32 rounding), no layer upstream has moved them.
DRIFT_TOL = 1e-6
#: Memory for the paired moments of one group of sequential refits (two n x n float64 per layer).
PAIRED_BYTES = 1 << 30


@dataclass
class Calibration:
    """What the calibration pass measured.

    Attributes
    ----------
    data : HeldOut
        The calibration set (never the held-out set unless the user allowed the overlap).
    moments : dict of layer name to Moments
        Their Gram matrices are released once each layer is decomposed (``rows`` stays).
    warnings : list of str
    ridge : float
        The relative ridge added to every moment before use.
    gram_bytes : int
        Memory the Gram matrices took while they were held.
    """

    data: HeldOut
    moments: dict[str, Moments]
    warnings: list[str] = field(default_factory=list)
    ridge: float = 0.0
    gram_bytes: int = 0
    batch_size: int = 256
    passes: int = 1  # passes over the calibration set for the latest budget (moments + refit groups)
    rows_ridge: float = 0.0  # with shrinkage: each layer's ridge is at least this x (input width) / rows
    plan: "StatisticsPlan | None" = None  # which side of each layer's statistics was kept, and why

    def summary(self, ranks: dict | None = None, fits: dict | None = None) -> dict:
        """The report's calibration block; with one budget's ``ranks`` and sequential ``fits``,
        what that budget's written factors used (a refit's own ridge and target)."""
        fits = fits or {}
        ridges = {**self.ridges, **{n: f["ridge"] for n, f in fits.items() if n in self.ridges}}

        def toward_statistics(n):
            if ranks is not None and ranks.get(n) is None:
                return False  # left dense
            return fits[n]["ridge_toward"] == "input statistics" if n in fits else self.ridge_for(n) > self.ridge

        return {
            "source": self.data.source,
            "sha256": self.data.sha256,
            "samples": len(self.data),
            "rows": {name: st.rows for name, st in self.moments.items()},
            "gram_bytes": self.gram_bytes,
            "peak_rss_bytes": peak_rss(),
            "warnings": list(self.warnings),
            "ridge": self.ridge,
            "shrunk": {name: round(r, 6) for name, r in ridges.items() if r > self.ridge},
            "rows_ridge": self.rows_ridge,
            "ridge_toward_input_statistics": sorted(n for n in self.priors if toward_statistics(n)),
            "passes": self.passes,
            "batch_size": self.batch_size,
            **(self.plan.summary() if self.plan is not None else {}),
        }

    regularized: dict[str, "LayerRidge"] = field(default_factory=dict)  # per layer, set by release()

    @property
    def ridges(self) -> dict[str, float]:
        """The relative ridge each layer released with shrinkage on got."""
        return {n: r.ridge for n, r in self.regularized.items() if r.shrunk}

    @property
    def priors(self) -> dict[str, Prior]:
        return {n: r.prior for n, r in self.regularized.items() if r.prior is not None}

    def ridge_for(self, name: str) -> float:
        """The relative ridge of layer ``name``: ``ridge`` or, with shrinkage on, at least the
        Ledoit-Wolf shrinkage of its moments (set by :meth:`release`)."""
        return self.regularized[name].ridge if name in self.regularized else self.ridge

    def prior_for(self, name: str) -> Prior | None:
        """What the ridge of layer ``name`` adds instead of a multiple of the identity (or None)."""
        return self.regularized[name].prior if name in self.regularized else None

    def identity_ridge_for(self, name: str) -> float:
        """The relative ridge of ``name`` with the identity as the target, as if it had no prior
        (what a refit uses once the layers upstream have moved its inputs)."""
        r = self.regularized.get(name)
        return self.ridge if r is None else r.identity_ridge

    def output_side(self, name: str) -> bool:
        """Whether layer ``name`` kept only its output moment (too wide for its input Gram)."""
        return self.plan is not None and self.plan.sides.get(name) == "output"

    def uncalibrated(self, name: str) -> bool:
        """Whether layer ``name`` got no statistics at all (too wide on both sides for the budget)."""
        return self.plan is not None and name in self.plan.dropped

    def release(self, name: str, shrink: bool = False, prior: Prior | None = None) -> np.ndarray:
        """The Gram matrix of ``name``, dropped from this object (it is used once), and the layer's
        regularisation decided once (:class:`LayerRidge`): with ``shrink``, its ridge becomes at
        least its Ledoit-Wolf shrinkage (toward ``prior`` when given) and ``rows_ridge`` x its input
        width / its calibration rows first. The sequential refits read the same record."""
        st = self.moments[name]
        self.regularized[name] = LayerRidge.decide(st, self.ridge, self.rows_ridge, shrink, prior)
        if isinstance(st, OutputMoments):
            return st  # the method forms W (G + ridge) W^T from it (methods.Whitened)
        g = st.gram
        st.gram = None
        return g


@dataclass
class LayerRidge:
    """One layer's regularisation of its calibration moments, and why: the relative ridge, the
    target it adds (a Prior, or the identity when None), the ridge toward the identity for refits
    whose inputs have drifted, and which rule set the value."""

    ridge: float
    identity_ridge: float
    prior: Prior | None
    reason: str  # "floor" (the --ridge floor), "rows floor" or "Ledoit-Wolf shrinkage"
    shrunk: bool = True  # decided with shrinkage on (the report lists such layers' ridges)

    @staticmethod
    def decide(st: Moments, base: float, rows_ridge: float, shrink: bool, prior: Prior | None) -> "LayerRidge":
        if isinstance(st, OutputMoments):  # no input Gram: no Ledoit-Wolf estimate and no prior target
            floor = max(base, rows_ridge * st.n / st.rows if st.rows and shrink else 0.0)
            return LayerRidge(floor, floor, None, "floor (output-side statistics)", shrunk=shrink)
        if not shrink:
            return LayerRidge(base, base, prior, "floor", shrunk=False)
        rows_floor = rows_ridge * st.n / st.rows if st.rows else 0.0
        floor = max(base, rows_floor)
        ridge = shrinkage_ridge(st.shrinkage(prior), floor)
        identity = shrinkage_ridge(st.shrinkage(None), floor) if prior is not None else ridge
        reason = "Ledoit-Wolf shrinkage" if ridge > floor else ("rows floor" if rows_floor > base else "floor")
        return LayerRidge(ridge, identity, prior, reason)


def peak_rss() -> int:
    """The process's peak resident memory so far (Linux reports KiB, macOS bytes)."""
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return int(peak if sys.platform == "darwin" else peak * 1024)


def _batches(data: HeldOut, batch_size: int, config: CompressConfig, desc: str):
    total = -(-len(data) // batch_size)
    return (x for x, _ in bar(data.batches(batch_size), config, desc, total, "batch"))


#: Share of the available memory the calibration statistics may take by default (the rest is the
#: model, its copies and the activations of a batch; common practice, with margin)
STATS_SHARE = 0.5


#: The input Gram of a layer costs n^2 per row (flops) and 8 n^2 bytes, its output moment about
#: m^2 + m n and 8 m^2 + 4 m n: where the first is this many times the second (n above about 9 m)
#: the layer keeps the output moment whatever the memory budget, losing only its sequential refit.
#: Transformer blocks (n <= 4 m) and MobileNet-style projections (n <= 6 m) stay on the input side;
#: wide convolutions that unfold many channels times a long kernel (CREPE: n = 32-512 m, whose
#: 8k-16k-wide input Grams took 0.5-2 GiB each and most of a calibrated run) do not.
WIDE_RATIO = 8


def _much_wider(m: int, n: int) -> bool:
    return m < n and n * n >= WIDE_RATIO * (m * m + m * n)


def _output_side_bytes(m: int, n: int) -> int:
    """W G W^T (m x m, float64) and the float32 copy of W it multiplies the rows by."""
    return 8 * m * m + 4 * m * n


@dataclass
class StatisticsPlan:
    """Which statistic each layer accumulates, decided from the shapes before any pass: the input
    Gram G (n x n) where the budget allows, else the output moment W G W^T (m x m, when m < n;
    stats.OutputMoments, which also holds W in float32), else none (the layer keeps plain factors).
    Sizes in bytes: the sums are float64."""

    budget: int
    sides: dict[str, str]  # layer name -> "input" or "output"
    dropped: dict[str, int]  # layer name -> the bytes its smaller statistic would need

    @staticmethod
    def make(records: list[LayerRecord], budget: int) -> "StatisticsPlan":
        need = {r.name: 8 * r.matrix_shape[1] ** 2 for r in records}
        small = {r.name: _output_side_bytes(*r.matrix_shape) if r.matrix_shape[0] < r.matrix_shape[1]
                 else need[r.name] for r in records}
        # a layer far wider than it is tall keeps its output moment even when the budget would allow
        # the input Gram: the same factors (G non-singular) for a fraction of the work per row
        sides = {r.name: "output" if _much_wider(*r.matrix_shape) else "input" for r in records}
        total = sum(small[n] if side == "output" else need[n] for n, side in sides.items())
        # the layers that save most by switching go first, so the fewest layers lose the input side
        for r in sorted(records, key=lambda r: need[r.name] - small[r.name], reverse=True):
            if total <= budget:
                break
            m, n = r.matrix_shape
            if m < n and sides[r.name] == "input":
                sides[r.name] = "output"
                total -= need[r.name] - small[r.name]
        dropped = {}
        for r in sorted(records, key=lambda r: small[r.name], reverse=True):
            if total <= budget:
                break
            held = need[r.name] if sides[r.name] == "input" else small[r.name]
            dropped[r.name] = small[r.name]
            sides.pop(r.name)
            total -= held
        return StatisticsPlan(budget, sides, dropped)

    def bytes(self, records: list[LayerRecord]) -> int:
        by = {r.name: r for r in records}
        return sum(8 * by[n].matrix_shape[1] ** 2 if side == "input" else _output_side_bytes(*by[n].matrix_shape)
                   for n, side in self.sides.items())

    def summary(self) -> dict:
        return {"memory_budget_bytes": int(self.budget),
                "output_side": sorted(n for n, s in self.sides.items() if s == "output"),
                "not_calibrated": {n: int(b) for n, b in sorted(self.dropped.items())}}


def statistics_budget(config: CompressConfig) -> int:
    """Bytes the calibration statistics may take: ``--stats-memory`` GiB, else a share of the
    memory available now."""
    from .data import _available_memory

    if config.stats_memory is not None:
        return int(config.stats_memory * 2**30)
    return int(STATS_SHARE * _available_memory())


def input_moments(backend, model, records: list[LayerRecord], batches,
                  plan: StatisticsPlan | None = None) -> tuple[dict[str, Moments], int]:
    """``G = sum x x^T`` of every record's inputs over ``batches`` (one pass), or for the layers the
    ``plan`` puts on the output side ``W G W^T``; and the sample count."""
    sides = plan.sides if plan is not None else {r.name: "input" for r in records}
    records = [r for r in records if r.name in sides]
    acc = {r.name: Moments(r.matrix_shape[1]) if sides[r.name] == "input"
           else OutputMoments(backend.weight_matrix(r).astype(np.float32)) for r in records}
    samples = backend.stream_inputs(model, records, batches, lambda name, rows: acc[name].add(rows))
    return acc, samples


def paired_moments(backend, original, current, records: list[LayerRecord], batches, runs=None) -> dict[str, CrossMoments]:
    """``C = sum x x'^T`` and ``G' = sum x' x'^T`` per record (one pass of each model, or of the
    blocks that hold them when ``runs``, a backend's paired runner, is given)."""
    acc = {r.name: CrossMoments(r.matrix_shape[1]) for r in records}
    sink = lambda name, x, y: acc[name].add(x, y)  # noqa: E731
    if runs is not None:
        runs.stream(records, sink)
    else:
        backend.stream_paired_inputs(original, current, records, batches, sink)
    return acc


def calibrate(model, records: list[LayerRecord], data: HeldOut, config: CompressConfig,
              batch_size: int | None = None, *, moments: bool = True) -> Calibration:
    """Stream the calibration set once; the Gram matrix of every selected layer's inputs (not
    computed when ``moments`` is false: methods that do not whiten only need the data)."""
    chosen = [r for r in records if r.skip_reason is None]
    batch_size = batch_size or config.batch_size
    if not moments:
        return Calibration(data, {}, [], config.ridge, 0, batch_size, 0)
    backend = backend_for(model)
    plan = StatisticsPlan.make(chosen, statistics_budget(config))
    moments, _ = input_moments(backend, model, chosen, _batches(data, batch_size, config, "calibration"), plan)
    warnings = [f"layer {name!r}: its calibration statistics would need {need / 2**30:.1f} GiB, more than the "
                f"budget of {plan.budget / 2**30:.1f} GiB allows (--stats-memory); it keeps plain SVD factors"
                for name, need in plan.dropped.items()]
    for record in (r for r in chosen if r.name in moments):
        st = moments[record.name]
        if st.gram is None:
            raise InputError(f"--calibration {data.source}: layer {record.name!r} never ran on the calibration inputs")
        n = record.matrix_shape[1]
        if st.rows < n:
            warnings.append(
                f"layer {record.name!r}: {st.rows} calibration rows for {n} input features; its input "
                + (f"second moment is rank-deficient (a ridge of {config.ridge:g} x its mean diagonal keeps it usable)"
                   if config.ridge > 0 else "second moment is rank-deficient and was only floored (--ridge 0)")
            )
    gram_bytes = int(sum(st.nbytes for st in moments.values()))
    return Calibration(data, moments, warnings, config.ridge, gram_bytes, batch_size, rows_ridge=config.rows_ridge,
                       plan=plan)


def groups_in_order(stages: list[list[str]], records: dict[str, LayerRecord], groups: int,
                    limit: int = PAIRED_BYTES) -> list[list[str]]:
    """Consecutive ``stages`` merged into at most ``groups`` groups of near-equal length, each cut
    further (between layers) where its paired moments (2 n^2 float64 per layer) would exceed
    ``limit``."""
    size = -(-len(stages) // max(1, min(groups, len(stages))))
    out = []
    for start in range(0, len(stages), size):
        current, used = [], 0
        for name in (n for stage in stages[start:start + size] for n in stage):
            need = 2 * 8 * records[name].matrix_shape[1] ** 2
            if current and used + need > limit:
                out.append(current)
                current, used = [], 0
            current.append(name)
            used += need
        out.append(current)
    return out


def sequential_refit(model, records: list[LayerRecord], ranks: dict, cal: Calibration, config: CompressConfig,
                     stages: list[list[str]], fixed=None):  # fixed: needed when cal has output-side layers
    """Refit the factorized layers to the *original* outputs from the inputs that the compressed
    layers upstream produce (reduced-rank regression, then whitened truncation), group by group in
    forward ``order``, on one working copy patched in place.

    The working copy starts dense. Group g is fitted from one paired pass in which the groups
    before it are already refitted and those from g on are still dense: a layer compensates the
    errors of the groups upstream, never errors that a later refit would change (a layer fitted to
    inputs that upstream layers will still move over-corrects: measured on the patch encoder at
    params=0.1, fitting every layer in one pass after whitened truncation upstream kept 11.9% top-1
    against 87.4% for one layer at a time). With one layer per group this is the exact layer-by-
    layer refit; ``config.sequential_groups`` caps the number of groups, hence of passes.

    Layers whose input statistics did not fit the memory budget (output side only, or none) are
    not refitted: their factors come from ``fixed`` (the plan's factors, ``{name: (A, X)}``) and
    they enter the working copy with their group.

    Returns (the working copy, per-layer fit records, per-layer relative weight errors).
    """
    backend = backend_for(model)
    by_name = {r.name: r for r in records}
    chosen = [kept for stage in stages if (kept := [n for n in stage if ranks.get(n) is not None])]
    working = backend.rewrite(model, records, {})  # one dense copy, patched group by group
    fits, errors = {}, {}
    groups = groups_in_order(chosen, by_name, config.sequential_groups)
    batches = [x for x, _ in cal.data.batches(cal.batch_size)]
    kept = {n for g in groups for n in g if cal.output_side(n) or cal.uncalibrated(n)}
    if kept and fixed is None:  # a caller's bug: these layers have no n x n statistics to refit from
        raise ValueError(f"sequential_refit: layers {sorted(kept)} kept no input moments; pass their factors as fixed")
    runs = backend.paired_runs(model, working, [by_name[n] for g in groups for n in g if n not in kept], batches)
    for group in bar(groups, config, "sequential refit", unit="group"):
        refit = [n for n in group if n not in kept]
        acc = paired_moments(backend, model, working, [by_name[n] for n in refit], batches, runs) if refit else {}
        done = {}
        for name in (n for n in group if n in kept):
            a, x = done[name] = fixed[name]
            errors[name] = weight_error(backend.weight_matrix(by_name[name]), a, x)
        for name in refit:
            st = acc.pop(name)
            # the same ridge on both moments: where the calibration data says nothing, M stays W.
            # A BatchNorm's statistics describe the original model's inputs of this layer: they are
            # the ridge's target only while no layer upstream has moved them (drift 0); after that
            # the target is the identity, as without them (measured on EfficientNet-Lite0 at
            # params=0.7, classifier refitted behind factorized convolutions: 47.6% agreement with
            # the stale target, 53.4% with the identity; reports/accuracy_pretrained.md)
            drift = st.drift
            prior = cal.prior_for(name) if drift <= DRIFT_TOL else None
            alpha = cal.ridge_for(name) if prior is not None else cal.identity_ridge_for(name)
            wh_new = whitening(ridge(st.gram, alpha, prior=prior, base=cal.ridge))
            w = backend.weight_matrix(by_name[name])
            product = regression_product(w, ridge(st.cross, alpha, st.gram, prior=prior, base=cal.ridge), wh_new)  # M S'
            del st
            record = by_name[name]
            if record.row_scale is None or not config.bn_weights:
                dec = Whitened.decompose_product(name, product, wh_new, dtype=record.dtype)
            else:  # the error after the BatchNorm that reads this layer (methods.row_weighted)
                d = floored_scale(record.row_scale)
                dec = unscale_rows(Whitened.decompose_product(name, product * d[:, None], wh_new, dtype=record.dtype),
                                   d, record.scaled_by)
            a, x = done[name] = dec.factors(ranks[name], config.split)
            errors[name] = weight_error(w, a, x)
            fits[name] = {"method": wh_new.method, "ridge": alpha, "floor": wh_new.floor, "input_drift": float(f"{drift:.3g}"),
                          "ridge_toward": "input statistics" if prior is not None and alpha > cal.ridge else "identity"}
        working = backend.rewrite(working, records, done, in_place=True)
    cal.passes = (1 if cal.moments else 0) + len(groups)  # this budget's: the moments pass, then one per group
    return working, fits, errors


def recover(original, factorized, records, cal: Calibration, config: CompressConfig, metric: str | None) -> dict:
    """Fine-tune the factor pairs on the calibration inputs (a backend capability; the resolver
    refused the run before any work if the backend lacks it)."""
    return backend_for(original).recover(original, factorized, cal.data.inputs, metric=metric, steps=config.recover,
                                         output=config.output, lr=config.recover_lr, seed=config.seed,
                                         quiet=config.quiet)
