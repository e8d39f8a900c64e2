"""Running a model: inputs as tensors (one array, named arrays, positional keys), the one output the
metrics read, inference mode, timing and ONNX export."""

from __future__ import annotations

import contextlib
import functools
from pathlib import Path
from typing import Sequence

import numpy as np
import torch
from torch import nn

from .layers import FactorPair, save_weights

from ...errors import InputError

# ---------------------------------------------------------------- running


def to_tensor(array, model: nn.Module):
    """One batch as tensors on the model's device: floating arrays in the model's dtype, integer
    arrays (token ids, masks) kept as they are. A dict of arrays gives a dict of tensors."""
    if isinstance(array, dict):
        return {k: to_tensor(v, model) for k, v in array.items()}
    t = torch.from_numpy(np.ascontiguousarray(array))
    param = next(model.parameters(), None)
    if t.is_floating_point() and param is not None:
        t = t.to(device=param.device, dtype=param.dtype)
    elif param is not None:
        t = t.to(device=param.device)
    return t


def call(model: nn.Module, batch):
    """Run ``model`` on one batch: an array is the one positional input; a dict of arrays is passed
    by name (``input_ids=``, ``attention_mask=``, ...), except keys ``"0"``, ``"1"``, ... which are
    positional inputs in that order (batches a data callable yielded as tuples)."""
    x = to_tensor(batch, model)
    extra = {"use_cache": False} if _has_cache_switch(model) else {}
    if not isinstance(x, dict):
        return model(x, **extra)
    positional = sorted((k for k in x if k.isdigit()), key=int)
    named = {k: v for k, v in x.items() if not k.isdigit()}
    return model(*(x[k] for k in positional), **{**extra, **named})


def _has_cache_switch(model: nn.Module) -> bool:
    """Whether ``model`` is a decoder that builds a key/value cache unless told not to (transformers'
    causal LMs: ``use_cache`` in their forward and config). The tool runs a model for its outputs
    only: a cache is for generation, costs memory, and is a changing object that block replays
    (:func:`paired.find_chain`) cannot reuse."""
    config = getattr(model, "config", None)
    return bool(getattr(config, "use_cache", False)) and _forward_takes_use_cache(type(model))


@functools.lru_cache(maxsize=None)
def _forward_takes_use_cache(cls) -> bool:
    """Read once per model class: ``call`` runs on every batch of every pass."""
    import inspect

    try:
        return "use_cache" in inspect.signature(cls.forward).parameters
    except (TypeError, ValueError):
        return False


def rows(batch) -> int:
    """Samples in a batch (an array or a dict of arrays sharing their first dimension)."""
    return len(next(iter(batch.values()))) if isinstance(batch, dict) else len(batch)


def first_rows(batch, n: int = 1):
    return {k: v[:n] for k, v in batch.items()} if isinstance(batch, dict) else batch[:n]


def select_output(out, name: str | None = None) -> torch.Tensor:
    """The one tensor the metrics read from a model's output. The rule: a tensor is itself; a dict
    or a Hugging Face-style output object gives the entry ``name``, else its first tensor; a tuple
    or list gives element ``int(name)``, else its first tensor."""
    if isinstance(out, torch.Tensor):
        if name is not None:
            raise InputError(f"--output {name!r}: the model returns one tensor, with no entries to choose from "
                             "(leave --output out)")
        return out
    if isinstance(out, dict) or (hasattr(out, "keys") and hasattr(out, "__getitem__")):
        keys = list(out.keys())
        if name is not None:
            if name not in keys:
                raise InputError(f"--output {name!r}: the model's output has no such entry (it has {', '.join(map(str, keys))})")
            return select_output(out[name])
        first = next((out[k] for k in keys if isinstance(out[k], torch.Tensor)), None)
        if first is None:
            raise InputError(f"the model's output ({', '.join(map(str, keys))}) holds no tensor")
        return first
    if isinstance(out, (tuple, list)):
        if name is not None:
            if not name.isdigit() or int(name) >= len(out):
                raise InputError(f"--output {name!r}: the model returns a {len(out)}-tuple; give an index below {len(out)}")
            return select_output(out[int(name)])
        first = next((o for o in out if isinstance(o, torch.Tensor)), None)
        if first is not None:
            return first
    raise InputError(f"the model returned {type(out).__name__}; expected a tensor, a tuple, a dict or an output "
                     "object holding one")


