"""The one small protocol every way of running a model implements.

A backend turns complete prompt texts into greedy completions. The runner never sees
tensors; scoring, audit and statistics never see a backend. A server backend or a
distributed executor implements the same three members.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Protocol, Sequence, runtime_checkable

__all__ = ["Completion", "Backend", "ResultCallback", "TIE_MARGIN"]

TIE_MARGIN = 1e-3
"""A top-1 minus top-2 logit gap below this is a near-tie: another batch shape may break it the other way."""


@dataclass
class Completion:
    """A backend's answer to one prompt."""

    text: str                 # cut before the first stop string
    prompt_tokens: int
    new_tokens: int
    min_margin: float | None  # smallest top-1 minus top-2 logit gap along the way; None if unknown
    finish: str               # "stop" | "eos" | "length"
    seconds: float
    extra: dict = field(default_factory=dict)  # backend-specific facts (e.g. calculator interventions)


ResultCallback = Callable[[int, Completion], None]
"""Called with (index into the prompts, completion) as each completion finishes."""


@runtime_checkable
class Backend(Protocol):
    """What the runner needs from a model."""

    chat: bool
    """True when prompts are wrapped in the model's chat template."""

    def describe(self) -> dict:
        """Facts for the manifest: model reference, file sha256, dtype, threads, parameter counts."""

    def format_prompt(self, text: str) -> str:
        """The exact text the model will see: chat template applied for instruct models."""

    def generate(self, prompts: Sequence[str], *, max_new_tokens: int, stop: Sequence[str],
                 on_result: ResultCallback | None = None) -> list[Completion]:
        """Greedy completions, in prompt order; `on_result` fires as each finishes."""
