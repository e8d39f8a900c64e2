"""Calibrated factorization against theorems and reference libraries (SciPy's interpolative
decomposition), and the calibration CLI's refusals."""

from __future__ import annotations

import json

import numpy as np
import pytest
import scipy.linalg.interpolative as sli
import torch
from torch import nn

import factorize_weights as fw
from conftest import assert_float32_products_close, planted
from factorize_weights import demo
from factorize_weights.backends import onnx_backend as ob
from factorize_weights.backends import torch_backend as tb
from factorize_weights.calibrate import input_moments
from factorize_weights.cli import main
from factorize_weights.columns import column_factors, pivoted_qr_columns
from factorize_weights.factors import svd_factors
from factorize_weights.methods import Whitened
from factorize_weights.whiten import whitening


def whitened_factors(w, wh, k, split="balanced"):
    """The product route every calibrated run takes: SVD of W S, factors U_k S_k (V_k^T S^-1)."""
    return Whitened.decompose_whitened("w", w, wh, dtype="float64").factors(k, split)


def correlated_inputs(n, samples, seed=0):
    """Calibration inputs as columns (n x N) with a strongly non-white covariance."""
    rng = np.random.default_rng(seed)
    mix = rng.standard_normal((n, n)) * np.geomspace(3, 0.05, n)
    return mix @ rng.standard_normal((n, samples))


@pytest.mark.parametrize("k", [1, 4, 10, 16])  # up to the largest rank that saves for 30 x 40 (16)
def test_whitened_output_error_is_the_dropped_tail_and_beats_plain_svd(k):
    # Wang et al. 2024 (arXiv 2403.07378): ||(W - W') X||_F = sqrt(sum_{i>k} sigma_i(W S)^2) with
    # S S^T = X X^T, which by Eckart-Young on W S is the least possible; so it is <= plain SVD's
    w = np.random.default_rng(k).standard_normal((30, 40))
    x = correlated_inputs(40, 500)
    wh = whitening(x @ x.T)
    assert wh.method == "cholesky" and wh.floor == 0.0
    a, f = whitened_factors(w, wh, k)
    loss = np.linalg.norm((w - a @ f) @ x)
    sigma = np.linalg.svd(w @ wh.s, compute_uv=False)  # numpy as the reference SVD
    assert loss == pytest.approx(np.sqrt(np.sum(sigma[k:] ** 2)), rel=1e-8)
    pa, px = svd_factors(w, k)
    assert loss <= np.linalg.norm((w - pa @ px) @ x) * (1 + 1e-12)
    spec = Whitened.decompose_whitened("w", w, wh, dtype="float64").spectrum
    # the allocator's normalized error is the relative output error on the calibration set
    assert spec.relative_error(k) == pytest.approx(loss / np.linalg.norm(w @ x), rel=1e-8)


def test_identity_gram_reproduces_plain_svd_exactly():
    w = planted(20, 30, np.geomspace(4, 0.1, 20), seed=3)
    for split in ("balanced", "left"):
        wa, wx = whitened_factors(w, whitening(np.eye(30)), 6, split=split)
        pa, px = svd_factors(w, 6, split=split)
        np.testing.assert_allclose(wa, pa, atol=1e-12)
        np.testing.assert_allclose(wx, px, atol=1e-12)


def test_singular_gram_with_a_dead_feature_gives_finite_factors_no_worse_than_svd():
    w = np.random.default_rng(1).standard_normal((16, 24))
    x = correlated_inputs(24, 300)
    x[5] = 0.0  # a dead input feature: X X^T is singular
    wh = whitening(x @ x.T)
    assert wh.method == "eigh-damped" and wh.clamped >= 1 and wh.floor > 0
    for k in (2, 5, 8):  # up to the largest rank that saves for 16 x 24 (8)
        a, f = whitened_factors(w, wh, k)
        assert np.all(np.isfinite(a)) and np.all(np.isfinite(f))
        pa, px = svd_factors(w, k)
        assert np.linalg.norm((w - a @ f) @ x) <= np.linalg.norm((w - pa @ px) @ x) * (1 + 1e-6)


