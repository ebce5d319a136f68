"""Report figures built from ``results.json`` entries (matplotlib, our own look).

Owns the report's figure style: a light grid, a single ink colour for
estimates, a dashed reference line at zero. Functions return a Figure; the
caller saves it.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

INK = "#1d4e63"
ACCENT = "#b5562b"
MUTED = "#8a8f98"


def _tidy(ax) -> None:
    """The report's axis look: no box, a light vertical grid behind the data."""
    ax.spines[["top", "right", "left"]].set_visible(False)
    ax.grid(axis="x", color="#e3e5e8", linewidth=0.8)
    ax.set_axisbelow(True)


def _figure(height: float, width: float = 7.0):
    fig = Figure(figsize=(width, height))
    ax = fig.subplots()
    _tidy(ax)
    return fig, ax


METHOD_SHORT = {
    "neyman": "Difference in means",
    "blocked_neyman": "Block-weighted",
    "paired": "Paired",
    "cr2": "Difference in means (CR2)",
    "horvitz_thompson": "Horvitz–Thompson",
    "lin_hc2": "Lin adjusted",
    "lin_cr2": "Lin adjusted (CR2)",
    "wald_delta": "CACE (Wald)",
}


def _method_ticks(part: pd.DataFrame) -> list[str]:
    return [METHOD_SHORT.get(m, m) for m in part.get("method", part["estimator"])]


def effect_plot(rows: pd.DataFrame, *, labeler: Callable[[str], str] = str, level: int = 95,
                ticks: Callable[[pd.DataFrame], list[str]] = _method_ticks, what: str = "Effect"):
    """One panel per outcome (each on its own scale); a line per estimate, a square at the point estimate.

    ``ticks`` names the rows of one outcome's panel (default: the estimator);
    ``what`` starts the axis label.
    """
    rows = rows.reset_index(drop=True)
    outcomes = list(dict.fromkeys(rows["outcome"]))
    sizes = [int((rows["outcome"] == o).sum()) for o in outcomes]
    fig = Figure(figsize=(7.0, 0.42 * sum(sizes) + 0.75 * len(outcomes) + 0.3))
    axes = fig.subplots(len(outcomes), 1, gridspec_kw={"height_ratios": [s + 0.8 for s in sizes]}, squeeze=False)
    for ax, outcome in zip(axes[:, 0], outcomes):
        part = rows[rows["outcome"] == outcome].reset_index(drop=True)
        ypos = np.arange(len(part))[::-1]
        for y, (_, r) in zip(ypos, part.iterrows()):
            colour = ACCENT if r.get("estimator") == "adjusted" else INK
            if r["ci_low"] is not None and r["ci_high"] is not None and np.isfinite([r["ci_low"], r["ci_high"]]).all():
                ax.plot([r["ci_low"], r["ci_high"]], [y, y], color=colour, linewidth=2.2, solid_capstyle="butt")
            ax.plot([r["estimate"]], [y], marker="s", markersize=6.5, color=colour)
        ax.set_yticks(ypos, ticks(part), fontsize=8, parse_math=False)  # arm labels are user text
        ax.set_ylim(-0.7, len(part) - 0.3)
        ax.axvline(0, color=MUTED, linestyle="--", linewidth=1)
        _tidy(ax)
        ax.tick_params(axis="y", length=0)
        ax.tick_params(axis="x", labelsize=8)
        ax.set_title(labeler(outcome), fontsize=9, loc="left", fontweight="bold", parse_math=False)  # user text
    axes[-1, 0].set_xlabel(f"{what} with {level}% confidence interval, in each outcome's own units", fontsize=8)
    adjusted = rows.get("estimator", pd.Series(dtype=object)).eq("adjusted")
    handles = [Line2D([], [], color=INK, marker="s", linewidth=2.2, label="unadjusted")]
    if adjusted.any():
        handles.append(Line2D([], [], color=ACCENT, marker="s", linewidth=2.2, label="covariate-adjusted"))
    # The legend has a band of its own above the panels, so a long outcome title never runs under it.
    band = 0.3 / fig.get_figheight()
    fig.legend(handles=handles, loc="upper right", ncol=len(handles), frameon=False, fontsize=7.5,
               bbox_to_anchor=(1.0, 1.0))
    fig.tight_layout(rect=(0, 0, 1, 1 - band))
    return fig


def randomization_plot(null: np.ndarray, observed: float, *, label: str, statistic: str,
                       method: str, count_text: str):
    """Histogram of the statistic over the assignments, with the observed value marked."""
    fig, ax = _figure(2.6)
    null = np.asarray(null, dtype=float)
    null = null[np.isfinite(null)]
    bins = min(60, max(10, int(np.sqrt(null.size))))
    ax.hist(null, bins=bins, color="#c9d6de", edgecolor="white", linewidth=0.4)
    ax.axvline(observed, color=ACCENT, linewidth=2.0)
    ymax = ax.get_ylim()[1]
    ax.text(observed, ymax * 0.95, "  observed", color=ACCENT, fontsize=8, va="top",
            ha="left" if observed <= np.median(null) else "right")
    ax.set_yticks([])
    ax.spines["left"].set_visible(False)
    ax.grid(False)
    ax.set_title(label, fontsize=9, loc="left", parse_math=False)  # user text: a "$" is not math
    ax.set_xlabel(f"{statistic.replace('_', ' ')} under the null of no effect — {count_text}", fontsize=8)
    fig.tight_layout()
    return fig
