"""Models as people write them: several named inputs, outputs that are dicts or tuples, checkpoints
nested under a key or sharded. The original model (torch itself) is the oracle throughout."""

from __future__ import annotations

import json

import numpy as np
import pytest
import torch
from torch import nn

from conftest import run_cli
from factorize_weights.backends import torch_backend as tb

VOCAB, WIDTH = 50, 48


class Tagger(nn.Module):
    """Token ids and an attention mask in (integers), a dict out, like a Hugging Face model."""

    def __init__(self):
        super().__init__()
        self.embed = nn.Embedding(VOCAB, WIDTH)
        self.up, self.down = nn.Linear(WIDTH, 96), nn.Linear(96, WIDTH)
        self.head = nn.Linear(WIDTH, 7)

    def forward(self, input_ids, attention_mask):
        h = self.embed(input_ids)  # fails on float ids: the ids must reach the model as integers
        h = h + self.down(torch.relu(self.up(h)))
        m = attention_mask.unsqueeze(-1).to(h.dtype)
        pooled = (h * m).sum(1) / m.sum(1).clamp(min=1)
        return {"logits": self.head(pooled), "pooled": pooled}


def build_tagger():
    torch.manual_seed(0)
    return Tagger().eval()


def _token_data(path, n, seed):
    rng = np.random.default_rng(seed)
    ids = rng.integers(0, VOCAB, (n, 12)).astype(np.int64)
    mask = (rng.random((n, 12)) > 0.2).astype(np.int64)
    np.savez(path, input_ids=ids, attention_mask=mask, labels=rng.integers(0, 7, n))
    return ids, mask


@pytest.fixture
def tagger(tmp_path):
    (tmp_path / "tagger.py").write_text(
        "import sys\nsys.path.insert(0, %r)\nfrom test_inputs_and_checkpoints import build_tagger\n"
        % str(__import__("pathlib").Path(__file__).parent))
    from safetensors.torch import save_model

    save_model(build_tagger(), str(tmp_path / "tagger.safetensors"))
    _token_data(tmp_path / "held.npz", 64, 1)
    _token_data(tmp_path / "cal.npz", 96, 2)
    return tmp_path


def test_named_integer_inputs_and_dict_outputs_end_to_end(tagger, capsys):
    code, out, err = run_cli(capsys, "compress", "--model", f"{tagger}/tagger.py:build_tagger",
                             "--weights", tagger / "tagger.safetensors", "--budget", "params=0.5",
                             "--heldout", tagger / "held.npz", "--calibration", tagger / "cal.npz",
                             "--metric", "agreement", "--json", "-q", "--latency-repeats", "2",
                             "--out", tagger / "run", "--export-onnx")
    assert code == 0, err
    report = json.loads(out)
    assert report["metric"]["name"] == "agreement" and report["metric"]["samples"] == 64
    assert report["totals"]["layers_factorized"] >= 1 and report["latency"]["after_ms"] > 0
    assert report["export"]["max_abs_diff"] <= report["export"]["tolerance"]  # onnxruntime agrees with torch
    # the saved result, rebuilt from a fresh original, computes what the run's model computed
    from factorize_weights.store import load_factorized

    small = load_factorized(build_tagger(), tagger / "run")
    data = np.load(tagger / "held.npz")
    x = {"input_ids": torch.from_numpy(data["input_ids"]), "attention_mask": torch.from_numpy(data["attention_mask"])}
    with torch.no_grad():
        assert small(**x)["logits"].shape == (64, 7)


def test_output_option_picks_an_entry_and_names_the_choices(tagger, capsys):
    base = ["compress", "--model", f"{tagger}/tagger.py:build_tagger", "--weights", tagger / "tagger.safetensors",
            "--budget", "params=0.5", "--heldout", tagger / "held.npz", "--json", "-q", "--latency-repeats", "0"]
    cosines = {}
    for name in ("logits", "pooled"):
        code, out, err = run_cli(capsys, *base, "--output", name, "--metric", "cosine")
        assert code == 0, err
        cosines[name] = json.loads(out)["metric"]["after"]
    assert cosines["logits"] != cosines["pooled"]  # the two entries were measured, not the same one twice
    code, out, err = run_cli(capsys, *base, "--output", "hidden")
    assert code == 2 and "--output 'hidden'" in err and "logits, pooled" in err and len(err.strip().splitlines()) == 1


