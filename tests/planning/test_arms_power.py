"""Power of one contrast in a K-arm design against statsmodels' two-sample t power."""

from __future__ import annotations

import pytest
from statsmodels.stats.power import TTestIndPower

from report_kit.planning.arms import planned_arm_power


@pytest.mark.parametrize("n_arms, contrasts, m", [(3, "reference", 2), (4, "pairwise", 6), (2, "reference", 1)])
def test_mde_matches_statsmodels_at_bonferroni_level(n_arms, contrasts, m):
    # Reference: statsmodels TTestIndPower (noncentral t, both tails) with nobs1 = N / K per arm,
    # ratio 1, at alpha / m; the MDE in SD units is the solved effect size (Cohen's d).
    res = planned_arm_power(n_units=240, n_arms=n_arms, contrasts=contrasts, sd=2.0, effect=0.8)
    n = 240 / n_arms
    d = TTestIndPower().solve_power(effect_size=None, nobs1=n, alpha=0.05 / m, power=0.8, ratio=1.0)
    assert res["n_contrasts"] == m and res["alpha"] == pytest.approx(0.05 / m)
    assert res["mde_std"] == pytest.approx(d, rel=1e-6)
    assert res["mde"] == pytest.approx(2.0 * d, rel=1e-6)
    expected = TTestIndPower().power(effect_size=0.4, nobs1=n, alpha=0.05 / m, ratio=1.0)
    assert res["power"] == pytest.approx(expected, rel=1e-6)


def test_more_arms_need_larger_effects():
    three = planned_arm_power(n_units=300, n_arms=3)["mde"]
    five = planned_arm_power(n_units=300, n_arms=5)["mde"]
    unadjusted = planned_arm_power(n_units=300, n_arms=5, adjust="none")["mde"]
    assert three < unadjusted < five


@pytest.mark.parametrize("kwargs, message", [
    ({"n_arms": 1}, "`n_arms` must be a whole number"),
    ({"n_arms": 3, "n_units": -5}, "`n_units` must be a positive number"),
    ({"n_arms": 3, "contrasts": "all"}, "`contrasts` must be one of"),
    ({"n_arms": 3, "adjust": "holm"}, "`adjust` must be one of"),
])
def test_bad_arguments(kwargs, message):
    kwargs = {"n_units": 100, **kwargs}
    with pytest.raises(ValueError, match=message):
        planned_arm_power(**kwargs)
    with pytest.raises(TypeError, match="`n_arms`"):
        planned_arm_power(n_units=100, n_arms=3.0)
