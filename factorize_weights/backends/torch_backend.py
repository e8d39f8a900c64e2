"""PyTorch backend: find layers, hand out matrix views, rewrite into factor pairs, run, save.

The only module that imports ``torch.nn`` for the core job. The numeric core receives float64
numpy matrices from :func:`weight_matrix` and gives back numpy factors to :func:`rewrite`.
"""

from __future__ import annotations

import contextlib
import copy
import fnmatch
import functools
import importlib
import importlib.util
import sys
from collections import OrderedDict
from pathlib import Path
from collections.abc import Mapping
from typing import Callable, Iterable, Iterator, Sequence

import numpy as np
import torch
from torch import nn

from ..errors import InputError, readable_file
from ..records import LayerRecord, max_saving_rank

FORMAT = "torch"
RUNTIME = "torch"  # what latency is measured in

_KINDS = {nn.Linear: "linear", nn.Conv1d: "conv1d", nn.Conv2d: "conv2d"}
_UNSUPPORTED = {
    nn.Conv3d: "3-D convolution is not supported yet",
    nn.ConvTranspose1d: "transposed convolution is not supported yet",
    nn.ConvTranspose2d: "transposed convolution is not supported yet",
    nn.ConvTranspose3d: "transposed convolution is not supported yet",
}


class FactorPair(nn.Sequential):
    """A dense layer rewritten as two thin ones: ``reduce`` (in -> rank) then ``expand``.

    For a linear layer: ``Linear(in, rank, bias=False)`` then ``Linear(rank, out, bias)``.
    For a convolution: ``Conv(in, rank, kernel, stride, padding, dilation, bias=False)`` then a
    ``1x1`` (or length-1) ``Conv(rank, out, bias)``. The product of the two weights (as matrices)
    is the rank-``rank`` approximation of the original ``out x in*kh*kw`` matrix view.
    """

    def __init__(self, reduce: nn.Module, expand: nn.Module, rank: int):
        super().__init__(OrderedDict([("reduce", reduce), ("expand", expand)]))
        self.rank = rank

    def extra_repr(self) -> str:
        return f"rank={self.rank}"


# ---------------------------------------------------------------- loading the user's model


def load_factory(spec: str) -> Callable[[], nn.Module]:
    """Resolve ``path/to/file.py:factory`` or ``package.module:factory`` to the callable."""
    target, sep, attr = spec.rpartition(":")
    if not sep or not target or not attr:
        raise InputError(
            f"--model {spec!r}: expected FILE.py:FACTORY or package.module:FACTORY "
            "(a callable that returns the nn.Module)"
        )
    if target.endswith(".py") or "/" in target or "\\" in target:
        path = readable_file(target, f"--model {spec!r}:", "Python file")
        name = f"_factorize_weights_user_{abs(hash(str(path.resolve())))}"
        try:
            module_spec = importlib.util.spec_from_file_location(name, path)
            module = importlib.util.module_from_spec(module_spec)
            sys.modules[name] = module
            module_spec.loader.exec_module(module)
        except Exception as exc:  # the user's file failed to import
            raise InputError(f"--model {spec!r}: importing {target} raised {_describe(exc)}") from exc
    else:
        try:
            module = importlib.import_module(target)
        except Exception as exc:
            raise InputError(f"--model {spec!r}: cannot import {target}: {_describe(exc)}") from exc
    factory = getattr(module, attr, None)
    if not callable(factory):
        raise InputError(f"--model {spec!r}: {target} has no callable named {attr!r}")
    return factory


def build_model(spec: str, weights: str | Path | None = None, *, weights_key: str | None = None) -> nn.Module:
    """Call the factory, check it returned an ``nn.Module``, load ``weights`` strictly, eval()."""
    factory = load_factory(spec)
    try:
        model = factory()
    except SystemExit as exc:  # a factory must return a model, not end the process (a pipeline would read 0)
        raise InputError(f"--model {spec!r}: the factory called sys.exit({exc.code!r}) instead of returning a model") from exc
    except Exception as exc:
        raise InputError(f"--model {spec!r}: the factory raised {_describe(exc)}") from exc
    if not isinstance(model, nn.Module):
        raise InputError(f"--model {spec!r}: the factory returned {type(model).__name__}, not an nn.Module")
    if weights is not None:
        load_weights(model, weights, key=weights_key)
    return model.eval()


def load_pretrained(folder: str | Path) -> nn.Module:
    """A Hugging Face-style model folder (``config.json`` plus weights saved by ``save_pretrained``)
    loaded through ``transformers`` from local files only: the class named in the config's
    ``architectures`` (so a classifier keeps its head), else ``AutoModel``. Never any network.
    A folder ``compress`` wrote from such a folder (``plan.json`` next to ``config.json``) is
    rebuilt from its config and loaded with :func:`~factorize_weights.store.load_factorized`."""
    import os

    folder = Path(folder)
    os.environ.setdefault("HF_HUB_OFFLINE", "1")  # local files only, whatever the environment says
    try:
        import transformers
    except ImportError as exc:
        raise InputError(f"--model {folder}: a Hugging Face model folder needs the optional package 'transformers' "
                         "(pip install 'factorize-weights[hf]')") from exc
    try:
        config = transformers.AutoConfig.from_pretrained(str(folder), local_files_only=True)
        names = getattr(config, "architectures", None) or []
        cls = getattr(transformers, names[0], None) if names else None
        if (folder / "plan.json").is_file():  # a folder this tool wrote: the architecture from the config,
            model = cls(config) if cls is not None else transformers.AutoModel.from_config(config)
        else:
            model = (cls or transformers.AutoModel).from_pretrained(str(folder), local_files_only=True)
    except Exception as exc:
        raise InputError(f"--model {folder}: not a loadable model folder ({_describe(exc)})") from exc
    if (folder / "plan.json").is_file():  # then its factor pairs and every weight from model.safetensors
        from ..store import load_factorized

        return load_factorized(model.eval(), folder)
    return model.eval()


class CheckpointNotice(UserWarning):
    """Something about a checkpoint the user should know (a key unwrapped); the CLI prints it."""


#: Keys under which training scripts commonly nest a state dict (common practice), in the order tried.
NESTED_KEYS = ("state_dict", "model_state_dict", "model", "module", "net", "network", "weights", "params")


def _is_tensor_map(value) -> bool:
    return isinstance(value, dict) and bool(value) and all(isinstance(v, torch.Tensor) for v in value.values())


