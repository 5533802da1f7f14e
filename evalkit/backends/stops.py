"""Where a greedy completion ends: stop strings, end-of-sequence, length.

One rule serves both the engine and the reference, so that their texts are comparable:

* the completion's tokens are decoded with ``skip_special_tokens=True``;
* it *stops* at the first token k such that the decoded text of tokens[:k] contains a stop
  string; its text is that decoded text cut before the earliest stop string in it, and
  ``new_tokens`` is k (the token that completed the stop string is counted);
* otherwise it ends at an end-of-sequence token (counted, not shown) or at the length limit.
"""

from __future__ import annotations

from typing import Sequence

__all__ = ["StopWatcher", "settle", "cut_at_stop"]


def cut_at_stop(text: str, stop: Sequence[str]) -> int | None:
    """Index of the earliest stop string in ``text``, or None."""
    found = [i for i in (text.find(s) for s in stop) if i >= 0]
    return min(found) if found else None


class StopWatcher:
    """Cheap per-token check: decodes only a short tail of the newest tokens.

    A stop string of b UTF-8 bytes overlaps at most b tokens (every token carries at least
    one byte), so a tail of b + 2 tokens holds it with one spare token in front; the spare
    token absorbs decoders that strip a leading space from the first token of a text.
    A hit is confirmed on the full text by :func:`settle`, which decides the final cut.
    """

    def __init__(self, tokenizer, stop: Sequence[str]):
        self.tokenizer = tokenizer
        self.stop = [s for s in stop if s]
        self.window = max((len(s.encode("utf-8")) for s in self.stop), default=0) + 2

    def hit(self, ids: Sequence[int]) -> bool:
        """True when the tail of ``ids`` decodes to text containing a stop string."""
        if not self.stop:
            return False
        tail = self.tokenizer.decode(ids[-self.window:], skip_special_tokens=True)
        return cut_at_stop(tail, self.stop) is not None


def _decode(tokenizer, ids: Sequence[int]) -> str:
    return tokenizer.decode(list(ids), skip_special_tokens=True)


def settle(tokenizer, ids: Sequence[int], stop: Sequence[str], eos: set[int]) -> tuple[str, int, str]:
    """Apply the module's rule to generated ``ids``: return (text, new_tokens, finish)."""
    stop = [s for s in stop if s]
    full = _decode(tokenizer, ids)
    if stop and cut_at_stop(full, stop) is not None:
        # Smallest k whose decoded prefix holds a stop string; containment grows with k,
        # so a binary search needs only a handful of decodes.
        lo, hi = 1, len(ids)
        while lo < hi:
            mid = (lo + hi) // 2
            if cut_at_stop(_decode(tokenizer, ids[:mid]), stop) is not None:
                hi = mid
            else:
                lo = mid + 1
        text = _decode(tokenizer, ids[:lo])
        return text[: cut_at_stop(text, stop)], lo, "stop"
    if ids and ids[-1] in eos:
        return full, len(ids), "eos"
    return full, len(ids), "length"
