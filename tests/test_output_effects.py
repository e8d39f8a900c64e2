"""Allocation by effect on the output, the data-free energy-product rule, BatchNorm row weighting,
overridden forward()s checked on real inputs, and recovery that never returns a worse model."""

from __future__ import annotations

import dataclasses
import itertools

import numpy as np
import pytest
import torch
from torch import nn

import factorize_weights as fw
from factorize_weights import pipeline
from factorize_weights.allocate import allocate
from factorize_weights.backends import torch_backend as tb
from factorize_weights.budget import parse_budget
from factorize_weights.data import HeldOut
from factorize_weights.effects import Effect, probe_ranks
from factorize_weights.methods import PlainSvd, row_weighted
from factorize_weights.records import LayerRecord
from factorize_weights.spectra import Spectrum


def _data(x: np.ndarray, source: str) -> HeldOut:
    return HeldOut(inputs=x.astype(np.float32), labels=None, source=source)


class Uneven(nn.Module):
    """Two parallel branches of the same shape; the second reaches the output scaled by 0.02, so
    its errors barely matter there."""

    def __init__(self):
        super().__init__()
        self.a, self.b = nn.Linear(24, 24), nn.Linear(24, 24)

    def forward(self, x):
        return self.a(x) + 0.02 * self.b(x)


def test_probe_measurements_equal_a_direct_rewrite():
    # oracle: torch itself, the model rewritten (a copy) with that one layer at that rank, against
    # the original's outputs
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(16, 32), nn.ReLU(), nn.Linear(32, 12), nn.Tanh(), nn.Linear(12, 5)).eval()
    x = np.random.default_rng(0).standard_normal((40, 16)).astype(np.float32)
    cal = _data(x, "cal")
    prep = pipeline.prepare(model, fw.CompressConfig(quiet=True, allocation="output", method="svd",
                                                     effect_samples=40), None, cal)
    with torch.no_grad():
        ref = model(torch.from_numpy(x)).double().numpy()
    for name, effect in prep.effects.items():
        record = next(r for r in prep.records if r.name == name)
        assert effect.ranks == probe_ranks(prep.decompositions[name].spectrum, *record.matrix_shape)
        for rank, measured in zip(effect.ranks, effect.errors):
            a, xf = prep.decompositions[name].factors(rank)
            small = tb.rewrite(model, prep.records, {name: (a, xf)})
            with torch.no_grad():
                out = small(torch.from_numpy(x)).double().numpy()
            direct = float(np.sum((out - ref) ** 2) / np.sum(ref ** 2))
            assert measured == pytest.approx(direct, rel=1e-4, abs=1e-9)
    # the hook left nothing behind: the model computes what it computed
    with torch.no_grad():
        np.testing.assert_array_equal(model(torch.from_numpy(x)).double().numpy(), ref)


class Block(nn.Module):
    """A residual block that changes its input in place and returns a tuple, as transformer blocks do."""

    calls = 0

    def __init__(self):
        super().__init__()
        self.fc, self.out = nn.Linear(16, 24), nn.Linear(24, 16)

    def forward(self, h, mask=None):
        Block.calls += 1
        h = torch.relu_(h)  # in place: a replayed output must be a copy
        return (h + self.out(torch.tanh(self.fc(h))), mask)


class Chain(nn.Module):
    def __init__(self):
        super().__init__()
        self.stem = nn.Linear(12, 16)
        self.blocks = nn.ModuleList(Block() for _ in range(4))
        self.head = nn.Linear(16, 5)

    def forward(self, x):
        h, mask = self.stem(x), torch.ones(1)
        for block in self.blocks:
            h, mask = block(h, mask)
        return self.head(h)


def test_probes_on_a_chain_skip_the_blocks_before_the_layer_and_measure_the_same():
    # oracle: torch itself, the model rewritten (a copy) with one layer at one rank and run whole
    torch.manual_seed(2)
    model = Chain().eval()
    x = np.random.default_rng(2).standard_normal((48, 12)).astype(np.float32)
    prep = pipeline.prepare(model, fw.CompressConfig(quiet=True, allocation="output", method="svd",
                                                     effect_samples=48, batch_size=16), None, _data(x, "cal"))
    probes = sum(len(e.ranks) for e in prep.effects.values())
    with torch.no_grad():
        ref = model(torch.from_numpy(x)).double().numpy()
    for name, effect in prep.effects.items():
        for rank, measured in zip(effect.ranks, effect.errors):
            small = tb.rewrite(model, prep.records, {name: prep.decompositions[name].factors(rank)})
            with torch.no_grad():
                out = small(torch.from_numpy(x)).double().numpy()
            direct = float(np.sum((out - ref) ** 2) / np.sum(ref ** 2))
            assert measured == pytest.approx(direct, rel=1e-5, abs=1e-12), (name, rank)
    # every probe pass of a layer in block b runs blocks b..3 only (3 batches of 16 samples); the
    # stem and head layers, outside the chain, run all four
    owned = {name: int(name.split(".")[1]) if name.startswith("blocks.") else 0 for name in prep.effects}
    expected_probe_calls = sum(3 * (4 - owned[n]) * len(e.ranks) for n, e in prep.effects.items())
    assert probes > 8 and expected_probe_calls < 0.7 * 3 * 4 * probes  # fewer than whole passes
    Block.calls = 0
    list(tb.replacement_errors(model, {r.name: r for r in prep.records},
                               [(n, *prep.decompositions[n].factors(e.ranks[0])) for n, e in prep.effects.items()],
                               [torch.from_numpy(x[i:i + 16]) for i in range(0, 48, 16)]))
    first = sum(3 * (4 - owned[n]) for n in prep.effects)
    assert Block.calls == 4 + 3 * 4 + first  # find_chain's one-sample pass, the reference, then the probes
    with torch.no_grad():  # nothing left behind: the blocks run their own forward again
        np.testing.assert_array_equal(model(torch.from_numpy(x)).double().numpy(), ref)


