"""Fast greedy decoding on the CPU: shared-prefix reuse and continuous batching.

How a call runs:

1. Every prompt is tokenised (no special tokens added). The longest common *token* prefix of
   all prompts is run through the model once (``logits_to_keep=1``: no vocabulary projection
   for positions whose logits nobody reads).
2. Questions are decoded in a batch of rows that all continue from that prefix cache
   (see :mod:`evalkit.backends.kvslab` for the layout; the prefix is held once, not copied
   per row). Each step feeds one token per row and projects only the last position to the
   vocabulary.
3. A row ends at its own stop string, end-of-sequence token or length limit. When a quarter
   of the rows have ended, waiting questions are prefilled against the prefix (in groups of
   similar length, so little padding is computed) and merged into
   the running batch in the freed rows; once nobody waits, ended rows are dropped likewise.
   (Ended rows run along until then; their tokens are ignored.)
4. While the call lasts, float32 linear layers run on packed copies of their weights (MKL's
   packed products on Intel CPUs, oneDNN's elsewhere), made once per model where memory
   allows; otherwise as ``W @ x.T``, faster for the
   few-row products of decoding on MKL; a single row as one slice of the weight per thread
   (:mod:`evalkit.backends.linear_order`).
5. Llama-architecture models run their submodules directly (:mod:`evalkit.backends.llama_pass`):
   the same operations and bits as ``model(...)``, without transformers' per-call wrappers,
   which cost milliseconds per decode step at any batch size; other models run ``model(...)``.
6. On glibc the first call of a process sets malloc's mmap and trim thresholds to the values
   glibc itself settles on later, so megabyte-sized tensors freed in one step are reused in
   the next rather than unmapped and faulted in again (:mod:`evalkit.backends.allocator`).
7. The running batch lives in one slab for the whole call: rows join and leave in place
   (:mod:`evalkit.backends.kvslab`). Its key/value memory, the prefix's and the prefill
   groups' come from arenas kept with the model, so the next call reuses pages already in
   place (:mod:`evalkit.backends.arena`; ``arena.release(model)`` drops them).

Results equal plain one-at-a-time ``generate`` (:func:`evalkit.backends.reference.reference_generate`)
except at ties: float32 sums taken in another order differ by ~1e-5, which can swap two
candidate tokens whose logits are that close. ``TIE_MARGIN`` is the gap below which we call
a step a tie; ``Generation.min_margin`` tells callers how close each completion came.
"""

from __future__ import annotations

import functools
import time
from collections import deque
from dataclasses import dataclass
from typing import Callable, Iterator, Sequence

import torch

from ..errors import BackendError
from .allocator import settle_allocator
from .arena import ALIGN, arena_for
from .base import TIE_MARGIN
from .kvslab import ATTENTION_NAME, AttentionPlan, Slab
from .linear_order import engine_linears, should_pack
from .stops import StopWatcher, settle

__all__ = ["Generation", "greedy_generate", "common_prefix_length", "shared_prefix_length", "eos_ids", "auto_batch_size",
           "kv_bytes_per_token", "regroup", "TIE_MARGIN"]

# TIE_MARGIN (from .base, the one threshold evalkit uses): on SmolLM2-135M in float32 the
# engine's and one-at-a-time generate's per-completion minimum margins differed by at most
# 3e-5 (measured here, 14 workshop prompts); 1e-3 leaves a factor of 30 for larger models.

MAX_AUTO_BATCH = 128     # at 128 questions on SmolLM2-135M (Intel Xeon, MKL's packed products, 4 runs each,
                         # alternated, every pair faster, same completions): direct 7.81 s against 8.34 s with
                         # a cap of 64, worked 18.65 against 20.17 s; earlier, at 64 questions on the AVX2
                         # machine, a cap of 64 against 32: direct 18.5 against 20.6 s, worked 54.1 against 53.6
MEMORY_FRACTION = 0.25   # share of available memory the key/value cache may take
PREFILL_TOKENS = 1024    # query tokens per prefill forward call (bounds score and activation memory)
REGROUP_SHARE = 4        # batches regroup at a quarter: waiting questions join once that share of the cap
                         # is free; once nobody waits, ended rows leave once they are that share of the batch
