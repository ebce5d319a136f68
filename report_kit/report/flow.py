"""The participant-flow diagram (CONSORT-style stages, our own drawing style).

Owns one figure: enrolment stages declared in the spec (assessed, excluded
with reasons, randomized; each optional) above two arm columns (allocated,
received, lost, analysed) read from the ``flow`` section of ``results.json``.
Builds a :class:`matplotlib.figure.Figure` directly (no pyplot state).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

from matplotlib.figure import Figure
from matplotlib.patches import FancyBboxPatch

from report_kit.report.figures import INK

__all__ = ["flow_diagram"]

_FILL = "#eef2f5"
_SIDE = "#f7efe6"
_W, _H = 0.40, 0.085


def _box(ax, x: float, y: float, text: str, *, fill: str = _FILL, width: float = _W, height: float = _H) -> None:
    ax.add_patch(FancyBboxPatch((x - width / 2, y - height / 2), width, height,
                                boxstyle="round,pad=0.006,rounding_size=0.012",
                                facecolor=fill, edgecolor=INK, linewidth=0.8))
    ax.text(x, y, text, ha="center", va="center", fontsize=7.6, color=INK, linespacing=1.25)


def _plain(text: str) -> str:
    """User text as matplotlib shows it literally (a '$' would start mathtext)."""
    return str(text).replace("$", r"\$")


def _arrow(ax, x0: float, y0: float, x1: float, y1: float) -> None:
    ax.annotate("", xy=(x1, y1), xytext=(x0, y0),
                arrowprops={"arrowstyle": "-|>", "color": INK, "linewidth": 0.8, "shrinkA": 0, "shrinkB": 0})


def _arm_rows(flow: Sequence[Mapping], outcome: str) -> dict[str, Mapping]:
    rows = {r["arm"]: r for r in flow if r.get("outcome") == outcome}
    if set(rows) != {"treated", "control"}:
        raise ValueError(f"`flow` must hold a 'treated' and a 'control' row for outcome {outcome!r}")
    return rows


def _enrolment_boxes(ax, enrolment: Mapping | None, randomized: int, top: float) -> float:
    """Draw assessed / excluded / randomized; return the y of the randomized box."""
    y = top
    if enrolment and enrolment.get("assessed") is not None:
        _box(ax, 0.5, y, f"Assessed for eligibility\nn = {enrolment['assessed']:,}")
        excluded = enrolment.get("excluded") or []
        if excluded:
            total = sum(e["n"] for e in excluded)
            reasons = "\n".join(f"{_plain(e['reason'])}: {e['n']:,}" for e in excluded[:6])
            side_h = _H + 0.028 * min(len(excluded), 6)
            _box(ax, 0.835, y - 0.11, f"Excluded, n = {total:,}\n{reasons}", fill=_SIDE, width=0.3, height=side_h)
            ax.plot([0.5, 0.685], [y - 0.11, y - 0.11], color=INK, linewidth=0.8)
        _arrow(ax, 0.5, y - _H / 2, 0.5, y - 0.22 + _H / 2)
        y -= 0.22
    declared = None if not enrolment else enrolment.get("randomized")
    note = "" if declared is None or declared == randomized else f"\n(declared: {declared:,})"
    _box(ax, 0.5, y, f"Randomized\nn = {randomized:,}{note}")
    return y


def flow_diagram(flow: Sequence[Mapping], outcome: str, *, arm_labels: Sequence[str] = ("control", "treated"),
                 enrolment: Mapping | None = None, show_received: bool = False) -> Figure:
    """Participant flow for one outcome: enrolment stages, then allocation to analysis by arm.

    Parameters
    ----------
    flow : list of dict
        The ``flow`` section of ``results.json`` (rows by outcome and arm with
        ``randomized, received_treatment, lost, analysed``).
    outcome : str
        The outcome whose losses and analysed counts are drawn.
    arm_labels : (str, str)
        Words for the arms coded 0 and 1.
    enrolment : dict, optional
        The ``enrolment`` section (``assessed``, ``excluded``, ``randomized``).
    show_received : bool
        Also show how many in each arm received the treatment.
    """
    rows = _arm_rows(flow, outcome)
    stages = 1 + (1 if enrolment and enrolment.get("assessed") is not None else 0)
    top = 0.93
    bottom = top - 0.22 * (stages - 1) - 0.66 - _H / 2 - 0.02
    fig = Figure(figsize=(6.6, 4.4 * (1.0 - bottom)))
    ax = fig.add_axes((0, 0, 1, 1))
    ax.set_xlim(0, 1)
    ax.set_ylim(bottom, 1.0)
    ax.axis("off")
    randomized = rows["treated"]["randomized"] + rows["control"]["randomized"]
    y = _enrolment_boxes(ax, enrolment, randomized, top)
    control, treated = (_plain(a) for a in arm_labels)
    for x, arm, name in ((0.27, "treated", treated), (0.73, "control", control)):
        r = rows[arm]
        ax.plot([0.5, x, x], [y - _H / 2, y - _H / 2 - 0.04, y - _H / 2 - 0.04], color=INK, linewidth=0.8)
        _arrow(ax, x, y - _H / 2 - 0.04, x, y - 0.22 + _H / 2)
        received = f"\nreceived the treatment: {r['received_treatment']:,}" if show_received else ""
        _box(ax, x, y - 0.22, f"Allocated to {name}\nn = {r['randomized']:,}{received}")
        _arrow(ax, x, y - 0.22 - _H / 2, x, y - 0.44 + _H / 2)
        _box(ax, x, y - 0.44, f"Lost (outcome missing)\nn = {r['lost']:,}")
        _arrow(ax, x, y - 0.44 - _H / 2, x, y - 0.66 + _H / 2)
        _box(ax, x, y - 0.66, f"Analysed\nn = {r['analysed']:,}")
    for stage, yy in (("Enrolment" if stages > 1 else "", top), ("Allocation", y - 0.22),
                      ("Follow-up", y - 0.44), ("Analysis", y - 0.66)):
        if stage:
            ax.text(0.005, yy, stage, rotation=90, ha="left", va="center", fontsize=7, color="#6b7280")
    return fig
