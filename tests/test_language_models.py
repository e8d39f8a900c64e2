"""Causal language models: perplexity, decoder folders end to end, generation after the rewrite,
statistics over real tokens only, half-precision checkpoints.

Oracles: ``torch.nn.functional.cross_entropy`` on the shifted logits and the loss transformers'
own causal-LM heads compute from ``labels`` (the original models, run by torch and transformers);
transformers' ``generate()`` with and without its key/value cache; the causal-attention fact that
right padding cannot change what the real tokens before it compute (a property of the causal mask,
Vaswani et al. 2017), checked by running the unpadded sequences one by one. The models are small
configurations built here with random weights: the checks compare the tool against torch running
the same model, never against remembered values."""

from __future__ import annotations

import json
import math
import subprocess
import sys

import numpy as np
import pytest
import torch

import factorize_weights as fw
from factorize_weights.metrics import MetricAccumulator, check_metric
from factorize_weights.errors import InputError

transformers = pytest.importorskip("transformers")

VOCAB = 97


def _llama(tied: bool = True, dtype=torch.float32):
    torch.manual_seed(0)
    cfg = transformers.LlamaConfig(vocab_size=VOCAB, hidden_size=64, intermediate_size=128, num_hidden_layers=2,
                                   num_attention_heads=4, num_key_value_heads=2, max_position_embeddings=64,
                                   tie_word_embeddings=tied)
    return transformers.LlamaForCausalLM(cfg).to(dtype).eval()


def _gpt2():
    torch.manual_seed(1)
    cfg = transformers.GPT2Config(vocab_size=VOCAB, n_embd=64, n_layer=2, n_head=4, n_positions=64)
    return transformers.GPT2LMHeadModel(cfg).eval()


