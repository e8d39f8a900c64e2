"""The refusal table of the input paths added since test_refusals.py (issue 23): model folders and
result folders used as models, sharded and wrapped checkpoints, named-array inputs and --output,
run files, --keep-within with --selection, --metric perplexity, and a bad value of every option.

The reference is the documented contract (README "Exit codes"): exit 2, exactly one line on stderr
holding the file, flag or layer named and what is wrong, no traceback, nothing written in the
workspace. test_every_option_has_a_refusal_row reads the parser: an option that takes a value
and appears in no row's argv (here or in test_refusals.py) fails it."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest
import torch
from safetensors.torch import save_file
from torch import nn

from conftest import run_cli
from factorize_weights import demo
from test_refusals import CASES as FIRST_CASES

transformers = pytest.importorskip("transformers")

VOCAB = 97

USER_MODEL = """\
import torch
from torch import nn

def build():
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(20, 64), nn.ReLU(), nn.Linear(64, 64), nn.ReLU(), nn.Linear(64, 5))

def tokens():
    torch.manual_seed(0)
    return nn.Sequential(nn.Embedding(97, 16), nn.Linear(16, 32), nn.ReLU(), nn.Linear(32, 97))
"""


def _net_state():
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(20, 64), nn.ReLU(), nn.Linear(64, 64), nn.ReLU(), nn.Linear(64, 5))
    return {k: v.contiguous() for k, v in model.state_dict().items()}


def _checkpoints(d: Path) -> None:
    """A plain, a wrapped and a doubly nested .pt, and sharded indexes each wrong in one way."""
    state = _net_state()
    save_file(state, str(d / "net.safetensors"))
    torch.save({"model": state, "epoch": 3}, str(d / "wrapped.pt"))
    torch.save({"model": {"ema": state}, "epoch": 3}, str(d / "nested.pt"))
    torch.save({"model": {**state, "step": torch.tensor(3)}}, str(d / "extra.pt"))
    torch.save([state], str(d / "list.pt"))
    save_file({k: v for k, v in state.items() if k.startswith("0.")}, str(d / "s1.safetensors"))
    save_file({k: v for k, v in state.items() if not k.startswith("0.")}, str(d / "s2.safetensors"))
    (d / "damaged.safetensors").write_bytes(b"\x00garbage" * 10)
    weight_map = {k: "s1.safetensors" if k.startswith("0.") else "s2.safetensors" for k in state}
    for name, index in {"good": weight_map, "list": list(weight_map), "number": {**weight_map, "4.weight": 5},
                        "damaged": {**weight_map, "4.weight": "damaged.safetensors"},
                        "wrong": {**weight_map, "4.weight": "s1.safetensors"}}.items():
        (d / f"{name}.safetensors.index.json").write_text(json.dumps({"weight_map": index}))


def _data(d: Path) -> None:
    rng = np.random.default_rng(0)
    x = lambda n: rng.standard_normal((n, 20)).astype(np.float32)  # noqa: E731
    np.savez(d / "held.npz", inputs=x(40), labels=rng.integers(0, 5, 40))
    np.savez(d / "heldnolabels.npz", inputs=x(30))
    np.savez(d / "sel.npz", inputs=x(30), labels=rng.integers(0, 5, 30))
    np.savez(d / "selnolabels.npz", inputs=x(30))
    np.savez(d / "wrong.npz", inputs=np.zeros((8, 7), np.float32), labels=np.zeros(8, int))
    ids = rng.integers(0, VOCAB, (8, 12)).astype(np.int64)
    ids[0, :2] = 0, VOCAB - 1  # the whole vocabulary's range, so ids + 100 range over [100, 196]
    mask = np.ones_like(ids)
    np.savez(d / "tok.npz", input_ids=ids, attention_mask=mask)
    np.savez(d / "oov.npz", input_ids=ids + 100, attention_mask=mask)
    np.savez(d / "negative.npz", input_ids=ids - 200, attention_mask=mask)
    np.savez(d / "floatids.npz", input_ids=ids.astype(np.float32), attention_mask=mask)
    np.savez(d / "rows.npz", input_ids=ids, attention_mask=mask[:6])
    np.savez(d / "shortmask.npz", input_ids=ids, attention_mask=mask[:, :10])
    np.savez(d / "typo.npz", input_id=ids, attention_mask=mask)
    np.savez(d / "labshort.npz", input_ids=ids, labels=ids[:, :-1])
    np.savez(d / "laboov.npz", input_ids=ids, labels=ids + 100)
    np.savez(d / "labfloat.npz", input_ids=ids, labels=ids.astype(np.float32))
    np.savez(d / "labclass.npz", input_ids=ids, labels=ids[:, 0])
    np.savez(d / "tokpos.npz", inputs=ids)
    np.savez(d / "tokposoov.npz", inputs=ids + VOCAB)
    many = rng.integers(0, VOCAB, (24, 12)).astype(np.int64)
    many[20, 3] = 150  # one id past the vocabulary, far beyond the first batch the fit check runs
    np.savez(d / "late.npz", input_ids=many, attention_mask=np.ones_like(many))


def _run_files(d: Path) -> None:
    files = {"bool": 'force = "yes"\n', "intfloat": "rank-step = 1.5\n", "choice": 'method = "fast"\n',
             "othercommand": 'budgets = "params=0.5"\n', "liststring": 'heldout = ["a.npz"]\n',
             "globs": "only = [1, 2]\n", "table": '[compress]\nbudget = "params=0.5"\n',
             "twice": 'budget = "params=0.5"\nbudget = "params=0.4"\n', "range": "rank-step = 0\n"}
    for name, text in files.items():
        (d / f"{name}.toml").write_text(text)
    (d / "latin1.toml").write_bytes(b'budget = "\xff"\n')
    (d / "runfolder.toml").mkdir()


def _folders(d: Path) -> None:
    """A small decoder saved by transformers, whole and sharded, a result folder compress wrote from
    it, and copies of them each damaged in one way."""
    torch.manual_seed(0)
    cfg = transformers.LlamaConfig(vocab_size=VOCAB, hidden_size=32, intermediate_size=64, num_hidden_layers=1,
                                   num_attention_heads=2, num_key_value_heads=1, max_position_embeddings=32)
    lm = transformers.LlamaForCausalLM(cfg).eval()
    lm.save_pretrained(str(d / "lm"))
    lm.save_pretrained(str(d / "partial"), max_shard_size="20KB")
    shards = sorted((d / "partial").glob("model-*.safetensors"))
    assert len(shards) > 1
    shards[1].unlink()
    for name, keep in (("nocfg", "model.safetensors"), ("noweights", "config.json"), ("badcfg", "model.safetensors"),
                       ("emptycfg", "model.safetensors")):
        (d / name).mkdir()
        shutil.copy(d / "lm" / keep, d / name)
    (d / "badcfg" / "config.json").write_text("{not json")
    (d / "emptycfg" / "config.json").write_text("{}")
    shutil.copytree(d / "partial", d / "badindex")
    (d / "badindex" / "model.safetensors.index.json").write_text('{"weight_map": ')
    from factorize_weights.cli import main

    assert main(["compress", "--model", str(d / "lm"), "--budget", "params=0.5", "--heldout", str(d / "tok.npz"),
                 "-q", "--latency-repeats", "0", "--out", str(d / "result")]) == 0
    plan = json.loads((d / "result" / "plan.json").read_text())
    damaged = {"plancut": '{"format": "factorize-weights/plan", ', "planrank": dict(plan, layers=[
        dict(plan["layers"][0], rank=10**6)] + plan["layers"][1:]), "planname": dict(plan, layers=[
            dict(plan["layers"][0], name="nothere")] + plan["layers"][1:]),
        "planfield": dict(plan, layers=[{k: v for k, v in plan["layers"][0].items() if k != "rank"}])}
    for name, text in damaged.items():
        shutil.copytree(d / "result", d / name)
        (d / name / "plan.json").write_text(text if isinstance(text, str) else json.dumps(text))
    shutil.copytree(d / "result", d / "planless")
    (d / "planless" / "plan.json").unlink()
    shutil.copytree(d / "result", d / "resultnoweights")
    (d / "resultnoweights" / "model.safetensors").unlink()


@pytest.fixture(scope="module")
def p(tmp_path_factory):
    """The workspace, made once: a user model file, checkpoints, data, run files and model folders."""
    d = tmp_path_factory.mktemp("refusal-paths")
    (d / "net.py").write_text(USER_MODEL)
    _checkpoints(d)
    _data(d)
    _run_files(d)
    _folders(d)
    return d


def net(p, *extra, weights="net.safetensors"):
    """compress on the user's 20 -> 64 -> 64 -> 5 model, into p/out."""
    head = ["compress", "--model", f"{p}/net.py:build", "--budget", "params=0.5", "--out", p / "out"]
    return head + (["--weights", p / weights] if weights else []) + ["-q", "--latency-repeats", "0", *extra]


