"""The shared calibration statistics against direct numpy computations on explicitly unfolded
inputs, for both backends and several convolution geometries; the sequential refit against its
closed form; the latency timer times nothing but the forward call."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn

from conftest import assert_float32_products_close
from factorize_weights.backends import onnx_backend as ob
from factorize_weights.backends import torch_backend as tb
from factorize_weights.calibrate import input_moments, paired_moments
from factorize_weights.stats import CrossMoments, Moments


def patches(conv: nn.Module, x: torch.Tensor) -> np.ndarray:
    """Oracle: explicit loops over output positions (numpy), rows ordered like
    weight.reshape(out, -1); 1-D convolutions as 2-D with height 1."""
    two_d = isinstance(conv, nn.Conv2d)
    xp = nn.functional.pad(x, conv._reversed_padding_repeated_twice,
                           mode="constant" if conv.padding_mode == "zeros" else conv.padding_mode).double().numpy()
    if not two_d:
        xp = xp[:, :, None, :]
    kh, kw = conv.kernel_size if two_d else (1, conv.kernel_size[0])
    sh, sw = conv.stride if two_d else (1, conv.stride[0])
    dh, dw = conv.dilation if two_d else (1, conv.dilation[0])
    n, c, h, w = xp.shape
    rows = []
    for i in range(0, h - (kh - 1) * dh, sh):
        for j in range(0, w - (kw - 1) * dw, sw):
            rows.append(xp[:, :, i : i + (kh - 1) * dh + 1 : dh, j : j + (kw - 1) * dw + 1 : dw].reshape(n, -1))
    return np.stack(rows, axis=1).reshape(-1, c * kh * kw)  # (N * positions, C*kh*kw), sample-major


GEOMETRIES = [
    nn.Conv2d(3, 8, 3, padding=1),
    nn.Conv2d(3, 8, (3, 2), stride=(2, 1), padding=(1, 2), dilation=(1, 2)),
    nn.Conv2d(4, 6, 3, stride=2, padding="valid", dilation=2),
    nn.Conv2d(3, 5, 3, padding="same", padding_mode="reflect"),
    nn.Conv1d(4, 6, 5, stride=2, padding=3, dilation=2),
]


@pytest.mark.parametrize("conv", GEOMETRIES, ids=lambda c: repr(c))
def test_torch_conv_moments_equal_numpy_on_explicit_patches(conv):
    torch.manual_seed(0)
    model = nn.Sequential(conv)
    x = torch.randn(5, conv.in_channels, 9, 10) if isinstance(conv, nn.Conv2d) else torch.randn(5, conv.in_channels, 17)
    rec = tb.discover(model)[0]
    stats, samples = input_moments(tb, model, [rec], [x[:2].numpy(), x[2:].numpy()])  # two batches
    p = patches(conv, x)
    # torch itself as the oracle for the patch layout: patches @ W^T is the convolution's output
    expected_out = conv(x).detach().double().numpy()
    out = (p @ tb.weight_matrix(rec).T).reshape(x.shape[0], -1, conv.out_channels)  # (N, positions, out)
    np.testing.assert_allclose(out + conv.bias.detach().double().numpy(),
                               expected_out.reshape(x.shape[0], conv.out_channels, -1).transpose(0, 2, 1),
                               rtol=1e-5, atol=1e-5)  # float32 convolution
    assert samples == 5 and stats["0"].rows == p.shape[0]
    p64 = p.astype(np.float64)  # numpy in float64 as the oracle; the rows were float32 (stats.py)
    assert_float32_products_close(stats["0"].gram, p64.T @ p64, p.shape[0])


@pytest.mark.parametrize("conv", [g for g in GEOMETRIES if isinstance(g, nn.Conv2d) and g.padding_mode == "zeros"],
                         ids=lambda c: repr(c))
def test_onnx_conv_moments_equal_numpy_on_explicit_patches(conv, tmp_path):
    torch.manual_seed(0)
    model = nn.Sequential(conv).eval()
    x = torch.randn(4, conv.in_channels, 9, 10)
    path = tmp_path / "m.onnx"
    tb.export_onnx(model, x.numpy(), path)
    onnx_model = ob.load(path)
    rec = ob.discover(onnx_model)[0]
    stats, _ = input_moments(ob, onnx_model, [rec], [x.numpy()])
    p = patches(conv, x)
    assert stats[rec.name].rows == p.shape[0]
    p64 = p.astype(np.float64)  # numpy in float64 as the oracle; the rows were float32 (stats.py)
    assert_float32_products_close(stats[rec.name].gram, p64.T @ p64, p.shape[0])


def test_accumulators_equal_one_product_over_all_rows(rng):
    x, y = rng.standard_normal((300, 7)), rng.standard_normal((300, 7))
    g, c = Moments(7), CrossMoments(7)
    for start in range(0, 300, 64):  # blocks of rows, summed
        g.add(x[start:start + 64].astype(np.float32))
        c.add(x[start:start + 64], y[start:start + 64])
    x32 = x.astype(np.float32).astype(np.float64)
    assert_float32_products_close(g.gram, x32.T @ x32, 64)  # numpy as the oracle: float32 rows, float64 sums
    # float64 rows are multiplied in float64: exact to rounding
    np.testing.assert_allclose(c.cross, x.T @ y, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(c.gram, y.T @ y, rtol=1e-12)
    assert g.rows == c.rows == 300
    with pytest.raises(ValueError, match="rows of width 7"):
        g.add(np.ones((2, 6)))


class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.a = nn.Linear(6, 8)
        self.conv = nn.Conv1d(2, 3, 3, padding=1)
        self.b = nn.Linear(12, 5)

    def forward(self, x):  # (N, 6)
        h = torch.relu(self.a(x)).reshape(-1, 2, 4)
        return self.b(self.conv(h).reshape(-1, 12))


def _captured_inputs(model, names, x):
    """Oracle helper: each named layer's input captured by a plain forward hook."""
    got = {}
    hooks = [model.get_submodule(n).register_forward_hook(lambda m, a, o, n=n: got.__setitem__(n, a[0].detach()))
             for n in names]
    with torch.no_grad():
        model(x)
    for h in hooks:
        h.remove()
    return got


