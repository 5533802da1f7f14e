"""The Markdown report of a run: accuracy per condition with intervals, paired comparisons."""

from __future__ import annotations

from pathlib import Path

import pandas as pd

__all__ = ["render_report", "write_report", "accuracy_table"]


def _pct(x: float) -> str:
    return f"{100 * x:.1f}"


def accuracy_table(summary: pd.DataFrame) -> str:
    """Markdown table: one row per condition, accuracy with its 95% Wilson interval."""
    lines = [
        "| model | style | shots | draw | accuracy % | 95% interval | n | no answer | new tokens/item | seconds |",
        "| --- | --- | ---: | ---: | ---: | --- | ---: | ---: | ---: | ---: |",
    ]
    for r in summary.itertuples():
        lines.append(
            f"| {r.model} | {r.style} | {r.shots} | {r.draw} | {_pct(r.accuracy)} | "
            f"[{_pct(r.ci_low)}, {_pct(r.ci_high)}] | {r.n} | {r.no_answer} | {r.mean_new_tokens:.1f} | {r.seconds:.1f} |"
        )
    return "\n".join(lines)


def _comparisons(records: pd.DataFrame) -> list[str]:
    from ..stats import compare

    table = compare(records)
    if table.empty:
        return []
    out = ["## Paired comparisons", "",
           "Each pair of conditions is compared on the same questions. The interval is the 95% confidence "
           "interval of the paired difference; p is McNemar's exact test on the discordant questions "
           "(Holm-adjusted across this table). A difference is called real only when the adjusted p is "
           "below 0.05 and the interval excludes zero.", ""]
    for r in table.itertuples():
        out.append(f"- {r.verdict}")
    return out + [""]


def render_report(run) -> str:
    """The report's Markdown text."""
    m, summary = run.manifest, run.summary
    study = m.get("study", {})
    lines = [f"# evalkit report: {study.get('name', 'run')}", ""]
    lines.append(f"Run folder `{run.folder}`, started {m.get('created')}, finished {m.get('finished', 'not yet')}.")
    tasks = ", ".join(f"{t['name']} ({t['questions']} questions, {t['exemplars']} exemplars)" for t in m.get("tasks", []))
    lines += [f"Tasks: {tasks}.", ""]
    lines.append("## Models")
    lines.append("")
    for name, info in m.get("models", {}).items():
        sha = (info.get("sha256") or "")[:16]
        lines.append(
            f"- **{name}**: {info.get('parameters', '?'):,} parameters, dtype {info.get('dtype')}, "
            f"{'chat template' if info.get('chat_template') else 'plain text'}, file sha256 {sha}…"
            if isinstance(info.get("parameters"), int) else
            f"- **{name}**: backend {info.get('backend')}, dtype {info.get('dtype')}, sha256 {sha}"
        )
        if info.get("dtype") == "bfloat16":
            lines.append("  - **Reduced precision (bfloat16) was used**: greedy answers can differ from float32.")
    d = m.get("decoding", {})
    lines += ["", f"Greedy decoding; new-token limits {d.get('max_new_tokens')}; stop strings "
              f"{[s for s in d.get('stop', [])]}; seed {m.get('seed')}.", ""]
    lines += ["## Accuracy per condition", "",
              "Accuracy with its 95% Wilson score interval (statsmodels). Intervals that overlap do not by "
              "themselves show a difference or its absence; see the paired comparisons.", "",
              accuracy_table(summary), ""]
    if not run.records.empty:
        lines += _comparisons(run.records)
    ties = int(summary["ties"].sum()) if "ties" in summary else 0
    if ties:
        lines += [f"{ties} records met a near-tie between the two best next tokens (top-2 logit gap < 1e-3): "
                  "their completions may change under a different batch shape.", ""]
    lines += ["## Reproduce", "", "```", f"evalkit rerun {run.folder}", "```", ""]
    return "\n".join(lines)


def write_report(run) -> Path:
    path = Path(run.folder) / "report.md"
    path.write_text(render_report(run), encoding="utf-8")
    return path