def folder(p, name, *extra, data="tok.npz"):
    """compress on a model folder, with token ids held out, into p/out."""
    return ["compress", "--model", p / name, "--budget", "params=0.5", "--heldout", p / data, "--out", p / "out",
            "-q", "--latency-repeats", "0", *extra]


def tokens(p, data, *extra):
    """compress on the user's embedding model (factory weights), on positional token ids."""
    return ["compress", "--model", f"{p}/net.py:tokens", "--factory-weights", "--budget", "params=0.5", "--heldout",
            p / data, "--out", p / "out", "-q", "--latency-repeats", "0", *extra]


def search(p, *extra, heldout="held.npz"):
    """--keep-within on the user's model, chosen on --selection (given in extra)."""
    return ["compress", "--model", f"{p}/net.py:build", "--weights", p / "net.safetensors", "--keep-within", "1",
            "--heldout", p / heldout, "--out", p / "out", "-q", "--latency-repeats", "0", *extra]


def evaluate(p, factorized, data="tok.npz", *extra, model=None):
    return ["evaluate", "--model", model or p / "lm", "--factorized", p / factorized, "--heldout", p / data,
            "--latency-repeats", "0", "-q", *extra]


def sweep(p, *extra):
    return ["sweep", "--model", f"{p}/net.py:build", "--weights", p / "net.safetensors", "--budgets",
            "params=0.8,0.5", "--out", p / "out", "-q", "--latency-repeats", "0", *extra]


