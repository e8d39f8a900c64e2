"""Short recovery: fine-tune only the factor pairs to reproduce the original model's outputs.

Knowledge distillation on the calibration inputs (never the held-out set): KL divergence between
the original's and the factorized model's softmax outputs for classifiers, mean squared error of
the outputs otherwise. Adam, a fixed seed, a slice of the calibration set held back for early
stopping, and the best state (by that slice's loss) restored at the end: the start counts as a
state, so recovery keeps the better of before and after and never returns a worse model on that
slice. The model stays in eval mode while only the factors learn: BatchNorm keeps the running
statistics it was trained with (train mode would move them on a few calibration batches, and
restoring the factors would not restore them) and dropout stays off.
"""

from __future__ import annotations

import sys

import numpy as np
import torch
from torch import nn
from tqdm.auto import tqdm

from .torch_backend import inference, to_tensor, factor_parameters


def _loss(kind: str, student: torch.Tensor, teacher: torch.Tensor) -> torch.Tensor:
    if kind == "kl":
        return nn.functional.kl_div(torch.log_softmax(student, -1), torch.log_softmax(teacher, -1),
                                    reduction="batchmean", log_target=True)
    return nn.functional.mse_loss(student, teacher)


def _first(out):
    return out[0] if isinstance(out, (tuple, list)) else out


def recover(
    original: nn.Module,
    factorized: nn.Module,
    inputs: np.ndarray,
    *,
    steps: int,
    loss: str = "kl",
    lr: float = 1e-3,
    batch_size: int = 64,
    validation_fraction: float = 0.2,
    eval_every: int = 10,
    patience: int = 5,
    seed: int = 0,
    quiet: bool = False,
) -> dict:
    """Fine-tune ``factorized``'s FactorPair parameters in place; return what happened."""
    params = factor_parameters(factorized)
    frozen = [p for p in factorized.parameters() if all(p is not q for q in params)]
    flags = [(p, p.requires_grad) for p in factorized.parameters()]
    for p in frozen:
        p.requires_grad_(False)
    for p in params:
        p.requires_grad_(True)
    n = inputs.shape[0]
    rng = np.random.default_rng(seed)
    order = rng.permutation(n)
    n_val = max(1, int(round(validation_fraction * n))) if n > 1 else 0
    val_idx, train_idx = order[:n_val], order[n_val:] if n > n_val else order
    x_all = to_tensor(inputs, factorized)
    with inference(original):
        teacher_all = _first(original(x_all)).detach()

    def val_loss() -> float:
        if n_val == 0:
            return float("nan")
        with inference(factorized):
            return float(_loss(loss, _first(factorized(x_all[val_idx])), teacher_all[val_idx]))

    gen = torch.Generator().manual_seed(seed)
    opt = torch.optim.Adam(params, lr=lr)
    best = val_loss()
    start_loss = best
    best_state = [p.detach().clone() for p in params]
    best_step, since, step = 0, 0, 0
    was_training = factorized.training
    factorized.eval()  # BatchNorm statistics frozen, dropout off; gradients still reach the factors
    bar = tqdm(range(steps), desc="recover", leave=False, unit="step", disable=quiet or not sys.stderr.isatty())
    try:
        for step in bar:
            pick = torch.from_numpy(train_idx[torch.randint(len(train_idx), (min(batch_size, len(train_idx)),), generator=gen).numpy()])
            loss_value = _loss(loss, _first(factorized(x_all[pick])), teacher_all[pick])
            opt.zero_grad()
            loss_value.backward()
            opt.step()
            if (step + 1) % eval_every == 0 or step + 1 == steps:
                current = val_loss()
                bar.set_postfix(val=f"{current:.4g}")
                if current < best:
                    best, best_step, since = current, step + 1, 0
                    best_state = [p.detach().clone() for p in params]
                else:
                    since += 1
                    if since >= patience:
                        break
    finally:
        with torch.no_grad():
            for p, saved in zip(params, best_state):
                p.copy_(saved)
        for p, flag in flags:
            p.requires_grad_(flag)
        factorized.train(was_training)
    return {"steps": steps, "steps_run": step + 1 if steps else 0, "best_step": best_step, "loss": loss,
            "lr": lr, "batch_size": batch_size, "seed": seed, "validation_samples": int(n_val),
            "train_samples": int(len(train_idx)), "validation_loss_before": start_loss,
            "validation_loss_after": best, "early_stopped": since >= patience,
            "kept": "after" if best_step > 0 else "before"}
