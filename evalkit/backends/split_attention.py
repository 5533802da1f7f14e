"""Attention over a shared prefix held once plus each row's own keys and values.

Every row of a batch continues the same prompt prefix. Copying the prefix's keys and values
into every row would make each decode step read them once per row; at a batch of 32 rows
and a 700-token few-shot prefix that is more memory traffic than the model's weights. Here
the prefix is kept once, [kv_heads, P, head_dim], and attention is taken in two parts:

* the queries of all rows meet the prefix in one call of torch's fused CPU attention kernel
  (the prefix is read once per layer and step, not once per row);
* each row's own tokens (prompt suffix and generated text) in a second, batched call.

Each part gives its output o and the log-sum-exp l of its scores, and softmax over
[prefix | own] regroups exactly into ``o_own + sigmoid(l_prefix - l_own) * (o_prefix -
o_own)``. No [B, heads, P + L] score tensor is built, masked or copied (measured here at 32
rows over a 475-token prefix: 1.3-2x faster than joining the scores before one softmax).

Models that cap attention scores with tanh (``softcap``, Gemma 2) cannot be split that way;
for them the scores of both parts are joined before one softmax (the eager formula; float32
softmax). Without a prefix the own tokens go through torch's fused attention directly.

transformers calls attention through a registry keyed by ``config._attn_implementation``;
the engine registers this function under ATTENTION_NAME and selects it only while it runs.
The cache (:class:`evalkit.backends.kvslab.Slab`) hands each layer its own-token keys and
values through ``update``; the prefix comes from the slab that is running, named in a
context variable for the duration of one forward call.
"""

from __future__ import annotations

import contextvars

import torch
from transformers import AttentionInterface

__all__ = ["ATTENTION_NAME", "active_slab", "split_attention"]

ATTENTION_NAME = "evalkit_split_prefix"

active_slab: contextvars.ContextVar = contextvars.ContextVar("evalkit_active_slab")


def split_attention(module, query, key, value, attention_mask, scaling=None, dropout=0.0,
                    softcap=None, **kwargs):
    """query [B, Hq, T, D]; key/value [B, Hkv, L, D] (own tokens); mask [B, 1, T, P + L] bool."""
    slab = active_slab.get()
    prefix = slab.prefix_kv[module.layer_idx] if slab.prefix_kv else None
    B, Hq, T, D = query.shape
    Hkv = key.shape[1]
    r = Hq // Hkv  # query heads per key/value head; head h = kv_head * r + j, as repeat_kv lays them
    scale = scaling if scaling is not None else D ** -0.5
    if softcap is None:
        if prefix is None:
            return _fused(query, key, value, attention_mask, scale)
        if _FLASH is not None:
            return _merged(query, key, value, prefix, attention_mask, scale)
    q = query.reshape(B, Hkv, r * T, D)
    scores = torch.matmul(q, key.transpose(-1, -2))                          # [B, Hkv, rT, L]
    P = 0
    if prefix is not None:
        pk, pv = prefix                                                      # [Hkv, P, D]
        P = pk.shape[1]
        qp = q.permute(1, 0, 2, 3).reshape(Hkv, B * r * T, D)
        sp = torch.matmul(qp, pk.transpose(-1, -2))                          # [Hkv, B*rT, P]
        sp = sp.reshape(Hkv, B, r * T, P).permute(1, 0, 2, 3)
        scores = torch.cat([sp, scores], dim=-1)                             # [B, Hkv, rT, P+L]
    scores = scores * scale
    if softcap is not None:
        scores = torch.tanh(scores / softcap) * softcap
    S = scores.shape[-1]
    allowed = attention_mask.reshape(B, 1, 1, T, S)
    scores = scores.reshape(B, Hkv, r, T, S).masked_fill(~allowed, float("-inf"))
    weights = torch.softmax(scores, dim=-1, dtype=torch.float32).to(query.dtype)
    weights = weights.reshape(B, Hkv, r * T, S)
    out = torch.matmul(weights[..., P:], value)                              # [B, Hkv, rT, D]
    if prefix is not None:
        wp = weights[..., :P].permute(1, 0, 2, 3).reshape(Hkv, B * r * T, P)
        out = out + torch.matmul(wp, pv).reshape(Hkv, B, r * T, D).permute(1, 0, 2, 3)
    return out.reshape(B, Hq, T, D).transpose(1, 2).contiguous(), None


# torch's CPU flash-attention kernel, which also returns each query's log-sum-exp of scores.
_FLASH = getattr(torch.ops.aten, "_scaled_dot_product_flash_attention_for_cpu", None)


def _flash(q, k, v, mask, scale):
    """Output and log-sum-exp of :data:`_FLASH`, its inputs laid out as it needs them.

    The kernel reads each head vector as contiguous: given a query, key or value whose last
    dimension has another stride, torch 2.13 returns wrong numbers without an error (seen
    here: a decode step's query, a view of a transposed product, gave outputs of 1e35; torch's
    fix is pytorch/pytorch#187506). Such inputs are copied first; the public
    ``scaled_dot_product_attention`` checks this itself and takes another kernel.
    """
    q, k, v = (t if t.stride(-1) == 1 else t.contiguous() for t in (q, k, v))
    return _FLASH(q, k, v, attn_mask=mask, scale=scale)[:2]


