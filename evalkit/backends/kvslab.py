"""A preallocated key/value cache laid out for shared-prefix continuous batching.

Every row of a :class:`Slab` holds its columns in this order::

    [ shared prefix : P ][ gap (masked) ][ the row's own tokens: prompt suffix, then generated ]

Rows are right-aligned: each row's newest token sits in the last used column, so one decode
step appends one column to every row. ``kv_pos[b, c]`` is the absolute position of the token
in column c of row b, or -1 for a gap or padding column. Attention masks are built from these
positions, not from column numbers, so a row attends exactly as it would alone (including
sliding-window layers, whose window counts real tokens). Gap columns hold zeros: masked,
but finite, so they cannot leak NaN through a zero attention weight.

Buffers are allocated with spare capacity and written in place, so a decode step copies only
the new column (a growing ``torch.cat`` cache copies everything, every step). Rows leave and
join only in :func:`combine`, which re-lays the kept and new rows in one fresh slab.
"""

from __future__ import annotations

from typing import Sequence

import torch
from transformers.cache_utils import Cache, DynamicLayer

from ..errors import BackendError

__all__ = ["Slab", "AttentionPlan", "combine"]


class AttentionPlan:
    """How masks must look for one model: per layer kind, its window (None = full)."""

    def __init__(self, model):
        cfg = model.config.get_text_config(decoder=True)
        impl = getattr(model.config, "_attn_implementation", None) or "eager"
        if impl not in ("sdpa", "eager"):
            raise BackendError(
                f"attention implementation '{impl}' is not supported by evalkit's engine; "
                "load the model with attn_implementation='sdpa' or 'eager'")
        self.additive = impl == "eager"  # eager adds the mask to the scores; sdpa takes booleans
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
        self.dtype = next(model.parameters()).dtype


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
    """Cache of a batch of rows sharing the first ``prefix`` columns (see module notes)."""

    def __init__(self, plan: AttentionPlan, rows: int, capacity: int, prefix: int, device):
        self.plan, self.capacity, self.prefix = plan, capacity, prefix
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
        """Attention masks for queries at positions ``qpos`` [B, T] in the next T columns."""
        B, T = qpos.shape
        kvp = self.kv_pos[:, : self.n + T][:, None, :]            # [B, 1, L]
        q = qpos[:, :, None]                                       # [B, T, 1]
        base = (kvp >= 0) & (kvp <= q)                             # [B, T, L]
        out = {}
        for kind, window in self.plan.kinds.items():
            m = base if window is None else base & (q - kvp < window)
            if real is not None and not bool(real.all()):
                # A padding query sees only its own (finite) column: never an empty row.
                m = m.clone()
                cols = torch.arange(self.n, self.n + T, device=m.device)
                m[:, torch.arange(T, device=m.device), cols] |= ~real
            m = m[:, None]                                         # [B, 1, T, L]
            if self.plan.additive:
                zero = torch.zeros((), dtype=self.plan.dtype, device=m.device)
                m = torch.where(m, zero, torch.finfo(self.plan.dtype).min)
            out[kind] = m
        return next(iter(out.values())) if len(out) == 1 else out

    def extend(self, model, ids: torch.Tensor, pos: torch.Tensor,
               real: torch.Tensor | None = None) -> torch.Tensor:
        """Run ``ids`` [B, T] at positions ``pos`` through the model; return last logits [B, V]."""
        T = ids.shape[1]
        self.ensure(T)
        seen = pos if real is None else torch.where(real, pos, -1)
        self.kv_pos[:, self.n:self.n + T] = seen
        out = model(input_ids=ids, attention_mask=self._masks(pos, real),
                    position_ids=pos.clamp(min=0), cache=self, use_cache=True, logits_to_keep=1)
        self.n += T
        if any(layer.n != self.n for layer in self.layers):
            raise BackendError("model type not supported by evalkit's engine: its layers do not "
                               "each keep one key/value entry per token (shared or skipped caches)")
        return out.logits[:, -1, :]

    @classmethod
    def for_prefix(cls, model, plan: AttentionPlan, ids: Sequence[int], chunk: int) -> "Slab":
        """The shared prefix as a one-row slab, computed in chunks of ``chunk`` tokens."""
        device = model.device
        slab = cls(plan, 1, max(1, len(ids)), len(ids), device)
        t = torch.tensor([list(ids)], dtype=torch.long, device=device)
        p = torch.arange(len(ids), device=device)[None]
        for a in range(0, len(ids), chunk):
            slab.extend(model, t[:, a:a + chunk], p[:, a:a + chunk])
        return slab

    def replicate(self, rows: int, reserve: int) -> "Slab":
        """``rows`` copies of this one-row prefix slab, with room for ``reserve`` more columns."""
        new = Slab(self.plan, rows, self.n + reserve, self.prefix, self.kv_pos.device)
        new.kv_pos[:, :self.n] = self.kv_pos[0, :self.n]
        for layer in self.layers:
            k, v = layer.buf_k, layer.buf_v
            nk = k.new_zeros((rows, k.shape[1], new.capacity, k.shape[3]))
            nv = v.new_zeros((rows, v.shape[1], new.capacity, v.shape[3]))
            nk[:, :, :self.n] = k[:, :, :self.n]
            nv[:, :, :self.n] = v[:, :, :self.n]
            lay = _SlabLayer(new)
            lay.set_buffers(nk, nv, self.n)
            new.layers.append(lay)
        new.n = self.n
        return new

    def nbytes(self) -> int:
        """Bytes held by this slab's key/value buffers."""
        return sum(l.buf_k.nbytes + l.buf_v.nbytes for l in self.layers if l.buf_k is not None)


