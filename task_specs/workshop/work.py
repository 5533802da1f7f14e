"""Arithmetic for the workshop generator: the one place a worked claim is computed and written."""

from __future__ import annotations


class Money(int):
    """An amount in dollars: written with a "$"."""


def nouns(n: int, word: str) -> str:
    """The word for n things: "1 hour", "2 hours"."""
    return word if n == 1 else word + "s"


def show(v: int) -> str:
    return f"${int(v)}" if isinstance(v, Money) else str(int(v))


class Work:
    """Collects worked-solution sentences; the only place arithmetic claims are made."""

    def __init__(self) -> None:
        self.sentences: list[str] = []
        self.steps = 0
        self.numbers: list[int] = []

    def calc(self, a: int, op: str, b: int) -> tuple[str, int]:
        """Return the claim text "a op b = c" and c, computed here."""
        if op == "+":
            c = a + b
        elif op == "-":
            c = a - b
        elif op == "*":
            c = a * b
        elif op == "/":
            if a % b:
                raise ValueError(f"{a} / {b} is not a whole number")
            c = a // b
        else:
            raise ValueError(op)
        if c < 0:
            raise ValueError(f"{a} {op} {b} is negative")
        money = isinstance(a, Money) or isinstance(b, Money) and op != "/"
        c = Money(c) if money else c
        self.steps += 1
        return f"{show(a)} {op} {show(b)} = {show(c)}", c

    def say(self, sentence: str) -> None:
        self.sentences.append(sentence)

    def given(self, *values: int) -> None:
        self.numbers.extend(int(v) for v in values)


# Each family takes (rng, variant, name) and returns (question, work, answer); the variant picks the
