"""``nn.MultiheadAttention`` with its four projections as ``nn.Linear`` modules, so each can be split.

PyTorch's module reads its packed ``in_proj_weight`` (or ``q/k/v_proj_weight`` when ``kdim``/``vdim``
differ) and ``out_proj.weight`` directly inside ``F.multi_head_attention_forward``: no Linear is
called, so nothing can be replaced or hooked. :func:`unpack_attention` swaps each such module in a
copy of the model for a :class:`UnpackedAttention` that computes the same function (scaled dot-product
attention, Vaswani et al. 2017, with PyTorch's mask conventions) from four ``nn.Linear``
projections. The tool does this before discovery, so the projections are ordinary linear layers to
every later stage (calibration hooks, refits, rewrite, export); ``load_factorized`` does the same
before loading a result.

Not converted (listed as skipped with the reason): modules with ``bias_k``/``bias_v`` or
``add_zero_attn``, and modules with hooks.
"""

from __future__ import annotations

import copy
import math

import torch
import torch.nn.functional as F
from torch import nn


class UnpackedAttention(nn.Module):
    """The function of a given ``nn.MultiheadAttention`` with projections ``q_proj``, ``k_proj``,
    ``v_proj`` and ``out_proj`` (``nn.Linear``). Same call signature and return value."""

    def __init__(self, mha: nn.MultiheadAttention):
        super().__init__()
        e, h = mha.embed_dim, mha.num_heads
        self.embed_dim, self.num_heads, self.head_dim = e, h, e // h
        self.kdim, self.vdim = mha.kdim, mha.vdim
        self.batch_first = mha.batch_first
        self.dropout = mha.dropout
        # attributes PyTorch's transformer layers read to decide on their fused path: these values
        # make them take the regular path, which calls this module
        self._qkv_same_embed_dim = False
        self.in_proj_weight = None
        self.in_proj_bias = None
        ref = mha.out_proj.weight
        kw = {"device": ref.device, "dtype": ref.dtype}
        bias = mha.in_proj_bias is not None
        self.q_proj = nn.Linear(e, e, bias=bias, **kw)
        self.k_proj = nn.Linear(self.kdim, e, bias=bias, **kw)
        self.v_proj = nn.Linear(self.vdim, e, bias=bias, **kw)
        self.out_proj = nn.Linear(e, e, bias=mha.out_proj.bias is not None, **kw)
        with torch.no_grad():
            if mha._qkv_same_embed_dim:
                w = mha.in_proj_weight
                weights = (w[:e], w[e:2 * e], w[2 * e:])
            else:
                weights = (mha.q_proj_weight, mha.k_proj_weight, mha.v_proj_weight)
            for proj, w, i in zip((self.q_proj, self.k_proj, self.v_proj), weights, range(3)):
                proj.weight.copy_(w)
                if bias:
                    proj.bias.copy_(mha.in_proj_bias[i * e:(i + 1) * e])
            self.out_proj.weight.copy_(mha.out_proj.weight)
            if mha.out_proj.bias is not None:
                self.out_proj.bias.copy_(mha.out_proj.bias)
        self.train(mha.training)

    def forward(self, query, key, value, key_padding_mask=None, need_weights=True, attn_mask=None,
                average_attn_weights=True, is_causal=False):
        if is_causal and attn_mask is None:
            raise RuntimeError("Need attn_mask if specifying the is_causal hint")  # as PyTorch's module
        batched = query.dim() == 3
        if not batched:
            query, key, value = query.unsqueeze(1), key.unsqueeze(1), value.unsqueeze(1)
            if key_padding_mask is not None:
                key_padding_mask = key_padding_mask.unsqueeze(0)
        elif self.batch_first:
            query, key, value = query.transpose(0, 1), key.transpose(0, 1), value.transpose(0, 1)
        length, batch, e = query.shape
        source = key.shape[0]
        h, d = self.num_heads, self.head_dim
        q = self.q_proj(query).reshape(length, batch * h, d).transpose(0, 1)
        k = self.k_proj(key).reshape(source, batch * h, d).transpose(0, 1)
        v = self.v_proj(value).reshape(source, batch * h, d).transpose(0, 1)
        scores = torch.bmm(q, k.transpose(1, 2)) / math.sqrt(d)  # (N*H, L, S)
        if attn_mask is not None:
            mask = _additive(attn_mask, scores.dtype)
            scores = scores + (mask.unsqueeze(0) if mask.dim() == 2 else mask)
        if key_padding_mask is not None:
            pad = _additive(key_padding_mask, scores.dtype)  # (N, S)
            scores = scores + pad.view(batch, 1, 1, source).expand(-1, h, -1, -1).reshape(batch * h, 1, source)
        attn = torch.softmax(scores, dim=-1)
        weights = attn
        if self.training and self.dropout > 0:
            attn = F.dropout(attn, p=self.dropout)
        out = torch.bmm(attn, v).transpose(0, 1).reshape(length, batch, e)
        out = self.out_proj(out)
        if not batched:
            out = out.squeeze(1)
        elif self.batch_first:
            out = out.transpose(0, 1)
        if not need_weights:
            return out, None
        weights = weights.view(batch, h, length, source)
        if average_attn_weights:
            weights = weights.mean(dim=1)
        return out, (weights.squeeze(0) if not batched else weights)


def _additive(mask: torch.Tensor, dtype) -> torch.Tensor:
    """PyTorch's mask convention: a boolean mask is True where attention is *not* allowed; a float
    mask is added to the scores."""
    if mask.dtype == torch.bool:
        return torch.zeros(mask.shape, dtype=dtype, device=mask.device).masked_fill(mask, float("-inf"))
    return mask.to(dtype)


def why_not(mha: nn.MultiheadAttention) -> str | None:
    """Why this module is not converted (``None``: it is)."""
    if mha.bias_k is not None or mha.bias_v is not None:
        return "nn.MultiheadAttention with bias_k/bias_v is not converted; its projections stay dense"
    if mha.add_zero_attn:
        return "nn.MultiheadAttention with add_zero_attn is not converted; its projections stay dense"
    if mha._forward_hooks or mha._forward_pre_hooks:
        return "nn.MultiheadAttention has forward hooks, which a replacement would drop"
    return None


def unpack_attention(model: nn.Module) -> nn.Module:
    """``model`` itself when it has no convertible ``nn.MultiheadAttention``; else a copy with each
    one replaced by a :class:`UnpackedAttention` (the user's model is never modified)."""
    names = [n for n, m in model.named_modules() if isinstance(m, nn.MultiheadAttention) and why_not(m) is None]
    if not names:
        return model
    new = copy.deepcopy(model)
    for name in names:
        parent_name, _, child = name.rpartition(".")
        parent = new.get_submodule(parent_name) if parent_name else new
        setattr(parent, child, UnpackedAttention(new.get_submodule(name)))
    return new
