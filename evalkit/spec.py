"""Task specs and studies: TOML files validated with pydantic.

A *task spec* names one task: where its question set and exemplar pool come from, which
fields hold what, the answer kind and its tolerance, and optional template overrides.
A *study* is a grid of tasks x models x styles x shots x draws with decoding limits; it
expands into *conditions*.

Every validation problem becomes one ``SpecError`` line naming the file and the field.
"""

from __future__ import annotations

import hashlib
import tomllib
from pathlib import Path
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from .errors import SpecError

__all__ = [
    "STYLES",
    "SourceSpec",
    "QuestionSource",
    "ExemplarSource",
    "AnswerSpec",
    "TaskSpec",
    "Decoding",
    "Study",
    "Condition",
    "load_task",
    "load_study",
    "check_spec",
]

STYLES = ("direct", "worked", "worked-zero")
"""direct: exemplars show answers only; worked: exemplars show worked solutions; worked-zero: no exemplars, a reasoning cue."""

FORMATS = ("jsonl", "json", "csv", "parquet")


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)


class SourceSpec(_Strict):
    """Where a table of items comes from: a local file (JSONL/CSV/Parquet) or a hub dataset."""

    path: str | None = Field(None, description="file path, relative to the spec file")
    hub: str | None = Field(None, description="hub dataset name, e.g. 'org/name'")
    config: str | None = Field(None, description="hub dataset configuration name")
    split: str = "train"
    format: Literal["jsonl", "json", "csv", "parquet"] | None = None
    id_field: str = "id"
    question_field: str = "question"
    answer_field: str = "answer"

    @model_validator(mode="after")
    def _one_source(self) -> "SourceSpec":
        if (self.path is None) == (self.hub is None):
            raise ValueError("give exactly one of 'path' (a local file) or 'hub' (a dataset name)")
        if self.path is not None and self.format is None:
            suffix = Path(self.path).suffix.lstrip(".").lower()
            if suffix not in FORMATS:
                raise ValueError(
                    f"cannot tell the format of '{self.path}' from its suffix; set format to one of {', '.join(FORMATS)}"
                )
        return self

    @property
    def file_format(self) -> str:
        return self.format or Path(self.path or "").suffix.lstrip(".").lower()


class QuestionSource(SourceSpec):
    """The question set: id, question, gold answer and an optional group per item."""

    group_field: str | None = "group"


class ExemplarSource(SourceSpec):
    """The exemplar pool: id, question, worked solution (steps) and answer per item."""

    steps_field: str = "steps"


class AnswerSpec(_Strict):
    """How final answers are extracted and compared."""

    kind: Literal["number", "choice", "text"] = "number"
    tolerance: float = Field(0.0, ge=0.0, description="largest difference still counted as correct")
    relative: bool = Field(False, description="tolerance is relative to the gold value")
    choices: list[str] | None = None


