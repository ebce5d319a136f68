"""Multi-arm contrasts and factorial effects against statsmodels OLS/HC2 and exact enumeration."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
import statsmodels.api as sm

from report_kit.estimation.arms import (
    contrast_pairs,
    estimate_arm_cace,
    estimate_contrasts,
    estimate_contrasts_adjusted,
)
from report_kit.estimation.factorial import estimate_factorial

ARMS = ("usual", "short", "long")


def three_arm_data(seed=3, n=(9, 8, 10)):
    rng = np.random.default_rng(seed)
    arm = np.repeat(ARMS, n)
    shift = {"usual": 0.0, "short": 0.7, "long": 1.5}
    x = rng.normal(size=arm.size)
    y = np.array([shift[a] for a in arm]) + 0.8 * x + rng.normal(scale=np.where(arm == "long", 2.0, 1.0))
    return y, arm, x


def dummies(arm, arms=ARMS):
    return np.column_stack([(arm == a).astype(float) for a in arms])


def test_pairs():
    assert contrast_pairs(ARMS) == [("short", "usual"), ("long", "usual")]
    assert contrast_pairs(ARMS, "pairwise") == [("short", "usual"), ("long", "usual"), ("long", "short")]


@pytest.mark.parametrize("contrasts", ["reference", "pairwise"])
def test_contrasts_equal_ols_dummies_with_hc2(contrasts):
    # Reference: statsmodels OLS on all arm indicators (no intercept) with HC2 covariance;
    # a contrast is the difference of two coefficients and its HC2 SE equals Neyman's SE
    # (Samii & Aronow 2012).
    y, arm, _ = three_arm_data()
    fit = sm.OLS(y, dummies(arm)).fit(cov_type="HC2")
    rows = estimate_contrasts(y, arm, arms=ARMS, contrasts=contrasts, mechanism="complete")
    assert len(rows) == (2 if contrasts == "reference" else 3)
    for row in rows:
        c = np.zeros(3)
        c[ARMS.index(row.arm)], c[ARMS.index(row.reference)] = 1.0, -1.0
        test = fit.t_test(c)
        assert row.estimate.estimate == pytest.approx(float(test.effect[0]), rel=1e-12)
        assert row.estimate.std_error == pytest.approx(float(test.sd[0, 0]), rel=1e-10)
        assert row.mean_arm == pytest.approx(y[arm == row.arm].mean())


def test_adjusted_equals_interacted_ols_with_hc2():
    # Reference: statsmodels OLS of y on every arm indicator and arm x centred covariate
    # (Lin 2013 with all arms), HC2 covariance; contrast = difference of arm coefficients.
    y, arm, x = three_arm_data(seed=8)
    xc = x - x.mean()
    D = dummies(arm)
    fit = sm.OLS(y, np.column_stack([D, D * xc[:, None]])).fit(cov_type="HC2")
    rows = estimate_contrasts_adjusted(y, arm, x, arms=ARMS, contrasts="pairwise", mechanism="complete")
    for row in rows:
        c = np.zeros(6)
        c[ARMS.index(row.arm)], c[ARMS.index(row.reference)] = 1.0, -1.0
        test = fit.t_test(c)
        assert row.estimate.estimate == pytest.approx(float(test.effect[0]), rel=1e-10)
        assert row.estimate.std_error == pytest.approx(float(test.sd[0, 0]), rel=1e-10)
        assert row.estimate.estimator == "adjusted"


def potential_outcomes():
    """A fixed table of potential outcomes for 7 units under 3 arms (invented)."""
    base = np.array([3.0, 5.0, 1.0, 4.0, 8.0, 2.0, 6.0])
    return {"usual": base, "short": base + np.array([1, 0, 2, 1, 3, 0, 1.0]),
            "long": base * 1.5 + np.array([0, 1, 0, 2, 0, 1, 0.0])}


def all_assignments(sizes):
    n = sum(sizes)
    for first in itertools.combinations(range(n), sizes[0]):
        rest = [i for i in range(n) if i not in first]
        for second in itertools.combinations(rest, sizes[1]):
            arm = np.empty(n, dtype=object)
            arm[:] = ARMS[2]
            arm[list(first)], arm[list(second)] = ARMS[0], ARMS[1]
            yield arm


def test_enumeration_unbiased_and_neyman_bound():
    # Exact enumeration identity: over all 7!/(2!2!3!) = 210 assignments the mean of each
    # contrast equals the true average contrast, and the mean of the Neyman variance
    # estimate is at least the true variance of the estimator (Neyman 1923).
    po = potential_outcomes()
    draws = {pair: [] for pair in contrast_pairs(ARMS, "pairwise")}
    variances = {pair: [] for pair in draws}
    count = 0
    for arm in all_assignments((2, 2, 3)):
        count += 1
        y = np.select([arm == a for a in ARMS], [po[a] for a in ARMS])
        for row in estimate_contrasts(y, arm, arms=ARMS, contrasts="pairwise", mechanism="complete"):
            draws[(row.arm, row.reference)].append(row.estimate.estimate)
            variances[(row.arm, row.reference)].append(row.estimate.std_error ** 2)
    assert count == math.factorial(7) // (2 * 2 * 6)
    for (a, r), values in draws.items():
        truth = float(np.mean(po[a] - po[r]))
        assert np.mean(values) == pytest.approx(truth, abs=1e-12)
        assert np.mean(variances[(a, r)]) >= np.var(values) - 1e-12


@pytest.mark.filterwarnings("ignore:the estimated variance is zero")
def test_blocked_enumeration_unbiased():
    # Exact enumeration identity for a blocked design with the same arm shares in both
    # blocks (1 + 1 + 1 per block): the mean over all 6 x 6 assignments is the true contrast.
    po = {a: np.array([1.0, 4, 2, 7, 3, 9]) * (k + 1) + k for k, a in enumerate(ARMS)}
    block = np.array(["a", "a", "a", "b", "b", "b"])
    estimates = {("short", "usual"): [], ("long", "usual"): []}
    for p1 in itertools.permutations(ARMS):
        for p2 in itertools.permutations(ARMS):
            arm = np.array(p1 + p2, dtype=object)
            y = np.select([arm == a for a in ARMS], [po[a] for a in ARMS])
            for row in estimate_contrasts(y, arm, arms=ARMS, mechanism="blocked", block=block):
                estimates[(row.arm, row.reference)].append(row.estimate.estimate)
    for (a, r), values in estimates.items():
        assert len(values) == 36
        assert np.mean(values) == pytest.approx(np.mean(po[a] - po[r]), abs=1e-12)


def test_cluster_contrast_gives_cr2_and_ht_rows():
    y, arm, _ = three_arm_data(n=(6, 6, 6))
    cluster = np.repeat(np.arange(9), 2)
    rows = estimate_contrasts(y, arm, arms=ARMS, mechanism="cluster", cluster=cluster)
    assert [r.estimate.method for r in rows] == ["cr2", "horvitz_thompson"] * 2
    # CR2 with clusters nested in arms: unit-level difference in means (hand computation).
    assert rows[0].estimate.estimate == pytest.approx(y[arm == "short"].mean() - y[arm == "usual"].mean())


def test_cace_per_arm_is_wald_ratio():
    # Reference: the Wald ratio ITT_y / ITT_d of plain means (Angrist, Imbens & Rubin 1996).
    y, arm, _ = three_arm_data()
    d = np.zeros(arm.size)
    d[(arm != "usual")] = 1.0
    d[::4] = 0.0
    for row in estimate_arm_cace(y, arm, d, arms=ARMS, mechanism="complete"):
        a, r = (arm == row.arm), (arm == row.reference)
        wald = (y[a].mean() - y[r].mean()) / (d[a].mean() - d[r].mean())
        assert row.estimate.estimate == pytest.approx(wald, rel=1e-12)
        assert row.estimate.estimand == "CACE"


FACT_ARMS = ("none", "text", "call", "both")
FACTORS = (("text", ("text", "both")), ("call", ("call", "both")))


def factorial_data(seed=5):
    rng = np.random.default_rng(seed)
    arm = np.repeat(FACT_ARMS, (7, 9, 8, 10))
    effect = {"none": 0.0, "text": 1.0, "call": 0.5, "both": 2.5}
    y = np.array([effect[a] for a in arm]) + rng.normal(size=arm.size) * np.where(arm == "both", 1.5, 1)
    return y, arm


def test_factorial_equals_saturated_pm1_regression_with_hc2():
    # Reference: statsmodels OLS of y on 1, g_text, g_call, g_text*g_call (+-1 codes) with HC2;
    # the factorial effect is twice the coefficient and its Neyman SE twice the HC2 SE
    # (Dasgupta, Pillai & Rubin 2015; saturated model, so HC2 = cell variances / sizes).
    y, arm = factorial_data()
    g_text = np.where(np.isin(arm, ["text", "both"]), 1.0, -1.0)
    g_call = np.where(np.isin(arm, ["call", "both"]), 1.0, -1.0)
    fit = sm.OLS(y, np.column_stack([np.ones(y.size), g_text, g_call, g_text * g_call])).fit(cov_type="HC2")
    effects = estimate_factorial(y, arm, arms=FACT_ARMS, factors=FACTORS)
    assert [e.factor for e in effects] == ["text", "call", "text:call"]
    assert [e.estimate.estimand for e in effects] == ["main effect", "main effect", "interaction"]
    for k, effect in enumerate(effects, start=1):
        assert effect.estimate.estimate == pytest.approx(2 * fit.params[k], rel=1e-10)
        assert effect.estimate.std_error == pytest.approx(2 * fit.bse[k], rel=1e-10)


def test_factorial_main_effect_by_hand():
    # Definition (Dasgupta, Pillai & Rubin 2015): main effect of text = mean of the two
    # "text on" cells minus mean of the two "text off" cells.
    y, arm = factorial_data(seed=11)
    m = {a: y[arm == a].mean() for a in FACT_ARMS}
    (text, call, inter) = estimate_factorial(y, arm, arms=FACT_ARMS, factors=FACTORS)
    assert text.estimate.estimate == pytest.approx((m["text"] + m["both"]) / 2 - (m["none"] + m["call"]) / 2)
    assert inter.estimate.estimate == pytest.approx((m["both"] - m["call"]) / 2 - (m["text"] - m["none"]) / 2)


def test_validation_errors():
    y, arm, _ = three_arm_data()
    with pytest.raises(ValueError, match="not in `arms`"):
        estimate_contrasts(y, arm, arms=("usual", "short"), mechanism="complete")
    with pytest.raises(ValueError, match="have no units"):
        estimate_contrasts(y, arm, arms=ARMS + ("extra",), mechanism="complete")
    with pytest.raises(ValueError, match="multi-arm design"):
        estimate_contrasts(y, arm, arms=ARMS, mechanism="matched_pairs", block=arm)
    with pytest.raises(ValueError, match="`contrasts` must be one of"):
        estimate_contrasts(y, arm, arms=ARMS, contrasts="all", mechanism="complete")
    with pytest.raises(TypeError, match="array of arm labels"):
        estimate_contrasts(y, "usual", arms=ARMS, mechanism="complete")
    with pytest.raises(ValueError, match="full grid"):
        estimate_factorial(y, arm, arms=ARMS, factors=(("a", ("short",)), ("b", ("long",))))
