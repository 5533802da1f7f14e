"""Shared fixtures: a small invented task on disk and an isolated generation cache."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

NURSERY_QUESTIONS = [
    {"id": "n1", "question": "A seed nursery sows 12 trays with 8 seeds each. How many seeds?", "answer": "96", "group": "trays"},
    {"id": "n2", "question": "The nursery sells 5 packets at $3 each and 2 pots at $7 each. How many dollars?", "answer": "29", "group": "sales"},
    {"id": "n3", "question": "There are 40 seedlings; 15 are moved to the greenhouse. How many are left?", "answer": "25", "group": "trays"},
    {"id": "n4", "question": "Each bench holds 6 trays and there are 9 benches. How many trays fit?", "answer": "54", "group": "benches"},
    {"id": "n5", "question": "A gardener plants 7 rows of 11 bulbs, then 4 more bulbs. How many bulbs?", "answer": "81", "group": "benches"},
    {"id": "n6", "question": "Sixty cuttings are shared equally among 4 tables. How many per table?", "answer": "15", "group": "sales"},
]
NURSERY_EXEMPLARS = [
    {"id": "e1", "question": "The nursery fills 3 boxes with 10 pots each. How many pots?", "steps": "3 * 10 = 30. The answer is 30.", "answer": "30"},
    {"id": "e2", "question": "A tray has 24 cells and 6 are empty. How many are full?", "steps": "24 - 6 = 18. The answer is 18.", "answer": "18"},
    {"id": "e3", "question": "Four packets cost $2 each and a trowel costs $5. What is the total?", "steps": "4 * 2 = 8. 8 + 5 = 13. The answer is 13.", "answer": "13"},
    {"id": "e4", "question": "Twenty bulbs go into 5 pots equally. How many per pot?", "steps": "20 / 5 = 4. The answer is 4.", "answer": "4"},
    {"id": "e5", "question": "A bench has 2 shelves of 9 trays. How many trays?", "steps": "2 * 9 = 18. The answer is 18.", "answer": "18"},
]

SPEC = """
name = "nursery"
description = "Invented seed-nursery problems for tests."

[questions]
path = "questions.jsonl"

[exemplars]
path = "exemplars.jsonl"

[answer]
kind = "number"
"""


def write_jsonl(path: Path, rows: list[dict]) -> Path:
    path.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    return path


@pytest.fixture
def nursery(tmp_path: Path) -> Path:
    """A valid task spec with its data files; returns the spec path."""
    folder = tmp_path / "nursery"
    folder.mkdir()
    write_jsonl(folder / "questions.jsonl", NURSERY_QUESTIONS)
    write_jsonl(folder / "exemplars.jsonl", NURSERY_EXEMPLARS)
    spec = folder / "nursery.toml"
    spec.write_text(SPEC, encoding="utf-8")
    return spec


@pytest.fixture(autouse=True)
def _generation_cache(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """Each test gets its own generation cache, so no test sees another's completions."""
    path = tmp_path / "generation-cache.sqlite"
    monkeypatch.setenv("EVALKIT_GENERATION_CACHE", str(path))
    return path
