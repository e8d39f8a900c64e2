"""Global rank allocation: one rank (or "stay dense") per layer so the model meets a budget.

For a shared budget (parameters or FLOPs) each layer offers a menu of options: factorized at an
allowed rank k (cost k*(m+n) per position, normalized error e(k) = sum_{i>k} s_i^2 / ||W||_F^2) or
dense (cost m*n, error 0). We minimise the summed normalized error subject to the total cost.
That is a multiple-choice knapsack; the greedy below takes, in order of decreasing error reduction
per unit of cost, the segments of each layer's lower convex hull of (cost, error) points (which is
optimal for the continuous relaxation), then spends what is left on the best single moves that
still fit. The result never exceeds the budget, and no layer is ever factorized at or above its
break-even rank, because such ranks are not on the menu.
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
        ``"params"`` or ``"flops"``: what ``cost_before``, ``cost_after`` and ``limit`` count.
    cost_before, cost_after : float
        Total cost of the selected layers before and after.
    limit : float or None
        The most the budget allows (``None`` for per-layer budgets).
    rank_multiple, min_rank : int
        Constraints the ranks were chosen under.
    """

    budget: Budget
    ranks: dict[str, int | None]
    units: str
    cost_before: float
    cost_after: float
    limit: float | None = None
    rank_multiple: int = 1
    min_rank: int = 1

    @property
    def slack(self) -> float | None:
        """How far under the budget the plan is (``limit - cost_after``)."""
        return None if self.limit is None else self.limit - self.cost_after


