"""Question sets and exemplar pools: load them, check their ids, guard against leakage."""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

from .errors import DataError
from .spec import ExemplarSource, QuestionSource, SourceSpec, TaskSpec

__all__ = ["Question", "Exemplar", "TaskData", "load_task_data", "load_table"]

# datasets' loader names for our file formats.
_LOADERS = {"jsonl": "json", "json": "json", "csv": "csv", "parquet": "parquet"}


@dataclass(frozen=True)
class Question:
    id: str
    question: str
    answer: str
    group: str | None = None


@dataclass(frozen=True)
class Exemplar:
    id: str
    question: str
    steps: str
    answer: str


@dataclass
class TaskData:
    """A task spec with its question set and exemplar pool loaded and checked."""

    spec: TaskSpec
    questions: list[Question]
    exemplars: list[Exemplar]
    notes: list[str] = field(default_factory=list)

    def question_ids(self) -> list[str]:
        return [q.id for q in self.questions]


def _where(spec: TaskSpec, src: SourceSpec) -> str:
    return str(spec.resolve(src.path)) if src.path else f"hub dataset '{src.hub}'"


def load_table(spec: TaskSpec, src: SourceSpec) -> list[dict]:
    """Rows of a local file or hub dataset, through `datasets`."""
    import datasets

    datasets.disable_progress_bars()
    datasets.logging.set_verbosity_error()
    where = _where(spec, src)
    try:
        if src.path:
            ds = datasets.load_dataset(
                _LOADERS[src.file_format], data_files=str(spec.resolve(src.path)), split="train"
            )
        else:
            if os.environ.get("HF_HUB_OFFLINE") == "1" or os.environ.get("HF_DATASETS_OFFLINE") == "1":
                raise DataError(
                    f"{where}: the hub is switched off here (HF_HUB_OFFLINE=1); "
                    "download the dataset elsewhere and point 'path' at a local file"
                )
            ds = datasets.load_dataset(src.hub, src.config, split=src.split)
    except DataError:
        raise
    except (ConnectionError, OSError) as e:
        raise DataError(
            f"{where}: cannot load ({type(e).__name__}: {str(e).splitlines()[0] if str(e) else 'no detail'}); "
            "if this is a hub dataset and there is no network, save it to a local JSONL/CSV/Parquet file"
        ) from None
    except Exception as e:  # datasets raises many types for malformed files
        first = str(e).splitlines()[0] if str(e) else type(e).__name__
        raise DataError(f"{where}: cannot read as {src.file_format or 'a dataset'}: {first}") from None
    return [dict(r) for r in ds]


def _field(row: dict, name: str | None, where: str, i: int, required: bool = True) -> str | None:
    if name is None:
        return None
    if name not in row or row[name] is None or (isinstance(row[name], str) and not row[name].strip()):
        if not required:
            return None
        raise DataError(f"{where}: row {i + 1}: field '{name}' is missing or empty")
    return str(row[name]).strip()


def _check_ids(items, where: str) -> None:
    seen: dict[str, int] = {}
    for i, item in enumerate(items):
        if item.id in seen:
            raise DataError(
                f"{where}: id '{item.id}' appears twice (rows {seen[item.id] + 1} and {i + 1}); ids must be unique"
            )
        seen[item.id] = i


def _questions(spec: TaskSpec, src: QuestionSource) -> list[Question]:
    where = _where(spec, src)
    rows = load_table(spec, src)
    if not rows:
        raise DataError(f"{where}: the question set is empty")
    out = [
        Question(
            id=_field(r, src.id_field, where, i),
            question=_field(r, src.question_field, where, i),
            answer=_field(r, src.answer_field, where, i),
            group=_field(r, src.group_field, where, i, required=False) if src.group_field in r else None,
        )
        for i, r in enumerate(rows)
    ]
    _check_ids(out, where)
    return out


def _exemplars(spec: TaskSpec, src: ExemplarSource) -> list[Exemplar]:
    where = _where(spec, src)
    rows = load_table(spec, src)
    out = [
        Exemplar(
            id=_field(r, src.id_field, where, i),
            question=_field(r, src.question_field, where, i),
            steps=_field(r, src.steps_field, where, i),
            answer=_field(r, src.answer_field, where, i),
        )
        for i, r in enumerate(rows)
    ]
    _check_ids(out, where)
    return out


def load_task_data(spec: TaskSpec) -> TaskData:
    """Load a task's question set and exemplar pool; refuse duplicate ids and exemplar leaks."""
    from .answers import normalise_text

    questions = _questions(spec, spec.questions)
    exemplars = _exemplars(spec, spec.exemplars)
    by_text = {normalise_text(q.question): q.id for q in questions}
    for e in exemplars:
        leaked = by_text.get(normalise_text(e.question))
        if leaked is not None:
            raise DataError(
                f"{_where(spec, spec.exemplars)}: exemplar '{e.id}' is also question '{leaked}' "
                "(same normalised text); remove it from the pool or from the question set"
            )
    return TaskData(spec=spec, questions=questions, exemplars=exemplars)