class ShardedCheckpoint(Mapping):
    """The tensors of a sharded safetensors checkpoint (``*.safetensors.index.json`` plus shards),
    read one tensor at a time: shapes come from the shard headers, values on access."""

    def __init__(self, index: Path):
        import json

        try:
            weight_map = json.loads(index.read_text(encoding="utf-8"))["weight_map"]
        except (OSError, ValueError, KeyError, TypeError) as exc:
            raise InputError(f"--weights {index}: not a safetensors index (no readable 'weight_map': "
                             f"{type(exc).__name__})") from exc
        self.files = {name: index.parent / shard for name, shard in weight_map.items()}
        missing = sorted({str(f) for f in self.files.values() if not f.is_file()})
        if missing:
            raise InputError(f"--weights {index}: shard file {missing[0]} is missing ({len(missing)} missing)")

    def _open(self, name: str):
        from safetensors import safe_open

        return safe_open(str(self.files[name]), framework="pt")

    def shape(self, name: str) -> tuple:
        with self._open(name) as f:
            return tuple(f.get_slice(name).get_shape())

    def __getitem__(self, name: str) -> torch.Tensor:
        with self._open(name) as f:
            return f.get_tensor(name)

    def __iter__(self):
        return iter(self.files)

    def __len__(self):
        return len(self.files)


def read_checkpoint(path: str | Path, key: str | None = None):
    """A name -> tensor mapping from ``.safetensors``, a sharded safetensors index
    (``*.safetensors.index.json``, read lazily), or ``.pt``/``.pth``/``.bin`` read with
    ``torch.load(weights_only=True)`` (which refuses arbitrary pickled objects). A checkpoint that
    nests its tensors under one key (``{'model': state_dict, 'epoch': 3}``) is unwrapped: ``key``
    names it, else the first of :data:`NESTED_KEYS` that holds tensors is taken, with a notice."""
    import warnings

    path = readable_file(path, "--weights", "checkpoint file")
    if path.name.lower().endswith(".index.json"):
        return ShardedCheckpoint(path)
    suffix = path.suffix.lower()
    try:
        if suffix == ".safetensors":
            from safetensors.torch import load_file

            state = load_file(str(path))
        elif suffix in (".pt", ".pth", ".bin"):
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # torch's own warnings about the file format
                state = torch.load(str(path), map_location="cpu", weights_only=True)
        else:
            raise InputError(f"--weights {path}: expected a .safetensors, .safetensors.index.json, .pt or .pth file")
    except InputError:
        raise
    except Exception as exc:
        if suffix != ".safetensors" and "weights_only" in str(exc):  # torch refused a pickled object
            raise InputError(f"--weights {path}: holds pickled Python objects besides tensors, which this tool never "
                             "unpickles; save the weights with safetensors or torch.save(model.state_dict())") from exc
        raise InputError(f"--weights {path}: cannot be read as {suffix} ({_describe(exc)})") from exc
    if not isinstance(state, dict):
        raise InputError(f"--weights {path}: holds a {type(state).__name__}, not a mapping of tensor names to tensors")
    if key is not None:
        if not _is_tensor_map(state.get(key)):
            raise InputError(f"--weights-key {key!r}: {path} has no mapping of tensors under that key "
                             f"(top-level keys: {', '.join(map(str, list(state)[:8]))})")
        return state[key]
    if _is_tensor_map(state):
        return state
    nested = [k for k in NESTED_KEYS if _is_tensor_map(state.get(k))]
    others = [k for k in state if _is_tensor_map(state.get(k))]
    if nested or others:
        chosen = (nested or others)[0]
        warnings.warn(CheckpointNotice(
            f"--weights {path}: the tensors are under the key {chosen!r}; using them "
            f"(other keys: {', '.join(str(k) for k in state if k != chosen)[:200] or 'none'}; --weights-key picks another)"))
        return state[chosen]
    raise InputError(f"--weights {path}: expected a mapping of tensor names to tensors; found keys "
                     f"{', '.join(map(str, list(state)[:8]))} and none of them holds tensors")


def load_weights(model: nn.Module, path: str | Path, *, key: str | None = None) -> None:
    """Load a checkpoint into ``model``; every key and shape must match. Sharded checkpoints are
    copied one tensor at a time."""
    state = read_checkpoint(path, key)
    shape_of = state.shape if isinstance(state, ShardedCheckpoint) else (lambda k: tuple(state[k].shape))
    own = model.state_dict()
    missing = [k for k in own if k not in state]
    unexpected = [k for k in state if k not in own]
    wrong = [
        f"{k} {shape_of(k)} vs model {tuple(own[k].shape)}"
        for k in own
        if k in state and shape_of(k) != tuple(own[k].shape)
    ]
    if not isinstance(state, ShardedCheckpoint):
        for k in own:  # float16/bfloat16 into float32 is fine; integers into floats are not weights
            if k in state and own[k].is_floating_point() and not state[k].is_floating_point():
                raise InputError(f"--weights {path}: tensor {k!r} is {str(state[k].dtype).removeprefix('torch.')} "
                                 f"but the model's is {str(own[k].dtype).removeprefix('torch.')} (a quantized "
                                 "checkpoint? give the floating-point weights)")
    if missing or unexpected or wrong:
        parts = []
        if missing:
            parts.append(f"{len(missing)} missing (e.g. {', '.join(missing[:3])})")
        if unexpected:
            parts.append(f"{len(unexpected)} unexpected (e.g. {', '.join(unexpected[:3])})")
        if wrong:
            parts.append(f"{len(wrong)} with other shapes (e.g. {'; '.join(wrong[:2])})")
        raise InputError(f"--weights {path}: tensors do not match the model: {'; '.join(parts)}")
    if isinstance(state, ShardedCheckpoint):
        with torch.no_grad():
            for name, target in own.items():
                target.copy_(state[name])  # state_dict() tensors share storage with the model
        return
    model.load_state_dict(state, strict=True)


def _describe(exc: BaseException) -> str:
    import re

    text = re.sub(r"\x1b\[[0-9;]*m", "", str(exc)).strip().splitlines()  # torch colours some errors
    return f"{type(exc).__name__}: {text[0]}" if text else type(exc).__name__


# ---------------------------------------------------------------- discovery


def _matches(name: str, patterns: Sequence[str]) -> bool:
    return any(fnmatch.fnmatchcase(name, p) for p in patterns)