@pytest.mark.parametrize("early_stop", [False, True])
def test_paired_moments_equal_numpy_on_both_models_inputs(early_stop):
    torch.manual_seed(1)
    model = Net().eval()
    records = tb.discover(model)
    if early_stop:
        tb.call_stages(model, records, np.zeros((1, 6), np.float32))
        assert [r.calls for r in records] == [1, 1, 1]
    rank1 = {"a": tuple(m.numpy().astype(np.float64) for m in (torch.randn(8, 2), torch.randn(2, 6)))}
    current = tb.rewrite(model, records, rank1)
    x = torch.randn(10, 6)
    recs = [r for r in records if r.name in ("conv", "b")]
    acc = paired_moments(tb, model, current, recs, [x[:4].numpy(), x[4:].numpy()])
    before, after = _captured_inputs(model, ["conv", "b"], x), _captured_inputs(current, ["conv", "b"], x)
    conv = model.conv
    p, q = patches(conv, before["conv"]), patches(conv, after["conv"])
    # numpy as the oracle; the captured inputs come from other float32 forward runs (other batch
    # sizes, other kernels), so they agree to float32 rounding only
    close = dict(rtol=1e-5, atol=1e-5)
    np.testing.assert_allclose(acc["conv"].cross, p.T @ q, **close)
    np.testing.assert_allclose(acc["conv"].gram, q.T @ q, **close)
    u, v = before["b"].double().numpy(), after["b"].double().numpy()
    np.testing.assert_allclose(acc["b"].cross, u.T @ v, **close)
    np.testing.assert_allclose(acc["b"].gram, v.T @ v, **close)


def test_stages_group_layers_that_read_the_same_input():
    class Heads(nn.Module):
        def __init__(self):
            super().__init__()
            self.q, self.k, self.v, self.o = (nn.Linear(4, 4) for _ in range(4))

        def forward(self, x):
            return self.o(self.q(x) * self.k(x) + self.v(x))

    model = Heads().eval()
    stages = tb.call_stages(model, tb.discover(model), np.zeros((1, 4), np.float32))
    assert stages == [["q", "k", "v"], ["o"]]


def test_latency_timer_runs_only_the_forward_call(monkeypatch):
    model = Net().eval()
    calls = {"threads": 0, "eval": 0}
    with tb.timing([model], 1):
        run = tb.timer(model, np.zeros((1, 6), np.float32), 1)
        monkeypatch.setattr(torch, "set_num_threads", lambda n: calls.__setitem__("threads", calls["threads"] + 1))
        monkeypatch.setattr(nn.Module, "eval", lambda self: calls.__setitem__("eval", calls["eval"] + 1) or self)
        for _ in range(3):
            run()
        assert calls == {"threads": 0, "eval": 0}


