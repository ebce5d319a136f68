"""Tests of report_kit.checks.attrition."""

from __future__ import annotations

import itertools
import json
import statistics
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from tests.checks.draws import exact_complete, mc_complete, split
from report_kit.checks import attrition
from report_kit.errors import DataError, ReportKitWarning
from report_kit.inputs.model import AnalysisSpec, DataSpec, DesignSpec, OutcomeSpec, Spec, Study

NAN = np.nan


# ---------------------------------------------------------------------------
# Lee bounds: worked examples computed on paper
# ---------------------------------------------------------------------------


def test_lee_bounds_integer_trim_worked_example():
    # By hand (Lee 2009 trimming): treated 10/10 observed, values 1..10;
    # control 8/10 observed, values 2,4,4,6,6,8,8,10 (mean 48/8 = 6).
    # q = (1.0 - 0.8)/1.0 = 0.2 -> drop 2 of the 10 treated values.
    # lower: mean(1..8) - 6 = 4.5 - 6 = -1.5; upper: mean(3..10) - 6 = 6.5 - 6 = 0.5.
    y = np.array(list(range(1, 11)) + [2, 4, 4, 6, 6, 8, 8, 10, NAN, NAN], dtype=float)
    z = np.array([1] * 10 + [0] * 10)
    res = attrition.lee_bounds(y, z)
    assert res["lower"] == pytest.approx(-1.5, abs=1e-12)
    assert res["upper"] == pytest.approx(0.5, abs=1e-12)
    assert res["trimmed_arm"] == "treated"
    assert res["trim_share"] == pytest.approx(0.2)


def test_lee_bounds_fractional_trim_worked_example():
    # By hand: treated 4/4 observed, values 0,1,2,3; control 5 of 8 observed,
    # values 1,1,1,1,1 (mean 1). p1 = 1, p0 = 5/8, keep share 5/8 of 4 = 2.5 values.
    # lowest 2.5: (0 + 1 + 0.5*2)/2.5 = 0.8 -> lower = 0.8 - 1 = -0.2
    # highest 2.5: (3 + 2 + 0.5*1)/2.5 = 2.2 -> upper = 2.2 - 1 = 1.2
    y = np.array([0, 1, 2, 3, 1, 1, 1, 1, 1, NAN, NAN, NAN], dtype=float)
    z = np.array([1] * 4 + [0] * 8)
    res = attrition.lee_bounds(y, z)
    assert (res["lower"], res["upper"]) == (pytest.approx(-0.2), pytest.approx(1.2))
    assert res["trim_share"] == pytest.approx(3 / 8)


def test_lee_bounds_trim_control_worked_example():
    # By hand: treated 2 of 4 observed (5, 7; mean 6); control 4/4 observed 1,2,3,4.
    # q = (1 - 0.5)/1 = 0.5: keep 2 control values. Highest two mean 3.5, lowest two 1.5.
    # lower = 6 - 3.5 = 2.5; upper = 6 - 1.5 = 4.5.
    y = np.array([5, 7, NAN, NAN, 1, 2, 3, 4], dtype=float)
    z = np.array([1, 1, 1, 1, 0, 0, 0, 0])
    res = attrition.lee_bounds(y, z)
    assert (res["lower"], res["upper"]) == (pytest.approx(2.5), pytest.approx(4.5))
    assert res["trimmed_arm"] == "control"


def test_lee_bounds_collapse_when_attrition_is_equal():
    # Identity (Lee 2009): with equal observed shares nothing is trimmed and both
    # bounds equal the difference in observed means (computed with `statistics`).
    rng = np.random.default_rng(21)
    y = rng.normal(size=40)
    z = np.array([1, 0] * 20)
    y[[0, 2, 4, 1, 3, 5]] = NAN       # 3 missing per arm (even = treated)
    res = attrition.lee_bounds(y, z)
    diff = statistics.mean(y[(z == 1) & ~np.isnan(y)]) - statistics.mean(y[(z == 0) & ~np.isnan(y)])
    assert res["lower"] == pytest.approx(diff, rel=1e-12)
    assert res["upper"] == pytest.approx(diff, rel=1e-12)
    assert res["trimmed_arm"] is None and res["trim_share"] == 0.0


def test_lee_bounds_swap_arms_negates_and_reverses():
    rng = np.random.default_rng(4)
    y = rng.normal(size=30)
    z = np.array([1] * 15 + [0] * 15)
    y[[1, 3, 20]] = NAN
    a = attrition.lee_bounds(y, z)
    b = attrition.lee_bounds(y, 1 - z)
    assert b["lower"] == pytest.approx(-a["upper"]) and b["upper"] == pytest.approx(-a["lower"])
    assert a["lower"] <= a["upper"]


