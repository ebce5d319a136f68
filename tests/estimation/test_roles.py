"""Which estimate leads: the rule stored as ``role`` in results.json."""

from __future__ import annotations

import pytest

from report_kit.estimation.roles import estimate_roles


def _row(outcome, estimand, estimator, method, subgroup=None):
    return {"outcome": outcome, "estimand": estimand, "subgroup": subgroup, "estimator": estimator,
            "method": method}


def test_lead_adjusted_check_and_take_up():
    rows = [
        _row("y", "ITT", "unadjusted", "cr2"),
        _row("y", "ITT", "unadjusted", "horvitz_thompson"),
        _row("y", "ITT", "adjusted", "lin_cr2"),
        _row("y", "CACE", "unadjusted", "wald_delta"),
        _row("took", "ITT", "unadjusted", "cr2"),
        _row("y", "subgroup ATE", "unadjusted", "cr2", subgroup="g=a"),
        _row("y", "subgroup ATE", "unadjusted", "cr2", subgroup="g=b"),
        _row("y", "ITT", "unadjusted", "neyman"),  # a second design-based row does not lead again
    ]
    assert estimate_roles(rows, take_up_column="took") == [
        "lead", "check", "adjusted", "", "take_up", "lead", "lead", ""]
    assert estimate_roles(rows)[4] == "lead"  # without compliance the column is an ordinary outcome


def test_misuse_is_a_type_error():
    with pytest.raises(TypeError, match="`rows` must be a sequence"):
        estimate_roles("y")
    with pytest.raises(TypeError, match=r"`rows\[0\]` must be a mapping"):
        estimate_roles([1])
    with pytest.raises(TypeError, match="`take_up_column`"):
        estimate_roles([], take_up_column=3)


def test_each_contrast_and_factorial_effect_has_its_own_lead():
    def arm_row(arm, estimator, method, *, reference="none", factor=None, estimand="ATE"):
        return {**_row("y", estimand, estimator, method), "arm": arm, "reference": reference, "factor": factor}

    rows = [
        arm_row("plain", "unadjusted", "neyman"),
        arm_row("compare", "unadjusted", "neyman"),
        arm_row("plain", "adjusted", "lin_arms"),
        arm_row("plain", "unadjusted", "horvitz_thompson"),
        arm_row(None, "unadjusted", "factorial_neyman", reference=None, factor="text", estimand="main effect"),
        arm_row(None, "unadjusted", "factorial_neyman", reference=None, factor="call", estimand="main effect"),
    ]
    assert estimate_roles(rows) == ["lead", "lead", "adjusted", "check", "lead", "lead"]
