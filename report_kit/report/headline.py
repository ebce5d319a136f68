"""The headline of page 1: one short card per primary outcome, built from ``results.json``.

Owns the precision rule for reported effects (digits follow the standard
error) and the wording of the headline and of the points-to-weigh box. Returns
HTML with every user-supplied string escaped; computes no statistic.
"""

from __future__ import annotations

import html
import math


__all__ = ["STD_EFFECT_WORDS", "decimals_for", "fmt_at", "headline_cards", "points_box", "registration_line"]

#: How the report names each standardized effect and its denominator.
STD_EFFECT_WORDS = {
    "hedges_g": "Hedges' g (pooled SD, small-sample corrected)",
    "cohen_d": "Cohen's d (pooled SD)",
    "glass_delta": "Glass's delta (control-arm SD)",
}

MULTIPLICITY_WORDS = {"holm": "Holm", "bh": "Benjamini–Hochberg", "westfall_young": "Westfall–Young"}


def decimals_for(std_error) -> int:
    """Decimal places that show an effect with the precision its standard error supports.

    The standard error is kept to two significant figures and the effect, its
    interval and the arm means are rounded to the same decimal place (common
    practice in reporting measurements with their uncertainty). Negative
    values round to tens, hundreds, ... Without a usable standard error, 3.
    """
    if std_error is None or isinstance(std_error, bool):
        return 3
    try:
        se = float(std_error)
    except (TypeError, ValueError) as err:
        raise TypeError(f"`std_error` must be a number or None; got {std_error!r}") from err
    if not math.isfinite(se) or se <= 0:
        return 3
    return min(6, 1 - math.floor(math.log10(se)))


def fmt_at(value, decimals: int, *, sign: bool = False) -> str:
    """``value`` rounded to ``decimals`` places (negative: to tens, hundreds...) with thousands separators."""
    if value is None or not math.isfinite(value):
        return "—"
    rounded = round(float(value), decimals)
    text = f"{rounded:{'+' if sign else ''},.{max(decimals, 0)}f}"
    return text.replace("-", "−")


def _p(p) -> str:
    if p is None:
        return "—"
    return "p < 0.001" if p < 0.001 else f"p = {p:.3f}"


def _unit(outcome) -> str:
    return f" {outcome.unit}" if getattr(outcome, "unit", "") else ""


def headline_cards(results: dict, spec, *, lead_rows: dict[str, dict]) -> str:
    """HTML of one card per primary outcome (``lead_rows``: outcome column -> its lead estimate row)."""
    tests = {t["outcome"]: t for t in results.get("tests") or []}
    adjusted = {m["outcome"]: m["p_adjusted"] for m in results.get("multiplicity") or [] if m.get("lead")}
    level = round(100 * (1 - spec.analysis.alpha))
    control, treated = (html.escape(a) for a in spec.design.arm_labels)
    method = spec.analysis.multiplicity
    cards = []
    for outcome in spec.outcomes:
        row = lead_rows.get(outcome.column)
        if outcome.family != "primary" or row is None:
            continue
        k = decimals_for(row.get("std_error"))
        unit = html.escape(_unit(outcome))
        adj = adjusted.get(outcome.column)
        adj_text = ("" if adj is None or method == "none"
                    else f"; {MULTIPLICITY_WORDS.get(method, method)}-adjusted {_p(adj)}")
        std = row.get("std_effect")
        std_text = ("" if std is None else
                    f'<p class="rk-hl-std">In standard-deviation units: <b>{std:.2f}</b> '
                    f'({html.escape(STD_EFFECT_WORDS.get(row.get("std_effect_method"), ""), quote=False)})</p>')
        cards.append(
            f'<div class="rk-headline"><p class="rk-hl-title">{html.escape(outcome.label)}</p>'
            f'<p class="rk-hl-means">Mean, {treated}: <b>{fmt_at(row.get("mean_treated"), k)}</b>{unit} · '
            f'mean, {control}: <b>{fmt_at(row.get("mean_control"), k)}</b>{unit}</p>'
            f'<p class="rk-hl-effect">Effect: <b>{fmt_at(row.get("estimate"), k, sign=True)}{unit}</b> '
            f'({level}% CI {fmt_at(row.get("ci_low"), k)} to {fmt_at(row.get("ci_high"), k)}; '
            f'standard error {fmt_at(row.get("std_error"), k)})</p>'
            f'<p class="rk-hl-p">Randomization test {_p(tests.get(outcome.column, {}).get("p_value"))}'
            f'{adj_text}</p>{std_text}</div>')
    return "".join(cards)


def points_box(points: list[dict]) -> str:
    """Inside of the points-to-weigh box (escaped HTML), or '' when there is nothing to weigh."""
    if not points:
        return ""
    items = "".join(f"<li>{html.escape(p['message'])}</li>" for p in points)
    return f'<b>Points to weigh</b><ul class="rk-points">{items}</ul>'


def registration_line(spec) -> str:
    """'Registered as ID (address)' as escaped HTML text, or '' without a registration."""
    reg = getattr(spec, "registration", None)
    if reg is None:
        return ""
    where = f" ({html.escape(reg.address)})" if reg.address else ""
    return f'<p class="rk-registration">Registered as <b>{html.escape(reg.id)}</b>{where}.</p>'
