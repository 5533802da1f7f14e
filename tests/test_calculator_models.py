"""The calculator in the loop on real models: a tiny model from a config, and SmolLM2-135M (slow).

What must hold whatever the model writes: every intervention's inserted result stands in the text
at the logged offset, right after the '=' of its expression, and every arithmetic claim the
calculator inserted holds exactly (checked with evalkit.steps, fractions; the claims' values are
also re-checked against sympy, the reference library).
"""

from __future__ import annotations

import pytest
import sympy

from evalkit import api
from evalkit.backends.local import LocalBackend
from evalkit.calculator import calculator_generate
from evalkit.prompts import draw_exemplars, render
from evalkit.steps import find_steps

from .tiny import build_tiny_model


def _check(completions):
    inserted_steps = 0
    for c in completions:
        text, log = c.text, c.extra["calculator"]
        steps = find_steps(text)
        for e in log:
            at = e["offset"]
            assert text[at: at + len(e["inserted"])] == e["inserted"]
            assert text[:at].rstrip().endswith("=")
            # the step whose result was inserted holds, and sympy agrees with its value
            mine = [s for s in steps if s.result_span[0] == at]
            if mine:
                s = mine[0]
                inserted_steps += 1
                assert s.holds, (s.text, text)
                assert sympy.nsimplify(s.expression.replace("×", "*").replace("÷", "/")) == sympy.Rational(
                    s.value.numerator, s.value.denominator)
    return inserted_steps


def _worked_prompts(backend, n: int) -> list[str]:
    task = api.check(api.DEMO_TASK)
    ex = draw_exemplars(task.exemplars, 2, seed=0, draw=0)
    return [backend.format_prompt(render(task, "worked", ex, q.question, chat=backend.chat))
            for q in task.questions[:n]]


def test_calculator_on_a_tiny_model(tmp_path):
    backend = LocalBackend(str(build_tiny_model(tmp_path / "tiny", seed=5)), threads=1, batch_size=4)
    got = calculator_generate(backend, _worked_prompts(backend, 6), max_new_tokens=40, stop=["\nQuestion:"])
    assert len(got) == 6 and all("calculator" in c.extra for c in got)
    _check(got)
    # without interventions the calculator changes nothing: its text equals plain greedy decoding
    plain = backend.generate(_worked_prompts(backend, 6), max_new_tokens=40, stop=["\nQuestion:"])
    for c, p in zip(got, plain):
        if not c.extra["calculator"]:
            assert c.text == p.text


@pytest.mark.slow
def test_calculator_on_smollm2():
    backend = LocalBackend("smollm2-135m", batch_size=8)
    prompts = _worked_prompts(backend, 8)
    got = calculator_generate(backend, prompts, max_new_tokens=96, stop=["\nQuestion:", "\n\n\n"])
    plain = backend.generate(prompts, max_new_tokens=96, stop=["\nQuestion:", "\n\n\n"])
    interventions = sum(len(c.extra["calculator"]) for c in got)
    assert interventions > 0, "SmolLM2 made no arithmetic slip on 8 worked prompts; pick other questions"
    assert _check(got) > 0
    for c, p in zip(got, plain):
        if not c.extra["calculator"]:
            assert c.text == p.text  # nothing inserted: the model's own greedy text stands
        else:  # the text up to the first insertion is the model's own
            first = c.extra["calculator"][0]["offset"]
            assert p.text.startswith(c.text[: first - 1])
