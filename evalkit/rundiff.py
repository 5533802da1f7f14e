"""Compare two runs record by record, and re-run a study from its manifest.

`diff_runs` matches records of two runs of the same study (a new model version, a new
template) on task, style, shots, draw and question, and on model too when both runs used the
same models; when each run used one model, models are matched to each other. It reports which
records changed outcome and the paired statistics of the change.

`rerun` runs the manifest's study again into a new folder without the generation cache, and
checks that every record is the same, byte for byte, in the columns that depend only on the
inputs (completion, extracted answer, score, token counts).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from .backends.base import TIE_MARGIN
from .errors import StoreError
from .run import DETERMINISTIC, load_run

__all__ = ["RunDiff", "diff_runs", "Rerun", "rerun", "study_from_manifest"]

_KEY = ["task", "style", "shots", "draw", "question_id"]


@dataclass
class RunDiff:
    """Records matched across two runs, and what changed."""

    matched: pd.DataFrame       # one row per matched record, columns suffixed _a / _b
    changed: pd.DataFrame       # matched records whose outcome changed
    text_changed: int           # matched records whose completion text changed
    only_a: int
    only_b: int
    comparisons: pd.DataFrame   # paired statistics per setting (b against a)

    def summary(self) -> str:
        n = len(self.matched)
        flips = self.changed.groupby(["outcome_a", "outcome_b"]).size().to_dict() if len(self.changed) else {}
        flip_text = ", ".join(f"{a} → {b}: {k}" for (a, b), k in flips.items()) or "none"
        return (f"{n} records matched ({self.only_a} only in A, {self.only_b} only in B); "
                f"{len(self.changed)} changed outcome ({flip_text}); {self.text_changed} completions differ in text")


def _key(records: pd.DataFrame, use_model: bool) -> pd.DataFrame:
    df = records.copy()
    df["_key"] = df[_KEY + (["model"] if use_model else [])].astype(str).agg("\x1f".join, axis=1)
    return df


def diff_runs(run_a: str | Path, run_b: str | Path) -> RunDiff:
    """Which records changed outcome between two runs, with paired statistics on the change."""
    from .stats import paired_comparison

    a, b = load_run(run_a).records, load_run(run_b).records
    models_a, models_b = set(a["model"]), set(b["model"])
    use_model = not (len(models_a) == 1 and len(models_b) == 1 and models_a != models_b)
    ka, kb = _key(a, use_model), _key(b, use_model)
    m = ka.merge(kb, on="_key", suffixes=("_a", "_b"))
    if m.empty:
        raise StoreError(f"{run_a} and {run_b} share no records (same task, style, shots, draw and question)")
    changed = m[m["outcome_a"] != m["outcome_b"]]
    text_changed = int((m["completion_a"] != m["completion_b"]).sum())
    rows = []
    by = ["task_a"] + (["model_a"] if use_model else []) + ["style_a", "shots_a", "draw_a"]
    for key, g in m.groupby(by, sort=False):
        if len(g) < 2:
            continue
        label = " | ".join(str(k) for k in key[:-2]) + f" | {key[-2]}-shot | draw {key[-1]}"
        c = paired_comparison(g["correct_a"].to_numpy(float), g["correct_b"].to_numpy(float),
                              label_a="run A", label_b="run B")
        rows.append({"setting": label, "n": c.n, "accuracy_a": c.accuracy_a, "accuracy_b": c.accuracy_b,
                     "difference": c.difference, "ci_low": c.interval[0], "ci_high": c.interval[1],
                     "p": c.p_value, "only_a_right": c.only_a, "only_b_right": c.only_b,
                     "distinguishable": c.distinguishable})
    comparisons = pd.DataFrame(rows)
    if len(comparisons) > 1:
        from .stats import holm

        comparisons["p_holm"] = holm(comparisons["p"].to_numpy())
    elif len(comparisons):
        comparisons["p_holm"] = comparisons["p"]
    return RunDiff(m, changed, text_changed, int((~ka["_key"].isin(kb["_key"])).sum()),
                   int((~kb["_key"].isin(ka["_key"])).sum()), comparisons)


def study_from_manifest(run_dir: str | Path):
    """The study a run folder was made from, with its file references resolved as they were."""
    from .manifest import read_manifest
    from .spec import Study

    m = read_manifest(run_dir)
    if not m.get("study"):
        raise StoreError(f"{run_dir}: the manifest holds no study; it cannot be re-run")
    source = m.get("study_file")
    return Study.model_validate({**m["study"], "source_file": Path(source) if source else None}), m


@dataclass
class Rerun:
    folder: Path
    identical: bool
    compared: int
    differing: pd.DataFrame     # records whose deterministic columns differ, with their near-tie margins
    changed_inputs: list[str]   # spec, data or template files whose hash differs from the manifest

    def summary(self) -> str:
        if self.identical:
            return f"identical: all {self.compared} records reproduced byte for byte in {self.folder}"
        ties = int((self.differing["min_margin_a"].fillna(1.0) < TIE_MARGIN).sum()) if len(self.differing) else 0
        text = (f"{len(self.differing)} of {self.compared} records differ ({ties} of them at a recorded near-tie); "
                f"new run in {self.folder}")
        if self.changed_inputs:
            text += "; inputs changed since the original run: " + ", ".join(self.changed_inputs)
        return text


def _changed_inputs(manifest: dict) -> list[str]:
    from .manifest import file_sha256
    from .prompts import sha256_text

    changed = []
    for t in manifest.get("tasks", []):
        files = [(t.get("spec_file"), t.get("spec_sha256"))]
        files += [(d.get("file"), d.get("sha256")) for d in t.get("data", {}).values()]
        for f, sha in files:
            if f and sha and (not Path(f).is_file() or file_sha256(f) != sha):
                changed.append(f)
        for tpl in t.get("templates", {}).values():
            f, sha = tpl.get("file"), tpl.get("sha256")
            if f and sha and (not Path(f).is_file() or sha256_text(Path(f).read_text(encoding="utf-8")) != sha):
                changed.append(f)
    return changed


def rerun(run_dir: str | Path, out: str | Path | None = None, progress: bool = True,
          backend_factory=None) -> Rerun:
    """Re-run a run's study from its manifest, bypassing the cache, and check the records match."""
    from .runner import run_study

    study, manifest = study_from_manifest(run_dir)
    changed = _changed_inputs(manifest)
    if out is None:
        out = Path(run_dir).parent / f"{Path(run_dir).name}-rerun"
        i = 2
        while Path(out).exists():
            out = Path(run_dir).parent / f"{Path(run_dir).name}-rerun{i}"
            i += 1
    new = run_study(study, out=out, backend_factory=backend_factory, use_cache=False, progress=progress)
    old = load_run(run_dir).records
    cols = DETERMINISTIC
    merged = old[cols + ["min_margin"]].merge(new.records[cols + ["min_margin"]], on=["condition", "question_id"],
                                              suffixes=("_a", "_b"), how="outer", indicator=True)
    value_cols = [c for c in cols if c not in ("condition", "question_id")]
    differs = merged["_merge"] != "both"
    for c in value_cols:
        a, b = merged[f"{c}_a"], merged[f"{c}_b"]
        differs |= ~((a.astype(str) == b.astype(str)) | (a.isna() & b.isna()))
    differing = merged[differs]
    return Rerun(Path(out), bool(not differs.any()), len(merged), differing, changed)