# Decode steps (one query per row) with at least this many rows take the own part as plain
# products (:func:`_plain`), fewer rows the fused kernel. Measured on SmolLM2-135M on this
# workplace's AVX-512 machine, per-step medians of decode steps over a 475-token prefix,
# variants alternated (138 steps each): at 128 rows 376 ms plain against 406 ms fused; at
# 32 / 64 / 96 rows 141 / 229 / 318 ms against 142 / 231 / 308 ms (no difference). On an earlier
# AVX2 machine the fused kernel was ahead by 1-3% at 4-128 rows (a step at 128 rows 242-246
# against 248-254 ms): the plain form spends as long in its softmax's small element-wise
# operations as in reading the keys, which pays only when there are many rows.
OWN_PLAIN_ROWS = 128


def _plain(q, k, v, additive, scale):
    """Output and log-sum-exp of softmax attention as plain products: q [B, H, t, D],
    k/v [B, H, L, D], additive mask [B, 1, t, L] (every row has a visible column)."""
    s = torch.matmul(q, k.transpose(-1, -2)).mul_(scale).add_(additive)  # [B, H, t, L]
    lse = torch.logsumexp(s, dim=-1)                                     # [B, H, t]
    return torch.matmul(s.sub_(lse[..., None]).exp_(), v), lse


def _additive(allowed: torch.Tensor, dtype) -> torch.Tensor:
    return torch.zeros(allowed.shape, dtype=dtype, device=allowed.device).masked_fill_(
        ~allowed, float("-inf"))


class _MaskParts:
    """What :func:`_merged` derives from one attention mask: the same for every layer that
    gets that mask, so it is built once per forward call (profiled here at 128 rows: built per
    layer, the checks and additive masks took about 5 ms of a 400 ms decode step)."""

    __slots__ = ("mask", "prefix", "hidden", "own")

    def __init__(self, attention_mask, P: int, r: int, dtype):
        B, _, T, S = attention_mask.shape
        L = S - P
        self.mask = attention_mask  # held, so the id it is filed under stays this mask's
        seen = attention_mask[..., :P]                                       # [B, 1, T, P]
        self.prefix = self.hidden = None
        if not bool(seen.all()):  # sliding-window layers may hide part of the prefix
            self.prefix = _additive(seen.expand(B, r, T, P).reshape(1, 1, B * r * T, P), dtype)
            # A query whose window has left the prefix entirely: that part must weigh nothing
            # (the kernel's output for an all-masked row is not defined as zero weight).
            hidden = ~seen.any(-1).expand(B, r, T).reshape(B, 1, r * T)      # [B, 1, rT]
            self.hidden = hidden if bool(hidden.any()) else None
        own = attention_mask[..., P:][:, :, None].expand(B, 1, r, T, L).reshape(B, 1, r * T, L)
        self.own = _additive(own, dtype)                                     # [B, 1, rT, L]


def _mask_parts(attention_mask, P: int, r: int, dtype) -> _MaskParts:
    """:class:`_MaskParts` of ``attention_mask``, kept with the running slab for the forward call."""
    slab = active_slab.get()
    parts = slab.mask_parts.get(id(attention_mask))
    if parts is None or parts.mask is not attention_mask:
        parts = slab.mask_parts[id(attention_mask)] = _MaskParts(attention_mask, P, r, dtype)
    return parts


def _merged(query, key, value, prefix, attention_mask, scale):
    """Prefix and own tokens attended separately, then merged by log-sum-exp (module notes)."""
    pk, pv = prefix
    B, Hq, T, D = query.shape
    Hkv, P = pk.shape[0], pk.shape[1]
    r = Hq // Hkv
    parts = _mask_parts(attention_mask, P, r, query.dtype)
    # Query order (row, head-in-group, token) within each key/value head, as repeat_kv lays heads.
    qp = query.reshape(B, Hkv, r * T, D).permute(1, 0, 2, 3).reshape(1, Hkv, B * r * T, D)
    o1, l1 = _flash(qp, pk[None], pv[None], parts.prefix, scale)
    o1 = o1.reshape(Hkv, B, r * T, D).permute(1, 0, 2, 3)                    # [B, Hkv, rT, D]
    l1 = l1.reshape(Hkv, B, r * T).permute(1, 0, 2)                          # [B, Hkv, rT]
    if parts.hidden is not None:
        l1 = l1.masked_fill(parts.hidden, float("-inf"))
        o1 = o1.masked_fill(parts.hidden[..., None], 0.0)
    q = query.reshape(B, Hkv, r * T, D)
    if T == 1 and B >= OWN_PLAIN_ROWS:
        o2, l2 = _plain(q, key, value, parts.own, scale)
    else:
        o2, l2 = _flash(q, key, value, parts.own, scale)
    w = torch.sigmoid(l1 - l2)[..., None].to(query.dtype)                   # log-sum-exps are float32
    out = o2 + w * (o1 - o2)
    return out.reshape(B, Hq, T, D).transpose(1, 2).contiguous(), None


def _fused(query, key, value, attention_mask, scale):
    """No shared prefix: torch's fused attention over each row's own tokens. Masks always
    leave each query one visible column, so no softmax row is empty."""
    out = torch.nn.functional.scaled_dot_product_attention(
        query, key, value, attn_mask=attention_mask, scale=scale,
        enable_gqa=query.shape[1] != key.shape[1])
    return out.transpose(1, 2).contiguous(), None


AttentionInterface.register(ATTENTION_NAME, split_attention)
