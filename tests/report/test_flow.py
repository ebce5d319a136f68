"""The participant-flow diagram (report/flow.py)."""

from __future__ import annotations

import io

import pytest

from report_kit.report.flow import flow_diagram

FLOW = [
    {"outcome": "y", "arm": "treated", "randomized": 162, "received_treatment": 121, "lost": 10, "analysed": 152},
    {"outcome": "y", "arm": "control", "randomized": 158, "received_treatment": 11, "lost": 15, "analysed": 143},
]


def texts(fig) -> str:
    fig.savefig(io.BytesIO(), format="png")   # draws every text (a bad '$' would fail here)
    return "\n".join(t.get_text() for ax in fig.axes for t in ax.texts)


def test_every_stage_and_count_is_drawn():
    enrolment = {"assessed": 351, "excluded": [{"reason": "no consent $5 offer", "n": 19},
                                               {"reason": "moved", "n": 12}], "randomized": 320}
    out = texts(flow_diagram(FLOW, "y", arm_labels=("no club", "club"), enrolment=enrolment, show_received=True))
    for text in ("Assessed for eligibility\nn = 351", "Excluded, n = 31", r"no consent \$5 offer: 19",
                 "Randomized\nn = 320", "Allocated to club\nn = 162", "Allocated to no club\nn = 158",
                 "received the treatment: 121", "n = 10", "n = 15", "Analysed\nn = 152", "Analysed\nn = 143"):
        assert text in out, text


def test_without_enrolment_the_diagram_starts_at_randomization():
    out = texts(flow_diagram(FLOW, "y"))
    assert "Assessed" not in out and "Randomized\nn = 320" in out and "received" not in out
    declared = texts(flow_diagram(FLOW, "y", enrolment={"randomized": 300}))
    assert "(declared: 300)" in declared


def test_an_outcome_without_both_arms_is_misuse():
    with pytest.raises(ValueError, match="'treated' and a 'control' row for outcome 'z'"):
        flow_diagram(FLOW, "z")
