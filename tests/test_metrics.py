"""Metrics against scikit-learn and SciPy."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.distance import cosine as scipy_cosine_distance
from sklearn.metrics import mean_squared_error, top_k_accuracy_score

from factorize_weights.errors import InputError
from factorize_weights.metrics import MetricAccumulator, check_metric, default_metric, row_cosine


def _stream(name, a, b, labels, batch=7):
    acc = MetricAccumulator(name)
    for i in range(0, len(a), batch):
        acc.update(a[i : i + batch], b[i : i + batch], None if labels is None else labels[i : i + batch])
    return acc.result()


def test_topk_matches_sklearn(rng):
    logits_a = rng.standard_normal((101, 10))
    logits_b = logits_a + 0.8 * rng.standard_normal((101, 10))
    labels = rng.integers(0, 10, 101)
    for name, k in (("top1", 1), ("top5", 5)):
        r = _stream(name, logits_a, logits_b, labels)
        # oracle: sklearn.metrics.top_k_accuracy_score, in percent
        assert r.before == pytest.approx(100 * top_k_accuracy_score(labels, logits_a, k=k, labels=range(10)))
        assert r.after == pytest.approx(100 * top_k_accuracy_score(labels, logits_b, k=k, labels=range(10)))
        assert r.delta == pytest.approx(r.after - r.before) and r.samples == 101


def test_mse_matches_sklearn(rng):
    y = rng.standard_normal((50, 3))
    a, b = y + 0.1 * rng.standard_normal(y.shape), y + 0.3 * rng.standard_normal(y.shape)
    r = _stream("mse", a, b, y)
    assert r.before == pytest.approx(mean_squared_error(y, a))
    assert r.after == pytest.approx(mean_squared_error(y, b))
    assert not r.higher_is_better


def test_cosine_matches_scipy_and_agreement(rng):
    a = rng.standard_normal((40, 16))
    b = a + rng.standard_normal((40, 16))
    expected = np.mean([1 - scipy_cosine_distance(x, y) for x, y in zip(a, b)])  # scipy: 1 - cos
    r = _stream("cosine", a, b, None)
    assert (r.before, r.after) == (1.0, pytest.approx(expected))
    agree = _stream("agreement", a, b, None)
    assert agree.after == pytest.approx(100 * np.mean(a.argmax(1) == b.argmax(1))) and agree.before == 100
    assert row_cosine(np.zeros((1, 3)), np.zeros((1, 3)))[0] == 1.0


def test_default_and_refused_metrics():
    logits = np.zeros((4, 10))
    assert default_metric(np.array([1, 2, 3, 4]), logits) == "top1"
    assert default_metric(None, logits) == "cosine"
    assert default_metric(np.zeros((4, 10)), logits) == "mse"
    with pytest.raises(InputError, match="has no 'labels' array"):
        check_metric("top1", None, logits)
    with pytest.raises(InputError, match=r"labels range over \[0, 12\] but the model has 10 classes"):
        check_metric("top1", np.array([0, 12, 1, 1]), logits)
    with pytest.raises(InputError, match="only 3 outputs"):
        check_metric("top5", np.array([0, 1, 2, 1]), np.zeros((4, 3)))
