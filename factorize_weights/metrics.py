"""Held-out metrics, accumulated batch by batch so memory does not grow with the set.

=========== ======================================================= =========== ==========
name        what                                                    needs       unit
=========== ======================================================= =========== ==========
top1, top5  share of samples whose label is among the k top logits  int labels  percent
mse         mean squared error against float targets               labels      target^2
cosine      mean cosine similarity to the original model's outputs  —           [-1, 1]
agreement   share of samples whose argmax equals the original's     —           percent
            (per position of a sequence: next-token agreement)
perplexity  exp(mean next-token cross-entropy) of a causal          input_ids   perplexity
            language model's logits (N, T, vocabulary)
=========== ======================================================= =========== ==========

``before`` is the original model's value (1.0 for cosine and 100 for agreement by definition);
``after`` the factorized model's; ``delta = after - before``. Perplexity also reports the mean loss
(nats per token) it is the exponential of.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import InputError

METRICS = ("top1", "top5", "mse", "cosine", "agreement", "perplexity")
#: The facts every output reads about a metric, in one place: whether higher is better, and the
#: units of a value and of a drop (percent metrics drop in percentage points)
HIGHER_IS_BETTER = {"top1": True, "top5": True, "mse": False, "cosine": True, "agreement": True,
                    "perplexity": False}
PERCENT = ("top1", "top5", "agreement")  # values in percent, drops in percentage points
DROP_UNITS = {"top1": "percentage points", "top5": "percentage points", "agreement": "percentage points",
              "cosine": "cosine (absolute)", "mse": "mse (absolute increase)",
              "perplexity": "perplexity (absolute increase)"}


def default_metric(labels: np.ndarray | None, outputs: np.ndarray) -> str:
    """top1 for class labels with logits, mse for float targets, cosine when unlabelled."""
    if labels is None:
        return "cosine"
    # (labels may be the whole set and outputs one batch: compare the per-sample shapes)
    if labels.dtype.kind in "iub" and outputs.ndim in (2, 3) and labels.shape[1:] == outputs.shape[1:-1] \
            and labels.ndim == outputs.ndim - 1:
        return "top1"  # one class per sample, or per position of a sequence
    return "mse"


#: Labels below zero mark positions to ignore in a sequence (padding, special tokens): the
#: ignore-index convention of token classifiers (common practice; PyTorch's cross_entropy uses -100)
IGNORE_BELOW = 0


def check_metric(name: str, labels: np.ndarray | None, outputs: np.ndarray, inputs=None) -> None:
    """Refuse a metric the data cannot support, naming what is missing. Classification metrics
    take (N, classes) outputs with (N,) labels, or per position (N, T, classes) with (N, T);
    perplexity takes (N, T, vocabulary) logits with the token ids of ``inputs`` (one batch)."""
    if name not in METRICS:
        raise InputError(f"--metric {name!r}: expected one of {', '.join(METRICS)}")
    if name in ("top1", "top5", "mse") and labels is None:
        raise InputError(f"--metric {name}: the held-out set has no 'labels' array")
    if name in ("top1", "top5"):
        want = outputs.shape[:-1]  # (N,) or per position (N, T)
        if outputs.ndim not in (2, 3):
            raise InputError(f"--metric {name}: the model output must be (N, classes) or (N, positions, classes); "
                             f"got shape {outputs.shape}")
        if labels.dtype.kind not in "iub" or labels.shape[1:] != want[1:]:
            shape = "(N,)" if outputs.ndim == 2 else f"(N, {want[1]})"
            raise InputError(f"--metric {name}: 'labels' must be integer class ids of shape {shape}; "
                             f"got {labels.dtype} {labels.shape}")
        k = 5 if name == "top5" else 1
        if outputs.shape[-1] < k:
            raise InputError(f"--metric {name}: the model has only {outputs.shape[-1]} outputs")
        valid = labels[labels >= IGNORE_BELOW] if outputs.ndim == 3 else labels
        if valid.size and (valid.min() < 0 or valid.max() >= outputs.shape[-1]):
            raise InputError(
                f"--metric {name}: labels range over [{valid.min()}, {valid.max()}] but the model has "
                f"{outputs.shape[-1]} classes"
            )
    if name == "mse" and labels.shape[1:] != outputs.shape[1:]:
        raise InputError(f"--metric mse: labels of shape {labels.shape[1:]} per sample do not match outputs {outputs.shape[1:]}")
    if name == "perplexity":
        check_perplexity(labels, outputs, inputs)
    if name == "agreement" and outputs.ndim not in (2, 3):
        raise InputError(f"--metric agreement: the model output must be (N, classes) or (N, positions, classes); "
                         f"got shape {outputs.shape}")


def positions(original: np.ndarray, factorized: np.ndarray, labels: np.ndarray | None, mask: np.ndarray | None):
    """Per-position outputs (N, T, C) as rows (P, C) of the positions that count: where ``mask``
    (an attention mask, (N, T)) is nonzero and, with labels, where the label is not ignored (< 0)."""
    keep = np.ones(original.shape[:2], dtype=bool)
    if mask is not None and np.shape(mask) == original.shape[:2]:
        keep &= np.asarray(mask) != 0
    if labels is not None and labels.shape == original.shape[:2]:
        keep &= labels >= IGNORE_BELOW
    return original[keep], factorized[keep], (labels[keep] if labels is not None else None)


#: Rows of logits turned into losses at once (float64): bounds the memory of a large vocabulary
LOSS_ROWS = 256


def _aligned_labels(labels) -> bool:
    return labels is not None and labels.ndim == 2 and labels.dtype.kind in "iu"


def check_perplexity(labels, outputs: np.ndarray, inputs) -> None:
    """Perplexity needs (N, T, vocabulary) logits with T >= 2 and token ids inside the vocabulary."""
    if outputs.ndim != 3 or outputs.shape[1] < 2:
        raise InputError("--metric perplexity: the model output must be next-token logits of shape "
                         f"(N, positions >= 2, vocabulary); got shape {outputs.shape}")
    if labels is not None and not _aligned_labels(labels):  # given, but not token ids: never silently unused
        raise InputError(f"--metric perplexity: 'labels' ({labels.dtype} {labels.shape}) are not next-token ids; give "
                         f"(N, {outputs.shape[1]}) integer labels aligned with input_ids (< 0: ignored), or none "
                         "(input_ids are scored)")
    ids = labels if _aligned_labels(labels) else (inputs.get("input_ids") if isinstance(inputs, dict) else None)
    if ids is None:
        raise InputError("--metric perplexity: the held-out set has no 'input_ids' array (or (N, T) integer "
                         "'labels') to read the next tokens from")
    ids = np.asarray(ids)
    if ids.ndim != 2 or ids.shape[1] != outputs.shape[1] or ids.dtype.kind not in "iu":
        raise InputError(f"--metric perplexity: the token ids ({ids.dtype} {ids.shape}) must be integers of shape "
                         f"(N, {outputs.shape[1]}), one per output position")
    real = ids[ids >= 0]
    if real.size and real.max() >= outputs.shape[-1]:
        raise InputError(f"--metric perplexity: token ids reach {real.max()} but the model's vocabulary has "
                         f"{outputs.shape[-1]} entries")


def next_tokens(inputs, labels, mask) -> np.ndarray:
    """The token each position t < T - 1 of a causal language model predicts (the one at t + 1),
    -1 where nothing is scored; shape (N, T - 1). The ids are the held-out 'labels' when they are
    (N, T) integers (the language-model training convention: aligned with the inputs, shifted here,
    < 0 ignored), else 'input_ids'. With an attention mask a position counts only when it and the
    next are both real tokens (no prediction from or of padding)."""
    ids = np.asarray(labels if _aligned_labels(labels) else inputs["input_ids"]).astype(np.int64)
    nxt = ids[:, 1:]
    keep = nxt >= IGNORE_BELOW
    if mask is not None and np.shape(mask) == ids.shape:
        real = np.asarray(mask) != 0
        keep &= real[:, :-1] & real[:, 1:]
    return np.where(keep, nxt, -1)


def token_losses(logits: np.ndarray, targets: np.ndarray) -> np.ndarray:
    """Cross-entropy ``logsumexp(z) - z[target]`` (nats) of every scored position: ``logits``
    (N, T, V), ``targets`` (N, T - 1) from :func:`next_tokens`. Float64, :data:`LOSS_ROWS` rows at once."""
    keep = targets >= 0
    rows = logits[:, :-1][keep]
    want = targets[keep]
    out = np.empty(rows.shape[0])
    for i in range(0, rows.shape[0], LOSS_ROWS):
        z = rows[i:i + LOSS_ROWS].astype(np.float64)
        top = z.max(axis=1)
        lse = top + np.log(np.exp(z - top[:, None]).sum(axis=1))
        out[i:i + LOSS_ROWS] = lse - z[np.arange(z.shape[0]), want[i:i + LOSS_ROWS]]
    return out


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
    per_position: dict | None = None  # sequence outputs: {"positions": P, "masked_by": [...]}
    loss: dict | None = None  # perplexity: mean next-token cross-entropy, nats per token {"before", "after"}

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
        if self.per_position is not None:
            out["per_position"] = self.per_position
        if self.loss is not None:
            out["loss"] = self.loss
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
        self.positions: dict | None = None  # set by the first per-position batch

    def update(self, original: np.ndarray, factorized: np.ndarray, labels: np.ndarray | None,
               mask: np.ndarray | None = None, inputs=None) -> None:
        """One batch. Classification metrics on (N, T, C) outputs count every position that
        ``mask`` (an attention mask) and the labels (< 0: ignored) keep; perplexity reads the
        next tokens from ``inputs`` (the batch's named arrays) or the labels."""
        if self.name == "perplexity":
            targets = next_tokens(inputs, labels, mask)
            if self.positions is None:
                self.positions = {"positions": 0, "masked_by": []}
            by = self.positions["masked_by"]
            if mask is not None and "attention_mask" not in by:
                by.append("attention_mask")
            if _aligned_labels(labels) and np.any(labels < IGNORE_BELOW) and "labels < 0" not in by:
                by.append("labels < 0")
            before, after = token_losses(original, targets), token_losses(factorized, targets)
            self.positions["positions"] += before.size
            self.n += before.size
            self.before += float(before.sum())
            self.after += float(after.sum())
            return
        if self.name in ("top1", "top5", "agreement") and original.ndim == 3:
            if self.positions is None:
                self.positions = {"positions": 0, "masked_by": []}
            by = self.positions["masked_by"]
            if mask is not None and np.shape(mask) == original.shape[:2] and "attention_mask" not in by:
                by.append("attention_mask")
            if self.name != "agreement" and labels is not None and np.any(labels < IGNORE_BELOW) \
                    and "labels < 0" not in by:
                by.append("labels < 0")
            original, factorized, labels = positions(original, factorized, labels if self.name != "agreement"
                                                     else None, mask)
            self.positions["positions"] += original.shape[0]
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
        if self.name == "perplexity":
            loss = {"before": self.before / n, "after": self.after / n}
            return MetricResult(self.name, float(np.exp(loss["before"])), float(np.exp(loss["after"])), self.n,
                                None, self.positions, loss)
        per_class = None
        if self.classes:
            per_class = [{"class": c, "samples": s, "before": 100.0 * b / s, "after": 100.0 * a / s}
                         for c, (s, b, a) in sorted(self.classes.items())]
        return MetricResult(self.name, scale * self.before / n, scale * self.after / n, self.n, per_class,
                            self.positions)
