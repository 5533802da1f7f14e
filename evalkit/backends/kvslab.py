"""A preallocated key/value cache for rows that continue one shared prefix.

The prefix's keys and values are held once per layer, [kv_heads, P, head_dim]
(``prefix_kv``), and never copied into rows; :mod:`evalkit.backends.split_attention` lets
every row attend to them. Each row's own tokens (prompt suffix, then generated text) live in
that row of per-layer buffers [rows, kv_heads, capacity, head_dim], from column 0 on::

    own columns of a row:   [ padding (masked) ][ suffix ][ generated ][ unused (masked) ]

Row b uses columns ``[0, tail[b])``; a forward call appends its T tokens at each row's own
tail, so rows of different lengths share one batch without moving anything. Attention
reads columns up to the longest row (``width``). ``kv_pos[b, c]`` is the absolute position
of the token in own column c of row b, or -1 for padding and unused columns; prefix positions
are 0..P-1. Attention masks are built from positions, not column numbers, so a row attends
exactly as it would alone (including sliding-window layers, whose window counts real tokens).
Masked columns hold finite values (zeros, or keys and values the model computed), so they
cannot leak NaN through a zero weight.

The running batch is one slab allocated once per engine call, at its final size: rows join
(:meth:`Slab.admit`, copying the rows a prefill group computed in a small slab of its own)
and leave (:meth:`Slab.retain`, moving the kept rows down in place) without a new
allocation. An earlier design built a fresh slab at every regrouping and copied every kept
row into it; on SmolLM2-135M most of that time went to the kernel faulting the new
buffers' pages in (measured here: a worked run of 64 questions spent 0.8-1.8 s in 11
regroupings, with 250k page faults).
"""

from __future__ import annotations

from typing import Sequence

import torch
from transformers.cache_utils import Cache, DynamicLayer

from ..errors import BackendError
from . import llama_pass
from .arena import Arena
from .split_attention import ATTENTION_NAME, active_slab

__all__ = ["Slab", "AttentionPlan", "ATTENTION_NAME"]


class AttentionPlan:
    """How masks must look for one model: per layer kind, its window (None = full)."""

    def __init__(self, model):
        cfg = model.config.get_text_config(decoder=True)
        window = getattr(cfg, "sliding_window", None)
        types = getattr(cfg, "layer_types", None)
        if types is None:
            # Mistral-style configs: one sliding window for every layer when it is set.
            types = ["sliding_attention" if window else "full_attention"] * cfg.num_hidden_layers
        self.kinds: dict[str, int | None] = {}
        for t in dict.fromkeys(types):
            if t == "full_attention":
                self.kinds[t] = None
            elif t == "sliding_attention" and isinstance(window, int) and window > 0:
                self.kinds[t] = window
            else:
                raise BackendError(
                    f"layer type '{t}' of model type '{cfg.model_type}' is not supported by evalkit's "
                    "engine (it handles full and sliding-window attention)")


class _SlabLayer(DynamicLayer):
    """One layer's keys and values in a preallocated [rows, kv_heads, capacity, head_dim] buffer."""

    def __init__(self, slab: "Slab"):
        super().__init__()
        self.slab = slab
        self.buf_k: torch.Tensor | None = None
        self.buf_v: torch.Tensor | None = None
        self.calls = 0  # forward calls that wrote here (each must write every layer once)

    def set_buffers(self, k: torch.Tensor, v: torch.Tensor) -> None:
        self.buf_k, self.buf_v = k, v
        self.is_initialized = True
        self.device = k.device
        self.expose()

    def expose(self) -> None:
        """Point ``keys``/``values`` at the slab's rows and columns in use."""
        rows, width = self.slab.rows, self.slab.width
        self.keys, self.values = self.buf_k[:rows, :, :width], self.buf_v[:rows, :, :width]

    def update(self, key_states, value_states, *args, **kwargs):
        slab = self.slab
        if self.buf_k is None:  # first use: shapes come from the model itself
            _, h, _, d = key_states.shape
            shape = (slab.capacity_rows, h, slab.capacity, d)
            # Every column is written before it is read: prefix and prefill slabs write all
            # their columns, and the running batch's rows come in through admit.
            self.set_buffers(slab.buffer(shape, key_states), slab.buffer(shape, value_states))
        rows, cols = slab.write_at
        if rows is None:  # every row appends at the same columns: one slice
            self.buf_k[:slab.rows, :, cols] = key_states
            self.buf_v[:slab.rows, :, cols] = value_states
        else:  # [B, 1] rows and [B, T] columns; the indexed dims come first: [B, T, heads, dim]
            self.buf_k[rows, :, cols] = key_states.transpose(1, 2)
            self.buf_v[rows, :, cols] = value_states.transpose(1, 2)
        self.calls += 1
        self.expose()
        return self.keys, self.values

    def get_seq_length(self) -> int:
        return self.slab.width