GROUP_TOKENS = 512       # padded suffix tokens per prefill group: enough rows for efficient products


@dataclass
class Generation:
    """One greedy completion."""

    text: str            # decoded completion, cut before the first stop string (stop string excluded)
    prompt_tokens: int
    new_tokens: int      # tokens generated up to and including the one that completed the stop string / eos
    min_margin: float    # smallest top-1 minus top-2 logit gap over the counted steps (inf if none)
    finish: str          # "stop" | "eos" | "length"
    seconds: float       # this item's share of wall time: each forward call's time split over its live rows


def common_prefix_length(seqs: Sequence[Sequence[int]]) -> int:
    """Length of the longest common prefix of token sequences."""
    if not seqs:
        return 0
    first, n = seqs[0], min(len(s) for s in seqs)
    for s in seqs[1:]:
        i = 0
        while i < n and s[i] == first[i]:
            i += 1
        n = i
    return n


def shared_prefix_length(enc: Sequence[Sequence[int]]) -> int:
    """Tokens of the prefix the engine computes once for prompts ``enc`` (token ids): their
    common prefix, less a token where that would swallow a whole prompt (at least one token of
    every prompt stays outside it: its logits start decoding); 0 for a single prompt."""
    if len(enc) < 2:
        return 0
    return min(common_prefix_length(enc), min(len(e) for e in enc) - 1)


def eos_ids(model, tokenizer) -> set[int]:
    """End-of-sequence token ids: the model's generation config, else the tokenizer's."""
    e = getattr(getattr(model, "generation_config", None), "eos_token_id", None)
    if e is None:
        e = tokenizer.eos_token_id
    if e is None:
        return set()
    return {int(x) for x in (e if isinstance(e, (list, tuple)) else [e])}


def kv_bytes_per_token(model) -> int:
    """Key/value bytes one token costs: layers x 2 x kv_heads x head_dim x dtype bytes."""
    cfg = model.config.get_text_config(decoder=True)
    heads = getattr(cfg, "num_key_value_heads", None) or cfg.num_attention_heads
    head_dim = getattr(cfg, "head_dim", None) or cfg.hidden_size // cfg.num_attention_heads
    itemsize = next(model.parameters()).element_size()
    return cfg.num_hidden_layers * 2 * heads * head_dim * itemsize


def slab_bytes(model, tokens: int) -> int:
    """Bytes of key/value buffers for ``tokens`` own columns, with room for their alignment."""
    layers = model.config.get_text_config(decoder=True).num_hidden_layers
    return tokens * kv_bytes_per_token(model) + 2 * layers * ALIGN


def _mem_available() -> int:
    try:
        with open("/proc/meminfo") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return 4 * 1024 ** 3  # unknown platform: assume a modest laptop


def auto_batch_size(model, row_tokens: int, n_prompts: int) -> int:
    """Rows per batch from the key/value memory one row needs and the memory available."""
    vocab = model.config.get_text_config(decoder=True).vocab_size
    # One slab holds every row for the whole call (prefill groups add a small slab of their
    # own while they are copied in); logits come out in float32 plus a copy.
    # (The shared prefix is held once, outside the rows; row_tokens may leave it out.)
    per_row = row_tokens * kv_bytes_per_token(model) + 8 * vocab
    fit = int(MEMORY_FRACTION * _mem_available()) // max(1, per_row)
    return max(1, min(MAX_AUTO_BATCH, fit, n_prompts))


PICK_BLOCK = 1024  # vocabulary entries per block of the greedy pick (a divisor of the vocabulary near this)


