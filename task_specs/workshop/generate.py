"""Generate the bundled workshop task: word problems set in an invented bike-repair workshop.

    python task_specs/workshop/generate.py [--out DIR] [--seed N]

Writes ``questions.jsonl`` (id, question, answer, group, steps_needed) and ``exemplars.jsonl``
(id, question, steps, answer) into DIR (default: this folder). Standard library only and
deterministic: every family draws from its own ``random.Random`` seeded by a string, so the same
seed gives byte-identical files on any machine and Python >= 3.10.

Every gold answer and every arithmetic claim is computed from the numbers put in the text: the
problem families (``stock_problems.py``, ``service_problems.py``) write a claim only through
``Work.calc`` (``work.py``), which does the arithmetic, refuses a negative or
non-integer result and counts the step. Worked solutions write multiplication as ``*``, money
with ``$``, one binary claim ``a op b = c`` per step, and end with "The answer is N.".
"""

from __future__ import annotations

import argparse
import json
import random
import re
import unicodedata
from pathlib import Path

# Run as a script, this folder is first on sys.path: the problem families live beside this file.
from service_problems import (assembly_time, helmet_discount, labour_bill, rentals, repair_hours,
                              service_bookings, tips_split, tune_ups)
from stock_problems import (brake_pads, cable_roll, chain_stock, parts_order, shop_sales, spoke_bags,
                            tube_patches, wheel_spokes)

SEED = 2718
QUESTIONS_PER_FAMILY = 5
EXEMPLARS = 24
NAMES = ["Ravi", "Mia", "Tomas", "Aisha", "Jonas", "Lena", "Kofi", "Nadia",
         "Sam", "Priya", "Owen", "Yuki", "Marta", "Ben", "Ines", "Dev"]

FAMILIES = [  # (group name, function, number of variants)
    ("wheel-spokes", wheel_spokes, 2), ("tube-patches", tube_patches, 2),
    ("service-bookings", service_bookings, 3), ("labour-bill", labour_bill, 3),
    ("chain-stock", chain_stock, 2), ("brake-pads", brake_pads, 2),
    ("tune-ups", tune_ups, 2), ("helmet-discount", helmet_discount, 2),
    ("cable-roll", cable_roll, 1), ("rentals", rentals, 3),
    ("parts-order", parts_order, 2), ("tips-split", tips_split, 2),
    ("assembly-time", assembly_time, 2), ("spoke-bags", spoke_bags, 2),
    ("shop-sales", shop_sales, 1), ("repair-hours", repair_hours, 2),
]


def normalise(text: str) -> str:
    """Lowercase, punctuation to spaces, whitespace collapsed: the duplicate check's key."""
    text = unicodedata.normalize("NFKC", text).lower()
    text = "".join(" " if unicodedata.category(ch).startswith("P") else ch for ch in text)
    return " ".join(text.split())


def build(seed: int = SEED) -> tuple[list[dict], list[dict]]:
    """Return (questions, exemplars) as lists of dicts in file order."""
    seen_text: set[str] = set()
    seen_numbers: set[tuple] = set()
    questions, exemplars = [], []

    def draw(r, group, fn, variant):
        for _ in range(200):
            q, work, ans = fn(r, variant, r.choice(NAMES))
            key = (group, variant, tuple(work.numbers))
            if normalise(q) not in seen_text and key not in seen_numbers:
                if not 2 <= work.steps <= 4:
                    raise AssertionError(f"{group}: {work.steps} steps")
                seen_text.add(normalise(q))
                seen_numbers.add(key)
                return q, work, int(ans)
        raise AssertionError(f"{group}: no fresh problem after 200 draws")

    for group, fn, variants in FAMILIES:
        r = random.Random(f"{seed}:questions:{group}")
        for i in range(QUESTIONS_PER_FAMILY):
            q, work, ans = draw(r, group, fn, i % variants)
            questions.append({"question": q, "answer": str(ans), "group": group,
                              "steps_needed": work.steps})
    for i in range(EXEMPLARS):
        group, fn, variants = FAMILIES[i % len(FAMILIES)]
        r = random.Random(f"{seed}:exemplars:{group}:{i}")
        q, work, ans = draw(r, group, fn, (i // len(FAMILIES) + i) % variants)
        steps = " ".join(work.sentences + [f"The answer is {ans}."])
        exemplars.append({"question": q, "steps": steps, "answer": str(ans)})

    # Interleave families so a prefix of the file is a mixed sample, then number.
    order = sorted(range(len(questions)), key=lambda k: (k % QUESTIONS_PER_FAMILY, k))
    questions = [{"id": f"wq-{n + 1:03d}", **questions[k]} for n, k in enumerate(order)]
    exemplars = [{"id": f"wx-{n + 1:02d}", **e} for n, e in enumerate(exemplars)]

    qtexts = {normalise(q["question"]) for q in questions}
    assert len(qtexts) == len(questions), "two questions share normalised text"
    assert not qtexts & {normalise(e["question"]) for e in exemplars}, "an exemplar is also a question"
    assert all(re.search(r"The answer is \d+\.$", e["steps"]) for e in exemplars)
    return questions, exemplars


def write_jsonl(path: Path, rows: list[dict]) -> None:
    with open(path, "w", encoding="utf-8", newline="\n") as f:
        for row in rows:
            f.write(json.dumps(row, ensure_ascii=False) + "\n")


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description="Generate the workshop question set and exemplar pool.")
    ap.add_argument("--out", type=Path, default=Path(__file__).resolve().parent, help="output folder")
    ap.add_argument("--seed", type=int, default=SEED, help=f"generator seed (default {SEED})")
    args = ap.parse_args(argv)
    questions, exemplars = build(args.seed)
    args.out.mkdir(parents=True, exist_ok=True)
    write_jsonl(args.out / "questions.jsonl", questions)
    write_jsonl(args.out / "exemplars.jsonl", exemplars)
    print(f"wrote {len(questions)} questions and {len(exemplars)} exemplars to {args.out}")


if __name__ == "__main__":
    main()
