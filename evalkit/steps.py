"""Arithmetic claims in free text (a model's reasoning chain), evaluated exactly.

A *step* is an arithmetic expression followed by a claimed result: ``3 * 14 = 42``,
``$1,200 / 4 = $300``, ``20% of 50 is 10``, or the GSM8K annotation ``<<48/2=24>>``
(Cobbe et al., 2021, "Training Verifiers to Solve Math Word Problems"). Text is never
evaluated by Python: a small tokenizer and a recursive-descent parser read it, and
``fractions.Fraction`` does the arithmetic, so ``0.1 + 0.2 = 0.3`` holds exactly.

What counts as a step
    An equality sign (``=``, ``==``, ``≈``, ``~=``, or the words ``equals``, ``is``,
    ``is equal to``) with an expression holding at least one operator before it and a number
    right after it. A bare ``x = 5`` or ``total = 5`` is not a step.

Expressions
    Numbers (``1,200``, ``3.5``, ``.5``, ``-3`` with the sign attached), ``+ - * / x × ÷ ·``,
    the words ``plus``, ``minus``, ``times``, ``multiplied by``, ``divided by``, parentheses,
    percentages (``20%`` or ``20 percent`` is 1/5; ``of`` after a percentage multiplies and
    binds tighter than ``*`` and ``/``: ``100 / 20% of 50`` is 100 / 10). A currency
    sign may precede a number and up to three unit words may follow one (``3 crates``,
    ``$12 per crate``, ``60 km/h``); both are dropped from the normalised expression. The
    expression is the longest well-formed run of tokens that ends at the equality sign,
    capped at 64 tokens (a longer run is skipped rather than judged on a fragment). A
    quantity in mixed units (``1 hour 30 minutes``) on either side of the sign is not judged.

Chained equalities
    Each equality sign is a claim about the expression immediately before it, back to the
    previous sign: ``3 * 4 = 12 + 2 = 14`` (a running total) gives the steps ``3 * 4 = 12``
    and ``12 + 2 = 14``. When the right-hand side is itself an expression whose value equals
    the left-hand side, the sign is a rewriting and not a claim: ``3 * 4 = 2 * 6 = 12``
    gives the single step ``2 * 6 = 12``.

Claimed results
    The number after the sign, optionally preceded by an approximation word or sign
    (``about``, ``approximately``, ``roughly``, ``around``, ``~``, or ``≈`` as the sign),
    a currency sign, and followed by units. ``3/4`` written tightly is the fraction 3/4. A
    claim followed by ``:`` and digits is a clock time and not a claim. ``p%`` claims p/100,
    except after an expression whose last operation is ``* 100`` (``12 / 48 * 100 = 25%``),
    where it claims p.

When a claim holds (see ``claim_holds``)
    A claim written with d > 0 decimals holds when |value - claimed| <= 0.5 * 10**-d, so a
    value rounded to the places it shows is correct (``10 / 3 = 3.33`` and ``= 3.3`` hold;
    ``= 3.4`` and the truncation ``2 / 3 = 0.666`` fail). A claim with no decimals must be
    exact (``10 / 3 = 3`` fails) unless it is marked approximate (``10 / 3 ≈ 3``,
    ``= about 3``), when half a unit is allowed. For a percentage the unit is that of the
    written number (``1 / 3 = 33.3%`` holds). A division by zero has no value and never holds.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from fractions import Fraction

from evalkit.numbers import decimals_of, format_value, parse_literal

__all__ = ["Step", "find_steps", "evaluate", "claim_holds", "pending_expression", "recompute", "format_value"]

MAX_TOKENS = 64  # per expression: longer runs are skipped, not judged on a fragment
MAX_DIGITS = 40  # longer digit runs are not numbers a chain computes with
MAX_UNITS = 3  # unit words allowed after one number ("eggs per crate")
MAX_DEPTH = 32  # parenthesis nesting

NUM, EQ, APPROX, OP, PCT, WORD, LP, RP, CUR, BREAK = range(10)

_TOKEN = re.compile(
    r"[ \t\u00a0]*(?:(?P<num>\d{1,3}(?:,\d{3})+(?:\.\d+)?|\d+(?:\.\d+)?|\.\d+)"
    r"|(?P<eqw>(?<![a-z])(?:is\s+equal\s+to|equals|is)(?![a-z]))"
    r"|(?P<opw>(?<![a-z])(?:divided\s+by|multiplied\s+by|times|plus|minus|x|of)(?![a-z]))"
    r"|(?P<pctw>(?<![a-z])(?:percent|per\s+cent)(?![a-z]))"
    r"|(?P<apw>(?<![a-z])(?:about|approximately|approx|roughly|around)(?![a-z])\.?)"
    r"|(?P<word>[a-z]+)"
    r"|(?P<eq>==?|\u2248|~=)"
    r"|(?P<ap>~)"
    r"|(?P<op>[-+*/\u00d7\u00f7\u00b7\u22c5\u2212])"
    r"|(?P<lp>\()|(?P<rp>\))|(?P<pct>%)|(?P<cur>[$\u20ac\u00a3\u00a5])"
    r"|(?P<other>.))?",
    re.IGNORECASE | re.DOTALL,
)
_OPS = {"+": "+", "-": "-", "\u2212": "-", "*": "*", "\u00d7": "*", "\u00b7": "*", "\u22c5": "*",
        "x": "*", "times": "*", "multiplied by": "*", "/": "/", "\u00f7": "/", "divided by": "/",
        "plus": "+", "minus": "-", "of": "of"}
_NUMBER_IN = re.compile(r"[-\u2212]?(?:\d{1,3}(?:,\d{3})+(?:\.\d+)?|\d+(?:\.\d+)?|\.\d+)(?:/\d+)?%?")
# Units that combine with a second number into one quantity ("2 hours 30 minutes").
_MEASURES = frozenset(
    "hour hours hr hrs h minute minutes min mins second seconds sec secs day days week weeks "
    "month months year years foot feet ft inch inches yard yards mile miles pound pounds lb lbs "
    "ounce ounces oz dollar dollars cent cents pence m cm mm km kg g l ml".split())
# Words that end a phrase rather than name a unit ("5 and 3 + 4 = 7").
_STOPWORDS = frozenset("and or so then thus hence therefore which but because since if when".split())


@dataclass(frozen=True)
class Step:
    """One arithmetic claim found in a text, with its exact verdict."""

    start: int  # span of the whole claim in the text (a GSM8K annotation includes << and >>)
    end: int
    expression: str  # normalised, e.g. "1200 / 4"
    claimed: Fraction
    value: Fraction | None  # exact value of the expression; None when undefined (x / 0)
    holds: bool
    text: str  # text[start:end]
    result_span: tuple[int, int]  # span of the claimed number (sign, digits, %), for replacing it


_KINDS = {"num": NUM, "op": OP, "opw": OP, "word": WORD, "eq": EQ, "eqw": EQ, "ap": APPROX,
          "apw": APPROX, "pct": PCT, "pctw": PCT, "lp": LP, "rp": RP, "cur": CUR, "other": BREAK}


def _tokenize(text: str) -> list[tuple[int, int, int, str]]:
    """Tokens as (kind, start, end, normalised text); spaces are dropped, newlines break."""
    out = []
    append = out.append
    kinds, ops = _KINDS, _OPS
    for m in _TOKEN.finditer(text):
        group = m.lastgroup
        if group is None:
            continue  # trailing spaces
        kind = kinds[group]
        raw = m.group(group)
        s, e = m.span(group)
        if kind == OP:
            raw = ops.get(raw) or ops[" ".join(raw.lower().split())]
        elif kind == NUM:
            if len(raw) > MAX_DIGITS:
                kind = BREAK
        elif kind == WORD or kind == EQ:
            raw = raw.lower()
        elif kind == APPROX:
            raw = "~"
        elif kind == PCT:
            raw = "%"
        append((kind, s, e, raw))
    return out


def _is_sign(tok) -> bool:
    """A minus sign written as a symbol (the word "minus" is only ever binary)."""
    return tok[0] == OP and tok[3] == "-" and tok[2] - tok[1] == 1


def _is_unit(tok) -> bool:
    return tok[0] == WORD and tok[3] not in _STOPWORDS


class _Fail(Exception):
    pass


def _units_back(toks, k: int, floor: int) -> int:
    """Index of the token before the unit words ending at ``k`` (``k`` itself when none)."""
    n = 0
    while k > floor and n < MAX_UNITS:
        t = toks[k]
        if _is_unit(t):
            k, n = k - 1, n + 1
        elif t[0] == OP and t[3] == "/" and k - 1 > floor and _is_unit(toks[k - 1]) and n and \
                toks[k - 1][2] == t[1] and toks[k + 1][1] == t[2]:
            k -= 1  # "km/h": a tight slash between unit words joins them
        else:
            break
    return k


def _operand_ends_at(toks, k: int, floor: int) -> bool:
    """Whether a complete operand could end at token ``k`` (decides unary vs binary minus)."""
    if k <= floor:
        return False
    j = _units_back(toks, k, floor)
    return j > floor and toks[j][0] in (NUM, PCT, RP)


def _with_unary(toks, s: int, floor: int) -> int:
    """Extend an operand starting at ``s`` over an attached minus sign that is not a binary one."""
    m = s - 1
    if m > floor and _is_sign(toks[m]) and toks[m][2] == toks[s][1] \
            and not _operand_ends_at(toks, m - 1, floor):
        return m
    return s


def _expr_start(toks, hi: int) -> int | None:
    """Token index where the longest well-formed expression ending just before ``hi`` starts."""
    floor = hi - 1 - MAX_TOKENS
    capped = floor >= 0
    floor = max(floor, -1)
    i, depth, best = hi - 1, 0, None
    expect_operand, need_pct = True, False
    while True:
        if i <= floor:
            return None if capped else best
        if expect_operand:
            k = i if need_pct else _units_back(toks, i, floor)
            if k <= floor:
                return None if capped else best
            kind = toks[k][0]
            if kind == RP and not need_pct:
                depth += 1
                if depth > MAX_DEPTH:
                    return best
                i = k - 1
                continue
            if kind == PCT:
                k -= 1
                if k <= floor:
                    return None if capped else best
                kind = toks[k][0]
            elif need_pct:
                return best
            if kind != NUM:
                return best
            s = k - 1 if k - 1 > floor and toks[k - 1][0] == CUR else k
            s = _with_unary(toks, s, floor)
            if depth == 0:
                best = s
            i, expect_operand, need_pct = s - 1, False, False
        else:
            kind, norm = toks[i][0], toks[i][3]
            if kind == OP:
                need_pct = norm == "of"
                i, expect_operand = i - 1, True
            elif kind == LP and depth > 0:
                depth -= 1
                s = _with_unary(toks, i, floor)
                if depth == 0:
                    best = s
                i = s - 1
            else:
                return best


class _Parser:
    """Recursive descent over toks[lo:hi].

    expr := term (+|- term)* ; term := factor (*|/ factor)* ;
    factor := - factor | primary [of factor] (of only after a percentage) ;
    primary := [currency] number [%] [units] | ( expr ) [units]
    """

    def __init__(self, toks, lo: int, hi: int):
        self.toks, self.i, self.hi, self.depth = toks, lo, hi, 0

    def peek(self):
        i = self.i
        return self.toks[i] if i < self.hi else None

    def parse(self):
        node = self.expr()
        if self.i != self.hi:
            raise _Fail
        return node

    def expr(self):
        node = self.term()
        while (t := self.peek()) is not None and t[0] == OP and t[3] in "+-":
            self.i += 1
            node = ("bin", t[3], node, self.term())
        return node

    def term(self):
        node = self.factor()
        while (t := self.peek()) is not None and t[0] == OP and t[3] in ("*", "/"):
            self.i += 1
            node = ("bin", t[3], node, self.factor())
        return node

    def factor(self):
        t = self.peek()
        if t is not None and t[0] == OP and t[3] == "-":
            self.i += 1
            return ("neg", self.factor())
        node = self.primary()
        if node[0] == "num" and node[3] and (t := self.peek()) is not None and t[3] == "of":
            # "of" multiplies only after a percentage and binds tighter than * and /:
            # "100 / 20% of 50" is 100 / (20% of 50)
            self.i += 1
            return ("bin", "of", node, self.factor())
        return node

    def units(self):
        n = 0
        while n < MAX_UNITS and (t := self.peek()) is not None:
            if _is_unit(t):
                n += 1
            elif not (n and t[0] == OP and t[3] == "/" and self.i + 1 < self.hi
                      and _is_unit(self.toks[self.i + 1]) and self.toks[self.i - 1][2] == t[1]
                      and self.toks[self.i + 1][1] == t[2]):
                return
            self.i += 1

    def primary(self):
        t = self.peek()
        if t is None:
            raise _Fail
        if t[0] == CUR:
            self.i += 1
            t = self.peek()
            if t is None or t[0] != NUM:
                raise _Fail
        if t[0] == NUM:
            self.i += 1
            lit = t[3].replace(",", "")
            lit = "0" + lit if lit.startswith(".") else lit
            # ints where possible: Fraction arithmetic is several times slower
            value, pct = (Fraction(lit) if "." in lit else int(lit)), False
            if (p := self.peek()) is not None and p[0] == PCT:
                self.i += 1
                value, pct = Fraction(value) / 100, True
            if not pct:
                self.units()
            return ("num", value, lit, pct)
        if t[0] == LP:
            self.depth += 1
            if self.depth > MAX_DEPTH:
                raise _Fail
            self.i += 1
            inner = self.expr()
            if (r := self.peek()) is None or r[0] != RP:
                raise _Fail
            self.i += 1
            self.depth -= 1
            self.units()
            return ("paren", inner)
        raise _Fail


def _value(node) -> int | Fraction:
    tag = node[0]
    if tag == "num":
        return node[1]
    if tag == "neg":
        return -_value(node[1])
    if tag == "paren":
        return _value(node[1])
    a, b = _value(node[2]), _value(node[3])
    op = node[1]
    if op == "/":
        return Fraction(a, b) if type(a) is int and type(b) is int else a / b
    return a + b if op == "+" else a - b if op == "-" else a * b  # "*" and "of"


def _render(node) -> str:
    tag = node[0]
    if tag == "num":
        return node[2] + ("%" if node[3] else "")
    if tag == "neg":
        return "-" + _render(node[1])
    if tag == "paren":
        return "(" + _render(node[1]) + ")"
    return f"{_render(node[2])} {node[1]} {_render(node[3])}"


def _has_operator(node) -> bool:
    tag = node[0]
    if tag == "bin":
        return True
    return tag != "num" and _has_operator(node[1])


def _times_hundred(node) -> bool:
    """Whether the expression's last operation is ``* 100`` (then ``= 25%`` claims 25)."""
    while node[0] == "paren":
        node = node[1]
    if node[0] != "bin" or node[1] != "*":
        return False
    return any(n[0] == "num" and not n[3] and n[1] == 100 for n in (node[2], node[3]))


