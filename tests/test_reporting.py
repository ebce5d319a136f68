"""Presentation helpers of the report: number formatting and HTML tables (no Jupyter needed)."""

from __future__ import annotations

import pandas as pd

from report_kit.reporting import fmt, fmt_p, p_phrase, table_html


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
