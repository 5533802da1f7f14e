"""Exact number literals: read them as fractions, say how precise they are, write them back.

Shared by the step finder (evalkit.steps) and whoever else needs to read a number the way a
reasoning chain writes it: ``1,200``, ``3.50``, ``-2``, ``.5``, ``33.3%``, ``3/4``.
"""

from __future__ import annotations

import re
from fractions import Fraction

__all__ = ["parse_literal", "decimals_of", "format_value", "render_like"]

_LITERAL = re.compile(
    r"\s*(?P<sign>[-\u2212+]?)\s*[$\u20ac\u00a3\u00a5]?\s*"
    r"(?:(?P<num>\d{1,3}(?:,\d{3})+(?:\.\d+)?|\d+(?:\.\d+)?|\.\d+)(?:\s*/\s*(?P<den>\d+))?)"
    r"\s*(?P<pct>%?)\s*"
)


def parse_literal(text: str) -> Fraction:
    """Read one number literal exactly (``"1,200"``, ``"-3.5"``, ``"20%"`` -> 1/5, ``"3/4"``); ValueError otherwise."""
    m = _LITERAL.fullmatch(text)
    if not m:
        raise ValueError(f"not a number literal: {text!r}")
    value = Fraction(m["num"].replace(",", ""))
    if m["den"] is not None:
        if "." in m["num"] or int(m["den"]) == 0:
            raise ValueError(f"not a fraction literal: {text!r}")
        value /= int(m["den"])
    if m["pct"]:
        value /= 100
    return -value if m["sign"] in ("-", "\u2212") else value


def decimals_of(text: str) -> int:
    """How many digits a literal writes after its decimal point (``"3.50"`` -> 2, ``"12"`` -> 0)."""
    m = re.search(r"\.(\d+)", text)
    return len(m.group(1)) if m else 0


def _decimal_text(v: Fraction, places: int) -> str:
    """``v`` rounded half away from zero to ``places`` decimals, written out in full."""
    scale = 10**places
    q, r = divmod(abs(v) * scale, 1)
    n = int(q) + (1 if r >= Fraction(1, 2) else 0)
    sign = "-" if v < 0 and n else ""
    digits = str(n).rjust(places + 1, "0")
    return sign + (digits[:-places] + "." + digits[-places:] if places else digits)


def format_value(v: Fraction) -> str:
    """Write an exact value the short way a chain would: ``300``, ``3.3333``, ``2.5``, ``0.000033``.

    Integers are written plainly. Other values get four decimals with trailing zeros
    trimmed, but never fewer than one decimal and never fewer than two significant digits,
    so that ``evalkit.steps.claim_holds`` (a claim with d decimals holds within half a unit
    of its last place) always accepts the text as the value.
    """
    v = Fraction(v)
    if v.denominator == 1:
        return str(v.numerator)
    places = 4
    # Small magnitudes need more places to keep two significant digits (and to stay
    # non-zero); the bound keeps absurdly small values from writing hundreds of zeros.
    while places < 40 and abs(v) * 10**places < 10:
        places += 1
    text = _decimal_text(v, places).rstrip("0")
    return text + "0" if text.endswith(".") else text


def render_like(v: Fraction, template: str) -> str:
    """Write ``v`` in the surface form of ``template``: same decimals, thousands commas and % sign.

    Used to corrupt a claimed result without changing how it looks. ``v`` is in the
    literal's own units (for ``"20%"`` pass 21 to get ``"21%"``).
    """
    places = decimals_of(template)
    text = _decimal_text(Fraction(v), places)
    sign, body = ("-", text[1:]) if text.startswith("-") else ("", text)
    if "," in template:
        whole, _, frac = body.partition(".")
        body = f"{int(whole):,}" + ("." + frac if frac else "")
    currency = re.match(r"\s*[-\u2212]?\s*([$\u20ac\u00a3\u00a5])", template)
    if currency:  # "-$3" keeps its currency sign after the minus
        body = currency.group(1) + body
    return sign + body + ("%" if template.rstrip().endswith("%") else "")
