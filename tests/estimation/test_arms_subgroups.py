"""Contrasts of a multi-arm trial within pre-specified subgroups, and their differences.

Outside references: statsmodels OLS with HC2 on the level's units (and on arm-by-level
cells for a difference), and the unadjusted contrasts on the level's units (identity).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
import statsmodels.api as sm

from report_kit.errors import ReportKitWarning
from report_kit.estimation.arms import contrast_pairs, estimate_contrast_subgroups, estimate_contrasts

ARMS = ("usual", "short", "long")


def data(seed=21, n=84):
    """Invented 3-arm data: 2 blocks, 28 clusters of 3 units, a 3-level subgroup with a missing label."""
    rng = np.random.default_rng(seed)
    block = np.repeat(["east", "west"], n // 2)
    cluster = np.repeat([f"c{j:02d}" for j in range(n // 3)], 3)
    cluster_arm = np.concatenate([rng.permutation(np.resize(ARMS, 14)) for _ in range(2)])
    arm = np.repeat(cluster_arm, 3).astype(object)
    group = rng.choice(np.array(["old", "new", "mid"], dtype=object), size=n)
    group[5] = None
    y = (arm == "long") * 1.2 + (arm == "short") * (group == "new") * 0.9 + rng.normal(size=n)
    y[[2, 40]] = np.nan
    return y, arm, group, block, cluster


def design(mechanism, block, cluster):
    return {"mechanism": mechanism, "block": block if "blocked" in mechanism else None,
            "cluster": cluster if "cluster" in mechanism else None}


def quiet(fn, *args, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ReportKitWarning)
        return fn(*args, **kw)


@pytest.mark.parametrize("mechanism", ["complete", "blocked", "cluster", "blocked_cluster"])
def test_each_subgroup_contrast_equals_the_contrast_on_the_level_units(mechanism):
    # Identity: the contrast within a level is the design's first unadjusted estimate of
    # estimate_contrasts run on the level's units alone.
    y, arm, group, block, cluster = data()
    kw = design(mechanism, block, cluster)
    items = quiet(estimate_contrast_subgroups, y, arm, group, arms=ARMS, contrasts="pairwise", **kw)
    assert [(i.arm, i.reference) for i in items] == contrast_pairs(ARMS, "pairwise")
    for item in items:
        assert item.subgroups.levels == ("mid", "new", "old")
        pair = np.isin(arm, [item.arm, item.reference])
        assert item.subgroups.n_missing_group == int(sum(g is None for g in group[pair]))
        for level, est, (mean_arm, mean_ref) in zip(item.subgroups.levels, item.subgroups.estimates,
                                                    item.means):
            m = group == level
            sub = {k: (None if v is None else v[m]) for k, v in kw.items() if k != "mechanism"}
            rows = quiet(estimate_contrasts, y[m], arm[m], arms=ARMS, contrasts="pairwise",
                         mechanism=mechanism, **sub)
            (same,) = [r for r in rows if (r.arm, r.reference) == (item.arm, item.reference)][:1]
            assert est.estimand == "subgroup ATE"
            assert est.estimate == pytest.approx(same.estimate.estimate, rel=1e-12)
            assert est.std_error == pytest.approx(same.estimate.std_error, rel=1e-12)
            assert est.df == pytest.approx(same.estimate.df, rel=1e-12)
            assert est.method == same.estimate.method
            assert (mean_arm, mean_ref) == pytest.approx((same.mean_arm, same.mean_reference))


def test_one_subgroup_contrast_against_statsmodels_hc2():
    # Reference: statsmodels OLS on all arm indicators (no intercept), fitted on the level's
    # units with an observed outcome, cov_type HC2: the contrast is the difference of two
    # coefficients and its HC2 SE equals Neyman's (Samii & Aronow 2012).
    y, arm, group, _, _ = data()
    (item,) = [i for i in estimate_contrast_subgroups(y, arm, group, arms=ARMS, mechanism="complete")
               if i.arm == "long"]
    level = item.subgroups.levels.index("new")
    est = item.subgroups.estimates[level]
    m = (group == "new") & ~np.isnan(y)
    D = np.column_stack([(arm[m] == a).astype(float) for a in ARMS])
    test = sm.OLS(y[m], D).fit(cov_type="HC2").t_test([-1.0, 0.0, 1.0])
    assert est.estimate == pytest.approx(float(test.effect[0]), rel=1e-12)
    assert est.std_error == pytest.approx(float(test.sd[0, 0]), rel=1e-10)
    assert (est.n_treated, est.n_control) == (int((arm[m] == "long").sum()), int((arm[m] == "usual").sum()))


def test_subgroup_difference_against_statsmodels_cells_hc2():
    # Reference: statsmodels OLS on the arm-by-level cell indicators of the two arms' units
    # (HC2): the difference between two levels' contrasts is the difference in differences of
    # cell coefficients, and its HC2 SE is sqrt(V_l + V_0) (independent levels).
    y, arm, group, _, _ = data(seed=3)
    (item,) = [i for i in estimate_contrast_subgroups(y, arm, group, arms=ARMS, mechanism="complete")
               if i.arm == "short"]
    diff = {d.level: d for d in item.subgroups.differences}["old"]
    assert diff.reference == "mid"
    m = np.isin(arm, ["short", "usual"]) & np.isin(group, ["mid", "old"]) & ~np.isnan(y)
    cells = [("short", "old"), ("usual", "old"), ("short", "mid"), ("usual", "mid")]
    D = np.column_stack([((arm[m] == a) & (group[m] == g)).astype(float) for a, g in cells])
    test = sm.OLS(y[m], D).fit(cov_type="HC2").t_test([1.0, -1.0, -1.0, 1.0])
    assert diff.estimate == pytest.approx(float(test.effect[0]), rel=1e-12)
    assert diff.std_error == pytest.approx(float(test.sd[0, 0]), rel=1e-10)
    low_high = (diff.estimate - diff.ci_low, diff.ci_high - diff.estimate)
    assert low_high[0] == pytest.approx(low_high[1]) and low_high[0] > 0
    assert math.isfinite(diff.df) and diff.df > 0


def test_validation():
    y, arm, group, _, _ = data()
    with pytest.raises(ValueError, match="same length"):
        estimate_contrast_subgroups(y, arm, group[:-1], arms=ARMS, mechanism="complete")
    with pytest.raises(ValueError, match="`mechanism` must be one of"):
        estimate_contrast_subgroups(y, arm, group, arms=ARMS, mechanism="matched_pairs")
