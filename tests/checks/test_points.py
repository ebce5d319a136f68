"""Rules of the points to weigh (checks/points.py); each rule must fire and must stay quiet."""

from __future__ import annotations

import pytest

from report_kit.checks.points import ATTRITION_GAP, points_to_weigh


def base(**over) -> dict:
    results = {
        "design": {"assignment_check": "reproduced", "n_units": 40},
        "estimates": [{"outcome": "score", "estimand": "ATE", "estimator": "unadjusted", "subgroup": None,
                       "estimate": 1.0, "std_error": 0.5, "blocks_left_out": 0}],
        "compliance": None,
        "attrition": {"per_outcome": [{"outcome": "score", "rate_treated": 0.05, "rate_control": 0.04,
                                       "p_value": 0.6}]},
    }
    results.update(over)
    return results


LOCKED = {"locked": True, "locked_at": "2026-11-01T00:00:00Z", "changes": [], "lock_intact": True,
          "data_changed": []}


def kinds(points):
    return [p["kind"] for p in points]


def test_a_clean_study_has_nothing_to_weigh():
    assert points_to_weigh(base(), plan=LOCKED) == []


def test_differential_attrition_by_test_and_by_gap():
    tested = base(attrition={"per_outcome": [{"outcome": "score", "rate_treated": 0.082, "rate_control": 0.005,
                                              "p_value": 0.0004}]})
    out = points_to_weigh(tested, label={"score": "Reading score"}.get, arm_labels=("usual classes", "clubs"))
    assert kinds(out) == ["differential_attrition"]
    assert "Reading score" in out[0]["message"] and "8.2% of the clubs arm" in out[0]["message"]
    assert "0.5% of the usual classes arm" in out[0]["message"] and "p < 0.001" in out[0]["message"]
    gap = base(attrition={"per_outcome": [{"outcome": "score", "rate_treated": 0.10,
                                           "rate_control": 0.10 - ATTRITION_GAP, "p_value": 0.2}]})
    assert kinds(points_to_weigh(gap)) == ["differential_attrition"]
    small = base(attrition={"per_outcome": [{"outcome": "score", "rate_treated": 0.10, "rate_control": 0.08,
                                             "p_value": 0.2}]})
    assert points_to_weigh(small) == []


def test_weak_first_stage_uses_the_take_up_row():
    rows = base()["estimates"] + [{"outcome": "went", "estimand": "ITT", "estimator": "unadjusted",
                                   "subgroup": None, "estimate": 0.06, "std_error": 0.03}]
    weak = points_to_weigh(base(estimates=rows, compliance={"received": "went"}))
    assert kinds(weak) == ["weak_first_stage"] and "F = 4.0" in weak[0]["message"]
    rows[-1]["estimate"] = 0.6   # F = 400
    assert points_to_weigh(base(estimates=rows, compliance={"received": "went"})) == []


@pytest.mark.parametrize(("status", "kind"), [("mismatch", "assignment_mismatch"),
                                              ("not_checked", "assignment_not_checked")])
def test_assignment_not_reproduced(status, kind):
    out = points_to_weigh(base(design={"assignment_check": status, "n_units": 40}))
    assert kinds(out) == [kind]


def test_plan_rules():
    assert kinds(points_to_weigh(base(), plan={"locked": False})) == ["plan_not_locked"]
    changed = dict(LOCKED, changes=[{"key": "analysis.alpha"}, {"key": "outcomes[score].family"}],
                   lock_intact=False, data_changed=["data/endline.csv"])
    out = points_to_weigh(base(), plan=changed)
    assert kinds(out) == ["plan_deviations", "plan_lock_edited", "data_changed_since_lock"]
    assert "analysis.alpha, outcomes[score].family" in out[0]["message"]
    assert "data/endline.csv" in out[2]["message"]
    assert points_to_weigh(base(), plan=None) == []


def test_blocks_left_out_name_the_estimate_and_subgroup():
    rows = base()["estimates"] + [{"outcome": "score", "estimand": "subgroup ATE", "estimator": "unadjusted",
                                   "subgroup": "gender=F", "estimate": 2.0, "std_error": 1.0,
                                   "blocks_left_out": 2}]
    out = points_to_weigh(base(estimates=rows), label={"score": "Reading score"}.get)
    assert kinds(out) == ["blocks_left_out"]
    assert out[0]["subgroup"] == "gender=F"
    assert "subgroup ATE estimate for Reading score, subgroup gender=F only" in out[0]["message"]


def test_declared_enrolment_must_match_the_data():
    assert kinds(points_to_weigh(base(), enrolled=41)) == ["enrolment_mismatch"]
    assert points_to_weigh(base(), enrolled=40) == []


def test_misuse():
    with pytest.raises(ValueError, match="`results` must be a mapping"):
        points_to_weigh([])
    with pytest.raises(ValueError, match="`arm_labels`"):
        points_to_weigh(base(), arm_labels=("a",))
