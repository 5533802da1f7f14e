"""Key/value memory kept with the model between engine calls (evalkit.backends.arena)."""

from __future__ import annotations

import gc

import torch

from evalkit.backends.arena import ALIGN, Arena, arena_for, release


def _span(t: torch.Tensor) -> tuple[int, int]:
    start = t.data_ptr()
    return start, start + t.numel() * t.element_size()


def test_takes_are_disjoint_aligned_views_of_the_block():
    arena = Arena()
    arena.reset(4096)
    a = arena.take((3, 5), torch.float32, "cpu")
    b = arena.take((7,), torch.bfloat16, "cpu")
    c = arena.take((2, 2, 2), torch.float32, "cpu")
    base = arena.block.data_ptr()
    spans = [_span(t) for t in (a, b, c)]
    for (s0, e0), (s1, e1) in zip(spans, spans[1:]):
        assert e0 <= s1  # handed out in order, never overlapping
    for t, (s, e) in zip((a, b, c), spans):
        assert (s - base) % ALIGN == 0 and base <= s and e <= base + 4096
        assert t.is_contiguous()
    a.fill_(1.0)
    b.fill_(2.0)
    c.fill_(3.0)
    assert a.sum().item() == 15 and b.float().sum().item() == 14 and c.sum().item() == 24


def test_a_request_that_does_not_fit_gets_its_own_tensor_and_the_block_grows():
    arena = Arena()
    arena.reset(256)
    small = arena.take((16,), torch.float32, "cpu")  # 64 bytes: fits
    big = arena.take((1000,), torch.float32, "cpu")  # 4000 bytes: does not
    base = arena.block.data_ptr()
    assert base <= small.data_ptr() < base + 256
    assert not base <= big.data_ptr() < base + 256
    arena.reset()  # grows to what the last round asked for
    assert arena.nbytes >= 64 + 4000
    again = [arena.take((16,), torch.float32, "cpu"), arena.take((1000,), torch.float32, "cpu")]
    base = arena.block.data_ptr()
    assert all(base <= t.data_ptr() < base + arena.nbytes for t in again)


def test_reset_hands_out_the_same_memory_again():
    arena = Arena()
    arena.reset(1024)
    first = arena.take((8, 8), torch.float32, "cpu").data_ptr()
    arena.reset(1024)
    assert arena.take((8, 8), torch.float32, "cpu").data_ptr() == first
    arena.reset(512)  # a smaller need keeps the block
    assert arena.nbytes == 1024


def test_arenas_are_kept_per_model_and_use_and_go_with_the_model():
    model = torch.nn.Linear(2, 2)
    rows = arena_for(model, "rows")
    assert arena_for(model, "rows") is rows and arena_for(model, "prefill") is not rows
    rows.reset(1 << 20)
    arena_for(model, "prefill").reset(1 << 10)
    assert release(model) == (1 << 20) + (1 << 10)
    assert arena_for(model, "rows") is not rows  # released: a new one on the next request
    other = torch.nn.Linear(2, 2)
    arena_for(other, "rows").reset(1 << 20)
    from evalkit.backends import arena as arena_mod

    assert other in arena_mod._arenas
    del other
    gc.collect()
    assert len([m for m in arena_mod._arenas if isinstance(m, torch.nn.Linear)]) == 1  # only `model`
