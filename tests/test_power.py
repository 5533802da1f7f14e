"""Power formulas checked by simulation and by round trips."""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np
import pytest
from scipy.stats import binomtest, norm, ttest_1samp

from evalkit.errors import EvalkitError
from evalkit.power import minimum_detectable_difference, plan, questions_needed


@lru_cache(maxsize=None)
def _mcnemar_exact_p(only_b: int, discordant: int) -> float:
    # McNemar's exact test is the two-sided binomial test of the discordant split at 1/2;
    # scipy's binomtest is the reference here, independent of the code under test.
    return binomtest(only_b, discordant, 0.5).pvalue if discordant else 1.0


@pytest.mark.parametrize("n, discordance", [(80, 0.3), (80, 0.15), (200, 0.2)])
def test_exact_mcnemar_detects_the_minimum_detectable_difference_about_80_percent(n, discordance):
    delta = minimum_detectable_difference(n, discordance)
    rng = np.random.default_rng(20240611 + n)
    # cells: only b right, only a right, both the same
    cells = rng.multinomial(n, [(discordance + delta) / 2, (discordance - delta) / 2, 1 - discordance], size=2000)
    detected = [_mcnemar_exact_p(int(b), int(b + a)) < 0.05 for b, a, _ in cells]
    # The formula is a normal approximation and the exact test is conservative, so the
    # simulated power sits a little under 0.8; the 0.72-0.88 band is the acceptance range.
    assert 0.72 <= np.mean(detected) <= 0.88


def test_paired_t_test_detects_the_averaged_score_mdd_about_80_percent():
    # Scores averaged over three draws: per-question differences in {-1/3, 0, 1/3}. With
    # psi = E[d^2] = 0.04 the difference may exceed psi, which only binary=False allows.
    n, psi = 80, 0.04
    assert math.isnan(minimum_detectable_difference(n, psi))
    delta = minimum_detectable_difference(n, psi, binary=False)
    assert psi < delta < math.sqrt(psi)
    up, down = (9 * psi + 3 * delta) / 2, (9 * psi - 3 * delta) / 2  # so E[d] = delta, E[d^2] = psi
    rng = np.random.default_rng(7)
    d = rng.choice([1 / 3, -1 / 3, 0.0], p=[up, down, 1 - up - down], size=(2000, n))
    detected = ttest_1samp(d, 0.0, axis=1).pvalue < 0.05  # scipy as the reference test
    assert 0.72 <= detected.mean() <= 0.88


def test_questions_needed_matches_connors_formula_on_a_hand_worked_case():
    # Connor (1987) normal-approximation formula (from memory), worked by hand here:
    # psi = 0.3, delta = 0.1, alpha 0.05, power 0.8
    z_a, z_b = norm.ppf(0.975), norm.ppf(0.8)
    by_hand = (z_a * math.sqrt(0.3) + z_b * math.sqrt(0.3 - 0.01)) ** 2 / 0.01
    # (1.960 * 0.5477 + 0.8416 * 0.5385) ** 2 / 0.01 = 233.1 with rounded z values
    assert by_hand == pytest.approx(233.1, abs=0.05)
    assert questions_needed(0.1, 0.3) == math.ceil(by_hand)


@pytest.mark.parametrize("difference, discordance", [(0.05, 0.2), (0.1, 0.3), (0.02, 0.05), (0.2, 0.5)])
def test_mdd_at_questions_needed_round_trips_to_the_difference(difference, discordance):
    n = questions_needed(difference, discordance)
    mdd = minimum_detectable_difference(n, discordance)
    # Rounding n up can only make the detectable difference slightly smaller.
    assert mdd <= difference + 1e-12
    assert mdd == pytest.approx(difference, rel=0.02)
    assert minimum_detectable_difference(n - 1, discordance) > mdd


def test_mdd_shrinks_with_more_questions_and_more_power_costs_questions():
    mdds = [minimum_detectable_difference(n, 0.25) for n in (40, 80, 160, 320)]
    assert all(x > y for x, y in zip(mdds, mdds[1:]))
    assert questions_needed(0.05, 0.25, power=0.9) > questions_needed(0.05, 0.25, power=0.8)


def test_mdd_is_nan_when_nothing_is_detectable():
    assert math.isnan(minimum_detectable_difference(80, 0.0))
    # Two discordant questions expected: even a unanimous split cannot reach significance.
    assert math.isnan(minimum_detectable_difference(4, 0.5))


def test_plan_round_trip_and_independence_assumption():
    p = plan(accuracy=0.4, difference=0.1)
    # Independence between the two settings' errors: 0.4 * 0.5 + 0.5 * 0.6 = 0.5
    assert p.discordance == pytest.approx(0.5)
    assert p.discordance_assumed and "independent" in p.assumption
    assert minimum_detectable_difference(p.questions, p.discordance) == pytest.approx(0.1, rel=0.02)
    # Wilson half-width at that n, compared with the plain normal half-width (close at this n).
    assert p.accuracy_half_width == pytest.approx(norm.ppf(0.975) * math.sqrt(0.4 * 0.6 / p.questions), rel=0.02)
    assert str(p.questions) in p.summary() and "independent" in p.summary()


def test_plan_with_a_pilot_discordance_needs_fewer_questions():
    guessed = plan(accuracy=0.4, difference=0.1)
    piloted = plan(accuracy=0.4, difference=0.1, discordance=0.25)
    assert not piloted.discordance_assumed
    assert piloted.questions == questions_needed(0.1, 0.25) < guessed.questions


@pytest.mark.parametrize(
    "call",
    [
        lambda: questions_needed(0.3, 0.2),
        lambda: questions_needed(0.5, 0.2, binary=False),
        lambda: questions_needed(0.0, 0.2),
        lambda: questions_needed(0.05, 1.5),
        lambda: plan(accuracy=0.95, difference=0.1),
        lambda: plan(accuracy=1.2, difference=0.1),
        lambda: minimum_detectable_difference(80, 0.3, alpha=1.5),
    ],
)
def test_impossible_requests_raise_evalkit_errors(call):
    with pytest.raises(EvalkitError):
        call()
