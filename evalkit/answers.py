"""Final-answer extraction and normalisation.

Every rule, exactly as the code applies it:

Cutting. Before searching, a completion is cut: when it holds ``</think>`` and text follows the
last one, only that text is searched; then it ends at the first stop found after its first
non-blank character: a special token (``<|``, ``</s>``) anywhere, or a line that starts with
``Q:``, ``Question:`` or ``Problem:`` (a model inventing the next exemplar). Spans always index
the original text.

Numbers. A number is written in digits or in words.

* Digits: an optional sign (``-``, ``−`` or ``+``; not when glued to a word character, ``)``,
  ``.`` or ``/`` before it, so ``10-3`` is 10 and 3), an optional currency sign ``$ £ € ¥``
  (before or after the sign), then one of: a mixed fraction ``1 1/2``, a fraction ``3/4``, LaTeX
  ``\\frac{3}{4}``, an integer with comma thousands in groups of three (``1,200``) or thin /
  no-break-space thousands, a plain integer, a decimal (``2.50``, ``.5``); then optionally ``%``
  or ``percent``. A number never ends in its decimal point, so ``42.`` ends a sentence.
* Words: zero to nineteen, twenty to ninety (a unit joined by hyphen or space: ``twenty-one``),
  hundred, thousand, million, dozen; ``and`` only after hundred/thousand/million (``one hundred
  and five``); ``a``/``an`` before hundred/thousand/million/dozen (``a dozen`` is 12); ``minus``
  or ``negative`` in front. Case does not matter. Fractions in words ("a half") are not read.
* A percentage keeps its written number: ``25%`` is 25 with ``percent=True``. Comparison ignores
  the flag, so ``25%`` matches gold ``25`` and ``25%``, and does not match ``0.25``.
* :func:`parse_number` reads one answer string. It ignores surrounding spaces, markdown
  (``* _ `` ` ``), quotes, brackets, a leading ``=`` or ``:``, trailing ``. ! ? , ;`` and also
  accepts plain-space thousands (``1 200``). The string must start with the number; what follows
  must hold no digit and no number word (units and words such as ``12 kg`` or ``36 crates`` are
  fine). Anything else is ``None``. Nothing is ever evaluated as code.
* Canonical form (:attr:`Extraction.value` for numbers): an integer as ``42``; a fraction with a
  finite decimal expansion as a decimal without trailing zeros (``3/4`` gives ``0.75``); any
  other as ``p/q`` (``1/3``).

kind="number":

1. ``stated``: the LAST answer cue in the cut text whose phrase holds a number. Cues: ``#### X``
   (GSM8K annotation), ``\\boxed{X}``, and the word ``answer`` followed (after optional ``*``,
   ``_`` or spaces) by ``is``, ``:``, ``=``, ``would be``, ``will be`` or ``should be`` (this covers
   "The answer is", "Answer:", "**Answer:**", "Final answer:", "The correct answer is"). A cue's
   phrase starts after the cue (skipping spaces, newlines, ``*``, ``_`` and ``:``) and runs to the
   end of its sentence (a newline, or ``. ! ? ;`` followed by a space or the end), at most 160
   characters; for ``####`` it is the rest of the line, for ``\\boxed`` the braces' content. The
   phrase's FIRST number is the answer, except that when the phrase holds ``=`` followed by a
   number, the first number after its last ``=`` is ("The answer is 12 + 30 = 42" gives 42). A
   cue whose phrase holds no number is passed over.
   "So the total is" and a closing ``= X`` are deliberately not cues: chains state intermediate
   totals that way; the fallback reads them when they come last.
2. ``last-number``: the last number in the cut text, digits or words. A lone word ``one`` counts
   only when it is the whole text ("No one knows" is not an answer).
3. ``none``.

kind="choice" (letters A-E, or as many letters as ``choices`` has):

1. ``stated``: the last cue whose phrase starts with an allowed letter, bare upper case or in
   parentheses (``(B)``, ``B``, ``B.``, ``**B**``), or, with ``choices``, whose phrase equals one
   choice's text after :func:`normalise_text`.
2. ``choice-letter``: the last parenthesised upper-case allowed letter ``(B)`` (lower case
   ``(a)`` is left alone: chains enumerate with it); else an upper-case letter opening the text
   and followed by ``)``, ``.``, ``:`` or the end (``B) 12``, ``B.``, ``B``; not "A mechanic...").
3. ``text``: with ``choices``, the choice whose normalised text occurs (as whole words) latest in
   the normalised text; raw is that choice's text and span is None (positions in normalised text
   are not the original's).
4. ``none``. The value is the upper-case letter.

kind="text": ``stated`` is the last cue's phrase, normalised, when not empty; else ``text``, the
first non-blank line, normalised; else ``none``.

:func:`normalise_text`: Unicode NFKC, lower case; commas between digits removed (``1,200``), and
``.`` or ``/`` between digits kept (``2.5``, ``3/4``); apostrophes removed (``don't`` gives
``dont``); every other punctuation character and `` ` ^ ~ `` becomes a space; runs of whitespace
collapse to one space; ends trimmed.
"""