def _to_numpy(out, name: str | None = None) -> np.ndarray:
    return select_output(out, name).detach().to(device="cpu", dtype=torch.float64).numpy()


@contextlib.contextmanager
def inference(model: nn.Module):
    """no_grad and eval() for the duration (dropout off, batch-norm frozen); the caller's
    train/eval flags are restored afterwards."""
    flags = [(m, m.training) for m in model.modules()]
    model.eval()
    try:
        with torch.no_grad():
            yield
    finally:
        for m, flag in flags:
            m.training = flag


def predict(model: nn.Module, inputs, *, source: str = "--heldout", output: str | None = None) -> np.ndarray:
    """Run ``model`` (in eval mode) on one batch (an array, or a dict of arrays passed by name); the
    output :func:`select_output` picks, as a float64 array. ``source`` names the data in errors."""
    if isinstance(inputs, dict):
        _check_names(model, inputs, source)
    with inference(model), _checked_embeddings(model, source):
        return _to_numpy(call(model, inputs), output)


@contextlib.contextmanager
def _checked_embeddings(model: nn.Module, source: str):
    """Every embedding table checks the ids it is given: integers, inside its rows (torch would
    raise a bare IndexError or a dtype error naming neither the data nor the table)."""
    def check(module, args, name):
        ids = args[0] if args else None
        if not isinstance(ids, torch.Tensor) or ids.numel() == 0:
            return
        if ids.is_floating_point():
            raise InputError(f"{source}: embedding {name!r} looks up token ids but got {str(ids.dtype)[6:]} values; "
                             "store the ids as integers (e.g. numpy int64)")
        low, high = int(ids.min()), int(ids.max())
        if low < 0 or high >= module.num_embeddings:
            raise InputError(f"{source}: ids range over [{low}, {high}] but embedding {name!r} has "
                             f"{module.num_embeddings} rows (ids 0 to {module.num_embeddings - 1}); are they from "
                             "another tokenizer or vocabulary?")

    hooks = [m.register_forward_pre_hook(lambda m, a, name=name: check(m, a, name))
             for name, m in model.named_modules() if isinstance(m, (nn.Embedding, nn.EmbeddingBag))]
    try:
        yield
    finally:
        for h in hooks:
            h.remove()


def _check_names(model: nn.Module, inputs: dict, source: str) -> None:
    """Named arrays must be parameters of ``forward`` (unless it takes ``**kwargs``)."""
    import inspect

    try:
        params = inspect.signature(model.forward).parameters
    except (TypeError, ValueError):
        return
    if any(p.kind is inspect.Parameter.VAR_KEYWORD for p in params.values()):
        return
    unknown = [k for k in inputs if not k.isdigit() and k not in params]
    if unknown:
        raise InputError(f"{source}: missing array 'inputs' (arrays found: {', '.join(sorted(inputs))}), and "
                         f"{', '.join(repr(k) for k in unknown)} is not a parameter of the model's "
                         f"forward({', '.join(params)}): name a single input 'inputs', or several after forward's parameters")




@contextlib.contextmanager
def timing(models: Sequence[nn.Module], threads: int):
    """For the duration: ``threads`` torch threads and eval mode on every model; both restored
    afterwards. Set once around a latency measurement, so that the timed calls run the forward
    pass and nothing else (walking the modules to set eval() costs more on a factorized model,
    which has more modules, and would bias the comparison)."""
    old = torch.get_num_threads()
    flags = [(m, m.training) for model in models for m in model.modules()]
    torch.set_num_threads(threads)
    for model in models:
        model.eval()
    try:
        yield
    finally:
        torch.set_num_threads(old)
        for m, flag in flags:
            m.training = flag