def discover(
    model: nn.Module, *, only: Sequence[str] = (), skip: Sequence[str] = ()
) -> list[LayerRecord]:
    """Every linear and convolution layer of ``model`` as a record, skipped ones with a reason.

    ``only`` and ``skip`` are shell-style globs on qualified names (``"encoder.*"``); a layer is
    selected when it matches some ``only`` pattern (or none are given) and no ``skip`` pattern.
    """
    records: list[LayerRecord] = []
    # every place each Parameter object is registered, and every name each module is reachable
    # under: a weight registered twice is tied (to an Embedding, another layer...), a module
    # reachable twice is an alias; rewriting either would leave a dense copy behind
    owners: dict[int, list[str]] = {}
    for pname, param in model.named_parameters(remove_duplicate=False):
        owners.setdefault(id(param), []).append(pname)
    aliases: dict[int, list[str]] = {}
    for mname, mod in model.named_modules(remove_duplicate=False):
        aliases.setdefault(id(mod), []).append(mname)
    parents = {}
    for parent_name, parent in model.named_modules():
        for child_name, child in parent.named_children():
            parents[id(child)] = parent
    for name, module in model.named_modules():
        if isinstance(module, nn.MultiheadAttention):
            records += _attention_projections(name, module)
        kind = next((k for cls, k in _KINDS.items() if type(module) is cls or isinstance(module, cls)), None)
        transposed = kind is None and _is_transposed_linear(module)
        if transposed:
            kind = "linear"
        if kind is None:
            reason = next((r for cls, r in _UNSUPPORTED.items() if isinstance(module, cls)), None)
            own = module._parameters.get("weight")
            if reason is None and isinstance(own, torch.Tensor) and own.dim() >= 2 and not isinstance(module, nn.Embedding):
                reason = f"module type {type(module).__name__} is not a layer kind this tool splits"
            if reason is not None:
                w = module.weight
                records.append(
                    LayerRecord(name, type(module).__name__.lower(), tuple(w.shape),
                                (int(w.shape[0]), int(np.prod(w.shape[1:]))), module.bias is not None,
                                str(w.dtype).removeprefix("torch."), skip_reason=reason, handle=module)
                )
            continue
        weight = module.weight
        if isinstance(weight, nn.parameter.UninitializedParameter):
            records.append(LayerRecord(name, kind, (), (1, 1), False, "unknown",
                                       skip_reason="weight not initialized (lazy module)", handle=module))
            continue
        shape = tuple(int(d) for d in weight.shape)
        m, n = shape[0], int(np.prod(shape[1:]))
        options = {}
        if transposed:  # y = x @ W + b with W (in, out): the matrix view is W^T
            m, n = shape[1], shape[0]
            options = {"transposed": True}
        if kind != "linear":
            options = {
                "stride": tuple(module.stride),
                "padding": module.padding if isinstance(module.padding, str) else tuple(module.padding),
                "dilation": tuple(module.dilation),
                "padding_mode": module.padding_mode,
                "groups": module.groups,
            }
        record = LayerRecord(name, kind, shape, (m, n), module.bias is not None,
                             str(weight.dtype).removeprefix("torch."), options, handle=module)
        record.skip_reason = _skip_reason(name, module, record, parents.get(id(module)), owners,
                                          aliases.get(id(module), [name]), only, skip)
        if record.skip_reason == OVERRIDE_REASON.format(cls=type(module).__name__):
            record.options["check_forward"] = True  # measure_positions compares it on real inputs
        records.append(record)
    return records


def _is_transposed_linear(module: nn.Module) -> bool:
    """transformers' ``Conv1D`` (GPT-2 style): ``y = x @ W + b`` with W (in, out), checked by its
    class name and attributes so transformers need not be imported."""
    w = module._parameters.get("weight")
    return (type(module).__name__ == "Conv1D" and hasattr(module, "nf") and isinstance(w, torch.Tensor)
            and w.dim() == 2 and int(w.shape[1]) == int(module.nf))


def _attention_projections(name: str, mha: nn.MultiheadAttention) -> list[LayerRecord]:
    """The q/k/v projection weights of ``nn.MultiheadAttention``, listed as skipped: the module reads
    them directly (packed ``in_proj_weight``, or ``q/k/v_proj_weight`` when kdim/vdim differ), so
    there is no Linear to replace."""
    from .torch_attention import why_not

    reason = why_not(mha) or ("q/k/v projection read directly by nn.MultiheadAttention (compress and inspect "
                              "convert the module into four linear projections first)")
    weights = ([("in_proj", mha.in_proj_weight)] if mha.in_proj_weight is not None else
               [(p, getattr(mha, f"{p}_weight")) for p in ("q_proj", "k_proj", "v_proj")])
    out = []
    for suffix, w in weights:
        if w is None:
            continue
        out.append(LayerRecord(f"{name}.{suffix}" if name else suffix, "linear", tuple(w.shape),
                               (int(w.shape[0]), int(w.shape[1])), mha.in_proj_bias is not None,
                               str(w.dtype).removeprefix("torch."), skip_reason=reason, handle=mha))
    return out


OVERRIDE_REASON = ("class {cls} overrides forward(); two plain factors would not compute what it computes "
                   "(give --heldout or --calibration data to check it on real inputs)")
OVERRIDE_MISMATCH = ("class {cls} overrides forward() and its output differs from {base}'s on the sample "
                     "inputs (largest relative difference {diff:.2g}), so two plain factors would change it")


def _skip_reason(name, module, record, parent, owners, names, only, skip) -> str | None:
    if only and not _matches(name, only):
        return f"not matched by --only {' '.join(repr(p) for p in only)}"
    if skip and _matches(name, skip):
        return f"excluded by --skip {' '.join(repr(p) for p in skip if fnmatch.fnmatchcase(name, p))}"
    if isinstance(parent, nn.MultiheadAttention):
        return "read directly by its parent MultiheadAttention, so replacing it would have no effect"
    if module._forward_hooks or module._forward_pre_hooks:
        return "has forward hooks, which a replacement would drop"
    if len(names) > 1:
        return f"the same module is reachable as {', '.join(repr(n) for n in names)} (an alias)"
    own = module._parameters.get("weight")  # None for a parametrized weight (weight_norm etc.)
    if own is not None and len(owners.get(id(own), [])) > 1:
        others = [p.removesuffix(".weight") for p in owners[id(own)] if p != f"{name}.weight"]
        return f"weight is shared with {', '.join(repr(o) for o in others)} (tied weights)"
    if not module.weight.dtype.is_floating_point:
        return f"weight dtype {record.dtype} is not floating point"
    groups = record.options.get("groups", 1)
    if groups != 1:
        cin = record.weight_shape[1] * groups
        if groups == cin:
            return f"depthwise convolution (groups = in_channels = {groups}) has no cross-channel matrix to split"
        return f"grouped convolution (groups={groups}) is not one matrix"
    m, n = record.matrix_shape
    if max_saving_rank(m, n) < 1:
        return f"matrix {m}x{n} has break-even rank {m * n // (m + n)}: no rank would save parameters"
    base = next((cls for cls in _KINDS if isinstance(module, cls)), None)
    if base is not None and type(module).forward is not base.forward:
        return OVERRIDE_REASON.format(cls=type(module).__name__)
    return None


def weight_matrix(record: LayerRecord) -> np.ndarray:
    """The matrix view in float64: (out, in) or (out_channels, in_channels*kh*kw). A NaN or Inf in
    the layer's bias is refused here too (ValueError naming it), as the weight's are by the core."""
    bias = getattr(record.handle, "bias", None)
    if isinstance(bias, torch.Tensor) and not bool(torch.isfinite(bias).all()):
        bad = int((~torch.isfinite(bias)).sum())
        raise ValueError(f"layer {record.name!r}: bias has {bad} NaN or Inf value(s)")
    w = record.handle.weight.detach()
    if record.options.get("transposed"):
        w = w.T
    return w.reshape(w.shape[0], -1).to(device="cpu", dtype=torch.float64).numpy()


# ---------------------------------------------------------------- rewriting


