"""PyTorch backend: discovery, rewrite exactness, dtype/device, save and rebuild."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn

from factorize_weights import store
from factorize_weights.backends import torch_backend as tb
from factorize_weights.factors import svd_factors


class Zoo(nn.Module):
    """One of every layer the discovery must classify."""

    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 16, 3, padding=1)
        self.depthwise = nn.Conv2d(16, 16, 3, padding=1, groups=16)
        self.grouped = nn.Conv2d(16, 32, 1, groups=4)
        self.up = nn.ConvTranspose2d(32, 8, 2)
        self.seq = nn.Conv1d(8, 24, 5, padding=2)
        self.attn = nn.MultiheadAttention(24, 4, batch_first=True)
        self.enc = nn.Sequential(nn.Linear(24, 48), nn.ReLU(), nn.Linear(48, 24))
        self.score = nn.Linear(24, 1)
        self.tied = nn.Linear(24, 48)
        self.tied_again = nn.Linear(24, 48)
        self.tied_again.weight = self.tied.weight


def test_discovery_finds_every_layer_and_gives_reasons():
    recs = {r.name: r for r in tb.discover(Zoo())}
    assert recs["stem"].skip_reason is None and recs["stem"].matrix_shape == (16, 27)  # 3*3*3
    assert recs["seq"].kind == "conv1d" and recs["seq"].matrix_shape == (24, 40)
    assert recs["enc.0"].matrix_shape == (48, 24) and recs["enc.0"].skip_reason is None
    assert "depthwise" in recs["depthwise"].skip_reason
    assert "grouped convolution (groups=4)" in recs["grouped"].skip_reason
    assert "transposed" in recs["up"].skip_reason
    assert "MultiheadAttention" in recs["attn.out_proj"].skip_reason
    assert "no rank would save" in recs["score"].skip_reason  # 1x24: break-even 0
    # both layers that share one weight stay dense: rewriting one would keep the dense copy alive
    assert "shared with 'tied_again'" in recs["tied"].skip_reason
    assert "shared with 'tied'" in recs["tied_again"].skip_reason
    assert recs["stem"].options["padding"] == (1, 1) and recs["stem"].has_bias


def test_weights_tied_to_other_modules_aliases_and_parametrizations():
    class Net(nn.Module):
        def __init__(self):
            super().__init__()
            self.emb = nn.Embedding(50, 16)
            self.head = nn.Linear(16, 50)
            self.head.weight = self.emb.weight  # tied to an Embedding, not to a Linear
            self.a = nn.Linear(16, 16)
            self.b = self.a  # one module under two names
            self.norm = nn.utils.parametrizations.weight_norm(nn.Linear(16, 16))
            self.norm2 = nn.utils.parametrizations.weight_norm(nn.Linear(16, 16))

    model = Net().eval()
    recs = {r.name: r for r in tb.discover(model)}
    assert "shared with 'emb'" in recs["head"].skip_reason
    assert "reachable as 'a', 'b'" in recs["a"].skip_reason
    # parametrized weights are computed tensors: not a tie, and they factorize like any other
    assert recs["norm"].skip_reason is None and recs["norm2"].skip_reason is None
    new = tb.rewrite(model, list(recs.values()), {"norm": svd_factors(tb.weight_matrix(recs["norm"]), 16)})
    x = torch.randn(3, 16)
    with torch.no_grad():
        torch.testing.assert_close(new.norm(x), model.norm(x), rtol=1e-5, atol=1e-5)


def test_only_and_skip_globs():
    recs = {r.name: r for r in tb.discover(Zoo(), only=["enc.*", "stem"], skip=["enc.2"])}
    assert recs["enc.0"].skip_reason is None and recs["stem"].skip_reason is None
    assert recs["enc.2"].skip_reason == "excluded by --skip 'enc.2'"
    assert recs["seq"].skip_reason.startswith("not matched by --only")


CASES = [
    ("linear", lambda: nn.Linear(40, 30), (5, 40)),
    ("linear-3d-input", lambda: nn.Linear(40, 30, bias=False), (2, 7, 40)),
    ("conv1d", lambda: nn.Conv1d(6, 12, 5, stride=2, padding=3, dilation=2), (3, 6, 33)),
    ("conv2d", lambda: nn.Conv2d(4, 10, (3, 2), stride=(2, 1), padding=(1, 2), dilation=(1, 2)), (2, 4, 11, 9)),
    ("conv2d-same", lambda: nn.Conv2d(4, 10, 3, padding="same", bias=False), (2, 4, 7, 7)),
    ("conv2d-reflect", lambda: nn.Conv2d(4, 10, 3, padding=1, padding_mode="reflect"), (2, 4, 6, 6)),
]


def one_layer(make, seed):
    """A float64 model of one layer, its record and its matrix view."""
    torch.manual_seed(seed)
    model = nn.Sequential(make()).double().eval()
    rec = tb.discover(model)[0]
    return model, rec, tb.weight_matrix(rec)


@pytest.mark.parametrize("name, make, shape", CASES, ids=[c[0] for c in CASES])
def test_full_rank_rewrite_equals_the_original(name, make, shape):
    model, rec, w = one_layer(make, 0)
    full = min(w.shape)
    new = tb.rewrite(model, [rec], {rec.name: svd_factors(w, full)})
    assert isinstance(new[0], tb.FactorPair) and new[0].rank == full
    x = torch.randn(*shape, dtype=torch.float64)
    with torch.no_grad():
        # float64 throughout: agreement to ~1e-12 of the output scale (common practice)
        torch.testing.assert_close(new(x), model(x), rtol=1e-10, atol=1e-10)


@pytest.mark.parametrize("name, make, shape", CASES, ids=[c[0] for c in CASES])
def test_rank_k_rewrite_equals_numpy_reconstruction(name, make, shape):
    # oracle: the same layer with its weight replaced by numpy's rank-k truncated SVD
    model, rec, w = one_layer(make, 1)
    k = 3
    u, s, vt = np.linalg.svd(w, full_matrices=False)
    w_k = (u[:, :k] * s[:k]) @ vt[:k]
    reference = nn.Sequential(make()).double().eval()
    reference.load_state_dict(model.state_dict())
    with torch.no_grad():
        reference[0].weight.copy_(torch.from_numpy(w_k).reshape(reference[0].weight.shape))
    new = tb.rewrite(model, [rec], {rec.name: svd_factors(w, k)})
    x = torch.randn(*shape, dtype=torch.float64)
    with torch.no_grad():
        torch.testing.assert_close(new(x), reference(x), rtol=1e-10, atol=1e-10)


def test_rewrite_keeps_dtype_and_leaves_the_original_alone():
    model = nn.Sequential(nn.Linear(32, 32), nn.ReLU(), nn.Conv1d(32, 16, 1)).to(torch.bfloat16)
    before = {k: v.clone() for k, v in model.state_dict().items()}
    recs = tb.discover(model)
    new = tb.rewrite(model, recs, {r.name: svd_factors(tb.weight_matrix(r), 4) for r in recs})
    assert all(p.dtype == torch.bfloat16 for p in new.parameters())
    assert all(torch.equal(before[k], v) for k, v in model.state_dict().items())
    assert isinstance(model[0], nn.Linear) and isinstance(new[0], tb.FactorPair)
    assert "rank=4" in repr(new[0])
    assert new[0].reduce.weight.shape == (4, 32) and new[0].expand.weight.shape == (32, 4)


def test_factorized_params_match_the_formula():
    # rank k of an m x n layer: k*(m+n) weights plus the unchanged bias (derivable)
    model = nn.Sequential(nn.Conv2d(8, 20, 3))
    rec = tb.discover(model)[0]
    new = tb.rewrite(model, [rec], {rec.name: svd_factors(tb.weight_matrix(rec), 5)})
    assert tb.count_params(new) == 5 * (20 + 72) + 20 == rec.factorized_params(5)


def test_save_and_rebuild_from_the_original_model(tmp_path):
    from factorize_weights.config import CompressConfig
    from factorize_weights.run import compress

    torch.manual_seed(2)
    model = nn.Sequential(nn.Conv2d(3, 32, 3), nn.ReLU(), nn.Flatten(), nn.Linear(32 * 4 * 4, 64),
                          nn.ReLU(), nn.Linear(64, 10)).eval()
    out = tmp_path / "run"
    result = compress(model, CompressConfig(budget="params=0.4", quiet=True), out=out)
    assert sorted(p.name for p in out.iterdir()) == sorted(store.FILES)
    rebuilt = store.load_factorized(model, out)
    x = torch.randn(4, 3, 6, 6)
    with torch.no_grad():
        assert torch.equal(rebuilt(x), result.model(x))  # bit for bit: same structure, same weights
    assert not any(isinstance(m, tb.FactorPair) for m in model.modules())


def test_rebuild_refuses_a_plan_for_another_model(tmp_path):
    from factorize_weights.errors import InputError

    model = nn.Sequential(nn.Linear(16, 16))
    (tmp_path / "plan.json").write_text(
        '{"format": "factorize-weights/plan", "version": 1, "layers": '
        '[{"name": "0", "kind": "linear", "shape": [8, 16], "rank": 2}]}'
    )
    (tmp_path / "model.safetensors").write_bytes(b"")
    with pytest.raises(InputError, match=r"layer '0' is linear \[8, 16\] in the plan but linear \[16, 16\]"):
        store.load_factorized(model, tmp_path)


class _Encoder(nn.Module):
    """Stock parts: nn.TransformerEncoder (eval-mode fast path available) and a linear head."""

    def __init__(self):
        super().__init__()
        layer = nn.TransformerEncoderLayer(32, 4, 64, batch_first=True, dropout=0.0)
        self.enc = nn.TransformerEncoder(layer, 2, enable_nested_tensor=False)
        self.head = nn.Linear(32, 5)

    def forward(self, x):  # (N, T, 32)
        return self.head(self.enc(x).mean(1))


def test_stock_transformer_encoder_layers_compress_save_and_reload(tmp_path):
    # torch itself (the original model) as the oracle: a full-rank rewrite reproduces its outputs,
    # and the saved result rebuilt from a fresh original computes what the run's model computed
    from factorize_weights.config import CompressConfig
    from factorize_weights.data import HeldOut
    from factorize_weights.run import compress

    torch.manual_seed(5)
    model = _Encoder().eval()
    reasons = {r.name: r.skip_reason for r in tb.discover(model)}  # the module as PyTorch ships it
    assert "convert the module into four linear projections" in reasons["enc.layers.0.self_attn.in_proj"]
    converted = tb.normalize(model)  # what compress works on: q/k/v/out as nn.Linear, same function
    records = tb.discover(converted)
    reasons = {r.name: r.skip_reason for r in records}
    for name in ("q_proj", "k_proj", "v_proj", "out_proj"):
        assert reasons[f"enc.layers.0.self_attn.{name}"] is None
    assert reasons["enc.layers.0.linear1"] is None and reasons["head"] is None
    x = torch.randn(8, 6, 32)
    full = {r.name: svd_factors(tb.weight_matrix(r), min(r.matrix_shape)) for r in records if r.skip_reason is None}
    with torch.no_grad():
        np.testing.assert_allclose(tb.rewrite(converted, records, full)(x), model(x), atol=1e-5)
    result = compress(model, CompressConfig(budget="params=0.5", quiet=True, latency_repeats=2),
                      heldout=HeldOut(x.numpy(), None, "x"), out=tmp_path / "run")
    assert result.report["totals"]["layers_factorized"] >= 1
    assert any(e["name"].endswith("self_attn.q_proj") for e in result.report["layers"])
    rebuilt = store.load_factorized(_Encoder().eval(), tmp_path / "run")
    with torch.no_grad():
        assert torch.equal(rebuilt(x), result.model(x))


class _Scaled(nn.Linear):
    def forward(self, x):
        return 2.0 * super().forward(x)


class _Plain(nn.Linear):
    pass


def test_unpack_attention_computes_what_multihead_attention_computes():
    # oracle: torch's own nn.MultiheadAttention on the same inputs, masks and options
    from factorize_weights.backends.torch_backend.attention import UnpackedAttention

    torch.manual_seed(9)
    for batch_first, kdim in ((True, None), (False, 12)):
        mha = nn.MultiheadAttention(16, 4, batch_first=batch_first, kdim=kdim, vdim=kdim).eval()
        split = UnpackedAttention(mha).eval()
        q, k = torch.randn(3, 5, 16), torch.randn(3, 7, kdim or 16)
        if not batch_first:
            q, k = q.transpose(0, 1), k.transpose(0, 1)
        pad = torch.zeros(3, 7, dtype=torch.bool)
        pad[0, -2:] = True
        mask = torch.randn(5, 7)
        for kwargs in ({}, {"key_padding_mask": pad}, {"attn_mask": mask}, {"average_attn_weights": False},
                       {"attn_mask": mask > 1, "key_padding_mask": pad, "need_weights": False}):
            with torch.no_grad():
                want, got = mha(q, k, k, **kwargs), split(q, k, k, **kwargs)
            torch.testing.assert_close(got[0], want[0], rtol=1e-5, atol=1e-6)
            assert (got[1] is None) == (want[1] is None)
            if want[1] is not None:
                torch.testing.assert_close(got[1], want[1], rtol=1e-5, atol=1e-6)
    odd = nn.MultiheadAttention(16, 4, add_bias_kv=True)
    reasons = {r.name: r.skip_reason for r in tb.discover(tb.normalize(nn.Sequential(odd)))}
    assert "bias_k/bias_v is not converted" in reasons["0.in_proj"]


def test_layers_whose_behaviour_a_rewrite_would_change_are_skipped_with_a_reason():
    model = nn.Sequential(_Scaled(16, 16), _Plain(16, 16), nn.Linear(16, 16))
    model[2].register_forward_hook(lambda m, a, o: o)
    reasons = {r.name: r.skip_reason for r in tb.discover(model)}
    assert "overrides forward()" in reasons["0"]
    assert reasons["1"] is None  # a subclass that keeps Linear.forward is the same function
    assert "forward hooks" in reasons["2"]
