"""Calibration statistics planned from the shapes before any pass: a layer too wide for its n x n
input Gram keeps the m x m output moment W G W^T instead.

Oracles: the whitened truncation [W S]_k S^-1 with S the Cholesky factor of G + a mu I, formed
with numpy (Wang et al. 2024, arXiv 2403.07378, the theorem test_calibration.py checks), and the
identity (W S)(W S)^T = W G W^T (Zhang et al., TPAMI 2016: the response-side projection equals it
when G is non-singular)."""

from __future__ import annotations

import json
import tracemalloc

import numpy as np
import pytest

from factorize_weights.calibrate import StatisticsPlan
from factorize_weights.methods import Whitened
from factorize_weights.records import LayerRecord
from factorize_weights.stats import Moments, OutputMoments, ridge

RNG = np.random.default_rng(11)


def _rows(n: int, count: int) -> np.ndarray:
    mix = RNG.standard_normal((n, n)) * np.geomspace(3, 0.05, n)
    return RNG.standard_normal((count, n)) @ mix.T


@pytest.mark.parametrize("alpha", [0.0, 0.01])
def test_output_side_factors_equal_the_input_side_and_the_cholesky_route(alpha):
    w = RNG.standard_normal((12, 40))
    x = _rows(40, 500)
    g = Moments(40)
    out = OutputMoments(w)
    for block in np.array_split(x, 7):  # streamed in blocks, as a calibration pass does
        g.add(block)
        out.add(block)
    method = Whitened(alpha)
    inside = method.decompose("w", w, moments=g.gram, dtype="float64")
    outside = method.decompose("w", w, moments=out, dtype="float64")
    assert outside.extra["whitening"]["method"] == "output-moment"
    s = np.linalg.cholesky(ridge(x.T @ x, alpha))  # numpy: S S^T = G + a mu I
    u, sig, vt = np.linalg.svd(w @ s, full_matrices=False)
    np.testing.assert_allclose(outside.spectrum.singular_values, sig, rtol=1e-7)
    for k in (1, 4, len(outside.values)):
        a, f = outside.factors(k)
        ia, jf = inside.factors(k)
        oracle = (u[:, :k] * sig[:k]) @ np.linalg.solve(s.T, vt[:k].T).T  # [W S]_k S^-1
        np.testing.assert_allclose(a @ f, oracle, rtol=1e-6, atol=1e-9)
        np.testing.assert_allclose(a @ f, ia @ jf, rtol=1e-6, atol=1e-9)


def _record(name, m, n):
    return LayerRecord(name, "linear", (m, n), (m, n), False, "float32", {}, None, None)


def test_the_plan_switches_the_widest_layers_first_and_drops_only_what_cannot_fit():
    records = [_record("narrow", 64, 64), _record("wide", 16, 4096), _record("square", 2048, 2048)]
    roomy = StatisticsPlan.make(records, 1 << 40)
    # 4096 inputs for 16 outputs: its input Gram (8 x 4096^2 bytes, 4096^2 flops per row) is over
    # WIDE_RATIO times its output moment, so it keeps the output side whatever the budget
    assert roomy.sides == {"narrow": "input", "wide": "output", "square": "input"} and roomy.dropped == {}
    bert = [_record("ffn-down", 768, 3072), _record("proj", 160, 960)]  # n = 4 m, n = 6 m: input side
    assert StatisticsPlan.make(bert, 1 << 40).sides == {"ffn-down": "input", "proj": "input"}
    wide_output = 8 * 16**2 + 4 * 16 * 4096  # W G W^T in float64 and the float32 copy of W it multiplies by
    tight = StatisticsPlan.make(records, 8 * (64**2 + 2048**2) + wide_output)
    assert tight.sides == {"narrow": "input", "wide": "output", "square": "input"}
    assert tight.bytes(records) <= tight.budget
    tiny = StatisticsPlan.make(records, 8 * 64**2 + wide_output)
    assert tiny.dropped == {"square": 8 * 2048**2} and tiny.sides == {"narrow": "input", "wide": "output"}


WIDE = '''
import torch
from torch import nn


def build():
    torch.manual_seed(0)
    # the unfolded input of the first convolution is 1024 x 64 = 65,536 wide: its input Gram
    # matrix alone would be 32 GiB in float64
    return nn.Sequential(nn.Conv1d(1024, 16, 64), nn.ReLU(), nn.Flatten(), nn.Linear(16 * 17, 10))
'''


def test_a_65536_wide_convolution_calibrates_in_bounded_memory(tmp_path, capsys):
    from factorize_weights.cli import main

    (tmp_path / "wide.py").write_text(WIDE)
    np.savez(tmp_path / "cal.npz", inputs=RNG.standard_normal((24, 1024, 80)).astype(np.float32))
    np.savez(tmp_path / "held.npz", inputs=RNG.standard_normal((16, 1024, 80)).astype(np.float32))
    tracemalloc.start()
    try:
        code = main(["compress", "--model", f"{tmp_path}/wide.py:build", "--factory-weights", "--budget", "params=0.8",
                     "--calibration", str(tmp_path / "cal.npz"), "--heldout", str(tmp_path / "held.npz"),
                     "--stats-memory", "1", "-q", "--latency-repeats", "0", "--json"])
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    out, err = capsys.readouterr()
    assert code == 0, err
    cal = json.loads(out)["calibration"]
    # both layers are far wider than tall (65,536 and 272 inputs for 16 and 10 outputs): output side
    assert cal["output_side"] == ["0", "3"] and cal["not_calibrated"] == {}
    assert cal["memory_budget_bytes"] == 2**30 and cal["gram_bytes"] == 8 * (16**2 + 10**2)
    assert peak < 2**30  # numpy's allocations, traced: far below the 32 GiB input Gram


def test_a_layer_too_wide_for_any_statistic_keeps_plain_factors_with_a_warning(tmp_path, capsys):
    from factorize_weights.cli import main

    (tmp_path / "wide.py").write_text(WIDE)
    np.savez(tmp_path / "cal.npz", inputs=RNG.standard_normal((8, 1024, 80)).astype(np.float32))
    code = main(["compress", "--model", f"{tmp_path}/wide.py:build", "--factory-weights", "--budget", "params=0.8",
                 "--calibration", str(tmp_path / "cal.npz"), "--stats-memory", "0.00002", "-q", "--json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    report = json.loads(out)
    # 21,474 bytes: the classifier fits on its output side (10 x 10 in float64 and its 10 x 272
    # weight in float32: 11,680 bytes), the convolution (16 x 16 and 16 x 65,536: 4.2 MB) does not
    assert report["calibration"]["not_calibrated"] == {"0": 8 * 16**2 + 4 * 16 * 65536}
    assert report["calibration"]["output_side"] == ["3"]
    assert next(r for r in report["layers"] if r["name"] == "0")["method"] in ("svd", "dense")
    assert any("--stats-memory" in w for w in report["calibration"]["warnings"])
