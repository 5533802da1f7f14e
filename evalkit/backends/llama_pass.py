"""One forward pass of a llama-architecture decoder, its submodules called directly.

A decode step of a small model is short: on SmolLM2-135M at one row about 70 ms, of which
the arithmetic of the products is about half. transformers' own ``model(...)`` wraps the
layers in per-call machinery (argument checks, mask creation, output records, keyword
plumbing through four levels of modules) that costs milliseconds per step at any batch size.
Here the same submodules run in the same order with the same operations as
``LlamaForCausalLM.forward`` (transformers 5.x): embedding, rotary tables, per layer the
input norm, the q/k/v products, ``apply_rotary_pos_emb``, the cache update, the engine's
attention, the output product and the residual, the post-attention norm and MLP; then the
final norm and the vocabulary product for the last position only (the norm works per
position, so normalising only that position gives the same numbers). The values are the same
bits as ``model(...)`` (tested on tiny llama models built from configs).

Only exact llama classes qualify, in eval mode, with the engine's attention selected and no
forward hooks on the modules whose ``forward`` this skips (hooks on the submodules it calls
still run); anything else goes through ``model(...)``.
"""

from __future__ import annotations

import torch
from torch.nn.modules import module as _module
from transformers.models.llama import modeling_llama as _llama

from .split_attention import ATTENTION_NAME, split_attention

__all__ = ["applies", "last_logits"]


def _hooked(m: torch.nn.Module) -> bool:
    return bool(m._forward_hooks or m._forward_pre_hooks)


def applies(model) -> bool:
    """Whether :func:`last_logits` computes exactly what ``model(...)`` would for this model."""
    if type(model) is not _llama.LlamaForCausalLM or model.training:
        return False
    if model.config._attn_implementation != ATTENTION_NAME:
        return False
    if _module._global_forward_hooks or _module._global_forward_pre_hooks:
        return False
    inner = model.model
    if type(inner) is not _llama.LlamaModel or _hooked(model) or _hooked(inner):
        return False
    for layer in inner.layers:
        if (type(layer) is not _llama.LlamaDecoderLayer or type(layer.self_attn) is not _llama.LlamaAttention
                or type(layer.mlp) is not _llama.LlamaMLP or _hooked(layer) or _hooked(layer.self_attn)):
            return False
    return True


def last_logits(model, cache, ids: torch.Tensor, mask, pos: torch.Tensor) -> torch.Tensor:
    """Logits [B, V] of the last position of ``ids`` [B, T] at positions ``pos``, keys and
    values appended to ``cache``; ``mask`` as the engine's attention takes it."""
    inner = model.model
    h = inner.embed_tokens(ids)
    cos, sin = inner.rotary_emb(h, pos)
    B, T = ids.shape
    for i, layer in enumerate(inner.layers[: inner.config.num_hidden_layers]):
        attn = layer.self_attn
        x = layer.input_layernorm(h)
        shape = (B, T, -1, attn.head_dim)
        q = attn.q_proj(x).view(shape).transpose(1, 2)
        k = attn.k_proj(x).view(shape).transpose(1, 2)
        v = attn.v_proj(x).view(shape).transpose(1, 2)
        q, k = _llama.apply_rotary_pos_emb(q, k, cos, sin)
        k, v = cache.update(k, v, i)
        o, _ = split_attention(attn, q, k, v, mask, scaling=attn.scaling)
        h = h + attn.o_proj(o.reshape(B, T, -1).contiguous())
        h = h + layer.mlp(layer.post_attention_layernorm(h))
    return model.lm_head(inner.norm(h[:, -1:]))[:, -1, :]
