"""Exemplar draws and sandboxed template rendering."""

from __future__ import annotations

import pytest

from evalkit.data import load_task_data
from evalkit.errors import TemplateError
from evalkit.prompts import draw_exemplars, render
from evalkit.spec import load_task


@pytest.fixture
def task(nursery):
    return load_task_data(load_task(nursery))


def test_draws_are_seeded_and_nested(task):
    a = draw_exemplars(task.exemplars, 3, seed=0, draw=0)
    assert a == draw_exemplars(task.exemplars, 3, seed=0, draw=0)
    assert draw_exemplars(task.exemplars, 5, seed=0, draw=0)[:3] == a  # fewer shots = a prefix
    others = {tuple(e.id for e in draw_exemplars(task.exemplars, 3, seed=0, draw=d)) for d in range(8)}
    assert len(others) > 1  # different draws choose or order differently
    assert len({e.id for e in a}) == 3


def test_too_many_shots(task):
    with pytest.raises(TemplateError, match="only 5 exemplars"):
        draw_exemplars(task.exemplars, 6, 0, 0)


def test_bundled_templates_render(task):
    ex = draw_exemplars(task.exemplars, 2, 0, 0)
    q = task.questions[0].question
    direct = render(task, "direct", ex, q)
    worked = render(task, "worked", ex, q)
    zero = render(task, "worked-zero", [], q)
    for text in (direct, worked, zero):
        assert text.rstrip().endswith(("Answer:", "Solution:", "step by step."))
        assert q in text
    assert ex[0].steps in worked and ex[0].steps not in direct
    assert f"Answer: {ex[0].answer}" in direct
    assert direct.count("Question:") == 3
    assert "Let's think step by step." in zero


def test_worked_zero_refuses_exemplars(task):
    with pytest.raises(TemplateError, match="no exemplars"):
        render(task, "worked-zero", task.exemplars[:1], "q")


def _override(nursery, body: str):
    (nursery.parent / "mine.j2").write_text(body)
    nursery.write_text(nursery.read_text() + '\n[templates]\ndirect = "mine.j2"\n')
    return load_task_data(load_task(nursery))


def test_undefined_variable_is_an_error(nursery):
    task = _override(nursery, "{{ question }} {{ hint }}")
    with pytest.raises(TemplateError, match="'hint' is undefined"):
        render(task, "direct", [], "q")


def test_sandbox_blocks_attribute_escape(nursery):
    # The classic template-injection escape reaches Python internals through dunder attributes.
    task = _override(nursery, "{{ question.__class__.__mro__[1].__subclasses__() }}")
    with pytest.raises(TemplateError):
        render(task, "direct", [], "q")


def test_sandbox_is_immutable(nursery):
    task = _override(nursery, "{% set _ = exemplars.append(1) %}{{ question }}")
    with pytest.raises(TemplateError, match="sandbox"):
        render(task, "direct", [], "q")


def test_syntax_error_names_line(nursery):
    task = _override(nursery, "line one\n{% for e in exemplars %}\n{{ e.question }}")
    with pytest.raises(TemplateError, match="line"):
        render(task, "direct", [], "q")


def test_model_text_is_not_escaped_as_html(nursery):
    task = _override(nursery, "{{ question }}")
    assert render(task, "direct", [], "5 < 7 & 'x'") == "5 < 7 & 'x'"
