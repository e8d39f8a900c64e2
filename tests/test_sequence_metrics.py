"""Classification metrics per position on sequence outputs (N, T, classes): a recognizer's
characters, a token classifier, a language model. Oracle: the same counts computed directly with
numpy (argmax and argsort over the class axis, masks applied by boolean indexing)."""

from __future__ import annotations

import numpy as np
import pytest

from factorize_weights.metrics import MetricAccumulator, check_metric, default_metric
from factorize_weights.errors import InputError

RNG = np.random.default_rng(3)


def _batch(n=6, t=9, c=7):
    a = RNG.standard_normal((n, t, c))
    b = a + 0.8 * RNG.standard_normal((n, t, c))
    labels = RNG.integers(0, c, (n, t))
    labels[:, -2:] = -100  # padding positions carry the ignore index
    mask = np.ones((n, t), dtype=np.int64)
    mask[::2, -3:] = 0
    return a, b, labels, mask


@pytest.mark.parametrize("name,k", [("top1", 1), ("top5", 5)])
def test_topk_per_position_honours_the_mask_and_ignored_labels(name, k):
    a, b, labels, mask = _batch()
    acc = MetricAccumulator(name)
    acc.update(a[:3], b[:3], labels[:3], mask[:3])
    acc.update(a[3:], b[3:], labels[3:], mask[3:])
    result = acc.result()
    keep = (mask != 0) & (labels >= 0)

    def direct(x):  # numpy: is the label among the k largest logits, at every kept position
        top = np.argsort(-x[keep], axis=1, kind="stable")[:, :k]
        return 100.0 * np.mean(np.any(top == labels[keep][:, None], axis=1))

    assert result.samples == int(keep.sum()) and result.per_position["positions"] == int(keep.sum())
    assert result.before == pytest.approx(direct(a)) and result.after == pytest.approx(direct(b))
    assert result.per_position["masked_by"] == ["attention_mask", "labels < 0"]


def test_agreement_per_position_counts_unmasked_positions():
    a, b, labels, mask = _batch()
    acc = MetricAccumulator("agreement")
    acc.update(a, b, None, mask)
    keep = mask != 0
    want = 100.0 * np.mean(np.argmax(a[keep], -1) == np.argmax(b[keep], -1))
    assert acc.result().after == pytest.approx(want) and acc.result().samples == int(keep.sum())


def test_sequence_labels_choose_top1_and_bad_shapes_are_refused():
    a, _, labels, _ = _batch()
    assert default_metric(labels, a) == "top1"
    check_metric("top1", labels, a)
    with pytest.raises(InputError, match=r"\(N, 9\)"):
        check_metric("top1", labels[:, :4], a)
    with pytest.raises(InputError, match="classes"):
        check_metric("top1", np.where(labels >= 0, labels + 7, labels), a)


def test_a_flat_classifier_is_counted_per_sample_as_before():
    a = RNG.standard_normal((10, 4))
    labels = RNG.integers(0, 4, 10)
    acc = MetricAccumulator("top1")
    acc.update(a, a, labels)
    result = acc.result()
    assert result.per_position is None and result.samples == 10
    assert result.before == pytest.approx(100.0 * np.mean(np.argmax(a, 1) == labels))


TAGGER = '''
import torch
from torch import nn


class Tagger(nn.Module):
    def __init__(self):
        super().__init__()
        torch.manual_seed(0)
        self.embed = nn.Embedding(50, 64)
        self.hidden = nn.Linear(64, 128)
        self.head = nn.Linear(128, 12)

    def forward(self, input_ids, attention_mask):
        h = torch.relu(self.hidden(self.embed(input_ids)))
        return self.head(h) * attention_mask[..., None]


def build():
    return Tagger()
'''


def test_compress_reports_a_token_classifier_per_position(tmp_path, capsys):
    import json

    from factorize_weights.cli import main

    (tmp_path / "tagger.py").write_text(TAGGER)
    ids = RNG.integers(0, 50, (40, 11))
    mask = np.ones((40, 11), dtype=np.int64)
    mask[:, 8:] = 0
    labels = RNG.integers(0, 12, (40, 11))
    labels[mask == 0] = -100
    np.savez(tmp_path / "held.npz", input_ids=ids, attention_mask=mask, labels=labels)
    code = main(["compress", "--model", f"{tmp_path}/tagger.py:build", "--factory-weights", "--budget", "params=0.5",
                 "--heldout", str(tmp_path / "held.npz"), "--metric", "agreement", "-q", "--latency-repeats", "0",
                 "--json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    metric = json.loads(out)["metric"]
    assert metric["per_position"] == {"positions": 40 * 8, "masked_by": ["attention_mask"]}
    assert metric["samples"] == 40 * 8
