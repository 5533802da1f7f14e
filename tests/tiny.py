"""Build real, tiny causal language models at test time.

``build_tiny_model(folder)`` writes a complete transformers folder (config.json, safetensors
weights, tokenizer.json, generation config) that ``from_pretrained`` loads like any downloaded
model. Weights are random but seeded, so two builds with the same arguments are byte-identical
in behaviour. The tokenizer is a byte-level BPE trained in memory on a small invented corpus:
it encodes any text (unknown characters fall back to bytes), merges common words into single
tokens the way real tokenizers do, and decodes back to the original string.

Used by model-loading tests and by runner tests that need a model that actually runs.
"""

from __future__ import annotations

import json
from pathlib import Path

__all__ = ["build_tiny_model", "build_tiny_gguf", "TINY_CHAT_TEMPLATE", "SPECIAL_TOKENS", "ARCHITECTURES"]

# A chat template in the ChatML shape many small instruct models use; jinja, rendered by
# transformers' own sandboxed environment in apply_chat_template.
TINY_CHAT_TEMPLATE = (
    "{% for message in messages %}"
    "<|im_start|>{{ message['role'] }}\n{{ message['content'] }}<|im_end|>\n"
    "{% endfor %}"
    "{% if add_generation_prompt %}<|im_start|>assistant\n{% endif %}"
)

SPECIAL_TOKENS = {
    "eos": "<|endoftext|>",
    "pad": "<|pad|>",
    "im_start": "<|im_start|>",
    "im_end": "<|im_end|>",
}

ARCHITECTURES = ("llama", "gemma3")

# Invented scenarios (bike-repair workshop, seed nursery, ferry timetable) plus the words and
# digits prompts in tests use, so BPE learns merges for them and prompts tokenise to few tokens.
_CORPUS = [
    "The bike-repair workshop fixed 14 punctures on Monday and 9 on Tuesday.",
    "A spoke costs 3 coins; a new chain costs 27 coins. How many coins for 4 spokes?",
    "Question: The seed nursery sowed 120 trays with 24 seedlings each. How many seedlings?",
    "Answer: 120 * 24 = 2880. The answer is 2880.",
    "The ferry leaves at 09:15 and the crossing takes 45 minutes, so it arrives at 10:00.",
    "Let's think step by step. First, 3 + 4 = 7. Then 7 * 2 = 14. So the answer is 14.",
    "Q: If each tray holds 6 pots and there are 8 trays, how many pots are there? A: 48",
    "The mechanic trued 5 wheels before lunch and 7 after lunch, 12 wheels in all.",
    "Worked solution: 45 - 18 = 27, then 27 / 3 = 9. Final answer: 9",
    "The timetable lists 6 sailings a day, 7 days a week: 6 * 7 = 42 sailings.",
    "0 1 2 3 4 5 6 7 8 9 10 11 12 13 14 15 16 17 18 19 20 25 30 50 100 1000",
    "+ - * / = ( ) . , : ; ? ! ' \" % $ # @ & [ ] { } < > | ~ ^ _ `",
    "the a an and of to in is are was were it that for on with as by at from this",
    "How many? What is the total? The answer is",
    "system user assistant You are a careful assistant who shows your working.",
]


