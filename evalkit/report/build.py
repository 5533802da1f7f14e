"""Build every report of a run from its store: Markdown, HTML, plots. Never calls a model."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from ..errors import EvalkitError

__all__ = ["ReportParts", "report_parts", "write_reports"]


@dataclass
class ReportParts:
    """The tables and plot files a report is made of."""

    comparisons: pd.DataFrame | None
    costs: pd.DataFrame
    spread: pd.DataFrame | None
    components: pd.DataFrame | None
    verdicts: pd.DataFrame | None
    cheapest: str | None
    probes: pd.DataFrame | None = None
    plots: dict[str, Path | None] = field(default_factory=dict)


def _verdicts(run) -> pd.DataFrame | None:
    from ..store import RunStore

    with RunStore.open_run(run.folder) as store:
        v = store.verdicts()
    return v if not v.empty else None


def _probe_rates(run) -> pd.DataFrame | None:
    """The probes' change rates as report text, each with its interval."""
    from ..probes import probe_intervals
    from ..store import RunStore

    with RunStore.open_run(run.folder) as store:
        probes = store.probes()
    return probe_intervals(probes, run.records) if not probes.empty else None


def report_parts(run, plots: bool = True) -> ReportParts:
    """Comparisons, costs, draw sensitivity, verdicts and plots of a run."""
    from ..compute import cheapest_within_best, cost_table
    from ..stats import compare

    records = run.records
    comparisons = spread = components = None
    if len(records):
        try:
            comparisons = compare(records)
        except EvalkitError:
            comparisons = None  # too few shared questions to compare: the summary stands alone
        try:
            from ..sensitivity import draw_spread, variance_components

            if records["draw"].nunique() > 1:
                spread, components = draw_spread(records), variance_components(records)
        except EvalkitError:
            spread = components = None
    costs = cost_table(run.summary, run.manifest.get("models", {}))
    best = cheapest_within_best(costs) if len(costs) else None
    cheapest = None if best is None else f"{best['condition']} ({100 * best['accuracy']:.1f}%, {best['flops']:.2e} FLOPs)"
    parts = ReportParts(comparisons, costs, spread, components, _verdicts(run), cheapest, _probe_rates(run))
    if plots and len(records):
        from .plots import accuracy_vs_compute, accuracy_vs_size, pooled_settings

        folder = Path(run.folder) / "plots"
        pooled = pooled_settings(costs)
        size = accuracy_vs_size(pooled, folder / "accuracy-vs-size") if pooled["parameters"].notna().any() else None
        comp = accuracy_vs_compute(pooled, folder / "accuracy-vs-compute") if pooled["flops_per_item"].notna().any() else None
        parts.plots["size"] = size[0] if size else None
        parts.plots["compute"] = comp[0] if comp else None
        if comparisons is not None and len(comparisons):
            from .forest import forest_plot

            parts.plots["forest"] = forest_plot(comparisons, folder / "comparisons")[0]
    return parts


def write_reports(run, plots: bool = True) -> dict[str, Path]:
    """report.md, report.html and plots/ in the run folder."""
    from .html import write_html
    from .markdown import write_report

    parts = report_parts(run, plots=plots)
    md = write_report(run, parts)
    html = write_html(run, plots=parts.plots, comparisons=parts.comparisons, verdicts=parts.verdicts,
                      costs=parts.costs, cheapest=parts.cheapest, probes=parts.probes)
    return {"markdown": md, "html": html, **{k: v for k, v in parts.plots.items() if v}}
