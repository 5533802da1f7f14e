"""Memory for key/value buffers, kept with the model and reused from one engine call to the next.

An engine call fills a few hundred megabytes of key/value buffers (SmolLM2-135M, 64 worked
questions: 572 MB for the running batch). Freshly allocated memory reaches the process one page
fault at a time, and memory handed back to the system costs that again the next time; on the
virtual machines measured here a fault cost about 6 microseconds, so allocating the running
batch's buffers took 0.36-0.44 s of a 6.6 s direct run and 0.9 s of a 16.5 s worked run, every
call. An :class:`Arena` keeps one flat block and hands out views of it, so later calls (the
next condition of a study, the next run of a benchmark) reuse pages already in place.

Arenas are kept per model (weakly: they go with it) and per use (``"rows"``, ``"prefill"``,
``"prefix"``), so buffers of one use never alias another's. :func:`release` drops a model's
arenas at once.
"""

from __future__ import annotations

import math
import weakref

import torch

__all__ = ["Arena", "arena_for", "release"]

ALIGN = 64  # bytes: every view starts on a cache line

_arenas: "weakref.WeakKeyDictionary[torch.nn.Module, dict[str, Arena]]" = weakref.WeakKeyDictionary()


class Arena:
    """One flat block of memory, handed out as tensors from the start after each :meth:`reset`.

    A request that does not fit gets a tensor of its own, and the block grows to the size
    the last round asked for at the next :meth:`reset`; callers that know their needs say so
    in ``reset(nbytes)``.
    """

    def __init__(self):
        self.block: torch.Tensor | None = None  # uint8
        self.used = 0
        self.asked = 0

    @property
    def nbytes(self) -> int:
        return 0 if self.block is None else self.block.numel()

    def reset(self, nbytes: int = 0, device: torch.device | str = "cpu") -> None:
        """Start handing out from the beginning again; grow the block to ``nbytes`` (or to what
        the last round asked for) first. Tensors handed out before must no longer be used."""
        want = max(nbytes, self.asked)
        device = torch.device(device)
        if self.block is None or self.block.numel() < want or self.block.device != device:
            self.block = None  # freed before the larger block is taken
            self.block = torch.empty(want, dtype=torch.uint8, device=device) if want else None
        self.used = self.asked = 0

    def take(self, shape: tuple[int, ...], dtype: torch.dtype, device: torch.device | str) -> torch.Tensor:
        """An uninitialised tensor of ``shape`` and ``dtype``: a view of the block if it fits."""
        size = math.prod(shape) * torch.empty((), dtype=dtype).element_size()
        size = -(-size // ALIGN) * ALIGN
        self.asked += size
        block = self.block
        if block is not None and block.device == torch.device(device) and self.used + size <= block.numel():
            view = block[self.used:self.used + size]
            self.used += size
            return view.view(dtype)[: math.prod(shape)].view(shape)
        return torch.empty(shape, dtype=dtype, device=device)


def arena_for(model: torch.nn.Module, use: str) -> Arena:
    """The arena of ``model`` for one use, made on first request."""
    per_model = _arenas.setdefault(model, {})
    return per_model.setdefault(use, Arena())


def release(model: torch.nn.Module) -> int:
    """Drop ``model``'s arenas (their memory goes back once no tensor views it); return the bytes held."""
    held = sum(a.nbytes for a in _arenas.pop(model, {}).values())
    return held
