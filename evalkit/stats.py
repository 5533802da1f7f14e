"""Intervals and paired comparisons of accuracies, thin over statsmodels and scipy.

Direction convention everywhere: a comparison of ``a`` with ``b`` reports
``difference = mean(b) - mean(a)``, so a positive difference means ``b`` did better.
Differences are shares (0.075 = 7.5 percentage points); sentences speak in points.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd
import statsmodels.api as sm
from scipy.stats import bootstrap, ttest_1samp, ttest_rel
from statsmodels.stats.contingency_tables import mcnemar
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.proportion import proportion_confint

from evalkit.errors import DataError, EvalkitError
from evalkit.power import minimum_detectable_difference, questions_needed

__all__ = [
    "Interval",
    "PairedComparison",
    "accuracy_interval",
    "difference_interval",
    "same_difference_interval",
    "paired_comparison",
    "holm",
    "verdict_sentence",
    "compare",
    "setting_label",
    "shared_label",
    "scored_records",
]

_CONFINT_METHODS = {"wilson": "wilson", "exact": "beta"}  # "beta" is Clopper-Pearson in statsmodels
CALCULATOR_SUFFIX = "+calculator"


@dataclass(frozen=True)
class Interval:
    """An accuracy with its confidence interval."""

    estimate: float
    low: float
    high: float
    method: str
    n: int
    successes: int


def accuracy_interval(successes: int, n: int, alpha: float = 0.05, method: str = "wilson") -> Interval:
    """Confidence interval for an accuracy: ``"wilson"`` (score) or ``"exact"`` (Clopper-Pearson)."""
    if method not in _CONFINT_METHODS:
        raise EvalkitError(f"method: {method!r} is not known; use 'wilson' or 'exact'")
    if n < 1 or not 0 <= successes <= n:
        raise EvalkitError(f"successes/n: {successes}/{n} is not a count out of at least one question")
    low, high = proportion_confint(successes, n, alpha=alpha, method=_CONFINT_METHODS[method])
    return Interval(successes / n, float(low), float(high), method, int(n), int(successes))


def difference_interval(differences, alpha: float = 0.05) -> tuple[np.ndarray, np.ndarray]:
    """t-interval for the mean of per-question differences, along the last axis.

    Works on a 2-D array (replications x questions) in one call. Where every difference is the
    same the t-interval would collapse to that value, as if a handful of agreeing questions
    proved the two settings equal; there :func:`same_difference_interval` is used instead.
    """
    d = np.asarray(differences, dtype=float)
    if d.shape[-1] < 2:
        raise EvalkitError("differences: need at least two paired questions for an interval")
    flat = np.ptp(d, axis=-1) == 0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # constant rows: handled by `flat`
        ci = ttest_1samp(d, 0.0, axis=-1).confidence_interval(1 - alpha)
    mean = d.mean(axis=-1)
    flat_low, flat_high = same_difference_interval(mean, d.shape[-1], alpha)
    return np.where(flat, flat_low, ci.low), np.where(flat, flat_high, ci.high)


def same_difference_interval(value, n: int, alpha: float = 0.05):
    """Interval for the mean difference when all ``n`` questions showed the same ``value`` in [-1, 1].

    No question departed from ``value``, yet some share of all questions might: at most ``u``,
    the exact (Clopper-Pearson) upper bound for a share seen 0 times in ``n``,
    ``u = 1 - (alpha / 2) ** (1 / n)``. Each such question moves the mean at most to -1 or +1,
    so the mean lies in ``[value - u (value + 1), value + u (1 - value)]``: for ``value`` 0,
    ``[-u, u]`` (6 agreeing questions: about [-0.46, 0.46]; 40: [-0.09, 0.09]).
    """
    u = 1.0 - (alpha / 2) ** (1.0 / n)
    v = np.asarray(value, dtype=float)
    return v - u * (v + 1.0), v + u * (1.0 - v)


@dataclass(frozen=True)
class PairedComparison:
    """``b`` against ``a`` on the same questions; ``difference = accuracy_b - accuracy_a``.

    ``ci_low``/``ci_high`` are the paired t-interval; with groups, ``cluster_*`` hold the
    interval that allows for questions in one group succeeding or failing together, and that
    one is used by :attr:`interval`. ``test`` names the test behind ``p_value``: McNemar's exact
    test for 0/1 scores, the paired t-test for scores averaged over draws. The counts
    ``only_a``/``only_b`` are questions where that side scored higher (for 0/1 scores: where
    only that side was right). ``discordance`` is the mean squared per-question difference,
    which for 0/1 scores is the share of questions where exactly one side was right.
    ``mdd_80`` is the smallest true difference these questions detect with 80% power.
    """

    label_a: str
    label_b: str
    n: int
    accuracy_a: float
    accuracy_b: float
    difference: float
    ci_low: float
    ci_high: float
    se: float
    p_value: float
    test: str
    binary: bool
    both_right: int
    only_a: int
    only_b: int
    both_wrong: int
    discordance: float
    boot_low: float
    boot_high: float
    mdd_80: float
    alpha: float
    n_clusters: int | None = None
    cluster_se: float | None = None
    cluster_ci_low: float | None = None
    cluster_ci_high: float | None = None
    p_adjusted: float | None = None

    @property
    def interval(self) -> tuple[float, float]:
        """The interval a verdict rests on: clustered when groups were given, else paired t.

        A difference of two accuracies lies in [-1, 1]; an interval from few questions or few
        groups can overshoot that, so it is clipped to what is possible.
        """
        if self.cluster_ci_low is not None:
            low, high = self.cluster_ci_low, self.cluster_ci_high
        else:
            low, high = self.ci_low, self.ci_high
        return max(low, -1.0), min(high, 1.0)

    @property
    def p(self) -> float:
        """The p-value a verdict rests on: Holm-adjusted when set, else raw."""
        return self.p_value if self.p_adjusted is None else self.p_adjusted

    @property
    def distinguishable(self) -> bool:
        """True only when ``p < alpha`` and the interval excludes 0."""
        low, high = self.interval
        return bool(self.p < self.alpha and (low > 0 or high < 0))


def _scores(values, name: str) -> np.ndarray:
    x = np.asarray(values, dtype=float)
    if x.ndim != 1 or np.isnan(x).any() or (x < 0).any() or (x > 1).any():
        raise DataError(f"{name}: scores must be one value per question in 0..1 (0/1 or averaged over draws), with none missing")
    return x


def _cluster_codes(groups, n: int) -> np.ndarray:
    codes, _ = pd.factorize(pd.Series(list(groups), dtype=object))
    if len(codes) != n:
        raise DataError(f"groups: {len(codes)} labels for {n} questions; give one group per question")
    # A question without a group is a cluster of its own.
    missing = codes < 0
    codes[missing] = codes.max(initial=-1) + 1 + np.arange(missing.sum())
    return codes


def paired_comparison(
    a,
    b,
    groups=None,
    alpha: float = 0.05,
    n_boot: int = 2000,
    seed: int = 0,
    label_a: str = "a",
    label_b: str = "b",
) -> PairedComparison:
    """Compare per-question scores ``b`` with ``a`` (same questions, same order)."""
    a, b = _scores(a, "a"), _scores(b, "b")
    if len(a) != len(b):
        raise DataError(f"a/b: {len(a)} scores against {len(b)}; both sides must score the same questions")
    n = len(a)
    d = b - a
    low, high = difference_interval(d, alpha)
    binary = bool(np.isin(np.concatenate([a, b]), (0.0, 1.0)).all())
    counts = dict(
        both_right=int(((a == 1) & (b == 1)).sum()),
        only_a=int((a > b).sum()),
        only_b=int((b > a).sum()),
        both_wrong=int(((a == 0) & (b == 0)).sum()),
    )
    flat = bool(np.ptp(d) == 0)
    if binary:
        table = [[counts["both_right"], counts["only_a"]], [counts["only_b"], counts["both_wrong"]]]
        p, test = float(mcnemar(table, exact=True).pvalue), "McNemar exact"
    else:
        p = math.nan if flat else float(ttest_rel(b, a).pvalue)
        test = "paired t-test"
    if flat:
        boot_low = boot_high = float(d[0])
    else:
        boot = bootstrap((d,), np.mean, n_resamples=n_boot, confidence_level=1 - alpha,
                         method="percentile", rng=np.random.default_rng(seed))
        boot_low, boot_high = float(boot.confidence_interval.low), float(boot.confidence_interval.high)
    cluster = {}
    if groups is not None:
        codes = _cluster_codes(groups, n)
        k = int(codes.max()) + 1
        if k < 2:
            raise DataError("groups: every question is in one group; clustering needs at least two groups")
        fit = sm.OLS(d, np.ones(n)).fit(cov_type="cluster", cov_kwds={"groups": codes}, use_t=True)
        c_low, c_high = fit.conf_int(alpha)[0]
        if flat:  # no variation at all: the bound of same_difference_interval, counted in groups
            c_low, c_high = same_difference_interval(float(d[0]), k, alpha)
        cluster = dict(n_clusters=k, cluster_se=float(fit.bse[0]), cluster_ci_low=float(c_low), cluster_ci_high=float(c_high))
    discordance = float(np.mean(d**2))
    return PairedComparison(
        label_a=label_a, label_b=label_b, n=n, accuracy_a=float(a.mean()), accuracy_b=float(b.mean()),
        difference=float(d.mean()), ci_low=float(low), ci_high=float(high),
        se=float(d.std(ddof=1) / math.sqrt(n)), p_value=p, test=test, binary=binary,
        discordance=discordance, boot_low=boot_low, boot_high=boot_high,
        mdd_80=minimum_detectable_difference(n, discordance, alpha, 0.8, binary=binary),
        alpha=alpha, **counts, **cluster,
    )


def holm(pvalues) -> np.ndarray:
    """Holm step-down adjusted p-values; a missing (nan) p-value stays nan and is not counted."""
    p = np.asarray(pvalues, dtype=float)
    out = np.full(p.shape, np.nan)
    ok = ~np.isnan(p)
    if ok.any():
        out[ok] = multipletests(p[ok], method="holm")[1]
    return out


def _p_text(p: float, adjusted: bool) -> str:
    if math.isnan(p):
        return "p not defined"
    text = "p < 0.001" if p < 0.001 else f"p = {p:.2g}"
    return text + (" (Holm-adjusted)" if adjusted else "")


def verdict_sentence(cmp: PairedComparison, target_difference: float = 0.05) -> str:
    """One plain sentence on a comparison.

    A difference counts as distinguishable only when the p-value (Holm-adjusted, when set)
    is below alpha AND the interval excludes 0; the two can disagree because McNemar's test
    and the t-interval are different approximations. Otherwise the sentence says how many
    questions would be needed to detect ``target_difference`` at 80% power.
    """
    low, high = cmp.interval
    p = _p_text(cmp.p, cmp.p_adjusted is not None)
    size = f"{cmp.n} questions" + (f" in {cmp.n_clusters} groups" if cmp.n_clusters else "")
    if cmp.distinguishable:
        if cmp.difference > 0:
            ahead, behind, diff, low, high = cmp.label_b, cmp.label_a, cmp.difference, low, high
        else:
            ahead, behind, diff, low, high = cmp.label_a, cmp.label_b, -cmp.difference, -high, -low
        return f"{ahead} is ahead of {behind} by {100 * diff:.1f} points [{100 * low:.1f}, {100 * high:.1f}], {p}, {size}"
    text = (
        f"no difference distinguishable from noise ({cmp.label_b} minus {cmp.label_a}: "
        f"{100 * cmp.difference:.1f} points [{100 * low:.1f}, {100 * high:.1f}], {p}, {size})"
    )
    target = f"{100 * target_difference:g} points"
    if cmp.discordance == 0:
        return text + "; the two gave the same score on every question"
    need = _needed(cmp, target_difference)
    if need is None:
        return text + f"; they disagree too little for a {target} difference to be possible"
    return text + f"; about {need} questions would be needed to detect {target}"


def _needed(cmp: PairedComparison, target_difference: float) -> int | None:
    try:
        return questions_needed(target_difference, cmp.discordance, cmp.alpha, 0.8, binary=cmp.binary)
    except EvalkitError:  # the two settings disagree too little for that difference to exist
        return None


def setting_label(model: str, style: str, shots: int) -> str:
    """A setting's label: its condition label without the draw."""
    return f"{model} | {style} | {int(shots)}-shot"