from __future__ import annotations

import math
import re
import unicodedata
from dataclasses import dataclass
from fractions import Fraction
from typing import NamedTuple, Sequence

from evalkit.errors import DataError, EvalkitError

__all__ = [
    "KINDS",
    "Extraction",
    "Quantity",
    "extract_answer",
    "parse_number",
    "parse_quantity",
    "canonical_number",
    "answers_match",
    "score",
    "normalise_text",
    "cut_at_stops",
]

KINDS = ("number", "choice", "text")
STOP_LINES = ("Q:", "Question:", "Problem:")
STOP_MARKERS = ("<|", "</s>")
_PHRASE_MAX = 160


@dataclass(frozen=True)
class Extraction:
    """What was read from a completion: canonical value, matched text, rule used, span in the text."""

    value: str | None
    raw: str | None
    method: str  # "stated" | "last-number" | "choice-letter" | "text" | "none"
    span: tuple[int, int] | None


class Quantity(NamedTuple):
    """A parsed number and whether it was written as a percentage."""

    value: Fraction
    percent: bool


_NONE = Extraction(None, None, "none", None)

# --- digits -------------------------------------------------------------------------------

_CUR = r"\\?[$£€¥]"


def _digits_pattern(thousands_space: str) -> re.Pattern[str]:
    return re.compile(
        rf"""
        (?<![^\W_])(?<![.)/])
        (?P<cur1>{_CUR})?
        (?P<neg>[-−+])?
        (?P<cur2>{_CUR})?
        (?:
            (?P<mw>\d+)[ ](?P<mn>\d+)/(?P<md>\d+)(?![\d/])
          | (?P<fn>\d+)/(?P<fd>\d+)(?![\d/])
          | \\[dt]?frac\{{(?P<ln>\d+)\}}\{{(?P<ld>\d+)\}}
          | (?P<int>\d{{1,3}}(?:,\d{{3}})+(?!\d)|\d{{1,3}}(?:{thousands_space}\d{{3}})+(?!\d)|\d+)
            (?:\.(?P<dec>\d+))?
          | \.(?P<dec0>\d+)
        )
        (?P<pct>[ ]?\\?%|[ ](?:percent|per[ ]cent)\b)?
        """,
        re.X | re.I,
    )


# In running text a plain space is not taken as a thousands separator ("2 300-gram bags").
_DIGITS_TEXT = _digits_pattern("[\u00a0\u202f\u2009]")
_DIGITS_LOOSE = _digits_pattern("[ \u00a0\u202f\u2009]")


