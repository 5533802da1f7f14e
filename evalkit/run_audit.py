"""Audit a run: a verdict for every record of a reasoning style, written to the run's store.

Reads only the store (never a model), so it runs in seconds on an old run. Direct-style records
carry no chain and get no verdict.
"""

from __future__ import annotations

from dataclasses import asdict
from fractions import Fraction
from pathlib import Path

import pandas as pd

from .answers import parse_number
from .audit import classify_chain
from .numbers import format_value
from .store import RunStore

__all__ = ["audit_run", "verdict_counts", "REASONING_PREFIXES"]

REASONING_PREFIXES = ("worked",)
"""Styles whose completions are chains: worked, worked-zero and their calculator arms."""


def _fmt(v: Fraction | None) -> str | None:
    return None if v is None else format_value(v)


def _detail(cv) -> dict:
    steps = []
    for s in cv.steps:
        d = asdict(s)
        d.update(claimed=_fmt(s.claimed), value=_fmt(s.value), result_span=list(s.result_span))
        steps.append(d)
    return {"steps": steps, "first_wrong": cv.first_wrong, "repaired_answer": _fmt(cv.repaired_answer),
            "explanation": cv.explanation}


def audit_run(run_dir: str | Path) -> pd.DataFrame:
    """Classify every reasoning record's chain; store the verdicts and return them with labels."""
    with RunStore.open_run(run_dir) as store:
        records = store.records()
        conditions = store.conditions().set_index("condition_id")
        chains = records[records["style"].str.startswith(REASONING_PREFIXES)]
        rows = []
        for r in chains.itertuples():
            answer = conditions.loc[r.condition_id, "settings"].get("answer", {})
            tolerance = float(answer.get("tolerance", 0.0))
            if answer.get("kind", "number") != "number":
                continue  # arithmetic audit is for numeric answers
            gold = parse_number(r.gold)
            extracted = parse_number(r.extracted) if r.extracted is not None else None
            if gold is None:
                continue
            if answer.get("relative"):
                tolerance *= abs(float(gold))
            cv = classify_chain(r.completion, extracted, gold, tolerance)
            rows.append((r.condition_id, r.question_id, str(cv.verdict), _detail(cv)))
        store.put_verdicts(rows)
        verdicts = store.verdicts()
    labels = records.drop_duplicates("condition_id").set_index("condition_id")["condition"]
    verdicts.insert(0, "condition", verdicts["condition_id"].map(labels))
    return verdicts


def verdict_counts(verdicts: pd.DataFrame) -> pd.DataFrame:
    """Verdicts per condition: one row per condition, one column per verdict."""
    if verdicts.empty:
        return pd.DataFrame()
    table = verdicts.pivot_table(index="condition", columns="verdict", values="question_id",
                                 aggfunc="count", fill_value=0, sort=False)
    table.columns.name = None
    return table.reset_index()
