"""Global rank allocation: one rank (or "stay dense") per layer so the model meets a budget.

For a shared budget (parameters or FLOPs) each layer offers a menu of options: factorized at an
allowed rank k (cost k*(m+n) per position, normalized error e(k) = sum_{i>k} s_i^2 / ||W||_F^2) or
dense (cost m*n, error 0). We minimise the summed normalized error subject to the total cost.
That is a multiple-choice knapsack. ``_plan`` takes, in order of decreasing error reduction per
unit of cost, the segments of each layer's lower convex hull of (cost, error) points (optimal for
the continuous relaxation), spends what is left on the best moves that still fit, then improves
the plan by a bounded local search (lower one layer, spend the freed room). All of it is
O(N log N) for N options in all, never quadratic in the number of layers. The result never
exceeds the budget, and no layer is ever factorized at or above its break-even rank, because
such ranks are not on the menu.

A latency budget is the same knapsack with measured costs: each option's cost is its fitted time
(costs.CostTable, whole nanoseconds), ranks no faster than the dense layer are not on the menu
(break-even by time), and the time of everything that is not a selected layer is the fixed cost.
"""

from __future__ import annotations

import heapq
from dataclasses import dataclass

import numpy as np

from .budget import Budget
from .errors import InputError
from .records import LayerRecord, max_saving_rank
from .spectra import Spectrum


@dataclass
class Plan:
    """The chosen rank of every selected layer.

    Attributes
    ----------
    budget : Budget
    ranks : dict of str to int or None
        ``None`` means the layer stays dense.
    units : str
        ``"params"``, ``"flops"`` or ``"ms"`` (a latency budget: predicted milliseconds of the
        whole model): what ``cost_before``, ``cost_after`` and ``limit`` count.
    cost_before, cost_after : float
        Total cost of the selected layers before and after.
    limit : float or None
        The most the budget allows (``None`` for per-layer budgets).
    rank_step, min_rank : int
        Constraints the ranks were chosen under.
    """

    budget: Budget
    ranks: dict[str, int | None]
    units: str
    cost_before: float
    cost_after: float
    limit: float | None = None
    rank_step: int = 1
    min_rank: int = 1

    @property
    def slack(self) -> float | None:
        """How far under the budget the plan is (``limit - cost_after``)."""
        return None if self.limit is None else self.limit - self.cost_after