def profile(p, *extra):
    return ["profile", "--model", f"{p}/net.py:build", "--weights", p / "net.safetensors", "--heldout", p / "held.npz",
            "--out", p / "p.json", *extra]


# (id, argv builder, words the one line must hold); every row exits 2
CASES = [
    # --model DIR: model folders
    ("folder without config.json", lambda p: folder(p, "nocfg"), ["--model", "nocfg", "without config.json"]),
    ("folder config not json", lambda p: folder(p, "badcfg"), ["--model", "badcfg", "not a loadable model folder",
                                                               "config.json"]),
    ("folder config names no model", lambda p: folder(p, "emptycfg"), ["--model", "emptycfg", "model_type"]),
    ("folder without weights", lambda p: folder(p, "noweights"), ["--model", "noweights", "not a loadable model folder",
                                                                  "model.safetensors"]),
    ("folder shard missing", lambda p: folder(p, "partial"), ["--model", "partial", "model-00002-of-"]),
    ("folder index damaged", lambda p: folder(p, "badindex"), ["--model", "badindex", "not a loadable model folder"]),
    ("folder with --weights", lambda p: folder(p, "lm", "--weights", p / "net.safetensors"),
     ["--weights is for a factory", "holds its own weights"]),
    ("folder with --weights-key", lambda p: folder(p, "lm", "--weights-key", "model"),
     ["--weights-key is for a factory", "holds its own weights"]),
    ("folder with --factory-weights", lambda p: folder(p, "lm", "--factory-weights"), ["--factory-weights is for a factory"]),
    ("onnx with --weights-key", lambda p: ["compress", demo.ONNX, "--weights-key", "model", "--budget", "params=0.5",
                                           "--out", p / "out"], ["--weights-key", "ONNX file"]),
    # result folders as models (plan.json rebuilds them) and as --factorized
    ("result plan damaged", lambda p: folder(p, "plancut"), ["plancut/plan.json", "not valid JSON"]),
    ("result plan missing", lambda p: folder(p, "planless"), ["--model", "planless", "without its plan.json"]),
    ("result plan layer cut", lambda p: folder(p, "planfield"), ["planfield/plan.json", "lacks the field(s) rank"]),
    ("result plan rank too large", lambda p: folder(p, "planrank"), ["planrank/plan.json", "rank 1000000 exceeds"]),
    ("result plan names no layer", lambda p: folder(p, "planname"), ["planname/plan.json", "'nothere' is not in the model"]),
    ("result weights missing", lambda p: folder(p, "resultnoweights"), ["resultnoweights", "no model.safetensors"]),
    ("evaluate plan damaged", lambda p: evaluate(p, "plancut"), ["plancut/plan.json", "not valid JSON"]),
    ("evaluate folder missing", lambda p: evaluate(p, "absent"), ["absent", "no plan.json"]),
    ("evaluate result of another model", lambda p: evaluate(p, "result", "held.npz", model=f"{p}/net.py:build")
     + ["--weights", p / "net.safetensors"], ["result/plan.json", "is not in the model"]),
    # --weights: sharded safetensors with an index
    ("index weight_map a list", lambda p: net(p, weights="list.safetensors.index.json"),
     ["--weights", "list.safetensors.index.json", "'weight_map' must map", "a list"]),
    ("index entry not a file name", lambda p: net(p, weights="number.safetensors.index.json"),
     ["--weights", "'4.weight' -> 5"]),
    ("index shard damaged", lambda p: net(p, weights="damaged.safetensors.index.json"),
     ["--weights", "shard damaged.safetensors cannot give tensor '4.weight'"]),
    ("index shard lacks its tensor", lambda p: net(p, weights="wrong.safetensors.index.json"),
     ["--weights", "shard s1.safetensors cannot give tensor '4.weight'", "names the wrong file"]),
    ("index with --weights-key", lambda p: net(p, "--weights-key", "model", weights="good.safetensors.index.json"),
     ["--weights-key 'model'", "leave --weights-key out"]),
    # --weights: wrapped .pt checkpoints and --weights-key
    ("weights-key holds a number", lambda p: net(p, "--weights-key", "epoch", weights="wrapped.pt"),
     ["--weights-key 'epoch'", "wrapped.pt", "no mapping of tensors"]),
    ("weights-key nested path absent", lambda p: net(p, "--weights-key", "model.ema", weights="nested.pt"),
     ["--weights-key 'model.ema'", "top-level keys: model, epoch"]),
    ("weights-key holds a nested dict", lambda p: net(p, "--weights-key", "model", weights="nested.pt"),
     ["--weights-key 'model'", "no mapping of tensors"]),
    ("weights nested two deep", lambda p: net(p, weights="nested.pt"), ["--weights", "nested.pt", "none of them holds"]),
    ("weights-key with a stray tensor", lambda p: net(p, "--weights-key", "model", weights="extra.pt"),
     ["--weights", "extra.pt", "1 unexpected (e.g. step)"]),
    ("weights pt holds a list", lambda p: net(p, weights="list.pt"), ["--weights", "list.pt", "holds a list"]),
    ("weights-key on safetensors", lambda p: net(p, "--weights-key", "model"), ["--weights-key 'model'", "net.safetensors"]),
    # named-array .npz inputs
    ("named input unknown to a kwargs forward", lambda p: folder(p, "lm", data="typo.npz"),
     ["--heldout", "typo.npz", "'input_id'", "do not fit"]),
    ("named arrays of different lengths", lambda p: folder(p, "lm", data="rows.npz"),
     ["--heldout", "rows.npz", "'attention_mask' has 6 rows", "'input_ids' has 8"]),
    ("mask shorter than the ids", lambda p: folder(p, "lm", data="shortmask.npz"),
     ["--heldout", "shortmask.npz", "'attention_mask' has shape (8, 10)", "one entry per token"]),
    ("token ids of float dtype", lambda p: folder(p, "lm", data="floatids.npz"),
     ["--heldout", "floatids.npz", "'model.embed_tokens'", "float32", "as integers"]),
    ("token ids past the vocabulary", lambda p: folder(p, "lm", data="oov.npz"),
     ["--heldout", "oov.npz", "[100, 196]", "'model.embed_tokens' has 97 rows"]),
    ("token ids negative", lambda p: folder(p, "lm", data="negative.npz"),
     ["--heldout", "negative.npz", "'model.embed_tokens' has 97 rows"]),
    ("token id past the vocabulary late in the calibration set",
     lambda p: folder(p, "lm", "--calibration", p / "late.npz"), ["--calibration", "late.npz", "150", "97 rows"]),
    ("token id past the vocabulary late in the held-out set", lambda p: folder(p, "lm", data="late.npz"),
     ["--heldout", "late.npz", "150", "97 rows"]),
    ("token ids past a factory's embedding", lambda p: tokens(p, "tokposoov.npz"),
     ["--heldout", "tokposoov.npz", "embedding '0' has 97 rows"]),
    ("evaluate token ids past the vocabulary", lambda p: evaluate(p, "result", "oov.npz"),
     ["--heldout", "oov.npz", "97 rows"]),
    # --output NAME naming no output
    ("output names no entry", lambda p: folder(p, "lm", "--output", "hidden"), ["--output 'hidden'", "it has logits"]),
    ("sweep output names no entry", lambda p: ["sweep", "--model", p / "lm", "--budgets", "params=0.8,0.5", "--heldout",
                                               p / "tok.npz", "--output", "hidden", "--out", p / "out", "-q"],
     ["--output 'hidden'", "it has logits"]),
    ("evaluate output names no entry", lambda p: evaluate(p, "result", "tok.npz", "--output", "hidden"),
     ["--output 'hidden'", "it has logits"]),
    ("profile output names no entry", lambda p: ["profile", "--model", p / "lm", "--heldout", p / "tok.npz", "--output",
                                                 "hidden", "--out", p / "p.json"], ["--output 'hidden'"]),
    ("output index on one tensor", lambda p: profile(p, "--output", "0"), ["--output '0'", "one tensor"]),
    # run files (missing, not TOML, unknown key, a wrong budget type: test_refusals.py)
    ("config bool not a bool", lambda p: net(p, "--config", p / "bool.toml"),
     ["--config", "bool.toml", "force", "true or false"]),
    ("config int given a fraction", lambda p: net(p, "--config", p / "intfloat.toml"), ["--config", "rank-step", "an integer"]),
    ("config choice unknown", lambda p: net(p, "--config", p / "choice.toml"), ["--config", "method must be one of", "'fast'"]),
    ("config key of another command", lambda p: net(p, "--config", p / "othercommand.toml"),
     ["--config", "unknown key(s) budgets for 'compress'"]),
    ("config list for a path", lambda p: net(p, "--config", p / "liststring.toml"), ["--config", "heldout must be a string"]),
    ("config globs not strings", lambda p: net(p, "--config", p / "globs.toml"), ["--config", "only must be a string or a list"]),
    ("config table", lambda p: net(p, "--config", p / "table.toml"), ["--config", "unknown key(s) compress"]),
    ("config key twice", lambda p: net(p, "--config", p / "twice.toml"), ["--config", "twice.toml", "not valid TOML"]),
    ("config not utf-8", lambda p: net(p, "--config", p / "latin1.toml"), ["--config", "latin1.toml", "not valid TOML"]),
    ("config is a folder", lambda p: net(p, "--config", p / "runfolder.toml"), ["--config", "runfolder.toml", "is a folder"]),
    ("config value out of range", lambda p: net(p, "--config", p / "range.toml"), ["--rank-step", "got 0"]),
    ("sweep config choice unknown", lambda p: sweep(p, "--config", p / "choice.toml"), ["--config", "method must be one of"]),
    # --keep-within with --selection (selection is the held-out set, selection without --keep-within: test_refusals.py)
    ("selection is the calibration set", lambda p: search(p, "--selection", p / "sel.npz", "--calibration", p / "sel.npz"),
     ["--calibration", "same data as --selection"]),
    ("selection does not fit", lambda p: search(p, "--selection", p / "wrong.npz"), ["--selection", "wrong.npz", "do not fit"]),
    ("held-out does not fit beside a selection", lambda p: search(p, "--selection", p / "sel.npz", heldout="wrong.npz"),
     ["--heldout", "wrong.npz", "do not fit"]),
    ("selection without labels for top1", lambda p: search(p, "--selection", p / "selnolabels.npz", "--metric", "top1"),
     ["--selection", "selnolabels.npz", "no 'labels'"]),
    ("selection labelled, held-out not", lambda p: search(p, "--selection", p / "sel.npz", heldout="heldnolabels.npz"),
     ["--selection", "by top1", "--heldout", "by cosine", "--metric"]),
    ("held-out labelled, selection not", lambda p: search(p, "--selection", p / "selnolabels.npz"),
     ["--selection", "by cosine", "by top1"]),
    ("selection missing", lambda p: search(p, "--selection", p / "absent.npz"), ["--selection", "absent.npz", "does not exist"]),
    # --metric perplexity
    ("perplexity of a classifier", lambda p: net(p, "--heldout", p / "held.npz", "--metric", "perplexity"),
     ["--metric perplexity", "(N, positions >= 2, vocabulary)", "(8, 5)"]),
    ("perplexity without input_ids", lambda p: tokens(p, "tokpos.npz", "--metric", "perplexity"),
     ["--metric perplexity", "no 'input_ids'"]),
    ("perplexity labels past the vocabulary", lambda p: folder(p, "lm", "--metric", "perplexity", data="laboov.npz"),
     ["--metric perplexity", "token ids reach 196", "97 entries"]),
    ("perplexity labels of another length", lambda p: folder(p, "lm", "--metric", "perplexity", data="labshort.npz"),
     ["--metric perplexity", "(8, 11)", "(N, 12)"]),
    ("perplexity float labels", lambda p: folder(p, "lm", "--metric", "perplexity", data="labfloat.npz"),
     ["--metric perplexity", "'labels' (float32 (8, 12)) are not next-token ids"]),
    ("perplexity class labels", lambda p: folder(p, "lm", "--metric", "perplexity", data="labclass.npz"),
     ["--metric perplexity", "'labels' (int64 (8,))"]),
    ("evaluate perplexity past the vocabulary", lambda p: evaluate(p, "result", "laboov.npz", "--metric", "perplexity"),
     ["--metric perplexity", "token ids reach 196"]),
    # a bad value of each option not met above or in test_refusals.py (test_every_option_has_a_refusal_row)
    ("error samples negative", lambda p: net(p, "--error-samples", "-1"), ["--error-samples", "got -1"]),
    ("oversampling negative", lambda p: ["inspect", "--model", f"{p}/net.py:build", "--weights", p / "net.safetensors",
                                         "--oversampling", "-1"], ["--oversampling", "got -1"]),
    ("power iterations negative", lambda p: net(p, "--power-iterations", "-2"), ["--power-iterations", "got -2"]),
    ("seed negative", lambda p: net(p, "--seed", "-1"), ["--seed", "got -1"]),
    ("seed not a number", lambda p: net(p, "--seed", "x"), ["--seed", "invalid int value: 'x'"]),
    ("sequential groups zero", lambda p: net(p, "--sequential-groups", "0"), ["--sequential-groups", "got 0"]),
    ("stats memory zero", lambda p: net(p, "--stats-memory", "0"), ["--stats-memory", "(0, inf)", "got 0.0"]),
    ("recover rate zero", lambda p: net(p, "--recover-lr", "0"), ["--recover-lr", "(0, 1)"]),
    ("recover rate above one", lambda p: net(p, "--recover-lr", "3"), ["--recover-lr", "got 3.0"]),
    ("recover steps negative", lambda p: net(p, "--recover", "-1"), ["--recover", "got -1"]),
    ("ridge negative", lambda p: net(p, "--ridge", "-0.1"), ["--ridge", "[0, 1)"]),
    ("latency batch zero", lambda p: net(p, "--latency-batch", "0"), ["--latency-batch", "got 0"]),
    ("latency threads zero", lambda p: evaluate(p, "result", "tok.npz", "--latency-threads", "0"),
     ["--latency-threads", "got 0"]),
    ("latency warmup negative", lambda p: net(p, "--latency-warmup", "-1"), ["--latency-warmup", "got -1"]),
    ("latency repeats negative", lambda p: net(p, "--latency-repeats", "-1"), ["--latency-repeats", "got -1"]),
    # (the options of profile and evaluate are checked before the model or the folder is loaded)
    ("min rank zero", lambda p: swap(profile(p, "--min-rank", "0"), "--model", f"{p}/absent.py:build"),
     ["--min-rank", "got 0"]),
    ("batch size zero", lambda p: evaluate(p, "absent", "tok.npz", "--batch-size", "0"), ["--batch-size", "got 0"]),
    ("only matches no layer", lambda p: net(p, "--only", "enc.*"), ["nothing to factorize", "not matched by --only 'enc.*'"]),
    ("skip every layer", lambda p: net(p, "--skip", "*"), ["nothing to factorize", "excluded by --skip '*'"]),
    ("profile only matches no layer", lambda p: profile(p, "--only", "enc.*"), ["nothing to profile", "--only 'enc.*'"]),
    ("metric unknown", lambda p: net(p, "--metric", "bleu"), ["--metric", "invalid choice: 'bleu'"]),
    ("method unknown", lambda p: net(p, "--method", "fast"), ["--method", "invalid choice: 'fast'"]),
    ("demo variant unknown", lambda p: ["compress", "--demo", "tflite", "--budget", "params=0.5"],
     ["--demo", "invalid choice: 'tflite'"]),
    ("sweep budgets empty entry", lambda p: swap(sweep(p), "--budgets", "params=0.5,,0.3"), ["--budgets", "an empty entry"]),
    ("sweep budgets missing", lambda p: swap(sweep(p), "--budgets", ""), ["--budgets is required"]),
]


