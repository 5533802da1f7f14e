"""A preallocated key/value cache for rows that continue one shared prefix.

The prefix's keys and values are held once per layer, [kv_heads, P, head_dim]
(``prefix_kv``), and never copied into rows; :mod:`evalkit.backends.split_attention` lets
every row attend to them. Each row's own tokens (prompt suffix, then generated text) live in
per-row buffers::

    own columns of a row:   [ gap (masked) ][ suffix ][ generated ]

Rows are right-aligned: each row's newest token sits in the last used column, so one decode
step appends one column to every row. ``kv_pos[b, c]`` is the absolute position of the token
in own column c of row b, or -1 for a gap or padding column; prefix positions are 0..P-1.
Attention masks are built from positions, not column numbers, so a row attends exactly as
it would alone (including sliding-window layers, whose window counts real tokens). Gap
columns hold zeros: masked, but finite, so they cannot leak NaN through a zero weight.

Buffers are allocated with spare capacity and written in place, so a decode step copies only
the new column (a growing ``torch.cat`` cache copies everything, every step). Rows leave and
join only in :func:`combine`, which re-lays the kept and new rows in one fresh slab.
"""

from __future__ import annotations

from typing import Sequence

import torch
from transformers.cache_utils import Cache, DynamicLayer

from ..errors import BackendError
from . import llama_pass
from .split_attention import ATTENTION_NAME, active_slab

__all__ = ["Slab", "AttentionPlan", "combine", "ATTENTION_NAME"]


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
    """One layer's keys and values in a preallocated [B, H, capacity, D] buffer."""

    def __init__(self, slab: "Slab"):
        super().__init__()
        self.slab = slab
        self.buf_k: torch.Tensor | None = None
        self.buf_v: torch.Tensor | None = None
        self.n = 0

    def set_buffers(self, k: torch.Tensor, v: torch.Tensor, n: int) -> None:
        self.buf_k, self.buf_v, self.n = k, v, n
        self.keys, self.values = k[:, :, :n], v[:, :, :n]
        self.is_initialized = True
        self.device = k.device

    def update(self, key_states, value_states, *args, **kwargs):
        if self.buf_k is None:  # first use: shapes come from the model itself
            b, h, _, d = key_states.shape
            shape = (b, h, self.slab.capacity, d)
            self.set_buffers(key_states.new_zeros(shape), value_states.new_zeros(shape), 0)
        end = self.n + key_states.shape[-2]
        self.buf_k[:, :, self.n:end] = key_states
        self.buf_v[:, :, self.n:end] = value_states
        self.n = end
        self.keys, self.values = self.buf_k[:, :, :end], self.buf_v[:, :, :end]
        return self.keys, self.values

    def get_seq_length(self) -> int:
        return self.n


