"""Short recovery: fine-tune only the factor pairs to reproduce the original model's outputs.

Knowledge distillation on the calibration inputs (never the held-out set): KL divergence between
the original's and the factorized model's softmax outputs for classifiers, mean squared error of
the outputs otherwise. Adam, a fixed seed, a slice of the calibration set held back for early
stopping, and the best state (by that slice's loss) restored at the end: the start counts as a
state, so recovery keeps the better of before and after and never returns a worse model on that
slice. The model stays in eval mode while only the factors learn: BatchNorm keeps the running
statistics it was trained with (train mode would move them on a few calibration batches, and
restoring the factors would not restore them) and dropout stays off.

The learning rate, unless given, is chosen on the same validation slice: Adam's step is about the
learning rate in every parameter whatever its size, so a good rate depends on the factors' scale
(whitened factors of one model want 1e-5 where another's take 1e-3; measured on the pretrained
benchmarks). Each rate in ``LR_TRIALS`` runs ``trial_steps`` steps from the same start, the factors
are put back after each, and the run uses the largest rate that stayed stable (``choose_rate``; the
trials are stated in the result). Ten steps are too few to show a rate's progress: on MiniLM,
1e-6 ended its trial lowest, yet 1e-5 reached a lower validation loss by step 150 (measured).
"""

from __future__ import annotations

import sys

import numpy as np
import torch
from torch import nn
from tqdm.auto import tqdm

from ...errors import InputError
from .running import call, factor_parameters, inference, predict, rows, select_output


def _loss(kind: str, student: torch.Tensor, teacher: torch.Tensor) -> torch.Tensor:
    if kind == "kl":
        return nn.functional.kl_div(torch.log_softmax(student, -1), torch.log_softmax(teacher, -1),
                                    reduction="batchmean", log_target=True)
    return nn.functional.mse_loss(student, teacher)


LR_TRIALS = (1e-3, 1e-4, 1e-5, 1e-6)
#: The original's outputs on the calibration set are kept for the whole recovery while they fit
#: this; larger ones (a language model's logits) are computed again for every batch instead
TEACHER_BYTES = 512 * 2**20
STABLE = 0.05  # a trial may end this much above the starting loss and still count as stable


def choose_rate(trials: dict, start: float, tolerance: float = STABLE) -> float:
    """The largest rate whose trial ended within ``tolerance`` of the starting validation loss (a
    rate that is stable over the trial; a larger one progresses faster over the run, which the
    short trial is too short to show), else the rate with the lowest trial loss."""
    if not trials:
        return LR_TRIALS[1]
    stable = [r for r, v in trials.items() if v <= start * (1.0 + tolerance)]
    return max(stable) if stable else min(trials, key=trials.get)


def _take(inputs, idx: np.ndarray):
    """The samples ``idx`` of an array or of a dict of arrays (named inputs)."""
    return {k: v[idx] for k, v in inputs.items()} if isinstance(inputs, dict) else inputs[idx]