def swap(argv, flag, value):
    argv = list(argv)
    argv[argv.index(flag) + 1] = value
    return argv


def _tree(root: Path) -> list[str]:
    """Every path under ``root``, but Python's own bytecode cache of the imported net.py (the
    interpreter writes it on any import unless PYTHONDONTWRITEBYTECODE is set)."""
    return sorted(str(q.relative_to(root)) for q in root.rglob("*") if "__pycache__" not in q.parts)


@pytest.mark.parametrize("case", CASES, ids=[c[0] for c in CASES])
def test_refusal(case, p, capsys):
    _, build, words = case
    argv = [str(a) for a in build(p)]
    before = _tree(p)
    try:
        code, _, err = run_cli(capsys, *argv)
    except SystemExit as stop:  # argparse's own usage errors: exit 2 and one line too
        code, err = stop.code, capsys.readouterr().err
    after = _tree(p)
    for new in sorted(set(after) - set(before)):  # cleared before any assertion: a failing row spoils no other
        shutil.rmtree(p / new, ignore_errors=True) if (p / new).is_dir() else (p / new).unlink(missing_ok=True)
    lines = err.strip().splitlines()
    assert code == 2 and len(lines) == 1, err
    assert "Traceback" not in err
    for word in words:
        assert word in lines[0], lines[0]
    assert after == before  # nothing written, nothing left behind, in any folder of the workspace


