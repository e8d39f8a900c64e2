"""The bad-input and fault contract (README "Exit codes"), table-driven: every case gets its exit
code, exactly one line on stderr naming the flag or file, and nothing written next to --out.
Signals, a full disk, a race on one --out and the factory that exits are in
test_inputs_and_checkpoints.py (they need monkeypatching or a subprocess)."""

from __future__ import annotations

import os

import numpy as np
import pytest
import torch
from safetensors.torch import save_file, save_model
from torch import nn

from conftest import run_cli
from factorize_weights import demo

USER_MODEL = """\
import torch
from torch import nn

def build():
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(20, 64), nn.ReLU(), nn.Linear(64, 64), nn.ReLU(), nn.Linear(64, 5))

def raises():
    raise RuntimeError("no GPU here")

def not_a_module():
    return 42

def quits():
    raise SystemExit(0)

def flat():
    return nn.Sequential(nn.ReLU())

def empty_batches():
    return iter(())

def bad_batches():
    raise ValueError("the database is down")
"""


@pytest.fixture(scope="module")
def w(tmp_path_factory):
    """The workspace: a user model with checkpoints and data files, made once."""
    d = tmp_path_factory.mktemp("refusals")
    (d / "net.py").write_text(USER_MODEL)
    (d / "broken.py").write_text("def build(:\n")
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(20, 64), nn.ReLU(), nn.Linear(64, 64), nn.ReLU(), nn.Linear(64, 5))
    save_model(model, str(d / "net.safetensors"))
    state = {k: v.contiguous() for k, v in model.state_dict().items()}
    torch.save(state, str(d / "net.pt"))
    torch.save({"w": object()}, str(d / "legacy.pt"), _use_new_zipfile_serialization=False)
    torch.save({"w": object()}, str(d / "evil.pt"))
    torch.save({"epoch": 3}, str(d / "notensors.pt"))
    save_file({k: v.to(torch.int8) for k, v in state.items()}, str(d / "int8.safetensors"))
    save_file({"0.weight": torch.zeros(3, 3)}, str(d / "other.safetensors"))
    save_file({**state, "0.weight": torch.zeros(64, 21)}, str(d / "shape.safetensors"))
    (d / "garbage.safetensors").write_bytes(b"\x00\x01garbage" * 10)
    (d / "net.ckpt").write_bytes(b"x")
    (d / "index.safetensors.index.json").write_text('{"weight_map": {"0.weight": "gone.safetensors"}}')
    (d / "junk.safetensors.index.json").write_text("not json")
    (d / "folder.safetensors").mkdir()
    rng = np.random.default_rng(0)
    _profiles(d)
    np.savez(d / "held.npz", inputs=rng.standard_normal((40, 20)).astype(np.float32), labels=rng.integers(0, 5, 40))
    np.savez(d / "cal.npz", inputs=rng.standard_normal((40, 20)).astype(np.float32))
    np.savez(d / "nolabels.npz", inputs=rng.standard_normal((40, 20)).astype(np.float32))
    np.savez(d / "wrongshape.npz", inputs=np.zeros((8, 7), np.float32))
    np.savez(d / "emptyin.npz", inputs=np.zeros((0, 20), np.float32))
    np.savez(d / "nan.npz", inputs=np.full((4, 20), np.nan, np.float32))
    np.savez(d / "rows.npz", inputs=np.zeros((8, 20), np.float32), labels=np.zeros(5, int))
    np.savez(d / "named.npz", x=np.zeros((8, 20), np.float32))
    np.save(d / "objects.npy", np.array([{"a": 1}], dtype=object), allow_pickle=True)
    import zipfile

    with zipfile.ZipFile(d / "objects.npz", "w") as zf:
        zf.write(d / "objects.npy", "inputs.npy")
    (d / "csv.npz").write_text("1,2,3\n4,5,6\n")
    (d / "heldfolder.npz").mkdir()
    (d / "run.toml").write_text('budget = "params=0.5"\n')
    (d / "bad.toml").write_text("budget = \n")
    (d / "unknown.toml").write_text('budgett = "params=0.5"\n')
    (d / "typed.toml").write_text("budget = 5\n")
    (d / "afile").write_text("x")
    (d / "full").mkdir()
    (d / "full" / "keep.txt").write_text("x")
    (d / "garbage.onnx").write_bytes(b"\x08\x01garbage")
    (d / "empty.onnx").write_bytes(b"")
    import onnx
    from onnx import TensorProto, helper

    relu = helper.make_graph([helper.make_node("Relu", ["x"], ["y"])], "g",
                             [helper.make_tensor_value_info("x", TensorProto.FLOAT, [None, 4])],
                             [helper.make_tensor_value_info("y", TensorProto.FLOAT, [None, 4])])
    onnx.save(helper.make_model(relu, opset_imports=[helper.make_opsetid("", 17)]), str(d / "relu.onnx"))
    return d