def _factor_pair(module: nn.Module, record: LayerRecord, a: np.ndarray, x: np.ndarray) -> FactorPair:
    """Build the two thin modules from factors A (out, k) and X (k, in*kh*kw)."""
    rank = a.shape[1]
    w = module.weight
    kw = {"device": w.device, "dtype": w.dtype}
    m = record.matrix_shape[0]
    if record.kind == "linear":
        reduce = nn.Linear(record.matrix_shape[1], rank, bias=False, **kw)
        expand = nn.Linear(rank, m, bias=module.bias is not None, **kw)
    else:
        conv = nn.Conv1d if record.kind == "conv1d" else nn.Conv2d
        reduce = conv(module.in_channels, rank, module.kernel_size, stride=module.stride,
                      padding=module.padding, dilation=module.dilation, bias=False,
                      padding_mode=module.padding_mode, **kw)
        expand = conv(rank, m, 1, bias=module.bias is not None, **kw)
    with torch.no_grad():
        reduce.weight.copy_(torch.from_numpy(x).reshape(reduce.weight.shape))  # (k, cin, kh, kw)
        expand.weight.copy_(torch.from_numpy(a).reshape(expand.weight.shape))  # (out, k, 1, 1)
        if module.bias is not None:
            expand.bias.copy_(module.bias.detach())
    pair = FactorPair(reduce, expand, rank)
    pair.train(module.training)
    return pair


def _set_submodule(root: nn.Module, name: str, new: nn.Module) -> None:
    parent_name, _, child = name.rpartition(".")
    parent = root.get_submodule(parent_name) if parent_name else root
    setattr(parent, child, new)


def rewrite(
    model: nn.Module,
    records: Iterable[LayerRecord],
    factors: dict[str, tuple[np.ndarray, np.ndarray]],
    *,
    in_place: bool = False,
) -> nn.Module:
    """``model`` with each layer in ``factors`` replaced by its :class:`FactorPair`.

    By default a copy: the user's ``model`` is not modified, and the layers being replaced are not
    copied first (they would be thrown away), so the peak is one model plus the factors. With
    ``in_place`` the given model (a working copy) is patched. ``factors[name] = (A, X)`` with
    A (out, k), X (k, n).
    """
    by_name = {r.name: r for r in records}
    for name, (a, x) in factors.items():
        m, n = by_name[name].matrix_shape
        if a.shape[0] != m or x.shape[1] != n or a.shape[1] != x.shape[0]:
            raise ValueError(f"layer {name!r}: factors {a.shape} @ {x.shape} do not make its {m}x{n} matrix")
    if in_place:
        new = model
    else:
        # deepcopy's memo maps each replaced module to a placeholder, so its weights are never copied
        memo = {id(model.get_submodule(name)): nn.Identity() for name in factors}
        new = copy.deepcopy(model, memo)
    for name, (a, x) in factors.items():
        old = model.get_submodule(name) if not in_place else new.get_submodule(name)
        if isinstance(old, FactorPair):  # a refit of a layer already split in this working copy
            old = by_name[name].handle
        _set_submodule(new, name, _factor_pair(old, by_name[name], a, x))
        _no_fast_path(new, name)
    return new


def _no_fast_path(root: nn.Module, name: str) -> None:
    """Turn off PyTorch's fused eval-mode path in the ``nn.TransformerEncoderLayer`` that holds a
    replaced layer: that path reads ``linear1.weight`` and ``linear2.weight`` directly, which a
    factor pair does not have. Only that layer is affected; its regular path computes the same
    function (the flag only gates the fused kernel, ``activation`` is unchanged)."""
    parts = name.split(".")
    for i in range(len(parts) - 1, 0, -1):
        module = root.get_submodule(".".join(parts[:i]))
        if isinstance(module, nn.TransformerEncoderLayer):
            module.activation_relu_or_gelu = False


def skeleton(model: nn.Module, records: Iterable[LayerRecord], ranks: dict[str, int]) -> nn.Module:
    """A copy of ``model`` with factor pairs of the given ranks (weights to be loaded)."""
    by_name = {r.name: r for r in records}
    factors = {}
    for name, rank in ranks.items():
        m, n = by_name[name].matrix_shape
        factors[name] = (np.zeros((m, rank)), np.zeros((rank, n)))
    return rewrite(model, by_name.values(), factors)


def count_params(model: nn.Module) -> int:
    """Parameters of the model, each shared tensor counted once."""
    seen = {}
    for p in model.parameters():
        seen[id(p)] = p.numel()
    return int(sum(seen.values()))


def save_weights(model: nn.Module, path: str | Path) -> None:
    from safetensors.torch import save_model

    save_model(model, str(path))


def load_saved_weights(model: nn.Module, path: str | Path) -> None:
    from safetensors.torch import load_model

    load_model(model, str(path), strict=True)


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
    if not isinstance(x, dict):
        return model(x)
    positional = sorted((k for k in x if k.isdigit()), key=int)
    return model(*(x[k] for k in positional), **{k: v for k, v in x.items() if not k.isdigit()})


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
    with inference(model):
        return _to_numpy(call(model, inputs), output)


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


