"""Run folders: create or resume one, and finish it with exports, a manifest and a report."""

from __future__ import annotations

import time
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from .backends.base import TIE_MARGIN
from .data import TaskData
from .errors import StoreError
from .manifest import MANIFEST_NAME, build_manifest, read_manifest, write_manifest
from .spec import Study
from .store import STORE_NAME, RunStore

__all__ = ["Run", "open_run_folder", "finish_run", "load_run", "summarise", "export_records",
           "DEFAULT_RESULTS", "REPORT_NAME"]

DEFAULT_RESULTS = Path("results")
REPORT_NAME = "report.md"
HTML_NAME = "report.html"

# Columns whose values depend only on the inputs; wall time and timestamps do not.
DETERMINISTIC = ["condition", "question_id", "prompt_sha", "completion", "extracted", "method",
                 "correct", "outcome", "prompt_tokens", "new_tokens", "finish"]


@dataclass
class Run:
    """A finished (or partly finished) run folder."""

    folder: Path
    manifest: dict
    records: pd.DataFrame
    summary: pd.DataFrame
    counts: dict
    seconds: float | None = None

    @property
    def report_path(self) -> Path:
        return self.folder / REPORT_NAME

    @property
    def html_path(self) -> Path:
        return self.folder / HTML_NAME


def open_run_folder(study: Study, tasks: list[TaskData], out: str | Path | None) -> tuple[Path, RunStore, dict]:
    """Create a run folder (or reopen one to resume), with its store and a starting manifest."""
    if out is None:
        stamp = time.strftime("%Y%m%d-%H%M%S")
        out = DEFAULT_RESULTS / f"{study.name}-{stamp}"
    run_dir = Path(out)
    if run_dir.exists() and not run_dir.is_dir():
        raise StoreError(f"{run_dir}: exists and is not a folder; choose another --out")
    resuming = (run_dir / STORE_NAME).exists()
    if run_dir.exists() and any(run_dir.iterdir()) and not resuming:
        raise StoreError(f"{run_dir}: folder is not empty and holds no store; choose another --out")
    run_dir.mkdir(parents=True, exist_ok=True)
    manifest = build_manifest(study, tasks)
    if resuming:
        old = read_manifest(run_dir) if (run_dir / MANIFEST_NAME).exists() else {}
        if old.get("study") and old["study"] != manifest["study"]:
            raise StoreError(f"{run_dir}: holds a run of a different study; resume with the same study or use a new --out")
        manifest["created"] = old.get("created", manifest["created"])
        manifest["models"] = old.get("models", {})
        manifest["resumed"] = old.get("resumed", 0) + 1
    write_manifest(run_dir, manifest)
    store = RunStore(run_dir / STORE_NAME)
    return run_dir, store, manifest


def summarise(records: pd.DataFrame, costs: pd.DataFrame | None = None, alpha: float = 0.05) -> pd.DataFrame:
    """Accuracy per condition with its Wilson interval (statsmodels), in condition order, with measured costs."""
    from .stats import accuracy_interval

    rows = []
    keys = ["condition_id", "condition", "task", "model", "style", "shots", "draw"]
    for key, g in records.groupby(keys, sort=False):
        ci = accuracy_interval(int(g["correct"].sum()), len(g), alpha=alpha, method="wilson")
        rows.append({
            **dict(zip(keys, key)),
            "n": len(g),
            "correct": int(g["correct"].sum()),
            "accuracy": ci.estimate,
            "ci_low": ci.low,
            "ci_high": ci.high,
            "no_answer": int((g["outcome"] == "no answer").sum()),
            "mean_new_tokens": float(g["new_tokens"].mean()),
            "prompt_tokens": int(g["prompt_tokens"].sum()),
            "new_tokens": int(g["new_tokens"].sum()),
            "seconds": float(g["seconds"].sum()),
            "ties": int((g["min_margin"].fillna(float("inf")) < TIE_MARGIN).sum()),
        })
    from .compute import merge_costs

    summary = pd.DataFrame(rows, columns=keys + ["n", "correct", "accuracy", "ci_low", "ci_high", "no_answer",
                                                 "mean_new_tokens", "prompt_tokens", "new_tokens", "seconds", "ties"])
    return merge_costs(summary, costs if costs is not None else pd.DataFrame())


def export_records(run_dir: Path, records: pd.DataFrame) -> list[Path]:
    """records.csv and records.parquet beside the store."""
    import json

    csv, parquet = run_dir / "records.csv", run_dir / "records.parquet"
    flat = records.copy()
    if "extra" in flat:  # nested backend facts travel as JSON text in flat files
        flat["extra"] = flat["extra"].map(lambda d: json.dumps(d, sort_keys=True))
    flat.to_csv(csv, index=False)
    flat.to_parquet(parquet, index=False)
    return [csv, parquet]


def finish_run(run_dir: Path, manifest: dict, backends: dict[str, dict], counts: dict, seconds: float) -> Run:
    """Exports, the completed manifest and the Markdown report."""
    from .report.build import write_reports

    manifest["models"].update(backends)
    manifest["finished"] = time.strftime("%Y-%m-%dT%H:%M:%S%z")
    manifest["last_session"] = {**counts, "seconds": round(seconds, 2)}
    with RunStore(run_dir / STORE_NAME) as store:
        records, costs = store.records(), store.costs()
    manifest["records"] = len(records)
    write_manifest(run_dir, manifest)
    export_records(run_dir, records)
    run = Run(run_dir, manifest, records, summarise(records, costs), counts, seconds)
    write_reports(run)
    return run


def load_run(run_dir: str | Path) -> Run:
    """An existing run folder, read back from its store and manifest."""
    run_dir = Path(run_dir)
    manifest = read_manifest(run_dir)
    with RunStore.open_run(run_dir) as store:
        records, costs = store.records(), store.costs()
    return Run(run_dir, manifest, records, summarise(records, costs), manifest.get("last_session", {}),
               (manifest.get("last_session") or {}).get("seconds"))