def _parse_tree(expression: str):
    toks = _tokenize(expression)
    if not toks or len(toks) > 4 * MAX_TOKENS:
        raise ValueError(f"not an arithmetic expression: {expression!r}")
    try:
        return _Parser(toks, 0, len(toks)).parse()
    except _Fail:
        raise ValueError(f"not an arithmetic expression: {expression!r}") from None


def evaluate(expression: str) -> Fraction:
    """Exact value of an expression in the step grammar; ValueError if unparsable, ZeroDivisionError for x / 0."""
    return Fraction(_value(_parse_tree(expression)))


def claim_holds(value: Fraction | None, claimed: Fraction, claimed_text: str,
                approximate: bool = False) -> bool:
    """Whether a claimed result is right to the precision it is written with (rule in the module docstring)."""
    if value is None:
        return False
    d = decimals_of(claimed_text)
    if d == 0 and not approximate:
        return value == claimed
    pct = claimed_text.rstrip().endswith("%")
    m = _NUMBER_IN.search(claimed_text)
    shown = parse_literal(m.group()) if m else claimed
    # Half a unit in the last written place, in the literal's own units: a percentage
    # literal claims p/100, or p itself after "* 100", and its places count in percent.
    ratio = abs(claimed / shown) if shown else Fraction(1)
    unit = ratio * (Fraction(1, 100) if pct else 1)
    return abs(value - claimed) <= unit / (2 * 10**d)


