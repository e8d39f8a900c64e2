"""Models built from stock parts, random weights, no downloads: for each, every weight matrix is
either selected or skipped with a reason, a full-rank rewrite reproduces the outputs, compress at
params=0.5 runs end to end with a held-out set, the saved result reloads to the same outputs, and
its ONNX export passes the checker. The original model (torch itself) is the oracle."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn

from factorize_weights.backends import torch_backend as tb
from factorize_weights.factors import svd_factors


class CnnBn(nn.Module):
    def __init__(self):
        super().__init__()
        self.features = nn.Sequential(nn.Conv2d(3, 16, 3, padding=1), nn.BatchNorm2d(16), nn.ReLU(),
                                      nn.Conv2d(16, 32, 3, stride=2, padding=1), nn.BatchNorm2d(32), nn.ReLU(),
                                      nn.Conv2d(32, 32, 3, padding=1, groups=32), nn.ReLU())
        self.head = nn.Linear(32, 10)

    def forward(self, x):
        return self.head(self.features(x).mean((2, 3)))


class Conv1dNet(nn.Module):
    def __init__(self):
        super().__init__()
        self.body = nn.Sequential(nn.Conv1d(4, 24, 5, padding=2), nn.ReLU(), nn.Conv1d(24, 24, 3, dilation=2, padding=2),
                                  nn.ReLU())
        self.head = nn.Linear(24, 3)

    def forward(self, x):
        return self.head(self.body(x).mean(2))


class Encoder(nn.Module):
    def __init__(self):
        super().__init__()
        self.enc = nn.TransformerEncoder(nn.TransformerEncoderLayer(32, 4, 64, batch_first=True, dropout=0.0), 2,
                                         enable_nested_tensor=False)
        self.head = nn.Linear(32, 5)

    def forward(self, x):
        return self.head(self.enc(x).mean(1))


class Seq2Seq(nn.Module):
    """nn.Transformer (encoder-decoder) on a fixed target prefix."""

    def __init__(self):
        super().__init__()
        self.t = nn.Transformer(32, 4, 2, 2, 64, dropout=0.0, batch_first=True)
        self.tgt = nn.Parameter(torch.randn(1, 4, 32))
        self.head = nn.Linear(32, 6)

    def forward(self, x):
        return self.head(self.t(x, self.tgt.expand(x.shape[0], -1, -1)))


def _hf(name):
    transformers = pytest.importorskip("transformers", reason="the optional 'transformers' package is not installed")
    if name == "bert":
        cfg = transformers.BertConfig(vocab_size=60, hidden_size=64, num_hidden_layers=2, num_attention_heads=4,
                                      intermediate_size=128, max_position_embeddings=32)
        return transformers.BertModel(cfg)
    if name == "distilbert":
        cfg = transformers.DistilBertConfig(vocab_size=60, dim=64, n_layers=2, n_heads=4, hidden_dim=128,
                                            max_position_embeddings=32)
        return transformers.DistilBertModel(cfg)
    cfg = transformers.GPT2Config(vocab_size=60, n_embd=64, n_layer=2, n_head=4, n_positions=32)
    return transformers.GPT2Model(cfg)


def _tokens(n, seed):
    rng = np.random.default_rng(seed)
    ids = rng.integers(0, 60, (n, 10)).astype(np.int64)
    return {"input_ids": ids, "attention_mask": np.ones_like(ids)}


ARCHS = {
    "mlp": (lambda: nn.Sequential(nn.Linear(20, 64), nn.ReLU(), nn.Linear(64, 64), nn.ReLU(), nn.Linear(64, 5)),
            lambda n, s: np.random.default_rng(s).standard_normal((n, 20)).astype(np.float32)),
    "cnn with batchnorm": (CnnBn, lambda n, s: np.random.default_rng(s).standard_normal((n, 3, 12, 12)).astype(np.float32)),
    "conv1d": (Conv1dNet, lambda n, s: np.random.default_rng(s).standard_normal((n, 4, 30)).astype(np.float32)),
    "nn.TransformerEncoder": (Encoder, lambda n, s: np.random.default_rng(s).standard_normal((n, 6, 32)).astype(np.float32)),
    "nn.Transformer": (Seq2Seq, lambda n, s: np.random.default_rng(s).standard_normal((n, 5, 32)).astype(np.float32)),
    "transformers BERT": (lambda: _hf("bert"), _tokens),
    "transformers DistilBERT": (lambda: _hf("distilbert"), _tokens),
    "transformers GPT-2": (lambda: _hf("gpt2"), _tokens),
}


def _run(model, x):
    with torch.no_grad():
        out = tb.predict(model, x)
    return out


@pytest.mark.parametrize("arch", list(ARCHS))
def test_stock_architecture(arch, tmp_path):
    from factorize_weights import CompressConfig, HeldOut, compress, load_factorized

    build, data = ARCHS[arch]
    torch.manual_seed(0)
    model = build().eval()
    records = tb.discover(model)
    # every weight matrix is accounted for: selected, or skipped with a reason
    listed = {r.name for r in records}
    for name, module in model.named_modules():
        w = module._parameters.get("weight") if hasattr(module, "_parameters") else None
        if isinstance(w, torch.Tensor) and w.dim() >= 2 and not isinstance(module, (nn.Embedding, nn.LayerNorm)):
            assert name in listed, f"{arch}: weight of {name} ({type(module).__name__}) is unaccounted for"
    assert all(r.skip_reason is None or r.skip_reason for r in records)
    x = data(16, 1)
    reference = _run(model, x)
    # a full-rank rewrite computes what the original computes (float32 tolerance)
    chosen = [r for r in records if r.skip_reason is None]
    assert chosen, f"{arch}: nothing selected"
    full = {r.name: svd_factors(tb.weight_matrix(r), min(r.matrix_shape)) for r in chosen}
    np.testing.assert_allclose(_run(tb.rewrite(model, records, full), x), reference, rtol=1e-4,
                               atol=1e-4 * max(1.0, float(np.abs(reference).max())))
    # compress end to end with a held-out set, save, reload, same outputs; the export checks itself
    result = compress(model, CompressConfig(budget="params=0.5", quiet=True, latency_repeats=2, export_onnx=True),
                      heldout=HeldOut(x, None, "x"), out=tmp_path / "run")
    assert result.report["budget"]["met"] and result.report["export"]["max_abs_diff"] <= result.report["export"]["tolerance"]
    torch.manual_seed(0)
    rebuilt = load_factorized(build().eval(), tmp_path / "run")
    np.testing.assert_array_equal(_run(rebuilt, x), _run(result.model, x))