def test_lee_bounds_explicit_observed_mask_and_empty_arm():
    y = np.array([1.0, 2.0, 3.0, 4.0])
    z = np.array([1, 1, 0, 0])
    res = attrition.lee_bounds(y, z, observed=[1, 1, 1, 0])
    assert res["observed_share_control"] == 0.5
    with pytest.warns(ReportKitWarning, match="no observed outcome"):
        res = attrition.lee_bounds(y, z, observed=[0, 0, 1, 1])
    assert res["lower"] is None and res["upper"] is None
    with pytest.raises(DataError, match="`y` must be finite wherever `observed` is true"):
        attrition.lee_bounds([1.0, NAN, 3.0, 4.0], z, observed=[1, 1, 1, 1])


# ---------------------------------------------------------------------------
# Manski bounds
# ---------------------------------------------------------------------------


def test_manski_bounds_worked_example():
    # By hand (Manski 1990), range [0, 10]:
    # treated 4 units, observed 2, 4 (sum 6): E[Y1] in [6/4 + 0, 6/4 + 0.5*10] = [1.5, 6.5]
    # control 4 units, observed 1, 3, 5 (sum 9): E[Y0] in [2.25, 2.25 + 0.25*10] = [2.25, 4.75]
    # ATE in [1.5 - 4.75, 6.5 - 2.25] = [-3.25, 4.25]; width 10*(2 - 0.5 - 0.75) = 7.5
    y = np.array([2, 4, NAN, NAN, 1, 3, 5, NAN], dtype=float)
    z = np.array([1, 1, 1, 1, 0, 0, 0, 0])
    res = attrition.manski_bounds(y, z, None, 0, 10)
    assert (res["lower"], res["upper"]) == (pytest.approx(-3.25), pytest.approx(4.25))
    assert res["upper"] - res["lower"] == pytest.approx(7.5)


def test_manski_bounds_without_attrition_equal_the_mean_difference():
    y = np.array([2.0, 4.0, 1.0, 3.0])
    z = np.array([1, 1, 0, 0])
    res = attrition.manski_bounds(y, z, None, -100, 100)
    assert res["lower"] == pytest.approx(1.0) and res["upper"] == pytest.approx(1.0)


def test_manski_validation_messages():
    y = np.array([2.0, 40.0, 1.0, 3.0])
    z = np.array([1, 1, 0, 0])
    with pytest.raises(DataError, match=r"observed treated outcomes must lie in the declared range \[0.0, 10.0\]"):
        attrition.manski_bounds(y, z, None, 0, 10)
    with pytest.raises(ValueError, match="`low` must be finite and below `high`"):
        attrition.manski_bounds(y, z, None, 5, 5)


# ---------------------------------------------------------------------------
# differential attrition test
# ---------------------------------------------------------------------------


def hypergeom_two_sided(total: int, missing: int, n1: int, observed: int) -> float:
    """Two-sided p-value ordered by distance from the mean, from scipy.stats.hypergeom."""
    dist = stats.hypergeom(total, missing, n1)
    support = np.arange(max(0, n1 - (total - missing)), min(n1, missing) + 1)
    far = np.abs(support - dist.mean()) >= abs(observed - dist.mean()) - 1e-9
    return float(dist.pmf(support[far]).sum())


@pytest.mark.parametrize("missing_idx", [[0, 1, 2, 6], [0, 6, 7], [0, 1, 2, 3, 4, 5]])
def test_exact_attrition_test_matches_hypergeometric(missing_idx):
    # Reference: scipy.stats.hypergeom. Under complete randomization the number
    # of attrited units in the treated arm is hypergeometric; |r1 - r0| is a
    # monotone function of |c1 - E c1|.
    n, n1 = 12, 6
    z = np.array([1] * 6 + [0] * 6)
    miss = np.zeros(n)
    miss[missing_idx] = 1
    res = attrition.attrition_test(miss, z, split(exact_complete(n, n1), 100), "exact")
    c1 = int(miss[z == 1].sum())
    assert res.draws == 924
    assert res.p_value[0] == pytest.approx(hypergeom_two_sided(n, int(miss.sum()), n1, c1), rel=1e-12)