def _digits_value(m: re.Match[str]) -> Fraction | None:
    try:
        if m["mw"] is not None:
            v = int(m["mw"]) + Fraction(int(m["mn"]), int(m["md"]))
        elif m["fn"] is not None:
            v = Fraction(int(m["fn"]), int(m["fd"]))
        elif m["ln"] is not None:
            v = Fraction(int(m["ln"]), int(m["ld"]))
        elif m["int"] is not None:
            whole = re.sub(r"\D", "", m["int"])
            v = Fraction(whole + "." + m["dec"]) if m["dec"] else Fraction(int(whole))
        else:
            v = Fraction("0." + m["dec0"])
    except ZeroDivisionError:
        return None
    return -v if m["neg"] in ("-", "−") else v


# --- words --------------------------------------------------------------------------------

_UNITS = {w: i for i, w in enumerate(
    "zero one two three four five six seven eight nine ten eleven twelve thirteen fourteen "
    "fifteen sixteen seventeen eighteen nineteen".split())}
_TENS = {w: 10 * i for i, w in enumerate(
    "twenty thirty forty fifty sixty seventy eighty ninety".split(), start=2)}
_SCALES = {"thousand": 1000, "million": 1_000_000}
_NUMBER_WORD = "|".join([*_UNITS, *_TENS, "hundred", *_SCALES, "dozen"])
_WORD_RUN = re.compile(
    rf"\b(?:(?:minus|negative)\s+)?(?:an?\s+(?=(?:hundred|thousand|million|dozen)\b))?"
    rf"(?:{_NUMBER_WORD})\b(?:(?:\s+and\s+|[\s-]+)(?:{_NUMBER_WORD})\b)*",
    re.I,
)
_WORD_TOKEN = re.compile(rf"\b(?:{_NUMBER_WORD}|and|an?|minus|negative)\b", re.I)


def _parse_words(tokens: list[tuple[str, int, int]], i: int) -> tuple[int, int] | None:
    """Greedily read one number from ``tokens[i:]``; return (value, index after it) or None."""
    sign, j = 1, i
    if j < len(tokens) and tokens[j][0] in ("minus", "negative"):
        sign, j = -1, j + 1
    total, current, last = 0, 0, None
    if j < len(tokens) and tokens[j][0] in ("a", "an"):
        current, last, j = 1, "a", j + 1
    start = j
    while j < len(tokens):
        w = tokens[j][0]
        if w == "and":
            ok = last in ("hundred", "scale") and j + 1 < len(tokens) and (
                tokens[j + 1][0] in _UNITS or tokens[j + 1][0] in _TENS)
            if not ok:
                break
            j += 1
            continue
        if w in _UNITS:
            v = _UNITS[w]
            if last == "tens" and 1 <= v <= 9 or last in (None, "hundred", "scale") and (v or last is None):
                current += v
                last = "zero" if v == 0 else ("unit" if v < 10 else "teen")
            else:
                break
        elif w in _TENS:
            if last not in (None, "hundred", "scale"):
                break
            current, last = current + _TENS[w], "tens"
        elif w == "hundred":
            if last not in ("a", "unit", "teen", "tens") or not 1 <= current <= 99:
                break
            current, last = current * 100, "hundred"
        elif w in _SCALES:
            scale = _SCALES[w]
            if last in (None, "zero", "scale") or current == 0 or total and total % (scale * 1000) != 0:
                break
            total, current, last = total + current * scale, 0, "scale"
        elif w == "dozen":
            if last not in ("a", "unit", "teen", "tens"):
                break
            current, last = current * 12, "dozen"
            j += 1
            break
        else:  # "a", "an", "minus" in the middle of a run end the number
            break
        j += 1
        if last == "zero":
            break
    if j == start or last == "a":
        return None
    return sign * (total + current), j