def allowed_ranks(m: int, n: int, *, rank_step: int = 1, min_rank: int = 1) -> np.ndarray:
    """Ranks the allocator may choose for an m x n matrix: multiples of ``rank_step``, at
    least ``min_rank``, strictly below the break-even rank (so every one saves)."""
    top = max_saving_rank(m, n)
    start = max(min_rank, rank_step)
    start = -(-start // rank_step) * rank_step  # round up to a multiple
    return np.arange(start, top + 1, rank_step, dtype=int)


def _cost_weight(record: LayerRecord, units: str) -> int:
    if units == "flops":
        if record.positions is None:
            raise InputError(
                f"a flops budget needs each layer's output size; layer {record.name!r} has not been "
                "measured (give --heldout so a sample input can be run)"
            )
        return record.positions
    return 1


def _fixed_cost(record: LayerRecord, units: str) -> int:
    """Cost no choice can change: the bias (counted as parameters, not as multiply-adds)."""
    return record.bias_params if units == "params" else 0


NS = 1e6  # nanoseconds per millisecond: latency costs are whole nanoseconds, like the other counts


def _options(record, spectrum, units, rank_step, min_rank, effect=None, objective="error-sum", latency=None):
    """(ranks, costs, errors) for one layer; the last option (rank -1) is "stay dense"."""
    m, n = record.matrix_shape
    w = 1 if units == "ms" else _cost_weight(record, units)
    ranks = allowed_ranks(m, n, rank_step=rank_step, min_rank=min_rank)
    if spectrum is not None:
        ranks = ranks[ranks <= spectrum.max_rank]
        errors = 1.0 - np.asarray(spectrum.energy_fraction(ranks), dtype=float)
        if effect is not None:  # what reaches the model's output, not the layer's own error
            errors = effect.curve(ranks, errors)
        elif objective == "energy-product":  # -log of the kept fraction: sums to -log of the product
            errors = -np.log(np.maximum(1.0 - errors, 1e-12))
    else:
        errors = np.zeros(len(ranks))
    if units == "ms":
        ranks, costs, dense = _timed(record, ranks, latency)
        errors = errors[: len(ranks)]  # the faster ranks are a prefix (the fitted curve rises)
        costs = np.concatenate([costs, [dense]])
    else:
        costs = np.concatenate([ranks * (m + n) * w, [m * n * w]]).astype(float)
    errors = np.concatenate([np.maximum(errors, 0.0), [0.0]])
    return np.concatenate([ranks, [-1]]), costs, errors


def _timed(record, ranks: np.ndarray, latency) -> tuple[np.ndarray, np.ndarray, float]:
    """The ranks faster than dense, their fitted times and the dense time, in whole nanoseconds
    (strictly rising, so no two options cost the same)."""
    table = latency.tables.get(record.name)
    if table is None:  # not reached by the timed batch: it costs nothing, so it stays dense
        return ranks[:0], np.zeros(0), 0.0
    scale = latency.layer_scale
    dense = float(np.round(table.dense_ms * scale * NS))
    ranks = table.faster_ranks(ranks)  # break-even by time: a prefix, since the fitted curve rises
    t = np.round(table.time_ms(ranks) * scale * NS)
    steps = np.arange(len(t))
    t = np.maximum.accumulate(t - steps) + steps  # rising by at least 1 ns per option
    keep = int(np.searchsorted(t, dense, side="left"))  # still below dense once whole nanoseconds
    return ranks[:keep], t[:keep].astype(float), dense


def units_of(budget: Budget) -> str:
    return {"flops": "flops", "latency": "ms"}.get(budget.kind, "params")


def budget_limit(records: list[LayerRecord], budget: Budget, latency=None) -> tuple[float, float]:
    """``(cost_before, limit)`` of a shared budget over the selected layers (for latency: of the
    whole model's measured time, in nanoseconds)."""
    units = units_of(budget)
    if units == "ms":
        before = float(np.round(latency.whole_ms * NS))
        limit = budget.value * NS if budget.absolute else budget.value * before
        return before, float(np.floor(limit + 1e-9))
    before = float(
        sum(r.weight_params * _cost_weight(r, units) + _fixed_cost(r, units) for r in records)
    )
    # a count of parameters or multiply-adds is whole: round a fractional limit down
    limit = budget.value if budget.absolute else float(np.floor(budget.value * before + 1e-9))
    return before, float(limit)


def check_feasible(
    records: list[LayerRecord], budget: Budget, *, rank_step: int = 1, min_rank: int = 1, latency=None
) -> None:
    """Refuse a shared budget that even the smallest plan cannot meet, before any SVD runs (a
    latency budget once its costs are measured: without them it is not checked here)."""
    if not budget.is_global:
        return
    if not records:
        raise InputError("no layers are selected for factorization (check --only/--skip)")
    units = units_of(budget)
    if units == "ms":
        if latency is not None:
            _check_latency(records, budget, rank_step, min_rank, latency)
        return
    before, limit = budget_limit(records, budget)
    smallest = 0.0
    for r in records:
        _, costs, _ = _options(r, None, units, rank_step, min_rank)
        smallest += costs[0] + _fixed_cost(r, units)
    if smallest > limit:
        raise InputError(
            f"--budget {budget.text}: allows {limit:,.0f} {units} but the smallest possible plan "
            f"(rank {max(min_rank, rank_step)} in every layer that can be factorized) needs "
            f"{smallest:,.0f} of the selected layers' {before:,.0f}"
        )


def _fixed_ns(latency) -> float:
    return float(np.round(latency.rest_ms * NS))


def _check_latency(records, budget, rank_step, min_rank, latency) -> None:
    before, limit = budget_limit(records, budget, latency)
    fastest = _fixed_ns(latency) + sum(
        float(_options(r, None, "ms", rank_step, min_rank, latency=latency)[1][0]) for r in records)
    if fastest > limit:
        raise InputError(
            f"--budget {budget.text}: allows {limit / NS:.3f} ms but the fastest plan (every layer at its fastest "
            f"rank, those no rank speeds up dense) is predicted at {fastest / NS:.3f} ms, "
            f"{fastest / before:.2f} of the original's measured {before / NS:.3f} ms; everything that is not a "
            f"selected layer takes {latency.rest_ms:.3f} ms ({latency.source})")


def allocate(
    records: list[LayerRecord],
    spectra: list[Spectrum],
    budget: Budget,
    *,
    rank_step: int = 1,
    min_rank: int = 1,
    effects: list | None = None,
    objective: str = "error-sum",
    latency=None,
) -> Plan:
    """Choose a rank (or dense) for every record so the selected layers meet ``budget``.

    Parameters
    ----------
    records, spectra : lists of equal length, in the same order
    budget : Budget
    rank_step : int
        Every rank is a multiple of this (8 or 16 suits SIMD kernels; common practice).
    min_rank : int
        No layer is factorized below this rank.
    effects : list of effects.Effect or None, optional
        Each layer's measured effect on the model output: the allocator then minimises the summed
        estimated output error instead of the layers' own errors.
    objective : str
        Without effects: ``"error-sum"`` minimises the summed normalized errors e_l;
        ``"energy-product"`` minimises the summed -log(1 - e_l), i.e. keeps the most of the product
        of kept energy fractions. Both agree for small errors; the product refuses to crush one
        layer (e_l -> 1 costs without bound) to spare a little in many.
    latency : costs.LatencyProfile or None, optional
        Measured costs; required by a latency budget (and read only by one).

    Returns
    -------
    Plan
    """
    if len(records) != len(spectra):
        raise ValueError(f"{len(records)} records but {len(spectra)} spectra")
    if rank_step < 1 or min_rank < 1:
        raise InputError(
            f"--rank-step and --min-rank must be at least 1; got {rank_step}, {min_rank}"
        )
    units = units_of(budget)
    if units == "ms" and latency is None:
        raise InputError(f"--budget {budget.text}: a latency budget needs measured costs: give --heldout (a batch "
                         "to time) or --latency-profile")
    effects = effects if effects is not None else [None] * len(records)
    menus = [_options(r, s, units, rank_step, min_rank, e, objective, latency)
             for r, s, e in zip(records, spectra, effects)]
    fixed = _fixed_ns(latency) if units == "ms" else sum(_fixed_cost(r, units) for r in records)
    if budget.is_global:
        check_feasible(records, budget, rank_step=rank_step, min_rank=min_rank, latency=latency)
        before, limit = budget_limit(records, budget, latency)
        chosen = _plan(menus, limit - fixed)
    else:
        before, limit = float(sum(r.params for r in records)), None
        chosen = [_per_layer_choice(errors, budget) for _, _, errors in menus]
    ranks = {}
    cost_after = float(fixed)
    for record, (opt_ranks, costs, _), idx in zip(records, menus, chosen):
        rank = int(opt_ranks[idx])
        ranks[record.name] = None if rank < 0 else rank
        cost_after += float(costs[idx])
    if units == "ms":  # nanoseconds were for exact room arithmetic; the plan states milliseconds
        before, cost_after, limit = before / NS, cost_after / NS, limit / NS
    return Plan(budget, ranks, units, float(before), cost_after, limit, rank_step, min_rank)


def _per_layer_choice(errors: np.ndarray, budget: Budget) -> int:
    """Cheapest option whose normalized squared error meets an energy or error budget."""
    if budget.kind == "energy":
        ok = errors <= 1.0 - budget.value + 1e-12
    else:  # relative Frobenius error <= F  <=>  normalized squared error <= F**2
        ok = errors <= budget.value**2 + 1e-12
    return int(np.argmax(ok))  # the dense option (last) always qualifies


def _lower_hull(costs: np.ndarray, errors: np.ndarray) -> list[int]:
    """Indices of the lower convex hull of points sorted by cost (monotone chain, O(n))."""
    c, e = costs.tolist(), errors.tolist()  # plain floats: numpy scalars would make this loop slow
    hull: list[int] = []
    for i in range(len(c)):
        while len(hull) >= 2:
            a, b = hull[-2], hull[-1]
            # drop b when it lies on or above the segment a -> i
            if (e[b] - e[a]) * (c[i] - c[a]) >= (e[i] - e[a]) * (c[b] - c[a]):
                hull.pop()
            else:
                break
        hull.append(i)
    return hull


def _best_move(costs: np.ndarray, errors: np.ndarray, i: int, room: float):
    """From option ``i``, ``(ratio, j)`` for the option j > i with the largest error reduction per
    unit of added cost among those that fit in ``room``; ``None`` when none fits and gains."""
    stop = int(np.searchsorted(costs, costs[i] + room, side="right"))  # costs ascend: a prefix fits
    if stop <= i + 1:
        return None
    ratio = (errors[i] - errors[i + 1 : stop]) / (costs[i + 1 : stop] - costs[i])
    j = int(np.argmax(ratio))
    return (float(ratio[j]), i + 1 + j) if ratio[j] > 0 else None


def _plan(menus, capacity: float) -> list[int]:
    """Indices into each menu whose summed cost stays within ``capacity``.

    With L layers and N options in all, per budget:

    1. Hull greedy, O(N log N). The segments of every layer's lower convex hull of (cost, error),
       taken in order of decreasing -de/dc while they fit, solve the continuous relaxation up to
       the first segment that does not fit. Slopes fall along each hull, so one global sort gives
       the order a lazy heap over the layers would produce.
    2. ``_fill`` spends the rest (less than that segment's cost) on the best ratio moves that fit.
    3. ``_improve``: at most ROUNDS rounds, each O(N log N) to score every step-down plus TRIES
       exact evaluations (a fill each).

    A fill costs O(n + log L) per move taken or re-offered (n: that layer's options) and only
    spends a remainder (under one hull segment, or the room one step-down freed), so it takes
    few moves. A budget thus costs O(N log N) times the constants ROUNDS and TRIES: no phase
    loops over pairs of layers. Costs are whole numbers, so with the capacity rounded down all
    room arithmetic is exact and the plan never exceeds it.
    """
    costs, errors = [c for _, c, _ in menus], [e for _, _, e in menus]
    room = float(np.floor(capacity)) - sum(float(c[0]) for c in costs)
    segs = []
    for l, (c, e) in enumerate(zip(costs, errors)):
        hull = np.asarray(_lower_hull(c, e))
        dc, gain = np.diff(c[hull]), -np.diff(e[hull])
        keep = gain > 0  # an exhausted spectrum's flat tail gains nothing
        segs.append((np.full(int(keep.sum()), l), hull[1:][keep], dc[keep], gain[keep] / dc[keep]))
    layer, to, dc, ratio = (np.concatenate(parts) for parts in zip(*segs))
    order = np.lexsort((layer, -ratio))  # steepest first; ties by layer, as the heap did
    fits = np.cumsum(dc[order]) <= room
    taken = order[: len(fits) if fits.all() else int(np.argmin(fits))]
    current = np.zeros(len(menus), dtype=int)
    np.maximum.at(current, layer[taken], to[taken])  # a layer ends at its last segment taken
    current = current.tolist()
    room, _ = _fill(costs, errors, current, room - float(dc[taken].sum()), range(len(menus)))
    return _improve(costs, errors, current, room)


def _fill(costs, errors, current: list[int], room: float, layers) -> tuple[float, float]:
    """Take the best ratio move that fits, again and again, from ``current`` (changed in place)
    among ``layers``; returns ``(room left, error removed)``.

    A lazy heap holds each layer's best move as found at some earlier, larger room. The room only
    shrinks, so that ratio bounds what the layer offers now: a popped move that still fits is the
    best of all, and one that does not is recomputed and pushed back.
    """
    heap: list = []

    def offer(l: int, room: float) -> None:
        move = _best_move(costs[l], errors[l], current[l], room)
        if move is not None:
            heapq.heappush(heap, (-move[0], l, current[l], move[1]))

    for l in sorted(set(layers)):
        offer(l, room)
    gained = 0.0
    while heap:
        _, l, frm, j = heapq.heappop(heap)
        step = float(costs[l][j] - costs[l][frm])
        if step > room:
            offer(l, room)  # no longer fits: offer this layer's best move that does
            continue
        room -= step
        gained += float(errors[l][frm] - errors[l][j])
        current[l] = j
        offer(l, room)
    return room, gained


def _single_moves(costs, errors, current: list[int]):
    """Every layer's single moves up from where it stands, sorted by added cost ``dc``, and for
    each prefix (each room r, found by ``searchsorted``) the fitting move with the largest error
    reduction plus the best one of any *other* layer, so a query can leave out the layer that
    made the room. Within a layer the reduction never falls as dc grows, so the two leaders are a
    running top-2 over layers: O(N log N).

    Returns ``(dc, layer, option, gain, first, second)``; ``first``/``second`` are positions into
    the sorted arrays (-1: none). Every array but dc ends in a sentinel that position -1 reads.
    """
    parts = [(c[i + 1 :] - c[i], e[i] - e[i + 1 :], np.full(len(c) - i - 1, l), np.arange(i + 1, len(c)))
             for l, (c, e, i) in enumerate(zip(costs, errors, current))]
    dc, gain, layer, option = (np.concatenate(p) for p in zip(*parts))
    order = np.argsort(dc, kind="stable")
    dc, gain, layer, option = dc[order], gain[order], layer[order], option[order]
    first, second = [], []
    b1 = b2 = lead = -1
    g1 = g2 = 0.0
    for p, (g, l) in enumerate(zip(gain.tolist(), layer.tolist())):
        if l == lead:
            if g > g1:
                g1, b1 = g, p
        elif g > g1:
            g2, b2, g1, b1, lead = g1, b1, g, p, l  # the old leader is now the best other layer
        elif g > g2:
            g2, b2 = g, p
        first.append(b1)
        second.append(b2)
    return (dc, np.append(layer, -1), np.append(option, -1), np.append(gain, 0.0),
            np.array(first + [-1]), np.array(second + [-1]))


def _trial(costs, errors, current, room, steps, moves):
    """Apply ``moves`` ((layer, option) pairs) to a copy of ``current``, then fill: returns
    ``(change of the summed error, new state, room left)``, or ``None`` if the moves overrun."""
    trial, change = list(current), 0.0
    for l, j in moves:
        room -= float(costs[l][j] - costs[l][trial[l]])
        change += float(errors[l][j] - errors[l][trial[l]])
        trial[l] = j
    if room < 0:
        return None
    # a layer whose smallest step does not fit cannot move; the moved layers' steps changed
    layers = {l for l, _ in moves} | set(np.flatnonzero(steps <= room).tolist())
    room, gained = _fill(costs, errors, trial, room, layers)
    return change - gained, trial, room


# Bounds of the local search. On the tests' brute-force cases 8 and 200 tries per round gave the
# same plans, and BERT-sized models (6 to 200 layers) stopped after 1 to 3 rounds: a margin.
ROUNDS, TRIES = 20, 32


def _improve(costs, errors, current: list[int], room: float) -> list[int]:
    """Local search: lower one layer to any cheaper option, spend the freed room, keep the change
    if the summed error drops.

    A fill per candidate (all N of them) would be quadratic, so each step-down l: i -> k is first
    scored as its loss e_l(k) - e_l(i) minus the largest single-move gain of another layer within
    the freed room (``_single_moves``, O(log N) a query). That pair exchange is one of the trials,
    so a negative score (on the state it was scored on) is a sure improvement. The TRIES best
    scored are then evaluated exactly (step-down then fill; step-down, the pair move, then fill)
    and improvements are taken as found; a round without one ends the search.
    """
    def next_step(l: int) -> float:  # cost of the cheapest move up (inf at the last option)
        i = current[l]
        return float(costs[l][i + 1] - costs[l][i]) if i + 1 < len(costs[l]) else np.inf

    steps = np.array([next_step(l) for l in range(len(costs))])
    for _ in range(ROUNDS):
        dc, m_layer, m_option, m_gain, first, second = _single_moves(costs, errors, current)
        down = [(l, i) for l, i in enumerate(current) if i > 0]
        if not down:
            break
        lay = np.concatenate([np.full(i, l) for l, i in down])
        low = np.concatenate([np.arange(i) for _, i in down])
        freed = np.concatenate([costs[l][i] - costs[l][:i] for l, i in down])
        loss = np.concatenate([errors[l][:i] - errors[l][i] for l, i in down])
        at = np.searchsorted(dc, room + freed, side="right") - 1  # -1: no move fits
        pick = np.where(m_layer[first[at]] == lay, second[at], first[at])
        score = loss - m_gain[pick]
        touched: set[int] = set()
        for c in np.argsort(score, kind="stable")[:TRIES].tolist():
            l, k, b = int(lay[c]), int(low[c]), int(m_layer[pick[c]])
            if l in touched:
                continue  # scored from a position this layer has since left
            trials = [[(l, k)]]
            if b >= 0 and b not in touched:
                trials.append([(l, k), (b, int(m_option[pick[c]]))])
            outcomes = [o for o in (_trial(costs, errors, current, room, steps, t) for t in trials) if o]
            change, trial, left = min(outcomes, key=lambda o: o[0])  # the step-down alone always fits
            if change < -1e-12:
                changed = [i for i, (a, z) in enumerate(zip(trial, current)) if a != z]
                current[:], room = trial, left
                touched.update(changed)
                steps[changed] = [next_step(i) for i in changed]
        if not touched:
            break
    return current
