"""Local transformers models on the CPU, decoded greedily by evalkit's engine."""

from __future__ import annotations

from typing import Sequence

from ..errors import BackendError
from .base import Completion, ResultCallback

__all__ = ["LocalBackend"]


class LocalBackend:
    """A transformers causal LM loaded in this process, decoded by the engine, which reports
    each completion as it finishes so the runner can commit it at once."""

    def __init__(self, ref: str, dtype: str = "float32", threads: int | None = None,
                 batch_size: int | None = None):
        from transformers.utils import logging as hf_logging

        from ..models import load, resolve

        # evalkit's own progress display covers loading; transformers' bars would interleave with it
        hf_logging.disable_progress_bar()
        self.ref, self.batch_size = ref, batch_size
        self.loaded = load(resolve(ref), dtype=dtype, threads=threads)
        self.model, self.tokenizer = self.loaded.model, self.loaded.tokenizer
        self.chat = bool(getattr(self.tokenizer, "chat_template", None))
        self._bos_text = self._bos_prefix()

    def _bos_prefix(self) -> str:
        # Prompts are tokenised without special tokens so that the text shown by preview is
        # exactly what the model sees; a tokenizer that would add BOS gets it as text instead.
        tok = self.tokenizer
        bos = getattr(tok, "bos_token", None)
        if not bos or tok.bos_token_id is None:
            return ""
        ids = tok("x", add_special_tokens=True)["input_ids"]
        return bos if ids and ids[0] == tok.bos_token_id else ""

    def describe(self) -> dict:
        from .engine import _mem_available
        from .linear_order import layer_form

        src = self.loaded.source
        return {
            "backend": "local",
            "model": self.ref,
            "kind": src.kind,
            "path": str(src.path) if src.path else None,
            "gguf_file": src.gguf_file,
            "sha256": src.sha256,
            "dtype": self.loaded.dtype,
            "threads": self.loaded.threads,
            "linear_layers": layer_form(self.model, _mem_available()),
            "chat_template": self.chat,
            "parameters": self.loaded.n_parameters,
            "non_embedding_parameters": self.loaded.n_non_embedding_parameters,
            "load_seconds": round(self.loaded.load_seconds, 3),
            "load_from_cache": self.loaded.from_cache,
        }

    def format_prompt(self, text: str) -> str:
        if self.chat:
            try:
                return self.tokenizer.apply_chat_template(
                    [{"role": "user", "content": text}], tokenize=False, add_generation_prompt=True
                )
            except Exception as e:  # a broken chat template is the model's, reported plainly
                raise BackendError(f"model '{self.ref}': its chat template failed: {e}") from None
        return self._bos_text + text

    def generate(self, prompts: Sequence[str], *, max_new_tokens: int, stop: Sequence[str],
                 on_result: ResultCallback | None = None) -> list[Completion]:
        from .engine import greedy_generate

        done: dict[int, Completion] = {}

        def relay(i: int, g) -> None:
            done[i] = _completion(g)
            if on_result:
                on_result(i, done[i])

        try:
            greedy_generate(self.model, self.tokenizer, list(prompts), max_new_tokens=max_new_tokens,
                            stop=list(stop), batch_size=self.batch_size, on_result=relay)
        except RuntimeError as e:  # torch errors (out of memory, shape) are translated here
            raise BackendError(f"model '{self.ref}': generation failed: {str(e).splitlines()[0]}") from None
        return [done[i] for i in range(len(prompts))]


def _completion(g) -> Completion:
    margin = g.min_margin if g.min_margin != float("inf") else None
    return Completion(text=g.text, prompt_tokens=g.prompt_tokens, new_tokens=g.new_tokens,
                      min_margin=margin, finish=g.finish, seconds=g.seconds,
                      extra=dict(getattr(g, "extra", {}) or {}))
