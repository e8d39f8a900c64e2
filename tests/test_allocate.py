"""Budgets and the global rank allocator."""

from __future__ import annotations

import itertools
import time
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from factorize_weights.allocate import _options, _single_moves, allocate, allowed_ranks, check_feasible
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
    assert list(allowed_ranks(512, 512, rank_step=64)) == [64, 128, 192]  # < 256
    assert list(allowed_ranks(10, 256, rank_step=16)) == []  # break-even 9: no multiple of 16
    assert list(allowed_ranks(64, 64, min_rank=20, rank_step=8)) == [24]  # 32 is break-even


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
        plan = allocate(recs, specs, budget, rank_step=multiple)
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
    # the allocator at commit 862753b (greedy + quadratic refinement) measured on these 30 cases:
    # mean gap 0.005872, worst 0.029876 (15 of 30 off the optimum); the bounds below are those.
    # The near-linear allocator measured: mean 0.000607, worst 0.008337 (3 of 30 off).
    assert min(gaps) >= -1e-12 and np.mean(gaps) <= 0.005873 and max(gaps) <= 0.029877


def brute_force_optimum(recs, specs, multiple, limit):
    """Smallest summed error over every combination of options within ``limit`` (enumerated with
    numpy outer sums: the same exhaustive search, just vectorized)."""
    cost, err = np.zeros(1), np.zeros(1)
    for r, s in zip(recs, specs):
        _, c, e = _options(r, s, "params", multiple, 1)
        cost, err = np.add.outer(cost, c + r.bias_params).ravel(), np.add.outer(err, e).ravel()
    return float(err[cost <= limit].min())


def test_gap_to_brute_force_is_no_worse_than_before_on_many_small_cases():
    # oracle: exhaustive enumeration of every combination of options (brute_force_optimum).
    # 300 seeded cases of 2-4 layers, rank multiples 1/2/4, biases, and rank-deficient spectra
    # (options that gain nothing), so the allocator's ties and flat tails are exercised too.
    rng = np.random.default_rng(11)
    gaps = []
    for _ in range(300):
        recs, specs = [], []
        for i in range(int(rng.integers(2, 5))):
            m, n = (int(v) for v in rng.integers(4, 40, 2))
            s = rng.gamma(0.2 + 2 * rng.random(), size=min(m, n))
            if rng.random() < 0.2:
                s[int(rng.integers(1, len(s) + 1)):] = 0.0
            r, sp = layer(f"l{i}", m, n, s, bias=bool(rng.integers(2)))
            recs.append(r)
            specs.append(sp)
        budget = parse_budget(f"params={rng.uniform(0.1, 0.95):.3f}")
        multiple = int(rng.choice([1, 1, 2, 4]))
        try:
            plan = allocate(recs, specs, budget, rank_step=multiple)
        except InputError:
            continue  # infeasible: refused up front (tested elsewhere)
        # oracle for the capacity: an independent recount of each layer's parameters
        assert sum(r.factorized_params(plan.ranks[r.name]) for r in recs) == plan.cost_after <= plan.limit
        gaps.append(summed_error(recs, specs, plan.ranks) - brute_force_optimum(recs, specs, multiple, plan.limit))
    assert len(gaps) == 251  # the feasible cases: the numbers below are over exactly these
    # the allocator at commit 862753b measured on these cases: mean gap 0.0019150, worst 0.12570
    # (28 of 251 off the optimum); the bounds below are those. The near-linear allocator measured:
    # mean 0.0000526, worst 0.00719 (2 of 251 off).
    assert min(gaps) >= -1e-12 and np.mean(gaps) <= 0.0019151 and max(gaps) <= 0.12570


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


def test_single_move_envelope_matches_a_direct_search():
    # oracle: for each room and each excluded layer, the largest single-move gain of any other
    # layer found by scanning every option directly
    rng = np.random.default_rng(8)
    for _ in range(20):
        costs, errors, current = [], [], []
        for _ in range(int(rng.integers(1, 6))):
            n = int(rng.integers(1, 8))
            costs.append(np.cumsum(rng.integers(1, 5, n)).astype(float))
            errors.append(np.sort(rng.choice([0.0, 0.1, 0.2, 0.5, 0.7, 1.0], n))[::-1].copy())
            current.append(int(rng.integers(n)))
        dc, layer, _, gain, first, second = _single_moves(costs, errors, current)
        for room in range(0, 25):
            at = np.searchsorted(dc, room, side="right") - 1
            for excluded in range(-1, len(costs)):
                direct = max([errors[l][current[l]] - errors[l][j] for l in range(len(costs)) if l != excluded
                              for j in range(current[l] + 1, len(costs[l]))
                              if costs[l][j] - costs[l][current[l]] <= room] + [0.0])
                pick = second[at] if layer[first[at]] == excluded else first[at]
                assert gain[pick] == pytest.approx(direct, abs=1e-15)


def _svd_spectra(model, recs):
    """Plain (exact) SVD spectra of the selected layers' matrix views, straight from the weights."""
    modules = dict(model.named_modules())
    specs = []
    for r in recs:
        w = modules[r.name].weight.detach().double().numpy().reshape(r.matrix_shape)
        specs.append(Spectrum(r.name, r.matrix_shape, np.linalg.svd(w, compute_uv=False), float(np.sum(w * w))))
    return specs