def test_select_output_rule():
    t = torch.ones(2, 3)
    assert tb.select_output(t) is t
    assert tb.select_output((t, t + 1))[0, 0] == 1 and tb.select_output((t, t + 1), "1")[0, 0] == 2
    assert tb.select_output({"a": t + 2, "b": t})[0, 0] == 3 and tb.select_output({"a": t, "b": t + 5}, "b")[0, 0] == 6


def test_a_data_callable_may_yield_dicts_or_tuples(tmp_path):
    from factorize_weights.data import load_heldout

    (tmp_path / "data.py").write_text(
        "import numpy as np\n"
        "def named():\n"
        "    for i in range(3):\n"
        "        yield {'input_ids': np.full((4, 5), i), 'attention_mask': np.ones((4, 5), int)}, np.zeros(4, int)\n"
        "def positional():\n"
        "    for i in range(2):\n"
        "        yield (np.full((4, 5), i), np.ones((4, 5), int)), None\n")
    named = load_heldout(f"{tmp_path}/data.py:named")
    assert len(named) == 12 and set(named.inputs) == {"input_ids", "attention_mask"}
    assert named.inputs["input_ids"].dtype.kind == "i"  # integers stay integers
    positional = load_heldout(f"{tmp_path}/data.py:positional")
    assert set(positional.inputs) == {"0", "1"} and len(positional) == 8
    model = build_tagger()
    first, _ = next(positional.batches(8))
    out = tb.predict(model, first)  # "0", "1" are passed by position: forward(input_ids, attention_mask)
    with torch.no_grad():
        ref = model(torch.from_numpy(first["0"]), torch.from_numpy(first["1"]))["logits"]
    np.testing.assert_allclose(out, ref.double().numpy())


def test_checkpoint_nested_under_a_key_is_unwrapped_with_a_notice(tagger, capsys):
    torch.save({"model": build_tagger().state_dict(), "epoch": 3}, tagger / "ckpt.pt")
    base = ["inspect", "--model", f"{tagger}/tagger.py:build_tagger", "--weights", tagger / "ckpt.pt"]
    code, out, err = run_cli(capsys, *base)
    assert code == 0 and "the tensors are under the key 'model'" in err and "epoch" in err
    code, out, err = run_cli(capsys, *base, "--weights-key", "optimizer")
    assert code == 2 and "--weights-key 'optimizer'" in err and "model, epoch" in err
    torch.save({"epoch": 3, "step": 10}, tagger / "empty.pt")
    code, out, err = run_cli(capsys, "inspect", "--model", f"{tagger}/tagger.py:build_tagger", "--weights",
                             tagger / "empty.pt")
    assert code == 2 and "none of them holds tensors" in err and len(err.strip().splitlines()) == 1