def test_weighted_exact_attrition_test_matches_direct_probability_sum():
    # Reference: direct sum over all 2^8 Bernoulli(0.7) assignments of
    # 0.7^c 0.3^(8-c) for those with a rate gap at least the observed one.
    miss = np.array([1, 0, 0, 1, 0, 0, 0, 1], dtype=float)
    z = np.array([1, 1, 1, 0, 1, 0, 0, 1])
    Z = np.array(list(itertools.product((0, 1), repeat=8)), dtype=np.uint8)

    def prob(chunk):
        c = chunk.sum(axis=1)
        return 0.7 ** c * 0.3 ** (8 - c)

    res = attrition.attrition_test(miss, z, split(Z, 30), "exact", weights=prob)
    gap = lambda zz: abs(miss[zz == 1].mean() - miss[zz == 0].mean())
    valid = [row for row in Z if 0 < row.sum() < 8]
    den = sum(prob(row[None, :])[0] for row in valid)
    num = sum(prob(row[None, :])[0] for row in valid if gap(row) >= gap(z) - 1e-9)
    assert res.p_value[0] == pytest.approx(num / den, rel=1e-12)


def test_attrition_test_chunk_size_invariance_and_plus_one_rule():
    rng = np.random.default_rng(17)
    z = np.array([1] * 20 + [0] * 20)
    miss = np.column_stack([rng.random(40) < 0.2, rng.random(40) < 0.3])
    Z = mc_complete(z, 500, 2)
    a = attrition.attrition_test(miss, z, split(Z, 1), "monte_carlo", labels=["a", "b"])
    b = attrition.attrition_test(miss, z, split(Z, 64), "monte_carlo", labels=["a", "b"])
    assert a == b
    # +1 rule by hand: count draws with |r1 - r0| >= observed, then (1 + count)/(1 + B)
    gap = lambda zz: abs(miss[zz == 1, 0].mean() - miss[zz == 0, 0].mean())
    count = sum(gap(row) >= gap(z) - 1e-9 for row in Z)
    assert a.p_value[0] == pytest.approx((1 + count) / 501)


def test_no_attrition_gives_p_value_one():
    z = np.array([1, 0] * 5)
    res = attrition.attrition_test(np.zeros(10), z, [exact_complete(10, 5)], "exact")
    assert res.p_value == (1.0,) and res.rate_treated == (0.0,)


# ---------------------------------------------------------------------------
# study level
# ---------------------------------------------------------------------------


def make_study() -> Study:
    frame = pd.DataFrame({
        "uid": range(10),
        "z": [1, 1, 1, 1, 1, 0, 0, 0, 0, 0],
        "score": [5.0, 6.0, 7.0, NAN, 8.0, 4.0, NAN, NAN, 5.0, 6.0],
        "pass": [1.0, 1.0, 0.0, 1.0, NAN, 0.0, 1.0, NAN, 0.0, 1.0],
    })
    spec = Spec(
        path=Path("/nonexistent/design.yaml"), spec_version=1, title="Invented study", summary="",
        data=DataSpec(units="data/units.csv", id="uid"),
        design=DesignSpec(mechanism="complete", treatment="z"),
        analysis=AnalysisSpec(),
        outcomes=(OutcomeSpec(column="score", label="Score"),
                  OutcomeSpec(column="pass", label="Passed", family="secondary", range=(0.0, 1.0))),
    )
    return Study(spec=spec, frame=frame, inputs=())


def test_study_attrition_section():
    study = make_study()
    Z = exact_complete(10, 5)
    section = attrition.study_attrition(study, lambda: split(Z, 50), "exact")
    json.dumps(section, allow_nan=False)
    # overall indicator = missing the primary outcome 'score': 1/5 treated, 2/5 control
    assert section["attrited_if_missing"] == ["score"]
    assert (section["rate_treated"], section["rate_control"]) == (0.2, 0.4)
    assert section["draws"] == 252
    assert section["p_value"] == pytest.approx(hypergeom_two_sided(10, 3, 5, 1))
    methods = [(b["outcome"], b["method"]) for b in section["bounds"]]
    assert methods == [("score", "lee"), ("pass", "lee"), ("pass", "manski")]
    per = {r["outcome"]: r for r in section["per_outcome"]}
    assert per["pass"]["missing_treated"] == 1 and per["pass"]["missing_control"] == 1
    manski = section["bounds"][2]
    # by hand: treated observed 1,1,0,1 of 5 -> E[Y1] in [0.6, 0.8];
    # control observed 0,1,0,1 of 5 -> E[Y0] in [0.4, 0.6]; ATE in [0.0, 0.4]
    assert (manski["lower"], manski["upper"]) == (pytest.approx(0.0), pytest.approx(0.4))


def test_study_attrition_rejects_values_outside_declared_range():
    study = make_study()
    study.frame.loc[0, "pass"] = 2.0
    with pytest.raises(DataError, match=r"outcome 'pass' has observed values outside its declared range"):
        attrition.study_attrition(study, lambda: [exact_complete(10, 5)], "exact")
