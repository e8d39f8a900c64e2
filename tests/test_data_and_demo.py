"""Held-out loading, the demo's data provenance, FLOP budgets and randomized SVD in the pipeline."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from sklearn.datasets import load_digits
from torch import nn

import factorize_weights as fw
from factorize_weights import demo
from factorize_weights.errors import InputError


def test_demo_splits_are_real_uci_digits_and_disjoint():
    # oracle: the UCI optical digits as scikit-learn ships them (Alpaydin & Kaynak 1998)
    digits = load_digits()
    table = {(digits.images[i] / 16.0).astype(np.float32).tobytes(): int(digits.target[i]) for i in range(len(digits.target))}
    seen = []
    for path in (demo.HELDOUT, demo.CALIBRATION):
        with np.load(path) as d:
            x, y = d["inputs"], d["labels"]
        assert x.shape[1:] == (1, 8, 8) and x.dtype == np.float32
        keys = [row[0].tobytes() for row in x]
        assert all(table.get(k) == int(label) for k, label in zip(keys, y))  # real rows, right labels
        seen.append(set(keys))
    assert len(np.load(demo.HELDOUT)["labels"]) == 540
    assert not seen[0] & seen[1]  # held-out and calibration share no image


def test_npz_errors_name_the_file_and_the_problem(tmp_path):
    (tmp_path / "junk.npz").write_bytes(b"not a zip")
    with pytest.raises(InputError, match=r"junk.npz: not an .npz file \(it is not a zip archive"):
        fw.load_heldout(tmp_path / "junk.npz")
    np.savez(tmp_path / "empty.npz", inputs=np.zeros((0, 3)))
    with pytest.raises(InputError, match="'inputs' is empty"):
        fw.load_heldout(tmp_path / "empty.npz")
    np.savez(tmp_path / "nan.npz", inputs=np.array([[np.nan, 1.0]]))
    with pytest.raises(InputError, match="contains NaN or Inf"):
        fw.load_heldout(tmp_path / "nan.npz")
    with pytest.raises(InputError, match="file does not exist"):
        fw.load_heldout(tmp_path / "absent.npz")
    with pytest.raises(InputError, match="cannot import|No module named"):
        fw.load_heldout("no_such_module_xyz:batches")


def test_import_spec_batches_are_concatenated(tmp_path):
    (tmp_path / "feed.py").write_text(
        "import numpy as np\n"
        "def batches():\n"
        "    for i in range(3):\n"
        "        yield np.full((4, 2), i, np.float32), np.full(4, i)\n"
        "def ragged():\n"
        "    yield np.zeros((2, 2)), None\n"
        "    yield np.zeros((2, 3)), None\n"
    )
    h = fw.load_heldout(f"{tmp_path}/feed.py:batches")
    assert h.inputs.shape == (12, 2) and list(h.labels) == [0] * 4 + [1] * 4 + [2] * 4
    with pytest.raises(InputError, match="do not share a shape"):
        fw.load_heldout(f"{tmp_path}/feed.py:ragged")


def test_flops_budget_counts_positions_of_convolutions():
    # multiply-adds of a conv = out_channels * in_channels * kh * kw * output positions (common
    # practice); of its factor pair = rank * (out + in*kh*kw) * positions
    model = nn.Sequential(nn.Conv2d(8, 64, 3, padding=1), nn.ReLU(), nn.Conv2d(64, 64, 3, stride=2),
                          nn.ReLU(), nn.Flatten(), nn.Linear(64 * 3 * 3, 32)).eval()
    held = fw.HeldOut(np.random.default_rng(0).standard_normal((16, 8, 8, 8)).astype(np.float32), None, "mem")
    result = fw.compress(model, fw.CompressConfig(budget="flops=0.4", quiet=True), heldout=held)
    layers = {e["name"]: e for e in result.report["layers"]}
    assert layers["0"]["flops_before"] == 64 * 72 * 64  # 8x8 output
    assert layers["2"]["flops_before"] == 64 * 576 * 9  # 3x3 output with stride 2
    assert layers["5"]["flops_before"] == 32 * 576
    t = result.report["totals"]
    assert t["flops_after"] <= 0.4 * t["flops_before"] and t["flops_after"] == result.report["budget"]["used"]
    for e in layers.values():
        if e["rank"] is not None:
            m, n = e["matrix_shape"]
            assert e["flops_after"] == e["rank"] * (m + n) * e["flops_before"] // (m * n)


def test_flops_budget_without_heldout_is_refused():
    with pytest.raises(InputError, match="a flops budget needs --heldout"):
        fw.compress(nn.Sequential(nn.Linear(32, 32)), fw.CompressConfig(budget="flops=0.5", quiet=True))


def test_randomized_svd_in_the_pipeline_is_recorded_and_close_to_exact():
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(300, 200), nn.ReLU(), nn.Linear(200, 300)).eval()
    exact = fw.compress(model, fw.CompressConfig(budget="params=0.3", svd="exact", quiet=True))
    rand = fw.compress(model, fw.CompressConfig(budget="params=0.3", svd="randomized", quiet=True))
    assert {e["svd"] for e in rand.report["layers"]} == {"randomized"}
    assert rand.report["svd"]["seed"] == 0 and rand.report["svd"]["power_iterations"] == 2
    for a, b in zip(exact.report["layers"], rand.report["layers"]):
        # random init has a flat spectrum: the hardest case; q = 2 stays within 2% of optimal error
        if a["rank"] is not None and a["rank"] == b["rank"]:
            assert a["weight_error"] <= b["weight_error"] <= 1.02 * a["weight_error"]


def test_train_mode_models_are_evaluated_in_eval_mode_and_left_as_they_were():
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(16, 64), nn.Dropout(0.5), nn.Linear(64, 4)).train()
    held = fw.HeldOut(np.random.default_rng(1).standard_normal((32, 16)).astype(np.float32), None, "mem")
    result = fw.compress(model, fw.CompressConfig(budget="params=1", quiet=True), heldout=held)
    assert model.training and all(m.training for m in model.modules())
    assert result.metric.after == pytest.approx(1.0)  # params=1 keeps every layer dense: identical


def test_model_without_factorizable_layers_is_refused():
    with pytest.raises(InputError, match="nothing to factorize: no linear or convolution layers"):
        fw.compress(nn.Sequential(nn.ReLU()), fw.CompressConfig(budget="params=0.5", quiet=True))
    with pytest.raises(InputError, match=r"nothing to factorize: 1 layer\(s\) found, all skipped"):
        fw.compress(nn.Sequential(nn.Linear(8, 1)), fw.CompressConfig(budget="params=0.5", quiet=True))


def test_config_refuses_bad_values_and_unknown_keys():
    with pytest.raises(InputError, match=r"--rank-step must be an integer in \[1, inf\); got 0"):
        fw.CompressConfig(rank_step=0)
    with pytest.raises(InputError, match="--svd must be one of exact, randomized, auto; got 'fast'"):
        fw.CompressConfig(svd="fast")
    with pytest.raises(InputError, match="unknown configuration key"):
        fw.CompressConfig.from_mapping({"budget": "params=0.5", "rnak": 3})
