"""Hand-written chain snippets in the styles small models produce, with their steps and verdicts.

Scenarios are invented (bike-repair workshop, seed nursery, ferry timetable). Each expected
step's verdict is itself checked against sympy's exact arithmetic (the reference library), so
a slip in this table fails the table rather than the code.
"""

from __future__ import annotations

from fractions import Fraction

import pytest
import sympy

from evalkit.audit import Verdict, classify_chain
from evalkit.numbers import decimals_of
from evalkit.steps import find_steps

F = Fraction
T, X = True, False  # the step holds / does not hold

# (id, chain, expected steps as (expression, claimed, holds), answer, gold, verdict[, tolerance])
SNIPPETS = [
    ("so-sentence", "The workshop fixes 8 bikes a day, so in 5 days it fixes 8 * 5 = 40 bikes.",
     [("8 * 5", 40, T)], 40, 40, "sound"),
    ("which-means", "Each tray holds 24 seedlings and there are 7 trays, which means 24 x 7 = 168 seedlings.",
     [("24 * 7", 168, T)], 168, 168, "sound"),
    ("bullets", "- Morning ferries: 6 * 45 = 270 passengers\n- Evening ferries: 4 * 45 = 180 passengers\n"
     "- Total: 270 + 180 = 450 passengers", [("6 * 45", 270, T), ("4 * 45", 180, T), ("270 + 180", 450, T)],
     450, 450, "sound"),
    ("step-labels", "Step 1: 3 inner tubes cost 3 * $4 = $12.\nStep 2: A chain costs $15.\n"
     "Step 3: $12 + $15 = $27.\nThe answer is 27.", [("3 * 4", 12, T), ("12 + 15", 27, T)], 27, 27, "sound"),
    ("gsm8k-annotations", "The ferry makes 12/3 = <<12/3=4>>4 round trips. Each carries 30 cars, so "
     "4*30 = <<4*30=120>>120 cars.\n#### 120", [("12 / 3", 4, T), ("4 * 30", 120, T)], 120, 120, "sound"),
    ("run-on", "we have 45 seed packets and sell 17 then 45 - 17 = 28 left and we buy 12 more so 28 + 12 = 40",
     [("45 - 17", 28, T), ("28 + 12", 40, T)], 40, 40, "sound"),
    ("markdown-bullets", "* **Step 1:** 5 * 6 = 30 pots\n* **Step 2:** 30 - 4 = 26 pots\n**Answer: 26**",
     [("5 * 6", 30, T), ("30 - 4", 26, T)], 26, 26, "sound"),
    ("currency-thousands", "The workshop's rent is $1,200 a month, so a year costs $1,200 * 12 = $14,400.",
     [("1200 * 12", 14400, T)], 14400, 14400, "sound"),
    ("rounded-money", "The fare is $10 for 3 people, so $10 / 3 = $3.33 each.",
     [("10 / 3", F("3.33"), T)], F("3.33"), F(10, 3), "sound", 0.01),
    ("percent-of", "20% of the 150 seedlings wilted: 20% of 150 = 30 wilted, so 150 - 30 = 120 healthy.",
     [("20% of 150", 30, T), ("150 - 30", 120, T)], 120, 120, "sound"),
    ("percent-times-100", "12 of 48 seedlings sprouted: 12 / 48 * 100 = 25%.",
     [("12 / 48 * 100", 25, T)], 25, 25, "sound"),
    ("divided-by-is", "Sixty cuttings shared by 4 tables: 60 divided by 4 is 15 per table.",
     [("60 / 4", 15, T)], 15, 15, "sound"),
    ("times-equals", "The nursery waters 7 times a day for 30 days, so 7 times 30 equals 210 waterings.",
     [("7 * 30", 210, T)], 210, 210, "sound"),
    ("plus-minus-words", "Forty-two pots plus eighteen: 42 plus 18 equals 60, minus 5 broken: 60 minus 5 equals 55.",
     [("42 + 18", 60, T), ("60 - 5", 55, T)], 55, 55, "sound"),
    ("is-equal-to", "The workshop has 3 stands with 4 bikes each, and 3 * 4 is equal to 12.",
     [("3 * 4", 12, T)], 12, 12, "sound"),
    ("per-hour-units", "It charges $15 per hour * 3 hours = $45 for labour, and $45 + $12 = $57 with parts.",
     [("15 * 3", 45, T), ("45 + 12", 57, T)], 57, 57, "sound"),
    ("running-total", "Tyres: 4 + 4 = 8 + 2 = 10 tyres in total.",
     [("4 + 4", 8, T), ("8 + 2", 10, T)], 10, 10, "sound"),
    ("rewriting", "The ferry carries 3 * 40 = 2 * 60 = 120 passengers.",
     [("2 * 60", 120, T)], 120, 120, "sound"),
    ("parentheses", "Each wheel lost 3 spokes, so (12 + 8) * 3 = 60 spokes were replaced.",
     [("(12 + 8) * 3", 60, T)], 60, 60, "sound"),
    ("unicode-operators", "5 × 12 = 60 minutes and 60 ÷ 4 = 15 minutes per bike",
     [("5 * 12", 60, T), ("60 / 4", 15, T)], 15, 15, "sound"),
    ("negative-result", "The tank held 5 litres and we need 8, so 5 - 8 = -3 litres: we are short by 3.",
     [("5 - 8", -3, T)], 3, 3, "sound"),
    ("approximately", "Each of 7 volunteers takes 50 / 7 ≈ 7 trays.",
     [("50 / 7", 7, T)], 7, 7, "sound"),
    ("decimals", "Each ferry ticket is $2.50; 6 tickets: 6 * 2.50 = 15.00 dollars.",
     [("6 * 2.50", 15, T)], 15, 15, "sound"),
    ("check-step", "The answer: 6 * 7 = 42 pots. Check: 42 / 7 = 6 pots per row.",
     [("6 * 7", 42, T), ("42 / 7", 6, T)], 42, 42, "sound"),
    ("right-answer-off-chain", "12 + 5 = 17 ferries run on weekdays. The answer is 18.",
     [("12 + 5", 17, T)], 18, 18, "sound"),  # right answers are judged on their steps only
    # ---- right answer despite wrong arithmetic
    ("lucky-recovery", "The nursery plants 6 rows of 9 bulbs: 6 * 9 = 56. Plus 2 spare bulbs: 54 + 2 = 56.",
     [("6 * 9", 56, X), ("54 + 2", 56, T)], 56, 56, "lucky"),
    ("lucky-exact-claim", "50 / 7 = 7 trays each, so each volunteer takes 7.",
     [("50 / 7", 7, X)], 7, 7, "lucky"),  # an integer claim must be exact unless marked ≈
    ("lucky-off-chain", "8 + 7 = 14 seed trays, so the answer is 15.",
     [("8 + 7", 14, X)], 15, 15, "lucky"),
    # ---- slips: one wrong step, carried forward
    ("slip-minutes", "A mechanic spends 35 minutes per bike on 6 bikes: 35 * 6 = 220 minutes. "
     "Plus a 20 minute break: 220 + 20 = 240 minutes.", [("35 * 6", 220, X), ("220 + 20", 240, T)],
     240, 230, "slip"),
    ("slip-percent", "A 15% discount on a $80 helmet: 80 * 15% = 10, so the price is 80 - 10 = 70.",
     [("80 * 15%", 10, X), ("80 - 10", 70, T)], 70, 68, "slip"),
    ("slip-chained", "9 * 6 = 56 - 4 = 52 bulbs", [("9 * 6", 56, X), ("56 - 4", 52, T)], 52, 50, "slip"),
    ("slip-gsm8k", "She repairs 3 bikes/hour for 5 hours: 3*5 = <<3*5=16>>16 bikes. After 4 are collected, "
     "16-4 = <<16-4=12>>12 remain.\n#### 12", [("3 * 5", 16, X), ("16 - 4", 12, T)], 12, 11, "slip"),
    ("slip-decimal", "The cable is 2.4 m and we cut 3 pieces of 0.35 m: 3 * 0.35 = 1.5 m, leaving "
     "2.4 - 1.5 = 0.9 m.", [("3 * 0.35", F("1.5"), X), ("2.4 - 1.5", F("0.9"), T)], F("0.9"), F("1.35"), "slip"),
    ("slip-last-step", "The ferry carried 1,250 people a day for 6 days: 1,250 * 6 = 7,000.",
     [("1250 * 6", 7000, X)], 7000, 7500, "slip"),
    ("slip-three-steps", "Step 1: 14 trays * 12 cells = 158 cells\nStep 2: 158 - 10 empty = 148 cells\n"
     "Step 3: 148 / 2 = 74 cells per bench", [("14 * 12", 158, X), ("158 - 10", 148, T), ("148 / 2", 74, T)],
     74, 79, "slip"),
    # ---- wrong plan, right arithmetic
    ("reasoning-fencepost", "The ferry leaves every 40 minutes from 6 am to 10 am, so 240 / 40 = 6 departures.",
     [("240 / 40", 6, T)], 6, 7, "reasoning"),
    ("reasoning-wrong-weeks", "The shop opens 6 days a week and fixes 9 bikes a day: 6 * 9 = 54. "
     "Over 4 weeks: 54 * 4 = 216.", [("6 * 9", 54, T), ("54 * 4", 216, T)], 216, 162, "reasoning"),
    ("reasoning-added-discount", "The helmet costs $40 with $5 off, so 40 + 5 = 45 dollars.",
     [("40 + 5", 45, T)], 45, 35, "reasoning"),
    # ---- the answer ignores the chain
    ("contradiction-final", "Each crate holds 12 pots and there are 4 crates: 12 * 4 = 48 pots. The answer is 46.",
     [("12 * 4", 48, T)], 46, 48, "contradiction"),
    ("contradiction-intermediate", "First 12 * 4 = 48 chairs on the lower deck, then 48 + 30 = 78 chairs "
     "with the upper deck. Answer: 48", [("12 * 4", 48, T), ("48 + 30", 78, T)], 48, 78, "contradiction"),
    ("contradiction-over-slip", "3 * 12 = 38 tubes, then 38 - 6 = 32 tubes. So the answer is 31.",
     [("3 * 12", 38, X), ("38 - 6", 32, T)], 31, 30, "contradiction"),  # precedence: before slip
    # ---- a wrong step that a repair does not explain
    ("unrepaired-two-slips", "Saturday: 4 * 7 = 30 repairs. Sunday: 3 * 5 = 16 repairs. Total 30 + 16 = 46.",
     [("4 * 7", 30, X), ("3 * 5", 16, X), ("30 + 16", 46, T)], 46, 43, "unrepaired"),
    ("unrepaired-slip-and-plan", "The seed mix costs $3 per packet; 8 packets: 8 * 3 = 25 dollars. "
     "With a $5 discount we pay 25 + 5 = 30.", [("8 * 3", 25, X), ("25 + 5", 30, T)], 30, 19, "unrepaired"),
    # ---- nothing to check, or no answer
    ("no-steps-prose", "The ferry is late, so we wait for the next one. The answer is 3.", [], 3, 2, "no-steps"),
    ("no-steps-numbers", "There are 12 trays and 8 benches. I think the answer is 20.", [], 20, 20, "no-steps"),
    ("no-steps-algebra", "Let x be the number of ferries. x = 5. Then 2x = 10.", [], 10, 10, "no-steps"),
    ("no-steps-clock", "The ferry departs at 9:15 and the trip takes 45 minutes, so it arrives at "
     "9:15 + 0:45 = 10:00.", [], 10, 10, "no-steps"),
    ("no-answer-cut-off", "We add 14 + 9 = 23 tubes and then", [("14 + 9", 23, T)], None, 23, "no-answer"),
    ("no-answer-no-numbers", "I am not sure how to solve this.", [], None, 4, "no-answer"),
]


