"""Forest plot of paired comparisons: one row per pair, the difference and its interval."""

from __future__ import annotations

from pathlib import Path

import matplotlib
import pandas as pd
from matplotlib.figure import Figure

from evalkit.errors import DataError

__all__ = ["forest_plot"]

_NEEDED = ("difference", "ci_low", "ci_high")


def _row_label(row: pd.Series, many_tasks: bool) -> str:
    a = str(row.get("label_a", row.get("setting_a", "a")))
    b = str(row.get("label_b", row.get("setting_b", "b")))
    label = f"{b} minus {a}"
    if "setting_a" in row and "setting_b" in row:
        # What the two settings share (model, shots) goes in front, so the pair reads short.
        pa, pb = str(row["setting_a"]).split(" | "), str(row["setting_b"]).split(" | ")
        shared = [x for x, y in zip(pa, pb) if x == y] if len(pa) == len(pb) else []
        if shared:
            label = f"{', '.join(shared)}: {label}"
    if many_tasks:
        label = f"{row['task']} · {label}"
    return label


def forest_plot(table: pd.DataFrame, stem: Path, title: str | None = None) -> tuple[Path, Path]:
    """Draw ``table`` (from :func:`evalkit.stats.compare`) to ``stem.svg`` and ``stem.png``.

    Each row shows ``difference`` (``b`` minus ``a``) with ``ci_low``..``ci_high`` in
    percentage points; filled markers are differences distinguishable from noise.
    """
    missing = [c for c in _NEEDED if c not in table.columns]
    if missing:
        raise DataError(f"forest plot: table lacks column(s) {', '.join(missing)}; pass the table from compare()")
    if table.empty:
        raise DataError("forest plot: the comparison table has no rows; there is nothing to draw")
    stem = Path(stem)
    stem.parent.mkdir(parents=True, exist_ok=True)
    many_tasks = "task" in table.columns and table["task"].nunique() > 1
    rows = table.reset_index(drop=True)
    labels = [_row_label(r, many_tasks) for _, r in rows.iterrows()]
    y = list(range(len(rows)))[::-1]  # first row at the top
    diff, low, high = (100 * rows[c].astype(float) for c in _NEEDED)
    clear = rows["distinguishable"].astype(bool) if "distinguishable" in rows.columns else pd.Series(False, index=rows.index)

    svg, png = stem.parent / f"{stem.name}.svg", stem.parent / f"{stem.name}.png"
    # Fixed ids and no date make the SVG byte-identical across runs, so reports diff cleanly;
    # Figure without pyplot renders PNG with Agg and touches no global backend.
    with matplotlib.rc_context({"svg.hashsalt": "evalkit-forest", "svg.fonttype": "none", "font.size": 9}):
        fig = Figure(figsize=(7.5, 1.2 + 0.45 * len(rows)), layout="constrained")
        ax = fig.add_subplot()
        ax.axvline(0, color="0.4", linestyle="--", linewidth=1)
        ax.hlines(y, low, high, color="tab:blue", linewidth=2)
        for yi, d, c in zip(y, diff, clear):
            ax.plot(d, yi, "o", color="tab:blue", markerfacecolor="tab:blue" if c else "white", markersize=7)
        for yi, d, lo, hi in zip(y, diff, low, high):
            ax.annotate(f"{d:+.1f} [{lo:.1f}, {hi:.1f}]", (1.01, yi), xycoords=("axes fraction", "data"),
                        va="center", fontsize=8)
        ax.set_yticks(y, labels)
        ax.set_ylim(-0.7, len(rows) - 0.3)
        ax.set_xlabel("difference in accuracy, percentage points\n"
                      "filled: distinguishable from noise; open: not")
        ax.grid(axis="x", color="0.9")
        if title:
            ax.set_title(title)
        fig.savefig(svg, metadata={"Date": None})
        fig.savefig(png, dpi=150)
    return svg, png