def test_effect_curve_passes_through_its_measured_points_and_scales_between():
    e = Effect("l", [2, 8], [0.4, 0.01], [0.2, 0.02])  # gains 2 and 0.5
    ranks = np.array([1, 2, 4, 8, 16])
    own = np.array([0.3, 0.2, 0.1, 0.02, 0.01])
    got = e.curve(ranks, own)
    assert got[1] == pytest.approx(0.4) and got[3] == pytest.approx(0.01)
    assert got[0] == pytest.approx(2 * 0.3) and got[4] == pytest.approx(0.5 * 0.01)  # held beyond the ends
    assert got[2] == pytest.approx(1.0 * 0.1)  # log-linear in rank: gain sqrt(2 * 0.5) at rank 4


def test_output_allocation_gives_the_rank_to_the_layer_that_reaches_the_output():
    # oracle: the model's actual output error (torch), measured for both plans on fresh inputs
    torch.manual_seed(1)
    model = Uneven().eval()
    rng = np.random.default_rng(1)
    cal, fresh = rng.standard_normal((64, 24)), rng.standard_normal((64, 24))
    errors = {}
    for allocation in ("error-sum", "output"):
        config = fw.CompressConfig(budget="params=0.5", quiet=True, method="svd", allocation=allocation,
                                   latency_repeats=0, effect_samples=64)
        result = fw.compress(model, config, calibration=_data(cal, "cal"))
        with torch.no_grad():
            ref = model(torch.from_numpy(fresh).float())
            out = result.model(torch.from_numpy(fresh).float())
        errors[allocation] = float(((out - ref) ** 2).sum() / (ref ** 2).sum())
        if allocation == "output":
            assert result.plan.ranks["a"] is None or result.plan.ranks["a"] > (result.plan.ranks["b"] or 0)
            assert result.report["allocation"]["by"] == "output"
            assert result.report["allocation"]["probe_passes"] > 1
    assert errors["output"] < 0.5 * errors["error-sum"]


def test_auto_allocation_probes_only_where_the_probes_are_affordable():
    """Cost rule (effects.PROBE_PASS_LIMIT): 12 layers x up to 3 probe ranks over all 8 calibration
    samples are over 32 passes over the set, past the limit: ``auto`` shares ranks by the layers' own errors and
    says why; asked for by name, the probes run anyway. Few layers over the same data are probed."""
    torch.manual_seed(2)
    deep = nn.Sequential(*[m for _ in range(12) for m in (nn.Linear(24, 24), nn.Tanh())]).eval()
    cal = _data(np.random.default_rng(2).standard_normal((8, 24)), "cal")
    base = fw.CompressConfig(budget="params=0.5", quiet=True, method="svd", latency_repeats=0)
    auto = fw.compress(deep, base, calibration=cal).report
    import re
    from factorize_weights.effects import PROBE_PASS_LIMIT

    assert auto["allocation"]["by"] == "error-sum"
    passes = int(re.search(r"cost (\d+) passes", auto["allocation"]["why"]).group(1))
    assert passes > PROBE_PASS_LIMIT
    assert auto["allocation"]["why"] in auto["warnings"]
    forced = fw.compress(deep, dataclasses.replace(base, allocation="output"), calibration=cal).report
    assert forced["allocation"]["by"] == "output" and "why" not in forced["allocation"]
    shallow = nn.Sequential(nn.Linear(24, 24), nn.Tanh(), nn.Linear(24, 24)).eval()
    assert fw.compress(shallow, base, calibration=cal).report["allocation"]["by"] == "output"


def _layer(name, s, m=20, n=20):
    s = np.sort(np.asarray(s, dtype=float))[::-1]
    return LayerRecord(name, "linear", (m, n), (m, n), False, "float32"), Spectrum(name, (m, n), s, float(np.sum(s ** 2)))


def _kept_product(specs, ranks):
    return float(np.prod([1.0 if r is None else s.energy_fraction(r) for s, r in zip(specs, ranks)]))


