"""Exemplar draws and prompt rendering.

Templates come from other people, so they are rendered in jinja2's immutable sandbox with
undefined variables as errors. A template sees:

- ``exemplars``: the drawn exemplars, in order (each has ``id``, ``question``, ``steps``, ``answer``)
- ``question``: the question text
- ``chat``: true when the model will receive the text inside its chat template

A draw is seeded: the pool is shuffled with a generator seeded by (seed, draw) and the first
``shots`` exemplars are taken, so a 4-shot prompt's exemplars are the first four of the
8-shot prompt of the same draw.
"""

from __future__ import annotations

import functools
import hashlib
import random
from dataclasses import asdict, dataclass
from pathlib import Path

import jinja2
from jinja2.sandbox import ImmutableSandboxedEnvironment

from .data import Exemplar, TaskData
from .errors import TemplateError
from .spec import STYLES, TaskSpec

__all__ = ["TEMPLATE_DIR", "draw_exemplars", "template_path", "template_source", "render", "sha256_text"]

TEMPLATE_DIR = Path(__file__).resolve().parent.parent / "templates"
"""The bundled templates, one file per style (``<style>.j2``)."""


def sha256_text(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def draw_exemplars(pool: list[Exemplar], shots: int, seed: int, draw: int) -> list[Exemplar]:
    """The exemplars of one draw: a seeded shuffle of the pool, first `shots` taken."""
    if shots > len(pool):
        raise TemplateError(f"{shots} shots asked for, but the exemplar pool holds only {len(pool)} exemplars")
    order = random.Random(f"evalkit-draw:{seed}:{draw}").sample(range(len(pool)), len(pool))
    return [pool[i] for i in order[:shots]]


def template_path(spec: TaskSpec, style: str) -> Path:
    """The template file for a style: the spec's override, else the bundled one."""
    if style not in STYLES:
        raise TemplateError(f"unknown style '{style}'; styles are {', '.join(STYLES)}")
    if style in spec.templates:
        return spec.resolve(spec.templates[style])
    return _bundled_dir() / f"{style}.j2"


def _bundled_dir() -> Path:
    if TEMPLATE_DIR.is_dir():
        return TEMPLATE_DIR
    raise TemplateError(f"bundled templates not found at {TEMPLATE_DIR}; reinstall evalkit from its source tree")


def template_source(spec: TaskSpec, style: str) -> str:
    path = template_path(spec, style)
    try:
        return path.read_text(encoding="utf-8")
    except OSError as e:
        raise TemplateError(f"{path}: cannot read template: {e.strerror}") from None


_ENV = ImmutableSandboxedEnvironment(
    undefined=jinja2.StrictUndefined, keep_trailing_newline=False, autoescape=False
)


@functools.lru_cache(maxsize=64)
def _compile(source: str, where: str) -> jinja2.Template:
    try:
        return _ENV.from_string(source)
    except jinja2.TemplateSyntaxError as e:
        raise TemplateError(f"{where}: line {e.lineno}: {e.message}") from None


def render(task: TaskData, style: str, exemplars: list[Exemplar], question: str, chat: bool = False) -> str:
    """Render a style's template for one question: the text before any chat template."""
    path = template_path(task.spec, style)
    template = _compile(template_source(task.spec, style), str(path))
    if style == "worked-zero" and exemplars:
        raise TemplateError("style 'worked-zero' carries no exemplars; use shots = 0")
    try:
        text = template.render(exemplars=[asdict(e) for e in exemplars], question=question, chat=chat)
    except jinja2.UndefinedError as e:
        raise TemplateError(f"{path}: {e.message}; variables are exemplars, question, chat") from None
    except jinja2.exceptions.SecurityError as e:
        raise TemplateError(f"{path}: refused by the template sandbox: {e}") from None
    except jinja2.TemplateError as e:
        raise TemplateError(f"{path}: {e}") from None
    return text.strip("\n")