def compress(w, *extra, weights="net.safetensors"):
    head = ["compress", "--model", f"{w}/net.py:build", "--budget", "params=0.5", "--out", w / "out"]
    return head + (["--weights", w / weights] if weights else []) + list(extra)


def latency(w, *extra, budget="latency=0.7"):
    return swap(compress(w, "--heldout", w / "held.npz", *extra), "--budget", budget)


def _profiles(d) -> None:
    """Profile files for the workspace's model (layers 0, 2, 4 of 20 -> 64 -> 64 -> 5), each wrong
    in one way, plus a damaged one and one with a field cut."""
    import json

    layers = [{"name": "0", "kind": "linear", "matrix": [64, 20]}, {"name": "2", "kind": "linear", "matrix": [64, 64]},
              {"name": "4", "kind": "linear", "matrix": [5, 64]}]
    tables = [{"name": l["name"], "input_shape": [1, l["matrix"][1]], "ranks": [1, 2], "factor_ms": [0.01, 0.02],
               "dense_ms": 0.03, "spread": 0.1} for l in layers]
    good = {"kind": "factorize-weights latency profile", "version": 1, "created": "", "machine": {"cpu": "x", "cores": 1},
            "runtime": {"name": "torch", "version": "2"}, "threads": 1, "batch": 1, "input_shapes": {"inputs": [1, 20]},
            "model": {"fingerprint": "", "layers": layers}, "whole_ms": 0.2, "whole_spread_ms": [0.1, 0.3],
            "seconds": 1.0, "tables": tables}
    variants = {
        "threads": {"threads": 4},
        "batch": {"batch": 8, "input_shapes": {"inputs": [8, 20]}},
        "ort": {"runtime": {"name": "onnxruntime", "version": "1"}},
        "other": {"model": {"fingerprint": "", "layers": layers[:2] + [{"name": "5", "kind": "linear", "matrix": [5, 64]}]},
                  "tables": tables[:2] + [dict(tables[2], name="5")]},
    }
    for name, change in variants.items():
        (d / f"{name}.profile.json").write_text(json.dumps({**good, **change}))
    cut = dict(good)
    del cut["whole_ms"]
    (d / "cut.profile.json").write_text(json.dumps(cut))
    (d / "junk.profile.json").write_text('{"kind": "factorize-weights latency profile", "version": 1,')


def swap(argv, flag, value):
    argv = list(argv)
    argv[argv.index(flag) + 1] = value
    return argv


def without(argv, flag):
    argv = list(argv)
    i = argv.index(flag)
    return argv[:i] + argv[i + 2:]