def test_energy_product_plan_is_the_brute_force_optimum_of_its_objective():
    # oracle: exhaustive enumeration of every combination of ranks (and dense)
    rng = np.random.default_rng(3)
    for case in range(40):
        layers = [_layer(f"l{i}", rng.gamma(0.5 + rng.random(), size=20) + 1e-3) for i in range(3)]
        recs, specs = [r for r, _ in layers], [s for _, s in layers]
        budget = parse_budget(f"params={rng.uniform(0.2, 0.8):.2f}")
        plan = allocate(recs, specs, budget, objective="energy-product")
        limit = plan.limit
        best = 0.0
        menus = [list(range(1, 10)) + [None]] * 3
        for combo in itertools.product(*menus):
            cost = sum(400 if r is None else 40 * r for r in combo)
            if cost <= limit:
                best = max(best, _kept_product(specs, combo))
        got = _kept_product(specs, [plan.ranks[r.name] for r in recs])
        assert got >= best * (1 - 0.02), case  # within 2% of the optimum product (greedy on a hull)


def test_energy_product_does_not_crush_a_flat_layer_that_error_sum_crushes():
    # a flat spectrum (every direction equally important, like a classifier) next to steep ones:
    # the summed error rule trades the flat layer away almost entirely; the product rule cannot
    flat = _layer("flat", np.ones(20))
    steep = [_layer(f"s{i}", 0.5 ** np.arange(20)) for i in range(3)]
    recs, specs = zip(*([flat] + steep))
    budget = parse_budget("params=0.25")
    old = allocate(list(recs), list(specs), budget, objective="error-sum")
    new = allocate(list(recs), list(specs), budget, objective="energy-product")
    kept = lambda plan: specs[0].energy_fraction(plan.ranks["flat"]) if plan.ranks["flat"] else 1.0  # noqa: E731
    assert kept(old) <= 0.2 and kept(new) > kept(old)
    assert _kept_product(specs, [new.ranks[r.name] for r in recs]) >= _kept_product(specs, [old.ranks[r.name] for r in recs])


def test_row_weighted_truncation_is_the_best_error_after_the_scale():
    # Eckart & Young 1936 on diag(d) W (numpy's SVD as the reference): the weighted factors reach the
    # optimum of ||diag(d)(W - W_k)||_F, which the unweighted factors do not
    rng = np.random.default_rng(4)
    w = rng.standard_normal((30, 40))
    d = np.exp(rng.standard_normal(30))
    dec = row_weighted(PlainSvd("exact"), "l", w, d, dtype="float64", scaled_by="bn")
    plain = PlainSvd("exact").decompose("l", w, dtype="float64")
    u, s, vt = np.linalg.svd(d[:, None] * w, full_matrices=False)
    for k in (3, 8, 15):
        a, x = dec.factors(k)
        optimum = float(np.sqrt(np.sum(s[k:] ** 2)))
        assert np.linalg.norm(d[:, None] * (w - a @ x)) == pytest.approx(optimum, rel=1e-9)
        a0, x0 = plain.factors(k)
        assert np.linalg.norm(d[:, None] * (w - a0 @ x0)) > optimum * (1 + 1e-6)
    assert dec.extra["row_weights"] == "bn"


