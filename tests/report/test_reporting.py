"""Presentation helpers of the report: number formatting and HTML tables (no Jupyter needed)."""

from __future__ import annotations

import pandas as pd

from report_kit.report.view import fmt, fmt_p, p_phrase, table_html


def test_fmt_numbers_and_missing():
    assert fmt(None) == "—" and fmt(float("nan")) == "—"
    assert fmt(3) == "3" and fmt(12345) == "12,345"
    assert fmt(1.23456) == "1.235" and fmt(-0.5) == "-0.500"
    assert fmt(250000.4) == "250,000"
    assert fmt(0.000123) == "0.000123"


def test_p_value_wording():
    assert fmt_p(None) == "—" and fmt_p(0.0004) == "< 0.001" and fmt_p(0.0583) == "0.058"
    assert p_phrase(0.0004) == "p < 0.001" and p_phrase(0.0583) == "p = 0.058"


def test_table_html_escapes_and_marks_numbers():
    html = table_html(pd.DataFrame({"Name": ["<b>x</b>"], "Value": [1.5]}), caption="A & B")
    assert "&lt;b&gt;x&lt;/b&gt;" in html and "A &amp; B" in html
    assert '<td class="num">1.500</td>' in html and "rk-short" in html
    long = table_html(pd.DataFrame({"v": range(11)}))
    assert "rk-long" in long and long.count("<tr>") == 12


def test_cautions_state_the_plan_lock():
    from report_kit.report.view import cautions

    assert "not locked" in cautions({"locked": False})[-1]
    kept = cautions({"locked": True, "locked_at": "2026-11-30T10:00:00Z", "changes": []})[-1]
    assert "locked on 2026-11-30T10:00:00Z and unchanged since" in kept
    moved = cautions({"locked": True, "locked_at": "x", "changes": [{"key": "analysis.alpha"}]})[-1]
    assert "1 key(s) changed since" in moved
    assert any("not proof of benefit or of safety" in c for c in cautions({"locked": False}))


def test_estimate_roles():
    from report_kit.report.view import estimate_role

    seen: set = set()
    rows = [
        {"outcome": "y", "estimand": "ITT", "subgroup": None, "estimator": "unadjusted", "method": "cr2"},
        {"outcome": "y", "estimand": "ITT", "subgroup": None, "estimator": "unadjusted", "method": "horvitz_thompson"},
        {"outcome": "y", "estimand": "ITT", "subgroup": None, "estimator": "adjusted", "method": "lin_cr2"},
        {"outcome": "y", "estimand": "CACE", "subgroup": None, "estimator": "unadjusted", "method": "wald_delta"},
    ]
    assert [estimate_role(r, seen) for r in rows] == ["lead", "check", "adjusted", ""]


def test_unknown_renderer_is_refused_before_any_work():
    import pytest

    from report_kit.report.render import require_renderer

    with pytest.raises(ValueError, match="`renderer` must be one of"):
        require_renderer("latex")
    require_renderer("builtin")  # the built-in renderer always runs