def test_columns_match_scipy_interpolative_decomposition():
    # scipy.linalg.interpolative with rand=False is a deterministic pivoted-QR ID: the same columns
    a = planted(60, 45, np.geomspace(10, 0.01, 45), seed=7)
    for k in (3, 8, 20):
        ours = sorted(pivoted_qr_columns(a, k)[0])
        idx, proj = sli.interp_decomp(a.copy(order="F"), k, rand=False)
        assert ours == sorted(idx[:k])
        skeleton = sli.reconstruct_skel_matrix(a, k, idx)
        approx_scipy = sli.reconstruct_matrix_from_id(skeleton, idx, proj)
        fa, fx, _ = column_factors(a, k)
        ours_err = np.linalg.norm(a - fa @ fx)
        # least squares on the same columns is at least as good as the ID's interpolation matrix
        assert ours_err <= np.linalg.norm(a - approx_scipy) * (1 + 1e-9)
        s = np.linalg.svd(a, compute_uv=False)
        assert ours_err >= np.sqrt(np.sum(s[k:] ** 2)) * (1 - 1e-12)  # Eckart-Young: never beats the SVD
        # strong-ID bound (Cheng, Gimbutas, Martinsson, Rokhlin 2005, from memory):
        # ||A - A_J T||_2 <= sqrt(1 + k(n-k)) s_{k+1}; plain pivoted QR only approximates a strong ID,
        # so we allow a factor 2 on top
        assert np.linalg.norm(a - fa @ fx, 2) <= 2 * np.sqrt(1 + k * (45 - k)) * s[k]


def _gram_reference_conv2d(module, x):
    """Oracle: explicit loops over output positions, patches ordered like weight.reshape(out, -1)."""
    xp = torch.nn.functional.pad(x, module._reversed_padding_repeated_twice).double().numpy()
    kh, kw = module.kernel_size
    sh, sw = module.stride
    dh, dw = module.dilation
    n, c, h, w = xp.shape
    rows = []
    for i in range(0, h - (kh - 1) * dh, sh):
        for j in range(0, w - (kw - 1) * dw, sw):
            rows.append(xp[:, :, i : i + (kh - 1) * dh + 1 : dh, j : j + (kw - 1) * dw + 1 : dw].reshape(n, -1))
    r = np.concatenate(rows)
    return r.T @ r, r.shape[0]


def test_torch_gram_of_a_convolution_matches_explicit_patches():
    torch.manual_seed(0)
    conv = nn.Conv2d(3, 8, (3, 2), stride=(2, 1), padding=(1, 2), dilation=(1, 2))
    model = nn.Sequential(conv)
    x = torch.randn(5, 3, 9, 8)
    rec = tb.discover(model)[0]
    stats, _ = input_moments(tb, model, [rec], [x.numpy()])
    expected, rows = _gram_reference_conv2d(conv, x)
    assert stats["0"].rows == rows
    assert_float32_products_close(stats["0"].gram, expected, rows)  # float32 rows, float64 sums (stats.py)


def test_onnx_gram_matches_torch_gram_on_the_demo():
    cal = fw.load_heldout(demo.CALIBRATION)
    model = fw.build_model(demo.MODEL_SPEC, demo.WEIGHTS)
    t_recs = fw.selected(tb.discover(model))
    onnx_model = ob.load(demo.ONNX)
    o_recs = fw.selected(ob.discover(onnx_model))
    t, _ = input_moments(tb, model, t_recs, [cal.inputs])
    o, _ = input_moments(ob, onnx_model, o_recs, [cal.inputs])
    for tr, orr in zip(t_recs, o_recs):
        assert t[tr.name].rows == o[orr.name].rows
        np.testing.assert_allclose(o[orr.name].gram, t[tr.name].gram, rtol=1e-4,
                                   atol=1e-5 * np.abs(t[tr.name].gram).max())


