"""Final-answer extraction and normalisation (evalkit.answers)."""

from __future__ import annotations

from fractions import Fraction

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from evalkit.answers import (
    Extraction,
    answers_match,
    canonical_number,
    cut_at_stops,
    extract_answer,
    normalise_text,
    parse_number,
    parse_quantity,
    score,
)
from evalkit.errors import DataError, EvalkitError

# Surface forms small chat models produce, with the value and rule we expect.
NUMBER_FORMS = [
    ("**Answer:** 42", "42", "stated"),
    ("**Answer**: 42", "42", "stated"),
    ("The answer is $1,200.", "1200", "stated"),
    ("So, Mia needs 36 crates.", "36", "last-number"),
    ("Answer: 3/4", "0.75", "stated"),
    ("#### 18", "18", "stated"),
    ("Priya pays 3 * 14 = 42 dollars.\n#### 42", "42", "stated"),
    ("The final answer is 7", "7", "stated"),
    ("Final Answer: 0.5", "0.5", "stated"),
    ("The correct answer is: **$2.50**", "2.5", "stated"),
    ("Therefore, the answer is 96 spokes. I hope this helps! Let me know if you have 2 more.", "96", "stated"),
    ("The answer would be 15.", "15", "stated"),
    ("Answer:\n\n  27", "27", "stated"),
    ("The answer is three.", "3", "stated"),
    ("The answer is twenty-one.", "21", "stated"),
    ("The answer is one hundred and five.", "105", "stated"),
    ("The final answer is $\\boxed{144}$.", "144", "stated"),
    ("\\boxed{\\frac{3}{4}}", "0.75", "stated"),
    ("The answer is -5.", "-5", "stated"),
    ("The answer is 25%.", "25", "stated"),
    ("The answer is 1/3", "1/3", "stated"),
    ("The answer is 12 + 30 = 42.", "42", "stated"),
    ("\\boxed{3 \\times 14 = 42}", "42", "stated"),
    ("He spends 2 hours, then 3 more: 2 + 3 = 5", "5", "last-number"),
    ("42", "42", "last-number"),
    ("Seven.", "7", "last-number"),
    ("The cost is £1,250 in total.", "1250", "last-number"),
    ("Each wheel needs 32 spokes, so 4 wheels need 128 spokes.", "128", "last-number"),
    ("It takes 2 1/2 hours", "2.5", "last-number"),
    ("I have a dozen.", "12", "last-number"),
    ("x = -3", "-3", "last-number"),
    ("10-3", "3", "last-number"),  # a hyphen glued to a digit is subtraction, not a sign
    ("One.", "1", "last-number"),
    ("<think>Maybe 4 or 5.</think>\nThe answer is 6.", "6", "stated"),
]


@pytest.mark.parametrize("text,value,method", NUMBER_FORMS)
def test_number_forms(text, value, method):
    ex = extract_answer(text)
    assert (ex.value, ex.method) == (value, method)
    assert text[ex.span[0]:ex.span[1]] == ex.raw


@pytest.mark.parametrize("text", [
    "I don't know",
    "I don't know the answer.",
    "",
    "   \n ",
    "No one can tell from this.",
    "The answer is unclear.",
    "Answer: I am not sure.",
])
def test_no_answer(text):
    assert extract_answer(text) == Extraction(None, None, "none", None)


def test_last_stated_answer_wins_over_earlier_ones():
    text = "The answer is 40. Wait, I forgot the tube: 40 + 2 = 42. The answer is 42."
    assert extract_answer(text).value == "42"


def test_stated_answer_beats_later_numbers_in_chatter():
    text = "Answer: 18\n\nExplanation: 3 wheels times 6 patches; 2 patches were spare."
    assert extract_answer(text).value == "18"


def test_cue_without_number_falls_back_to_an_earlier_cue():
    assert extract_answer("The answer is 9. That answer is final.").value == "9"
    assert extract_answer("answer is 9; the answer is: see above").value == "9"