def combine(parts: Sequence[tuple[Slab, Sequence[int]]], reserve: int) -> Slab:
    """A fresh slab holding the listed rows of each part, in order, right-aligned again.

    All parts share the same prefix. Gaps shrink to what the longest kept row needs, so
    columns freed by rows that left are reclaimed here.
    """
    parts = [(s, list(keep)) for s, keep in parts if keep]
    first = parts[0][0]
    P = first.prefix
    width = max(s.tail[i] for s, keep in parts for i in keep)
    n = P + width
    rows = sum(len(keep) for _, keep in parts)
    new = Slab(first.plan, rows, n + reserve, P, first.kv_pos.device)
    new.kv_pos[:, :P] = first.kv_pos[0, :P]
    n_layers = len(first.layers)
    bufs = []
    for li in range(n_layers):
        k = first.layers[li].buf_k
        v = first.layers[li].buf_v
        bufs.append((k.new_empty((rows, k.shape[1], new.capacity, k.shape[3])),
                     v.new_empty((rows, v.shape[1], new.capacity, v.shape[3]))))
    r0 = 0
    for s, keep in parts:
        w = max(s.tail[i] for i in keep)
        r1 = r0 + len(keep)
        sel = slice(keep[0], keep[-1] + 1) if keep == list(range(keep[0], keep[-1] + 1)) \
            else torch.tensor(keep, device=s.kv_pos.device)
        new.kv_pos[r0:r1, n - w:n] = s.kv_pos[sel, s.n - w:s.n]
        for li in range(n_layers):
            for src, dst in ((s.layers[li].buf_k, bufs[li][0]), (s.layers[li].buf_v, bufs[li][1])):
                dst[r0:r1, :, :P] = src[sel, :, :P]
                dst[r0:r1, :, P:n - w] = 0
                dst[r0:r1, :, n - w:n] = src[sel, :, s.n - w:s.n]
        new.tail[r0:r1] = [s.tail[i] for i in keep]
        r0 = r1
    for li in range(n_layers):
        lay = _SlabLayer(new)
        lay.set_buffers(bufs[li][0], bufs[li][1], n)
        new.layers.append(lay)
    new.n = n
    return new