_REQUIRED = ("task", "model", "style", "shots", "draw", "question_id", "correct")


def scored_records(records: pd.DataFrame) -> pd.DataFrame:
    """Check a records frame has what the statistics need; add a float ``score`` column."""
    missing = [c for c in _REQUIRED if c not in records.columns]
    if missing:
        raise DataError(f"records: missing column(s) {', '.join(missing)}; expected {', '.join(_REQUIRED)}")
    if records["correct"].isna().any():
        raise DataError("records: column 'correct' has missing values; score every record first")
    df = records.assign(score=records["correct"].astype(float))
    return df if "group" in df.columns else df.assign(group=None)


def _question_scores(records: pd.DataFrame) -> dict:
    df = scored_records(records)
    out = {}
    for (task, model, style, shots), rows in df.groupby(["task", "model", "style", "shots"], sort=True):
        by_q = rows.groupby("question_id", sort=True)
        out[(task, setting_label(model, style, shots))] = dict(
            model=model, style=style, shots=int(shots),
            scores=by_q["score"].mean(), groups=by_q["group"].first(), draws=int(rows["draw"].nunique()),
        )
    return out


def _default_pairs(settings: dict) -> list[tuple]:
    pairs = []
    by_tm: dict = {}
    for (task, label), s in settings.items():
        by_tm.setdefault((task, s["model"]), {})[(s["style"], s["shots"])] = label
    for (task, _model), keys in by_tm.items():
        direct = {shots: label for (style, shots), label in keys.items() if style == "direct"}
        for (style, shots), label in sorted(keys.items()):
            if style == "worked" and shots in direct:
                pairs.append((task, direct[shots], label))
            elif style == "worked-zero":
                # Same shots (normally zero-shot direct) when present, else every direct setting.
                for base in [direct[shots]] if shots in direct else [direct[s] for s in sorted(direct)]:
                    pairs.append((task, base, label))
            elif style.endswith(CALCULATOR_SUFFIX) and (style[: -len(CALCULATOR_SUFFIX)], shots) in keys:
                pairs.append((task, keys[(style[: -len(CALCULATOR_SUFFIX)], shots)], label))
    return pairs