def sympy_holds(expression: str, claimed: Fraction, approximate: bool) -> bool:
    """The rounding rule of evalkit.steps, computed independently with sympy's rationals."""
    v = sympy.sympify(expression.replace("%", "/100").replace(" of ", " * "), rational=True)
    c = sympy.Rational(claimed.numerator, claimed.denominator)
    d = decimals_of(str(float(claimed))) if claimed.denominator != 1 else 0
    if d == 0 and not approximate:
        return v == c
    return bool(abs(v - c) <= sympy.Rational(1, 2 * 10**d))


def test_the_table_is_big_and_covers_every_verdict():
    assert len(SNIPPETS) >= 40
    assert {row[5] for row in SNIPPETS} == {str(v) for v in Verdict}


@pytest.mark.parametrize("row", SNIPPETS, ids=[row[0] for row in SNIPPETS])
def test_snippet(row):
    name, chain, expected, answer, gold, verdict, *rest = row
    tolerance = rest[0] if rest else 0.0
    for expression, claimed, holds in expected:  # the table's own arithmetic, checked by sympy
        assert sympy_holds(expression, F(claimed), "\u2248" in chain) is holds, (expression, claimed)
    found = [(s.expression, s.claimed, s.holds) for s in find_steps(chain)]
    assert found == [(e, F(c), h) for e, c, h in expected]
    v = classify_chain(chain, None if answer is None else F(answer), F(gold), tolerance)
    assert v.verdict == verdict, v.explanation
    if verdict == "slip":
        assert v.repaired_answer == gold and v.first_wrong == next(i for i, s in enumerate(expected) if not s[2])
    assert v.explanation
