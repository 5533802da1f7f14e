"""Power and sample size for a paired comparison of two settings on the same questions.

Both settings answer the same questions, so only the questions where they disagree carry
information about which is better. Write ``psi`` for the discordance (the share of questions
where exactly one setting is right) and ``delta`` for the true difference in accuracy. The
normal approximation to McNemar's test then needs

    n = (z_{1-alpha/2} * sqrt(psi) + z_{power} * sqrt(psi - delta**2))**2 / delta**2

questions (Connor 1987, "Sample size for testing differences in proportions for the
paired-sample design", Biometrics 43:207-211; the same form is in Lachin 1992; formula from
memory). ``sqrt(psi)`` is the standard deviation of a per-question difference when there is
no true difference and ``sqrt(psi - delta**2)`` its standard deviation at ``delta``.

For scores averaged over several draws (values between 0 and 1) the same formula is the
normal approximation to the paired t-test when ``psi`` is read as the mean squared
per-question difference, which equals the discordance when the scores are 0/1. Pass
``binary=False`` then: with 0/1 scores a difference can never exceed the discordance, with
averaged scores it can reach ``sqrt(psi)`` (the formula's own limit, where the per-question
differences stop varying).

The approximation is rough when fewer than about 10 discordant questions are expected
(common practice); the exact McNemar test used by :mod:`evalkit.stats` is then conservative.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from scipy.optimize import brentq
from scipy.stats import norm
from statsmodels.stats.proportion import proportion_confint

from evalkit.errors import EvalkitError

__all__ = ["Plan", "minimum_detectable_difference", "questions_needed", "plan"]


def _check_levels(alpha: float, power: float) -> None:
    if not 0 < alpha < 1:
        raise EvalkitError(f"alpha: {alpha!r} is not between 0 and 1; use e.g. 0.05")
    if not 0 < power < 1:
        raise EvalkitError(f"power: {power!r} is not between 0 and 1; use e.g. 0.8")


def _check_discordance(discordance: float) -> None:
    if not 0 < discordance <= 1:
        raise EvalkitError(
            f"discordance: {discordance!r} is not in (0, 1]; it is the share of questions "
            "where the two settings disagree (e.g. 0.25)"
        )


def _z(alpha: float, power: float) -> tuple[float, float]:
    return float(norm.ppf(1 - alpha / 2)), float(norm.ppf(power))


def _largest(discordance: float, binary: bool) -> float:
    return discordance if binary else math.sqrt(discordance)


def minimum_detectable_difference(
    n: int, discordance: float, alpha: float = 0.05, power: float = 0.8, binary: bool = True
) -> float:
    """Smallest true difference (as a share, 0.05 = 5 points) that ``n`` paired questions detect
    with the given power by a two-sided test at ``alpha``, for this discordance.

    Solves Connor's (1987) normal-approximation formula (module docstring) for the difference
    with :func:`scipy.optimize.brentq`. Returns ``nan`` when no difference up to the
    discordance itself is detectable (a difference cannot exceed the discordance) or when the
    discordance is 0 (the settings never disagree, so nothing can be told apart). For scores
    averaged over draws pass ``binary=False`` (module docstring).
    """
    _check_levels(alpha, power)
    if n < 1:
        raise EvalkitError(f"n: {n!r} questions; need at least 1")
    if discordance == 0:
        return math.nan
    _check_discordance(discordance)
    z_a, z_b = _z(alpha, power)
    psi = float(discordance)

    def gap(delta: float) -> float:
        return math.sqrt(n) * delta - z_a * math.sqrt(psi) - z_b * math.sqrt(max(psi - delta**2, 0.0))

    # gap rises with delta up to the largest possible difference and gap(0) < 0, so a root
    # exists iff gap is non-negative there.
    top = _largest(psi, binary)
    if gap(top) < 0:
        return math.nan
    return float(brentq(gap, 0.0, top, xtol=1e-12))


def questions_needed(
    difference: float, discordance: float, alpha: float = 0.05, power: float = 0.8, binary: bool = True
) -> int:
    """Number of paired questions needed to detect ``difference`` with the given power
    (Connor 1987 normal approximation, rounded up; ``binary=False`` for averaged scores)."""
    _check_levels(alpha, power)
    _check_discordance(discordance)
    delta = abs(float(difference))
    if delta == 0:
        raise EvalkitError("difference: 0 cannot be detected; give the smallest difference that matters, e.g. 0.05")
    if delta > _largest(discordance, binary):
        limit = "psi" if binary else "sqrt(psi), psi being the mean squared per-question difference"
        raise EvalkitError(
            f"difference: {delta:g} is not possible with discordance {discordance:g}; two settings "
            f"that disagree on a share psi of questions cannot differ in accuracy by more than {limit}"
        )
    z_a, z_b = _z(alpha, power)
    n = (z_a * math.sqrt(discordance) + z_b * math.sqrt(discordance - delta**2)) ** 2 / delta**2
    # Guard the ceiling against float noise such as 80.00000000001.
    return max(1, math.ceil(round(n, 9)))


@dataclass(frozen=True)
class Plan:
    """How many questions a paired comparison needs, and what that buys."""

    accuracy: float
    difference: float
    discordance: float
    discordance_assumed: bool
    alpha: float
    power: float
    questions: int
    accuracy_half_width: float
    assumption: str

    def summary(self) -> str:
        """One plain sentence."""
        return (
            f"About {self.questions} questions are needed to detect a {100 * self.difference:.1f}-point "
            f"difference from a baseline accuracy of {100 * self.accuracy:.0f}% with "
            f"{100 * self.power:.0f}% power at alpha = {self.alpha:g}, taking the discordance as "
            f"{100 * self.discordance:.1f}% ({self.assumption}); at that size a single accuracy "
            f"is known to about ±{100 * self.accuracy_half_width:.1f} points (95% Wilson interval)."
        )


def plan(
    accuracy: float,
    difference: float,
    discordance: float | None = None,
    alpha: float = 0.05,
    power: float = 0.8,
) -> Plan:
    """Questions needed to detect ``difference`` over a guessed baseline ``accuracy``.

    Without a ``discordance`` guess, it is derived by assuming the two settings' errors are
    independent: ``a * (1 - b) + b * (1 - a)`` with ``b = a + difference``. Real settings on the
    same questions usually share their hard questions, so the true discordance is lower and this
    default overstates the questions needed; a pilot run's observed discordance is better.
    """
    if not 0 <= accuracy <= 1:
        raise EvalkitError(f"accuracy: {accuracy!r} is not a share between 0 and 1 (e.g. 0.4 for 40%)")
    delta = abs(float(difference))
    other = accuracy + float(difference)
    if not 0 <= other <= 1:
        raise EvalkitError(
            f"difference: {difference!r} moves the accuracy {accuracy!r} outside 0..1; "
            "give a difference as a share, e.g. 0.05 for 5 points"
        )
    assumed = discordance is None
    if assumed:
        discordance = accuracy * (1 - other) + other * (1 - accuracy)
        assumption = "assumed: the two settings' errors independent, which overstates the questions needed when they share hard questions"
    else:
        assumption = "given"
    n = questions_needed(delta, discordance, alpha, power)
    low, high = proportion_confint(accuracy * n, n, alpha=0.05, method="wilson")
    return Plan(
        accuracy=float(accuracy),
        difference=delta,
        discordance=float(discordance),
        discordance_assumed=assumed,
        alpha=alpha,
        power=power,
        questions=n,
        accuracy_half_width=float(high - low) / 2,
        assumption=assumption,
    )
