"""The plain baseline the engine must match: transformers ``generate``, one prompt at a time.

Greedy, no stop strings during generation; the completion is cut afterwards by the same rule
the engine uses (:func:`evalkit.backends.stops.settle`). Margins come from the raw logits
``generate`` returns (``output_logits=True``).
"""

from __future__ import annotations

import time
from typing import Sequence

import torch

from ..errors import BackendError
from .engine import Generation, eos_ids
from .stops import settle

__all__ = ["reference_generate", "reference_trace"]


def _greedy_config(model, tokenizer, max_new_tokens: int, eos: set[int]):
    from transformers import GenerationConfig

    pad = tokenizer.pad_token_id
    if pad is None:
        pad = min(eos) if eos else 0
    # Neutral values set explicitly: generate fills unset fields from the model's own
    # generation config, which may carry sampling or penalty settings.
    return GenerationConfig(
        do_sample=False, num_beams=1, max_new_tokens=max_new_tokens, min_new_tokens=0,
        repetition_penalty=1.0, no_repeat_ngram_size=0, eos_token_id=sorted(eos) or None,
        pad_token_id=pad, output_logits=True, return_dict_in_generate=True,
        temperature=None, top_k=None, top_p=None,
    )


def reference_trace(model, tokenizer, prompt: str, *, max_new_tokens: int,
                    eos: set[int] | None = None) -> tuple[list[int], list[float], int]:
    """Greedy ``generate`` of one prompt: (new token ids, top-1 minus top-2 gap per step, prompt tokens)."""
    eos = eos_ids(model, tokenizer) if eos is None else eos
    ids = tokenizer(prompt, add_special_tokens=False, return_tensors="pt")["input_ids"].to(model.device)
    config = _greedy_config(model, tokenizer, max_new_tokens, eos)
    with torch.inference_mode():
        out = model.generate(ids, attention_mask=torch.ones_like(ids), generation_config=config)
    new = out.sequences[0, ids.shape[1]:].tolist()
    margins = []
    for t, step_logits in zip(new, out.logits):
        row = step_logits[0].float()
        top = torch.topk(row, 2)
        if int(row.argmax()) != t:
            raise BackendError("reference decoding was not plain greedy: a logits processor changed "
                               "the chosen token; check the model's generation config")
        margins.append(float(top.values[0] - top.values[1]))
    return new, margins, ids.shape[1]


def reference_generate(model, tokenizer, prompts: Sequence[str], *, max_new_tokens: int,
                       stop: Sequence[str] = ()) -> list[Generation]:
    """One-at-a-time greedy ``generate``, cut at the first stop string afterwards."""
    eos = eos_ids(model, tokenizer)
    out = []
    for prompt in prompts:
        t0 = time.perf_counter()
        new, margins, n_prompt = reference_trace(model, tokenizer, prompt,
                                                 max_new_tokens=max_new_tokens, eos=eos)
        text, k, how = settle(tokenizer, new, stop, eos)
        out.append(Generation(text=text, prompt_tokens=n_prompt, new_tokens=k,
                              min_margin=min(margins[:k], default=float("inf")), finish=how,
                              seconds=time.perf_counter() - t0))
    return out