def _word_numbers(text: str) -> list[tuple[int, int, Fraction, bool]]:
    """(start, end, value, lone_one) for each number written in words."""
    out = []
    for run in _WORD_RUN.finditer(text):
        tokens = [(t.group().lower(), run.start() + t.start(), run.start() + t.end())
                  for t in _WORD_TOKEN.finditer(run.group())]
        i = 0
        while i < len(tokens):
            got = _parse_words(tokens, i)
            if got is None:
                i += 1
                continue
            value, j = got
            lone_one = j == i + 1 and tokens[i][0] == "one"
            out.append((tokens[i][1], tokens[j - 1][2], Fraction(value), lone_one))
            i = j
    return out


def _numbers(text: str) -> list[tuple[int, int, Fraction, bool]]:
    """Every number in ``text`` in order: (start, end, value, lone_one)."""
    found = [(m.start(), m.end(), v, False)
             for m in _DIGITS_TEXT.finditer(text) if (v := _digits_value(m)) is not None]
    taken = [(s, e) for s, e, _, _ in found]
    for item in _word_numbers(text):
        if not any(s < item[1] and item[0] < e for s, e in taken):
            found.append(item)
    return sorted(found, key=lambda t: t[0])


# --- public parsing -----------------------------------------------------------------------

_LEAD = " \t\r\n*_`\"'([{=:"
_TRAIL = " \t\r\n*_`\"')]}.!?,;"
_PERCENT_AFTER = re.compile(r"\s*(?:%|percent\b|per cent\b)", re.I)


def parse_quantity(s: str) -> Quantity | None:
    """Read one answer string as a number and a percent flag; None when it is not one number."""
    s = s.strip(_LEAD).rstrip(_TRAIL)
    m = _DIGITS_LOOSE.match(s)
    if m is not None:
        value = _digits_value(m)
        rest = s[m.end():]
        if value is None or re.search(r"\d", rest) or _WORD_RUN.search(rest):
            return None
        return Quantity(value, m["pct"] is not None)
    words = _word_numbers(s)
    if not words or words[0][0] != 0:
        return None
    _, end, value, _ = words[0]
    rest = s[end:]
    if re.search(r"\d", rest) or len(words) > 1:
        return None
    return Quantity(value, _PERCENT_AFTER.match(rest) is not None)


def parse_number(s: str) -> Fraction | None:
    """Read one answer string ("$1,200", "3/4", "twenty-one", "36 crates") as an exact number."""
    q = parse_quantity(s)
    return None if q is None else q.value