def _requested_pairs(settings: dict, pairs) -> list[tuple]:
    out = []
    for x, y in pairs:
        if " | " not in x and " | " not in y:  # style names: pair them wherever both exist
            found = [
                (task, setting_label(s["model"], x, s["shots"]), label)
                for (task, label), s in settings.items()
                if s["style"] == y and (task, setting_label(s["model"], x, s["shots"])) in settings
            ]
        else:
            found = [(task, x, y) for task in sorted({t for t, _ in settings}) if (task, x) in settings and (task, y) in settings]
        if not found:
            known = "; ".join(sorted({label for _, label in settings}))
            raise DataError(f"pairs: ({x!r}, {y!r}) matches no two settings of one task; settings are: {known}")
        out.extend(found)
    return out


def shared_label(a: str, b: str) -> str:
    """What two setting labels have in common (e.g. the model and shots), to head their comparison."""
    pa, pb = a.split(" | "), b.split(" | ")
    return " | ".join(x for x, y in zip(pa, pb) if x == y) if len(pa) == len(pb) else ""


def _short_labels(a: str, b: str) -> tuple[str, str]:
    pa, pb = a.split(" | "), b.split(" | ")
    keep = [i for i, (x, y) in enumerate(zip(pa, pb)) if x != y] if len(pa) == len(pb) else []
    if not keep:
        return a, b
    return " | ".join(pa[i] for i in keep), " | ".join(pb[i] for i in keep)