@functools.lru_cache(maxsize=None)
def pick_block(vocab: int) -> int | None:
    """The block size the greedy pick scans ``vocab`` logits in: the divisor of ``vocab`` in
    [256, 4096] closest to :data:`PICK_BLOCK`, with at least two blocks; None if there is none."""
    near = [b for b in range(256, 4097) if vocab % b == 0 and vocab // b >= 2]
    return min(near, key=lambda b: (abs(b - PICK_BLOCK), b)) if near else None


def greedy_pick(logits: torch.Tensor) -> tuple[list[int], list[float]]:
    """Greedy token per row of ``logits`` [B, V] and its top-1 minus top-2 logit gap.

    The token is the one ``argmax`` (what ``generate`` uses) picks: the first maximal id.
    The vocabulary is scanned in blocks: each block's maximum (one vectorised pass), the two
    best blocks, then the top two inside the best block; the second-best logit is the larger
    of the best block's second and the second block's best. torch's top-k and argmax over a
    whole row are slow here (SmolLM2's 49,152 logits at 128 rows: 6.1-6.8 ms against 1.0 ms,
    measured on this machine); the values compared are the same, so the token and gap are too.
    On an exact tie (between blocks or inside one) top-k may list either id first, so argmax
    decides those rows.
    """
    logits = logits.float()
    B, V = logits.shape
    blk = pick_block(V)
    if blk is None:  # no block size fits this vocabulary: one top-2 scan of the whole row
        top, best = _top_two(logits)
        return best.tolist(), (top[:, 0] - top[:, 1]).tolist()
    blocks = logits.reshape(B, V // blk, blk)
    block_max = blocks.amax(dim=-1)                                  # [B, V / blk]
    bv, block = _top_two(block_max)
    inside = blocks[torch.arange(B, device=logits.device), block]   # [B, blk]
    iv, at = _top_two(inside)
    gap = iv[:, 0] - torch.maximum(iv[:, 1], bv[:, 1])
    return (block * blk + at).tolist(), gap.tolist()


def _top_two(x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """The two largest values of each row of ``x`` [B, N] and the first index of the largest
    (argmax's choice; top-k may list either of two equal values first, so argmax decides
    the rows that have a tie)."""
    top, idx = torch.topk(x, 2, dim=-1)
    first = idx[:, 0]
    tied = top[:, 0] == top[:, 1]
    if bool(tied.any()):
        first = torch.where(tied, x.argmax(dim=-1), first)
    return top, first


def regroup(rows: int, live: int, waiting: int, cap: int, full: bool) -> str:
    """What the batch does before its next step: "join" (ended rows leave and waiting
    questions take their places), "leave" (ended rows leave) or "" (step as it is).

    Waiting questions join once a quarter of the cap (``REGROUP_SHARE``) is free, or when no
    row is live. Once nobody waits, ended rows leave once they are a quarter of the batch, or
    when no row is live; until then they run along (their tokens are ignored). ``full``: the
    longest row has used all its columns; only an ended row can (a live row has at most
    max_new_tokens - 1 generated tokens in the slab), and it leaves at once.
    """
    ended = rows - live
    if waiting and (not live or cap - live >= max(1, cap // REGROUP_SHARE)):
        return "join"
    if ended and ((not waiting and (ended * REGROUP_SHARE >= rows or not live)) or full):
        return "leave"
    return ""


class _Row:
    __slots__ = ("item", "prompt_len", "ids", "margins", "done", "seconds")

    def __init__(self, item: int, prompt_len: int):
        self.item, self.prompt_len = item, prompt_len
        self.ids: list[int] = []
        self.margins: list[float] = []
        self.done = False
        self.seconds = 0.0


class _Run:
    """State of one greedy_generate call."""

    def __init__(self, model, tokenizer, enc, P, max_new_tokens, stop, eos, on_done):
        self.model, self.tokenizer, self.enc, self.P = model, tokenizer, enc, P
        self.max_new, self.stop, self.eos, self.on_done = max_new_tokens, list(stop), eos, on_done
        self.watcher = StopWatcher(tokenizer, stop)
        self.device = model.device
        self.pad = tokenizer.pad_token_id if tokenizer.pad_token_id is not None else 0
        self.shared_seconds = 0.0  # each item's share of the prefix computation

    def advance(self, rows: list[_Row], logits: torch.Tensor, seconds: float) -> None:
        """Take one greedy token per live row from ``logits`` [B, V]; finish rows that end."""
        live = [r for r in rows if not r.done]
        for r in live:
            r.seconds += seconds / max(1, len(live))
        toks, gaps = greedy_pick(logits)
        for r, t, g in zip(rows, toks, gaps):
            if r.done:
                continue
            r.ids.append(t)
            r.margins.append(g)
            if t in self.eos or self.watcher.hit(r.ids) or len(r.ids) >= self.max_new:
                self.finish(r)

    def finish(self, r: _Row) -> None:
        r.done = True
        text, k, how = settle(self.tokenizer, r.ids, self.stop, self.eos)
        margin = min(r.margins[:k], default=float("inf"))
        self.on_done(r.item, Generation(text=text, prompt_tokens=r.prompt_len, new_tokens=k,
                                        min_margin=margin, finish=how,
                                        seconds=r.seconds + self.shared_seconds))

    def prefill(self, plan: AttentionPlan, prefix_kv, items: list[int]) -> Iterator[tuple[Slab, list[_Row]]]:
        """New rows for ``items`` (longest first), group by group, in groups of similar suffix length.

        Each group is padded only to its own longest suffix: one padded block for all items
        would spend a fifth of the prefill on padding at the demo's 38-66-token suffixes.
        Groups stay large enough (``GROUP_TOKENS``) for efficient matrix products.
        """
        start = 0
        while start < len(items):
            longest = len(self.enc[items[start]]) - self.P
            size = max(1, GROUP_TOKENS // max(1, longest))
            yield self._prefill_group(plan, prefix_kv, items[start:start + size])
            start += size

    def _prefill_group(self, plan: AttentionPlan, prefix_kv, items: list[int]) -> tuple[Slab, list[_Row]]:
        """New rows for ``items``: their suffixes, right-aligned, continuing the shared prefix,
        in a slab of their own (the running batch copies them in)."""
        t0 = time.perf_counter()
        sufs = [self.enc[i][self.P:] for i in items]
        k, S = len(sufs), max(len(s) for s in sufs)
        arena = arena_for(self.model, "prefill")  # the last group's slab has been copied in
        arena.reset(slab_bytes(self.model, k * S), self.device)
        slab = Slab(plan, k, S, prefix_kv, self.device, arena=arena)
        ids = torch.full((k, S), self.pad, dtype=torch.long)
        pos = torch.zeros((k, S), dtype=torch.long)
        real = torch.zeros((k, S), dtype=torch.bool)
        for j, s in enumerate(sufs):
            ids[j, S - len(s):] = torch.tensor(s, dtype=torch.long)
            pos[j, S - len(s):] = torch.arange(self.P, self.P + len(s))
            real[j, S - len(s):] = True
        ids, pos, real = ids.to(self.device), pos.to(self.device), real.to(self.device)
        step = max(1, PREFILL_TOKENS // k)
        for a in range(0, S, step):
            logits = slab.extend(self.model, ids[:, a:a + step], pos[:, a:a + step], real[:, a:a + step])
        rows = [_Row(i, len(self.enc[i])) for i in items]
        self.advance(rows, logits, time.perf_counter() - t0)
        return slab, rows

    def step(self, slab: Slab, rows: list[_Row]) -> None:
        """One decode step for every row of the batch."""
        t0 = time.perf_counter()
        ids = torch.tensor([[r.ids[-1]] for r in rows], dtype=torch.long, device=self.device)
        pos = torch.tensor([[r.prompt_len + len(r.ids) - 1] for r in rows], dtype=torch.long,
                           device=self.device)
        logits = slab.extend(self.model, ids, pos)
        self.advance(rows, logits, time.perf_counter() - t0)


def greedy_generate(model, tokenizer, prompts: Sequence[str], *, max_new_tokens: int,
                    stop: Sequence[str] = (), batch_size: int | None = None,
                    reuse_prefix: bool = True, progress: Callable[[int], None] | None = None,
                    on_result: Callable[[int, Generation], None] | None = None) -> list[Generation]:
    """Greedy completions of complete prompt strings, in prompt order.

    ``batch_size`` overrides the rows decoded together (default: from memory, at most 128);
    ``progress`` is called with the number of items just finished (an increment);
    ``on_result(index, generation)`` fires as each item finishes. While it runs, the model's
    ``config._attn_implementation`` names the engine's attention (restored afterwards), and
    the key/value memory is the model's (kept for its next call), so one model must not serve
    another caller at the same time.
    """
    if max_new_tokens < 1:
        raise BackendError(f"max_new_tokens must be at least 1, got {max_new_tokens}")
    if batch_size is not None and batch_size < 1:
        raise BackendError(f"batch_size must be at least 1, got {batch_size}")
    prompts = list(prompts)
    if not prompts:
        return []
    enc = tokenizer(prompts, add_special_tokens=False)["input_ids"]
    for i, e in enumerate(enc):
        if not e:
            raise BackendError(f"prompt {i} is empty after tokenisation; every prompt needs text")
    P = shared_prefix_length(enc) if reuse_prefix else 0
    eos = eos_ids(model, tokenizer)
    results: list[Generation | None] = [None] * len(prompts)

    def on_done(i: int, g: Generation) -> None:
        results[i] = g
        if on_result:
            on_result(i, g)
        if progress:
            progress(1)

    run = _Run(model, tokenizer, enc, P, max_new_tokens, stop, eos, on_done)
    plan = AttentionPlan(model)
    max_suffix = max(len(e) for e in enc) - P
    # A row holds its suffix (padded to its prefill group's longest) and the keys and values of
    # at most max_new_tokens - 1 generated tokens (the last token is never fed back).
    capacity = max_suffix + max_new_tokens
    cap = min(batch_size or auto_batch_size(model, capacity, len(prompts)), len(prompts))
    # Longest suffixes first: neighbours in a prefill then need little padding.
    waiting = deque(sorted(range(len(prompts)), key=lambda i: (-len(enc[i]), i)))

    settle_allocator()  # once per process: large freed tensors stay with it (see .allocator)
    was_training, attn = model.training, model.config._attn_implementation
    model.eval()
    # Selected only while this call runs: the model object stays as the caller loaded it.
    model.config._attn_implementation = ATTENTION_NAME
    try:
        with torch.inference_mode(), engine_linears(model, pack=should_pack(model, _mem_available())):
            t0 = time.perf_counter()
            arenas = {use: arena_for(model, use) for use in ("prefix", "rows")}
            arenas["prefix"].reset(slab_bytes(model, P), model.device)
            arenas["rows"].reset(slab_bytes(model, cap * capacity), model.device)
            prefix_kv = Slab.for_prefix(model, plan, enc[0][:P], PREFILL_TOKENS, arena=arenas["prefix"])
            run.shared_seconds = (time.perf_counter() - t0) / len(prompts)
            # One slab for the whole call: rows join and leave in place (see .kvslab).
            slab = Slab(plan, 0, capacity, prefix_kv, model.device, capacity_rows=cap, arena=arenas["rows"])
            rows = []
            while waiting or any(not r.done for r in rows):
                live = [j for j, r in enumerate(rows) if not r.done]
                move = regroup(len(rows), len(live), len(waiting), cap,
                               full=bool(rows) and max(slab.tail) >= capacity)
                if move:
                    slab.retain(live)
                    rows = [rows[j] for j in live]
                if move == "join":
                    take = [waiting.popleft() for _ in range(min(cap - len(live), len(waiting)))]
                    for new, new_rows in run.prefill(plan, prefix_kv, take):
                        keep_new = [j for j, r in enumerate(new_rows) if not r.done]
                        slab.admit(new, keep_new)
                        rows += [new_rows[j] for j in keep_new]
                if rows:
                    run.step(slab, rows)
    except RuntimeError as e:  # torch errors (shapes, memory) become one backend error
        raise BackendError(f"greedy decoding failed: {str(e).splitlines()[0]}") from None
    finally:
        model.config._attn_implementation = attn
        model.train(was_training)
    return results
