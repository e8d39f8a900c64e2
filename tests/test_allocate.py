"""Budgets and the global rank allocator."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from factorize_weights.allocate import _options, allocate, allowed_ranks, check_feasible
from factorize_weights.budget import parse_budget
from factorize_weights.errors import InputError
from factorize_weights.records import LayerRecord, break_even_rank
from factorize_weights.spectra import Spectrum


def layer(name, m, n, s, bias=True):
    s = np.sort(np.asarray(s, dtype=float))[::-1]
    rec = LayerRecord(name, "linear", (m, n), (m, n), bias, "float32")
    return rec, Spectrum(name, (m, n), s, float(np.sum(s**2)))


def summed_error(recs, specs, ranks):
    return sum(0.0 if ranks[r.name] is None else 1 - s.energy_fraction(ranks[r.name]) for r, s in zip(recs, specs))


@pytest.mark.parametrize(
    "text, kind, value, absolute",
    [("params=0.3", "params", 0.3, False), ("params=1.2M", "params", 1.2e6, True),
     ("params=120000", "params", 120000, True), ("params=1", "params", 1.0, False),
     ("flops=0.5", "flops", 0.5, False), ("energy=0.9", "energy", 0.9, False),
     ("error=0.1", "error", 0.1, False), (" PARAMS = 2k ", "params", 2000, True)],
)
def test_parse_budget(text, kind, value, absolute):
    b = parse_budget(text)
    assert (b.kind, b.value, b.absolute) == (kind, value, absolute)


@pytest.mark.parametrize(
    "text, message",
    [("params", "expected KIND=VALUE"), ("size=0.3", "unknown kind 'size'"),
     ("params=-0.2", "params must be positive"), ("params=1.5", r"fraction must be in \(0, 1\]"),
     ("params=0", r"fraction must be in \(0, 1\]"), ("energy=1.2", r"energy fraction must be in \(0, 1\]"),
     ("error=1", r"relative error must be in \[0, 1\)"), ("energy=5k", "plain fraction"),
     ("params=abc", "is not a number")],
)
def test_bad_budgets_are_refused_with_the_rule(text, message):
    with pytest.raises(InputError, match=message):
        parse_budget(text)


def test_allowed_ranks_stay_below_break_even_and_follow_the_multiple():
    assert list(allowed_ranks(10, 10)) == [1, 2, 3, 4]  # break-even floor(100/20) = 5
    assert list(allowed_ranks(512, 512, rank_multiple=64)) == [64, 128, 192]  # < 256
    assert list(allowed_ranks(10, 256, rank_multiple=16)) == []  # break-even 9: no multiple of 16
    assert list(allowed_ranks(64, 64, min_rank=20, rank_multiple=8)) == [24]  # 32 is break-even


def test_global_allocation_prefers_the_compressible_layer():
    # one layer with a steep spectrum, one flat: at the same budget the allocator gives the flat
    # layer far more rank, and beats a uniform rank (DESIGN.md: global allocation beats uniform)
    steep = layer("steep", 200, 200, 10 * 0.8 ** np.arange(200))
    flat = layer("flat", 200, 200, np.linspace(1.0, 0.9, 200))
    recs, specs = zip(steep, flat)
    plan = allocate(list(recs), list(specs), parse_budget("params=0.4"))
    assert plan.ranks["flat"] is None or plan.ranks["flat"] > 4 * plan.ranks["steep"]
    assert plan.cost_after <= plan.limit
    uniform_rank = 39  # 2 * 39 * 400 + biases <= 0.4 * (2 * 40,200): what a user writes by hand
    uniform = {"steep": uniform_rank, "flat": uniform_rank}
    # measured: 0.64 against 0.79 (the flat layer is incompressible by construction)
    assert summed_error(recs, specs, plan.ranks) < summed_error(recs, specs, uniform) - 0.1


@settings(max_examples=150, deadline=None)
@given(
    shapes=st.lists(st.tuples(st.integers(2, 90), st.integers(2, 90)), min_size=1, max_size=6),
    fraction=st.floats(0.05, 1.0),
    multiple=st.sampled_from([1, 1, 4, 8]),
    seed=st.integers(0, 10_000),
)
def test_params_budget_is_never_exceeded_and_no_rank_reaches_break_even(shapes, fraction, multiple, seed):
    rng = np.random.default_rng(seed)
    recs, specs = [], []
    for i, (m, n) in enumerate(shapes):
        r, s = layer(f"l{i}", m, n, rng.gamma(0.5, size=min(m, n)), bias=bool(i % 2))
        recs.append(r)
        specs.append(s)
    budget = parse_budget(f"params={fraction}")
    try:
        plan = allocate(recs, specs, budget, rank_multiple=multiple)
    except InputError as exc:
        assert "smallest possible plan" in str(exc)
        return
    used = sum(r.factorized_params(plan.ranks[r.name]) for r in recs)
    assert used == plan.cost_after <= plan.limit <= fraction * sum(r.params for r in recs) + 1e-6
    for r in recs:
        k = plan.ranks[r.name]
        if k is not None:
            assert 1 <= k < break_even_rank(*r.matrix_shape) and k % multiple == 0


def test_allocation_is_close_to_brute_force_optimum():
    # exhaustive search over every combination of options (three small layers) is the oracle
    rng = np.random.default_rng(3)
    gaps = []
    for _ in range(30):
        recs, specs = [], []
        for i in range(3):
            m, n = (int(v) for v in rng.integers(16, 48, 2))
            r, s = layer(f"l{i}", m, n, rng.gamma(0.3 + 2 * rng.random(), size=min(m, n)), bias=False)
            recs.append(r)
            specs.append(s)
        budget = parse_budget(f"params={rng.uniform(0.15, 0.9):.3f}")
        plan = allocate(recs, specs, budget)
        menus = [_options(r, s, "params", 1, 1) for r, s in zip(recs, specs)]
        best = min(
            sum(mn[2][i] for mn, i in zip(menus, combo))
            for combo in itertools.product(*(range(len(mn[0])) for mn in menus))
            if sum(mn[1][i] for mn, i in zip(menus, combo)) <= plan.limit
        )
        gaps.append(summed_error(recs, specs, plan.ranks) - best)
    # measured: mean gap ~0.004, worst ~0.04 of summed normalized squared error
    assert min(gaps) >= -1e-12 and np.mean(gaps) < 0.01 and max(gaps) < 0.06


def test_more_budget_never_gives_more_error():
    rng = np.random.default_rng(4)
    recs, specs = zip(*(layer(f"l{i}", 64, 96, rng.gamma(0.7, size=64)) for i in range(4)))
    errs = [summed_error(recs, specs, allocate(list(recs), list(specs), parse_budget(f"params={f}")).ranks)
            for f in (0.1, 0.2, 0.3, 0.5, 0.7, 1.0)]
    assert all(a >= b - 1e-12 for a, b in zip(errs, errs[1:]))
    assert errs[-1] == 0.0  # params=1 keeps every layer dense


def test_energy_and_error_budgets_hold_per_layer_with_the_smallest_rank():
    rng = np.random.default_rng(5)
    recs, specs = zip(*(layer(f"l{i}", 80, 120, rng.gamma(0.4, size=80)) for i in range(3)))
    plan = allocate(list(recs), list(specs), parse_budget("energy=0.8"))
    for r, s in zip(recs, specs):
        k = plan.ranks[r.name]
        if k is not None:
            assert s.energy_fraction(k) >= 0.8 and (k == 1 or s.energy_fraction(k - 1) < 0.8)
    plan = allocate(list(recs), list(specs), parse_budget("error=0.3"))
    for r, s in zip(recs, specs):
        k = plan.ranks[r.name]
        if k is not None:
            assert s.relative_error(k) <= 0.3 and (k == 1 or s.relative_error(k - 1) > 0.3)


def test_energy_budget_needing_break_even_keeps_the_layer_dense():
    flat = layer("flat", 50, 50, np.ones(50))  # 99% energy needs rank 50 > break-even 25
    plan = allocate([flat[0]], [flat[1]], parse_budget("energy=0.99"))
    assert plan.ranks["flat"] is None


def test_infeasible_budget_is_refused_before_any_work():
    rec, _ = layer("enc.fc", 512, 512, np.ones(512))
    with pytest.raises(InputError, match=r"params=0.001: allows 262 params but the smallest possible plan .* needs 1,536"):
        check_feasible([rec], parse_budget("params=0.001"))
    with pytest.raises(InputError, match="smallest possible plan"):
        check_feasible([rec], parse_budget("params=100"))


def test_absolute_budget():
    rng = np.random.default_rng(6)
    recs, specs = zip(*(layer(f"l{i}", 100, 100, rng.gamma(0.5, size=100)) for i in range(2)))
    plan = allocate(list(recs), list(specs), parse_budget("params=8k"))
    assert plan.limit == 8000 and plan.cost_after <= 8000 and plan.slack == 8000 - plan.cost_after