class ConvBn(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv, self.bn = nn.Conv2d(8, 24, 1, bias=False), nn.BatchNorm2d(24)
        self.head = nn.Conv2d(24, 4, 1)

    def forward(self, x):
        return self.head(torch.relu(self.bn(self.conv(x))))


def test_batchnorm_after_a_layer_is_found_and_its_scale_taken_from_the_module():
    # the direct computation: |gamma| / sqrt(running_var + eps) read off the module
    torch.manual_seed(5)
    model = ConvBn()
    with torch.no_grad():
        model.bn.weight.uniform_(-2, 2)
        model.bn.running_var.uniform_(0.1, 3)
    model.eval()
    records = tb.discover(model)
    x = np.random.default_rng(5).standard_normal((4, 8, 6, 6)).astype(np.float32)
    tb.measure_positions(model, records, x)
    conv = next(r for r in records if r.name == "conv")
    head = next(r for r in records if r.name == "head")
    expected = (model.bn.weight.abs() / torch.sqrt(model.bn.running_var + model.bn.eps)).detach().double().numpy()
    np.testing.assert_allclose(conv.row_scale, expected, rtol=1e-12)
    assert conv.scaled_by == "bn" and head.row_scale is None


class Scaled(nn.Linear):
    def forward(self, x):
        return 2.0 * super().forward(x)


class Same(nn.Linear):
    def forward(self, x):  # the base computation, written out
        return nn.functional.linear(x, self.weight, self.bias)


def test_overridden_forward_is_admitted_only_when_it_computes_what_the_base_class_does():
    # oracle: the base class's own forward on the same inputs; full rank must reproduce outputs
    torch.manual_seed(6)
    model = nn.Sequential(Same(20, 20), nn.ReLU(), Scaled(20, 20)).eval()
    x = np.random.default_rng(6).standard_normal((16, 20)).astype(np.float32)
    assert all(r.skip_reason for r in tb.discover(model))  # no data: nothing can be checked
    prep = pipeline.prepare(model, fw.CompressConfig(quiet=True), _data(x, "held"))
    by = {r.name: r for r in prep.records}
    assert by["0"].skip_reason is None and "matched Linear.forward" in by["0"].options["forward_checked"]
    assert "differs from Linear's" in by["2"].skip_reason
    w = model[0].weight.detach().double().numpy()
    small = tb.rewrite(model, prep.records, {"0": (w, np.eye(20))})  # a full-rank split: W = W I
    with torch.no_grad():
        np.testing.assert_allclose(small(torch.from_numpy(x)).numpy(), model(torch.from_numpy(x)).numpy(),
                                   rtol=1e-4, atol=1e-4)


class PaddedConv(nn.Conv2d):
    """Pads its input itself before a padding-free convolution (as "same"-padding ports do)."""

    def forward(self, x):
        return super().forward(nn.functional.pad(x, (1, 1, 1, 1)))


def test_overridden_forward_with_its_own_padding_is_skipped_naming_both_shapes():
    # oracle: torch's own output shapes, from the module and from Conv2d.forward on the same input
    torch.manual_seed(7)
    model = nn.Sequential(PaddedConv(3, 8, 3, stride=2), nn.ReLU(), nn.Conv2d(8, 8, 1)).eval()
    x = np.random.default_rng(7).standard_normal((4, 3, 9, 9)).astype(np.float32)
    prep = pipeline.prepare(model, fw.CompressConfig(quiet=True), _data(x, "held"))
    reason = {r.name: r.skip_reason for r in prep.records}["0"]
    with torch.no_grad():
        got = tuple(model[0](torch.from_numpy(x)).shape)
        plain = tuple(nn.Conv2d.forward(model[0], torch.from_numpy(x)).shape)
    assert got != plain
    assert f"its output shape {got} is not Conv2d's {plain}" in reason, reason


class BnNet(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv1, self.bn1 = nn.Conv2d(3, 16, 3, padding=1), nn.BatchNorm2d(16)
        self.conv2, self.bn2 = nn.Conv2d(16, 16, 3, padding=1), nn.BatchNorm2d(16)
        self.fc = nn.Linear(16, 5)

    def forward(self, x):
        x = torch.relu(self.bn1(self.conv1(x)))
        x = torch.relu(self.bn2(self.conv2(x)))
        return self.fc(x.mean((2, 3)))


def test_recovery_that_only_hurts_returns_the_starting_model_untouched():
    # a learning rate far too large makes every step worse on the validation slice: the rule must
    # keep the factors it started from, and BatchNorm's running statistics must not move
    torch.manual_seed(7)
    model = BnNet().eval()
    with torch.no_grad():
        for bn in (model.bn1, model.bn2):
            bn.running_mean.uniform_(-0.5, 0.5)
            bn.running_var.uniform_(0.5, 2)
    x = np.random.default_rng(7).standard_normal((48, 3, 8, 8)).astype(np.float32)
    config = fw.CompressConfig(budget="params=0.4", quiet=True, latency_repeats=0, recover=0)
    prep = pipeline.prepare(model, config, None, _data(x, "cal"))
    start = pipeline.realize(prep, "params=0.4", latency=False, layer_errors=False).model
    prep.config.recover, prep.config.recover_lr = 30, 0.9
    result = pipeline.realize(prep, "params=0.4", latency=False, layer_errors=False)
    rec = result.report["recovery"]
    assert rec["kept"] == "before" and rec["validation_loss_after"] == rec["validation_loss_before"]
    for (n1, p1), (n2, p2) in zip(start.state_dict().items(), result.model.state_dict().items()):
        assert n1 == n2 and torch.equal(p1, p2), n1  # factors and BatchNorm buffers alike


def test_recovery_that_helps_keeps_the_fine_tuned_factors():
    torch.manual_seed(8)
    model = BnNet().eval()
    x = np.random.default_rng(8).standard_normal((64, 3, 8, 8)).astype(np.float32)
    config = fw.CompressConfig(budget="params=0.3", quiet=True, latency_repeats=0, recover=60, recover_lr=1e-3,
                               method="svd", allocation="error-sum")
    result = fw.compress(model, config, calibration=_data(x, "cal"))
    rec = result.report["recovery"]
    assert rec["kept"] == "after" and rec["validation_loss_after"] < rec["validation_loss_before"]
    bn = dict(result.model.named_buffers())
    assert torch.equal(bn["bn1.running_mean"], model.bn1.running_mean)  # statistics untouched


class TokenNet(nn.Module):
    """A model fed named inputs, as a tokenized text encoder is (input_ids, attention_mask)."""

    def __init__(self):
        super().__init__()
        self.emb = nn.Embedding(50, 32)
        self.up, self.down = nn.Linear(32, 64), nn.Linear(64, 32)

    def forward(self, input_ids, attention_mask):
        h = self.emb(input_ids)
        return (h + self.down(torch.relu(self.up(h)))) * attention_mask[..., None]


def test_recovery_on_named_inputs_lowers_the_output_error_torch_measures():
    # recovery reads a dict of named arrays, like the calibration of a text encoder; the oracle is
    # the original torch model's output on held-out token sequences never used for training
    torch.manual_seed(9)
    model = TokenNet().eval()
    rng = np.random.default_rng(9)

    def tokens(n):
        ids = rng.integers(0, 50, (n, 12))
        mask = (np.arange(12)[None, :] < rng.integers(4, 13, (n, 1))).astype(np.int64)
        return {"input_ids": ids, "attention_mask": mask}

    cal, held = HeldOut(tokens(160), None, "cal"), tokens(80)
    config = fw.CompressConfig(budget="params=0.35", quiet=True, latency_repeats=0, method="svd",
                               allocation="error-sum")
    prep = pipeline.prepare(model, config, None, cal)
    before = pipeline.realize(prep, "params=0.35", latency=False, layer_errors=False).model
    prep.config.recover = 80
    result = pipeline.realize(prep, "params=0.35", latency=False, layer_errors=False)
    rec = result.report["recovery"]
    # the learning rate was chosen by the trials: the largest one that stayed stable
    assert set(rec["lr_trials"]) == {"0.001", "0.0001", "1e-05", "1e-06"}
    start = rec["validation_loss_before"]
    stable = [float(r) for r, v in rec["lr_trials"].items() if v <= 1.05 * start]
    assert stable and rec["lr"] == max(stable)
    assert rec["kept"] == "after" and rec["validation_loss_after"] < rec["validation_loss_before"]
    ref = tb.predict(model, held)

    def err(m):
        return float(np.sum((tb.predict(m, held) - ref) ** 2) / np.sum(ref ** 2))

    assert err(result.model) < 0.9 * err(before)


# -- input statistics a BatchNorm promises (--bn-inputs) ---------------------------------------

def test_activation_moments_match_the_rectified_normal_in_closed_form():
    # oracle: the mean and second moment of max(0, z), z ~ N(m, s^2), in closed form from the
    # normal's density and distribution function (scipy.stats.norm); a textbook identity
    from scipy.stats import norm

    m = np.array([-2.0, -0.3, 0.0, 0.7, 3.0])
    s = np.array([0.5, 1.0, 2.0, 0.2, 1.5])
    mean, var = tb.activation_moments(m, s, nn.ReLU())
    a = m / s
    first = m * norm.cdf(a) + s * norm.pdf(a)
    second = (m * m + s * s) * norm.cdf(a) + m * s * norm.pdf(a)
    # the trapezoid rule is second-order at a kink: a few 1e-6 relative on this grid
    assert np.allclose(mean, first, rtol=1e-5, atol=1e-9)
    assert np.allclose(var, second - first ** 2, rtol=1e-5, atol=1e-9)
    # and a bounded activation against numpy Monte Carlo (ReLU6; 2e6 draws, a few 1e-3 of spread)
    z = np.random.default_rng(0).standard_normal((2_000_000, 1)) * s + m
    f = np.clip(z, 0, 6)
    mean6, var6 = tb.activation_moments(m, s, nn.ReLU6())
    assert np.allclose(mean6, f.mean(0), atol=5e-3) and np.allclose(var6, f.var(0), atol=1e-2)


class NormedHead(nn.Module):
    """conv -> BatchNorm -> ReLU -> 3x3 conv -> BatchNorm -> ReLU -> average pool -> dropout ->
    flatten -> linear: the second conv and the linear layer read a BatchNorm through a ReLU."""

    def __init__(self):
        super().__init__()
        self.c1, self.b1 = nn.Conv2d(3, 12, 1), nn.BatchNorm2d(12)
        self.c2, self.b2 = nn.Conv2d(12, 40, 3, padding=1), nn.BatchNorm2d(40)
        self.act, self.pool, self.drop, self.fc = nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Dropout(0.1), nn.Linear(40, 36)

    def forward(self, x):
        x = self.act(self.b1(self.c1(x)))
        x = self.act(self.b2(self.c2(x)))
        return self.fc(torch.flatten(self.drop(self.pool(x)), 1))


def test_bn_inputs_truncates_for_the_moments_the_batchnorm_promises_at_the_planned_ranks():
    # oracle: Eckart-Young with numpy's SVD on W M^(1/2), M = diag(v) + mu mu^T (plus the ridge),
    # mu and v the mean and variance of ReLU(N(beta, gamma^2)) in closed form (scipy.stats.norm);
    # the tool must find both chains, give those factors, and plan the same ranks as without them
    from scipy.stats import norm

    torch.manual_seed(11)
    model = NormedHead().eval()
    with torch.no_grad():
        for bn in (model.b1, model.b2):
            bn.weight.copy_(torch.logspace(-1.5, 0.5, bn.num_features)[torch.randperm(bn.num_features)])
            bn.bias.uniform_(-1, 1)
    x = np.random.default_rng(11).standard_normal((8, 3, 6, 6)).astype(np.float32)
    config = fw.CompressConfig(budget="params=0.5", quiet=True, latency_repeats=0, method="svd",
                               allocation="error-sum")  # on by default for a PyTorch model without calibration
    prep = pipeline.prepare(model, config, _data(x, "held"), None)
    assert prep.bn_inputs
    by = {r.name: r for r in prep.records}
    assert by["c2"].input_from == "b1 -> act" and by["fc"].input_from == "b2 -> act -> pool (pool)"
    assert by["c1"].input_from is None  # fed by the raw input

    def relu_moments(bn):
        m, s = bn.bias.detach().double().numpy(), bn.weight.detach().double().abs().numpy()
        a = m / s
        first = m * norm.cdf(a) + s * norm.pdf(a)
        return first, (m * m + s * s) * norm.cdf(a) + m * s * norm.pdf(a) - first ** 2

    for name, bn, taps in (("fc", model.b2, 1), ("c2", model.b1, 9)):
        w = by[name].handle.weight.detach().double().numpy().reshape(by[name].handle.weight.shape[0], -1)
        mean, var = relu_moments(bn)
        mu = np.repeat(mean, taps)
        moment = np.diag(np.repeat(var, taps)) + np.outer(mu, mu)
        moment += 0.01 * np.mean(np.diag(moment)) * np.eye(len(mu))  # the default ridge
        vals, vecs = np.linalg.eigh(moment)
        root = (vecs * np.sqrt(vals)) @ vecs.T
        u, s, vt = np.linalg.svd(w @ root, full_matrices=False)
        for k in (3, 9):
            a, xf = prep.decompositions[name].factors(k)
            want = (u[:, :k] * s[:k]) @ vt[:k] @ np.linalg.inv(root)
            assert np.allclose(a @ xf, want, rtol=1e-5, atol=1e-5 * np.abs(want).max()), (name, k)
    # the plan reads the weights' own spectra: the same ranks as with the option off
    off = pipeline.prepare(model, dataclasses.replace(config, bn_inputs=False), _data(x, "held"), None)
    assert not off.bn_inputs
    for budget in ("params=0.5", "params=0.3"):
        assert pipeline.plan_budget(prep, budget).ranks == pipeline.plan_budget(off, budget).ranks
    result = pipeline.realize(prep, "params=0.5", latency=False, layer_errors=False)
    entries = {e["name"]: e for e in result.report["layers"]}
    assert entries["fc"]["input_statistics_from"] == "b2 -> act -> pool (pool)" and result.report["bn_inputs"]
    # an error= budget bounds the weights' own error, which weighted factors would exceed: off
    per_layer = pipeline.prepare(model, dataclasses.replace(config, budget="error=0.6"), _data(x, "held"), None)
    assert not per_layer.bn_inputs
    result = pipeline.realize(per_layer, "error=0.6", latency=False, layer_errors=False)
    assert result.report["budget"]["met"] and not result.report["bn_inputs"]
    assert all(e["weight_error"] <= 0.6 + 1e-9 for e in result.report["layers"] if e.get("rank"))
    off_result = pipeline.realize(off, "params=0.5", latency=False, layer_errors=False)
    assert not off_result.report["bn_inputs"] and "input_statistics_from" not in {
        k for e in off_result.report["layers"] for k in e}


def test_shrinkage_toward_input_statistics_equals_the_fixed_target_estimator():
    # oracle: the shrinkage intensity toward a fixed target T written out densely with numpy,
    # rho = min(b^2, d^2) / d^2, b^2 = (1/N^2) sum_k ||x_k x_k^T - S||_F^2, d^2 = ||S - mu T||_F^2
    # (Ledoit & Wolf 2004; Schaefer & Strimmer 2005 for a general target); with T = I it is
    # scikit-learn's ledoit_wolf_shrinkage (assume_centered=True)
    from sklearn.covariance import ledoit_wolf_shrinkage

    from factorize_weights.stats import Moments, Prior

    rng = np.random.default_rng(21)
    n = 12
    mean, var = rng.uniform(0, 1, n), rng.uniform(0.1, 2, n)
    for rows in (8, 40, 400):
        x = rng.standard_normal((rows, n)) * np.sqrt(var) + mean
        acc = Moments(n)
        acc.add(x)
        prior = Prior(mean, var)
        t = np.diag(var) + np.outer(mean, mean)
        t /= np.mean(np.diag(t))
        assert np.allclose(prior.add_to(np.zeros((n, n)), 1.0), t)
        s = x.T @ x / rows
        mu = np.trace(s) / n
        b2 = sum(np.sum((np.outer(r, r) - s) ** 2) for r in x) / rows ** 2
        d2 = np.sum((s - mu * t) ** 2)
        assert acc.shrinkage(prior) == pytest.approx(min(b2, d2) / d2, rel=1e-9)
        identity = Prior(np.zeros(n), np.ones(n))
        assert acc.shrinkage(identity) == pytest.approx(ledoit_wolf_shrinkage(x, assume_centered=True), rel=1e-9)


def test_calibrated_factors_shrink_toward_the_batchnorm_statistics():
    # oracle: numpy's eigendecomposition and SVD on W (G + lam T)^(1/2), G the classifier inputs'
    # Gram matrix measured with a torch hook, T = diag(v) + mu mu^T of ReLU(N(beta, gamma^2)) in
    # closed form (scipy.stats.norm), scaled to mean diagonal 1, lam the layer's ridge x mean diag(G)
    # less the default 1% ridge, which stays on the identity
    from scipy.stats import norm

    torch.manual_seed(12)
    model = NormedHead().eval()
    with torch.no_grad():
        for bn in (model.b1, model.b2):
            bn.weight.uniform_(0.5, 1.5)  # every channel varies: the dense oracle's inverse root exists
            bn.bias.uniform_(-0.5, 0.5)
    rng = np.random.default_rng(12)
    cal_x = rng.standard_normal((24, 3, 6, 6)).astype(np.float32)
    held_x = rng.standard_normal((8, 3, 6, 6)).astype(np.float32)
    config = fw.CompressConfig(budget="params=0.5", quiet=True, latency_repeats=0, method="whitened")
    prep = pipeline.prepare(model, config, _data(held_x, "held"), _data(cal_x, "cal"))
    assert prep.calibration.prior_for("fc") is not None and prep.calibration.prior_for("c1") is None
    seen = []
    handle = model.fc.register_forward_hook(lambda m, a, o: seen.append(a[0].detach().double().numpy()))
    with torch.no_grad():
        model(torch.from_numpy(cal_x))
    handle.remove()
    gram = seen[0].T @ seen[0]
    m, s = model.b2.bias.detach().double().numpy(), model.b2.weight.detach().double().abs().numpy()
    a = m / s
    first = m * norm.cdf(a) + s * norm.pdf(a)
    var = (m * m + s * s) * norm.cdf(a) + m * s * norm.pdf(a) - first ** 2
    t = np.diag(var) + np.outer(first, first)
    t /= np.mean(np.diag(t))
    alpha, unit = prep.calibration.ridge_for("fc"), np.mean(np.diag(gram))
    assert alpha > 0.1  # 24 rows for 40 features: shrunk well beyond the 1% identity floor
    moment = gram + (alpha - 0.01) * unit * t + 0.01 * unit * np.eye(len(t))  # the default ridge stays on I
    vals, vecs = np.linalg.eigh(moment)
    root = (vecs * np.sqrt(vals)) @ vecs.T
    w = model.fc.weight.detach().double().numpy()
    u, sv, vt = np.linalg.svd(w @ root, full_matrices=False)
    for k in (4, 12):
        af, xf = prep.decompositions["fc"].factors(k)
        want = (u[:, :k] * sv[:k]) @ vt[:k] @ np.linalg.inv(root)
        assert np.allclose(af @ xf, want, rtol=1e-5, atol=1e-5 * np.abs(want).max()), k
    # the sequential refit adds the same ridge: with fc alone cut (upstream exact, C = G' = G) the
    # refitted factors are the same truncation of W (G + lam T)^(1/2)
    alone = pipeline.prepare(model, dataclasses.replace(config, only=("fc",)), _data(held_x, "held"), _data(cal_x, "cal"))
    refit = pipeline.realize(alone, "params=0.5", latency=False, layer_errors=False)
    assert refit.report["sequential"] and refit.report["calibration"]["ridge_toward_input_statistics"] == ["fc"]
    k = refit.plan.ranks["fc"]
    af, xf = tb.read_factors(refit.model, ["fc"])["fc"]
    want = (u[:, :k] * sv[:k]) @ vt[:k] @ np.linalg.inv(root)
    assert np.allclose(af @ xf, want, rtol=1e-4, atol=1e-4 * np.abs(want).max())
    # off: the ridge adds a multiple of the identity, as before
    off = pipeline.prepare(model, dataclasses.replace(config, bn_inputs=False), _data(held_x, "held"), _data(cal_x, "cal"))
    assert off.calibration.prior_for("fc") is None


def test_a_refit_behind_a_replaced_layer_drops_the_batchnorm_target():
    # oracle: reduced-rank regression in closed form with numpy (common practice; as in
    # test_stats.py), M = W C G'^-1 truncated in the G'^(1/2) metric, C = X X'^T and G' = X' X'^T
    # from torch hooks on the original and the compressed model, both with a ridge alpha x mean
    # diag(G') x I: the identity target, alpha = max(1%, rows ridge 0.1 x 40 / rows, rho / (1 - rho))
    # with rho scikit-learn's ledoit_wolf_shrinkage of the original inputs. The BatchNorm's
    # statistics describe the original model's inputs of fc; once c2 is replaced they are stale.
    from sklearn.covariance import ledoit_wolf_shrinkage

    torch.manual_seed(12)
    model = NormedHead().eval()
    with torch.no_grad():
        for bn in (model.b1, model.b2):
            bn.weight.uniform_(0.5, 1.5)
            bn.bias.uniform_(-0.5, 0.5)
    rng = np.random.default_rng(13)
    cal_x = rng.standard_normal((24, 3, 6, 6)).astype(np.float32)
    held_x = rng.standard_normal((8, 3, 6, 6)).astype(np.float32)
    config = fw.CompressConfig(budget="params=0.5", quiet=True, latency_repeats=0, method="whitened",
                               only=("c2", "fc"))
    prep = pipeline.prepare(model, config, _data(held_x, "held"), _data(cal_x, "cal"))
    assert prep.calibration.prior_for("fc") is not None and prep.calibration.prior_for("c2") is not None
    result = pipeline.realize(prep, "params=0.5", latency=False, layer_errors=False)
    ranks = result.plan.ranks
    assert ranks["c2"] is not None and ranks["fc"] is not None  # c2 is replaced before fc is refitted

    def fc_inputs(m):
        seen = []
        handle = m.get_submodule("fc").register_forward_hook(lambda mod, a, o: seen.append(a[0].detach().double().numpy()))
        with torch.no_grad():
            m(torch.from_numpy(cal_x))
        handle.remove()
        return seen[0]

    x, x_new = fc_inputs(model), fc_inputs(result.model)
    rho = ledoit_wolf_shrinkage(x, assume_centered=True)
    alpha = max(0.01, 0.1 * 40 / len(x), rho / (1 - rho))
    lam = alpha * np.mean(np.diag(x_new.T @ x_new))
    g_new = x_new.T @ x_new + lam * np.eye(40)
    cross = x.T @ x_new + lam * np.eye(40)
    w = model.fc.weight.detach().double().numpy()
    m = w @ cross @ np.linalg.inv(g_new)
    s = np.linalg.cholesky(g_new)
    u, sv, vt = np.linalg.svd(m @ s, full_matrices=False)
    k = ranks["fc"]
    want = (u[:, :k] * sv[:k]) @ vt[:k] @ np.linalg.inv(s)
    af, xf = tb.read_factors(result.model, ["fc"])["fc"]
    got = af @ xf
    assert np.allclose(got, want, rtol=1e-4, atol=1e-4 * np.abs(want).max())
    fit = {e["name"]: e["sequential_fit"] for e in result.report["layers"] if e["rank"]}
    assert fit["fc"]["ridge_toward"] == "identity"
    assert fit["fc"]["input_drift"] == pytest.approx(np.linalg.norm(x_new - x) / np.linalg.norm(x), rel=2e-3)
    assert fit["fc"]["input_drift"] > 1e-3
    assert fit["c2"]["ridge_toward"] == "input statistics" and fit["c2"]["input_drift"] == 0
    assert "fc" not in result.report["calibration"]["ridge_toward_input_statistics"]
    # the stale target would give other factors (so the check above can fail)
    t = prep.calibration.prior_for("fc").add_to(np.zeros((40, 40)), 1.0)
    alpha_t = prep.calibration.ridge_for("fc")
    unit = np.mean(np.diag(x_new.T @ x_new))
    g_t = x_new.T @ x_new + (alpha_t - 0.01) * unit * t + 0.01 * unit * np.eye(40)
    c_t = x.T @ x_new + (alpha_t - 0.01) * unit * t + 0.01 * unit * np.eye(40)
    s_t = np.linalg.cholesky(g_t)
    u, sv, vt = np.linalg.svd(w @ c_t @ np.linalg.inv(g_t) @ s_t, full_matrices=False)
    stale = (u[:, :k] * sv[:k]) @ vt[:k] @ np.linalg.inv(s_t)
    assert not np.allclose(got, stale, rtol=1e-3, atol=1e-3 * np.abs(stale).max())


def test_a_layer_with_input_statistics_keeps_the_identity_ridge_for_later_refits():
    # oracle: scikit-learn's ledoit_wolf_shrinkage (assume_centered=True) for the identity target,
    # and the fixed-target intensity written densely with numpy for the prior (Schaefer & Strimmer
    # 2005); each ridge is rho / (1 - rho), at least the 1% floor
    from sklearn.covariance import ledoit_wolf_shrinkage

    from factorize_weights.calibrate import Calibration
    from factorize_weights.stats import Moments, Prior

    rng = np.random.default_rng(31)
    n, rows = 12, 10
    mean, var = rng.uniform(0.5, 1.5, n), rng.uniform(0.1, 2, n)
    x = rng.standard_normal((rows, n)) * np.sqrt(var) + mean
    acc = Moments(n)
    acc.add(x)
    cal = Calibration(_data(x, "cal"), {"fc": acc}, [], 0.01, 0, 10)
    prior = Prior(mean * 0.2, var * 3.0)  # a target unlike the rows: the two intensities differ
    cal.release("fc", shrink=True, prior=prior)
    rho = ledoit_wolf_shrinkage(x, assume_centered=True)
    t = np.diag(prior.var) + np.outer(prior.mean, prior.mean)
    sm = x.T @ x / rows
    mu = np.trace(sm) / n
    b2 = min(np.mean([np.sum((np.outer(r, r) - sm) ** 2) for r in x]) / rows, np.sum((sm - mu * t) ** 2))
    rho_t = b2 / np.sum((sm - mu * t) ** 2)
    assert rho > 0.05 and abs(rho - rho_t) > 0.01
    assert cal.identity_ridge_for("fc") == pytest.approx(max(0.01, rho / (1 - rho)), rel=1e-9)
    assert cal.ridge_for("fc") == pytest.approx(max(0.01, rho_t / (1 - rho_t)), rel=1e-9)
    assert cal.prior_for("fc") is prior
