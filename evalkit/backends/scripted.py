"""A backend that returns canned completions: scoring, audit and reports tested without a model."""

from __future__ import annotations

import hashlib
from typing import Callable, Mapping, Sequence

from ..errors import BackendError
from .base import Completion, ResultCallback

__all__ = ["ScriptedBackend"]


class ScriptedBackend:
    """Completions from a mapping or a function of the prompt text.

    A mapping may be keyed by the prompt text, or by a substring (the question) that occurs in
    exactly one prompt; a missing prompt is an error, never a silent empty answer.
    """

    def __init__(self, script: Mapping[str, str] | Callable[[str], str], name: str = "scripted",
                 chat: bool = False):
        self.script, self.name, self.chat = script, name, chat
        self.calls: list[str] = []

    def describe(self) -> dict:
        ident = hashlib.sha256(repr(sorted(self.script.items())).encode()).hexdigest() \
            if isinstance(self.script, Mapping) else f"function:{getattr(self.script, '__name__', 'script')}"
        return {"backend": "scripted", "model": self.name, "sha256": ident, "dtype": "none", "threads": 0}

    def format_prompt(self, text: str) -> str:
        return f"<user>\n{text}\n<assistant>\n" if self.chat else text

    def _lookup(self, prompt: str) -> str:
        if callable(self.script):
            return self.script(prompt)
        if prompt in self.script:
            return self.script[prompt]
        hits = [k for k in self.script if k in prompt]
        if len(hits) == 1:
            return self.script[hits[0]]
        # the longest key that occurs is the most specific (the question after its exemplars)
        if hits:
            return self.script[max(hits, key=len)]
        raise BackendError(f"scripted backend '{self.name}' has no completion for prompt ending {prompt[-80:]!r}")

    def generate(self, prompts: Sequence[str], *, max_new_tokens: int, stop: Sequence[str],
                 on_result: ResultCallback | None = None) -> list[Completion]:
        out = []
        for i, prompt in enumerate(prompts):
            self.calls.append(prompt)
            text, finish = self._lookup(prompt), "eos"
            cuts = [text.find(s) for s in stop if s and s in text]
            if cuts:
                text, finish = text[: min(cuts)], "stop"
            words = text.split()
            if len(words) > max_new_tokens:
                text, finish = " ".join(words[:max_new_tokens]), "length"
            c = Completion(text=text, prompt_tokens=len(prompt.split()), new_tokens=len(text.split()),
                           min_margin=None, finish=finish, seconds=0.0)
            out.append(c)
            if on_result:
                on_result(i, c)
        return out