# Summed normalized error (sum over the selected layers of the chosen option's error) of the
# allocator at commit 862753b (hull greedy + quadratic refinement), measured on plain SVD spectra.
BEFORE_862753B = {
    "demo": {0.8: 0.14852672818249235, 0.5: 0.47342599808945784, 0.3: 0.8596701638041594,
             0.2: 1.1101718106213225, 0.1: 1.54983665251379},
    "patch_encoder": {0.8: 0.7838595430601347, 0.5: 2.5052523033847613, 0.3: 5.7822706433423905,
                      0.2: 8.216246454981269, 0.1: 11.571988341614295},
}
# the near-linear allocator measured the same everywhere except demo 0.3 (0.858258) and
# patch_encoder 0.2 (8.208969), where it is lower


@pytest.mark.parametrize("model_name", sorted(BEFORE_862753B))
def test_no_worse_than_the_previous_allocator_on_the_shipped_models(model_name):
    # oracle: the previous allocator's measured results (BEFORE_862753B) on the same spectra
    pytest.importorskip("torch")
    import factorize_weights as fw
    from factorize_weights import demo

    if model_name == "demo":
        model = fw.build_model(demo.MODEL_SPEC, demo.WEIGHTS)
    else:
        examples = Path(__file__).resolve().parents[1] / "examples"
        model = fw.build_model(f"{examples / 'patch_encoder.py'}:build_encoder", examples / "patch_encoder.safetensors")
    recs = fw.selected(fw.discover(model))
    specs = _svd_spectra(model, recs)
    for fraction, before in BEFORE_862753B[model_name].items():
        plan = allocate(recs, specs, parse_budget(f"params={fraction}"))
        # oracle for the capacity: an independent recount of each layer's parameters
        assert sum(r.factorized_params(plan.ranks[r.name]) for r in recs) == plan.cost_after <= plan.limit
        assert summed_error(recs, specs, plan.ranks) <= before + 1e-9


def lagrangian_bound(menus, capacity):
    """A lower bound on the best plan's summed error: for any lam >= 0,
    sum over layers of min_i (e_i + lam c_i), minus lam * capacity (weak duality); maximised over
    lam by bisecting for where the cost of the per-layer minimisers crosses the capacity."""

    def dual(lam):
        picks = [int(np.argmin(e + lam * c)) for _, c, e in menus]
        return (sum(e[i] + lam * c[i] for (_, c, e), i in zip(menus, picks)) - lam * capacity,
                sum(c[i] for (_, c, _), i in zip(menus, picks)))

    lo, hi = 0.0, 1e-6
    while dual(hi)[1] > capacity:
        hi *= 2
    for _ in range(60):
        mid = (lo + hi) / 2
        lo, hi = (mid, hi) if dual(mid)[1] > capacity else (lo, mid)
    return max(dual(lo)[0], dual(hi)[0])


def test_a_hundred_bert_sized_layers_plan_in_seconds_within_budget():
    # 17 BERT-base blocks (4 x 768x768 attention, 3072x768 and 768x3072 feed-forward): 102 layers
    # with 383 or 613 rank options each, random decaying spectra. The previous allocator took
    # ~105 s per budget for 24 such layers; this one measured ~0.05 s for 102.
    rng = np.random.default_rng(12)
    recs, specs = [], []
    for i in range(102):
        m, n = ([(768, 768)] * 4 + [(3072, 768), (768, 3072)])[i % 6]
        s = rng.uniform(0.5, 1.5, min(m, n)) * np.exp(-np.arange(min(m, n)) / rng.uniform(30, 400))
        r, sp = layer(f"block{i // 6}.{i % 6}", m, n, s)
        r.positions = int(rng.choice([32, 128, 512]))  # uneven weights for the flops budget
        recs.append(r)
        specs.append(sp)
    for text, multiple in (("params=0.5", 1), ("params=0.2", 1), ("params=0.3", 8), ("flops=0.3", 1)):
        budget = parse_budget(text)
        start = time.perf_counter()
        plan = allocate(recs, specs, budget, rank_step=multiple)
        # oracle for speed: the brief's bound, generous so it is not a flaky timing test
        assert time.perf_counter() - start < 10.0
        # oracle for the capacity: an independent recount of each layer's cost
        if budget.kind == "flops":  # multiply-adds per sample: weights only, times output positions
            used = sum((r.factorized_params(plan.ranks[r.name]) - r.bias_params) * r.positions for r in recs)
        else:
            used = sum(r.factorized_params(plan.ranks[r.name]) for r in recs)
        assert used == plan.cost_after <= plan.limit
        for r in recs:  # oracle for the menu: allowed_ranks
            k = plan.ranks[r.name]
            assert k is None or k in allowed_ranks(*r.matrix_shape, rank_step=multiple)
        # oracle for quality: the Lagrangian lower bound (weak duality); the hull greedy alone ends
        # within one hull segment's gain of it
        units = "flops" if budget.kind == "flops" else "params"
        menus = [_options(r, s, units, multiple, 1) for r, s in zip(recs, specs)]
        capacity = plan.limit - (0 if units == "flops" else sum(r.bias_params for r in recs))
        gap = summed_error(recs, specs, plan.ranks) - lagrangian_bound(menus, capacity)
        assert -1e-9 <= gap < 1e-2  # measured: 1e-4, 2e-6, 4e-3, 4e-3 (of totals 4 to 27)