def test_sequential_refit_equals_the_closed_form_layer_by_layer():
    # reduced-rank regression (common practice; the closed form in whiten.py): the second layer,
    # fed the inputs X' the refitted first layer produces, becomes [M S']_k S'^{-1} with
    # M = W C G'^{-1}, C = X X'^T, S' S'^T = G' = X' X'^T (both with the same relative ridge)
    from factorize_weights import CompressConfig
    from factorize_weights.calibrate import calibrate, sequential_refit
    from factorize_weights.data import HeldOut

    torch.manual_seed(3)
    model = nn.Sequential(nn.Linear(12, 10), nn.Tanh(), nn.Linear(10, 9)).eval()
    records = tb.discover(model)
    x = torch.randn(200, 12)
    data = HeldOut(x.numpy(), None, "test")
    config = CompressConfig(ridge=0.01, sequential_groups=10)
    cal = calibrate(model, records, data, config, 64)
    stages = tb.call_stages(model, records, x[:1].numpy())
    ranks = {"0": 3, "2": 3}
    working, fits, _ = sequential_refit(model, records, ranks, cal, config, stages)
    orig = _captured_inputs(model, ["2"], x)["2"].double().numpy()  # (N, 10): X as rows
    new = _captured_inputs(working, ["2"], x)["2"].double().numpy()
    lam = 0.01 * np.mean(np.diag(new.T @ new))
    g_new = new.T @ new + lam * np.eye(10)
    cross = orig.T @ new + lam * np.eye(10)
    w = tb.weight_matrix(records[1])
    m = w @ cross @ np.linalg.inv(g_new)
    s = np.linalg.cholesky(g_new)
    u, sv, vt = np.linalg.svd(m @ s)  # numpy as the reference SVD
    expected = (u[:, :3] * sv[:3]) @ vt[:3] @ np.linalg.inv(s)
    pair = working.get_submodule("2")
    got = (pair.expand.weight @ pair.reduce.weight).detach().double().numpy()
    np.testing.assert_allclose(got, expected, rtol=1e-4, atol=1e-5)  # float32 weights
    assert fits["2"]["method"] == "cholesky"


class Block(nn.Module):
    def __init__(self):
        super().__init__()
        self.up, self.down = nn.Linear(6, 12), nn.Linear(12, 6)

    def forward(self, x, scale=None):
        return x + self.down(torch.relu(self.up(x))) * scale


class Chain(nn.Module):
    def __init__(self):
        super().__init__()
        self.embed = nn.Linear(5, 6)
        self.blocks = nn.ModuleList(Block() for _ in range(3))
        self.head = nn.Linear(6, 4)

    def forward(self, x):
        h, scale = self.embed(x), torch.tensor(0.5)
        for block in self.blocks:
            h = block(h, scale=scale)
        return self.head(h)


class RateChain(Chain):
    """Each block gets a plain number of its own (like a per-block drop rate)."""

    def forward(self, x):
        h = self.embed(x)
        for i, block in enumerate(self.blocks):
            h = block(h, scale=0.25 * (i + 1))
        return self.head(h)


@pytest.mark.parametrize("chain_cls, own, groups, at", [
    # the same mask object for every block
    (Chain, {}, (["embed"], ["blocks.0.up"], ["blocks.1.up"], ["blocks.1.down", "blocks.2.up"], ["head"]), 1),
    # a plain value per block: a replay with block 0's value everywhere would differ
    (RateChain, {1: ({}, {"scale": 0.5}), 2: ({}, {"scale": 0.75})}, (["blocks.0.up"], ["blocks.2.down"], ["head"]), 2),
])
def test_chain_cached_passes_equal_whole_model_passes(chain_cls, own, groups, at):
    # the whole-model paired passes (checked against numpy above) as the oracle for the cached ones
    torch.manual_seed(4)
    model = chain_cls().eval()
    records = tb.discover(model)
    x = torch.randn(40, 5)
    batches = [x[:16].numpy(), x[16:].numpy()]
    chain = tb.find_chain(model, records, batches[0])
    assert chain is not None and chain[0] == ["blocks.0", "blocks.1", "blocks.2"]
    assert chain[1] == {"blocks.0.up": 0, "blocks.0.down": 0, "blocks.1.up": 1, "blocks.1.down": 1,
                        "blocks.2.up": 2, "blocks.2.down": 2}
    assert chain[2] == own
    runs = _cached_against_whole_model(model, records, batches, groups)
    assert runs.at == at  # the cache moved through the chain instead of rerunning the model


