"""Chain verdicts, the carry-forward repair, and the faithfulness probes.

References: the first GSM8K training solution (Cobbe et al., 2021; quoted from memory) as a
published worked example; sympy's exact rationals for the values of generated chains; the
truncation and mistake probes follow Lanham et al. (2023), "Measuring Faithfulness in
Chain-of-Thought Reasoning".
"""

from __future__ import annotations

import random
from fractions import Fraction

import pytest
import sympy
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from evalkit.audit import (ChainVerdict, Verdict, classify_chain, inject_mistake, repair_chain,
                           truncate_chain)
from evalkit.numbers import format_value
from evalkit.steps import find_steps

PROPERTY = settings(max_examples=120, deadline=None, derandomize=True)

# GSM8K train item 1 (Cobbe et al., 2021), from memory: "Natalia sold clips to 48 of her friends
# in April, and then she sold half as many clips in May. How many clips did Natalia sell
# altogether in April and May?" Gold 72.
NATALIA = ("Natalia sold 48/2 = <<48/2=24>>24 clips in May.\n"
           "Natalia sold 48+24 = <<48+24=72>>72 clips altogether in April and May.\n#### 72")


def test_gsm8k_worked_solution_is_sound():
    v = classify_chain(NATALIA, Fraction(72), Fraction(72))
    assert v.verdict is Verdict.SOUND and [s.expression for s in v.steps] == ["48 / 2", "48 + 24"]
    assert v.first_wrong is None and v.repaired_answer is None


def test_gsm8k_solution_with_a_slip_carried_forward_is_a_slip():
    slipped = NATALIA.replace("<<48/2=24>>24", "<<48/2=26>>26").replace("48+24 = <<48+24=72>>72",
                                                                        "48+26 = <<48+26=74>>74")
    v = classify_chain(slipped, Fraction(74), Fraction(72))
    assert v.verdict is Verdict.SLIP and v.first_wrong == 0 and v.repaired_answer == 72
    assert "Step 1 of 2" in v.explanation and "72" in v.explanation


def test_verdict_values_are_the_documented_words():
    assert [str(v) for v in Verdict] == ["sound", "lucky", "slip", "reasoning", "contradiction",
                                         "unrepaired", "no-steps", "no-answer"]
    assert Verdict("no-steps") is Verdict.NO_STEPS and Verdict.SLIP == "slip"


# ---------------------------------------------------------------- generated chains

OPS = {"+": lambda a, b: a + b, "-": lambda a, b: a - b, "*": lambda a, b: a * b}


@st.composite
def programs(draw):
    """A linear chain: step 0 combines two constants, each later step the previous result and a constant."""
    n = draw(st.integers(2, 5))
    consts = draw(st.lists(st.integers(2, 60), min_size=n + 1, max_size=n + 1))
    ops = draw(st.lists(st.sampled_from("+-*"), min_size=n, max_size=n))
    flips = draw(st.lists(st.booleans(), min_size=n, max_size=n))  # constant on the left?
    return consts, ops, flips


def run(program, slip_at=None, delta=0):
    """Render a chain; the model slips by `delta` at one step and carries its own results forward.

    Returns (text, claimed results, true gold) with gold from sympy.
    """
    consts, ops, flips = program
    gold = sympy.Integer(consts[0])
    carried = consts[0]
    lines, claimed = [], []
    for i, (op, c, flip) in enumerate(zip(ops, consts[1:], flips)):
        gold = OPS[op](sympy.Integer(c), gold) if flip and i else OPS[op](gold, sympy.Integer(c))
        a, b = (c, carried) if flip and i else (carried, c)
        result = OPS[op](a, b) + (delta if i == slip_at else 0)
        lines.append(f"Step {i + 1}: {a} {op} {b} = {result} seedlings.")
        claimed.append(result)
        carried = result
    return "\n".join(lines), claimed, Fraction(int(gold))


def constants_clash(program, claimed) -> bool:
    # The repair matches operands by value; a constant equal to a wrong result is ambiguous.
    return bool(set(program[0]) & set(claimed)) or len(set(claimed)) < len(claimed)


@PROPERTY
@given(programs())
def test_correct_chains_are_sound_contradicted_or_misplanned(program):
    text, claimed, gold = run(program)
    assert classify_chain(text, gold, gold).verdict is Verdict.SOUND
    v = classify_chain(text, gold + 5, gold + 5 + 1)  # right arithmetic, wrong target
    assert v.verdict is Verdict.CONTRADICTION  # the answer is not the chain's result
    v = classify_chain(text, Fraction(claimed[-1]), gold + 1)
    assert v.verdict is Verdict.REASONING and v.first_wrong is None


@PROPERTY
@given(programs(), st.data())
def test_one_slip_carried_forward_is_repaired_to_the_gold_answer(program, data):
    n = len(program[1])
    k = data.draw(st.integers(0, n - 1), label="slip at")
    delta = data.draw(st.sampled_from([-10, -2, -1, 1, 3, 100]), label="delta")
    text, claimed, gold = run(program, k, delta)
    assume(not constants_clash(program, claimed) and Fraction(claimed[-1]) != gold)
    v = classify_chain(text, Fraction(claimed[-1]), gold)
    assert v.verdict is Verdict.SLIP, (text, v)
    assert v.first_wrong == k and v.repaired_answer == gold
    # the repair recomputes every later step exactly from the corrected value
    assert repair_chain(v.steps) == claimed[:k] + list(run(program)[1][k:])


@PROPERTY
@given(programs(), st.data())
def test_a_slip_when_the_answer_is_right_anyway_is_lucky(program, data):
    k = data.draw(st.integers(0, len(program[1]) - 1))
    text, claimed, gold = run(program, k, 7)
    v = classify_chain(text, gold, gold)
    assert v.verdict is Verdict.LUCKY and v.first_wrong == k


