"""Headline precision rule, cards and escaping (report/headline.py)."""

from __future__ import annotations

from types import SimpleNamespace

import pytest

from report_kit.report.headline import decimals_for, fmt_at, headline_cards, points_box, registration_line


@pytest.mark.parametrize(("se", "decimals"), [(350.0, -1), (1.329, 1), (0.0277, 3), (12.0, 0), (None, 3),
                                              (0.0, 3), (9.99, 1)])
def test_precision_follows_the_standard_error(se, decimals):
    # two significant figures of the SE set the last decimal place (common practice)
    assert decimals_for(se) == decimals


def test_no_spurious_digits_for_money():
    # the case from the issue: 1,912.143 dollars with an SE in the hundreds
    assert fmt_at(1912.143, decimals_for(350.0)) == "1,910"
    assert fmt_at(3.200466, decimals_for(1.329), sign=True) == "+3.2"
    assert fmt_at(-0.0523, 3) == "−0.052"
    assert fmt_at(None, 2) == "—"
    with pytest.raises(TypeError):
        decimals_for("big")


def spec(**over):
    outcome = SimpleNamespace(column="y", label="Earnings <b>after</b> & before", family="primary", unit="dollars")
    base = dict(outcomes=(outcome,), analysis=SimpleNamespace(alpha=0.05, multiplicity="holm"),
                design=SimpleNamespace(arm_labels=("usual <i>care</i>", "coaching")), registration=None)
    base.update(over)
    return SimpleNamespace(**base)


RESULTS = {"tests": [{"outcome": "y", "p_value": 0.0123}],
           "multiplicity": [{"outcome": "y", "p_adjusted": 0.0246, "lead": True}]}
ROW = {"outcome": "y", "estimate": 1912.143, "std_error": 350.2, "ci_low": 1210.0, "ci_high": 2614.3,
       "mean_treated": 10412.143, "mean_control": 8500.0, "std_effect": 0.2468, "std_effect_method": "hedges_g"}


def test_card_shows_every_headline_number_and_escapes_user_text():
    out = headline_cards(RESULTS, spec(), lead_rows={"y": ROW})
    assert "Earnings &lt;b&gt;after&lt;/b&gt; &amp; before" in out
    assert "usual &lt;i&gt;care&lt;/i&gt;" in out and "<i>" not in out
    for text in ("+1,910 dollars", "95% CI 1,210 to 2,610", "10,410", "8,500", "p = 0.012",
                 "Holm-adjusted p = 0.025", "0.25", "Hedges' g"):
        assert text in out
    assert "1,912.143" not in out


def test_secondary_outcomes_get_no_card():
    other = spec()
    other.outcomes[0].family = "secondary"
    assert headline_cards(RESULTS, other, lead_rows={"y": ROW}) == ""


def test_points_box_and_registration_escape():
    assert points_box([]) == ""
    box = points_box([{"message": "a <script>x</script> b"}])
    assert "&lt;script&gt;" in box and "<script>" not in box
    reg = SimpleNamespace(id="REG-<1>", address="https://example.invalid/?a=1&b=<2>")
    line = registration_line(spec(registration=reg))
    assert "REG-&lt;1&gt;" in line and "a=1&amp;b=&lt;2&gt;" in line and "<a " not in line
    assert registration_line(spec()) == ""
