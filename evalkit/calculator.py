"""Calculator in the loop: exact results written into the chain while the model reasons.

Whenever the model has written an arithmetic expression followed by ``=``, the exact result is
computed (``evalkit.steps``, fractions, never ``eval``) and written into the text itself, and the
model continues from there.

It is implemented over any backend, as a repair loop that gives the same text as inserting at
every ``=`` online: greedy decoding is deterministic given its prefix, so where the model itself
wrote the exact result, inserting it would change nothing and the model's own continuation
stands. Only where the model wrote a different number (or none) is the text cut after the ``=``,
the exact result inserted, and the model asked to continue from there. So the model is called
again once per intervention, not once per ``=``.

Each intervention is logged: the character offset in the completion where the result was
inserted, the expression, what the model had written, and what was inserted.
"""

from __future__ import annotations

import re
from dataclasses import asdict, dataclass
from typing import Sequence

from .backends.base import Backend, Completion, ResultCallback
from .numbers import format_value, parse_literal
from .steps import claim_holds, evaluate, pending_expression

__all__ = ["Intervention", "calculator_generate", "MAX_INTERVENTIONS"]

MAX_INTERVENTIONS = 16
"""A chain needing more insertions than this is left as it stands (and says so in its log)."""

_WRITTEN = re.compile(r"[ \t]*(?P<num>[-−]?\$?\s?\d[\d,]*(?:\.\d+)?%?)")


@dataclass(frozen=True)
class Intervention:
    offset: int          # where in the completion the inserted result starts
    expression: str
    model_wrote: str     # the number the model wrote after '=', or '' if none
    inserted: str


def _first_disagreement(text: str, start: int) -> tuple[int, str, str, str] | None:
    """The first '=' at or after `start` whose result the model got wrong: (cut, expr, wrote, exact)."""
    pos = text.find("=", start)
    while pos != -1:
        pending = pending_expression(text[: pos + 1])
        if pending is not None:
            _, expression = pending
            try:
                value = evaluate(expression)
            except (ValueError, ZeroDivisionError):
                value = None
            if value is not None:
                m = _WRITTEN.match(text, pos + 1)
                wrote = m.group("num").strip() if m else ""
                ok = False
                if wrote:
                    try:
                        ok = claim_holds(value, parse_literal(wrote), wrote)
                    except (ValueError, ZeroDivisionError):
                        ok = False
                if not ok:
                    return pos + 1, expression, wrote, format_value(value)
        pos = text.find("=", pos + 1)
    return None


def calculator_generate(backend: Backend, prompts: Sequence[str], *, max_new_tokens: int,
                        stop: Sequence[str], on_result: ResultCallback | None = None) -> list[Completion]:
    """Greedy completions with exact arithmetic inserted after every '='; log in ``extra``."""
    n = len(prompts)
    texts = [""] * n                 # accepted completion so far (with insertions)
    checked = [0] * n                # offset up to which the accepted text has been checked
    logs: list[list[dict]] = [[] for _ in range(n)]
    used = [0] * n                   # new tokens spent so far
    totals = [0.0] * n
    margins: list[float | None] = [None] * n
    first: list[Completion | None] = [None] * n
    results: list[Completion | None] = [None] * n
    active = list(range(n))
    while active:
        budget = {i: max(1, max_new_tokens - used[i]) for i in active}
        # one call per distinct budget keeps batching; budgets only differ after interventions
        by_budget: dict[int, list[int]] = {}
        for i in active:
            by_budget.setdefault(budget[i], []).append(i)
        next_active = []
        for limit, idx in by_budget.items():
            outs = backend.generate([prompts[i] + texts[i] for i in idx], max_new_tokens=limit, stop=stop)
            for i, c in zip(idx, outs):
                first[i] = first[i] or c
                totals[i] += c.seconds
                if c.min_margin is not None:
                    margins[i] = c.min_margin if margins[i] is None else min(margins[i], c.min_margin)
                full = texts[i] + c.text
                hit = _first_disagreement(full, checked[i])
                if hit is not None and len(logs[i]) < MAX_INTERVENTIONS and used[i] < max_new_tokens:
                    cut, expression, wrote, exact = hit
                    # tokens spent on the part kept, estimated by its share of this completion's text
                    kept = max(0, cut - len(texts[i]))
                    used[i] += max(1, round(c.new_tokens * kept / max(len(c.text), 1)))
                    inserted = " " + exact
                    texts[i] = full[:cut] + inserted
                    checked[i] = len(texts[i])
                    logs[i].append(asdict(Intervention(cut + 1, expression, wrote, exact)))
                    next_active.append(i)
                    continue
                used[i] += c.new_tokens
                finish = c.finish
                if hit is not None:
                    finish = c.finish + ("; token budget spent" if used[i] >= max_new_tokens
                                         else "; intervention limit reached")
                done = Completion(text=full, prompt_tokens=first[i].prompt_tokens, new_tokens=used[i],
                                  min_margin=margins[i],
                                  finish=finish, seconds=totals[i],
                                  extra={"calculator": logs[i]})
                results[i] = done
                if on_result:
                    on_result(i, done)
        active = next_active
    return results  # type: ignore[return-value]