def _claimed_literal(toks, j: int):
    """The claimed number at token ``j``: (first token, literal's first token, last token, approx) or None."""
    n = len(toks)
    approx = False
    if j < n and toks[j][0] == APPROX:
        approx, j = True, j + 1
    first = j
    if j + 1 < n and _is_sign(toks[j]) and toks[j + 1][0] == CUR and toks[j][2] == toks[j + 1][1]:
        lit_start, j = j, j + 2  # "-$3": the sign stays in the claimed literal
    else:
        if j < n and toks[j][0] == CUR:
            j += 1
        lit_start = j
        if j + 1 < n and _is_sign(toks[j]) and toks[j][2] == toks[j + 1][1]:
            j += 1
    if j >= n or toks[j][0] != NUM:
        return None
    last = j
    if last + 1 < n and toks[last + 1][0] == PCT:
        last += 1
    elif (last + 2 < n and toks[last + 1][3] == "/" and toks[last + 2][0] == NUM
          and toks[last][2] == toks[last + 1][1] and toks[last + 1][2] == toks[last + 2][1]
          and "." not in toks[last][3] + toks[last + 2][3] and "," not in toks[last + 2][3]
          and int(toks[last + 2][3]) != 0):
        last += 2  # a tight fraction "3/4"
    if last + 2 < n and toks[last + 1][3] == ":" and toks[last + 1][1] == toks[last][2] \
            and toks[last + 2][0] == NUM:
        return None  # "10:45" is a clock time
    if last + 2 < n and toks[last + 1][0] == WORD and toks[last + 1][3] in _MEASURES \
            and toks[last + 2][0] == NUM:
        return None  # "2 hours 45 minutes" is one quantity in mixed units
    return first, lit_start, last, approx