def timer(model: nn.Module, inputs: np.ndarray, threads: int):
    """A zero-argument callable that runs one forward pass in inference mode; call it inside
    :func:`timing` (threads and eval mode are set there, not per call)."""
    x = to_tensor(inputs, model)  # converted once, outside the timed call
    if isinstance(x, dict):
        args = tuple(x[k] for k in sorted((k for k in x if k.isdigit()), key=int))
        kwargs = {k: v for k, v in x.items() if not k.isdigit()}
    else:
        args, kwargs = (x,), {}

    def run():
        with torch.inference_mode():
            model(*args, **kwargs)

    return run


class _NamedCall(nn.Module):
    """For export: the model called with named inputs (positional here, so the exporter can name
    them), reduced to the one output tensor the metrics read (:func:`select_output`)."""

    def __init__(self, model: nn.Module, names: list[str], output: str | None):
        super().__init__()
        self.model, self.names, self.output = model, names, output

    def forward(self, *tensors):
        return select_output(self.model(**dict(zip(self.names, tensors))), self.output)


def export_onnx(model: nn.Module, sample: np.ndarray, path, *, opset: int = 17, output: str | None = None) -> None:
    """Write ``model`` as ONNX with a dynamic batch axis (TorchScript-based exporter: it needs
    nothing beyond torch itself)."""
    import warnings

    x = to_tensor(sample, model)
    with warnings.catch_warnings(), inference(model):
        warnings.simplefilter("ignore")
        if isinstance(x, dict):  # inputs by name: the graph inputs take the array names
            if any(k.isdigit() for k in x):
                raise InputError("--export-onnx: inputs given by position (a data callable's tuples) cannot be "
                                 "named in the ONNX graph; yield dicts keyed by the forward's parameter names")
            names = list(x)
            _export(_NamedCall(model, names, output), tuple(x[k] for k in names), path, opset, names, output="output")
            return
        _export(model, (x,), path, opset, ["input"], output="output")


def _export(model: nn.Module, args: tuple, path, opset: int, names: list[str], output: str | None = None) -> None:
    """torch.onnx.export (TorchScript-based) with PyTorch's fused attention path off: its eval-mode
    kernel (aten::_native_multi_head_attention) has no ONNX form, the regular path does."""
    fast = torch.backends.mha.get_fastpath_enabled()
    torch.backends.mha.set_fastpath_enabled(False)
    try:
        torch.onnx.export(model, args, str(path), dynamo=False, input_names=names, opset_version=opset,
                          output_names=[output] if output else None,
                          dynamic_axes={**{k: {0: "batch"} for k in names}, **({output: {0: "batch"}} if output else {})})
    finally:
        torch.backends.mha.set_fastpath_enabled(fast)


def check(model: nn.Module) -> None:
    """Nothing to check beyond what the rewrite verified (the ONNX backend runs the checker)."""


def save_model(model: nn.Module, folder: Path) -> list[str]:
    """Write ``folder/model.safetensors``; the names of the files written."""
    save_weights(model, Path(folder) / "model.safetensors")
    return ["model.safetensors"]


def factor_parameters(model: nn.Module) -> list[nn.Parameter]:
    """The parameters of every FactorPair in ``model`` (what recovery fine-tunes)."""
    return [p for m in model.modules() if isinstance(m, FactorPair) for p in m.parameters()]


def read_factors(model: nn.Module, names: list[str]) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """(A, X) back from the FactorPairs of ``model`` as float64 matrices: A (m, k), X (k, n)."""
    out = {}
    for name in names:
        pair = model.get_submodule(name)
        a = pair.expand.weight.detach().double().cpu().reshape(pair.expand.weight.shape[0], -1).numpy()
        x = pair.reduce.weight.detach().double().cpu().reshape(pair.rank, -1).numpy()
        out[name] = (a, x)
    return out

def _run_once(model: nn.Module, sample: np.ndarray, hooks: list, rows: int = 1) -> None:
    """One forward pass on the first ``rows`` samples, then remove ``hooks`` whatever happens."""
    try:
        with inference(model):
            call(model, first_rows(sample, rows))
    finally:
        for h in hooks:
            h.remove()
