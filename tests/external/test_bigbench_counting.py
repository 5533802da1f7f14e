"""Answer extraction against BIG-bench ``object_counting``.

Source: BIG-bench (Srivastava et al., 2022, "Beyond the Imitation Game"), task
``object_counting``, read from ``bigbench/benchmark_tasks/object_counting/task.json`` in the
``bigbench==1.0.0`` sdist on PyPI (Apache-2.0). 1000 items; each target lists the count as a word
and in digits, e.g. ``["three", "3"]``. The completions below are written by this test in the
surface forms small chat models produce; the gold comes from the task file.
"""

from __future__ import annotations

import re

import pytest

from evalkit.answers import extract_answer, parse_number, score
from tests.external.bigbench import task_json

QUESTION = re.compile(r"I have (?P<items>.*)\. How many (?P<noun>.*) do I have\?")


@pytest.fixture(scope="module")
def items() -> list[dict]:
    out = []
    for e in task_json("object_counting")["examples"]:
        m = QUESTION.fullmatch(e["input"])
        assert m, e["input"]
        word, digits = e["target"]
        listed = [i.strip() for i in re.split(r",\s*(?:and\s+)?|\s+and\s+", m["items"])]
        out.append({"word": word, "digits": digits, "n": int(digits), "noun": m["noun"],
                    "listed": listed, "input": e["input"]})
    assert len(out) == 1000
    return out


def test_every_target_form_parses_to_the_same_number(items):
    for it in items:
        assert parse_number(it["word"]) == parse_number(it["digits"]) == it["n"], it


def test_listed_quantities_add_up_to_the_target(items):
    # The listed items are "a clarinet", "four fridges", "two stalks of celery": parse_number reads
    # the word quantities, "a"/"an" is one. Distractors (a cow among fruits) only add, so the sum
    # is at least the target, and equals it for the "objects" questions, which have none.
    for it in items:
        counts = []
        for entry in it["listed"]:
            v = parse_number(entry)
            if v is None:
                assert re.match(r"an? ", entry), entry
                v = 1
            counts.append(v)
        total = sum(counts)
        assert total >= it["n"], it
        if it["noun"] == "objects":
            assert total == it["n"], it


def _chain(it) -> str:
    parts = []
    for entry in it["listed"]:
        v = parse_number(entry)
        parts.append(f"{entry} ({1 if v is None else v})")
    return "Let me list them: " + ", ".join(parts) + "."


TEMPLATES = {
    "answer-is-word": (lambda it: f"The answer is {it['word']}.", "stated"),
    "i-count": (lambda it: f"I count {it['digits']} {it['noun']}.", "last-number"),
    "bold-answer": (lambda it: f"**Answer:** {it['digits']}", "stated"),
    "bare-word": (lambda it: f"{it['word'].capitalize()}.", "last-number"),
    "hash": (lambda it: f"#### {it['digits']}", "stated"),
    "chain-then-word": (lambda it: f"{_chain(it)} So I have {it['word']} {it['noun']} in total.",
                        "last-number"),
    "chain-then-next-question": (
        lambda it: f"{_chain(it)}\nThe answer is {it['digits']}.\n\n"
                   f"Q: I have a piano and 2 drums. How many musical instruments do I have?\n"
                   f"A: The answer is 3.", "stated"),
    "trailing-chatter": (lambda it: f"There are {it['digits']} {it['noun']}. "
                                    f"Let me know if you have another list!", "last-number"),
}


@pytest.mark.parametrize("name", sorted(TEMPLATES))
def test_model_like_answers_extract_and_match_gold(items, name):
    make, method = TEMPLATES[name]
    failures = []
    for it in items:
        text = make(it)
        ex, ok_digits = score(text, it["digits"], "number")
        _, ok_word = score(text, it["word"], "number")
        if not (ok_digits and ok_word and ex.method == method and text[ex.span[0]:ex.span[1]] == ex.raw):
            failures.append((text, ex))
    assert not failures, failures[:3]


@pytest.mark.parametrize("name", ["answer-is-word", "bold-answer", "chain-then-word", "i-count"])
def test_a_wrong_count_does_not_match(items, name):
    make, _ = TEMPLATES[name]
    words = {it["n"]: it["word"] for it in items}
    failures = []
    for it in items:
        wrong_n = it["n"] + 1 if it["n"] + 1 in words else it["n"] - 1
        wrong = dict(it, n=wrong_n, digits=str(wrong_n), word=words[wrong_n])
        text = make(wrong)
        for gold in (it["digits"], it["word"]):
            if score(text, gold, "number")[1]:
                failures.append((text, gold))
        assert extract_answer(text).value == str(wrong_n)
    assert not failures, failures[:3]