def measure_positions(model: nn.Module, records: list[LayerRecord], sample: np.ndarray) -> int:
    """Set each record's output positions per sample by one forward pass on one sample: 1 for a
    linear layer on (N, in), T for (N, T, in), the output length or area for a convolution; a
    layer called several times per forward counts every call. Returns an estimate of the activation
    memory one sample needs: :data:`LIVE_OUTPUTS` times the largest module output, at most the sum of
    all module outputs. Without gradients a module's output is freed once the next ones have read it,
    so the sum overstates the peak many times: EfficientNet-Lite0's outputs sum to 391 MiB a sample
    while a batch of 16 (64) grew the process by 8 (14) MiB a sample, and its largest output is
    4.7 MiB (measured)."""
    hooks = []
    total = [0]
    largest = [0]

    def count(module, args, output):
        if isinstance(output, torch.Tensor):
            size = output.numel() * output.element_size()
            total[0] += size
            largest[0] = max(largest[0], size)

    overridden = [r for r in records if r.skip_reason is not None and r.options.get("check_forward")]
    differences = {r.name: [] for r in overridden}
    why = {}  # record name -> why the base class's output could not be compared (first seen)
    bases = {r.name: next(cls for cls in _KINDS if isinstance(r.handle, cls)) for r in overridden}
    for record in overridden:  # does the base class compute the same on these real inputs?
        base = bases[record.name]

        def compare(module, args, output, record=record, base=base):
            if len(args) != 1 or not isinstance(output, torch.Tensor):
                why.setdefault(record.name, f"it is called with {len(args)} positional inputs" if len(args) != 1
                               else f"it returns a {type(output).__name__}, not a tensor")
                differences[record.name].append(float("inf"))
                return
            try:
                plain = base.forward(module, args[0])
            except Exception as exc:
                why.setdefault(record.name, f"{base.__name__}.forward fails on its inputs ({type(exc).__name__})")
                differences[record.name].append(float("inf"))
                return
            if plain.shape != output.shape:  # e.g. padding of its own
                why.setdefault(record.name, f"its output shape {tuple(output.shape)} is not {base.__name__}'s "
                                            f"{tuple(plain.shape)} on the sample inputs")
                differences[record.name].append(float("inf"))
                return
            scale = float(output.abs().max()) if output.numel() else 0.0
            differences[record.name].append(float((plain - output).abs().max()) / max(scale, 1e-30))

        hooks.append(record.handle.register_forward_hook(compare))

    last = [None, None]  # the latest output of a candidate layer, and its record

    def scaled(module, args, name):  # an eval-mode BatchNorm reading that output directly
        if last[0] is not None and args and args[0] is last[0] and not module.training \
                and module.running_var is not None and last[1].row_scale is None \
                and args[0].dim() >= 2 and args[0].shape[1] == last[1].matrix_shape[0]:
            gamma = module.weight.detach().abs() if module.weight is not None else torch.ones_like(module.running_var)
            scale = (gamma / torch.sqrt(module.running_var.detach() + module.eps)).double().numpy()
            last[1].row_scale, last[1].scaled_by = scale, name
        last[0] = last[1] = None

    for bn_name, bn in model.named_modules():
        if isinstance(bn, nn.modules.batchnorm._BatchNorm):
            hooks.append(bn.register_forward_pre_hook(lambda m, a, name=bn_name: scaled(m, a, name)))

    produced = _trace_normalized_inputs(model, records, hooks)
    for record in records:
        if record.skip_reason is not None and record.name not in differences:
            continue
        record.positions = 0
        record.row_scale = record.scaled_by = None
        record.input_stats = record.input_from = None

        def hook(module, args, output, record=record):
            last[0], last[1] = (output, record) if isinstance(output, torch.Tensor) else (None, None)
            shape = output.shape
            if record.kind == "linear":
                record.positions += int(np.prod(shape[1:-1]))  # empty product: 1
            else:
                record.positions += int(np.prod(shape[2:]))

        hooks.append(record.handle.register_forward_hook(hook))
    hooks += [m.register_forward_hook(count) for m in model.modules() if not list(m.children())]
    rows = min(8 if overridden else 1, len(next(iter(sample.values())) if isinstance(sample, dict) else sample))
    _run_once(model, sample, hooks, rows=rows)
    total[0] = min(total[0], LIVE_OUTPUTS * largest[0]) // max(rows, 1)
    for record in records:
        if record.name in produced and record.positions is not None:
            record.input_stats, record.input_from = produced[record.name]
    for record in overridden:
        seen = differences[record.name]
        worst = max(seen) if seen else float("inf")
        base = bases[record.name]
        if seen and worst <= OVERRIDE_TOLERANCE:
            record.skip_reason = None  # the rewrite computes what the layer computed, on real inputs
            record.options["forward_checked"] = (f"{type(record.handle).__name__}.forward matched "
                                                 f"{base.__name__}.forward on {rows} sample input(s)")
        elif not seen:
            record.skip_reason = f"class {type(record.handle).__name__} overrides forward() and the sample never called it"
        elif record.name in why:
            record.skip_reason = (f"class {type(record.handle).__name__} overrides forward() and {why[record.name]}, "
                                  "so two plain factors would change it")
        else:
            record.skip_reason = OVERRIDE_MISMATCH.format(cls=type(record.handle).__name__, base=base.__name__,
                                                          diff=worst)
            record.positions = None
            record.row_scale = record.scaled_by = None
    return int(total[0])


# outputs of the largest size that may be alive at once in an inference pass (a block's input, its
# output, a skip connection, the scores and probabilities of attention; common practice, with margin)
LIVE_OUTPUTS = 6

# traced tensors kept alive at once while finding BatchNorm -> activation -> layer chains
TRACE_WINDOW = 6

# elementwise activations an input prior passes through (applied to quadrature points as they are)
_ELEMENTWISE = (nn.ReLU, nn.ReLU6, nn.LeakyReLU, nn.ELU, nn.SELU, nn.CELU, nn.GELU, nn.SiLU, nn.Hardswish,
                nn.Hardsigmoid, nn.Hardtanh, nn.Sigmoid, nn.Tanh, nn.Mish, nn.Softplus)
_PASS = (nn.Identity, nn.Dropout, nn.Flatten)  # eval mode: the values pass unchanged
_POOL = (nn.AdaptiveAvgPool1d, nn.AdaptiveAvgPool2d, nn.AdaptiveAvgPool3d, nn.AvgPool1d, nn.AvgPool2d, nn.AvgPool3d)
# E over N(0, 1) by the trapezoid rule on a fine grid: activations have kinks (ReLU, ReLU6), where
# Gauss-Hermite nodes converge slowly (64 of them were 0.6% off a ReLU's mean; measured)
_NODES = np.linspace(-10.0, 10.0, 4001)
_WEIGHTS = np.exp(-0.5 * _NODES ** 2)
_WEIGHTS = _WEIGHTS / _WEIGHTS.sum()


def activation_moments(beta: np.ndarray, gamma: np.ndarray, act: nn.Module | None) -> tuple[np.ndarray, np.ndarray]:
    """Mean and variance of ``act(z)`` per channel for ``z ~ N(beta, gamma^2)``, by quadrature on
    4001 points (the activation module itself is evaluated at them)."""
    z = torch.from_numpy(beta[None, :] + np.abs(gamma)[None, :] * _NODES[:, None])  # (points, C) float64
    with torch.no_grad():
        f = (act(z.clone()) if act is not None else z).double().numpy()
    mean = _WEIGHTS @ f
    return mean, np.maximum(_WEIGHTS @ (f * f) - mean * mean, 0.0)


def _input_statistics(bn, act, taps: int) -> tuple[np.ndarray, np.ndarray, int]:
    """(mean and variance per channel of ``act`` over the BatchNorm's N(beta, gamma^2), kernel
    taps); computed only when a layer's truncation uses them (--bn-inputs), not on every discovery."""
    channels = int(bn.running_var.numel())
    gamma = bn.weight.detach().double().numpy() if bn.weight is not None else np.ones(channels)
    beta = bn.bias.detach().double().numpy() if bn.bias is not None else np.zeros(channels)
    mean, var = activation_moments(beta, gamma, act)
    return mean, var, taps


def _key(t: torch.Tensor) -> tuple:
    return (t.data_ptr(), t.numel(), t.dtype)


