"""manifest.json: everything needed to re-run a study and to know what produced its numbers."""

from __future__ import annotations

import hashlib
import json
import os
import platform
import sys
import time
from importlib import metadata
from pathlib import Path

from . import __version__
from .data import TaskData
from .prompts import sha256_text, template_path, template_source
from .spec import STYLES, Study

__all__ = ["build_manifest", "write_manifest", "read_manifest", "MANIFEST_NAME", "file_sha256"]

MANIFEST_NAME = "manifest.json"
_PACKAGES = ("torch", "transformers", "tokenizers", "gguf", "datasets", "pandas", "jinja2",
             "pydantic", "scipy", "statsmodels", "numpy")


def file_sha256(path: str | Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _versions() -> dict[str, str | None]:
    out = {}
    for name in _PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = None
    return out


def _machine() -> dict:
    info = {
        "platform": platform.platform(),
        "processor": platform.processor() or platform.machine(),
        "cpu_count": os.cpu_count(),
        "python": sys.version.split()[0],
    }
    try:
        import torch

        info["torch_threads"] = torch.get_num_threads()
    except ImportError:
        pass
    return info


def _task_entry(task: TaskData, styles: list[str]) -> dict:
    spec = task.spec
    entry = {
        "name": spec.name,
        "spec_file": str(spec.source_file),
        "spec_sha256": file_sha256(spec.source_file) if spec.source_file else None,
        "questions": len(task.questions),
        "exemplars": len(task.exemplars),
        "templates": {},
        "data": {},
    }
    for style in styles:
        entry["templates"][style] = {
            "file": str(template_path(spec, style)),
            "sha256": sha256_text(template_source(spec, style)),
        }
    for part, src in (("questions", spec.questions), ("exemplars", spec.exemplars)):
        if src.path:
            entry["data"][part] = {"file": str(spec.resolve(src.path)), "sha256": file_sha256(spec.resolve(src.path))}
        else:
            entry["data"][part] = {"hub": src.hub, "config": src.config, "split": src.split}
    return entry


def build_manifest(study: Study, tasks: list[TaskData]) -> dict:
    """The manifest of a run at its start; models and counts are added as they become known."""
    return {
        "evalkit": __version__,
        "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "study": study.model_dump(mode="json"),
        "study_file": str(study.source_file) if study.source_file else None,
        "tasks": [_task_entry(t, [s for s in STYLES if s in study.styles]) for t in tasks],
        "decoding": study.decoding.model_dump(mode="json"),
        "seed": study.seed,
        "models": {},
        "packages": _versions(),
        "machine": _machine(),
    }


def write_manifest(run_dir: Path, manifest: dict) -> Path:
    path = Path(run_dir) / MANIFEST_NAME
    tmp = path.with_suffix(".tmp")
    tmp.write_text(json.dumps(manifest, indent=2, sort_keys=False, default=str) + "\n", encoding="utf-8")
    tmp.replace(path)
    return path


def read_manifest(run_dir: str | Path) -> dict:
    from .errors import StoreError

    path = Path(run_dir) / MANIFEST_NAME
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise StoreError(f"{path}: no manifest; is '{run_dir}' a run folder made by 'evalkit run'?") from None
    except json.JSONDecodeError as e:
        raise StoreError(f"{path}: manifest is not valid JSON ({e})") from None