def test_an_independent_second_slip_stays_and_the_chain_is_unrepaired():
    chain = "The workshop sold 3 * 12 = 38 tubes and 4 * 5 = 21 tyres, so 38 + 21 = 59 parts."
    v = classify_chain(chain, Fraction(59), Fraction(56))
    assert v.verdict is Verdict.UNREPAIRED and v.first_wrong == 0
    assert repair_chain(v.steps) == [36, 21, 57] and v.repaired_answer == 57


def test_repair_cannot_fix_a_division_by_zero():
    v = classify_chain("5 / 0 = 5, then 5 + 1 = 6.", Fraction(6), Fraction(2))
    assert v.verdict is Verdict.UNREPAIRED and v.steps[0].value is None
    assert repair_chain(v.steps) == [5, 6] and "no value" in v.explanation


def test_no_answer_comes_before_no_steps():
    assert classify_chain("We count the ferries.", None, Fraction(3)).verdict is Verdict.NO_ANSWER
    assert classify_chain("We count the ferries.", Fraction(3), Fraction(3)).verdict is Verdict.NO_STEPS
    v = classify_chain("2 + 2 = 4", None, Fraction(4))
    assert isinstance(v, ChainVerdict) and v.verdict is Verdict.NO_ANSWER and len(v.steps) == 1


def test_tolerance_is_absolute_and_decimal():
    chain = "The ferry covers 10 / 3 = 3.33 km per leg."
    assert classify_chain(chain, Fraction("3.33"), Fraction(10, 3)).verdict is Verdict.REASONING
    assert classify_chain(chain, Fraction("3.33"), Fraction(10, 3), tolerance=0.01).verdict is Verdict.SOUND
    # 0.1 is the decimal the user typed, not the binary float just above it
    assert classify_chain("1 + 1 = 2", Fraction(2), Fraction("2.1"), tolerance=0.1).verdict is Verdict.SOUND


# ---------------------------------------------------------------- faithfulness probes

@PROPERTY
@given(programs(), st.sampled_from([0, 0.1, 0.25, 1 / 3, 0.5, 2 / 3, 0.75, 0.9, 1]))
def test_truncation_keeps_the_first_round_fraction_times_n_steps(program, fraction):
    text, _, _ = run(program)
    steps = find_steps(text)
    cut = truncate_chain(text, steps, fraction)
    k = int(Fraction(fraction) * len(steps) + Fraction(1, 2))  # half rounds up
    assert text.startswith(cut)
    assert [s.expression for s in find_steps(cut)] == [s.expression for s in steps[:k]]
    assert (cut == "") is (k == 0)
    if k:
        assert cut.endswith(steps[k - 1].text)


def test_truncation_refuses_fractions_outside_0_to_1():
    with pytest.raises(ValueError):
        truncate_chain("1 + 1 = 2", find_steps("1 + 1 = 2"), 1.5)


@PROPERTY
@given(programs(), st.data())
def test_an_injected_mistake_never_holds_and_leaves_earlier_steps_alone(program, data):
    text, _, _ = run(program)
    steps = find_steps(text)
    index = data.draw(st.integers(0, len(steps) - 1))
    seed = data.draw(st.integers(0, 10**6))
    corrupted, step, new = inject_mistake(text, steps, index, random.Random(seed))
    assert step == steps[index] and new != step.claimed
    assert corrupted.startswith(text[: step.result_span[0]])
    again = find_steps(corrupted)
    assert again[:index] == steps[:index]
    assert again[index].claimed == new and not again[index].holds
    assert corrupted.endswith(format_value(new))


@pytest.mark.parametrize("chain, delta, written, value", [
    ("The nursery sold 1,200 / 4 = 300 trays.", 5, "305", Fraction(305)),
    ("A ferry ticket: $10 / 3 = $3.33 each.", 1, "4.33", Fraction("4.33")),
    ("That is 12 / 48 = 25% of the seedlings.", 2, "27%", Fraction(27, 100)),
    ("That is 12 / 48 * 100 = 25% of the seedlings.", -1, "24%", Fraction(24)),
    ("The bill is 1,000 * 2 = 2,000 dollars.", 1, "2,001", Fraction(2001)),
    ("Half of them: 6 / 8 = 3/4.", 1, "7/4", Fraction(7, 4)),
    ("Natalia sold 48/2 = <<48/2=24>>24 clips.", -2, "22", Fraction(22)),
])
def test_injected_results_keep_the_look_of_the_original(chain, delta, written, value):
    steps = find_steps(chain)
    corrupted, _, new = inject_mistake(chain, steps, 0, delta)
    assert corrupted.endswith(written) and new == value


def test_inject_refuses_a_change_below_the_written_precision():
    chain = "So 10 / 4 = 2.5 crates."
    with pytest.raises(ValueError):
        inject_mistake(chain, find_steps(chain), 0, Fraction(1, 100))
    with pytest.raises(ValueError):
        inject_mistake(chain, find_steps(chain), 0, 0)


@pytest.mark.parametrize("chain", ["Each bench gets 7 / 2 ≈ 3 trays.", "A crate holds 3 * 4 = 13 tubes."])
def test_a_random_mistake_never_lands_on_a_value_that_holds(chain):
    # "≈ 3" for 3.5 tolerates 4; a step that was already wrong must not be moved onto the truth.
    steps = find_steps(chain)
    for seed in range(40):
        text, _, new = inject_mistake(chain, steps, 0, random.Random(seed))
        (again,) = find_steps(text)
        assert again.claimed == new and not again.holds, text
