"""Attention over a shared prefix held once plus each row's own keys and values.

Every row of a batch continues the same prompt prefix. Copying the prefix's keys and values
into every row would make each decode step read them once per row; at a batch of 32 rows
and a 700-token few-shot prefix that is more memory traffic than the model's weights. Here
the prefix is kept once, [kv_heads, P, head_dim], and the queries of all rows meet it in a
single matrix product; each row's own tokens (prompt suffix and generated text) are a
separate, short per-row product. Scores of both parts are joined before one softmax, so the
result is ordinary attention over [prefix | own tokens] (the eager formula; float32 softmax).

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


AttentionInterface.register(ATTENTION_NAME, split_attention)