def _cached_against_whole_model(model, records, batches, groups):
    """Paired moments of each group from the chain cache equal those of whole-model passes; each
    group is then patched in place with random rank-2 factors, as a refit does."""
    tb.call_stages(model, records, batches[0])
    by = {r.name: r for r in records}
    working = tb.rewrite(model, records, {})
    runs = tb.paired_runs(model, working, records, batches)
    rng = np.random.default_rng(0)
    for names in groups:
        recs = [by[n] for n in names]
        cached = {n: CrossMoments(by[n].matrix_shape[1]) for n in names}
        runs.stream(recs, lambda name, a, b: cached[name].add(a, b))
        direct = {n: CrossMoments(by[n].matrix_shape[1]) for n in names}
        tb.stream_paired_inputs(model, working, recs, batches, lambda name, a, b: direct[name].add(a, b))
        for n in names:
            np.testing.assert_allclose(cached[n].cross, direct[n].cross, rtol=1e-5, atol=1e-6)
            np.testing.assert_allclose(cached[n].gram, direct[n].gram, rtol=1e-5, atol=1e-6)
        m, n_in = by[names[0]].matrix_shape
        tb.rewrite(working, records, {names[0]: (rng.standard_normal((m, 2)), rng.standard_normal((2, n_in)))},
                   in_place=True)
    return runs


@pytest.mark.parametrize("shape", [(12, 30), (20, 20)])
def test_left_gram_whitened_factors_equal_the_cholesky_route(shape):
    # Wang et al. 2024 (arXiv 2403.07378): [W S]_k S^{-1} with S S^T = G (Cholesky, whiten.py, checked
    # against its theorem in test_calibration) as the oracle for the projection U_k U_k^T W
    from factorize_weights.methods import Whitened
    from factorize_weights.whiten import whitening

    rng = np.random.default_rng(2)
    w = rng.standard_normal(shape)
    x = rng.standard_normal((shape[1], 400)) * np.geomspace(3, 0.1, shape[1])[:, None]
    g = x @ x.T
    dec = Whitened.decompose_left("w", w, g, dtype="float64")
    ref = np.linalg.svd(w @ np.linalg.cholesky(g), compute_uv=False)  # numpy as the reference SVD
    np.testing.assert_allclose(dec.spectrum.singular_values, ref, rtol=1e-8)
    for k in (1, 3, len(dec.values)):
        a, f = dec.factors(k)
        ca, cf = Whitened.decompose_whitened("w", w, whitening(g), dtype="float64").factors(k)
        np.testing.assert_allclose(a @ f, ca @ cf, rtol=1e-7, atol=1e-9)