class Slab(Cache):
    """Cache of a batch of rows continuing one shared prefix (see module notes).

    ``rows`` rows are in use, out of ``capacity_rows`` allocated; each row holds at most
    ``capacity`` own columns.
    """

    def __init__(self, plan: AttentionPlan, rows: int, capacity: int, prefix_kv, device,
                 capacity_rows: int | None = None, arena: Arena | None = None):
        self.plan, self.capacity, self.prefix_kv, self.arena = plan, capacity, prefix_kv, arena
        self.prefix = prefix_kv[0][0].shape[1] if prefix_kv else 0
        super().__init__(layers=[])
        self.layer_class_to_replicate = lambda: _SlabLayer(self)  # layers appear on first update
        self.capacity_rows = max(rows, capacity_rows or 0)
        self.kv_pos = torch.full((self.capacity_rows, capacity), -1, dtype=torch.long, device=device)
        self.tail = [0] * rows  # own columns used per row
        self.rows = rows
        self.width = 0          # columns attention reads: the longest row's
        self.calls = 0
        self.mask_parts: dict = {}  # what attention derives from each mask, during one forward call
        # Where the running forward call writes: (None, column slice) when every row appends
        # at the same column, else ([B, 1] row, [B, T] column) index tensors.
        self.write_at: tuple = (None, slice(0, 0))

    def buffer(self, shape: tuple[int, ...], like: torch.Tensor) -> torch.Tensor:
        """An uninitialised key or value buffer: from the slab's arena if it has one."""
        if self.arena is None:
            return like.new_empty(shape)
        return self.arena.take(shape, like.dtype, like.device)

    def _plan_write(self, T: int, device) -> None:
        start = self.tail
        if max(start) + T > self.capacity:
            raise BackendError(f"key/value slab full: {max(start) + T} columns needed, "
                               f"{self.capacity} allocated (an engine bug)")
        if min(start) == max(start):
            self.write_at = (None, slice(start[0], start[0] + T))
        else:
            rows = torch.arange(self.rows, device=device)[:, None]
            cols = torch.tensor(start, device=device)[:, None] + torch.arange(T, device=device)
            self.write_at = (rows, cols)

    def _masks(self, qpos: torch.Tensor, real: torch.Tensor | None, width: int):
        """Masks [B, 1, T, P + width] for queries at ``qpos`` [B, T], written at each row's tail."""
        B, T = qpos.shape
        P, dev = self.prefix, qpos.device
        kvp = self.kv_pos[:B, :width][:, None, :]                            # [B, 1, L]
        q = qpos[:, :, None]                                                 # [B, T, 1]
        own = (kvp >= 0) & (kvp <= q)                                        # [B, T, L]
        ppos = torch.arange(P, device=dev)[None, None, :]                    # [1, 1, P]
        pad_rows = real is not None and not bool(real.all())
        out = {}
        for kind, window in self.plan.kinds.items():
            if window is None:
                m = torch.cat([own.new_ones((B, T, P)), own], dim=-1)
            else:
                m = torch.cat([ppos > q - window, own & (q - kvp < window)], dim=-1)
            if pad_rows:
                # A padding query also sees its own (finite) column: never an empty row.
                cols = P + torch.tensor(self.tail, device=dev)[:, None] + torch.arange(T, device=dev)
                b = torch.arange(B, device=dev)[:, None].expand(B, T)
                t = torch.arange(T, device=dev)[None, :].expand(B, T)
                m[b, t, cols] |= ~real
            out[kind] = m[:, None]                                           # [B, 1, T, P+L]
        return next(iter(out.values())) if len(out) == 1 else out

    def extend(self, model, ids: torch.Tensor, pos: torch.Tensor,
               real: torch.Tensor | None = None) -> torch.Tensor:
        """Run ``ids`` [B, T] at positions ``pos`` through the model, appended at each row's
        tail; return the last position's logits [B, V].

        The model must have ``config._attn_implementation == ATTENTION_NAME`` (the engine
        selects it for the duration of a call).
        """
        B, T = ids.shape
        if B != self.rows:
            raise BackendError(f"slab holds {self.rows} rows, got {B} (an engine bug)")
        self._plan_write(T, ids.device)
        seen = pos if real is None else torch.where(real, pos, -1)
        rows, cols = self.write_at
        if rows is None:
            self.kv_pos[:B, cols] = seen
        else:
            self.kv_pos[rows, cols] = seen
        width = max(self.tail) + T
        mask, at = self._masks(pos, real, width), pos.clamp(min=0)
        self.width = width
        self.calls += 1
        token = active_slab.set(self)
        try:
            if llama_pass.applies(model):  # the same numbers without transformers' per-call wrappers
                logits = llama_pass.last_logits(model, self, ids, mask, at)
            else:
                logits = model(input_ids=ids, attention_mask=mask, position_ids=at, cache=self,
                               use_cache=True, logits_to_keep=1).logits[:, -1, :]
        finally:
            active_slab.reset(token)
            self.mask_parts = {}
        self.tail = [t + T for t in self.tail]
        if any(layer.calls != self.calls for layer in self.layers):
            raise BackendError("model type not supported by evalkit's engine: its layers do not "
                               "each keep one key/value entry per token (shared or skipped caches)")
        return logits

    def admit(self, src: "Slab", keep: Sequence[int]) -> None:
        """Append rows ``keep`` of ``src`` (a slab over the same prefix) after this slab's rows.

        Their own columns are copied; the rest of each new row's capacity is cleared.
        """
        keep = list(keep)
        if not keep:
            return
        r0, r1 = self.rows, self.rows + len(keep)
        if r1 > self.capacity_rows or max(src.tail[i] for i in keep) > self.capacity:
            raise BackendError(f"slab of {self.capacity_rows} rows x {self.capacity} columns cannot "
                               f"take {len(keep)} more rows (an engine bug)")
        w = max(src.tail[i] for i in keep)
        sel = _rows_index(keep, src.kv_pos.device)
        if not self.layers:
            for layer in src.layers:
                k, v = layer.buf_k, layer.buf_v
                shape = (self.capacity_rows, k.shape[1], self.capacity, k.shape[3])
                lay = _SlabLayer(self)
                lay.set_buffers(self.buffer(shape, k), self.buffer(shape, v))  # rows are written by admit
                lay.calls = self.calls
                self.layers.append(lay)
        self.kv_pos[r0:r1] = -1
        self.kv_pos[r0:r1, :w] = src.kv_pos[sel, :w]
        for dst, s in zip(self.layers, src.layers):
            for d, x in ((dst.buf_k, s.buf_k), (dst.buf_v, s.buf_v)):
                d[r0:r1, :, :w] = x[sel, :, :w]
                d[r0:r1, :, w:] = 0
        self.tail += [src.tail[i] for i in keep]
        self.rows = r1
        self.width = max(self.tail)
        for layer in self.layers:
            layer.expose()

    def retain(self, keep: Sequence[int]) -> None:
        """Keep only rows ``keep`` (ascending), moved down in place to rows 0.. in that order."""
        keep = list(keep)
        moves = _moves(keep)
        for dst, src, n in moves:
            self.kv_pos[dst:dst + n] = self.kv_pos[src:src + n]
            for layer in self.layers:
                layer.buf_k[dst:dst + n] = layer.buf_k[src:src + n]
                layer.buf_v[dst:dst + n] = layer.buf_v[src:src + n]
        self.tail = [self.tail[i] for i in keep]
        self.rows = len(keep)
        self.width = max(self.tail, default=0)
        for layer in self.layers:
            layer.expose()

    @classmethod
    def for_prefix(cls, model, plan: AttentionPlan, ids: Sequence[int], chunk: int,
                   arena: Arena | None = None):
        """Keys and values of the shared prefix, per layer [kv_heads, P, head_dim]; None if empty."""
        if not ids:
            return None
        device = model.device
        slab = cls(plan, 1, len(ids), None, device, arena=arena)
        t = torch.tensor([list(ids)], dtype=torch.long, device=device)
        p = torch.arange(len(ids), device=device)[None]
        for a in range(0, len(ids), chunk):
            slab.extend(model, t[:, a:a + chunk], p[:, a:a + chunk])
        return [(layer.buf_k[0, :, :slab.width], layer.buf_v[0, :, :slab.width]) for layer in slab.layers]

    def nbytes(self) -> int:
        """Bytes held by this slab's own-token key/value buffers (the shared prefix excluded)."""
        return sum(l.buf_k.nbytes + l.buf_v.nbytes for l in self.layers if l.buf_k is not None)


def _rows_index(keep: list[int], device):
    """``keep`` as a slice when it is a run of consecutive rows (a view), else an index tensor."""
    if keep == list(range(keep[0], keep[0] + len(keep))):
        return slice(keep[0], keep[0] + len(keep))
    return torch.tensor(keep, device=device)


def _moves(keep: list[int]) -> list[tuple[int, int, int]]:
    """Block copies (dst, src, rows) that move rows ``keep`` (ascending) to 0, 1, ... in place.

    Consecutive kept rows move as one block; a block is cut into pieces no longer than its
    shift, so no piece overlaps its source, and pieces run in ascending order, so no source is
    overwritten before it is read.
    """
    moves, i = [], 0
    while i < len(keep):
        j = i
        while j + 1 < len(keep) and keep[j + 1] == keep[j] + 1:
            j += 1
        shift, length = keep[i] - i, j - i + 1
        if shift:
            for a in range(0, length, shift):
                moves.append((i + a, keep[i] + a, min(shift, length - a)))
        i = j + 1
    return moves
