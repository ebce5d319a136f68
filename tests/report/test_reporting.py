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


def test_run_view_selects_what_the_analysis_stored(tmp_path):
    """The view only selects rows by the stored ``role``; it never decides a role itself."""
    from report_kit.inputs.spec import load_spec
    from report_kit.report import RunView
    from tests.conftest import copy_project

    spec = load_spec(copy_project("tutoring-clubs", tmp_path))
    first, second = spec.outcomes[0].column, spec.outcomes[1].column

    def row(outcome, estimand, role, subgroup=None):
        return {"outcome": outcome, "estimand": estimand, "subgroup": subgroup, "role": role, "estimate": 1.0}

    results = {"estimates": [
        row(second, "ITT", "lead"), row(first, "ITT", "check"), row(first, "ITT", "adjusted"),
        row(first, "ITT", "lead"), row("attended", "ITT", "take_up"), row(first, "CACE", ""),
        row(first, "subgroup ATE", "lead", subgroup="g=a"),
    ]}
    view = RunView(run_dir=tmp_path, project_dir=tmp_path, results=results, spec=spec)
    main = view.main_estimates()
    assert list(zip(main["outcome"], main["role"])) == [
        (first, "lead"), (first, "adjusted"), (first, "check"), (second, "lead")]
    assert list(view.lead_estimates()["outcome"]) == [first, second]
    assert list(zip(view.take_up()["outcome"], view.take_up()["estimand"])) == [("attended", "ITT"), (first, "CACE")]
    assert view.plan == {"locked": False, "changes": []} and view.changes is None
    assert view.level == round(100 * (1 - spec.analysis.alpha))


def test_fmt_count_short_and_huge():
    from report_kit.report.view import fmt_count

    assert fmt_count("924", 2.9656) == "924"
    assert fmt_count(None, 4301.3) == "≈ 2.0 × 10^4,301"
    assert fmt_count(None, 6.99999) == "≈ 1.0 × 10^7"



def test_unknown_renderer_is_refused_before_any_work():
    import pytest

    from report_kit.report.render import require_renderer

    with pytest.raises(ValueError, match="`renderer` must be one of"):
        require_renderer("latex")
    require_renderer("builtin")  # the built-in renderer always runs


def test_rounding_noise_of_a_search_is_shown_as_zero():
    """An interval end found at -3e-13 on a 0/1 outcome reads 0.000; a genuinely small p-value keeps its digits."""
    frame = pd.DataFrame({"low": [-0.05, -2.95e-13, 0.222], "p": [1e-5, 0.5, 0.9]})
    text = table_html(frame)
    assert "e-13" not in text and '<td class="num">0.000</td>' in text
    assert "1e-05" in text   # 1e-5 is far above 1e-9 of the column's largest value
