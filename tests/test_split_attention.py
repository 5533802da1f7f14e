"""Attention over a shared prefix plus each row's own tokens (evalkit.backends.split_attention).

Outside reference: attention written out from its definition, softmax(q k^T * scale) v, with
torch's plain products and softmax over the joined [prefix | own] keys.
"""

from __future__ import annotations

import pytest
import torch

from evalkit.backends import split_attention as sa

pytestmark = pytest.mark.skipif(sa._FLASH is None, reason="this torch has no CPU flash-attention kernel")


def _by_definition(q, k, v, allowed, scale):
    s = torch.matmul(q, k.transpose(-1, -2)) * scale
    s = s.masked_fill(~allowed, float("-inf"))
    return torch.matmul(torch.softmax(s, dim=-1), v), torch.logsumexp(s, dim=-1)


def _strided_last_dim(t: torch.Tensor) -> torch.Tensor:
    """The same values, laid out so that the last dimension is not contiguous."""
    out = t.movedim(-1, 0).contiguous().movedim(0, -1)
    assert out.stride(-1) != 1 and torch.equal(out, t)
    return out


@pytest.mark.parametrize("strided", ["query", "key", "value", "none"])
def test_flash_matches_the_definition_whatever_the_layout(strided):
    torch.manual_seed(0)
    B, H, T, L, D = 3, 2, 1, 40, 16
    q, k, v = torch.randn(B, H, T, D), torch.randn(B, H, L, D), torch.randn(B, H, L, D)
    allowed = torch.ones(B, 1, T, L, dtype=torch.bool)
    allowed[0, ..., 30:] = False  # columns right of a shorter row
    allowed[1, ..., :5] = False   # a prefill group's padding
    want_o, want_l = _by_definition(q, k, v, allowed, 0.25)
    args = {"query": q, "key": k, "value": v}
    if strided != "none":
        args[strided] = _strided_last_dim(args[strided])
    o, l = sa._flash(args["query"], args["key"], args["value"], sa._additive(allowed, q.dtype), 0.25)
    torch.testing.assert_close(o, want_o, rtol=1e-5, atol=1e-5)
    torch.testing.assert_close(l.reshape(want_l.shape), want_l, rtol=1e-5, atol=1e-5)


class _Slab:
    def __init__(self, prefix):
        self.prefix_kv = [prefix]
        self.mask_parts = {}  # as kvslab.Slab starts each forward call


class _Layer:
    layer_idx = 0


@pytest.mark.parametrize("T, own_form", [(1, "fused"), (1, "plain"), (5, "fused")])
def test_split_attention_equals_attention_over_prefix_and_own_keys_joined(T, own_form, monkeypatch):
    # Decode steps (T = 1) with many rows take the own part as plain products (OWN_PLAIN_ROWS);
    # here a threshold of 1 row makes this small batch take that path.
    if own_form == "plain":
        monkeypatch.setattr(sa, "OWN_PLAIN_ROWS", 1)
    torch.manual_seed(1)
    B, Hq, Hkv, P, L, D = 4, 6, 2, 30, 12, 8
    query = _strided_last_dim(torch.randn(B, Hq, T, D))  # as a decode step's query can come
    key, value = torch.randn(B, Hkv, L, D), torch.randn(B, Hkv, L, D)
    pk, pv = torch.randn(Hkv, P, D), torch.randn(Hkv, P, D)
    own = torch.rand(B, 1, T, L) > 0.3
    own[..., -T:] = torch.eye(T, dtype=torch.bool)  # every query sees its own column
    mask = torch.cat([torch.ones(B, 1, T, P, dtype=torch.bool), own], dim=-1)
    slab = _Slab((pk, pv))
    token = sa.active_slab.set(slab)
    try:
        got, _ = sa.split_attention(_Layer(), query, key, value, mask, scaling=D ** -0.5)
        # A second layer given the same mask reuses what the first derived from it.
        again, _ = sa.split_attention(_Layer(), query, key, value, mask, scaling=D ** -0.5)
    finally:
        sa.active_slab.reset(token)
    assert len(slab.mask_parts) == 1 and torch.equal(got, again)
    r = Hq // Hkv
    k_all = torch.cat([pk[None].expand(B, -1, -1, -1), key], dim=2).repeat_interleave(r, dim=1)
    v_all = torch.cat([pv[None].expand(B, -1, -1, -1), value], dim=2).repeat_interleave(r, dim=1)
    want, _ = _by_definition(query, k_all, v_all, mask, D ** -0.5)
    torch.testing.assert_close(got, want.transpose(1, 2), rtol=1e-5, atol=1e-5)
