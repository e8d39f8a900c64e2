"""Held-out metrics, accumulated batch by batch so memory does not grow with the set.

=========== ======================================================= =========== ==========
name        what                                                    needs       unit
=========== ======================================================= =========== ==========
top1, top5  share of samples whose label is among the k top logits  int labels  percent
mse         mean squared error against float targets               labels      target^2
cosine      mean cosine similarity to the original model's outputs  —           [-1, 1]
agreement   share of samples whose argmax equals the original's     —           percent
=========== ======================================================= =========== ==========

``before`` is the original model's value (1.0 for cosine and 100 for agreement by definition);
``after`` the factorized model's; ``delta = after - before``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import InputError

METRICS = ("top1", "top5", "mse", "cosine", "agreement")
#: The facts every output reads about a metric, in one place: whether higher is better, and the
#: units of a value and of a drop (percent metrics drop in percentage points)
HIGHER_IS_BETTER = {"top1": True, "top5": True, "mse": False, "cosine": True, "agreement": True}
PERCENT = ("top1", "top5", "agreement")  # values in percent, drops in percentage points
DROP_UNITS = {"top1": "percentage points", "top5": "percentage points", "agreement": "percentage points",
              "cosine": "cosine (absolute)", "mse": "mse (absolute increase)"}


def default_metric(labels: np.ndarray | None, outputs: np.ndarray) -> str:
    """top1 for class labels with logits, mse for float targets, cosine when unlabelled."""
    if labels is None:
        return "cosine"
    if labels.dtype.kind in "iub" and outputs.ndim == 2 and labels.ndim == 1:
        return "top1"
    return "mse"


def check_metric(name: str, labels: np.ndarray | None, outputs: np.ndarray) -> None:
    """Refuse a metric the data cannot support, naming what is missing."""
    if name not in METRICS:
        raise InputError(f"--metric {name!r}: expected one of {', '.join(METRICS)}")
    if name in ("top1", "top5", "mse") and labels is None:
        raise InputError(f"--metric {name}: the held-out set has no 'labels' array")
    if name in ("top1", "top5"):
        if labels.ndim != 1 or labels.dtype.kind not in "iub":
            raise InputError(f"--metric {name}: 'labels' must be integer class ids of shape (N,); "
                             f"got {labels.dtype} {labels.shape}")
        if outputs.ndim != 2:
            raise InputError(f"--metric {name}: the model output must be (N, classes); got shape {outputs.shape}")
        k = 5 if name == "top5" else 1
        if outputs.shape[1] < k:
            raise InputError(f"--metric {name}: the model has only {outputs.shape[1]} outputs")
        if labels.min() < 0 or labels.max() >= outputs.shape[1]:
            raise InputError(
                f"--metric {name}: labels range over [{labels.min()}, {labels.max()}] but the model has "
                f"{outputs.shape[1]} classes"
            )
    if name == "mse" and labels.shape[1:] != outputs.shape[1:]:
        raise InputError(f"--metric mse: labels of shape {labels.shape[1:]} per sample do not match outputs {outputs.shape[1:]}")
    if name == "agreement" and outputs.ndim != 2:
        raise InputError(f"--metric agreement: the model output must be (N, classes); got shape {outputs.shape}")


def topk_correct(logits: np.ndarray, labels: np.ndarray, k: int) -> int:
    """Number of rows whose label is among the ``k`` largest logits (ties broken by index)."""
    top = np.argsort(-logits, axis=1, kind="stable")[:, :k]
    return int(np.sum(np.any(top == labels[:, None], axis=1)))


def row_cosine(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Cosine similarity of corresponding rows (flattened per sample); 1.0 where both are zero."""
    a = a.reshape(a.shape[0], -1)
    b = b.reshape(b.shape[0], -1)
    na = np.linalg.norm(a, axis=1)
    nb = np.linalg.norm(b, axis=1)
    dot = np.sum(a * b, axis=1)
    out = np.ones(a.shape[0])
    both = (na > 0) & (nb > 0)
    out[both] = dot[both] / (na[both] * nb[both])
    out[(na > 0) != (nb > 0)] = 0.0
    return out


@dataclass
class MetricResult:
    name: str
    before: float
    after: float
    samples: int
    per_class: list | None = None  # top1/top5 with class labels: [{"class", "samples", "before", "after"}]

    @property
    def delta(self) -> float:
        return self.after - self.before

    @property
    def higher_is_better(self) -> bool:
        return HIGHER_IS_BETTER[self.name]

    def to_dict(self) -> dict:
        out = {
            "name": self.name,
            "before": self.before,
            "after": self.after,
            "delta": self.delta,
            "higher_is_better": self.higher_is_better,
            "samples": self.samples,
        }
        if self.per_class is not None:
            out["per_class"] = self.per_class
        return out


class MetricAccumulator:
    """Streams batches of (original outputs, factorized outputs, labels) into one metric."""

    def __init__(self, name: str):
        if name not in METRICS:
            raise InputError(f"--metric {name!r}: expected one of {', '.join(METRICS)}")
        self.name = name
        self.n = 0
        self.before = 0.0
        self.after = 0.0
        self.classes: dict[int, list[int]] = {}  # class id -> [samples, correct before, correct after]

    def update(self, original: np.ndarray, factorized: np.ndarray, labels: np.ndarray | None) -> None:
        self.n += original.shape[0]
        if self.name in ("top1", "top5"):
            k = 1 if self.name == "top1" else 5
            self.before += topk_correct(original, labels, k)
            self.after += topk_correct(factorized, labels, k)
            for c in np.unique(labels):  # per class: the cautions ask users to check classes, not averages
                rows = labels == c
                acc = self.classes.setdefault(int(c), [0, 0, 0])
                acc[0] += int(np.sum(rows))
                acc[1] += topk_correct(original[rows], labels[rows], k)
                acc[2] += topk_correct(factorized[rows], labels[rows], k)
        elif self.name == "mse":
            self.before += float(np.sum((original - labels) ** 2)) / max(np.prod(original.shape[1:]), 1)
            self.after += float(np.sum((factorized - labels) ** 2)) / max(np.prod(original.shape[1:]), 1)
        elif self.name == "cosine":
            self.before += original.shape[0]
            self.after += float(np.sum(row_cosine(original, factorized)))
        else:  # agreement
            self.before += original.shape[0]
            self.after += int(np.sum(np.argmax(original, 1) == np.argmax(factorized, 1)))

    def result(self) -> MetricResult:
        scale = 100.0 if self.name in PERCENT else 1.0
        n = max(self.n, 1)
        per_class = None
        if self.classes:
            per_class = [{"class": c, "samples": s, "before": 100.0 * b / s, "after": 100.0 * a / s}
                         for c, (s, b, a) in sorted(self.classes.items())]
        return MetricResult(self.name, scale * self.before / n, scale * self.after / n, self.n, per_class)
