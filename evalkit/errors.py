"""The one exception family a user can cause.

    EvalkitError
    ├── SpecError        a task spec or study file is wrong (names file and field)
    ├── DataError        a question set or exemplar pool cannot be loaded or is inconsistent
    ├── TemplateError    a prompt template fails to load or render
    ├── ModelError       a model reference cannot be resolved, fetched or loaded
    ├── StoreError       a run folder or its store is missing or inconsistent
    └── BackendError     a backend failed while generating

    EvalkitWarning       something the user should know that does not stop the work
                         (a busy machine's timings, a cache that could not be written)

The CLI prints ``str(error)`` on one line and exits 2. Third-party errors are translated
at the boundary (``raise ... from None`` where the original adds nothing for the user).
"""

from __future__ import annotations

__all__ = [
    "EvalkitError",
    "SpecError",
    "DataError",
    "TemplateError",
    "ModelError",
    "StoreError",
    "BackendError",
    "EvalkitWarning",
]


class EvalkitError(Exception):
    """Base of every error a user can cause; its message says what to do."""


class SpecError(EvalkitError):
    """A task spec or study file is invalid."""

    def __init__(self, path: str, field: str | None, problem: str):
        self.path, self.field, self.problem = str(path), field, problem
        where = f"{self.path}: {field}: " if field else f"{self.path}: "
        super().__init__(where + problem)


class DataError(EvalkitError):
    """A question set or exemplar pool is unusable."""


class TemplateError(EvalkitError):
    """A prompt template cannot be loaded or rendered."""


class ModelError(EvalkitError):
    """A model reference cannot be resolved, fetched or loaded."""


class StoreError(EvalkitError):
    """A run folder or its store is missing or inconsistent."""


class BackendError(EvalkitError):
    """A backend failed while generating."""


class EvalkitWarning(UserWarning):
    """A warning for the user; the CLI prints it as one line, ``warning: ...``."""