# (id, argv builder, exit code, words the one line must hold)
CASES = [
    # checkpoints
    ("weights missing", lambda w: compress(w, weights="absent.safetensors"), 2, ["--weights", "does not exist"]),
    ("weights is a folder", lambda w: compress(w, weights="folder.safetensors"), 2, ["--weights", "is a folder"]),
    ("weights corrupt", lambda w: compress(w, weights="garbage.safetensors"), 2, ["--weights", "cannot be read"]),
    ("weights pickled object", lambda w: compress(w, weights="evil.pt"), 2, ["evil.pt", "never unpickles"]),
    ("weights legacy pickle", lambda w: compress(w, weights="legacy.pt"), 2, ["legacy.pt", "never unpickles"]),
    ("weights names differ", lambda w: compress(w, weights="other.safetensors"), 2, ["--weights", "do not match"]),
    ("weights shapes differ", lambda w: compress(w, weights="shape.safetensors"), 2, ["other shapes", "0.weight"]),
    ("weights int8 for float", lambda w: compress(w, weights="int8.safetensors"), 2, ["is int8", "float32"]),
    ("weights no tensors", lambda w: compress(w, weights="notensors.pt"), 2, ["--weights", "none of them holds"]),
    ("weights-key absent", lambda w: compress(w, "--weights-key", "ema", weights="net.pt"), 2, ["--weights-key 'ema'"]),
    ("weights-key alone", lambda w: compress(w, "--weights-key", "ema", weights=None), 2, ["--weights-key"]),
    ("weights unknown suffix", lambda w: compress(w, weights="net.ckpt"), 2, ["--weights", ".safetensors"]),
    ("weights shard missing", lambda w: compress(w, weights="index.safetensors.index.json"), 2, ["shard file"]),
    ("weights index not json", lambda w: compress(w, weights="junk.safetensors.index.json"), 2, ["weight_map"]),
    ("weights with ONNX", lambda w: ["compress", demo.ONNX, "--weights", w / "net.pt", "--budget", "params=0.5",
                                     "--out", w / "out"], 2, ["--weights", "ONNX"]),
    # model specs
    ("no model", lambda w: ["compress", "--budget", "params=0.5", "--out", w / "out"], 2, ["no model given"]),
    ("spec not a file", lambda w: swap(compress(w), "--model", "nothing_here"), 2, ["--model 'nothing_here'"]),
    ("spec file missing", lambda w: swap(compress(w), "--model", f"{w}/absent.py:build"), 2, ["absent.py", "does not exist"]),
    ("spec factory missing", lambda w: swap(compress(w), "--model", f"{w}/net.py:nothere"), 2, ["no callable named 'nothere'"]),
    ("spec factory raises", lambda w: swap(compress(w, weights=None), "--model", f"{w}/net.py:raises"), 2,
     ["raised RuntimeError"]),
    ("spec returns non-module", lambda w: swap(compress(w, weights=None), "--model", f"{w}/net.py:not_a_module"), 2,
     ["returned int"]),
    ("spec factory exits", lambda w: swap(compress(w, weights=None), "--model", f"{w}/net.py:quits"), 2,
     ["net.py:quits", "sys.exit(0)"]),
    ("spec syntax error", lambda w: swap(compress(w, weights=None), "--model", f"{w}/broken.py:build"), 2,
     ["broken.py", "SyntaxError"]),
    ("spec module missing", lambda w: swap(compress(w, weights=None), "--model", "no_such_pkg_xyz:build"), 2,
     ["cannot import no_such_pkg_xyz"]),
    ("model given twice", lambda w: ["compress", demo.ONNX, "--model", demo.ONNX, "--budget", "params=0.5"], 2,
     ["give the model once"]),
    ("demo with weights", lambda w: ["compress", "--demo", "--weights", w / "net.pt", "--budget", "params=0.5"], 2,
     ["--demo cannot be combined"]),
    ("nothing to factorize", lambda w: swap(compress(w, weights=None), "--model", f"{w}/net.py:flat") + ["--factory-weights"], 2,
     ["net.py:flat", "nothing to factorize"]),
    # ONNX files
    ("onnx garbage", lambda w: ["compress", w / "garbage.onnx", "--budget", "params=0.5", "--out", w / "out"], 2,
     ["garbage.onnx", "not"]),
    ("onnx empty", lambda w: ["compress", w / "empty.onnx", "--budget", "params=0.5", "--out", w / "out"], 2,
     ["empty.onnx"]),
    ("onnx only unsupported ops", lambda w: ["compress", w / "relu.onnx", "--budget", "params=0.5", "--out", w / "out"],
     2, ["relu.onnx", "nothing to factorize", "no linear or convolution layers"]),
    ("onnx data wrong shape", lambda w: ["compress", demo.ONNX, "--budget", "params=0.5", "--heldout",
                                         w / "wrongshape.npz", "--out", w / "out"], 2, ["--heldout", "wrongshape.npz"]),
    ("onnx recover", lambda w: ["compress", "--demo", "onnx", "--budget", "params=0.5", "--calibration",
                                demo.CALIBRATION, "--recover", "5", "--out", w / "out"], 2, ["no trainable factors"]),
    # --rows-ridge became a constant of the estimator (Python API only): the command line refuses it
    ("rows ridge is no option", lambda w: ["compress", "--demo", "--budget", "params=0.5", "--calibration",
                                           demo.CALIBRATION, "--rows-ridge", "0.5", "--out", w / "out"], 2,
     ["unrecognized arguments: --rows-ridge"]),
    ("factory without weights", lambda w: swap(compress(w, weights=None), "--model", f"{w}/net.py:build"), 2,
     ["no --weights given", "--factory-weights"]),
    ("factory weights and weights", lambda w: compress(w) + ["--factory-weights"], 2,
     ["--factory-weights", "cannot be combined with --weights"]),
    ("onnx bn inputs", lambda w: ["compress", "--demo", "onnx", "--budget", "params=0.5", "--heldout", demo.HELDOUT,
                                  "--bn-inputs", "--out", w / "out"], 2, ["--bn-inputs", "ONNX"]),
    ("bn inputs without data", lambda w: compress(w, "--bn-inputs"), 2, ["--bn-inputs", "--heldout"]),
    ("bn inputs with an error budget", lambda w: ["compress", "--demo", "--budget", "error=0.3", "--heldout",
                                                  demo.HELDOUT, "--bn-inputs", "--out", w / "out"], 2,
     ["--bn-inputs", "error="]),
    ("output allocation without data", lambda w: ["compress", "--demo", "--budget", "params=0.5", "--allocation",
                                                  "output", "--out", w / "out"], 2,
     ["--allocation output", "--calibration"]),
    ("unknown allocation", lambda w: ["compress", "--demo", "--budget", "params=0.5", "--allocation", "best",
                                      "--out", w / "out"], 2, ["--allocation", "best"]),
    ("effect samples zero", lambda w: ["compress", "--demo", "--budget", "params=0.5", "--calibration",
                                       demo.CALIBRATION, "--effect-samples", "0", "--out", w / "out"], 2,
     ["--effect-samples"]),
    ("onnx export-onnx", lambda w: ["compress", "--demo", "onnx", "--budget", "params=0.5", "--export-onnx",
                                    "--out", w / "out"], 2, ["--export-onnx", "ONNX already"]),
    # data files
    ("heldout missing", lambda w: compress(w, "--heldout", w / "absent.npz"), 2, ["--heldout", "does not exist"]),
    ("heldout folder", lambda w: compress(w, "--heldout", w / "heldfolder.npz"), 2, ["--heldout", "is a folder"]),
    ("heldout not zip", lambda w: compress(w, "--heldout", w / "csv.npz"), 2, ["csv.npz", "not an .npz file"]),
    ("heldout objects", lambda w: compress(w, "--heldout", w / "objects.npz"), 2, ["objects.npz", "Python objects"]),
    ("heldout empty", lambda w: compress(w, "--heldout", w / "emptyin.npz"), 2, ["'inputs' is empty"]),
    ("heldout nan", lambda w: compress(w, "--heldout", w / "nan.npz"), 2, ["nan.npz", "NaN or Inf"]),
    ("heldout label rows", lambda w: compress(w, "--heldout", w / "rows.npz"), 2, ["'labels' has 5 rows"]),
    ("heldout wrong shape", lambda w: compress(w, "--heldout", w / "wrongshape.npz"), 2, ["--heldout", "do not fit"]),
    ("heldout names", lambda w: compress(w, "--heldout", w / "named.npz"), 2, ["named.npz", "'x' is not a parameter"]),
    ("heldout spec raises", lambda w: compress(w, "--heldout", f"{w}/net.py:bad_batches"), 2,
     ["--heldout", "the database is down"]),
    ("heldout spec empty", lambda w: compress(w, "--heldout", f"{w}/net.py:empty_batches"), 2, ["yielded no batches"]),
    ("heldout spec missing", lambda w: compress(w, "--heldout", "no_such_pkg_xyz:batches"), 2, ["--heldout"]),
    ("calibration is heldout", lambda w: compress(w, "--heldout", w / "held.npz", "--calibration", w / "held.npz"),
     2, ["--calibration", "same data as --heldout"]),
    ("calibration wrong shape", lambda w: compress(w, "--calibration", w / "wrongshape.npz"), 2,
     ["--calibration", "do not fit"]),
    # budgets and flags
    ("budget empty", lambda w: swap(compress(w), "--budget", ""), 2, ["--budget ''"]),
    ("budget twice", lambda w: compress(w, "--budget", "params=0.3"), 2, ["--budget", "given twice"]),
    ("budget above one", lambda w: swap(compress(w), "--budget", "params=1.5"), 2, ["--budget 'params=1.5'"]),
    ("budget zero", lambda w: swap(compress(w), "--budget", "params=0"), 2, ["--budget"]),
    ("budget unknown kind", lambda w: swap(compress(w), "--budget", "speed=2"), 2, ["--budget"]),
    ("budget infeasible", lambda w: swap(compress(w), "--budget", "params=0.001"), 2, ["--budget", "smallest possible"]),
    ("flops without data", lambda w: swap(compress(w), "--budget", "flops=0.5"), 2, ["flops budget needs --heldout"]),
    ("no budget", lambda w: without(compress(w), "--budget"), 2, ["--budget", "--keep-within"]),
    ("keep-within negative", lambda w: without(compress(w, "--keep-within", "-1", "--heldout", w / "held.npz"), "--budget"),
     2, ["--keep-within", ">= 0"]),
    ("fail-over nan", lambda w: compress(w, "--drop-limit", "nan", "--heldout", w / "held.npz"), 2, ["--drop-limit"]),
    ("whitened without data", lambda w: compress(w, "--method", "whitened"), 2, ["--method whitened needs --calibration"]),
    ("sequential without data", lambda w: compress(w, "--sequential"), 2, ["--sequential needs --calibration"]),
    ("rank step zero", lambda w: compress(w, "--rank-step", "0"), 2, ["--rank-step"]),
    ("svd unknown", lambda w: compress(w, "--svd", "fast"), 2, ["--svd", "fast"]),
    ("top1 without labels", lambda w: compress(w, "--heldout", w / "nolabels.npz", "--metric", "top1"), 2, ["top1"]),
    ("selection is heldout", lambda w: without(compress(w, "--keep-within", "1", "--heldout", w / "held.npz",
                                                     "--selection", w / "held.npz"), "--budget"), 2,
     ["--selection", "same data as --heldout"]),
    ("selection without search", lambda w: compress(w, "--selection", w / "cal.npz"), 2, ["--selection", "--keep-within"]),
    ("output unknown", lambda w: compress(w, "--heldout", w / "held.npz", "--output", "logits"), 2, ["--output 'logits'"]),
    ("int8 without data", lambda w: compress(w, "--int8"), 2, ["--int8 needs --heldout"]),
    ("ridge out of range", lambda w: compress(w, "--ridge", "2"), 2, ["--ridge"]),
    # run files
    ("config missing", lambda w: compress(w, "--config", w / "absent.toml"), 2, ["--config", "does not exist"]),
    ("config not toml", lambda w: compress(w, "--config", w / "bad.toml"), 2, ["--config", "not valid TOML"]),
    ("config unknown key", lambda w: compress(w, "--config", w / "unknown.toml"), 2, ["--config", "budgett"]),
    ("config wrong type", lambda w: without(compress(w, "--config", w / "typed.toml"), "--budget"), 2,
     ["--config", "budget"]),
    # output folders
    ("out not empty", lambda w: swap(compress(w), "--out", w / "full"), 2, ["--out", "not empty", "--force"]),
    ("out is a file", lambda w: swap(compress(w), "--out", w / "afile"), 2, ["--out", "not a folder"]),
    ("out empty path", lambda w: swap(compress(w), "--out", ""), 2, ["--out", "empty path"]),
    ("out parent missing", lambda w: swap(compress(w), "--out", w / "no" / "such" / "out"), 2, ["--out", "does not exist"]),
    ("out holds an input", lambda w: swap(compress(w, "--force"), "--out", w), 2, ["--out", "holds"]),
    ("evaluate not a result", lambda w: ["evaluate", "--demo", "--factorized", w / "full"], 2, ["full", "no plan.json"]),
    # resolver rules not met by a row above (resolve.RULES; see RULE_CASES below)
    ("recover without data", lambda w: compress(w, "--recover", "5"), 2, ["--recover needs --calibration"]),
    ("sequential with plain svd", lambda w: compress(w, "--calibration", w / "cal.npz", "--sequential", "--method", "svd"),
     2, ["--sequential refits whitened factors", "--method svd"]),
    ("export without data", lambda w: compress(w, "--export-onnx"), 2, ["--export-onnx needs --heldout"]),
    ("export without out", lambda w: without(compress(w, "--export-onnx", "--heldout", w / "held.npz"), "--out"), 2,
     ["--export-onnx needs --out"]),
    ("int8 without out", lambda w: without(compress(w, "--int8", "--heldout", w / "held.npz"), "--out"), 2,
     ["--int8 needs --out"]),
    ("int8 of a pytorch model", lambda w: compress(w, "--int8", "--heldout", w / "held.npz"), 2,
     ["--int8 quantizes ONNX models", "--export-onnx"]),
    ("keep-within without data", lambda w: without(compress(w, "--keep-within", "1"), "--budget"), 2,
     ["--keep-within needs --heldout"]),
    # latency budgets (costs.py, latency_budget.py)
    ("latency without data", lambda w: swap(compress(w), "--budget", "latency=0.7"), 2,
     ["a latency budget needs --heldout"]),
    ("latency with timing off", lambda w: latency(w, "--latency-repeats", "0"), 2, ["--latency-repeats 0"]),
    ("profile without a latency budget", lambda w: compress(w, "--heldout", w / "held.npz", "--latency-profile",
                                                            w / "threads.profile.json"), 2,
     ["--latency-profile holds the cost tables of a latency budget"]),
    ("latency fraction above one", lambda w: swap(compress(w), "--budget", "latency=2"), 2,
     ["latency fraction must be in (0, 1]", "latency=2ms"]),
    ("latency not a number", lambda w: swap(compress(w), "--budget", "latency=fast"), 2,
     ["latency takes a fraction", "'fast'"]),
    ("latency out of reach", lambda w: latency(w, budget="latency=0.01"), 2,
     ["--budget latency=0.01", "the fastest plan", "predicted at"]),
    ("profile missing", lambda w: latency(w, "--latency-profile", w / "gone.profile.json"), 2,
     ["gone.profile.json", "no such file", "factorize-weights profile"]),
    ("profile damaged", lambda w: latency(w, "--latency-profile", w / "junk.profile.json"), 2,
     ["junk.profile.json", "not a readable profile"]),
    ("profile of another kind", lambda w: latency(w, "--latency-profile", w / "run.toml"), 2,
     ["run.toml", "not a readable profile"]),
    ("profile with a field missing", lambda w: latency(w, "--latency-profile", w / "cut.profile.json"), 2,
     ["cut.profile.json", "damaged profile"]),
    ("profile of another model", lambda w: latency(w, "--latency-profile", w / "other.profile.json"), 2,
     ["other.profile.json", "made for another model", "'4'"]),
    ("profile for other threads", lambda w: latency(w, "--latency-profile", w / "threads.profile.json"), 2,
     ["threads.profile.json", "measured with 4 thread(s)", "--latency-threads 4"]),
    ("profile for other shapes", lambda w: latency(w, "--latency-profile", w / "batch.profile.json"), 2,
     ["batch.profile.json", "inputs 8x20", "profile again"]),
    ("profile command without --out", lambda w: ["profile", "--model", f"{w}/net.py:build", "--weights",
                                                  w / "net.safetensors", "--heldout", w / "held.npz"], 2,
     ["--out is required", "profile file"]),
    ("profile command into a folder", lambda w: ["profile", "--model", f"{w}/net.py:build", "--weights",
                                                 w / "net.safetensors", "--heldout", w / "held.npz", "--out", w], 2,
     ["is a folder"]),
    ("profile command over a file", lambda w: ["profile", "--model", f"{w}/net.py:build", "--weights",
                                               w / "net.safetensors", "--heldout", w / "held.npz", "--out",
                                               w / "run.toml"], 2, ["run.toml", "exists", "--force"]),
    ("profile command into no folder", lambda w: ["profile", "--model", f"{w}/net.py:build", "--weights",
                                                  w / "net.safetensors", "--heldout", w / "held.npz", "--out",
                                                  w / "gone" / "p.json"], 2, ["does not exist"]),
    ("profile command without data", lambda w: ["profile", "--model", f"{w}/net.py:build", "--weights",
                                                w / "net.safetensors", "--out", w / "p.json"], 2,
     ["--heldout is required"]),
    ("profile command with data that does not fit", lambda w: ["profile", "--model", f"{w}/net.py:build", "--weights",
                                                               w / "net.safetensors", "--heldout", w / "wrongshape.npz",
                                                               "--out", w / "p.json"], 2,
     ["wrongshape.npz", "do not fit"]),
    ("profile command with no timing", lambda w: ["profile", "--model", f"{w}/net.py:build", "--weights",
                                                  w / "net.safetensors", "--heldout", w / "held.npz", "--out",
                                                  w / "p.json", "--latency-repeats", "0"], 2,
     ["--latency-repeats must be at least 1"]),
    ("profile for another runtime", lambda w: latency(w, "--latency-profile", w / "ort.profile.json"), 2,
     ["ort.profile.json", "measured in onnxruntime", "runs in torch"]),
]