def _tokens(n: int, t: int, seed: int, pad: bool = True) -> dict:
    """Token ids with right padding on every other row (mask 0, id 0 there)."""
    rng = np.random.default_rng(seed)
    ids = rng.integers(1, VOCAB, (n, t)).astype(np.int64)
    mask = np.ones((n, t), dtype=np.int64)
    if pad:
        for i in range(0, n, 2):
            cut = int(rng.integers(t // 2, t))
            mask[i, cut:] = 0
            ids[i, cut:] = 0
    return {"input_ids": ids, "attention_mask": mask}


def _save_npz(path, arrays: dict) -> str:
    np.savez(path, **arrays)
    return str(path)


def _logits(model, batch) -> np.ndarray:
    with torch.no_grad():
        return model(**{k: torch.from_numpy(v) for k, v in batch.items()}).logits.float().numpy()


def _torch_perplexity(logits: np.ndarray, batch: dict) -> float:
    """Oracle: mean cross-entropy of the shifted logits by torch, padding ignored (ignore_index)."""
    labels = torch.from_numpy(np.where(batch["attention_mask"] != 0, batch["input_ids"], -100))
    z = torch.from_numpy(logits)[:, :-1].reshape(-1, logits.shape[-1]).double()
    loss = torch.nn.functional.cross_entropy(z, labels[:, 1:].reshape(-1), ignore_index=-100)
    return math.exp(float(loss))


def test_perplexity_matches_torch_cross_entropy_and_transformers_loss():
    model = _llama()
    batch = _tokens(6, 12, seed=2)
    logits = _logits(model, batch)
    other = logits + 0.3 * np.random.default_rng(4).standard_normal(logits.shape).astype(np.float32)
    acc = MetricAccumulator("perplexity")
    for rows in (slice(0, 4), slice(4, 6)):  # streamed in two batches: tokens weigh equally
        acc.update(logits[rows], other[rows], None, batch["attention_mask"][rows],
                   {k: v[rows] for k, v in batch.items()})
    result = acc.result()
    assert result.before == pytest.approx(_torch_perplexity(logits, batch), rel=1e-6)
    assert result.after == pytest.approx(_torch_perplexity(other, batch), rel=1e-6)
    assert result.loss["before"] == pytest.approx(math.log(result.before))
    # transformers' own loss from labels (its causal-LM convention: labels aligned, shifted inside)
    labels = torch.from_numpy(np.where(batch["attention_mask"] != 0, batch["input_ids"], -100))
    with torch.no_grad():
        hf = model(input_ids=torch.from_numpy(batch["input_ids"]), attention_mask=torch.from_numpy(
            batch["attention_mask"]), labels=labels).loss
    assert result.loss["before"] == pytest.approx(float(hf), rel=1e-5)
    scored = int(((batch["attention_mask"][:, :-1] != 0) & (batch["attention_mask"][:, 1:] != 0)).sum())
    assert result.samples == scored and result.per_position == {"positions": scored, "masked_by": ["attention_mask"]}
    # labels given (aligned with the inputs, < 0 ignored) are the targets instead of input_ids
    acc = MetricAccumulator("perplexity")
    acc.update(logits, logits, labels.numpy(), None, batch)
    assert acc.result().before == pytest.approx(_torch_perplexity(logits, batch), rel=1e-6)
    assert acc.result().per_position["masked_by"] == ["labels < 0"]


def test_perplexity_refuses_what_it_cannot_score():
    logits = np.zeros((2, 5, VOCAB), np.float32)
    ids = {"input_ids": np.ones((2, 5), np.int64)}
    check_metric("perplexity", None, logits, ids)
    with pytest.raises(InputError, match="no 'input_ids'"):
        check_metric("perplexity", None, logits, {"pixel_values": np.zeros((2, 3))})
    with pytest.raises(InputError, match="vocabulary has 97"):
        check_metric("perplexity", None, logits, {"input_ids": np.full((2, 5), VOCAB, np.int64)})
    with pytest.raises(InputError, match=r"\(N, positions >= 2, vocabulary\)"):
        check_metric("perplexity", None, np.zeros((2, VOCAB), np.float32), ids)
    with pytest.raises(InputError, match="integers of shape"):
        check_metric("perplexity", None, logits, {"input_ids": np.ones((2, 5), np.float32)})


def _folder(model, path):
    model.save_pretrained(path)
    return str(path)


def _cli(*args, ok=True):
    proc = subprocess.run([sys.executable, "-m", "factorize_weights", *args], capture_output=True, text=True)
    if ok:
        assert proc.returncode == 0, proc.stderr
    return proc


def _generate(model, prompt, cache: bool) -> list[int]:
    with torch.no_grad():
        out = model.generate(input_ids=torch.tensor([prompt]), attention_mask=torch.ones(1, len(prompt), dtype=torch.long),
                             max_new_tokens=10, do_sample=False, use_cache=cache, pad_token_id=0)
    return out[0, len(prompt):].tolist()


@pytest.mark.parametrize("make", [_llama, _gpt2], ids=["llama-tied", "gpt2-conv1d"])
def test_decoder_folder_compresses_reloads_and_generates(make, tmp_path):
    model = make()
    src = _folder(model, tmp_path / "src")
    held = _save_npz(tmp_path / "held.npz", _tokens(8, 16, seed=5))
    out = tmp_path / "out"
    _cli("compress", "--model", src, "--heldout", held, "--metric", "perplexity", "--budget", "params=0.6",
         "--latency-repeats", "0", "--export-onnx", "--out", str(out))
    report = json.loads((out / "report.json").read_text())
    m = report["metric"]
    assert m["name"] == "perplexity" and not m["higher_is_better"] and set(m["loss"]) == {"before", "after"}
    # the tool's "before" is the original's perplexity computed by torch on the same held-out set
    batch = dict(np.load(held))
    assert m["before"] == pytest.approx(_torch_perplexity(_logits(model, batch), batch), rel=1e-5)
    skipped = {s["name"]: s["reason"] for s in report["skipped"]}
    if make is _llama:  # the output head shares the embedding: left dense, and said so
        assert "lm_head" in skipped and "tied" in skipped["lm_head"]
    small = fw.load_factorized(fw.open_model(src), str(out))
    again = fw.open_model(str(out))  # the result folder is itself a model folder
    assert any(isinstance(mod, fw.FactorPair) for mod in small.modules())
    prompt = [5, 17, 3, 44, 9]
    with_cache = _generate(small, prompt, cache=True)
    assert with_cache == _generate(small, prompt, cache=False)  # the key/value cache sees the factors too
    assert with_cache == _generate(again, prompt, cache=True)
    # the reloaded model's perplexity is the report's "after"
    assert m["after"] == pytest.approx(_torch_perplexity(_logits(small, batch), batch), rel=1e-4)
    # the ONNX export of the rewritten decoder: onnx's checker, and onnxruntime gives torch's logits
    import onnx
    import onnxruntime as ort

    onnx.checker.check_model(str(out / "model.onnx"), full_check=True)
    session = ort.InferenceSession(str(out / "model.onnx"), providers=["CPUExecutionProvider"])
    names = [i.name for i in session.get_inputs()]
    logits = session.run(None, {k: batch[k] for k in names})[0]
    np.testing.assert_allclose(logits, _logits(small, batch), rtol=1e-3, atol=1e-4)


def test_full_rank_factors_generate_the_original_tokens():
    model = _llama(tied=False)
    records = fw.discover(model)
    chosen = fw.selected(records)
    assert "lm_head" in {r.name for r in chosen}  # untied: the head is an ordinary linear layer
    from factorize_weights.backends import backend_for

    backend = backend_for(model)
    full = backend.rewrite(model, records, {r.name: fw.svd_factors(backend.weight_matrix(r), min(r.matrix_shape))
                                            for r in chosen})
    assert sum(isinstance(m, fw.FactorPair) for m in full.modules()) == len(chosen)
    prompt = [7, 2, 61, 30]
    assert _generate(full, prompt, cache=True) == _generate(model, prompt, cache=True)
    assert _generate(full, prompt, cache=False) == _generate(model, prompt, cache=False)


@pytest.mark.parametrize("make", [_llama, _gpt2], ids=["llama", "gpt2"])
def test_calibration_statistics_count_real_tokens_only(make):
    """Right padding: the real tokens' activations do not depend on it (causal mask), so the Gram
    matrices over the padded set must equal those of the unpadded sequences run one at a time."""
    from factorize_weights.backends import backend_for
    from factorize_weights.calibrate import input_moments

    model = make()
    backend = backend_for(model)
    records = fw.selected(backend.discover(model))
    batch = _tokens(6, 12, seed=8)
    padded, _ = input_moments(backend, model, records, [batch])
    singles = []
    for ids, mask in zip(batch["input_ids"], batch["attention_mask"]):
        n = int(mask.sum())
        singles.append({"input_ids": ids[None, :n], "attention_mask": mask[None, :n]})
    alone, _ = input_moments(backend, model, records, singles)
    real = int(batch["attention_mask"].sum())
    assert real < batch["attention_mask"].size  # the set does have padding
    for r in records:
        assert padded[r.name].rows == alone[r.name].rows == real
        np.testing.assert_allclose(padded[r.name].gram, alone[r.name].gram, rtol=1e-4,
                                   atol=1e-5 * np.abs(alone[r.name].gram).max())


@pytest.mark.parametrize("dtype", [torch.float16, torch.bfloat16], ids=["float16", "bfloat16"])
def test_half_precision_folder_round_trips_in_its_dtype(dtype, tmp_path):
    """Weights kept in half precision are read, factorized and written in it (statistics in float32
    or float64 inside): the result folder holds no float32 tensor, reloads in that dtype and generates."""
    from safetensors import safe_open

    src = _folder(_llama(dtype=dtype), tmp_path / "src")
    held = _save_npz(tmp_path / "held.npz", _tokens(8, 16, seed=6))
    out = tmp_path / "out"
    _cli("compress", "--model", src, "--heldout", held, "--metric", "perplexity", "--budget", "params=0.6",
         "--latency-repeats", "0", "--out", str(out))
    name = str(dtype).removeprefix("torch.")
    totals = json.loads((out / "report.json").read_text())["totals"]
    assert totals["weight_dtype"] == name and totals["bytes_per_param"] == 2
    with safe_open(str(out / "model.safetensors"), "pt") as f:
        assert {f.get_tensor(k).dtype for k in f.keys()} == {dtype}
    small = fw.load_factorized(fw.open_model(src), str(out))
    pairs = [m for m in small.modules() if isinstance(m, fw.FactorPair)]
    assert pairs and all(p.dtype == dtype for m in pairs for p in m.parameters())
    prompt = [3, 8, 21]
    assert _generate(small, prompt, cache=True) == _generate(small, prompt, cache=False)


@pytest.mark.parametrize("make", [_llama, _gpt2], ids=["llama", "gpt2"])
def test_decoders_run_without_a_cache_so_refits_replay_blocks(make):
    """The tool runs a decoder for its outputs with use_cache=False: no key/value cache object is
    passed from block to block, so the chain of decoder blocks is found (sequential refits and
    probes then run block by block instead of whole-model passes), and the outputs are the ones
    transformers computes with its cache (checked against the model called directly)."""
    from factorize_weights.backends import backend_for
    from factorize_weights.backends.torch_backend.paired import find_chain

    model = make()
    backend = backend_for(model)
    records = fw.selected(backend.discover(model))
    batch = _tokens(2, 8, seed=1)
    found = find_chain(model, records, batch)
    assert found is not None and len(found[0]) == 2  # the two decoder blocks
    np.testing.assert_allclose(backend.predict(model, batch), _logits(model, batch), rtol=1e-5, atol=1e-5)


def test_the_logits_are_counted_once_in_the_batch_memory_estimate():
    """The model's own output (kept, and copied to float64: three float32 sizes) is counted apart
    from the module outputs freed as the pass moves on (six of the largest). With a vocabulary
    far wider than the model, the estimate is about three logits' worth, not six."""
    from factorize_weights.backends import backend_for
    from factorize_weights.backends.torch_backend.probes import LIVE_OUTPUTS

    torch.manual_seed(0)
    cfg = transformers.LlamaConfig(vocab_size=5000, hidden_size=32, intermediate_size=64, num_hidden_layers=1,
                                   num_attention_heads=4, num_key_value_heads=2, max_position_embeddings=64)
    model = transformers.LlamaForCausalLM(cfg).eval()
    backend = backend_for(model)
    t = 16
    per_sample = backend.measure_positions(model, backend.discover(model), _tokens(2, t, seed=0, pad=False))
    logits = t * 5000 * 4
    inner = t * 64 * 4  # the widest inner output: the MLP's (positions x intermediate), float32
    assert 3 * logits <= per_sample <= 3 * logits + LIVE_OUTPUTS * inner
