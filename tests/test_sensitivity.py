"""Draw sensitivity: spread of accuracy across draws and the draw's share of the variance."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from statsmodels.stats.anova import anova_lm

from evalkit.errors import DataError
from evalkit.sensitivity import draw_spread, variance_components


def _ferry_quiz(tables: dict[str, np.ndarray]) -> pd.DataFrame:
    """Records for a ferry-timetable quiz: one setting per model name, table is questions x draws."""
    rows = []
    for model, table in tables.items():
        for q, scores in enumerate(table):
            for draw, correct in enumerate(scores):
                rows.append(dict(
                    condition=f"{model} | worked | 3-shot | draw {draw}", task="ferry", model=model,
                    style="worked", shots=3, draw=draw, question_id=f"crossing-{q:02d}", group=None,
                    correct=bool(correct), outcome="correct" if correct else "wrong",
                ))
    return pd.DataFrame(rows)


def _table(rng, n_questions, shifts, noise=0.2):
    easy = rng.random(n_questions)[:, None]
    return easy < 0.5 + np.asarray(shifts)[None, :] + rng.normal(0, noise, (n_questions, len(shifts)))


def test_draw_spread_matches_per_draw_accuracies():
    rng = np.random.default_rng(1)
    tables = {"a-lm": _table(rng, 40, [0.0, 0.1, -0.1, 0.05]), "b-lm": _table(rng, 40, [0.0])}
    spread = draw_spread(_ferry_quiz(tables)).set_index("setting")
    per_draw = tables["a-lm"].mean(axis=0)
    row = spread.loc["a-lm | worked | 3-shot"]
    assert (row.draws, row.questions) == (4, 40)
    assert row.accuracy_min == pytest.approx(per_draw.min()) and row.accuracy_max == pytest.approx(per_draw.max())
    assert row.accuracy_median == pytest.approx(np.median(per_draw))
    assert row.accuracy_std == pytest.approx(per_draw.std(ddof=1))
    single = spread.loc["b-lm | worked | 3-shot"]
    assert single.draws == 1 and np.isnan(single.accuracy_std)


def test_variance_components_match_statsmodels_two_way_anova():
    # Reference: statsmodels OLS on question and draw dummies with anova_lm (a regression,
    # not the margin arithmetic the module uses); components from the expected mean squares
    # of the random two-way model, as in Montgomery, Design and Analysis of Experiments,
    # ch. 13 (from memory).
    rng = np.random.default_rng(2)
    tables = {f"m{i}": _table(rng, int(rng.integers(15, 40)), rng.normal(0, 0.1, int(rng.integers(2, 5))))
              for i in range(5)}
    got = variance_components(_ferry_quiz(tables)).set_index("setting")
    for model, table in tables.items():
        q, d = table.shape
        long = pd.DataFrame(
            [(f"q{i}", f"d{j}", float(table[i, j])) for i in range(q) for j in range(d)],
            columns=["question", "draw", "score"],
        )
        anova = anova_lm(smf.ols("score ~ C(question) + C(draw)", data=long).fit(), typ=1)
        ms = anova["sum_sq"] / anova["df"]
        ms_e = ms["Residual"]
        var_draw = max((ms["C(draw)"] - ms_e) / q, 0.0)
        var_question = max((ms["C(question)"] - ms_e) / d, 0.0)
        total = var_draw + var_question + ms_e
        row = got.loc[f"{model} | worked | 3-shot"]
        assert row.var_draw == pytest.approx(var_draw, abs=1e-10)
        assert row.var_question == pytest.approx(var_question, abs=1e-10)
        assert row.var_residual == pytest.approx(ms_e, abs=1e-10)
        assert row.draw_share == pytest.approx(var_draw / total, abs=1e-10)
        assert row.draw_share + row.question_share + row.residual_share == pytest.approx(1.0)
        assert row.draw_sd_points == pytest.approx(100 * np.sqrt(var_draw), abs=1e-6)


def test_cochran_q_matches_the_hand_formula():
    # Cochran (1950), Biometrika 37:256-266 (from memory):
    # Q = (k - 1) * (k * sum_j C_j**2 - N**2) / (k * N - sum_i R_i**2)
    rng = np.random.default_rng(3)
    tables = {f"m{i}": _table(rng, 50, rng.normal(0, 0.1, 3)) for i in range(5)}
    got = variance_components(_ferry_quiz(tables)).set_index("setting")
    for model, table in tables.items():
        x = table.astype(float)
        k = x.shape[1]
        cols, rows, total = x.sum(axis=0), x.sum(axis=1), x.sum()
        q = (k - 1) * (k * (cols**2).sum() - total**2) / (k * total - (rows**2).sum())
        assert got.loc[f"{model} | worked | 3-shot", "cochran_q"] == pytest.approx(q)


def test_a_large_draw_effect_is_flagged_and_no_draw_effect_mostly_is_not():
    rng = np.random.default_rng(4)
    tables = {"shifty": _table(rng, 80, [-0.15, 0.0, 0.15])}
    tables.update({f"steady{i}": _table(rng, 60, [0.0, 0.0, 0.0]) for i in range(12)})
    got = variance_components(_ferry_quiz(tables)).set_index("setting")
    shifty = got.loc["shifty | worked | 3-shot"]
    assert shifty.flag.startswith("draw matters: accuracy moves by about")
    assert "may not survive another exemplar choice" in shifty.flag
    assert 5 < shifty.draw_sd_points < 25  # true draw SD is 15 points before the 0/1 cut
    steady = got.drop(index="shifty | worked | 3-shot")
    # Cochran's Q at alpha 0.05 flags about 1 in 20 settings without a draw effect.
    assert steady.flag.str.startswith("draw-to-draw changes are within noise").mean() >= 10 / 12
    assert steady.draw_share.mean() < 0.02 < shifty.draw_share


def test_single_draw_settings_are_skipped_and_partial_questions_dropped():
    rng = np.random.default_rng(5)
    records = _ferry_quiz({"one": _table(rng, 30, [0.0]), "three": _table(rng, 30, [0.0, 0.05, 0.1])})
    records = records.drop(records.index[(records.model == "three") & (records.draw == 2) & (records.question_id == "crossing-00")])
    got = variance_components(records)
    assert list(got.setting) == ["three | worked | 3-shot"]
    assert (got.draws[0], got.questions[0]) == (3, 29)


def test_identical_draws_mean_no_draw_effect():
    x = np.repeat(np.random.default_rng(6).random((20, 1)) < 0.5, 3, axis=1)
    row = variance_components(_ferry_quiz({"same": x})).iloc[0]
    assert row.draw_share == 0 and row.cochran_p == 1.0 and row.flag.startswith("draw-to-draw changes are within noise")


def test_records_without_scores_are_rejected():
    records = _ferry_quiz({"m": _table(np.random.default_rng(7), 10, [0.0, 0.0])})
    records["correct"] = records["correct"].astype(object)
    records.loc[3, "correct"] = None
    with pytest.raises(DataError, match="correct"):
        variance_components(records)
    with pytest.raises(DataError, match="question_id"):
        draw_spread(records.drop(columns="question_id"))
