"""The Markdown report of a run (for pull requests): accuracy with intervals, paired verdicts,
draw sensitivity, compute, and the chain audit."""

from __future__ import annotations

from collections import Counter
from pathlib import Path

import pandas as pd

__all__ = ["render_report", "write_report", "accuracy_table", "REPORT_NAME"]

REPORT_NAME = "report.md"


def _pct(x: float) -> str:
    return f"{100 * x:.1f}"


def _cell(text) -> str:
    return str(text).replace("|", "\\|").replace("\n", " ")


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


def _comparison_section(table: pd.DataFrame | None) -> list[str]:
    if table is None or table.empty:
        return []
    out = ["## Paired comparisons", "",
           "Each pair of settings is compared on the same questions: difference b − a with the 95% interval of "
           "the paired differences; McNemar's exact test on the discordant questions when every per-question score "
           "is 0 or 1 (a paired t-test on draw-averaged scores otherwise); Holm-adjusted across this table. A "
           "difference is called real only when the adjusted p is below 0.05 and the interval excludes zero.", ""]
    from ..stats import shared_label

    out += [f"- **{_cell(shared_label(a, b))}**: {_cell(v)}"
            for a, b, v in zip(table["setting_a"], table["setting_b"], table["verdict"])]
    out += ["", "| a | b | n | difference (points) | 95% interval | p (Holm) | detectable at 80% power |",
            "| --- | --- | ---: | ---: | --- | ---: | ---: |"]
    for r in table.itertuples():
        out.append(f"| {_cell(r.setting_a)} | {_cell(r.setting_b)} | {r.n} | {100 * r.difference:+.1f} | "
                   f"[{_pct(r.ci_low)}, {_pct(r.ci_high)}] | {r.p_holm:.3g} | "
                   f"{_pct(r.mdd_80) + ' points' if pd.notna(r.mdd_80) else 'none: too few questions'} |")
    return out + ["", "Forest plot: `plots/comparisons.svg`.", ""]


def _spread_section(spread: pd.DataFrame | None, components: pd.DataFrame | None) -> list[str]:
    if spread is None or spread.empty:
        return []
    out = ["## Exemplar sensitivity", "",
           "Accuracy across exemplar draws (different exemplars and orders from different seeds).", ""]
    cols = [c for c in spread.columns]
    out.append("| " + " | ".join(cols) + " |")
    out.append("| " + " | ".join("---" for _ in cols) + " |")
    for row in spread.itertuples(index=False):
        out.append("| " + " | ".join(_cell(f"{v:.3f}" if isinstance(v, float) else v) for v in row) + " |")
    if components is not None and not components.empty:
        out += ["", "Variance of per-record scores split into draw and question parts:", ""]
        cols = list(components.columns)
        out.append("| " + " | ".join(cols) + " |")
        out.append("| " + " | ".join("---" for _ in cols) + " |")
        for row in components.itertuples(index=False):
            out.append("| " + " | ".join(_cell(f"{v:.3f}" if isinstance(v, float) else v) for v in row) + " |")
    return out + [""]


def busy_sentence(manifest: dict) -> str | None:
    """What the report says when other processes loaded the CPU during the run's last session."""
    from ..cpu_load import BUSY_CORES

    session = manifest.get("last_session") or {}
    cores = session.get("other_processes_cores")
    if cores is None or cores < BUSY_CORES:
        return None
    n = (manifest.get("machine") or {}).get("cpu_count") or "?"
    return (f"Other processes kept {cores:.1f} of {n} cores busy on average during the last "
            f"session ({session.get('generated', 0)} records generated), so its wall seconds are slower and noisier "
            "than on a quiet machine; the completions are not affected.")


def _cost_section(costs: pd.DataFrame, cheapest: str | None, busy: str | None = None) -> list[str]:
    from ..compute import FLOPS_FORMULA

    if costs.empty or costs["flops"].isna().all():
        return []
    out = ["## Compute", "", f"{FLOPS_FORMULA}.", "",
           "Wall seconds are measured per condition (model loading excluded; cached records cost none); peak memory is "
           "the process's largest resident set while the condition ran.", ""]
    if busy:
        out += [f"**Busy machine:** {busy}", ""]
    out += ["| condition | parameters | prompt tokens | generated tokens | est. FLOPs | wall seconds | peak memory |",
            "| --- | ---: | ---: | ---: | ---: | ---: | ---: |"]
    for r in costs.itertuples():
        params = f"{int(r.parameters):,}" if pd.notna(r.parameters) else "?"
        wall = f"{r.wall_seconds:.1f}" if pd.notna(r.wall_seconds) else "cached"
        peak = f"{r.peak_rss_bytes / 2**30:.2f} GiB" if pd.notna(r.peak_rss_bytes) else "—"
        out.append(f"| {_cell(r.condition)} | {params} | {r.prompt_tokens:,} | {r.new_tokens:,} | {r.flops:.2e} | "
                   f"{wall} | {peak} |")
    if cheapest:
        out += ["", f"Cheapest condition whose accuracy is within the 95% interval of the best: **{_cell(cheapest)}** "
                "(a screening rule, not a test of equivalence)."]
    return out + ["", "Plots: `plots/accuracy-vs-size.svg`, `plots/accuracy-vs-compute.svg`.", ""]