def _bn_weights_on_onnx(w):
    """bn_weights is a Python API setting only (docs/decisions.md): this rule is met there."""
    from factorize_weights import CompressConfig, compress as api_compress
    from factorize_weights.backends import onnx_backend
    from factorize_weights.data import load_heldout

    api_compress(onnx_backend.load(demo.ONNX), CompressConfig(bn_weights=True, quiet=True),
                 heldout=load_heldout(str(demo.HELDOUT)))


def _output_effects_without_the_capability(w):
    """Both backends probe outputs now; a backend without the capability meets the rule."""
    from factorize_weights import CompressConfig, resolve

    resolve.check(CompressConfig(allocation="output"),
                  resolve.Facts(capabilities=frozenset(), backend_name="ONNX", calibration=True))


#: Every rule of the resolver (resolve.RULES) and the refusal row that meets it: a CASES id, or a
#: callable for a rule only the Python API can reach. test_every_rule_has_a_row fails on a new rule
#: without one, test_the_row_meets_its_rule when the row is refused by another rule.
RULE_CASES = {
    "whitened-needs-calibration": "whitened without data",
    "sequential-needs-calibration": "sequential without data",
    "recover-needs-calibration": "recover without data",
    "sequential-needs-whitened": "sequential with plain svd",
    "recover-needs-capability": "onnx recover",
    "bn-weights-needs-capability": _bn_weights_on_onnx,
    "bn-inputs-needs-capability": "onnx bn inputs",
    "bn-needs-data": "bn inputs without data",
    "bn-inputs-per-layer-budget": "bn inputs with an error budget",
    "flops-needs-heldout": "flops without data",
    "output-allocation-needs-calibration": "output allocation without data",
    "output-allocation-needs-capability": _output_effects_without_the_capability,
    "export-needs-capability": "onnx export-onnx",
    "export-needs-heldout": "export without data",
    "export-needs-out": "export without out",
    "int8-needs-heldout": "int8 without data",
    "int8-needs-out": "int8 without out",
    "int8-needs-onnx": "int8 of a pytorch model",
    "keep-within-needs-heldout": "keep-within without data",
    "selection-needs-keep-within": "selection without search",
    "latency-needs-heldout": "latency without data",
    "latency-needs-timing": "latency with timing off",
    "profile-needs-latency-budget": "profile without a latency budget",
}


