"""Figures of multi-arm and factorial runs (contrasts by outcome, cell means), in the report's look."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.lines import Line2D

from report_kit.report.figures import ACCENT, INK, MUTED, _tidy


def contrast_plot(rows: pd.DataFrame, *, arm_label: Callable[[str], str], labeler: Callable[[str], str] = str,
                  level: int = 95):
    """One panel per outcome; a line per contrast (arm vs reference), unadjusted and adjusted."""
    rows = rows.reset_index(drop=True)
    outcomes = list(dict.fromkeys(rows["outcome"]))
    sizes = [int((rows["outcome"] == o).sum()) for o in outcomes]
    fig = Figure(figsize=(7.0, 0.42 * sum(sizes) + 0.75 * len(outcomes) + 0.3))
    axes = fig.subplots(len(outcomes), 1, gridspec_kw={"height_ratios": [s + 0.8 for s in sizes]}, squeeze=False)
    for ax, outcome in zip(axes[:, 0], outcomes):
        part = rows[rows["outcome"] == outcome].reset_index(drop=True)
        ypos = np.arange(len(part))[::-1]
        for y, (_, r) in zip(ypos, part.iterrows()):
            colour = ACCENT if r["estimator"] == "adjusted" else INK
            low, high = r["ci_low"], r["ci_high"]
            if low is not None and high is not None and np.isfinite([low, high]).all():
                ax.plot([low, high], [y, y], color=colour, linewidth=2.2, solid_capstyle="butt")
            ax.plot([r["estimate"]], [y], marker="s", markersize=6.5, color=colour)
        names = [f"{arm_label(a)} vs {arm_label(b)}" for a, b in zip(part["arm"], part["reference"])]
        ax.set_yticks(ypos, names, fontsize=8)
        ax.set_ylim(-0.7, len(part) - 0.3)
        ax.axvline(0, color=MUTED, linestyle="--", linewidth=1)
        _tidy(ax)
        ax.tick_params(axis="y", length=0)
        ax.tick_params(axis="x", labelsize=8)
        ax.set_title(labeler(outcome), fontsize=9, loc="left", fontweight="bold")
    axes[-1, 0].set_xlabel(f"Difference with {level}% confidence interval, in each outcome's own units", fontsize=8)
    handles = [Line2D([], [], color=INK, marker="s", linewidth=2.2, label="unadjusted"),
               Line2D([], [], color=ACCENT, marker="s", linewidth=2.2, label="covariate-adjusted")]
    axes[0, 0].legend(handles=handles, loc="lower right", bbox_to_anchor=(1.0, 1.0), ncol=2, frameon=False,
                      fontsize=7.5)
    fig.tight_layout()
    return fig


def cell_means_plot(means: dict, *, first: str, second: str, first_on: tuple, second_on: tuple, label: str):
    """Outcome mean in each cell of a 2 x 2 factorial: x = first factor off/on, one line per level of the second.

    ``means`` maps arm -> mean; ``first_on`` / ``second_on`` list the arms where each factor is on.
    Parallel lines mean no interaction.
    """
    fig = Figure(figsize=(5.0, 3.0))
    ax = fig.subplots()
    _tidy(ax)
    ax.grid(axis="y", color="#e3e5e8", linewidth=0.8)
    for on, colour, style in ((False, MUTED, "--"), (True, INK, "-")):
        xs, ys = [], []
        for x, first_state in enumerate((False, True)):
            arm = next((a for a in means if (a in first_on) == first_state and (a in second_on) == on), None)
            if arm is not None and means[arm] is not None:
                xs.append(x)
                ys.append(means[arm])
        ax.plot(xs, ys, color=colour, linestyle=style, marker="o", linewidth=2,
                label=f"{second} {'on' if on else 'off'}")
    ax.set_xticks([0, 1], [f"{first} off", f"{first} on"], fontsize=8)
    ax.set_xlim(-0.3, 1.3)
    ax.tick_params(axis="y", labelsize=8)
    ax.set_ylabel("mean outcome", fontsize=8)
    ax.set_title(label, fontsize=9, loc="left", fontweight="bold")
    ax.legend(frameon=False, fontsize=7.5)
    fig.tight_layout()
    return fig
