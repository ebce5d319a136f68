"""Figures of multi-arm and factorial runs (contrasts by outcome, cell means), in the report's look."""

from __future__ import annotations

from collections.abc import Callable

import pandas as pd
from matplotlib.figure import Figure

from report_kit.report.figures import INK, MUTED, _tidy, effect_plot


def contrast_plot(rows: pd.DataFrame, *, arm_label: Callable[[str], str], labeler: Callable[[str], str] = str,
                  level: int = 95):
    """One panel per outcome; a line per contrast ("arm vs reference"), unadjusted and adjusted."""
    def ticks(part: pd.DataFrame) -> list[str]:
        return [f"{arm_label(a)} vs {arm_label(b)}" for a, b in zip(part["arm"], part["reference"])]

    return effect_plot(rows, labeler=labeler, level=level, ticks=ticks, what="Difference")


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
    ax.set_xticks([0, 1], [f"{first} off", f"{first} on"], fontsize=8, parse_math=False)  # user text
    ax.set_xlim(-0.3, 1.3)
    ax.tick_params(axis="y", labelsize=8)
    ax.set_ylabel("mean outcome", fontsize=8)
    ax.set_title(label, fontsize=9, loc="left", fontweight="bold", parse_math=False)  # user text
    for text in ax.legend(frameon=False, fontsize=7.5).get_texts():
        text.set_parse_math(False)  # factor names are user text
    fig.tight_layout()
    return fig
