"""evalkit.stats against outside references: published worked examples and formulas computed
here independently of the wrapped library calls."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import beta, binomtest, norm, t

from evalkit.stats import accuracy_interval, paired_comparison

# Newcombe (1998), "Two-sided confidence intervals for the single proportion: comparison of
# seven methods", Statistics in Medicine 17:857-872, Table I (values from memory). Every
# recalled value agreed with the implementation to 4 decimals, so none was dropped.
NEWCOMBE_TABLE_I = [
    # successes, n, Wilson score (method 3), Clopper-Pearson exact (method 5)
    (81, 263, (0.2553, 0.3662), (0.2527, 0.3676)),
    (15, 148, (0.0624, 0.1605), (0.0578, 0.1617)),
    (0, 20, (0.0, 0.1611), (0.0, 0.1684)),
    (1, 29, (0.0061, 0.1718), (0.0009, 0.1776)),
]


@pytest.mark.parametrize("successes, n, wilson, exact", NEWCOMBE_TABLE_I)
def test_intervals_match_newcombe_1998_table_i(successes, n, wilson, exact):
    w = accuracy_interval(successes, n, method="wilson")
    e = accuracy_interval(successes, n, method="exact")
    assert (round(w.low, 4), round(w.high, 4)) == wilson
    assert (round(e.low, 4), round(e.high, 4)) == exact
    assert w.estimate == e.estimate == successes / n


def _random_counts(seed, size=300):
    rng = np.random.default_rng(seed)
    n = rng.integers(1, 500, size)
    return rng.integers(0, n + 1), n


def test_wilson_matches_the_closed_form_on_random_tables():
    # Wilson (1927), JASA 22:209-212: the score interval in closed form.
    z = norm.ppf(0.975)
    for x, n in zip(*_random_counts(1)):
        p = x / n
        centre = (p + z**2 / (2 * n)) / (1 + z**2 / n)
        half = z * math.sqrt(p * (1 - p) / n + z**2 / (4 * n**2)) / (1 + z**2 / n)
        got = accuracy_interval(int(x), int(n))
        assert got.low == pytest.approx(max(centre - half, 0.0), abs=1e-12)
        assert got.high == pytest.approx(min(centre + half, 1.0), abs=1e-12)


def test_clopper_pearson_matches_beta_quantiles_on_random_tables():
    # Clopper & Pearson (1934), Biometrika 26:404-413, written with beta quantiles.
    for x, n in zip(*_random_counts(2)):
        low = 0.0 if x == 0 else beta.ppf(0.025, x, n - x + 1)
        high = 1.0 if x == n else beta.ppf(0.975, x + 1, n - x)
        got = accuracy_interval(int(x), int(n), method="exact")
        assert got.low == pytest.approx(low, abs=1e-10)
        assert got.high == pytest.approx(high, abs=1e-10)


def test_mcnemar_exact_matches_a_binomial_test_on_the_discordant_pairs():
    # McNemar's exact test is the two-sided binomial test of only_b among the discordant
    # questions at 1/2 (scipy.stats.binomtest as the reference).
    rng = np.random.default_rng(3)
    for _ in range(150):
        n = int(rng.integers(10, 300))
        a = rng.random(n) < rng.uniform(0.1, 0.9)
        b = np.where(rng.random(n) < rng.uniform(0.3, 0.95), a, rng.random(n) < rng.uniform(0.1, 0.9))
        c = paired_comparison(a, b, n_boot=99)
        discordant = c.only_a + c.only_b
        expected = binomtest(c.only_b, discordant, 0.5).pvalue if discordant else 1.0
        assert c.test == "McNemar exact"
        assert c.p_value == pytest.approx(expected, rel=1e-9, abs=1e-15)


def test_presidential_approval_example_from_agresti():
    # Agresti, An Introduction to Categorical Data Analysis (2nd ed., 2007), section 8.1:
    # approval of the president in two surveys of the same 1600 people: 794 approve both
    # times, 150 approve then disapprove, 86 disapprove then approve, 570 disapprove both.
    # McNemar's statistic z**2 = 17.36 and the 95% interval for the change in approval,
    # -0.04 with interval (-0.06, -0.02), are as printed there (from memory).
    first = np.repeat([1, 1, 0, 0], [794, 150, 86, 570])
    second = np.repeat([1, 0, 1, 0], [794, 150, 86, 570])
    c = paired_comparison(first, second, label_a="first survey", label_b="second survey")
    assert (c.both_right, c.only_a, c.only_b, c.both_wrong) == (794, 150, 86, 570)
    assert round((c.only_b - c.only_a) ** 2 / (c.only_a + c.only_b), 2) == 17.36
    assert round(c.difference, 2) == -0.04
    assert (round(c.ci_low, 2), round(c.ci_high, 2)) == (-0.06, -0.02)
    # With 236 discordant pairs the exact test and the chi-square test agree closely.
    chi_square_p = 2 * norm.sf(math.sqrt(17.36))
    assert 0.5 * chi_square_p < c.p_value < 2 * chi_square_p


def test_clustered_interval_matches_a_hand_computed_sandwich():
    # Cluster-robust (CR1) variance of a mean, as in Cameron & Miller (2015), "A
    # Practitioner's Guide to Cluster-Robust Inference", J. Human Resources 50:317-372
    # (from memory): V = c * sum_g (sum_{i in g} e_i)**2 / n**2 with
    # c = G / (G - 1) * (n - 1) / (n - K), K = 1, and t quantiles with G - 1 degrees of freedom.
    rng = np.random.default_rng(4)
    for _ in range(60):
        n, g = int(rng.integers(20, 200)), int(rng.integers(2, 15))
        groups = rng.integers(0, g, n)
        shared = rng.normal(0, 1, g)[groups]  # questions in a group move together
        a = (rng.normal(0, 1, n) + shared) > 0.3
        b = (rng.normal(0, 1, n) + shared) > 0.0
        d = b.astype(float) - a
        e = d - d.mean()
        labels = np.unique(groups)
        k = len(labels)
        if k < 2:
            continue
        sums = np.array([e[groups == label].sum() for label in labels])
        K = 1  # the mean is the only parameter
        se = math.sqrt(k / (k - 1) * (n - 1) / (n - K) * (sums**2).sum() / n**2)
        c = paired_comparison(a, b, groups=[f"g{x}" for x in groups], n_boot=99)
        assert c.n_clusters == k
        assert c.cluster_se == pytest.approx(se, rel=1e-9)
        q = t.ppf(0.975, k - 1)
        assert c.cluster_ci_low == pytest.approx(d.mean() - q * se, rel=1e-9, abs=1e-12)
        assert c.cluster_ci_high == pytest.approx(d.mean() + q * se, rel=1e-9, abs=1e-12)
        assert c.interval == (max(c.cluster_ci_low, -1.0), min(c.cluster_ci_high, 1.0))  # clipped to the possible range

