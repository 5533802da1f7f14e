"""Accuracy against model size and against compute (matplotlib, saved as SVG and PNG)."""

from __future__ import annotations

from pathlib import Path

import pandas as pd

__all__ = ["pooled_settings", "accuracy_vs_size", "accuracy_vs_compute"]


def _plt():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    plt.rcParams.update({"svg.fonttype": "none", "font.size": 9})
    return plt


def pooled_settings(costs: pd.DataFrame) -> pd.DataFrame:
    """One row per (model, style, shots), draws pooled: counts summed, Wilson interval on the pool."""
    from ..stats import accuracy_interval

    rows = []
    for (model, style, shots), g in costs.groupby(["model", "style", "shots"], sort=False):
        ci = accuracy_interval(int(g["correct"].sum()), int(g["n"].sum()))
        rows.append({"model": model, "style": style, "shots": shots, "draws": len(g),
                     "parameters": g["parameters"].iloc[0], "accuracy": ci.estimate,
                     "ci_low": ci.low, "ci_high": ci.high, "flops_per_item": g["flops_per_item"].mean()})
    return pd.DataFrame(rows)


def _save(fig, stem: Path) -> tuple[Path, Path]:
    stem.parent.mkdir(parents=True, exist_ok=True)
    svg, png = stem.with_suffix(".svg"), stem.with_suffix(".png")
    fig.savefig(svg, bbox_inches="tight", metadata={"Date": None})
    fig.savefig(png, dpi=150, bbox_inches="tight")
    _plt().close(fig)
    return svg, png


def _errorbars(ax, sub, x, **kw):
    y = 100 * sub["accuracy"]
    err = [100 * (sub["accuracy"] - sub["ci_low"]), 100 * (sub["ci_high"] - sub["accuracy"])]
    return ax.errorbar(x, y, yerr=err, capsize=3, **kw)


def _axes(ax, xlabel: str) -> None:
    from matplotlib.ticker import NullFormatter

    ax.set_xscale("log")
    ax.xaxis.set_minor_formatter(NullFormatter())  # minor labels on a short log axis overlap
    ax.margins(x=0.12)
    ax.set_xlabel(xlabel)
    ax.set_ylabel("accuracy, % (95% interval)")
    ax.set_ylim(-3, 103)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7, loc="center left", bbox_to_anchor=(1.01, 0.5), frameon=False)


def accuracy_vs_size(pooled: pd.DataFrame, stem: Path) -> tuple[Path, Path] | None:
    """Accuracy (95% Wilson interval) against parameter count, log scale, one line per style and shots."""
    data = pooled.dropna(subset=["parameters"])
    if data.empty:
        return None
    plt = _plt()
    fig, ax = plt.subplots(figsize=(6, 3.8))
    for (style, shots), sub in data.groupby(["style", "shots"], sort=False):
        sub = sub.sort_values("parameters")
        _errorbars(ax, sub, sub["parameters"], marker="o", label=f"{style}, {shots}-shot")
    for model, sub in data.groupby("model", sort=False):
        ax.annotate(model, (sub["parameters"].iloc[0], -3), xytext=(0, 4), textcoords="offset points",
                    ha="center", fontsize=7, color="0.4")
    _axes(ax, "parameters (log scale)")
    ax.set_title("Accuracy against model size")
    return _save(fig, stem)


def accuracy_vs_compute(pooled: pd.DataFrame, stem: Path) -> tuple[Path, Path] | None:
    """Accuracy against estimated inference FLOPs per question, log scale."""
    data = pooled.dropna(subset=["flops_per_item"])
    if data.empty:
        return None
    plt = _plt()
    fig, ax = plt.subplots(figsize=(6, 3.8))
    markers = {"direct": "s", "worked": "o", "worked-zero": "^"}
    for (model, style), sub in data.groupby(["model", "style"], sort=False):
        _errorbars(ax, sub, sub["flops_per_item"], linestyle="none",
                   marker=markers.get(style.split("+")[0], "D"), label=f"{model}, {style}")
        for r in sub.itertuples():
            ax.annotate(f"{r.shots}", (r.flops_per_item, 100 * r.accuracy), xytext=(4, 2),
                        textcoords="offset points", fontsize=7, color="0.4")
    _axes(ax, "estimated inference FLOPs per question (log scale; labels = shots)")
    ax.set_title("Accuracy against compute")
    return _save(fig, stem)