def recover(
    original: nn.Module,
    factorized: nn.Module,
    inputs,
    *,
    steps: int,
    output: str | None = None,
    loss: str = "kl",
    lr: float | None = None,
    trial_steps: int = 10,
    batch_size: int = 64,
    validation_fraction: float = 0.2,
    eval_every: int = 10,
    patience: int = 5,
    seed: int = 0,
    quiet: bool = False,
) -> dict:
    """Fine-tune ``factorized``'s FactorPair parameters in place; return what happened. ``inputs``
    is one array or a dict of named arrays (token ids and masks); ``output`` selects the output
    tensor that is matched, as everywhere else (``select_output``)."""
    params = factor_parameters(factorized)
    frozen = [p for p in factorized.parameters() if all(p is not q for q in params)]
    flags = [(p, p.requires_grad) for p in factorized.parameters()]
    for p in frozen:
        p.requires_grad_(False)
    for p in params:
        p.requires_grad_(True)
    n = rows(inputs)
    rng = np.random.default_rng(seed)
    order = rng.permutation(n)
    n_val = max(1, int(round(validation_fraction * n))) if n > 1 else 0
    val_idx, train_idx = order[:n_val], order[n_val:] if n > n_val else order

    def run(model, idx):
        return select_output(call(model, _take(inputs, idx)), output)

    with inference(original):  # the teacher's outputs, a batch at a time
        first = run(original, order[:batch_size]).detach()
    if first.numel() * first.element_size() / len(first) * n > TEACHER_BYTES:
        def teacher(idx):  # too large to keep (a language model's logits): run the original again
            with inference(original):
                return run(original, idx).detach()
    else:
        with inference(original):
            kept = torch.cat([first] + [run(original, order[i:i + batch_size]).detach()
                                        for i in range(batch_size, n, batch_size)])
        kept = kept[torch.from_numpy(np.argsort(order))]  # back in sample order

        def teacher(idx):
            return kept[torch.from_numpy(idx)]

    def val_loss() -> float:
        if n_val == 0:
            return float("nan")
        with inference(factorized):
            total = 0.0
            for i in range(0, n_val, batch_size):
                idx = val_idx[i:i + batch_size]
                total += float(_loss(loss, run(factorized, idx), teacher(idx))) * len(idx)
            return total / n_val

    def train_step(opt, gen) -> None:
        pick = train_idx[torch.randint(len(train_idx), (min(batch_size, len(train_idx)),), generator=gen).numpy()]
        loss_value = _loss(loss, run(factorized, pick), teacher(pick))
        opt.zero_grad()
        loss_value.backward()
        opt.step()

    was_training = factorized.training
    factorized.eval()  # BatchNorm statistics frozen, dropout off; gradients still reach the factors
    best = val_loss()
    start_loss = best
    best_state = [p.detach().clone() for p in params]
    trials = {}
    best_step, since, step = 0, 0, 0
    try:
        if lr is None:  # a few steps at each rate from the same start; the largest stable rate wins
            for candidate in LR_TRIALS if steps and n_val else ():
                gen = torch.Generator().manual_seed(seed)
                opt = torch.optim.Adam(params, lr=candidate)
                for _ in range(min(trial_steps, steps)):
                    train_step(opt, gen)
                trials[candidate] = val_loss()
                with torch.no_grad():
                    for p, saved in zip(params, best_state):
                        p.copy_(saved)
            lr = choose_rate(trials, start_loss)
        gen = torch.Generator().manual_seed(seed)
        opt = torch.optim.Adam(params, lr=lr)
        bar = tqdm(range(steps), desc="recover", leave=False, unit="step", disable=quiet or not sys.stderr.isatty())
        for step in bar:
            train_step(opt, gen)
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
            "lr": lr, "lr_trials": {f"{k:g}": v for k, v in trials.items()}, "trial_steps": trial_steps if trials else 0,
            "batch_size": batch_size, "seed": seed, "validation_samples": int(n_val),
            "train_samples": int(len(train_idx)), "validation_loss_before": start_loss,
            "validation_loss_after": best, "early_stopped": since >= patience,
            "kept": "after" if best_step > 0 else "before"}


def fine_tune_factors(original: nn.Module, factorized: nn.Module, inputs, *, metric: str | None, steps: int,
                      output: str | None = None, lr: float | None = None, seed: int = 0, quiet: bool = False) -> dict:
    """The backend's recovery operation: :func:`recover` with the loss chosen from the task. KL on
    logits for classifiers (2-D outputs, a classification metric or none); MSE otherwise."""
    if not factor_parameters(factorized):
        raise InputError("--recover: the plan factorized no layer, so there are no factors to fine-tune")
    first = {k: v[:2] for k, v in inputs.items()} if isinstance(inputs, dict) else inputs[:2]
    sample = predict(original, first, source="--calibration", output=output)
    classifier = sample.ndim == 2 and sample.shape[1] > 1 and metric in (None, "top1", "top5", "agreement")
    return recover(original, factorized, inputs, steps=steps, loss="kl" if classifier else "mse",
                   output=output, lr=lr, seed=seed, quiet=quiet)