def _train_tokenizer(chat: bool, pad_is_eos: bool, vocab_size: int):
    """Train a byte-level BPE in memory and wrap it as a transformers fast tokenizer."""
    from tokenizers import Tokenizer, decoders, models, pre_tokenizers, trainers
    from transformers import PreTrainedTokenizerFast

    specials = [SPECIAL_TOKENS["eos"]]
    if not pad_is_eos:
        specials.append(SPECIAL_TOKENS["pad"])
    if chat:
        specials += [SPECIAL_TOKENS["im_start"], SPECIAL_TOKENS["im_end"]]

    backend = Tokenizer(models.BPE())
    # add_prefix_space=False keeps "abc" and " abc" distinct, as GPT-2-style tokenizers do.
    backend.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False)
    backend.decoder = decoders.ByteLevel()
    trainer = trainers.BpeTrainer(
        vocab_size=vocab_size,
        special_tokens=specials,
        # Every byte is in the alphabet, so any text (even non-ASCII) encodes without <unk>.
        initial_alphabet=pre_tokenizers.ByteLevel.alphabet(),
        show_progress=False,
    )
    backend.train_from_iterator(_CORPUS, trainer=trainer)

    tok = PreTrainedTokenizerFast(
        tokenizer_object=backend,
        eos_token=SPECIAL_TOKENS["eos"],
        pad_token=SPECIAL_TOKENS["eos"] if pad_is_eos else SPECIAL_TOKENS["pad"],
        additional_special_tokens=(
            [SPECIAL_TOKENS["im_start"], SPECIAL_TOKENS["im_end"]] if chat else None
        ),
        clean_up_tokenization_spaces=False,
    )
    if chat:
        tok.chat_template = TINY_CHAT_TEMPLATE
    return tok


def _config(arch: str, vocab_size: int, eos_id: int, pad_id: int, hidden: int, layers: int):
    # A large initializer_range keeps logits far apart, so greedy decoding rarely meets a
    # near-tie and batched vs single decoding agree in tests (std 0.02 gives gaps ~1e-4).
    common = dict(
        vocab_size=vocab_size,
        hidden_size=hidden,
        intermediate_size=hidden * 2,
        num_hidden_layers=layers,
        num_attention_heads=4,
        num_key_value_heads=2,
        max_position_embeddings=1024,
        initializer_range=0.3,
        eos_token_id=eos_id,
        pad_token_id=pad_id,
        bos_token_id=None,
        tie_word_embeddings=True,
    )
    if arch == "llama":
        from transformers import LlamaConfig

        return LlamaConfig(**common)
    if arch == "gemma3":
        from transformers import Gemma3TextConfig

        # head_dim must be set: Gemma3's default (256) would dwarf the tiny hidden size.
        # sliding_window small and one full-attention layer in two mirror the real layout.
        return Gemma3TextConfig(
            **common, head_dim=hidden // 4, sliding_window=16, sliding_window_pattern=2
        )
    raise ValueError(f"unknown tiny architecture {arch!r}; choose one of {ARCHITECTURES}")


def build_tiny_model(
    folder: str | Path,
    arch: str = "llama",
    seed: int = 0,
    chat: bool = True,
    *,
    pad_is_eos: bool = False,
    hidden_size: int = 32,
    num_layers: int = 2,
    vocab_size: int = 400,
) -> Path:
    """Write a tiny seeded causal LM with a real BPE tokenizer to ``folder``; return the folder.

    ``chat`` adds a ChatML-style chat template and its two special tokens; ``pad_is_eos``
    makes the pad token the end-of-sequence token, as in several real small models.
    """
    import torch
    from transformers import AutoModelForCausalLM, GenerationConfig

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    tok = _train_tokenizer(chat=chat, pad_is_eos=pad_is_eos, vocab_size=vocab_size)
    eos_id = tok.convert_tokens_to_ids(SPECIAL_TOKENS["eos"])
    pad_id = tok.pad_token_id
    config = _config(arch, len(tok), eos_id, pad_id, hidden_size, num_layers)

    torch.manual_seed(seed)
    model = AutoModelForCausalLM.from_config(config, dtype=torch.float32)
    model.eval()
    model.generation_config = GenerationConfig(
        eos_token_id=eos_id, pad_token_id=pad_id, do_sample=False
    )
    model.save_pretrained(folder)
    tok.save_pretrained(folder)
    return folder