def allowed_ranks(m: int, n: int, *, rank_multiple: int = 1, min_rank: int = 1) -> np.ndarray:
    """Ranks the allocator may choose for an m x n matrix: multiples of ``rank_multiple``, at
    least ``min_rank``, strictly below the break-even rank (so every one saves)."""
    top = max_saving_rank(m, n)
    start = max(min_rank, rank_multiple)
    start = -(-start // rank_multiple) * rank_multiple  # round up to a multiple
    return np.arange(start, top + 1, rank_multiple, dtype=int)


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


def _options(record, spectrum, units, rank_multiple, min_rank):
    """(ranks, costs, errors) for one layer; the last option (rank -1) is "stay dense"."""
    m, n = record.matrix_shape
    w = _cost_weight(record, units)
    ranks = allowed_ranks(m, n, rank_multiple=rank_multiple, min_rank=min_rank)
    if spectrum is not None:
        ranks = ranks[ranks <= spectrum.max_rank]
        errors = 1.0 - np.asarray(spectrum.energy_fraction(ranks), dtype=float)
    else:
        errors = np.zeros(len(ranks))
    costs = np.concatenate([ranks * (m + n) * w, [m * n * w]]).astype(float)
    errors = np.concatenate([np.maximum(errors, 0.0), [0.0]])
    return np.concatenate([ranks, [-1]]), costs, errors


def units_of(budget: Budget) -> str:
    return "flops" if budget.kind == "flops" else "params"


def budget_limit(records: list[LayerRecord], budget: Budget) -> tuple[float, float]:
    """``(cost_before, limit)`` of a shared budget over the selected layers."""
    units = units_of(budget)
    before = float(
        sum(r.weight_params * _cost_weight(r, units) + _fixed_cost(r, units) for r in records)
    )
    # a count of parameters or multiply-adds is whole: round a fractional limit down
    limit = budget.value if budget.absolute else float(np.floor(budget.value * before + 1e-9))
    return before, float(limit)


def check_feasible(
    records: list[LayerRecord], budget: Budget, *, rank_multiple: int = 1, min_rank: int = 1
) -> None:
    """Refuse a shared budget that even the smallest plan cannot meet, before any SVD runs."""
    if not budget.is_global:
        return
    if not records:
        raise InputError("no layers are selected for factorization (check --only/--skip)")
    units = units_of(budget)
    before, limit = budget_limit(records, budget)
    smallest = 0.0
    for r in records:
        _, costs, _ = _options(r, None, units, rank_multiple, min_rank)
        smallest += costs[0] + _fixed_cost(r, units)
    if smallest > limit:
        raise InputError(
            f"--budget {budget.text}: allows {limit:,.0f} {units} but the smallest possible plan "
            f"(rank {max(min_rank, rank_multiple)} in every layer that can be factorized) needs "
            f"{smallest:,.0f} of the selected layers' {before:,.0f}"
        )


def allocate(
    records: list[LayerRecord],
    spectra: list[Spectrum],
    budget: Budget,
    *,
    rank_multiple: int = 1,
    min_rank: int = 1,
) -> Plan:
    """Choose a rank (or dense) for every record so the selected layers meet ``budget``.

    Parameters
    ----------
    records, spectra : lists of equal length, in the same order
    budget : Budget
    rank_multiple : int
        Every rank is a multiple of this (8 or 16 suits SIMD kernels; common practice).
    min_rank : int
        No layer is factorized below this rank.

    Returns
    -------
    Plan
    """
    if len(records) != len(spectra):
        raise ValueError(f"{len(records)} records but {len(spectra)} spectra")
    if rank_multiple < 1 or min_rank < 1:
        raise InputError(
            f"--rank-multiple and --min-rank must be at least 1; got {rank_multiple}, {min_rank}"
        )
    units = units_of(budget)
    menus = [_options(r, s, units, rank_multiple, min_rank) for r, s in zip(records, spectra)]
    fixed = sum(_fixed_cost(r, units) for r in records)
    if budget.is_global:
        check_feasible(records, budget, rank_multiple=rank_multiple, min_rank=min_rank)
        before, limit = budget_limit(records, budget)
        chosen = _greedy(menus, limit - fixed)
    else:
        before, limit = float(sum(r.params for r in records)), None
        chosen = [_per_layer_choice(errors, budget) for _, _, errors in menus]
    ranks = {}
    cost_after = float(fixed)
    for record, (opt_ranks, costs, _), idx in zip(records, menus, chosen):
        rank = int(opt_ranks[idx])
        ranks[record.name] = None if rank < 0 else rank
        cost_after += float(costs[idx])
    return Plan(budget, ranks, units, float(before), cost_after, limit, rank_multiple, min_rank)


def _per_layer_choice(errors: np.ndarray, budget: Budget) -> int:
    """Cheapest option whose normalized squared error meets an energy or error budget."""
    if budget.kind == "energy":
        ok = errors <= 1.0 - budget.value + 1e-12
    else:  # relative Frobenius error <= F  <=>  normalized squared error <= F**2
        ok = errors <= budget.value**2 + 1e-12
    return int(np.argmax(ok))  # the dense option (last) always qualifies


def _lower_hull(costs: np.ndarray, errors: np.ndarray) -> list[int]:
    """Indices of the lower convex hull of points sorted by cost (monotone chain)."""
    hull: list[int] = []
    for i in range(len(costs)):
        while len(hull) >= 2:
            a, b = hull[-2], hull[-1]
            # drop b when it lies on or above the segment a -> i
            if (errors[b] - errors[a]) * (costs[i] - costs[a]) >= (errors[i] - errors[a]) * (
                costs[b] - costs[a]
            ):
                hull.pop()
            else:
                break
        hull.append(i)
    return hull


def _best_move(menu, i: int, room: float):
    """From option ``i``, the option with the largest error reduction per unit of added cost
    among those that fit in ``room``; ``None`` when no move fits or gains anything."""
    _, costs, errors = menu
    dc = costs[i + 1 :] - costs[i]
    gain = errors[i] - errors[i + 1 :]
    fits = (dc <= room) & (gain > 0)
    if not np.any(fits):
        return None
    ratio = np.where(fits, gain / np.maximum(dc, 1e-300), -np.inf)
    j = int(np.argmax(ratio))
    return float(ratio[j]), i + 1 + j


def _greedy(menus, capacity: float) -> list[int]:
    """Indices into each menu; the summed cost stays within ``capacity``.

    A lazy max-heap holds, per layer, its best move from where it stands (the next point of its
    lower convex hull while that fits; a shorter step once it does not). A popped move that no
    longer fits the remaining room is recomputed and pushed back, so every move taken is the best
    ratio available at that moment among the moves that fit.
    """
    current = [0] * len(menus)
    spent = float(sum(costs[0] for _, costs, _ in menus))
    heap = []

    def push(layer: int) -> None:
        move = _best_move(menus[layer], current[layer], capacity - spent)
        if move is not None:
            heapq.heappush(heap, (-move[0], layer, current[layer], move[1]))

    for layer in range(len(menus)):
        push(layer)
    while heap:
        _, layer, frm, to = heapq.heappop(heap)
        if current[layer] != frm:
            continue  # stale entry
        costs = menus[layer][1]
        if spent + costs[to] - costs[frm] > capacity:
            push(layer)  # no longer fits: offer this layer's best move that does
            continue
        spent += costs[to] - costs[frm]
        current[layer] = to
        push(layer)
    return _refine(menus, current, spent, capacity)


def _fill(menus, current: list[int], spent: float, capacity: float) -> float:
    """Spend what is left on the best single move per unit cost that still fits (in place)."""
    while True:
        best = None
        for layer, menu in enumerate(menus):
            move = _best_move(menu, current[layer], capacity - spent)
            if move is not None and (best is None or move[0] > best[0]):
                best = (move[0], layer, move[1])
        if best is None:
            return spent
        _, layer, j = best
        costs = menus[layer][1]
        spent += costs[j] - costs[current[layer]]
        current[layer] = j


def _refine(menus, current: list[int], spent: float, capacity: float, max_rounds: int = 50) -> list[int]:
    """Local improvement: step one layer down (one option, or to a lower point of its convex
    hull), refill greedily, keep it if the summed error drops. Fixes most of the greedy's losses where one step is a large share of the budget
    (small layers, or the jump from a high rank to dense)."""

    def total(choice):
        return sum(errors[i] for (_, _, errors), i in zip(menus, choice))

    best_err = total(current)
    for _ in range(max_rounds):
        improved = False
        for layer in range(len(menus)):
            i = current[layer]
            costs = menus[layer][1]
            hull = _lower_hull(costs, menus[layer][2])
            for lower in sorted({i - 1, *(h for h in hull if h < i)}, reverse=True):
                if lower < 0:
                    continue
                trial = list(current)
                trial[layer] = lower
                trial_spent = _fill(menus, trial, spent - costs[i] + costs[lower], capacity)
                err = total(trial)
                if err < best_err - 1e-12:
                    current, spent, best_err, improved = trial, trial_spent, err, True
                    break
        if not improved:
            break
    return current