def test_invented_next_question_is_cut():
    text = "4 * 3 = 12. The answer is 12.\n\nQ: A shop has 7 bikes and sells 2. How many are left?\nA: The answer is 5."
    ex = extract_answer(text)
    assert ex.value == "12"
    start, end = cut_at_stops(text)
    assert text[start:end].rstrip().endswith("The answer is 12.")
    assert extract_answer("Sure!\nQuestion: what is 2 + 2?\nThe answer is 4.").value is None


def test_special_tokens_cut_the_text():
    assert extract_answer("The answer is 8.<|im_end|>\nThe answer is 9.").value == "8"
    assert extract_answer("8</s>9").value == "8"


def test_a_completion_that_starts_with_a_stop_word_is_not_emptied():
    assert extract_answer("Question: 3 + 4 = 7, so the answer is 7.").value == "7"


def test_numbers_are_read_not_evaluated():
    # "2**10" is two numbers, never 1024; code-like text is just text.
    assert extract_answer("2**10").value == "10"
    assert extract_answer("__import__('os').system('echo hi')").value is None


def test_plain_space_thousands_only_in_a_whole_answer_string():
    assert parse_number("1 200") == 1200
    assert extract_answer("She buys 2 300-gram bags.").value == "300"
    assert extract_answer("It costs 1\u202f200 euros").value == "1200"


@pytest.mark.parametrize("s,value", [
    ("42", 42), ("1,200", 1200), ("1 200", 1200), ("$1,200.50", Fraction(2401, 2)),
    ("-$5", -5), ("$-5", -5), ("−7", -7), ("£3", 3), ("€12.5", Fraction(25, 2)), ("¥900", 900),
    ("12 kg", 12), ("36 crates.", 36), ("3/4", Fraction(3, 4)), ("1 1/2", Fraction(3, 2)),
    (".5", Fraction(1, 2)), ("2.50", Fraction(5, 2)), ("0.125", Fraction(1, 8)),
    ("**42**", 42), ("= 42", 42), ("(7)", 7), ("25%", 25), ("25 percent", 25),
    # Number words, values from memory of English numerals.
    ("three", 3), ("Eleven", 11), ("twenty-one", 21), ("twenty one", 21), ("ninety-nine", 99),
    ("one hundred and five", 105), ("a hundred", 100), ("two thousand and twelve", 2012),
    ("one thousand two hundred and thirty-four", 1234), ("a dozen", 12), ("two dozen", 24),
    ("minus four", -4), ("zero", 0), ("three heads of broccoli", 3),
])
def test_parse_number(s, value):
    assert parse_number(s) == value


@pytest.mark.parametrize("s", [
    "", "a lamp", "none", "3 apples and 4 pears", "three four", "twenty twelve", "5/0",
    "about 12", "1.200,50", "12 or 13", "two and 3",
])
def test_parse_number_refuses(s):
    assert parse_number(s) is None


def test_percent_flag_and_comparison_rule():
    assert parse_quantity("25%") == (25, True)
    assert parse_quantity("25") == (25, False)
    assert answers_match("25", "25%", "number")
    assert answers_match("25%", "25", "number")
    assert not answers_match("0.25", "25%", "number")


@pytest.mark.parametrize("value,text", [
    (Fraction(42), "42"), (Fraction(-3, 4), "-0.75"), (Fraction(1, 3), "1/3"),
    (Fraction(5, 8), "0.625"), (Fraction(-7, 3), "-7/3"), (Fraction(0), "0"), (Fraction(5, 2), "2.5"),
])
def test_canonical_number(value, text):
    assert canonical_number(value) == text


@settings(max_examples=150, deadline=None)
@given(st.fractions(max_denominator=1000).filter(lambda f: abs(f) < 10**9))
def test_canonical_form_reads_back_exactly(f):
    # Independent check: Python's Fraction is the reference for the value.
    text = canonical_number(f)
    assert parse_number(text) == f
    assert extract_answer(f"So the answer is {text}.").value == text


@settings(max_examples=100, deadline=None)
@given(st.integers(min_value=0, max_value=10**9))
def test_thousands_written_by_python_format_parse_back(n):
    # Python's own "," format spec is the outside reference for comma thousands.
    assert parse_number(f"${n:,}") == n
    assert extract_answer(f"The total is ${n:,}.").value == str(n)


