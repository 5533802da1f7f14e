"""Step verification against BIG-bench ``arithmetic``.

Source: BIG-bench (Srivastava et al., 2022, "Beyond the Imitation Game"), task ``arithmetic``,
subtasks ``<n>_digit_{addition,subtraction,multiplication,division}`` for n = 1..5, read from
``bigbench/benchmark_tasks/arithmetic/<subtask>/task.json`` in the ``bigbench==1.0.0`` sdist on
PyPI (Apache-2.0). Each item reads "What is A plus B?" (or minus, times, divided by) with the
exact result as its target; division items divide exactly. This test writes each item as a
step in several surface forms: every gold pair must hold, every off-by-one claim must fail.
"""

from __future__ import annotations

import re
from fractions import Fraction

import pytest

from evalkit.audit import Verdict, classify_chain
from evalkit.steps import find_steps
from tests.external.bigbench import task_json

QUESTION = re.compile(r"What is (\d+) (plus|minus|times|divided by) (\d+)\?")
SYMBOL = {"plus": "+", "minus": "-", "times": "*", "divided by": "/"}
OPS = ["addition", "subtraction", "multiplication", "division"]
SUBTASKS = [f"{n}_digit_{op}" for n in range(1, 6) for op in OPS]


def money(n: int) -> str:
    return f"-${-n:,}" if n < 0 else f"${n:,}"


# Surface forms: (name, render(a, word, b, claim) -> chain text)
FORMS = [
    ("symbols", lambda a, w, b, c: f"{a} {SYMBOL[w]} {b} = {c}"),
    ("tight", lambda a, w, b, c: f"{a}{SYMBOL[w]}{b}={c}"),
    ("words", lambda a, w, b, c: f"So {a} {w} {b} is {c}."),
    ("question-first", lambda a, w, b, c: f"What is {a} {w} {b}? We compute {a} {SYMBOL[w]} {b} = {c}."),
    ("units-and-money", lambda a, w, b, c: f"Step 1: {money(a)} {SYMBOL[w]} {b:,} crates = {money(c)} in total"),
    ("gsm8k", lambda a, w, b, c: f"{a}{SYMBOL[w]}{b} = <<{a}{SYMBOL[w]}{b}={c}>>{c}"),
    ("unicode", lambda a, w, b, c: f"{a} {dict(plus='+', minus='−', times='×').get(w, '÷')} {b} = {c}"),
]


@pytest.fixture(scope="module")
def items() -> dict[str, list[tuple[int, str, int, int]]]:
    out = {}
    for sub in SUBTASKS:
        rows = []
        for e in task_json(f"arithmetic/{sub}")["examples"]:
            m = QUESTION.fullmatch(e["input"])
            assert m, e["input"]
            rows.append((int(m[1]), m[2], int(m[3]), int(e["target"])))
        out[sub] = rows
    return out


@pytest.mark.parametrize("sub", SUBTASKS)
def test_gold_pairs_hold_and_off_by_one_claims_fail(items, sub):
    rows = items[sub]
    assert rows
    for i, (a, word, b, target) in enumerate(rows):
        # the plain form for every item, and one other form in turn so each form meets every subtask
        for name, form in (FORMS[0], FORMS[1 + i % (len(FORMS) - 1)]):
            for claim in (target, target + 1, target - 1):
                text = form(a, word, b, claim)
                steps = find_steps(text)
                assert len(steps) == 1, (name, text, steps)
                step = steps[0]
                assert step.value == target, (name, text)
                assert step.claimed == claim and step.holds is (claim == target), (name, text)


@pytest.mark.parametrize("sub", [f"{n}_digit_{op}" for n in (2, 5) for op in OPS])
def test_a_single_off_by_one_step_is_a_slip_that_repairs_to_the_target(items, sub):
    for a, word, b, target in items[sub][:200]:
        def chain(claim):
            return f"{a} {SYMBOL[word]} {b} = {claim}. The answer is {claim}."
        v = classify_chain(chain(target + 1), Fraction(target + 1), Fraction(target))
        assert v.verdict is Verdict.SLIP and v.repaired_answer == target, chain(target + 1)
        assert classify_chain(chain(target), Fraction(target), Fraction(target)).verdict is Verdict.SOUND