def test_sharded_safetensors_load_lazily_and_exactly(tagger, capsys):
    from safetensors.torch import save_file

    state = {k: v.contiguous() for k, v in build_tagger().state_dict().items()}
    names = sorted(state)
    shards = {"model-00001-of-00002.safetensors": names[: len(names) // 2],
              "model-00002-of-00002.safetensors": names[len(names) // 2:]}
    for file, keys in shards.items():
        save_file({k: state[k] for k in keys}, str(tagger / file))
    index = {"metadata": {}, "weight_map": {k: f for f, keys in shards.items() for k in keys}}
    (tagger / "model.safetensors.index.json").write_text(json.dumps(index))
    torch.manual_seed(9)
    fresh = Tagger().eval()  # other random weights: loading must overwrite every one
    tb.load_weights(fresh, tagger / "model.safetensors.index.json")
    for k, v in fresh.state_dict().items():
        assert torch.equal(v, state[k])
    (tagger / "model-00002-of-00002.safetensors").unlink()
    code, out, err = run_cli(capsys, "inspect", "--model", f"{tagger}/tagger.py:build_tagger", "--weights",
                             tagger / "model.safetensors.index.json")
    assert code == 2 and "shard file" in err and "is missing" in err


# ---------------------------------------------------------------- refusals (README "Exit codes")


def _one_line_exit_2(code, err, *needles):
    assert code == 2 and len(err.strip().splitlines()) == 1, err
    for needle in needles:
        assert needle in err, err


def test_empty_or_repeated_budget_is_refused(capsys):
    code, _, err = run_cli(capsys, "compress", "--demo", "--budget", "")
    _one_line_exit_2(code, err, "--budget ''")
    with pytest.raises(SystemExit) as stop:  # argparse's own usage error: exit 2, one line
        run_cli(capsys, "compress", "--demo", "--budget", "params=0.5", "--budget", "params=0.3")
    _one_line_exit_2(stop.value.code, capsys.readouterr().err, "--budget", "given twice")


def test_integer_checkpoint_for_a_float_model_is_refused_and_half_precision_loads(tagger, capsys):
    from safetensors.torch import save_file

    state = {k: v.contiguous() for k, v in build_tagger().state_dict().items()}
    save_file({k: v.to(torch.int8) for k, v in state.items()}, str(tagger / "int8.safetensors"))
    save_file({k: v.to(torch.float16) for k, v in state.items()}, str(tagger / "half.safetensors"))
    spec = f"{tagger}/tagger.py:build_tagger"
    code, _, err = run_cli(capsys, "inspect", "--model", spec, "--weights", tagger / "int8.safetensors")
    _one_line_exit_2(code, err, "is int8 but the model's is float32")
    code, _, err = run_cli(capsys, "inspect", "--model", spec, "--weights", tagger / "half.safetensors")
    assert code == 0, err


def test_non_finite_bias_and_weights_are_named_before_any_data(tmp_path, capsys):
    from safetensors.torch import save_model

    (tmp_path / "net.py").write_text(
        "from torch import nn\n"
        "def build():\n"
        "    return nn.Sequential(nn.Flatten(), nn.Linear(64, 64), nn.ReLU(), nn.Linear(64, 10))\n")
    for label, poison in (("bias", lambda m: m[1].bias.data.__setitem__(3, float("inf"))),
                          ("weight", lambda m: m[3].weight.data.__setitem__((0, 0), float("nan")))):
        model = nn.Sequential(nn.Flatten(), nn.Linear(64, 64), nn.ReLU(), nn.Linear(64, 10))
        poison(model)
        save_model(model, str(tmp_path / f"{label}.safetensors"))
        np.savez(tmp_path / "held.npz", inputs=np.zeros((8, 1, 8, 8), np.float32))
        code, _, err = run_cli(capsys, "compress", "--model", f"{tmp_path}/net.py:build", "--weights",
                               tmp_path / f"{label}.safetensors", "--budget", "params=0.5",
                               "--heldout", tmp_path / "held.npz")
        _one_line_exit_2(code, err, f"{label} has 1 NaN or Inf value(s)")
        assert "--heldout" not in err


def test_damaged_plan_and_a_model_without_layers_are_named(tmp_path, capsys):
    (tmp_path / "run").mkdir()
    (tmp_path / "run" / "plan.json").write_text(
        '{"format": "factorize-weights/plan", "version": 1, "layers": [{"name": "conv1", "kind": "conv2d"}]}')
    from factorize_weights import demo

    code, _, err = run_cli(capsys, "evaluate", "--demo", "--factorized", tmp_path / "run", "--heldout", demo.HELDOUT)
    _one_line_exit_2(code, err, "plan.json", "lacks the field(s) shape, rank")
    (tmp_path / "flat.py").write_text("from torch import nn\ndef build():\n    return nn.Sequential(nn.ReLU())\n")
    code, _, err = run_cli(capsys, "compress", "--model", f"{tmp_path}/flat.py:build", "--factory-weights",
                           "--budget", "params=0.5")
    _one_line_exit_2(code, err, "flat.py:build", "nothing to factorize")


def test_a_factory_that_exits_is_refused(tmp_path, capsys):
    (tmp_path / "quits.py").write_text("import sys\ndef build():\n    sys.exit(0)\n")
    code, _, err = run_cli(capsys, "inspect", "--model", f"{tmp_path}/quits.py:build")
    _one_line_exit_2(code, err, "quits.py:build", "sys.exit(0)")


def _leftovers(folder):
    return sorted(p.name for p in folder.iterdir() if p.name.startswith("."))


def test_faults_while_writing_leave_nothing_behind(tmp_path, capsys, monkeypatch):
    import errno

    from factorize_weights import cli, store

    real = store.write_model
    out = tmp_path / "out"
    base = ["compress", "--demo", "--budget", "params=0.5", "--latency-repeats", "0", "-q", "--out", out]

    def disk_full(model, folder):
        real(model, folder)
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(store, "write_model", disk_full)
    code, _, err = run_cli(capsys, *base)
    _one_line_exit_2(code, err, f"--out {out}", "no space left", "MiB free")
    assert not out.exists() and _leftovers(tmp_path) == []

    def terminated(model, folder):  # SIGTERM arriving in the middle of the writing
        real(model, folder)
        raise cli._Terminated()

    monkeypatch.setattr(store, "write_model", terminated)
    code, _, err = run_cli(capsys, *base)
    assert code == 143 and err.strip() == "factorize-weights: terminated (SIGTERM); no partial output is left"
    assert not out.exists() and _leftovers(tmp_path) == []

    def racing(model, folder):  # another run with the same --out finishes first
        real(model, folder)
        out.mkdir()
        (out / "report.json").write_text("{}")

    monkeypatch.setattr(store, "write_model", racing)
    code, _, err = run_cli(capsys, *base)
    _one_line_exit_2(code, err, f"--out {out}", "another run wrote this folder")
    assert sorted(p.name for p in out.iterdir()) == ["report.json"] and _leftovers(tmp_path) == []


def test_sigterm_ends_a_real_run_with_one_line(tmp_path):
    import signal
    import subprocess
    import sys
    import time

    proc = subprocess.Popen([sys.executable, "-m", "factorize_weights", "compress", "--demo", "--budget", "params=0.5",
                             "--latency-repeats", "100000", "--out", str(tmp_path / "out")],
                            stderr=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    time.sleep(6)  # imports, compression, then the long latency loop
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 143 and err.strip().splitlines() == [
        "factorize-weights: terminated (SIGTERM); no partial output is left"], err
    assert not (tmp_path / "out").exists() and _leftovers(tmp_path) == []


def test_a_hugging_face_model_folder_compresses_end_to_end(tmp_path, capsys):
    # transformers builds a small BERT from a config (no download); the original model is the oracle
    transformers = pytest.importorskip("transformers", reason="the optional 'transformers' package is not installed")
    config = transformers.BertConfig(vocab_size=60, hidden_size=64, num_hidden_layers=2, num_attention_heads=4,
                                     intermediate_size=128, max_position_embeddings=32)
    torch.manual_seed(0)
    transformers.BertModel(config).eval().save_pretrained(str(tmp_path / "bert"))
    rng = np.random.default_rng(0)
    for name, n in (("held.npz", 24), ("cal.npz", 48)):
        ids = rng.integers(0, 60, (n, 10)).astype(np.int64)
        np.savez(tmp_path / name, input_ids=ids, attention_mask=np.ones_like(ids))
    code, out, err = run_cli(capsys, "compress", "--model", tmp_path / "bert", "--budget", "params=0.5",
                             "--heldout", tmp_path / "held.npz", "--calibration", tmp_path / "cal.npz",
                             "--out", tmp_path / "out", "--json", "-q", "--latency-repeats", "2")
    assert code == 0, err
    report = json.loads(out)
    names = {e["name"] for e in report["layers"]}
    assert "encoder.layer.0.attention.self.query" in names and report["totals"]["layers_factorized"] >= 4
    assert report["metric"]["name"] == "cosine" and report["metric"]["after"] > 0.5  # last_hidden_state
    from factorize_weights.store import load_factorized

    original = transformers.BertModel.from_pretrained(str(tmp_path / "bert"), local_files_only=True).eval()
    small = load_factorized(original, tmp_path / "out")
    data = np.load(tmp_path / "held.npz")
    x = {k: torch.from_numpy(data[k]) for k in ("input_ids", "attention_mask")}
    with torch.no_grad():
        assert small(**x).last_hidden_state.shape == (24, 10, 64)
    # the output is a model folder too: its config (and tokenizer files, had there been any) beside
    # the factorized weights, loadable with --model OUT alone (no original weights needed)
    assert (tmp_path / "out" / "config.json").read_text() == (tmp_path / "bert" / "config.json").read_text()
    from factorize_weights.backends import torch_backend

    again = torch_backend.load_pretrained(tmp_path / "out")
    with torch.no_grad():
        assert torch.equal(again(**x).last_hidden_state, small(**x).last_hidden_state)


def test_a_folder_whose_config_names_a_head_its_weights_lack_loads_the_base_model(tmp_path, capsys):
    # common practice: sentence-embedding folders are saved from the base model with a config
    # naming a masked-LM class; transformers would initialize that head at random. Oracle: torch,
    # the base model saved by transformers itself, computes what the loaded model computes.
    transformers = pytest.importorskip("transformers")
    config = transformers.BertConfig(vocab_size=60, hidden_size=32, num_hidden_layers=1, num_attention_heads=2,
                                     intermediate_size=64, max_position_embeddings=16)
    torch.manual_seed(0)
    base = transformers.BertModel(config).eval()
    base.save_pretrained(str(tmp_path / "enc"))
    cfg = json.loads((tmp_path / "enc" / "config.json").read_text())
    cfg["architectures"] = ["BertForMaskedLM"]
    (tmp_path / "enc" / "config.json").write_text(json.dumps(cfg))
    capsys.readouterr()  # transformers' own saving bars
    code, out, err = run_cli(capsys, "inspect", "--model", tmp_path / "enc", "-q", "--json")
    assert code == 0, err
    names = [e["name"] for e in json.loads(out)["layers"]]
    assert not any("cls." in n or "lm_head" in n for n in names)  # no random head among the layers
    assert "config.json names BertForMaskedLM, but the weights hold no" in err and "loaded the base model" in err
    from factorize_weights.backends import torch_backend

    loaded = torch_backend.load_pretrained(tmp_path / "enc")
    ids = torch.tensor([[1, 5, 7, 2]])
    with torch.no_grad():
        assert torch.equal(loaded(input_ids=ids).last_hidden_state, base(input_ids=ids).last_hidden_state)


def test_a_folder_missing_weights_of_its_base_model_is_refused(tmp_path, capsys):
    transformers = pytest.importorskip("transformers")
    from safetensors.torch import load_file, save_file

    config = transformers.BertConfig(vocab_size=60, hidden_size=32, num_hidden_layers=1, num_attention_heads=2,
                                     intermediate_size=64, max_position_embeddings=16)
    transformers.BertModel(config).eval().save_pretrained(str(tmp_path / "enc"))
    weights = tmp_path / "enc" / "model.safetensors"
    state = load_file(str(weights))
    dropped = [k for k in state if "intermediate.dense.weight" in k]
    save_file({k: v for k, v in state.items() if k not in dropped}, str(weights), metadata={"format": "pt"})
    capsys.readouterr()  # transformers' own saving bars
    code, _, err = run_cli(capsys, "inspect", "--model", tmp_path / "enc", "-q")
    _one_line_exit_2(code, err, f"--model {tmp_path / 'enc'}", "the weights hold no", "would be random")
