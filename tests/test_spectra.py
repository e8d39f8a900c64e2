"""Spectra, factors and randomized SVD against outside references (numpy, scikit-learn, theorems)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sklearn.utils.extmath import randomized_svd as sk_randomized_svd

from conftest import planted
from factorize_weights.factors import svd_factors
from factorize_weights.records import break_even_rank, max_saving_rank
from factorize_weights.spectra import compute_spectrum, randomized_svd


@pytest.mark.parametrize("k", [1, 5, 17, 39])
def test_eckart_young_mirsky_errors(k):
    # Eckart & Young (1936), Mirsky (1960): the rank-k truncated SVD has Frobenius error
    # sqrt(sum_{i>k} s_i^2) and spectral error s_{k+1}. Singular values from numpy.linalg.svd.
    a = planted(60, 40, np.geomspace(10.0, 0.01, 40), seed=k)
    s = np.linalg.svd(a, compute_uv=False)
    fa, fx = svd_factors(a, k)
    resid = a - fa @ fx
    assert np.linalg.norm(resid, "fro") == pytest.approx(np.sqrt(np.sum(s[k:] ** 2)), rel=1e-9)
    assert np.linalg.norm(resid, 2) == pytest.approx(s[k], rel=1e-9)


def test_split_does_not_change_the_product_and_balances_scales():
    a = planted(30, 20, np.linspace(5, 1, 20), seed=1)
    ba, bx = svd_factors(a, 7, split="balanced")
    la, lx = svd_factors(a, 7, split="left")
    np.testing.assert_allclose(ba @ bx, la @ lx, atol=1e-12)
    # balanced: both factors carry sqrt(S), so their column/row norms agree (common practice)
    np.testing.assert_allclose(np.linalg.norm(ba, axis=0), np.linalg.norm(bx, axis=1), rtol=1e-12)
    # left: X has orthonormal rows
    np.testing.assert_allclose(lx @ lx.T, np.eye(7), atol=1e-12)


def test_spectrum_matches_numpy_and_exact_energy():
    a = planted(50, 30, np.linspace(3, 0.5, 30), seed=2)
    sp = compute_spectrum("x", a)
    np.testing.assert_allclose(sp.singular_values, np.linalg.svd(a, compute_uv=False), rtol=1e-12)
    assert sp.total_energy == pytest.approx(np.linalg.norm(a, "fro") ** 2, rel=1e-12)
    k = 11
    fa, fx = svd_factors(a, k)
    # the relative error the spectrum predicts is the one the factors actually have
    assert sp.relative_error(k) == pytest.approx(
        np.linalg.norm(a - fa @ fx, "fro") / np.linalg.norm(a, "fro"), rel=1e-9
    )
    assert sp.energy_fraction(30) == pytest.approx(1.0)


def test_float32_input_is_accumulated_in_float64():
    a = planted(40, 40, np.geomspace(1, 1e-4, 40), seed=3).astype(np.float32)
    sp = compute_spectrum("x", a)
    assert sp.singular_values.dtype == np.float64
    # oracle: numpy's SVD of the same float32 values promoted to float64
    np.testing.assert_allclose(sp.singular_values, np.linalg.svd(a.astype(np.float64), compute_uv=False), rtol=1e-10)


def test_nan_weight_is_refused_by_name():
    a = np.ones((4, 4))
    a[1, 2] = np.nan
    with pytest.raises(ValueError, match=r"layer 'enc.fc': weight has 1 NaN or Inf"):
        compute_spectrum("enc.fc", a)


def _slow_decay_matrix():
    # the reference case in shared/REFERENCES.md: 1000 x 800, s_j = (1 + j)^(-1/2)
    s = (1.0 + np.arange(800)) ** -0.5
    return planted(1000, 800, s, seed=0), s


@pytest.mark.parametrize("q, ratio_cap", [(0, 1.25), (1, 1.05), (2, 1.02)])
def test_randomized_svd_error_ratio(q, ratio_cap):
    # Halko, Martinsson & Tropp (2011): with p = 10 oversampling, q power iterations, the error is
    # within a small factor of the optimal tail. Measured on this matrix (REFERENCES.md): 1.181 (q=0),
    # 1.015 (q=1), 1.004 (q=2). Caps leave room for seed-to-seed variation; the expected-error bound
    # (from memory) sqrt(1 + k/(p-1)) = 2.08 for k = 30 is far looser.
    a, s = _slow_decay_matrix()
    k = 30
    u, sv, vt = randomized_svd(a, k, oversampling=10, power_iterations=q, seed=0)
    optimal = np.sqrt(np.sum(s[k:] ** 2))
    ratio = np.linalg.norm(a - (u * sv) @ vt, "fro") / optimal
    assert 1.0 - 1e-9 <= ratio <= ratio_cap
    assert ratio <= np.sqrt(1 + k / (10 - 1))
    # scikit-learn's reference implementation with the same p and q lands in the same place
    su, ss, svt = sk_randomized_svd(a, k, n_oversamples=10, n_iter=q, random_state=0)
    sk_ratio = np.linalg.norm(a - (su * ss) @ svt, "fro") / optimal
    assert ratio == pytest.approx(sk_ratio, rel=0.05)


def test_randomized_top_values_match_exact_and_sklearn():
    # a fast-decaying spectrum (s_j = 100 * 0.7^j): with q = 2 the top values come back to ~1e-6
    s = 100 * 0.7 ** np.arange(300)
    a = planted(400, 300, s, seed=4)
    _, sv, _ = randomized_svd(a, 20, seed=1)
    np.testing.assert_allclose(sv, np.linalg.svd(a, compute_uv=False)[:20], rtol=1e-6)
    _, ss, _ = sk_randomized_svd(a, 20, n_oversamples=10, n_iter=2, random_state=1)
    # scikit-learn renormalizes its power iterations with LU (not QR) by default, which loses a
    # little on the smallest of the 20 values (measured: 1.1e-3 relative at index 19)
    np.testing.assert_allclose(sv, ss, rtol=5e-3)
    np.testing.assert_allclose(sv[:10], ss[:10], rtol=1e-6)


def test_randomized_svd_repeats_with_seed_and_fixes_signs():
    a = planted(120, 90, np.geomspace(5, 0.1, 90), seed=5)
    u1, s1, v1 = randomized_svd(a, 10, seed=7)
    u2, s2, v2 = randomized_svd(a, 10, seed=7)
    assert np.array_equal(u1, u2) and np.array_equal(s1, s2) and np.array_equal(v1, v2)
    # fixed signs: the largest-magnitude entry of each left vector is positive
    assert np.all(u1[np.argmax(np.abs(u1), axis=0), np.arange(10)] > 0)


def test_randomized_spectrum_keeps_exact_total_energy():
    a = planted(300, 200, np.geomspace(10, 0.01, 200), seed=6)
    sp = compute_spectrum("x", a, svd="randomized")
    assert sp.method == "randomized" and len(sp.singular_values) == max_saving_rank(300, 200)
    assert sp.total_energy == pytest.approx(np.sum(a**2), rel=1e-12)
    exact = compute_spectrum("x", a, svd="exact")
    np.testing.assert_allclose(sp.relative_error(40), exact.relative_error(40), rtol=1e-6)


@settings(max_examples=200, deadline=None)
@given(st.integers(1, 5000), st.integers(1, 5000))
def test_break_even_rank_is_where_saving_stops(m, n):
    # derivable: rank k costs k*(m+n) against m*n, so it saves iff k < m*n/(m+n)
    be = break_even_rank(m, n)
    assert be == (m * n) // (m + n)
    if be >= 1:
        assert (be - 1) * (m + n) < m * n  # the largest rank we allow saves
    assert (be + 1) * (m + n) > m * n  # one above break-even never saves
    assert max_saving_rank(m, n) == max(be - 1, 0)


@pytest.mark.parametrize("shape", [(60, 40), (40, 60), (50, 50)])
def test_gram_svd_matches_lapack_svd_and_eckart_young(shape):
    # numpy's LAPACK SVD as the oracle for the values; Eckart-Young (1936) for the truncations:
    # ||A - A_k||_F = sqrt(sum_{i>k} s_i^2) with A_k = U_k S_k V_k^T
    from factorize_weights.spectra import gram_svd

    m, n = shape
    values = np.geomspace(10, 1e-6, min(m, n))  # a condition number of 1e7
    a = planted(m, n, values, seed=5)
    u, s, vt = gram_svd(a)
    assert u.shape == (m, min(m, n)) and s.shape == (min(m, n),) and vt.shape == (min(m, n), n)
    ref = np.linalg.svd(a, compute_uv=False)
    np.testing.assert_allclose(s[: min(m, n) // 2], ref[: min(m, n) // 2], rtol=1e-9)
    for k in (1, 7, min(m, n) // 2):
        err = np.linalg.norm(a - (u[:, :k] * s[:k]) @ vt[:k])
        assert err == pytest.approx(np.sqrt(np.sum(values[k:] ** 2)), rel=1e-9)


def test_rank_deficient_matrices_give_finite_exact_factors_at_any_kept_rank():
    # a rank-3 matrix factorized past its rank: Eckart-Young says the error is 0 from rank 3 on, and
    # no factor may hold Inf or NaN (float32 storage of rounding noise divided by ~0 once did)
    from factorize_weights.methods import PlainSvd

    a = planted(64, 48, [5.0, 2.0, 1.0], seed=4)
    dec = PlainSvd("exact").decompose("w", a, dtype="float32")
    for k in (1, 3, 10, len(dec.values)):
        fa, fx = dec.factors(k)
        assert np.all(np.isfinite(fa)) and np.all(np.isfinite(fx))
        expected = 0.0 if k >= 3 else np.sqrt(np.sum(np.array([5.0, 2.0, 1.0])[k:] ** 2))
        assert np.linalg.norm(a - fa @ fx) == pytest.approx(expected, abs=1e-5 * np.linalg.norm(a))
