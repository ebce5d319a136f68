"""What the notebooks show: the view of a run, figures, notebook execution and the renderers.

The report notebooks import this package only: :class:`RunView` reads a run
folder (``results.json``, the recorded spec, ``changes.json``), the helpers
format numbers, escape user text and show tables and figures. Nothing here
computes a statistic. Names load on first use, so the command line that only
executes and renders the notebook does not import the plotting stack.
"""

from __future__ import annotations

import importlib

_PUBLIC = {
    "RunView": "view", "ROLE_ORDER": "view", "callout": "view", "cautions": "view", "esc": "view",
    "fmt": "view", "fmt_count": "view", "fmt_p": "view", "p_phrase": "view", "plan_status": "view", "say": "view",
    "show_figure": "view", "show_table": "view", "table_html": "view",
    "decimals_for": "headline", "fmt_at": "headline", "headline_cards": "headline", "points_box": "headline",
    "registration_line": "headline", "flow_diagram": "flow",
    "show_opening": "view", "show_outcomes": "view", "ASSIGNMENT_CHECK_WORDS": "view",
    "effect_plot": "figures", "randomization_plot": "figures", "plot_balance": "figures_checks",
    "cell_means_plot": "figures_arms", "contrast_plot": "figures_arms",
}

__all__ = sorted(_PUBLIC)


def __getattr__(name: str):
    if name in _PUBLIC:
        return getattr(importlib.import_module(f"{__name__}.{_PUBLIC[name]}"), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_PUBLIC))
