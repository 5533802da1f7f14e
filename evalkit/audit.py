"""Chain verdicts and interventions: what went wrong in a reasoning chain, and probes of it.

Every function here is pure: it reads a chain's text (and, for verdicts, the extracted and
gold answers) and returns plain data. Steps come from ``evalkit.steps.find_steps``.

How a verdict is decided
------------------------
Answers are compared within ``tolerance`` (absolute; 0 means exact): *right* means
|answer - gold| <= tolerance. The rules are tried in this order and the first that applies
wins:

1. ``no-answer``: no final answer was extracted (``answer is None``).
2. ``no-steps``: the chain holds no arithmetic claim.
3. ``sound``: the answer is right and every step holds.
4. ``lucky``: the answer is right although at least one step does not hold.
5. ``contradiction``: the answer is wrong and differs (beyond the tolerance) from the
   claimed result of the chain's last step: the answer does not follow from the chain's
   own reasoning, whatever that reasoning was.
6. ``reasoning``: the answer is wrong, equals the last step's result, and every step holds:
   the arithmetic is right but the plan is wrong.
7. ``slip``: the answer is wrong, equals the last step's result, and repairing the chain
   (``repair_chain``) makes the last step's result right: one arithmetic slip, carried
   forward, explains the wrong answer.
8. ``unrepaired``: the answer is wrong, equals the last step's result, a step does not hold,
   and repairing the first wrong step does not give the gold answer: a slip alone does not
   explain the error (the plan is wrong too, or a second, independent slip follows).

"Equals the last step's result" means within the same tolerance. Contradiction comes
before slip and reasoning because those two explain a wrong answer through the chain,
which is only meaningful when the answer is the chain's result. Right answers are judged
on their steps alone: a right answer that differs from the last step's result is still
``sound`` (or ``lucky``). A chain that ends with a check step (``42 / 7 = 6``) and then
gives a wrong answer is a ``contradiction``.

The repair (``repair_chain``)
    Recompute the first step that does not hold exactly. Then walk the later steps in order:
    a step with an operand equal to the claimed result of a step already corrected has that
    operand replaced by the corrected value and is recomputed; if its result changes, it is
    corrected in turn, and so on. A recomputed step is computed exactly, so a second slip
    in a step that depends on the first is corrected with it; steps that use no corrected
    value keep their claimed results (a later independent slip stays). A first wrong step that divides by zero
    cannot be repaired. Operands are matched by value, so a constant that happens to equal
    a wrong result is replaced too.
"""

from __future__ import annotations

import random
from dataclasses import dataclass, field
from enum import Enum
from fractions import Fraction
from numbers import Real

from evalkit.numbers import format_value, parse_literal, render_like
from evalkit.steps import Step, find_steps, pending_expression, recompute

__all__ = [
    "Verdict",
    "ChainVerdict",
    "classify_chain",
    "repair_chain",
    "truncate_chain",
    "inject_mistake",
    "pending_expression",
    "format_value",
]


class Verdict(str, Enum):
    """What the audit concludes about one chain (rules in the module docstring)."""

    SOUND = "sound"
    LUCKY = "lucky"
    SLIP = "slip"
    REASONING = "reasoning"
    CONTRADICTION = "contradiction"
    UNREPAIRED = "unrepaired"
    NO_STEPS = "no-steps"
    NO_ANSWER = "no-answer"

    def __str__(self) -> str:
        return self.value


@dataclass(frozen=True)
class ChainVerdict:
    """A verdict with the evidence behind it."""

    verdict: Verdict
    steps: list[Step] = field(default_factory=list)
    first_wrong: int | None = None  # index into steps of the first step that does not hold
    repaired_answer: Fraction | None = None  # last step's result after repair_chain, when a step is wrong
    explanation: str = ""


def repair_chain(steps: list[Step]) -> list[Fraction]:
    """Each step's result after correcting the first wrong step and carrying the correction forward."""
    results = [s.claimed for s in steps]
    first = next((i for i, s in enumerate(steps) if not s.holds), None)
    if first is None or steps[first].value is None:
        return results
    corrected = {steps[first].claimed: steps[first].value}
    results[first] = steps[first].value
    for j in range(first + 1, len(steps)):
        value, swapped = recompute(steps[j].expression, corrected)
        if swapped and value is not None:
            results[j] = value
            if value != steps[j].claimed:
                corrected[steps[j].claimed] = value
    return results


def _exact(x) -> Fraction:
    # A float tolerance such as 0.01 means the decimal the user typed, not its binary neighbour.
    return Fraction(repr(x)) if isinstance(x, float) else Fraction(x)


