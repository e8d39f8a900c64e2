"""Layers and the rewrite: which linear and convolution modules can be split (and why the others
cannot), their weights as matrix views, and the factor pairs that replace them."""

from __future__ import annotations

import copy
import fnmatch
from collections import OrderedDict
from pathlib import Path
from typing import Iterable, Sequence

import numpy as np
import torch
from torch import nn

from ...errors import InputError
from ...records import LayerRecord, max_saving_rank

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
    from .attention import why_not

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


def weight_dtype(model: nn.Module) -> str:
    """The floating dtype most of the model's parameters are stored in (``"float32"``, ``"bfloat16"``, ...)."""
    counts: dict[str, int] = {}
    for p in {id(p): p for p in model.parameters()}.values():
        if p.is_floating_point():
            name = str(p.dtype).removeprefix("torch.")
            counts[name] = counts.get(name, 0) + p.numel()
    return max(counts, key=counts.get) if counts else "float32"


def save_weights(model: nn.Module, path: str | Path) -> None:
    from safetensors.torch import save_model

    save_model(model, str(path))


def load_saved_weights(model: nn.Module, path: str | Path) -> None:
    from safetensors.torch import load_model

    load_model(model, str(path), strict=True)




def normalize(model: nn.Module) -> nn.Module:
    """``nn.MultiheadAttention`` modules become :class:`~.attention.UnpackedAttention` (same
    function, four ``nn.Linear`` projections) in a copy; a model without any is returned as is."""
    from .attention import unpack_attention

    return unpack_attention(model)


def rebuild(model: nn.Module, folder: Path, layers: list[dict]) -> nn.Module:
    """The factorized model a result folder holds, from the original ``model`` (not modified) and
    the validated ``plan.json`` entries: the same conversion compress made (attention
    projections), factor pairs of the planned ranks, then ``model.safetensors`` loaded strictly."""
    weights = folder / "model.safetensors"
    if not weights.is_file():
        raise InputError(f"{folder}: no model.safetensors")
    model = normalize(model)
    records = {r.name: r for r in discover(model)}
    ranks = {}
    for entry in layers:
        name = entry["name"]
        record = records.get(name)
        if record is None:
            raise InputError(f"{folder}/plan.json: layer {name!r} is not in the model")
        if list(record.weight_shape) != list(entry["shape"]) or record.kind != entry["kind"]:
            raise InputError(
                f"{folder}/plan.json: layer {name!r} is {entry['kind']} {entry['shape']} in the plan but "
                f"{record.kind} {list(record.weight_shape)} in the model"
            )
        if entry["rank"] != "dense":
            rank = int(entry["rank"])
            if not 1 <= rank <= min(record.matrix_shape):
                raise InputError(
                    f"{folder}/plan.json: rank {rank} exceeds min(out, in) = {min(record.matrix_shape)} "
                    f"for layer {name!r}"
                )
            ranks[name] = rank
    rebuilt = skeleton(model, records.values(), ranks)
    try:
        load_saved_weights(rebuilt, weights)
    except Exception as exc:
        raise InputError(f"{weights}: does not match the plan ({type(exc).__name__}: {str(exc).splitlines()[0]})") from exc
    return rebuilt.eval()