def test_the_held_out_set_beside_a_selection_is_checked_before_any_work(p, capsys, monkeypatch):
    # with --selection the search runs on the selection set; the held-out set it is reported on must
    # still be refused before the preparation (the decompositions) and the search, not after them
    from factorize_weights import run

    monkeypatch.setattr(run, "prepare", lambda *a, **k: pytest.fail("prepared before the held-out set was checked"))
    code, _, err = run_cli(capsys, *search(p, "--selection", p / "sel.npz", heldout="wrong.npz"))
    assert code == 2 and "--heldout" in err and "wrong.npz" in err and "do not fit" in err, err


#: Options that take a value but have no bad value a row could give, each with the reason. Empty:
#: every option has one today; an entry here needs a comment saying why (e.g. free text).
NO_BAD_VALUE: dict[str, str] = {}

COMMANDS = ("inspect", "compress", "sweep", "evaluate", "profile")


def _options_taking_a_value() -> dict[str, set[str]]:
    """Each option (long name) of the five commands that takes a value, with its commands."""
    from factorize_weights.cli import build_parser

    parser = build_parser()
    found: dict[str, set[str]] = {}
    for command in COMMANDS:
        for action in parser._subcommands[command]._actions:
            if action.option_strings and action.nargs != 0:
                found.setdefault(max(action.option_strings, key=len), set()).add(command)
    return found