def _trace_normalized_inputs(model: nn.Module, records: list[LayerRecord], hooks: list) -> dict:
    """Hooks that, during the next forward pass, find the layers whose input is an eval-mode
    BatchNorm's output, possibly through one elementwise activation module, average pooling and
    pass-through modules (dropout, flatten; a view of the same storage counts as the same tensor).
    The returned dict fills after the pass: ``{layer name: (a call giving (mean and variance
    per input channel, kernel taps), "bn -> act -> pool")}``, the statistics an eval-mode BatchNorm
    promises on the data it was trained on: its output is N(beta, gamma^2) per channel under the usual Gaussian reading, which the
    activation maps as :func:`activation_moments` computes (independent channels assumed).
    Average pooling keeps the mean; the variance is kept as an upper bound (the spatial correlation
    is unknown)."""
    chains: dict[tuple, tuple] = {}  # tensor key -> (bn module, bn name, activation, path)
    # the latest TRACE_WINDOW traced tensors, kept alive so that their storage is not reused while
    # their keys are in ``chains``; an older one leaves with its key (a chain is read by the next
    # few modules), so the trace holds a few outputs, never every one of a deep model
    alive: dict[tuple, torch.Tensor] = {}
    found: dict[str, tuple] = {}

    def track(output: torch.Tensor, chain: tuple) -> None:
        key = _key(output)
        alive.pop(key, None)  # an in-place step keeps the key: it moves to the newest place
        chains[key], alive[key] = chain, output
        if len(alive) > TRACE_WINDOW:
            oldest = next(iter(alive))
            del alive[oldest], chains[oldest]

    def on_bn(module, args, output, name):
        if not module.training and module.running_var is not None and isinstance(output, torch.Tensor):
            track(output, (module, name, None, name))

    def on_step(module, args, output, name):
        if not args or not isinstance(args[0], torch.Tensor) or not isinstance(output, torch.Tensor):
            return
        src = chains.get(_key(args[0]))
        if src is None:
            return
        bn, bn_name, act, path = src
        if isinstance(module, _ELEMENTWISE):
            if act is not None or "pool" in path:  # one activation, before any pooling
                return
            track(output, (bn, bn_name, module, f"{path} -> {name}"))
        elif isinstance(module, _POOL):
            track(output, (bn, bn_name, act, f"{path} -> {name} (pool)"))
        else:
            track(output, src)

    def on_layer(module, args, record):
        if record.name in found or not args or not isinstance(args[0], torch.Tensor):
            return
        x = args[0]
        src = chains.get(_key(x))
        if src is None:
            return
        bn, _, act, path = src
        channels = int(bn.running_var.numel())
        wanted = record.handle.in_channels if record.kind != "linear" else record.handle.in_features
        if channels != wanted or getattr(record.handle, "groups", 1) != 1 or \
                (record.kind == "linear" and x.dim() != 2):
            return
        taps = 1 if record.kind == "linear" else int(np.prod(record.handle.kernel_size))
        found[record.name] = (functools.partial(_input_statistics, bn, act, taps), path)

    for name, module in model.named_modules():
        if isinstance(module, nn.modules.batchnorm._BatchNorm):
            hooks.append(module.register_forward_hook(lambda m, a, o, name=name: on_bn(m, a, o, name)))
        elif isinstance(module, _ELEMENTWISE + _PASS + _POOL):
            hooks.append(module.register_forward_hook(lambda m, a, o, name=name: on_step(m, a, o, name)))
    for record in records:
        hooks.append(record.handle.register_forward_pre_hook(lambda m, a, record=record: on_layer(m, a, record)))
    hooks.append(_Release(alive, chains))
    return found


class _Release:
    """Drops the traced tensors when the hooks are removed (after the pass)."""

    def __init__(self, alive: dict, chains: dict):
        self.alive, self.chains = alive, chains

    def remove(self) -> None:
        self.alive.clear()
        self.chains.clear()


# largest relative difference at which an overridden forward() counts as the base class's: float32
# round-off of the same arithmetic done in another order (common practice)
OVERRIDE_TOLERANCE = 1e-5


def normalize(model: nn.Module) -> nn.Module:
    """``nn.MultiheadAttention`` modules become :class:`~.torch_attention.SplitAttention` (same
    function, four ``nn.Linear`` projections) in a copy; a model without any is returned as is."""
    from .torch_attention import split_attention

    return split_attention(model)


def replacement_errors(model: nn.Module, records: dict, trials, batches: list, output: str | None = None):
    """For each ``(name, a, x)`` in ``trials``: the model's output with layer ``name`` alone replaced
    by the factor pair (A, X), everything else exact, against the original output on ``batches``.
    Yields ``(squared error, squared norm of the original output)`` per trial. The layer is not
    copied or rewritten: a forward hook on it returns the pair's output instead of its own."""
    with inference(model):
        reference = [select_output(call(model, b), output).double() for b in batches]
        energy = float(sum(float((r * r).sum()) for r in reference))
        for name, a, x in trials:
            record = records[name]
            pair = _factor_pair(record.handle, record, a.astype(np.float32), x.astype(np.float32))
            pair.eval()
            handle = record.handle.register_forward_hook(lambda m, args, out, pair=pair: pair(args[0]))
            try:
                err = 0.0
                for b, ref in zip(batches, reference):
                    diff = select_output(call(model, b), output).double() - ref
                    err += float((diff * diff).sum())
            finally:
                handle.remove()
            yield err, energy


def stream_layer_outputs(original: nn.Module, factorized: nn.Module, names: list[str], batches, sink) -> None:
    """For each batch and each call of each layer in ``names``: ``sink(name, exact, approx)``, the
    original layer's output and its factor pair's output on the same inputs (numpy arrays)."""
    hooks = []
    for name in names:
        pair = factorized.get_submodule(name)

        def hook(module, args, output, name=name, pair=pair):
            sink(name, output.detach().numpy(), pair(args[0]).detach().numpy())

        hooks.append(original.get_submodule(name).register_forward_hook(hook))
    try:
        with inference(original), inference(factorized):
            for batch in batches:
                call(original, batch)
    finally:
        for h in hooks:
            h.remove()


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


# ---------------------------------------------------------------- calibration inputs

#: Bytes of unfolded convolution patches materialized at once (the unfold is chunked over samples).
UNFOLD_CHUNK_BYTES = 64 * 2**20