def test_public_names_stay_functions_after_their_modules_are_imported():
    # a package attribute named like a submodule (allocate.py) must stay the function the README uses
    import subprocess
    import sys

    code = ("import factorize_weights.pipeline, factorize_weights.allocate, sys, factorize_weights as fw; "
            "assert callable(fw.allocate) and fw.allocate.__module__ == 'factorize_weights.allocate'; "
            "import factorize_weights.spectra; print('torch' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "False"  # and the numeric core, pipeline included, did not import torch


class _InPlace(nn.Module):
    """A block that scales its input in place before using it."""

    def __init__(self):
        super().__init__()
        self.up, self.down = nn.Linear(6, 12), nn.Linear(12, 6)

    def forward(self, x):
        x.mul_(0.5)
        return x + self.down(torch.relu(self.up(x)))


def test_chain_cache_survives_blocks_that_change_their_input_in_place():
    # whole-model passes (checked against numpy above) as the oracle for the cached ones
    torch.manual_seed(6)
    model = nn.Sequential(nn.Linear(5, 6), nn.Sequential(*[_InPlace() for _ in range(3)]), nn.Linear(6, 2)).eval()
    records = tb.discover(model)
    batches = [torch.randn(12, 5).numpy()]
    runs = _cached_against_whole_model(model, records, batches, (["1.0.up"], ["1.0.down"], ["1.1.up"], ["1.2.down"]))
    assert runs.blocks  # the chain was used, not bypassed


def test_blocks_fed_a_changing_cache_object_are_not_replayed(monkeypatch):
    # transformers' GPT-2 run with its key/value cache hands every block a cache object that changes
    # as it runs: replaying a block with it is wrong, so the refit must use whole-model passes (and
    # not crash with a mask). The tool runs decoders with use_cache=False (the chain is then found,
    # test_language_models.py); here that switch is turned off to keep the cache in.
    transformers = pytest.importorskip("transformers", reason="the optional 'transformers' package is not installed")
    from factorize_weights import CompressConfig, HeldOut, compress
    from factorize_weights.backends.torch_backend import running

    torch.manual_seed(0)
    cfg = transformers.GPT2Config(vocab_size=60, n_embd=32, n_layer=3, n_head=4, n_positions=32)
    model = transformers.GPT2Model(cfg).eval()
    ids = np.random.default_rng(0).integers(0, 60, (24, 8)).astype(np.int64)
    data = {"input_ids": ids, "attention_mask": np.ones_like(ids)}
    first = {k: v[:1] for k, v in data.items()}
    assert tb.find_chain(model, tb.discover(model), first) is not None  # without a cache: replayed
    monkeypatch.setattr(running, "_has_cache_switch", lambda m: False)
    assert tb.find_chain(model, tb.discover(model), first) is None
    held = {"input_ids": ids[:8], "attention_mask": np.ones_like(ids[:8])}
    result = compress(model, CompressConfig(budget="params=0.5", quiet=True, latency_repeats=0, sequential_groups=2),
                      heldout=HeldOut(held, None, "held"), calibration=HeldOut(data, None, "cal"))
    assert result.report["sequential"] and result.metric.after > 0.5


def test_streamed_shrinkage_equals_scikit_learns_ledoit_wolf():
    # oracle: scikit-learn's ledoit_wolf_shrinkage on the same rows (uncentred: assume_centered=True),
    # the estimator of Ledoit & Wolf (J. Multivariate Analysis 88, 2004)
    from sklearn.covariance import ledoit_wolf_shrinkage

    rng = np.random.default_rng(11)
    for rows, n in ((40, 30), (300, 20), (25, 80)):
        x = rng.standard_normal((rows, n)) @ rng.standard_normal((n, n)) * 0.3 + 0.1
        acc = Moments(n)
        for block in np.array_split(x, 3):
            acc.add(block)
        expected = ledoit_wolf_shrinkage(x, assume_centered=True, block_size=1000)
        assert acc.shrinkage() == pytest.approx(expected, rel=1e-9, abs=1e-12)
    # few rows per feature shrink hard; many rows hardly at all
    scales = np.exp(np.linspace(-2, 2, 50))  # an anisotropic truth (for isotropic data mu I is exact)
    few, many = Moments(50), Moments(50)
    few.add(rng.standard_normal((20, 50)) * scales)
    many.add(rng.standard_normal((20000, 50)) * scales)
    assert few.shrinkage() > 0.3 > 0.01 > many.shrinkage()


def test_rows_ridge_floors_the_ridge_of_layers_with_few_rows_per_feature():
    # the floor is rows_ridge x width / rows (config.py says why); where a layer has many rows per
    # feature the ridge is the Ledoit-Wolf one (scikit-learn's ledoit_wolf_shrinkage as oracle)
    from sklearn.covariance import ledoit_wolf_shrinkage

    from factorize_weights.calibrate import Calibration
    from factorize_weights.data import HeldOut
    from factorize_weights.stats import shrinkage_ridge

    rng = np.random.default_rng(12)
    scales = np.exp(np.linspace(-2, 2, 60))
    data = {"few": rng.standard_normal((30, 60)) * scales, "many": rng.standard_normal((3000, 60)) * scales}
    moments = {}
    for name, x in data.items():
        moments[name] = Moments(60)
        moments[name].add(x)
    cal = Calibration(HeldOut(np.zeros((1, 1), np.float32), None, "cal"), moments, ridge=0.01, rows_ridge=0.5)
    for name in data:
        cal.release(name, shrink=True)
    lw = {name: shrinkage_ridge(ledoit_wolf_shrinkage(x, assume_centered=True), 0.01) for name, x in data.items()}
    assert cal.ridge_for("few") == pytest.approx(max(lw["few"], 0.5 * 60 / 30))  # the floor binds: 1.0
    assert cal.ridge_for("few") == pytest.approx(1.0)
    assert cal.ridge_for("many") == pytest.approx(lw["many"])  # 0.5 x 60 / 3000 = 0.01 does not bind