_UNDEFINED = object()  # value of an expression that divides by zero


def _lhs(toks, hi: int, memo: dict):
    """(start, tree, value) of the expression ending before token ``hi``, or None; memoised by ``hi``.

    The right side of one sign is often the left side of the next (``3 * 4 = 12 + 2 = 14``),
    so each run of tokens is scanned and parsed once.
    """
    if hi in memo:
        return memo[hi]
    found = None
    s = _expr_start(toks, hi)
    if s is not None and s >= 2 and toks[s - 1][0] == WORD and toks[s - 1][3] in _MEASURES \
            and toks[s - 2][0] == NUM:
        s = None  # "1 hour 30 minutes + 45 minutes": the expression starts mid-quantity
    if s is not None:
        try:
            node = _Parser(toks, s, hi).parse()
        except _Fail:
            node = None
        if node is not None and _has_operator(node):
            try:
                value = _value(node)
            except ZeroDivisionError:
                value = _UNDEFINED
            found = (s, node, value)
    memo[hi] = found
    return found


def _rewriting(toks, rhs_first: int, rhs_last: int, left, claimed: Fraction, memo: dict) -> bool:
    """Whether ``lhs = <rhs expression>`` restates the left side rather than claiming a result."""
    if left is _UNDEFINED or claimed == left:
        return False
    k, n, ops = rhs_last + 1, len(toks), False
    while k < n and k - rhs_first <= MAX_TOKENS and toks[k][0] not in (EQ, BREAK, APPROX):
        ops = ops or toks[k][0] == OP
        k += 1
    if not ops:
        return False
    rhs = _lhs(toks, k, memo)
    return rhs is not None and rhs[0] == rhs_first and rhs[2] == left