def layer_rows(record: LayerRecord, x: torch.Tensor) -> Iterator[torch.Tensor]:
    """The layer's input as rows of its matrix view's input space, float64, in chunks:
    (rows, in) for a linear layer, (rows, in_channels*kh*kw) unfolded patches for a convolution
    (geometry from the original module, ``record.handle``). Patch columns are ordered
    (channel, kh, kw) like ``weight.reshape(out, -1)``."""
    x = x.detach()
    if record.kind == "linear":
        yield x.reshape(-1, x.shape[-1]).double()
        return
    module = record.handle
    conv2d = record.kind == "conv2d"
    if not conv2d:  # (N, C, L) -> (N, C, 1, L)
        x = x.unsqueeze(2)
    kernel = module.kernel_size if conv2d else (1, module.kernel_size[0])
    dilation = module.dilation if conv2d else (1, module.dilation[0])
    stride = module.stride if conv2d else (1, module.stride[0])
    pads = module._reversed_padding_repeated_twice  # (left, right, top, bottom), 'same' resolved
    if not conv2d:
        pads = list(pads) + [0, 0]
    mode = "constant" if module.padding_mode == "zeros" else module.padding_mode
    n = record.matrix_shape[1]
    per_sample = max(n * 8 * max(x[:1].numel() // max(x.shape[1], 1), 1), 1)
    step = max(1, UNFOLD_CHUNK_BYTES // per_sample)
    for start in range(0, x.shape[0], step):
        chunk = torch.nn.functional.pad(x[start : start + step].double(), list(pads), mode=mode)
        cols = torch.nn.functional.unfold(chunk, kernel, dilation=dilation, stride=stride)  # (N, n, L)
        yield cols.transpose(1, 2).reshape(-1, n)


def stream_inputs(model: nn.Module, records: list[LayerRecord], batches, sink) -> int:
    """Run ``model`` on every batch; at each call of each record's layer, ``sink(name, rows)`` for
    every block of its input rows (float64 numpy, see :func:`layer_rows`). Nothing is kept between
    calls. Returns the number of samples."""
    hooks = []
    for record in records:
        def hook(module, args, output, record=record):
            for rows in layer_rows(record, args[0]):
                sink(record.name, rows.numpy())

        hooks.append(model.get_submodule(record.name).register_forward_hook(hook))
    samples = 0
    try:
        with inference(model):
            for batch in batches:
                call(model, batch)
                samples += rows(batch)
    finally:
        for h in hooks:
            h.remove()
    return samples


class _Enough(Exception):
    """Raised by a hook to end a forward pass once every layer of interest has run."""


def stream_paired_inputs(original, current, records: list[LayerRecord], batches, sink, *, modules=None) -> int:
    """Run both models on every batch; for each call of each record's layer, ``sink(name, x, x_new)``
    with paired row blocks: its input in ``original`` and in ``current`` (the same model with
    layers already split) on the same samples. Per batch, the original's inputs of the records'
    layers are held until ``current`` reaches the same call (the batch size bounds this). When
    every record knows its ``calls`` per pass (:func:`call_stages`), each forward pass stops as
    soon as all of them have run, so fitting early layers does not pay for the whole model.

    With ``modules=(original module, current module)``, ``original`` and ``current`` are instead
    callables ``f(hidden, args, kwargs)`` run on cached block inputs, and ``batches`` yields
    ``(original hidden, current hidden, args, kwargs)`` (see :class:`PairedRuns`)."""
    held: dict[str, list] = {r.name: [] for r in records}
    used: dict[str, int] = {r.name: 0 for r in records}
    expected = sum(r.calls for r in records) if all(r.calls for r in records) else None
    seen = [0, 0]
    hooks = []

    def tick(which: int) -> None:
        seen[which] += 1
        if expected is not None and seen[which] >= expected:
            raise _Enough

    owners = modules or (original, current)
    for record in records:
        def keep(module, args, output, name=record.name):
            held[name].append(args[0].detach())
            tick(0)

        def pair(module, args, output, record=record):
            i = used[record.name]
            used[record.name] += 1
            x, held[record.name][i] = held[record.name][i], None  # freed as soon as it is used
            for a, b in zip(layer_rows(record, x), layer_rows(record, args[0])):
                sink(record.name, a.numpy(), b.numpy())
            tick(1)

        hooks.append(owners[0].get_submodule(record.name).register_forward_hook(keep))
        hooks.append(owners[1].get_submodule(record.name).register_forward_hook(pair))
    samples = 0
    try:
        with inference(owners[0]), inference(owners[1]):
            for batch in batches:
                for name in held:
                    held[name].clear()
                    used[name] = 0
                seen[:] = [0, 0]
                if modules is None:
                    runs = [(lambda b=batch: call(original, b), ()), (lambda b=batch: call(current, b), ())]
                    size = rows(batch)
                else:
                    h_orig, h_cur, (o_args, o_kwargs), (c_args, c_kwargs) = batch
                    runs = [(original, (h_orig, o_args, o_kwargs)), (current, (h_cur, c_args, c_kwargs))]
                    size = h_orig.shape[0]
                for run, run_args in runs:
                    try:
                        run(*run_args)
                    except _Enough:
                        pass
                samples += size
    finally:
        for h in hooks:
            h.remove()
    return samples


def _hidden(out):
    """The hidden state a block hands on: the output itself, or the first element of a tuple."""
    return out if isinstance(out, torch.Tensor) else (out[0] if isinstance(out, (tuple, list)) and out else None)


def paired_runs(original: nn.Module, current: nn.Module, records: list[LayerRecord], batches: list) -> "PairedRuns":
    """The runner of a sequential refit's paired passes (see :class:`PairedRuns`)."""
    return PairedRuns(original, current, records, batches)


def _stateless(value) -> bool:
    """Arguments a block may be replayed with: tensors, plain values, and tuples of them. A cache
    object (transformers' key/value caches) changes at every call, so replaying it is wrong."""
    if value is None or isinstance(value, (torch.Tensor, bool, int, float, str)):
        return True
    if isinstance(value, (tuple, list)):
        return all(_stateless(v) for v in value)
    return False


def find_chain(model: nn.Module, records: list[LayerRecord], sample) -> tuple[list[str], dict[str, int]] | None:
    """The chain of blocks holding most of the records, if the model has one: the children of one
    ``nn.Sequential`` or ``nn.ModuleList``, each called once per forward pass, each fed the hidden
    state the one before returned (the same tensor object) and the same other arguments (masks
    and the like, the same objects; plain values such as a per-block drop rate may differ, and are
    replayed per block). Returns (block names, {record name: block index}, {block index: (positional,
    keyword) plain values of its own}) or None. One forward pass on one sample."""
    inside = {}
    for cname, container in model.named_modules():
        if not isinstance(container, (nn.Sequential, nn.ModuleList)) or len(container) < 2:
            continue
        prefix = f"{cname}." if cname else ""
        blocks = [f"{prefix}{n}" for n, _ in container.named_children()]
        owned = {r.name: i for r in records for i, b in enumerate(blocks) if r.name.startswith(b + ".")}
        if len(owned) > len(inside.get("owned", {})):
            inside = {"blocks": blocks, "owned": owned}
    if not inside or len(inside["owned"]) < 2:
        return None
    blocks = inside["blocks"]
    seen: dict[int, list] = {}

    def pre(module, args, kwargs, i):
        seen.setdefault(i, []).append((args, kwargs, None))

    def post(module, args, kwargs, output, i):
        a, k, _ = seen[i][-1]
        seen[i][-1] = (a, k, _hidden(output))

    hooks = []
    for i, b in enumerate(blocks):
        mod = model.get_submodule(b)
        hooks.append(mod.register_forward_pre_hook(lambda m, a, k, i=i: pre(m, a, k, i), with_kwargs=True))
        hooks.append(mod.register_forward_hook(lambda m, a, k, o, i=i: post(m, a, k, o, i), with_kwargs=True))
    try:
        _run_once(model, sample, hooks)
    except Exception:
        return None
    if sorted(seen) != list(range(len(blocks))) or any(len(v) != 1 for v in seen.values()):
        return None
    first_args, first_kwargs, _ = seen[0][0]
    if not first_args or not isinstance(first_args[0], torch.Tensor):
        return None
    own: dict[int, tuple[dict, dict]] = {}  # per block: plain values it gets instead of the first block's
    for i in range(len(blocks)):
        args, kwargs, _ = seen[i][0]
        if i and (not args or args[0] is not seen[i - 1][0][2]):
            return None
        if len(args) != len(first_args) or kwargs.keys() != first_kwargs.keys() \
                or not all(_stateless(x) for x in list(args[1:]) + list(kwargs.values())):
            return None
        pos, kw = {}, {}
        for j, (x, y) in enumerate(zip(args[1:], first_args[1:]), start=1):
            if x is not y:
                if not (_plain(x) and _plain(y)):
                    return None
                pos[j] = x
        for k in kwargs:
            if kwargs[k] is not first_kwargs[k]:
                if not (_plain(kwargs[k]) and _plain(first_kwargs[k])):
                    return None
                kw[k] = kwargs[k]
        if pos or kw:
            own[i] = (pos, kw)
    return blocks, inside["owned"], own


def _plain(value) -> bool:
    """A value a block may get per block (a drop rate, a layer index): replayed as recorded."""
    return value is None or isinstance(value, (bool, int, float, str))


class PairedRuns:
    """Paired passes of ``original`` and ``current`` over the calibration batches, group after
    group in forward order (the sequential refit patches ``current`` in place in between).

    When the model is a chain of blocks (:func:`find_chain`), the hidden state entering a block is
    kept for every calibration batch, for both models, so a group inside blocks a..b runs only
    those blocks, and moving on runs each block once more: the passes of a whole refit cost about
    (groups per block + 1) runs of each block, linear in depth. Layers outside the chain, or a
    model without one, get whole-model passes (stopped once the group has run)."""

    def __init__(self, original: nn.Module, current: nn.Module, records: list[LayerRecord], batches: list,
                 cache_bytes: int = 1 << 30):
        self.original, self.current, self.batches = original, current, batches
        found = find_chain(original, records, batches[0]) if batches else None
        self.blocks, self.block_of, self.own = found if found else ([], {}, {})
        self.cache = None  # [(orig hidden, current hidden, (args, kwargs) orig, (args, kwargs) current)] per batch
        self.at = 0
        self.cache_bytes = cache_bytes

    def stream(self, records: list[LayerRecord], sink) -> int:
        """``sink(name, x, x_new)`` for every row block of every record's input, as
        :func:`stream_paired_inputs`. Returns the number of samples."""
        idx = [self.block_of.get(r.name) for r in records]
        if not self.blocks or any(i is None for i in idx) or min(idx) < self.at:
            return stream_paired_inputs(self.original, self.current, records, self.batches, sink)
        if self.cache is None and not self._capture():
            self.blocks = []
            return stream_paired_inputs(self.original, self.current, records, self.batches, sink)
        self._advance(min(idx))
        span = [(self.original.get_submodule(b), self.current.get_submodule(b), self.own.get(i))
                for i, b in enumerate(self.blocks) if min(idx) <= i <= max(idx)]
        runner_orig = lambda h, a, k: self._run(span, 0, h, a, k)  # noqa: E731
        runner_cur = lambda h, a, k: self._run(span, 1, h, a, k)  # noqa: E731
        return stream_paired_inputs(runner_orig, runner_cur, records, self._replay(), sink,
                                    modules=(self.original, self.current))

    @staticmethod
    def _run(span, which, h, args, kwargs):
        h = h.clone()  # a block may change its input in place; the cached copy must stay as it was
        for orig, cur, own in span:
            a, k = args, kwargs
            if own:  # this block's own plain values (find_chain)
                a = tuple(own[0].get(j, v) for j, v in enumerate(args, start=1))
                k = {**kwargs, **own[1]}
            h = _hidden((orig, cur)[which](h, *a, **k))
        return h

    def _replay(self):
        yield from self.cache

    def _capture(self) -> bool:
        """The hidden state (and other arguments) entering the first block, per batch, per model."""
        first = (self.original.get_submodule(self.blocks[0]), self.current.get_submodule(self.blocks[0]))
        cache, total = [], 0
        for batch in self.batches:
            got = []
            for model, block in zip((self.original, self.current), first):
                box = {}

                def grab(m, a, k, box=box):
                    box["a"], box["k"] = a, k
                    raise _Enough

                h = block.register_forward_pre_hook(grab, with_kwargs=True)
                try:
                    with inference(model):
                        call(model, batch)
                except _Enough:
                    pass
                finally:
                    h.remove()
                got.append(box)
            total += 2 * got[0]["a"][0].numel() * got[0]["a"][0].element_size()
            if total > self.cache_bytes:
                return False
            cache.append((got[0]["a"][0], got[1]["a"][0], (got[0]["a"][1:], got[0]["k"]),
                          (got[1]["a"][1:], got[1]["k"])))
        self.cache = cache
        return True

    def _advance(self, to: int) -> None:
        """Run blocks ``at`` .. ``to - 1`` on both cached hidden states (refits included)."""
        if to <= self.at:
            return
        span = [(self.original.get_submodule(b), self.current.get_submodule(b), self.own.get(i))
                for i, b in enumerate(self.blocks) if self.at <= i < to]
        with inference(self.original), inference(self.current):
            self.cache = [(self._run(span, 0, o, *oe), self._run(span, 1, c, *ce), oe, ce)
                          for o, c, oe, ce in self.cache]
        self.at = to


def call_stages(model: nn.Module, records: list[LayerRecord], sample: np.ndarray) -> list[list[str]]:
    """The records in the order one forward pass (on the first sample) first calls them, as stages:
    consecutive layers that read the very same input tensor (attention's q, k and v projections)
    share a stage, since none of them feeds another. Sets each record's ``calls`` (calls per
    forward pass). Records never called go last, one stage each."""
    order: list[str] = []
    keys: dict[str, tuple] = {}
    for r in records:
        r.calls = 0

    def hook(module, args, output, record):
        record.calls += 1
        if record.name not in keys:
            x = args[0]
            keys[record.name] = (x.data_ptr(), tuple(x.shape), tuple(x.stride()))
            order.append(record.name)

    hooks = [r.handle.register_forward_hook(lambda m, a, o, r=r: hook(m, a, o, r)) for r in records]
    _run_once(model, sample, hooks)
    stages: list[list[str]] = []
    for name in order:
        if stages and keys[stages[-1][-1]] == keys[name]:
            stages[-1].append(name)
        else:
            stages.append([name])
    return stages + [[r.name] for r in records if r.name not in keys]


def _run_once(model: nn.Module, sample: np.ndarray, hooks: list, rows: int = 1) -> None:
    """One forward pass on the first ``rows`` samples, then remove ``hooks`` whatever happens."""
    try:
        with inference(model):
            call(model, first_rows(sample, rows))
    finally:
        for h in hooks:
            h.remove()


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