class Slab(Cache):
    """Cache of a batch of rows continuing one shared prefix (see module notes)."""

    def __init__(self, plan: AttentionPlan, rows: int, capacity: int, prefix_kv, device):
        self.plan, self.capacity, self.prefix_kv = plan, capacity, prefix_kv
        self.prefix = prefix_kv[0][0].shape[1] if prefix_kv else 0
        super().__init__(layers=[])
        self.layer_class_to_replicate = lambda: _SlabLayer(self)  # layers appear on first update
        self.kv_pos = torch.full((rows, capacity), -1, dtype=torch.long, device=device)
        self.tail = [0] * rows  # own (suffix + generated) columns per row
        self.n = 0

    @property
    def rows(self) -> int:
        return self.kv_pos.shape[0]

    def ensure(self, extra: int) -> None:
        """Grow every buffer so that ``extra`` more columns fit."""
        need = self.n + extra
        if need <= self.capacity:
            return
        cap = max(need, self.capacity * 2)
        for layer in self.layers:
            k, v = layer.buf_k, layer.buf_v
            nk = k.new_zeros((*k.shape[:2], cap, k.shape[3]))
            nv = v.new_zeros((*v.shape[:2], cap, v.shape[3]))
            nk[:, :, :layer.n] = k[:, :, :layer.n]
            nv[:, :, :layer.n] = v[:, :, :layer.n]
            layer.set_buffers(nk, nv, layer.n)
        pos = self.kv_pos.new_full((self.rows, cap), -1)
        pos[:, :self.n] = self.kv_pos[:, :self.n]
        self.kv_pos, self.capacity = pos, cap

    def _masks(self, qpos: torch.Tensor, real: torch.Tensor | None):
        """Masks [B, 1, T, P + own columns] for queries at ``qpos`` [B, T] in the next T columns."""
        B, T = qpos.shape
        P, dev = self.prefix, qpos.device
        kvp = self.kv_pos[:, : self.n + T][:, None, :]                       # [B, 1, L]
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
                cols = torch.arange(P + self.n, P + self.n + T, device=dev)
                m[:, torch.arange(T, device=dev), cols] |= ~real
            out[kind] = m[:, None]                                           # [B, 1, T, P+L]
        return next(iter(out.values())) if len(out) == 1 else out

    def extend(self, model, ids: torch.Tensor, pos: torch.Tensor,
               real: torch.Tensor | None = None) -> torch.Tensor:
        """Run ``ids`` [B, T] at positions ``pos`` through the model; return last logits [B, V].

        The model must have ``config._attn_implementation == ATTENTION_NAME`` (the engine
        selects it for the duration of a call).
        """
        T = ids.shape[1]
        self.ensure(T)
        seen = pos if real is None else torch.where(real, pos, -1)
        self.kv_pos[:, self.n:self.n + T] = seen
        token = active_slab.set(self)
        try:
            mask, at = self._masks(pos, real), pos.clamp(min=0)
            if llama_pass.applies(model):  # the same numbers without transformers' per-call wrappers
                logits = llama_pass.last_logits(model, self, ids, mask, at)
            else:
                logits = model(input_ids=ids, attention_mask=mask, position_ids=at, cache=self,
                               use_cache=True, logits_to_keep=1).logits[:, -1, :]
        finally:
            active_slab.reset(token)
        self.n += T
        if any(layer.n != self.n for layer in self.layers):
            raise BackendError("model type not supported by evalkit's engine: its layers do not "
                               "each keep one key/value entry per token (shared or skipped caches)")
        return logits

    @classmethod
    def for_prefix(cls, model, plan: AttentionPlan, ids: Sequence[int], chunk: int):
        """Keys and values of the shared prefix, per layer [kv_heads, P, head_dim]; None if empty."""
        if not ids:
            return None
        device = model.device
        slab = cls(plan, 1, len(ids), None, device)
        t = torch.tensor([list(ids)], dtype=torch.long, device=device)
        p = torch.arange(len(ids), device=device)[None]
        for a in range(0, len(ids), chunk):
            slab.extend(model, t[:, a:a + chunk], p[:, a:a + chunk])
        return [(layer.buf_k[0, :, :slab.n], layer.buf_v[0, :, :slab.n]) for layer in slab.layers]

    def nbytes(self) -> int:
        """Bytes held by this slab's own-token key/value buffers (the shared prefix excluded)."""
        return sum(l.buf_k.nbytes + l.buf_v.nbytes for l in self.layers if l.buf_k is not None)


def combine(parts: Sequence[tuple[Slab, Sequence[int]]], reserve: int) -> Slab:
    """A fresh slab holding the listed rows of each part, in order, right-aligned again.

    All parts continue the same prefix. Gaps shrink to what the longest kept row needs, so
    columns freed by rows that left are reclaimed here.
    """
    parts = [(s, list(keep)) for s, keep in parts if keep]
    first = parts[0][0]
    n = max(s.tail[i] for s, keep in parts for i in keep)
    rows = sum(len(keep) for _, keep in parts)
    new = Slab(first.plan, rows, n + reserve, first.prefix_kv, first.kv_pos.device)
    bufs = []
    for layer in first.layers:
        k, v = layer.buf_k, layer.buf_v
        bufs.append((k.new_empty((rows, k.shape[1], new.capacity, k.shape[3])),
                     v.new_empty((rows, v.shape[1], new.capacity, v.shape[3]))))
    r0 = 0
    for s, keep in parts:
        w = max(s.tail[i] for i in keep)
        r1 = r0 + len(keep)
        sel = slice(keep[0], keep[-1] + 1) if keep == list(range(keep[0], keep[-1] + 1)) \
            else torch.tensor(keep, device=s.kv_pos.device)
        new.kv_pos[r0:r1, n - w:n] = s.kv_pos[sel, s.n - w:s.n]
        for li, (dk, dv) in enumerate(bufs):
            for src, dst in ((s.layers[li].buf_k, dk), (s.layers[li].buf_v, dv)):
                dst[r0:r1, :, :n - w] = 0
                dst[r0:r1, :, n - w:n] = src[sel, :, s.n - w:s.n]
        new.tail[r0:r1] = [s.tail[i] for i in keep]
        r0 = r1
    for dk, dv in bufs:
        lay = _SlabLayer(new)
        lay.set_buffers(dk, dv, n)
        new.layers.append(lay)
    new.n = n
    return new