def compare(
    records: pd.DataFrame,
    pairs: list[tuple[str, str]] | None = None,
    alpha: float = 0.05,
    target_difference: float = 0.05,
) -> pd.DataFrame:
    """One row per compared pair of settings, ``b`` against ``a``, Holm-adjusted across rows.

    Each question's score in a setting is its mean over that setting's draws (0/1 when the
    setting has one draw, so McNemar's exact test applies when both sides have one). By
    default it compares, per task x model: worked with direct at the same shots; worked-zero
    with direct at the same shots (else with every direct setting); ``<style>+calculator``
    with ``<style>``. ``pairs`` may instead name settings by label (``setting_label``),
    matched within each task, or by style (``("direct", "worked")``), matched per task x
    model x shots. Question groups, when present, give clustered intervals.
    """
    settings = _question_scores(records)
    wanted = _default_pairs(settings) if pairs is None else _requested_pairs(settings, pairs)
    wanted = list(dict.fromkeys(wanted))
    rows, comparisons = [], []
    for task, la, lb in wanted:
        sa, sb = settings[(task, la)], settings[(task, lb)]
        both = sa["scores"].index.intersection(sb["scores"].index)
        if len(both) < 2:
            raise DataError(f"records: {task}: {la!r} and {lb!r} share {len(both)} question(s); a comparison needs at least two")
        groups = sa["groups"].reindex(both).where(lambda g: g.notna(), sb["groups"].reindex(both))
        use_groups = groups.dropna().nunique() >= 2
        short_a, short_b = _short_labels(la, lb)
        comparisons.append(paired_comparison(
            sa["scores"].reindex(both).to_numpy(), sb["scores"].reindex(both).to_numpy(),
            groups=groups.to_numpy() if use_groups else None, alpha=alpha, label_a=short_a, label_b=short_b,
        ))
        rows.append(dict(task=task, setting_a=la, setting_b=lb, draws_a=sa["draws"], draws_b=sb["draws"]))
    if len(comparisons) > 1:  # a family of one needs no adjustment, and its verdict says none
        adjusted = holm([c.p_value for c in comparisons])
        comparisons = [replace(c, p_adjusted=float(p)) for c, p in zip(comparisons, adjusted)]
    for row, c in zip(rows, comparisons):
        low, high = c.interval
        row.update(
            label_a=c.label_a, label_b=c.label_b, n=c.n, accuracy_a=c.accuracy_a, accuracy_b=c.accuracy_b,
            difference=c.difference, ci_low=low, ci_high=high,
            interval="clustered by group" if c.n_clusters else "paired t",
            test=c.test, p=c.p_value, p_holm=c.p, distinguishable=c.distinguishable,
            both_right=c.both_right, only_a=c.only_a, only_b=c.only_b, both_wrong=c.both_wrong,
            discordance=c.discordance, boot_low=c.boot_low, boot_high=c.boot_high, mdd_80=c.mdd_80,
            questions_needed=_needed(c, target_difference), verdict=verdict_sentence(c, target_difference),
        )
    table = pd.DataFrame(rows, columns=_COLUMNS)
    table["questions_needed"] = table["questions_needed"].astype("Int64")
    return table


_COLUMNS = [
    "task", "setting_a", "setting_b", "label_a", "label_b", "draws_a", "draws_b", "n",
    "accuracy_a", "accuracy_b", "difference", "ci_low", "ci_high", "interval", "test", "p", "p_holm",
    "distinguishable", "both_right", "only_a", "only_b", "both_wrong", "discordance",
    "boot_low", "boot_high", "mdd_80", "questions_needed", "verdict",
]
