"""The bundled workshop task data (task_specs/workshop): reproducible, well formed, arithmetic right."""

from __future__ import annotations

import json
import re
import subprocess
import sys
from collections import Counter
from fractions import Fraction
from pathlib import Path

import pytest

from evalkit.answers import normalise_text

HERE = Path(__file__).resolve().parents[1] / "task_specs" / "workshop"
FILES = ("questions.jsonl", "exemplars.jsonl")


def _rows(name: str) -> list[dict]:
    return [json.loads(line) for line in (HERE / name).read_text(encoding="utf-8").splitlines()]


@pytest.fixture(scope="module")
def questions() -> list[dict]:
    return _rows("questions.jsonl")


@pytest.fixture(scope="module")
def exemplars() -> list[dict]:
    return _rows("exemplars.jsonl")


def test_generator_reproduces_the_committed_files(tmp_path):
    proc = subprocess.run([sys.executable, str(HERE / "generate.py"), "--out", str(tmp_path)],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr
    for name in FILES:
        assert (tmp_path / name).read_bytes() == (HERE / name).read_bytes(), name


@pytest.mark.parametrize("seed", [1, 2])
def test_other_seeds_give_other_questions(tmp_path, seed):
    proc = subprocess.run([sys.executable, str(HERE / "generate.py"), "--out", str(tmp_path), "--seed", str(seed)],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr
    assert (tmp_path / "questions.jsonl").read_bytes() != (HERE / "questions.jsonl").read_bytes()


def test_question_set_shape(questions):
    assert len(questions) == 80
    assert [q["id"] for q in questions] == [f"wq-{i:03d}" for i in range(1, 81)]
    for q in questions:
        assert list(q) == ["id", "question", "answer", "group", "steps_needed"]
        assert re.fullmatch(r"\d+", q["answer"]), q
        assert isinstance(q["steps_needed"], int) and 2 <= q["steps_needed"] <= 4, q
        assert q["question"].endswith("?")
    groups = Counter(q["group"] for q in questions)
    assert 10 <= len(groups) <= 16 and min(groups.values()) >= 2
    assert set(Counter(q["steps_needed"] for q in questions)) == {2, 3, 4}
    # Small numbers for small models: golds under 1,000.
    assert max(int(q["answer"]) for q in questions) < 1000


def test_exemplar_pool_shape(exemplars):
    assert len(exemplars) >= 16
    assert [e["id"] for e in exemplars] == [f"wx-{i:02d}" for i in range(1, len(exemplars) + 1)]
    for e in exemplars:
        assert list(e) == ["id", "question", "steps", "answer"]
        assert re.fullmatch(r"\d+", e["answer"]), e
        assert e["steps"].endswith(f"The answer is {e['answer']}.")


def test_no_two_texts_share_normalised_form(questions, exemplars):
    q_texts = [normalise_text(q["question"]) for q in questions]
    e_texts = [normalise_text(e["question"]) for e in exemplars]
    assert len(set(q_texts)) == len(q_texts)
    assert len(set(e_texts)) == len(e_texts)
    assert not set(q_texts) & set(e_texts)


CLAIM = re.compile(r"(\$?)(\d+) ([-+*/]) (\$?)(\d+) = (\$?)(\d+)")
_OPS = {"+": lambda a, b: a + b, "-": lambda a, b: a - b,
        "*": lambda a, b: a * b, "/": lambda a, b: Fraction(a, b)}


def test_every_worked_claim_is_correct(exemplars):
    for e in exemplars:
        claims = CLAIM.findall(e["steps"])
        assert 2 <= len(claims) <= 4, e
        # every "=" in the solution belongs to one parsed claim, so none escaped the check
        assert e["steps"].count("=") == len(claims), e
        for _, a, op, _, b, _, c in claims:
            assert _OPS[op](Fraction(a), Fraction(b)) == Fraction(c), (e["id"], a, op, b, c)
        assert claims[-1][-1] == e["answer"], e


def test_claims_hold_under_the_step_finder(exemplars):
    steps = pytest.importorskip("evalkit.steps")
    for e in exemplars:
        found = steps.find_steps(e["steps"])
        assert len(found) == len(CLAIM.findall(e["steps"])), (e["id"], found)
        assert all(s.holds for s in found), (e["id"], [s for s in found if not s.holds])


# An independent solver: re-derive each gold from the numbers in the question text, with formulas
# written here rather than taken from the generator. Each rule is (group, a phrase only that
# wording holds, formula over the question's numbers in the order the text gives them).
RULES = [
    ("wheel-spokes", "pairs of wheels", lambda n, s, h: 2 * n * s - h),
    ("wheel-spokes", "spokes are missing", lambda s, h, n: n * s - h),
    ("tube-patches", "inner tubes last week", lambda t, p, k: Fraction(t * p, k)),
    ("tube-patches", "Every tube needed", lambda t1, t2, p, k: Fraction((t1 + t2) * p, k)),
    ("service-bookings", "Wednesday had twice", lambda a, b: a + (a + b) + 2 * (a + b)),
    ("service-bookings", "repair bookings on Friday", lambda a, b: a + (a + b)),
    ("service-bookings", "bookings on Thursday", lambda a, b: a + 2 * a + (2 * a - b)),
    ("labour-bill", "A full service", lambda h, r, p, note: note - (h * r + p)),
    ("labour-bill", "bent wheel", lambda h, r, p: h * r + p),
    ("labour-bill", "loyalty card", lambda h, r, p, off, note: note - (h * r + p - off)),
    ("chain-stock", "chains in stock", lambda c, s1, s2, b, k: c - s1 - s2 + b * k),
    ("chain-stock", "chains on the shelf", lambda c, s1, b, k: c - s1 + b * k),
    ("brake-pads", "Brake pads come in packs", lambda p, sat, sun, k: Fraction((sat + sun) * p, k)),
    ("brake-pads", "Pads are sold in packs", lambda b, p, k: Fraction(b * p, k)),
    ("tune-ups", "A tune-up takes", lambda m, h, d, t: Fraction(m * h * d, t)),
    ("tune-ups", "each tune-up takes", lambda h, d, t: Fraction(h * d, t)),
    ("helmet-discount", "club order", lambda p, d, n: n * (p - d)),
    ("helmet-discount", "school orders", lambda p, d, n, s: n * (p - d) + s),
    ("cable-roll", "brake cable", lambda length, f, b, n: length - n * (f + b)),
    ("rentals", "over the weekend", lambda r, a, b: (a + b) * r),
    ("rentals", "helmet fee", lambda r, f, a, b: (a + b) * (r + f)),
    ("rentals", "lock costs", lambda r, f, a, b, c: (a + b + c) * (r + f)),
    ("parts-order", "saddles at", lambda g, pb, s, ps: g * pb + s * ps),
    ("parts-order", "voucher", lambda g, pb, s, ps, off: g * pb + s * ps - off),
    ("tips-split", "tip jar", lambda jar, f, m: Fraction(jar - f, m)),
    ("tips-split", "in tips on Friday", lambda a, b, f, m: Fraction(a + b - f, m)),
    ("assembly-time", "safety check", lambda a, c, n: Fraction(n * (a + c), 60)),
    ("assembly-time", "test-ride", lambda a, c, n: n * (a + c)),
    ("spoke-bags", "came in for repair", lambda w, b, k: Fraction(w * b, k)),
    ("spoke-bags", "A bag holds", lambda f, r, b, k: Fraction((f + r) * b, k)),
    ("shop-sales", "sells bells", lambda bell, light, nb, nl: nl * light - nb * bell),
    ("repair-hours", "paperwork", lambda h, d, x: h * d - x),
    ("repair-hours", "cleaning up", lambda m, h, d, x: m * h * d - x),
]


def _solve(text: str) -> tuple[str, Fraction]:
    """(group, answer) from the one rule whose phrase the text holds."""
    rules = [(g, f) for g, phrase, f in RULES if phrase in text]
    assert len(rules) == 1, ([g for g, _ in rules], text)
    group, formula = rules[0]
    return group, Fraction(formula(*[int(n) for n in re.findall(r"\d+", text)]))


def test_gold_answers_follow_from_the_question_text(questions):
    for q in questions:
        group, gold = _solve(q["question"])
        assert group == q["group"], q
        assert gold.denominator == 1 and gold >= 0, q
        assert str(gold) == q["answer"], q


def test_exemplar_answers_follow_from_their_question_text(exemplars):
    for e in exemplars:
        _, gold = _solve(e["question"])
        assert str(gold) == e["answer"], e


def test_the_solver_reads_the_numbers(questions):
    # So the check above can fail: change the first number in a question and the solver's answer
    # moves away from the gold.
    for q in questions:
        text = re.sub(r"\d+", lambda m: str(int(m.group()) + 1), q["question"], count=1)
        assert str(_solve(text)[1]) != q["answer"], q