def test_every_rule_has_a_row():
    from factorize_weights import resolve

    assert set(RULE_CASES) == {r.id for r in resolve.RULES}
    names = {c[0] for c in CASES}
    assert all(callable(v) or v in names for v in RULE_CASES.values())


@pytest.mark.parametrize("rule_id", sorted(RULE_CASES))
def test_the_row_meets_its_rule(rule_id, w, capsys, monkeypatch):
    # wrap every rule so the one that refuses is recorded; the row must be refused by its own rule
    from factorize_weights import resolve
    from factorize_weights.errors import InputError

    fired = []
    wrapped = tuple(resolve.Rule(r.id, lambda c, f, r=r: bool(r.refused(c, f)) and not fired.append(r.id), r.message)
                    for r in resolve.RULES)
    monkeypatch.setattr(resolve, "RULES", wrapped)
    row = RULE_CASES[rule_id]
    if callable(row):
        with pytest.raises(InputError):
            row(w)
    else:
        build = next(c[1] for c in CASES if c[0] == row)
        try:
            code, _, _ = run_cli(capsys, *[str(a) for a in build(w)])
        except SystemExit as stop:
            code = stop.code
        assert code == 2
    assert fired[:1] == [rule_id]


@pytest.mark.parametrize("case", CASES, ids=[c[0] for c in CASES])
def test_refusal(case, w, capsys):
    name, build, code_expected, words = case
    argv = [str(a) for a in build(w)]
    before = sorted(p.name for p in w.iterdir())
    try:
        code, _, err = run_cli(capsys, *argv)
    except SystemExit as stop:  # argparse's own usage errors: exit 2 and one line too
        code, err = stop.code, capsys.readouterr().err
    lines = err.strip().splitlines()
    assert code == (2 if code_expected is None else code_expected) and len(lines) == 1, err
    for word in words:
        assert word in lines[0], lines[0]
    assert sorted(p.name for p in w.iterdir()) == before  # nothing written, nothing left behind


def test_an_npz_that_would_not_fit_is_refused_from_its_headers(w, monkeypatch, capsys):
    from factorize_weights import data

    loaded = []
    monkeypatch.setattr(data, "_available_memory", lambda: 1000)  # bytes: the file holds 40 x 20 float32
    monkeypatch.setattr(data.np, "load", lambda *a, **k: loaded.append(a) or pytest.fail("inflated"))
    code, _, err = run_cli(capsys, *[str(a) for a in compress(w, "--heldout", w / "held.npz")])
    lines = err.strip().splitlines()
    assert code == 2 and len(lines) == 1 and "held.npz" in lines[0] and "once inflated" in lines[0]
    assert loaded == []


def test_the_suite_is_broad():
    assert len(CASES) >= 60
    assert os.path.basename(__file__) == "test_refusals.py"