def canonical_number(value: Fraction) -> str:
    """Write a number canonically: "42", "0.75" for a finite decimal, otherwise "p/q"."""
    if value.denominator == 1:
        return str(value.numerator)
    d = value.denominator
    twos = fives = 0
    while d % 2 == 0:
        d, twos = d // 2, twos + 1
    while d % 5 == 0:
        d, fives = d // 5, fives + 1
    if d != 1:
        return f"{value.numerator}/{value.denominator}"
    places = max(twos, fives)
    digits = str(abs(value.numerator) * 10**places // value.denominator).rjust(places + 1, "0")
    sign = "-" if value < 0 else ""
    return f"{sign}{digits[:-places]}.{digits[-places:]}".rstrip("0")


# --- text ---------------------------------------------------------------------------------

def normalise_text(s: str) -> str:
    """Lowercase, drop punctuation (keeping 2.5 and 3/4 intact), collapse whitespace."""
    s = unicodedata.normalize("NFKC", s).lower()
    s = re.sub(r"(?<=\d),(?=\d)", "", s)
    s = re.sub(r"['\u2019\u2018]", "", s)
    out = []
    for i, ch in enumerate(s):
        if ch in "./" and 0 < i < len(s) - 1 and s[i - 1].isdigit() and s[i + 1].isdigit():
            out.append(ch)
        elif unicodedata.category(ch).startswith("P") or ch in "`^~":
            out.append(" ")
        else:
            out.append(ch)
    return " ".join("".join(out).split())


def cut_at_stops(text: str) -> tuple[int, int]:
    """Return (start, end) of the part of ``text`` that extraction searches (see module rules)."""
    start = 0
    think = text.rfind("</think>")
    if think >= 0 and text[think + 8:].strip():
        start = think + 8
    first = len(text) - len(text[start:].lstrip()) + 1
    end = len(text)
    for marker in STOP_MARKERS:
        at = text.find(marker, first)
        if 0 <= at < end:
            end = at
    lines = re.compile(r"^[ \t]*(?:" + "|".join(map(re.escape, STOP_LINES)) + ")", re.M)
    m = lines.search(text, first)
    if m is not None and m.start() < end:
        end = m.start()
    return start, max(end, start)


_CUE = re.compile(
    r"(?P<hash>\#\#\#\#)"
    r"|\\boxed\{(?P<boxed>(?:[^{}]|\{[^{}]*\})*)\}"
    r"|\banswer\b[*_ \t]*(?:is\b|:|=|would\ be\b|will\ be\b|should\ be\b)",
    re.I | re.X,
)
_SENTENCE_END = re.compile(r"\n|[.!?;](?=\s|$)")


def _phrases(text: str, start: int, end: int) -> list[tuple[int, int]]:
    """(start, end) of each cue's phrase inside text[start:end], in order."""
    out = []
    for m in _CUE.finditer(text, start, end):
        if m["boxed"] is not None:
            out.append((m.start("boxed"), m.end("boxed")))
            continue
        p = m.end()
        while p < end and text[p] in " \t\r\n*_:":
            p += 1
        stop = min(end, p + _PHRASE_MAX)
        if m["hash"] is not None:
            nl = text.find("\n", p, stop)
        else:
            se = _SENTENCE_END.search(text, p, stop)
            nl = -1 if se is None else se.start()
        out.append((p, stop if nl < 0 else nl))
    return out


def _number_extraction(text: str, start: int, end: int) -> Extraction:
    for ps, pe in reversed(_phrases(text, start, end)):
        eq = text.rfind("=", ps, pe)
        if eq >= 0 and _numbers(text[eq + 1:pe]):
            ps = eq + 1  # "The answer is 12 + 30 = 42": the result, not the first operand
        nums = _numbers(text[ps:pe])
        if nums:
            s, e, v, _ = nums[0]
            return Extraction(canonical_number(v), text[ps + s:ps + e], "stated", (ps + s, ps + e))
    body = text[start:end]
    nums = _numbers(body)
    whole = body.strip(_LEAD).rstrip(_TRAIL)
    for s, e, v, lone_one in reversed(nums):
        if not lone_one or whole.lower() == "one":
            return Extraction(canonical_number(v), body[s:e], "last-number", (start + s, start + e))
    return _NONE


def _choice_extraction(text: str, start: int, end: int, choices: Sequence[str] | None) -> Extraction:
    n = len(choices) if choices else 5
    letters = "ABCDEFGHIJKLMNOPQRSTUVWXYZ"[: max(1, min(n, 26))]
    lead = re.compile(rf"\(([{letters}])\)|([{letters}])(?![\w'])", re.I)
    normalised = [normalise_text(c) for c in choices or ()]
    for ps, pe in reversed(_phrases(text, start, end)):
        m = lead.match(text, ps, pe)
        if m and (m.group(1) or m.group(2).isupper()):
            g = 1 if m.group(1) else 2
            return Extraction(m.group(g).upper(), m.group(), "stated", m.span())
        phrase = normalise_text(text[ps:pe])
        if phrase and phrase in normalised:
            return Extraction(letters[normalised.index(phrase)], text[ps:pe], "stated", (ps, pe))
    paren = list(re.finditer(rf"\(([{letters}])\)", text[start:end]))
    if paren:
        m = paren[-1]
        return Extraction(m.group(1).upper(), m.group(), "choice-letter",
                          (start + m.start(), start + m.end()))
    body = text[start:end]
    lstripped = len(body) - len(body.lstrip(_LEAD))
    m = re.compile(rf"([{letters}])(?=[).:]|\s*$)").match(body, lstripped)
    if m:
        return Extraction(m.group(1), m.group(1), "choice-letter", (start + m.start(), start + m.end()))
    if choices:
        hay = f" {normalise_text(body)} "
        best = max(((hay.rfind(f" {c} "), i) for i, c in enumerate(normalised) if c), default=(-1, 0))
        if best[0] >= 0:
            return Extraction(letters[best[1]], choices[best[1]], "text", None)
    return _NONE


def _text_extraction(text: str, start: int, end: int) -> Extraction:
    for ps, pe in reversed(_phrases(text, start, end)):
        value = normalise_text(text[ps:pe])
        if value:
            return Extraction(value, text[ps:pe], "stated", (ps, pe))
    for m in re.finditer(r"[^\n]+", text[start:end]):
        value = normalise_text(m.group())
        if value:
            return Extraction(value, m.group(), "text", (start + m.start(), start + m.end()))
    return _NONE


def _check_kind(kind: str) -> None:
    if kind not in KINDS:
        raise EvalkitError(
            f"answer kind {kind!r} is not one of {', '.join(KINDS)}; set the task's answer kind to one of them")


def extract_answer(text: str, kind: str = "number", choices: Sequence[str] | None = None) -> Extraction:
    """Read the final answer of one completion by the module's rules."""
    _check_kind(kind)
    start, end = cut_at_stops(text)
    if kind == "number":
        return _number_extraction(text, start, end)
    if kind == "choice":
        return _choice_extraction(text, start, end, choices)
    return _text_extraction(text, start, end)


def _tolerance(tolerance: float) -> Fraction:
    if not math.isfinite(tolerance) or tolerance < 0:
        raise EvalkitError(f"tolerance {tolerance!r} must be a finite number >= 0; fix the task's tolerance")
    # repr gives the decimal the user wrote (0.01, not the binary float just above it)
    return Fraction(repr(float(tolerance)))


def answers_match(extracted: str | None, gold: str, kind: str, tolerance: float = 0.0,
                  relative: bool = False) -> bool:
    """Whether an extracted answer equals the gold one.

    Numbers match when ``|a - g| <= tolerance`` (absolute) or, with ``relative``,
    ``|a - g| <= tolerance * |g|``, in exact arithmetic; percent signs are ignored. Choices match
    by letter; text by :func:`normalise_text` equality. A gold that is not a number under
    kind="number" raises :class:`~evalkit.errors.DataError`.
    """
    _check_kind(kind)
    tol = _tolerance(tolerance)
    if kind == "number":
        g = parse_number(str(gold))
        if g is None:
            raise DataError(f"gold answer {gold!r} is not a number; fix it or give the task the answer kind 'text'")
        if extracted is None:
            return False
        a = parse_number(extracted)
        if a is None:
            return False
        return abs(a - g) <= (tol * abs(g) if relative else tol)
    if extracted is None:
        return False
    if kind == "choice":
        letter = re.fullmatch(r"\s*\(?([A-Za-z])\)?[.:]?\s*", str(gold))
        if letter:
            return extracted.strip().upper() == letter.group(1).upper()
    return normalise_text(extracted) == normalise_text(str(gold))


def score(text: str, gold: str, kind: str = "number", tolerance: float = 0.0,
          choices: Sequence[str] | None = None, relative: bool = False) -> tuple[Extraction, bool]:
    """Extract the answer from ``text`` and compare it with ``gold``."""
    ex = extract_answer(text, kind, choices)
    if kind == "choice" and choices:
        wanted = normalise_text(str(gold))
        texts = [normalise_text(c) for c in choices]
        if wanted in texts and not re.fullmatch(r"\(?[a-z]\)?", wanted):
            gold = "ABCDEFGHIJKLMNOPQRSTUVWXYZ"[texts.index(wanted)]
    return ex, answers_match(ex.value, gold, kind, tolerance, relative)