class TaskSpec(_Strict):
    """One task: question set, exemplar pool, answer kind, templates."""

    name: str = Field(pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")
    description: str = ""
    questions: QuestionSource
    exemplars: ExemplarSource
    answer: AnswerSpec = AnswerSpec()
    templates: dict[str, str] = Field(default_factory=dict, description="style -> template file, relative to the spec")

    # Set by load_task, not by the file.
    source_file: Path | None = Field(None, exclude=True)

    @field_validator("templates")
    @classmethod
    def _known_styles(cls, v: dict[str, str]) -> dict[str, str]:
        for style in v:
            if style not in STYLES:
                raise ValueError(f"unknown style '{style}'; styles are {', '.join(STYLES)}")
        return v

    @property
    def folder(self) -> Path:
        return self.source_file.parent if self.source_file else Path.cwd()

    def resolve(self, relative: str) -> Path:
        """A path named in the spec, taken relative to the spec file."""
        p = Path(relative).expanduser()
        return p if p.is_absolute() else self.folder / p


class Decoding(_Strict):
    """Greedy decoding limits, per style where they differ."""

    max_new_tokens: dict[str, int] = Field(
        default_factory=lambda: {"direct": 24, "worked": 160, "worked-zero": 160}
    )
    stop: list[str] = Field(default_factory=lambda: ["\nQuestion:", "\n\n\n"])
    dtype: Literal["float32", "bfloat16"] = "float32"
    batch_size: int | None = Field(None, ge=1)
    threads: int | None = Field(None, ge=1)

    @field_validator("max_new_tokens")
    @classmethod
    def _styles(cls, v: dict[str, int]) -> dict[str, int]:
        defaults = {"direct": 24, "worked": 160, "worked-zero": 160}
        for style, n in v.items():
            if style not in STYLES:
                raise ValueError(f"unknown style '{style}'; styles are {', '.join(STYLES)}")
            if n < 1:
                raise ValueError(f"max_new_tokens for '{style}' must be at least 1")
        return {**defaults, **v}

    def limit(self, style: str) -> int:
        return self.max_new_tokens[style]


class Study(_Strict):
    """A grid of tasks x models x styles x shots x draws."""

    name: str = Field("study", pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")
    tasks: list[str] = Field(min_length=1, description="task spec files, relative to the study file")
    models: list[str] = Field(min_length=1)
    styles: list[str] = Field(default_factory=lambda: ["direct", "worked"], min_length=1)
    shots: list[int] = Field(default_factory=lambda: [4], min_length=1)
    draws: int = Field(1, ge=1, description="exemplar draws per (style, shots), each from its own seed")
    seed: int = 0
    limit: int | None = Field(None, ge=1, description="score only the first N questions of each task")
    calculator: bool = Field(False, description="also run each reasoning style with the calculator in the loop")
    decoding: Decoding = Decoding()

    source_file: Path | None = Field(None, exclude=True)

    @field_validator("styles")
    @classmethod
    def _styles(cls, v: list[str]) -> list[str]:
        for style in v:
            if style not in STYLES:
                raise ValueError(f"unknown style '{style}'; styles are {', '.join(STYLES)}")
        return list(dict.fromkeys(v))

    @field_validator("shots")
    @classmethod
    def _shots(cls, v: list[int]) -> list[int]:
        if any(s < 0 for s in v):
            raise ValueError("shots must be 0 or more")
        return sorted(set(v))

    def task_paths(self) -> list[Path]:
        base = self.source_file.parent if self.source_file else Path.cwd()
        return [p if (p := Path(t).expanduser()).is_absolute() else base / p for t in self.tasks]


class Condition(_Strict):
    """One cell of a study's grid."""

    task: str
    model: str
    style: str
    shots: int
    draw: int
    seed: int
    calculator: bool = False

    @property
    def id(self) -> str:
        key = f"{self.task}|{self.model}|{self.style}|{self.shots}|{self.draw}|{self.seed}"
        if self.calculator:
            key += "|calculator"
        return hashlib.sha256(key.encode()).hexdigest()[:12]

    @property
    def arm(self) -> str:
        """The style as reports name it: ``worked+calculator`` when the calculator is on."""
        return f"{self.style}+calculator" if self.calculator else self.style

    @property
    def label(self) -> str:
        return f"{self.model} | {self.arm} | {self.shots}-shot | draw {self.draw}"


def _format_error(path: Path, err: ValidationError) -> SpecError:
    first = err.errors()[0]
    field = ".".join(str(p) for p in first["loc"]) or None
    msg = first["msg"].removeprefix("Value error, ")
    if first["type"] == "missing":
        msg = "required field is missing"
    elif first["type"] == "extra_forbidden":
        msg = "unknown field (check its spelling)"
    elif "input" in first and first["type"] not in ("value_error",):
        msg = f"{msg} (got {first['input']!r})"
    more = len(err.errors()) - 1
    if more:
        msg += f" (and {more} more problem{'s' if more > 1 else ''})"
    return SpecError(str(path), field, msg)


def _read_toml(path: Path) -> dict:
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise SpecError(str(path), None, "file not found") from None
    except OSError as e:
        raise SpecError(str(path), None, f"cannot read: {e.strerror}") from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise SpecError(str(path), None, f"not valid TOML: {e}") from None


def _validated(model: type[BaseModel], path: Path):
    """A TOML file validated as `model`, problems as one SpecError line."""
    raw = _read_toml(path)
    try:
        return model.model_validate({**raw, "source_file": path.resolve()})
    except ValidationError as e:
        raise _format_error(path, e) from None


def load_task(path: str | Path) -> TaskSpec:
    """Read and validate a task spec file."""
    path = Path(path)
    spec = _validated(TaskSpec, path)
    for style, rel in spec.templates.items():
        if not spec.resolve(rel).is_file():
            raise SpecError(str(path), f"templates.{style}", f"template file '{rel}' not found")
    if spec.questions.path and not spec.resolve(spec.questions.path).is_file():
        raise SpecError(str(path), "questions.path", f"file '{spec.questions.path}' not found")
    if spec.exemplars.path and not spec.resolve(spec.exemplars.path).is_file():
        raise SpecError(str(path), "exemplars.path", f"file '{spec.exemplars.path}' not found")
    return spec


def load_study(path: str | Path) -> Study:
    """Read and validate a study file."""
    path = Path(path)
    study = _validated(Study, path)
    for i, task in enumerate(study.task_paths()):
        if not task.is_file():
            raise SpecError(str(path), f"tasks.{i}", f"task spec '{study.tasks[i]}' not found")
    return study


def check_spec(path: str | Path):
    """Validate a task spec and its data (ids, fields, leakage); return the loaded task."""
    from .data import load_task_data

    return load_task_data(load_task(path))
