"""Figures for the design checks (balance).

Owns: the standardized-difference plot. Builds :class:`matplotlib.figure.Figure`
objects directly (no pyplot state), so it is safe in notebooks and workers;
the caller saves or displays the figure.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

from matplotlib.figure import Figure

from report_kit.checks.balance import SMD_THRESHOLDS
from report_kit.report.figures import INK

__all__ = ["plot_balance"]

# our own palette: slate ink, a sand band, three flag tones
_INK = INK  # the report's one ink colour (figures.py)
_BAND = "#efe6d2"
_TONES = {"small": "#2a7f7a", "moderate": "#c98a1b", "large": "#b2432f"}


def _rows(balance_dict) -> Sequence[Mapping]:
    if isinstance(balance_dict, Mapping):
        if "covariates" not in balance_dict:
            raise ValueError(
                "`balance_dict` must have a 'covariates' list (the results.json balance section)"
            )
        return balance_dict["covariates"]
    return balance_dict


def _omnibus_note(balance_dict) -> str | None:
    omni = balance_dict.get("omnibus") if isinstance(balance_dict, Mapping) else None
    if not omni or omni.get("p_value") is None:
        return None
    method = "exact" if omni.get("method") == "exact" else f"{omni.get('draws')} random draws"
    return f"Omnibus (Mahalanobis) randomization p = {omni['p_value']:.3f}, {method}"


def plot_balance(balance_dict) -> Figure:
    """Dot plot of standardized mean differences by covariate.

    Parameters
    ----------
    balance_dict : dict or list of dict
        The ``results.json`` ``balance`` section (``{covariates, omnibus}``)
        or just its ``covariates`` list.

    Returns
    -------
    matplotlib.figure.Figure
        One row per covariate, top to bottom in the given order; a shaded
        band marks ``|d| <= 0.1`` and dotted lines ``|d| = 0.25`` (common-
        practice reference values, not tests). Covariates whose difference is
        undefined show "n/a".
    """
    rows = list(_rows(balance_dict))
    small, large = SMD_THRESHOLDS
    fig = Figure(figsize=(6.4, 1.4 + 0.38 * max(len(rows), 1)), layout="constrained")
    ax = fig.add_subplot()
    values = [r.get("std_diff") for r in rows]
    reach = max([abs(v) for v in values if v is not None] + [large]) * 1.25
    ax.axvspan(-small, small, color=_BAND, zorder=0)
    for x in (-large, large):
        ax.axvline(x, color=_INK, linestyle=":", linewidth=0.9, zorder=1)
    ax.axvline(0, color=_INK, linewidth=0.8, zorder=1)
    for i, (row, v) in enumerate(zip(rows, values)):
        y = len(rows) - 1 - i
        if v is None:
            ax.text(0, y, "n/a", ha="center", va="center", color=_INK, fontsize=8, style="italic")
            continue
        tone = _TONES.get(row.get("flag"), _INK)
        ax.hlines(y, 0, v, color=tone, linewidth=1.6, zorder=2)
        ax.plot([v], [y], marker="D", markersize=6, color=tone, zorder=3, linestyle="none")
    ax.set_yticks(range(len(rows)), [r.get("name", "") for r in reversed(rows)], parse_math=False)
    ax.set_ylim(-0.7, max(len(rows), 1) - 0.3)
    ax.set_xlim(-reach, reach)
    ax.set_xlabel("Standardized difference, treated minus control (pooled SD units)")
    ax.set_title("Baseline balance", loc="left", fontsize=11, color=_INK)
    for side in ("top", "right", "left"):
        ax.spines[side].set_visible(False)
    ax.tick_params(axis="y", length=0)
    caption = f"Band: |d| \u2264 {small}; dotted: |d| = {large} (common practice, not tests)."
    note = _omnibus_note(balance_dict)
    fig.supxlabel(caption if note is None else f"{note}.\n{caption}", fontsize=7, color=_INK)
    if not rows:
        ax.text(0, 0, "no pre-specified covariates", ha="center", va="center", color=_INK)
    return fig