def test_demo_whitened_beats_plain_svd_at_a_tight_budget(capsys):
    reports = {}
    # both under the same allocation rule (the earlier default), so only the factors differ
    for label, extra in (("svd", ["--method", "svd"]), ("whitened", ["--calibration", str(demo.CALIBRATION)])):
        code = main(["compress", "--demo", "--budget", "params=0.05", "--json", "-q", "--latency-repeats", "0",
                     "--allocation", "error-sum"] + extra)
        out, err = capsys.readouterr()
        assert code == 0, err
        reports[label] = json.loads(out)
    w = reports["whitened"]
    assert w["method"] == "whitened" and w["calibration"]["samples"] == 180
    assert w["calibration"]["sha256"] and w["heldout"]["sha256"] and w["calibration"]["sha256"] != w["heldout"]["sha256"]
    assert w["calibration"]["gram_bytes"] > 0 and w["calibration"]["peak_rss_bytes"] > 0
    assert w["metric"]["after"] > reports["svd"]["metric"]["after"] + 10  # measured: 90.6% vs 38.7%
    assert any("rank-deficient" in text for text in w["calibration"]["warnings"])


def test_sequential_and_recovery_run_and_are_recorded(capsys):
    code = main(["compress", "--demo", "--budget", "params=0.1", "--calibration", str(demo.CALIBRATION),
                 "--sequential", "--recover", "30", "--json", "-q", "--latency-repeats", "0"])
    out, err = capsys.readouterr()
    assert code == 0, err
    report = json.loads(out)
    assert report["sequential"] and all("sequential_fit" in e for e in report["layers"] if e["rank"])
    rec = report["recovery"]
    assert rec["loss"] == "kl" and 1 <= rec["steps_run"] <= 30
    assert rec["validation_loss_after"] <= rec["validation_loss_before"]
    assert report["metric"]["delta"] > -5.0


@pytest.mark.parametrize("argv, message", [
    (["--calibration", str(demo.HELDOUT)], "is the same data as --heldout"),
    (["--method", "whitened"], "--method whitened needs --calibration"),
    (["--sequential"], "--sequential needs --calibration"),
    (["--calibration", str(demo.CALIBRATION), "--sequential", "--method", "columns"], "cannot be combined with --method columns"),
])
def test_calibration_refusals(argv, message, capsys, tmp_path):
    code = main(["compress", "--demo", "--budget", "params=0.3", "--out", str(tmp_path / "o")] + argv)
    err = capsys.readouterr().err
    assert code == 2 and message in err and len(err.strip().splitlines()) == 1, err
    assert not (tmp_path / "o").exists()


def test_overlap_can_be_allowed(capsys):
    code = main(["compress", "--demo", "--budget", "params=0.3", "--calibration", str(demo.HELDOUT),
                 "--allow-overlap", "-q", "--json", "--latency-repeats", "0"])
    assert code == 0 and json.loads(capsys.readouterr().out)["method"] == "whitened"


def test_bad_calibration_files(tmp_path, capsys):
    np.savez(tmp_path / "wrong.npz", inputs=np.zeros((10, 3, 8, 8), np.float32))
    np.savez(tmp_path / "empty.npz", inputs=np.zeros((0, 1, 8, 8), np.float32))
    cases = ((tmp_path / "wrong.npz", "--calibration"), (tmp_path / "wrong.npz", "do not fit the model"),
             (tmp_path / "empty.npz", "'inputs' is empty"))
    for path, message in cases:
        code = main(["compress", "--demo", "--budget", "params=0.3", "--calibration", str(path)])
        err = capsys.readouterr().err
        assert code == 2 and message in err, err


def test_recover_on_onnx_is_refused(capsys):
    code = main(["compress", "--demo", "onnx", "--budget", "params=0.3", "--calibration", str(demo.CALIBRATION),
                 "--recover", "10"])
    err = capsys.readouterr().err
    assert code == 2 and "an ONNX model has no trainable factors" in err


def test_recover_with_nothing_factorized_is_refused(capsys):
    code = main(["compress", "--demo", "--budget", "params=1", "--calibration", str(demo.CALIBRATION),
                 "--recover", "10"])
    err = capsys.readouterr().err
    assert code == 2 and "no factors to fine-tune" in err


def test_onnx_calibrated_and_sequential(capsys):
    code = main(["compress", "--demo", "onnx", "--budget", "params=0.1", "--calibration", str(demo.CALIBRATION),
                 "--sequential", "--json", "-q", "--latency-repeats", "0"])
    out, err = capsys.readouterr()
    assert code == 0, err
    report = json.loads(out)
    assert report["method"] == "whitened" and report["sequential"] and report["metric"]["delta"] > -2.0
