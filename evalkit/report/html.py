"""The static HTML report: one self-contained file (inline CSS, SVG plots, a small inline filter).

Everything that came from a model or a dataset is escaped by jinja2's autoescaping; only our
own matplotlib SVGs are inserted as markup.
"""

from __future__ import annotations

import math
from pathlib import Path

import jinja2
import pandas as pd
from markupsafe import Markup, escape

from .markdown import busy_sentence

__all__ = ["render_html", "write_html", "marked_completion", "HTML_NAME"]

HTML_NAME = "report.html"
_TEMPLATES = Path(__file__).resolve().parent / "templates"


def marked_completion(text: str, steps: list[dict]) -> Markup:
    """The completion, escaped, with each audited step wrapped: wrong steps marked ``bad``."""
    out, pos = [], 0
    for s in sorted(steps, key=lambda s: s["start"]):
        start, end = int(s["start"]), int(s["end"])
        if start < pos or end > len(text):
            continue
        out.append(escape(text[pos:start]))
        if s.get("holds"):
            out.append(Markup('<mark class="good">{}</mark>').format(text[start:end]))
        else:
            true = s.get("value") if s.get("value") is not None else "undefined"
            out.append(Markup('<mark class="bad" title="should be {}">{}</mark><span class="fix">(is {})</span>')
                       .format(true, text[start:end], true))
        pos = end
    out.append(escape(text[pos:]))
    return Markup("").join(out)


def _svg(path: Path | None) -> Markup | None:
    if path is None or not Path(path).is_file():
        return None
    text = Path(path).read_text(encoding="utf-8")
    start = text.find("<svg")  # drop the XML prolog and doctype: inline SVG needs neither
    return Markup(text[start:]) if start >= 0 else None


def _flops_text(x: float) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "—"
    return f"{x:.2e}"


def render_html(run, plots: dict[str, Path | None], comparisons: pd.DataFrame | None = None,
                verdicts: pd.DataFrame | None = None, costs: pd.DataFrame | None = None,
                cheapest: str | None = None, probes: pd.DataFrame | None = None) -> str:
    """The report as one HTML string."""
    from ..backends.base import TIE_MARGIN
    from ..compute import FLOPS_FORMULA

    env = jinja2.Environment(loader=jinja2.FileSystemLoader(_TEMPLATES), autoescape=True,
                             undefined=jinja2.StrictUndefined)
    summary = (costs if costs is not None else run.summary).copy()
    if "flops" not in summary:
        summary["flops"] = float("nan")
    summary["flops_text"] = summary["flops"].map(_flops_text)
    wall = summary["wall_seconds"] if "wall_seconds" in summary else pd.Series(float("nan"), index=summary.index)
    peak = summary["peak_rss_bytes"] if "peak_rss_bytes" in summary else pd.Series(float("nan"), index=summary.index)
    summary["wall_text"] = ["cached" if pd.isna(w) else f"{w:.1f}" for w in wall]
    summary["peak_text"] = ["—" if pd.isna(p) else f"{p / 2**30:.2f} GiB" for p in peak]
    by_record: dict[tuple[str, str], tuple[str, list]] = {}
    if verdicts is not None and not verdicts.empty:
        for v in verdicts.itertuples():
            by_record[(v.condition_id, v.question_id)] = (v.verdict, v.detail.get("steps", []))
    records = []
    for r in run.records.to_dict("records"):
        verdict, steps = by_record.get((r["condition_id"], r["question_id"]), ("", []))
        margin, extracted = r.get("min_margin"), r.get("extracted")
        records.append({
            **r, "verdict": verdict, "completion_html": marked_completion(r["completion"], steps),
            "extracted": None if extracted is None or (isinstance(extracted, float) and math.isnan(extracted)) else extracted,
            "interventions": (r.get("extra") or {}).get("calculator", []),
            "min_margin": None if margin is None or (isinstance(margin, float) and math.isnan(margin)) else margin,
        })
    audit = None
    if verdicts is not None and not verdicts.empty:
        labels = run.records.drop_duplicates("condition_id").set_index("condition_id")["condition"]
        names = sorted(verdicts["verdict"].unique())
        rows = [{"condition": labels.get(cid, cid), "counts": g["verdict"].value_counts().to_dict()}
                for cid, g in verdicts.groupby("condition_id", sort=False)]
        audit = {"verdicts": names, "rows": rows}
    bf16 = [m for m, info in run.manifest.get("models", {}).items() if info.get("dtype") == "bfloat16"]
    return env.get_template("report.html.j2").render(
        title=run.manifest.get("study", {}).get("name", "run"),
        folder=str(run.folder), manifest=run.manifest, n_records=len(records), bf16=bf16,
        summary=summary.to_dict("records"),
        comparisons=[] if comparisons is None else comparisons.to_dict("records"),
        forest_svg=_svg(plots.get("forest")), size_svg=_svg(plots.get("size")),
        compute_svg=_svg(plots.get("compute")), flops_formula=FLOPS_FORMULA, cheapest=cheapest,
        busy=busy_sentence(run.manifest),
        audit=audit, records=records, tie_margin=TIE_MARGIN,
        probes=None if probes is None or probes.empty else {"columns": list(probes.columns),
                                                            "rows": probes.to_dict("records")},
        conditions=list(dict.fromkeys(run.records["condition"])) if len(run.records) else [],
        outcomes=sorted(set(run.records["outcome"])) if len(run.records) else [],
        verdict_names=sorted({r["verdict"] for r in records if r["verdict"]}),
    )


def write_html(run, **kwargs) -> Path:
    path = Path(run.folder) / HTML_NAME
    path.write_text(render_html(run, **kwargs), encoding="utf-8")
    return path
