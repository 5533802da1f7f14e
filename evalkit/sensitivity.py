"""How much a setting's accuracy depends on which exemplars were drawn.

A setting is a condition without its draw (task, model, style, shots); its draws differ only
in which exemplars the prompt carries and in what order.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from statsmodels.stats.contingency_tables import cochrans_q

from evalkit.errors import DataError
from evalkit.stats import scored_records, setting_label

__all__ = ["draw_spread", "variance_components"]

_SETTING = ["task", "model", "style", "shots"]


def _settings(df: pd.DataFrame):
    for (task, model, style, shots), rows in df.groupby(_SETTING, sort=True):
        yield dict(task=task, setting=setting_label(model, style, shots)), rows


def draw_spread(records: pd.DataFrame) -> pd.DataFrame:
    """Per setting: how accuracy varies across its draws (min, median, max, standard deviation)."""
    out = []
    for key, rows in _settings(scored_records(records)):
        per_draw = rows.groupby("draw")["score"].mean()
        out.append(dict(
            **key,
            draws=len(per_draw),
            questions=rows["question_id"].nunique(),
            accuracy_min=per_draw.min(),
            accuracy_median=per_draw.median(),
            accuracy_max=per_draw.max(),
            accuracy_std=per_draw.std(ddof=1) if len(per_draw) > 1 else math.nan,
        ))
    columns = ["task", "setting", "draws", "questions", "accuracy_min", "accuracy_median", "accuracy_max", "accuracy_std"]
    return pd.DataFrame(out, columns=columns)


def _components(table: pd.DataFrame) -> dict:
    """Two-way ANOVA without replication on one setting's question x draw table of 0/1 scores."""
    x = table.to_numpy(dtype=float)
    n_q, n_d = x.shape
    # The table is balanced, so the sums of squares are exact from its margins. A regression on
    # question dummies (statsmodels ols + anova_lm, the test's reference) gives the same numbers
    # but costs questions**2 x draws and took seconds per setting on a shared laptop.
    grand = x.mean()
    ss_draw = n_q * ((x.mean(axis=0) - grand) ** 2).sum()
    ss_question = n_d * ((x.mean(axis=1) - grand) ** 2).sum()
    ss_resid = max(((x - grand) ** 2).sum() - ss_draw - ss_question, 0.0)
    ms_e = ss_resid / ((n_q - 1) * (n_d - 1))
    # Expected mean squares of the random two-way model (method of moments), negatives set to 0.
    var_draw = max((ss_draw / (n_d - 1) - ms_e) / n_q, 0.0)
    var_question = max((ss_question / (n_q - 1) - ms_e) / n_d, 0.0)
    total = var_draw + var_question + ms_e
    shares = [v / total if total > 0 else math.nan for v in (var_draw, var_question, ms_e)]
    return dict(var_draw=var_draw, var_question=var_question, var_residual=ms_e,
                draw_share=shares[0], question_share=shares[1], residual_share=shares[2])


def _cochran(table: pd.DataFrame) -> tuple[float, float]:
    # Q is 0/0 when no question changes between draws: no evidence that the draw matters.
    x = table.to_numpy()
    if (np.ptp(x, axis=1) == 0).all():
        return 0.0, 1.0
    res = cochrans_q(x)
    return float(res.statistic), float(res.pvalue)


def variance_components(records: pd.DataFrame, alpha: float = 0.05) -> pd.DataFrame:
    """Per setting with at least two draws: how much of the per-record score variance is the draw's.

    The question x draw table of 0/1 scores (questions answered in every draw) is split by a
    two-way ANOVA without replication into three variance components, estimated from their
    expected mean squares (the random-effects method of moments; on 0/1 scores an
    approximation, since the additive model cannot hold exactly for a probability):

    - ``draw_share``: a draw lifting or sinking every question together, i.e. exemplar choice
      moving the setting's accuracy. ``draw_sd_points`` is its standard deviation in points:
      how far accuracy would typically move with another draw, net of question noise.
    - ``question_share``: questions being easy or hard whatever the draw.
    - ``residual_share``: a draw helping some questions and hurting others (interaction, not
      separable from noise with one record per cell); it flips answers without moving accuracy.

    ``cochran_p`` is Cochran's Q test (statsmodels) that all draws have the same accuracy. The
    ``flag`` says in words whether the draw matters: when that test rejects at ``alpha``, a
    conclusion drawn from one draw may not survive another exemplar choice.
    """
    out = []
    for key, rows in _settings(scored_records(records)):
        if rows["draw"].nunique() < 2:
            continue
        table = rows.groupby(["question_id", "draw"])["score"].mean().unstack("draw").dropna()
        if len(table) < 2:
            raise DataError(f"records: {key['task']}: {key['setting']}: fewer than two questions answered in every draw")
        parts = _components(table)
        q, p = _cochran(table)
        sd = 100 * math.sqrt(parts["var_draw"])
        if p < alpha:
            flag = (f"draw matters: accuracy moves by about {sd:.1f} points between exemplar draws "
                    f"(Cochran's Q p = {p:.2g}); a conclusion from one draw may not survive another exemplar choice")
        else:
            flag = f"draw-to-draw changes are within noise (Cochran's Q p = {p:.2g})"
        out.append(dict(**key, draws=table.shape[1], questions=table.shape[0], **parts,
                        draw_sd_points=sd, cochran_q=q, cochran_p=p, flag=flag))
    columns = ["task", "setting", "draws", "questions", "draw_share", "question_share", "residual_share",
               "var_draw", "var_question", "var_residual", "draw_sd_points", "cochran_q", "cochran_p", "flag"]
    return pd.DataFrame(out, columns=columns)