def _step_at(text: str, toks, e: int, memo: dict) -> Step | None:
    found = _lhs(toks, e, memo)
    if found is None:
        return None
    s, node, value = found
    lit = _claimed_literal(toks, e + 1)
    if lit is None:
        return None
    first, lit_start, last, approx = lit
    approx = approx or toks[e][3] in ("\u2248", "~=")
    r0, r1 = toks[lit_start][1], toks[last][2]
    claimed_text = text[r0:r1]
    try:
        claimed = parse_literal(claimed_text)
    except (ValueError, ZeroDivisionError):  # defensive: the token checks above should prevent it
        return None
    if claimed_text.endswith("%") and _times_hundred(node):
        claimed *= 100
    if _rewriting(toks, first, last, value, claimed, memo):
        return None
    value = None if value is _UNDEFINED else Fraction(value)
    start, end = toks[s][1], r1
    if start >= 2 and text.startswith("<<", start - 2) and text.startswith(">>", end):
        start, end = start - 2, end + 2  # the whole GSM8K annotation is the claim
    return Step(start=start, end=end, expression=_render(node), claimed=claimed, value=value,
                holds=claim_holds(value, claimed, claimed_text, approx), text=text[start:end],
                result_span=(r0, r1))


def find_steps(text: str) -> list[Step]:
    """All arithmetic claims in ``text``, in text order."""
    toks = _tokenize(text)
    memo: dict = {}
    steps = []
    for e, t in enumerate(toks):
        if t[0] == EQ and e:
            step = _step_at(text, toks, e, memo)
            if step is not None:
                steps.append(step)
    steps.sort(key=lambda st: st.start)
    return steps