def test_absolute_and_relative_tolerance():
    assert answers_match("42", "42", "number")
    assert not answers_match("42.01", "42", "number")
    assert answers_match("41.99", "42", "number", tolerance=0.01)  # exactly on the bound
    assert not answers_match("41.98", "42", "number", tolerance=0.01)
    assert answers_match("41.58", "42", "number", tolerance=0.01, relative=True)  # 1% of 42 = 0.42
    assert not answers_match("41.57", "42", "number", tolerance=0.01, relative=True)
    assert answers_match("0.75", "3/4", "number") and answers_match("3/4", "0.75", "number")
    assert answers_match("three", "3", "number")


def test_match_failures_and_user_errors():
    assert not answers_match(None, "3", "number")
    assert not answers_match("many", "3", "number")
    with pytest.raises(DataError, match="not a number"):
        answers_match("3", "a few", "number")
    with pytest.raises(EvalkitError, match="tolerance"):
        answers_match("3", "3", "number", tolerance=-1)
    with pytest.raises(EvalkitError, match="answer kind"):
        extract_answer("3", kind="numeric")


CHOICES = ["12 spokes", "24 spokes", "36 spokes", "48 spokes"]


@pytest.mark.parametrize("text,letter,method", [
    ("The answer is (B).", "B", "stated"),
    ("The answer is C", "C", "stated"),
    ("**Answer:** D", "D", "stated"),
    ("Answer: (b)", "B", "stated"),
    ("The answer is 24 spokes.", "B", "stated"),
    ("Each wheel has 12, so two have 24, which is (B).", "B", "choice-letter"),
    ("B) 24 spokes", "B", "choice-letter"),
    ("C", "C", "choice-letter"),
    ("A.", "A", "choice-letter"),
    ("Two wheels need 36 spokes in all.", "C", "text"),
    ("A mechanic would say it depends.", None, "none"),
    ("(a) first count the wheels, (b) then the spokes.", None, "none"),
    ("The answer is (E).", None, "none"),  # four choices: only A-D are letters here
])
def test_choice_forms(text, letter, method):
    ex = extract_answer(text, "choice", CHOICES)
    assert (ex.value, ex.method) == (letter, method)


def test_choice_letters_default_to_a_to_e_and_score_by_letter_or_text():
    assert extract_answer("The answer is (E).", "choice").value == "E"
    assert score("The answer is (B).", "B", "choice")[1]
    assert score("The answer is (B).", "(b)", "choice")[1]
    assert score("The answer is (B).", "24 spokes", "choice", choices=CHOICES)[1]
    assert not score("The answer is (C).", "24 spokes", "choice", choices=CHOICES)[1]


@pytest.mark.parametrize("text,value,method", [
    ("The answer is New York.", "new york", "stated"),
    ("Answer: **Blue**\nBecause the sky...", "blue", "stated"),
    ("  Rear derailleur!  \nIt shifts the chain.", "rear derailleur", "text"),
    ("", None, "none"),
])
def test_text_forms(text, value, method):
    ex = extract_answer(text, "text")
    assert (ex.value, ex.method) == (value, method)


def test_text_scoring_by_normalised_equality():
    assert score("The answer is: Inner Tube.", "inner tube", "text")[1]
    assert not score("The answer is: inner tubes.", "inner tube", "text")[1]


@pytest.mark.parametrize("s,out", [
    ("  Hello,   WORLD!  ", "hello world"),
    ("Don't stop", "dont stop"),
    ("It costs $1,200.", "it costs $1200"),
    ("2.5 and 3/4, then 7.", "2.5 and 3/4 then 7"),
    ("twenty-one\tspokes\n", "twenty one spokes"),
    ("**Answer:** `x`", "answer x"),
    ("ﬁve", "five"),  # NFKC folds the ligature
])
def test_normalise_text(s, out):
    assert normalise_text(s) == out


def test_score_returns_extraction_and_verdict():
    ex, ok = score("Ravi needs 3 * 12 = 36 spokes. The answer is 36.", "36")
    assert ok and ex.method == "stated" and ex.value == "36"
    ex, ok = score("The answer is 35.", "36")
    assert not ok and ex.value == "35"