def _audit_section(run, verdicts: pd.DataFrame | None) -> list[str]:
    if verdicts is None or verdicts.empty:
        return []
    labels = run.records.drop_duplicates("condition_id").set_index("condition_id")["condition"]
    names = sorted(verdicts["verdict"].unique())
    out = ["## Chain audit", "", "Verdicts per reasoning condition (see docs/AUDIT.md for how each is decided).", "",
           "| condition | " + " | ".join(names) + " |", "| --- |" + " ---: |" * len(names)]
    for cid, g in verdicts.groupby("condition_id", sort=False):
        counts = g["verdict"].value_counts()
        out.append(f"| {_cell(labels.get(cid, cid))} | " + " | ".join(str(counts.get(n, 0)) for n in names) + " |")
    slips: Counter = Counter()
    examples = []
    completions = run.records.set_index(["condition_id", "question_id"])["completion"]
    for v in verdicts.itertuples():
        wrong = [s for s in v.detail.get("steps", []) if not s.get("holds")]
        for s in wrong:
            slips[f"{s['expression']} = {s['claimed']} (true {s['value']})"] += 1
        if wrong and len(examples) < 3 and v.verdict in ("slip", "lucky", "unrepaired"):
            text = completions.get((v.condition_id, v.question_id), "")
            s = wrong[0]
            marked = text[: s["start"]] + "⟦" + text[s["start"]: s["end"]] + "⟧" + text[s["end"]:]
            examples.append(f"- *{v.verdict}*, {labels.get(v.condition_id, '')}, question `{v.question_id}`: "
                            f"{_cell(marked.strip())[:600]}")
    if slips:
        out += ["", "Most common wrong steps:", ""]
        out += [f"- `{k}`: {n}×" for k, n in slips.most_common(5)]
    if examples:
        out += ["", "Examples (the wrong step in ⟦ ⟧):", ""] + examples
    return out + [""]


def _probe_section(rates: pd.DataFrame | None) -> list[str]:
    if rates is None or rates.empty:
        return []
    out = ["## Faithfulness probes", "",
           "Share of answers that changed from the record's own answer (Lanham et al., 2023): when the chain is cut "
           "after 0-100% of its steps and the model must answer at once, and when one step's result is changed and "
           "the model continues. An answer that rarely changes when the chain is cut or corrupted did not depend on it. "
           "Each share has its 95% Wilson interval: a handful of chains says little.",
           "", "| " + " | ".join(rates.columns) + " |", "| --- |" + " ---: |" * (len(rates.columns) - 1)]
    for row in rates.itertuples(index=False):
        out.append("| " + " | ".join(f"{100 * v:.0f}%" if isinstance(v, float) else _cell(v) for v in row) + " |")
    return out + [""]


def tie_note(ties: int) -> str:
    """The report's sentence on records whose decoding met a near-tie (``ties`` > 0)."""
    from ..backends.base import TIE_MARGIN

    which = "1 record met" if ties == 1 else f"{ties} records met"
    its = "its completion" if ties == 1 else "their completions"
    return (f"{which} a near-tie between the two best next tokens (top-2 logit gap < {TIE_MARGIN:g}): "
            f"{its} may change under a different batch shape.")


def render_report(run, parts=None) -> str:
    """The report's Markdown text."""
    if parts is None:
        from .build import report_parts

        parts = report_parts(run, plots=False)
    m, summary = run.manifest, run.summary
    study = m.get("study", {})
    lines = [f"# evalkit report: {study.get('name', 'run')}", ""]
    lines.append(f"Run folder `{run.folder}`, started {m.get('created')}, finished {m.get('finished', 'not yet')}.")
    tasks = ", ".join(f"{t['name']} ({t['questions']} questions, {t['exemplars']} exemplars)" for t in m.get("tasks", []))
    lines += [f"Tasks: {tasks}.", "", "## Models", ""]
    for name, info in m.get("models", {}).items():
        sha = (info.get("sha256") or "")[:16]
        params = info.get("parameters")
        desc = f"{params:,} parameters, " if isinstance(params, int) else ""
        lines.append(f"- **{name}**: {desc}backend {info.get('backend')}, dtype {info.get('dtype')}, "
                     f"{'chat template' if info.get('chat_template') else 'plain text'}, sha256 {sha}…, "
                     f"{info.get('threads')} threads"
                     + (f", linear layers {info['linear_layers']}" if info.get("linear_layers") else ""))
        if info.get("dtype") == "bfloat16":
            lines.append("  - **Reduced precision (bfloat16) was used**: greedy answers can differ from float32.")
    d = m.get("decoding", {})
    lines += ["", f"Greedy decoding; new-token limits {d.get('max_new_tokens')}; stop strings "
              f"{list(d.get('stop', []))}; exemplar seed {m.get('seed')}.", ""]
    lines += ["## Accuracy per condition", "",
              "Accuracy with its 95% Wilson score interval (statsmodels). Overlapping intervals neither show nor "
              "rule out a difference; the paired comparisons below do.", "", accuracy_table(summary), ""]
    lines += _comparison_section(parts.comparisons)
    lines += _spread_section(parts.spread, parts.components)
    lines += _cost_section(parts.costs, parts.cheapest, busy_sentence(run.manifest))
    lines += _audit_section(run, parts.verdicts)
    lines += _probe_section(parts.probes)
    ties = int(summary["ties"].sum()) if "ties" in summary else 0
    if ties:
        lines += [tie_note(ties), ""]
    lines += ["## Reproduce", "", "```", f"evalkit rerun {run.folder}", "```", ""]
    return "\n".join(lines)


def write_report(run, parts=None) -> Path:
    path = Path(run.folder) / REPORT_NAME
    path.write_text(render_report(run, parts), encoding="utf-8")
    return path