def pending_expression(text: str) -> tuple[int, str] | None:
    """If ``text`` ends with ``<expression> =`` (optionally a space), return (expression start, normalised expression).

    For a calculator in the loop: a runner stops generation here, appends
    ``format_value(evaluate(expression))`` and lets the model go on.
    """
    stripped = text.rstrip(" ")
    if not stripped.endswith("=") or stripped.endswith("=="):
        return None
    # Only the tail can hold the expression; start the slice at a space so no number is cut.
    cut = max(0, len(stripped) - 40 * MAX_TOKENS)
    if cut:
        cut = stripped.find(" ", cut) + 1 or len(stripped)
    toks = _tokenize(stripped[cut:])
    if not toks or toks[-1][0] != EQ or toks[-1][3] != "=":
        return None
    s = _expr_start(toks, len(toks) - 1)
    if s is None or (cut and s == 0):
        return None
    try:
        node = _Parser(toks, s, len(toks) - 1).parse()
    except _Fail:
        return None
    if not _has_operator(node):
        return None
    return cut + toks[s][1], _render(node)


def recompute(expression: str, replace: dict[Fraction, Fraction]) -> tuple[Fraction | None, bool]:
    """Re-evaluate ``expression`` with each operand equal to a key of ``replace`` swapped for its value.

    Returns (new value, None when it divides by zero; whether any operand was swapped).
    """
    swapped = False

    def swap(node):
        nonlocal swapped
        tag = node[0]
        if tag == "num":
            if node[1] in replace:
                swapped = True
                return ("num", replace[node[1]], node[2], False)
            return node
        if tag == "neg" and node[1][0] == "num" and -node[1][1] in replace:
            swapped = True  # "-6" written for a result of -6 is one operand, not minus 6
            return ("num", replace[-node[1][1]], node[1][2], False)
        if tag in ("neg", "paren"):
            return (tag, swap(node[1]))
        return ("bin", node[1], swap(node[2]), swap(node[3]))

    tree = swap(_parse_tree(expression))
    try:
        return Fraction(_value(tree)), swapped
    except ZeroDivisionError:
        return None, swapped