def classify_chain(chain: str, answer: Fraction | None, gold: Fraction,
                   tolerance: float = 0.0) -> ChainVerdict:
    """Find the chain's steps and decide its verdict against the extracted and gold answers."""
    steps = find_steps(chain)
    tol = _exact(tolerance)
    first = next((i for i, s in enumerate(steps) if not s.holds), None)
    repaired = repair_chain(steps)[-1] if first is not None else None

    def verdict(kind: Verdict, why: str) -> ChainVerdict:
        return ChainVerdict(kind, steps, first, repaired, why)

    if answer is None:
        return verdict(Verdict.NO_ANSWER, "No final answer was found in the completion.")
    if not steps:
        return verdict(Verdict.NO_STEPS, "The chain makes no arithmetic claim to check.")
    answer, gold = Fraction(answer), Fraction(gold)
    n = len(steps)
    wrong = ""
    if first is not None:
        s = steps[first]
        true = "undefined (division by zero)" if s.value is None else format_value(s.value)
        wrong = f"Step {first + 1} of {n} ({s.text.strip('<>')}) does not hold: {s.expression} is {true}."
    if abs(answer - gold) <= tol:
        if first is None:
            return verdict(Verdict.SOUND, f"All {n} steps hold and the answer {format_value(answer)} is right.")
        return verdict(Verdict.LUCKY, f"The answer {format_value(answer)} is right, but {wrong[0].lower()}{wrong[1:]}")
    last = steps[-1]
    if abs(answer - last.claimed) > tol:
        return verdict(Verdict.CONTRADICTION,
                       f"The answer {format_value(answer)} is not the chain's own last result "
                       f"{format_value(last.claimed)} ({last.text.strip('<>')}); the gold answer is {format_value(gold)}.")
    if first is None:
        return verdict(Verdict.REASONING,
                       f"All {n} steps hold, but they lead to {format_value(answer)} instead of {format_value(gold)}: "
                       "the plan is wrong, not the arithmetic.")
    if repaired is not None and abs(repaired - gold) <= tol:
        return verdict(Verdict.SLIP,
                       f"{wrong} Correcting it and carrying the corrected value forward gives "
                       f"{format_value(repaired)}, the gold answer.")
    got = "no value" if steps[first].value is None else format_value(repaired)
    return verdict(Verdict.UNREPAIRED,
                   f"{wrong} Correcting it and carrying the corrected value forward gives {got}, "
                   f"not the gold answer {format_value(gold)}.")


def truncate_chain(chain: str, steps: list[Step], fraction: float) -> str:
    """The chain cut just after its first round(fraction * len(steps)) steps (halves round up); 0 steps gives ""."""
    if not 0 <= fraction <= 1:
        raise ValueError(f"fraction must be between 0 and 1, got {fraction}")
    k = int(_exact(fraction) * len(steps) + Fraction(1, 2))
    return chain[: steps[k - 1].end] if k else ""


_DELTAS = (-3, -2, -1, 1, 2, 3)


def _changed(chain: str, step: Step, delta: Fraction) -> tuple[str, Step]:
    """The chain up to the step's result, with the written number moved by ``delta``; the step re-read."""
    r0, r1 = step.result_span
    literal = chain[r0:r1]
    bare = literal[:-1] if literal.endswith("%") else literal
    num, slash, den = bare.partition("/")
    if slash:
        new_literal = f"{render_like(parse_literal(num) + delta * int(den), num)}/{den}"
    else:
        new_literal = render_like(parse_literal(num) + delta, literal)
    if parse_literal(new_literal.rstrip("%")) == parse_literal(bare):
        raise ValueError(f"a delta of {delta} is below the precision of {literal!r}")
    text = chain[:r0] + new_literal
    # An annotation's step starts two characters later once its closing ">>" is cut off.
    again = [s for s in find_steps(text) if s.start in (step.start, step.start + 2)]
    if not again:
        raise ValueError(f"the step {step.text!r} could not be read again after changing its result")
    return text, again[-1]


def inject_mistake(chain: str, steps: list[Step], index: int,
                   rng_or_delta: random.Random | Real | Fraction) -> tuple[str, Step, Fraction]:
    """Change one step's claimed result; return (chain up to and including the new result, the step, its new claimed value).

    With a ``random.Random`` the written number moves by a whole 1, 2 or 3 either way, never
    across zero and never onto a value that would still hold (an "≈ 3" tolerates 1 either
    way); with a number it moves by exactly that much. The new result keeps the old one's
    look (decimals, thousands commas, currency, %).
    """
    step = steps[index]
    if not isinstance(rng_or_delta, random.Random):
        delta = _exact(rng_or_delta)
        if delta == 0:
            raise ValueError("a delta of 0 would not change the step")
        text, again = _changed(chain, step, delta)
        return text, step, again.claimed
    literal = chain[slice(*step.result_span)]
    whole = parse_literal(literal.rstrip("%"))
    deltas = [d for d in _DELTAS if whole < 0 or whole + d >= 0]
    rng_or_delta.shuffle(deltas)
    for d in deltas:
        text, again = _changed(chain, step, Fraction(d))
        if not again.holds:
            return text, step, again.claimed
    raise ValueError(f"no change of 1 to 3 makes the step {step.text!r} wrong")
