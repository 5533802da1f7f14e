"""Paired comparisons, Holm, verdicts and the compare() table on seeded synthetic data."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from scipy.stats import binomtest, ttest_rel
from statsmodels.stats.proportion import proportion_confint

from evalkit.errors import DataError
from evalkit.power import questions_needed
from evalkit.stats import (
    compare,
    difference_interval,
    holm,
    paired_comparison,
    setting_label,
    verdict_sentence,
)


def _paired_outcomes(rng, n, reps, accuracy_a, difference, discordance):
    """0/1 outcomes for two settings on the same questions, from the four cell probabilities."""
    only_b, only_a = (discordance + difference) / 2, (discordance - difference) / 2
    both_right = accuracy_a - only_a
    cells = [both_right, only_a, only_b, 1 - both_right - only_a - only_b]
    cell = rng.choice(4, p=cells, size=(reps, n))
    a = np.isin(cell, (0, 1)).astype(float)
    b = np.isin(cell, (0, 2)).astype(float)
    return a, b


@pytest.mark.parametrize("n", [80, 200])
@pytest.mark.parametrize(
    "accuracy_a, difference, discordance",
    [(0.4, 0.0, 0.3), (0.4, 0.05, 0.25), (0.3, 0.1, 0.3), (0.6, -0.08, 0.2), (0.5, 0.0, 0.1)],
)
def test_paired_interval_covers_the_true_difference_about_95_percent(n, accuracy_a, difference, discordance):
    rng = np.random.default_rng([n, int(1000 * accuracy_a), int(1000 * (difference + 1)), int(1000 * discordance)])
    a, b = _paired_outcomes(rng, n, 2000, accuracy_a, difference, discordance)
    low, high = difference_interval(b - a)
    covered = np.mean((low <= difference) & (difference <= high))
    assert 0.93 <= covered <= 0.97


def test_bootstrap_check_agrees_with_the_t_interval():
    rng = np.random.default_rng(11)
    a, b = _paired_outcomes(rng, 200, 1, 0.45, 0.08, 0.3)
    c = paired_comparison(a[0], b[0], label_a="direct", label_b="worked")
    # Percentile bootstrap and t-interval are different approximations of the same thing.
    assert c.boot_low == pytest.approx(c.ci_low, abs=0.01)
    assert c.boot_high == pytest.approx(c.ci_high, abs=0.01)
    # Seeded: the same seed gives the same bootstrap interval, another seed a slightly different one.
    again = paired_comparison(a[0], b[0], seed=0)
    assert (again.boot_low, again.boot_high) == (c.boot_low, c.boot_high)


def test_counts_direction_and_power_fields():
    a = np.array([1] * 10 + [1] * 3 + [0] * 12 + [0] * 15, dtype=bool)
    b = np.array([1] * 10 + [0] * 3 + [1] * 12 + [0] * 15, dtype=bool)
    c = paired_comparison(a, b, label_a="direct", label_b="worked")
    assert (c.both_right, c.only_a, c.only_b, c.both_wrong) == (10, 3, 12, 15)
    assert c.difference == pytest.approx(9 / 40) and c.accuracy_b - c.accuracy_a == pytest.approx(9 / 40)
    assert c.binary and c.test == "McNemar exact"
    assert c.discordance == pytest.approx(15 / 40)
    assert 0 < c.mdd_80 < c.discordance


def test_averaged_scores_use_the_paired_t_test():
    rng = np.random.default_rng(5)
    a = rng.integers(0, 4, 60) / 3
    b = np.clip(a + rng.choice([-1 / 3, 0, 1 / 3, 2 / 3], 60), 0, 1)
    c = paired_comparison(a, b)
    assert not c.binary and c.test == "paired t-test"
    assert c.p_value == pytest.approx(ttest_rel(b, a).pvalue)  # scipy as reference
    # A paired t-test and its own t-interval agree on significance.
    assert (c.p_value < 0.05) == (c.ci_low > 0 or c.ci_high < 0)


def test_identical_scores_give_no_evidence_and_an_honest_interval():
    """Eight agreeing questions do not prove two settings equal: the interval is the exact
    (Clopper-Pearson, statsmodels' "beta") bound on the share of questions that might disagree."""
    a = np.array([1, 0, 1, 1, 0, 0, 1, 0], dtype=float)
    c = paired_comparison(a, a.copy())
    u = proportion_confint(0, 8, alpha=0.05, method="beta")[1]  # statsmodels as reference
    assert u == pytest.approx(0.369, abs=1e-3)  # 1 - 0.025 ** (1/8)
    assert c.difference == 0.0 and (c.ci_low, c.ci_high) == (pytest.approx(-u), pytest.approx(u))
    assert c.p_value == 1.0 and not c.distinguishable
    assert "same score on every question" in verdict_sentence(c) and "[-36.9, 36.9]" in verdict_sentence(c)
    # With groups the bound counts groups: four groups agreeing say less than eight questions.
    g = paired_comparison(a, a.copy(), groups=["p", "p", "q", "q", "r", "r", "s", "s"])
    u4 = proportion_confint(0, 4, alpha=0.05, method="beta")[1]
    assert g.interval == (pytest.approx(-u4), pytest.approx(u4))


@pytest.mark.parametrize("value", [1.0, -1.0, 0.5])
def test_same_difference_everywhere_is_bounded_by_the_share_that_might_differ(value):
    """All questions showed the same difference: the mean may still move towards -1 or +1 by the
    share of questions that might differ (Clopper-Pearson upper bound for 0 of n, statsmodels)."""
    n = 20
    u = proportion_confint(0, n, alpha=0.05, method="beta")[1]
    low, high = difference_interval(np.full(n, value))
    assert low == pytest.approx(value - u * (value + 1)) and high == pytest.approx(value + u * (1 - value))
    assert -1.0 <= low <= value <= high <= 1.0


@pytest.mark.parametrize("a, b", [([1, 0, 1], [1, 0]), ([1, 0, 2], [1, 0, 1]), ([1, np.nan, 0], [1, 0, 0])])
def test_unusable_scores_raise_data_errors(a, b):
    with pytest.raises(DataError):
        paired_comparison(a, b)


def test_questions_without_a_group_are_clusters_of_their_own():
    rng = np.random.default_rng(5)
    a, b = rng.random(40) < 0.4, rng.random(40) < 0.6
    labelled = paired_comparison(a, b, groups=[f"g{i}" for i in range(40)], n_boot=99)
    missing = paired_comparison(a, b, groups=[None] * 20 + [f"g{i}" for i in range(20)], n_boot=99)
    assert missing.n_clusters == 40
    assert missing.cluster_se == pytest.approx(labelled.cluster_se)


def test_holm_on_a_hand_worked_example():
    # Holm (1979), Scand. J. Statist. 6:65-70: sort, multiply the i-th smallest by (m - i + 1),
    # carry the running maximum. By hand for m = 4:
    # 0.005*4 = 0.02, 0.01*3 = 0.03, 0.03*2 = 0.06, 0.04*1 = 0.04 -> max so far 0.06
    adjusted = holm([0.01, 0.04, 0.03, 0.005])
    assert adjusted == pytest.approx([0.03, 0.06, 0.06, 0.02])
    # A missing p-value is left out of the family: m = 2 here.
    with_gap = holm([0.01, np.nan, 0.04])
    assert with_gap[0] == pytest.approx(0.02) and np.isnan(with_gap[1]) and with_gap[2] == pytest.approx(0.04)


def _from_counts(both_right, only_a, only_b, both_wrong, **labels):
    a = np.repeat([1, 1, 0, 0], [both_right, only_a, only_b, both_wrong]).astype(bool)
    b = np.repeat([1, 0, 1, 0], [both_right, only_a, only_b, both_wrong]).astype(bool)
    return paired_comparison(a, b, **labels)


def _clear_win():
    return _from_counts(30, 3, 18, 29, label_a="direct", label_b="worked")


def test_verdict_for_a_clear_win_states_direction_size_interval_p_and_n():
    c = _clear_win()
    assert c.distinguishable
    text = verdict_sentence(c)
    assert text.startswith("worked is ahead of direct by 18.8 points [")  # (18 - 3) / 80
    assert f"[{100 * c.ci_low:.1f}, {100 * c.ci_high:.1f}], p = " in text and text.endswith("80 questions")
    # With the sides swapped the sentence names the same winner and the same numbers.
    assert verdict_sentence(_swap(c)) == text
    assert verdict_sentence(_from_counts(30, 18, 3, 29, label_a="worked", label_b="direct")) == text


def _swap(c):
    return replace(
        c, label_a=c.label_b, label_b=c.label_a, difference=-c.difference,
        ci_low=-c.ci_high, ci_high=-c.ci_low, only_a=c.only_b, only_b=c.only_a,
    )


def test_verdict_for_noise_says_so_and_how_many_questions_would_be_needed():
    rng = np.random.default_rng(3)
    a, b = _paired_outcomes(rng, 80, 1, 0.5, 0.0, 0.3)
    c = paired_comparison(a[0], b[0], label_a="direct", label_b="worked")
    assert not c.distinguishable
    text = verdict_sentence(c)
    assert text.startswith("no difference distinguishable from noise (worked minus direct: ")
    need = questions_needed(0.05, c.discordance)
    assert text.endswith(f"about {need} questions would be needed to detect 5 points")


def test_verdict_needs_both_the_p_value_and_the_interval():
    c = _clear_win()
    assert not replace(c, p_adjusted=0.2).distinguishable
    assert "(Holm-adjusted)" in verdict_sentence(replace(c, p_adjusted=0.2))
    assert not replace(c, ci_low=-0.01).distinguishable  # p small but the interval reaches 0


def _records(draws: dict[str, int], accuracy: dict[str, float], n: int = 60, seed: int = 0, groups: bool = False):
    """A small records frame for a seed-nursery germination quiz."""
    rng = np.random.default_rng(seed)
    easy = rng.random(n)  # shared question difficulty, so settings are correlated
    rows = []
    for style, shots in [("direct", 4), ("worked", 4), ("worked-zero", 0), ("direct", 0)]:
        if style + f"/{shots}" not in draws:
            continue
        for draw in range(draws[style + f"/{shots}"]):
            shift = rng.normal(0, 0.03)
            for q in range(n):
                correct = bool(easy[q] < accuracy[style] + shift + rng.normal(0, 0.15))
                rows.append(dict(
                    condition=f"tiny-lm | {style} | {shots}-shot | draw {draw}", task="germination",
                    model="tiny-lm", style=style, shots=shots, draw=draw, question_id=f"seed-{q:03d}",
                    group=f"tray-{q % 6}" if groups else None, correct=correct,
                    outcome="correct" if correct else "wrong",
                ))
    return pd.DataFrame(rows)


def test_compare_with_one_draw_uses_mcnemar_on_the_binary_table():
    records = _records({"direct/4": 1, "worked/4": 1}, {"direct": 0.35, "worked": 0.6})
    table = compare(records)
    assert len(table) == 1
    row = table.iloc[0]
    assert (row.setting_a, row.setting_b) == ("tiny-lm | direct | 4-shot", "tiny-lm | worked | 4-shot")
    assert (row.label_a, row.label_b) == ("direct", "worked")
    wide = records.pivot(index="question_id", columns="style", values="correct")
    only_a = int((wide.direct & ~wide.worked).sum())
    only_b = int((~wide.direct & wide.worked).sum())
    assert (row.only_a, row.only_b, row.n) == (only_a, only_b, 60)
    assert row.test == "McNemar exact"
    # McNemar's exact test is the binomial test on the discordant split (scipy as reference).
    assert row.p == pytest.approx(binomtest(only_a, only_a + only_b, 0.5).pvalue)
    assert row.p_holm == pytest.approx(row.p)  # one row: nothing to adjust
    assert row.difference == pytest.approx(wide.worked.mean() - wide.direct.mean())
    assert row.verdict == verdict_sentence(paired_comparison(
        wide.direct, wide.worked, label_a="direct", label_b="worked", seed=0))


def test_compare_with_three_draws_averages_each_question_over_draws():
    records = _records(
        {"direct/4": 3, "worked/4": 3, "worked-zero/0": 1, "direct/0": 1},
        {"direct": 0.4, "worked": 0.55, "worked-zero": 0.45}, groups=True,
    )
    table = compare(records)
    pairs = list(zip(table.setting_a, table.setting_b))
    assert pairs == [
        ("tiny-lm | direct | 4-shot", "tiny-lm | worked | 4-shot"),
        ("tiny-lm | direct | 0-shot", "tiny-lm | worked-zero | 0-shot"),
    ]
    first = table.iloc[0]
    assert (first.draws_a, first.draws_b, first.test) == (3, 3, "paired t-test")
    assert first.interval == "clustered by group"
    mean_score = records[records.shots == 4].pivot_table(index="question_id", columns="style", values="correct", aggfunc="mean")
    assert first.p == pytest.approx(ttest_rel(mean_score.worked, mean_score.direct).pvalue)
    # Both single-draw settings stay 0/1, so that row uses McNemar's test.
    assert table.iloc[1].test == "McNemar exact"
    # Holm across the two rows: the smaller p doubles (by hand), the larger is at least its raw p.
    small, large = sorted(table.p)
    assert min(table.p_holm) == pytest.approx(min(2 * small, 1.0))
    assert max(table.p_holm) == pytest.approx(max(2 * small, large))
    assert table.questions_needed.notna().all() and (table.mdd_80 > 0).all()


def test_compare_with_requested_pairs_by_style_and_by_label():
    records = _records({"direct/4": 1, "worked/4": 1, "direct/0": 1}, {"direct": 0.4, "worked": 0.5})
    by_style = compare(records, pairs=[("direct", "worked")])
    assert list(by_style.setting_b) == [setting_label("tiny-lm", "worked", 4)]
    by_label = compare(records, pairs=[(setting_label("tiny-lm", "direct", 0), setting_label("tiny-lm", "direct", 4))])
    assert (by_label.label_a[0], by_label.label_b[0]) == ("0-shot", "4-shot")
    with pytest.raises(DataError, match="matches no two settings"):
        compare(records, pairs=[("direct", "worked-zero")])


def test_compare_rejects_records_without_the_needed_columns():
    records = _records({"direct/4": 1, "worked/4": 1}, {"direct": 0.4, "worked": 0.5}).drop(columns="draw")
    with pytest.raises(DataError, match="draw"):
        compare(records)


def test_forest_plot_writes_readable_svg_and_png(tmp_path):
    import xml.etree.ElementTree as ET

    from evalkit.report.forest import forest_plot

    records = _records(
        {"direct/4": 3, "worked/4": 3, "worked-zero/0": 1, "direct/0": 1},
        {"direct": 0.4, "worked": 0.55, "worked-zero": 0.45},
    )
    table = compare(records)
    svg, png = forest_plot(table, tmp_path / "plots" / "forest")
    assert (svg.name, png.name) == ("forest.svg", "forest.png")
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and png.stat().st_size > 1000
    text = svg.read_text()
    ET.fromstring(text)  # well-formed XML
    assert "tiny-lm, 4-shot: worked minus direct" in text and "percentage points" in text
    assert f"{100 * table.difference[0]:+.1f}" in text
    # Same table, same bytes: reports can be diffed between runs.
    again, _ = forest_plot(table, tmp_path / "again")
    assert again.read_bytes() == svg.read_bytes()
    with pytest.raises(DataError, match="no rows"):
        forest_plot(table.iloc[:0], tmp_path / "empty")