def _permute_for_gguf(weight, n_head: int):
    """Reorder q/k projection rows the way llama.cpp's converter does for llama models.

    llama.cpp applies rotary embeddings to interleaved pairs, transformers to split halves;
    GGUF files hold the llama.cpp order and transformers undoes it when loading.
    """
    return (
        weight.reshape(n_head, 2, weight.shape[0] // n_head // 2, *weight.shape[1:])
        .swapaxes(1, 2)
        .reshape(weight.shape)
    )


def build_tiny_gguf(path: str | Path, seed: int = 0, chat: bool = True) -> Path:
    """Write a tiny llama model as a float32 GGUF file (weights and tokenizer); return its path.

    The weights and tokenizer are those of ``build_tiny_model(..., arch="llama")`` with the same
    seed, so loading the GGUF must give that folder's logits.
    """
    import tempfile

    import gguf
    import numpy as np
    from transformers import AutoModelForCausalLM, AutoTokenizer

    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory() as tmp:
        folder = build_tiny_model(tmp, arch="llama", seed=seed, chat=chat)
        tok = AutoTokenizer.from_pretrained(folder)
        model = AutoModelForCausalLM.from_pretrained(folder)
        backend = json.loads((folder / "tokenizer.json").read_text(encoding="utf-8"))
    cfg = model.config
    head_dim = cfg.hidden_size // cfg.num_attention_heads

    writer = gguf.GGUFWriter(str(path), "llama")
    writer.add_name("evalkit tiny llama")
    writer.add_block_count(cfg.num_hidden_layers)
    writer.add_context_length(cfg.max_position_embeddings)
    writer.add_embedding_length(cfg.hidden_size)
    writer.add_feed_forward_length(cfg.intermediate_size)
    writer.add_head_count(cfg.num_attention_heads)
    writer.add_head_count_kv(cfg.num_key_value_heads)
    writer.add_rope_dimension_count(head_dim)
    writer.add_rope_freq_base(float(cfg.rope_parameters["rope_theta"]))
    writer.add_layer_norm_rms_eps(cfg.rms_norm_eps)
    writer.add_vocab_size(cfg.vocab_size)
    writer.add_file_type(gguf.LlamaFileType.ALL_F32)

    vocab = sorted(tok.get_vocab().items(), key=lambda kv: kv[1])
    specials = set(tok.all_special_tokens)
    writer.add_tokenizer_model("gpt2")
    writer.add_tokenizer_pre("gpt2")
    writer.add_token_list([t for t, _ in vocab])
    writer.add_token_types([
        gguf.TokenType.CONTROL if t in specials else gguf.TokenType.NORMAL for t, _ in vocab
    ])
    merges = backend["model"]["merges"]
    writer.add_token_merges([m if isinstance(m, str) else " ".join(m) for m in merges])
    writer.add_eos_token_id(tok.eos_token_id)
    writer.add_pad_token_id(tok.pad_token_id)
    writer.add_add_bos_token(False)
    if chat:
        writer.add_chat_template(TINY_CHAT_TEMPLATE)

    sd = {k: v.detach().float().numpy() for k, v in model.state_dict().items()}
    writer.add_tensor("token_embd.weight", sd["model.embed_tokens.weight"])
    writer.add_tensor("output_norm.weight", sd["model.norm.weight"])
    for i in range(cfg.num_hidden_layers):
        p = f"model.layers.{i}."
        q = _permute_for_gguf(sd[p + "self_attn.q_proj.weight"], cfg.num_attention_heads)
        k = _permute_for_gguf(sd[p + "self_attn.k_proj.weight"], cfg.num_key_value_heads)
        for name, value in [
            ("attn_norm", sd[p + "input_layernorm.weight"]),
            ("ffn_norm", sd[p + "post_attention_layernorm.weight"]),
            ("attn_q", q), ("attn_k", k),
            ("attn_v", sd[p + "self_attn.v_proj.weight"]),
            ("attn_output", sd[p + "self_attn.o_proj.weight"]),
            ("ffn_gate", sd[p + "mlp.gate_proj.weight"]),
            ("ffn_up", sd[p + "mlp.up_proj.weight"]),
            ("ffn_down", sd[p + "mlp.down_proj.weight"]),
        ]:
            writer.add_tensor(f"blk.{i}.{name}.weight", np.ascontiguousarray(value, dtype=np.float32))
    writer.write_header_to_file()
    writer.write_kv_data_to_file()
    writer.write_tensors_to_file()
    writer.close()
    return path