def _flags_in_rows(cases) -> set[str]:
    """The options some row refuses: given in its argv and named by the line it expects, by the flag
    or by the file given to it (an option also given with a good value, as --heldout beside a bad
    --model, does not count)."""
    dummy = Path("/nonexistent-workspace")  # the builders only join paths
    found = set()
    for case in cases:
        argv, said = [str(a) for a in case[1](dummy)], " ".join(case[-1])
        for flag, value in zip(argv, argv[1:] + [""]):
            named = flag in said or ("/" in value and Path(value).name in said)
            if flag.startswith("--") and named:
                found.add(flag)
    return found


def test_every_option_has_a_refusal_row():
    options = _options_taking_a_value()
    assert {"--budget", "--weights-key", "--selection", "--factorized", "--output"} <= set(options)  # the parser was read
    assert set(NO_BAD_VALUE) <= set(options), "an allow-list entry names no option"
    covered = _flags_in_rows(FIRST_CASES) | _flags_in_rows(CASES)
    missing = sorted(set(options) - covered - set(NO_BAD_VALUE))
    assert missing == [], f"options with no refusal row for a bad value: {missing}"


def test_the_option_check_finds_a_missing_row():
    # the check above, with the rows of one option taken out, names that option
    options = _options_taking_a_value()
    def without(cases, flag):
        return [c for c in cases if flag not in " ".join(c[-1])]

    for flag in ("--seed", "--budgets"):  # --budgets is also in rows that refuse another option
        covered = _flags_in_rows(without(FIRST_CASES, flag)) | _flags_in_rows(without(CASES, flag))
        assert sorted(set(options) - covered - set(NO_BAD_VALUE)) == [flag]
