"""Tests of report_kit.inference.randomization against outside references.

Each check names its source: scipy.stats (fisher_exact, mannwhitneyu, wilcoxon,
ks_2samp, ttest_ind, permutation_test), Fisher's published count for Darwin's
maize data, exact rational arithmetic (fractions), and brute-force enumeration
with itertools written here independently of the library.
"""

from __future__ import annotations

import itertools
import json
import math
import warnings
from fractions import Fraction
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from report_kit.design.mechanism import mechanism_from_arrays
from report_kit.errors import DataError, ReportKitWarning
from report_kit.inputs.model import AnalysisSpec, DataSpec, DesignSpec, OutcomeSpec, Spec, Study
from report_kit.inference.exact_tests import exact_law_test
from report_kit.inference.randomization import (
    Interval,
    JointNull,
    TestResult,
    invert_test,
    null_distribution,
    randomization_test,
    study_randomization,
)

TEST_KEYS = {"outcome", "statistic", "alternative", "null_effect", "observed", "p_value", "method", "draws",
             "mc_std_error"}
INTERVAL_KEYS = {"outcome", "method", "level", "ci_low", "ci_high", "hodges_lehmann"}


def exact_source(mech):
    return mech.assignments(max_exact=10 ** 7, draws=10, seed=1)


def one(y, mech, **kw):
    return randomization_test(y, mech, source=kw.pop("source", None) or exact_source(mech), **kw)[0]


def combos(n, k):
    for chosen in itertools.combinations(range(n), k):
        z = np.zeros(n, dtype=int)
        z[list(chosen)] = 1
        yield z


# --------------------------------------------------------------------------- scipy references


@pytest.mark.parametrize("alternative", ["greater", "less"])
def test_binary_mean_difference_equals_fisher_exact(alternative):
    # Fisher (1935) exact test: scipy.stats.fisher_exact (hypergeometric tail)
    z = np.array([1] * 9 + [0] * 11)
    y = np.array([1, 1, 1, 1, 1, 1, 1, 0, 0] + [1, 1, 1, 0, 0, 0, 0, 0, 0, 0, 0], dtype=float)
    res = one(y, mechanism_from_arrays("complete", z), alternative=alternative)
    table = [[7, 2], [3, 8]]
    assert res.method == "exact" and res.draws == math.comb(20, 9)
    assert res.p_value == pytest.approx(stats.fisher_exact(table, alternative=alternative).pvalue, rel=1e-12)


@pytest.mark.parametrize("alternative", ["greater", "less", "two-sided"])
def test_rank_sum_equals_mann_whitney_exact(alternative):
    # Wilcoxon-Mann-Whitney exact null distribution: scipy.stats.mannwhitneyu(method="exact"), no ties
    y = np.random.default_rng(3).normal(size=13)
    z = np.array([1] * 6 + [0] * 7)
    res = one(y, mechanism_from_arrays("complete", z), statistic="rank_sum", alternative=alternative)
    ref = stats.mannwhitneyu(y[z == 1], y[z == 0], alternative=alternative, method="exact")
    assert res.p_value == pytest.approx(ref.pvalue, rel=1e-12)
    assert res.observed == pytest.approx(ref.statistic + 6 * 7 / 2)  # U = R1 - n1 (n1 + 1) / 2


@pytest.mark.parametrize("ours,theirs", [("two-sided", "two-sided"), ("greater", "less"), ("less", "greater")])
def test_ks_equals_scipy_ks_2samp_exact(ours, theirs):
    # two-sample Kolmogorov-Smirnov, exact: scipy.stats.ks_2samp(method="exact"); scipy's "less" with the
    # treated sample first means treated outcomes tend to be larger, our "greater"
    y = np.random.default_rng(8).normal(size=12)
    z = np.array([1] * 5 + [0] * 7)
    res = one(y, mechanism_from_arrays("complete", z), statistic="ks", alternative=ours)
    ref = stats.ks_2samp(y[z == 1], y[z == 0], alternative=theirs, method="exact")
    assert res.p_value == pytest.approx(ref.pvalue, rel=1e-9)
    assert res.observed == pytest.approx(ref.statistic, rel=1e-12)


def pairs_data(d):
    """Pairs whose treated-minus-control differences are ``d``; treated unit first or second in turn."""
    y, z = [], []
    for p, value in enumerate(d):
        first_treated = p % 2 == 0
        y += [value, 0.0] if first_treated else [0.0, value]
        z += [1, 0] if first_treated else [0, 1]
    return np.array(y), np.array(z), np.repeat(np.arange(len(d)), 2)


@pytest.mark.parametrize("alternative", ["greater", "less", "two-sided"])
def test_matched_pairs_sign_flip_equals_wilcoxon_signed_rank_exact(alternative):
    # When the pair differences are their own signed ranks, the sign-flip distribution of the mean
    # difference is that of the signed-rank statistic: scipy.stats.wilcoxon(method="exact")
    d = np.array([3, -1, 7, 5, -2, 10, 8, -4, 6, 9, 11, -12], dtype=float)
    y, z, pairs = pairs_data(d)
    res = one(y, mechanism_from_arrays("matched_pairs", z, block=pairs), alternative=alternative)
    ref = stats.wilcoxon(d, alternative=alternative, method="exact")
    assert res.draws == 2 ** 12
    assert res.p_value == pytest.approx(ref.pvalue, rel=1e-12)


def test_matched_pairs_equal_direct_sign_enumeration():
    # direct enumeration of the 2**P sign vectors with integer arithmetic (no library code)
    d = [13, -4, 22, 9, 0, 17, -11, 5, 8, 30]
    total = abs(sum(d))
    hits = sum(abs(sum(s * v for s, v in zip(signs, d))) >= total for signs in itertools.product((1, -1), repeat=10))
    y, z, pairs = pairs_data(np.array(d, dtype=float))
    res = one(y, mechanism_from_arrays("matched_pairs", z, block=pairs))
    assert res.p_value == hits / 2 ** 10


def test_darwin_maize_fisher_count():
    # Darwin's Zea mays, 15 pairs, cross- minus self-fertilised heights in eighths of an inch, as
    # printed in Fisher, The Design of Experiments (1935), ch. III (values from memory). Fisher counts
    # 1,726 of the 2**15 = 32,768 sign assignments with a total at least as large in absolute value
    # (two-sided p about 0.0527).
    d = np.array([49, -67, 8, 16, 6, 23, 28, 41, 14, 29, 56, 24, 75, 60, -48], dtype=float)
    assert d.sum() == 314
    y, z, pairs = pairs_data(d)
    res = one(y, mechanism_from_arrays("matched_pairs", z, block=pairs))
    assert res.draws == 32768
    assert round(res.p_value * 32768) == 1726
    assert res.p_value == pytest.approx(0.0527, abs=5e-5)


def test_monte_carlo_agrees_with_scipy_permutation_test():
    # scipy.stats.permutation_test (independent samples, Monte Carlo, same (1 + #)/(1 + B) rule):
    # the two estimates of the same p-value differ by less than 3 standard errors of the difference
    rng = np.random.default_rng(21)
    n = 60
    z = np.zeros(n, dtype=int)
    z[rng.permutation(n)[:25]] = 1
    y = rng.normal(size=(n, 2)) + np.outer(z, [0.35, 0.0])
    mech = mechanism_from_arrays("complete", z)
    src = mech.assignments(max_exact=1000, draws=4999, seed=77)
    ours = randomization_test(y, mech, source=src, alternative="greater")
    for j, res in enumerate(ours):
        ref = stats.permutation_test(
            (y[z == 1, j], y[z == 0, j]), lambda a, b, axis: a.mean(axis=axis) - b.mean(axis=axis),
            vectorized=True, n_resamples=4999, alternative="greater", random_state=5)
        se_ref = math.sqrt(ref.pvalue * (1 - ref.pvalue) / 4999)
        assert res.method == "monte_carlo" and res.draws == 4999
        assert abs(res.p_value - ref.pvalue) < 3 * math.hypot(res.mc_std_error, se_ref)


def test_sharp_null_matches_scipy_exact_permutation_on_shifted_data():
    # H0: Y(1) = Y(0) + tau0 tests like an exact permutation test of (treated - tau0) vs control:
    # scipy.stats.permutation_test with n_resamples=inf enumerates every split
    rng = np.random.default_rng(4)
    z = np.array([1] * 6 + [0] * 6)
    y = rng.normal(size=12) + 1.5 * z
    mech = mechanism_from_arrays("complete", z)
    for tau in (0.0, 0.8, 2.5):
        res = one(y, mech, alternative="greater", null_effect=tau)
        ref = stats.permutation_test((y[z == 1] - tau, y[z == 0]),
                                     lambda a, b, axis: a.mean(axis=axis) - b.mean(axis=axis),
                                     vectorized=True, n_resamples=np.inf, alternative="greater")
        assert res.p_value == pytest.approx(ref.pvalue, rel=1e-12)
        assert res.null_effect == tau


def test_studentized_equals_enumeration_of_welch_t():
    # Welch t statistic from scipy.stats.ttest_ind(equal_var=False), enumerated over all C(9, 4) splits
    y = np.array([2.1, 3.4, 1.9, 5.6, 4.4, 0.7, 2.8, 3.9, 6.1])
    z = np.array([1, 1, 0, 1, 0, 0, 1, 0, 0])
    ref_t = np.array([stats.ttest_ind(y[a == 1], y[a == 0], equal_var=False).statistic for a in combos(9, 4)])
    t_obs = stats.ttest_ind(y[z == 1], y[z == 0], equal_var=False).statistic
    centre = ref_t.mean()
    mech = mechanism_from_arrays("complete", z)
    for alt, expected in [("greater", np.mean(ref_t >= t_obs - 1e-9)),
                          ("two-sided", np.mean(np.abs(ref_t - centre) >= abs(t_obs - centre) - 1e-9))]:
        res = one(y, mech, statistic="studentized", alternative=alt)
        assert res.observed == pytest.approx(t_obs, rel=1e-12)
        assert res.p_value == pytest.approx(expected, rel=1e-12)


def test_matched_pairs_studentized_is_paired_t_over_sign_flips():
    # paired t statistic mean(d) / (sd(d) / sqrt(P)) from scipy.stats.ttest_1samp, enumerated over 2**P signs
    d = np.array([1.3, -0.4, 2.2, 0.9, 1.7, -1.1, 0.5, 0.8])
    y, z, pairs = pairs_data(d)
    values = np.array([stats.ttest_1samp(np.array(signs) * d, 0.0).statistic
                       for signs in itertools.product((1, -1), repeat=8)])
    t = stats.ttest_1samp(d, 0.0).statistic
    res = one(y, mechanism_from_arrays("matched_pairs", z, block=pairs), statistic="studentized",
              alternative="greater")
    assert res.observed == pytest.approx(t, rel=1e-12)
    assert res.p_value == pytest.approx(np.mean(values >= t - 1e-9), rel=1e-12)


# --------------------------------------------------------------------------- designs, by enumeration


def test_blocked_mean_difference_equals_enumeration():
    # block-weighted difference sum_b (n_b / n)(mean1_b - mean0_b), enumerated block by block
    block = np.array(list("aaabbbbcccccc"))
    z = np.array([1, 0, 0, 1, 1, 0, 0, 1, 0, 1, 0, 1, 0])
    y = np.random.default_rng(9).normal(size=13).round(3)

    def stat(a):
        return sum((block == b).sum() / 13 * (y[(block == b) & (a == 1)].mean() - y[(block == b) & (a == 0)].mean())
                   for b in "abc")

    units = {b: np.flatnonzero(block == b) for b in "abc"}
    values = []
    for pick in itertools.product(*(itertools.combinations(units[b], int(z[units[b]].sum())) for b in "abc")):
        a = np.zeros(13, dtype=int)
        a[[i for chosen in pick for i in chosen]] = 1
        values.append(stat(a))
    values = np.array(values)
    res = one(y, mechanism_from_arrays("blocked", z, block=block), alternative="greater")
    assert res.observed == pytest.approx(stat(z), rel=1e-12)
    assert res.p_value == pytest.approx(np.mean(values >= stat(z) - 1e-12), rel=1e-12)


def test_cluster_two_sided_equals_enumeration_with_distribution_mean():
    # unit-level difference in means over all C(6, 3) cluster assignments; clusters of unequal size make
    # the null mean non-zero, so the two-sided rule measures the distance from the enumerated mean
    cluster = np.array([1, 1, 1, 2, 3, 3, 4, 4, 4, 4, 5, 6, 6])
    y = np.array([3.0, 2.5, 4.1, 1.0, 2.2, 2.9, 5.0, 4.4, 4.8, 5.3, 0.4, 1.9, 2.6])
    z = np.isin(cluster, [1, 4, 6]).astype(int)
    values = np.array([y[np.isin(cluster, c)].mean() - y[~np.isin(cluster, c)].mean()
                       for c in itertools.combinations(range(1, 7), 3)])
    t = y[z == 1].mean() - y[z == 0].mean()
    centre = values.mean()
    expected = np.mean(np.abs(values - centre) >= abs(t - centre) - 1e-12)
    res = one(y, mechanism_from_arrays("cluster", z, cluster=cluster))
    assert res.p_value == pytest.approx(expected, rel=1e-12)


def test_blocked_cluster_equals_enumeration():
    # clusters nested in blocks; block-weighted unit-level difference, enumerated cluster by cluster
    block = np.array(list("xxxxxxxyyyyyy"))
    cluster = np.array([1, 1, 2, 2, 2, 3, 3, 4, 4, 5, 6, 6, 6])
    z = np.isin(cluster, [2, 5]).astype(int)
    y = np.array([2.0, 2.4, 3.9, 4.2, 3.1, 1.2, 0.8, 2.2, 2.9, 5.1, 1.4, 1.9, 1.0])

    def stat(a):
        return sum((block == b).sum() / 13 * (y[(block == b) & (a == 1)].mean() - y[(block == b) & (a == 0)].mean())
                   for b in "xy")

    values = np.array([stat(np.isin(cluster, [cx, cy]).astype(int)) for cx in (1, 2, 3) for cy in (4, 5, 6)])
    centre = values.mean()
    res = one(y, mechanism_from_arrays("blocked_cluster", z, block=block, cluster=cluster))
    assert res.draws == 9
    assert res.p_value == pytest.approx(np.mean(np.abs(values - centre) >= abs(stat(z) - centre) - 1e-12), rel=1e-12)


def test_bernoulli_exact_weights_assignments_by_probability():
    # all 2**7 subsets weighted p**k (1-p)**(n-k), empty arms set aside (conditional on a defined statistic)
    y = np.array([1.2, 0.3, 2.2, 1.7, 0.9, 2.8, 0.1])
    z = np.array([1, 0, 1, 1, 0, 1, 0])
    p = 0.4
    t = y[z == 1].mean() - y[z == 0].mean()
    num = den = 0.0
    for a in itertools.product((0, 1), repeat=7):
        a = np.array(a)
        if 0 < a.sum() < 7:
            w = p ** a.sum() * (1 - p) ** (7 - a.sum())
            den += w
            num += w * (y[a == 1].mean() - y[a == 0].mean() >= t - 1e-12)
    res = one(y, mechanism_from_arrays("bernoulli", z, probability=p), alternative="greater")
    assert res.p_value == pytest.approx(num / den, rel=1e-12)
    assert res.draws == 2 ** 7 - 2


def test_two_sided_centre_is_the_null_mean_bernoulli_with_missing():
    # the two-sided rule measures the distance from the null mean; for differences in means without
    # clusters that mean is 0 even with missing outcomes and unequal probabilities: check by brute force
    y = np.array([1.2, 0.3, np.nan, 1.7, 0.9, 2.8, 0.1, 5.0])
    z = np.array([1, 0, 1, 1, 0, 1, 0, 0])
    p = 0.3
    keep = ~np.isnan(y)
    vals, wts = [], []
    for a in itertools.product((0, 1), repeat=8):
        a = np.array(a)
        t, c = keep & (a == 1), keep & (a == 0)
        if t.any() and c.any():
            vals.append(y[t].mean() - y[c].mean())
            wts.append(p ** a.sum() * (1 - p) ** (8 - a.sum()))
    vals, wts = np.array(vals), np.array(wts)
    centre = np.average(vals, weights=wts)
    assert abs(centre) < 1e-12
    t_obs = y[keep & (z == 1)].mean() - y[keep & (z == 0)].mean()
    expected = wts[np.abs(vals - centre) >= abs(t_obs - centre) - 1e-12].sum() / wts.sum()
    res = one(y, mechanism_from_arrays("bernoulli", z, probability=p))
    assert res.p_value == pytest.approx(expected, rel=1e-12)


def test_ties_use_relative_tolerance_exact_rationals():
    # decimal outcomes whose subset sums tie exactly in rational arithmetic (fractions.Fraction) but not
    # always in binary floating point; the tolerance must count them as ties
    dec = ["0.1", "0.2", "0.3", "0.4", "0.5", "0.6", "0.7", "0.8"]
    y = np.array([float(v) for v in dec])
    exact = [Fraction(v) for v in dec]
    z = np.array([1, 0, 0, 1, 1, 0, 0, 1])

    def diff(a):
        return sum(e for e, ai in zip(exact, a) if ai) / 4 - sum(e for e, ai in zip(exact, a) if not ai) / 4

    t = diff(z)
    expected = Fraction(sum(abs(diff(a)) >= abs(t) for a in combos(8, 4)), 70)
    res = one(y, mechanism_from_arrays("complete", z))
    assert res.p_value == float(expected)


# --------------------------------------------------------------------------- missing outcomes


def test_missing_outcome_leaves_unit_out_of_that_outcome_only():
    # enumeration over all C(10, 4) assignments of all 10 units; the statistic uses the 8 units with an
    # outcome and is undefined when one arm among them is empty
    rng = np.random.default_rng(12)
    y = rng.normal(size=(10, 2))
    y[[1, 6], 0] = np.nan
    z = np.array([1, 0, 1, 0, 0, 1, 1, 0, 0, 0])
    ok = ~np.isnan(y[:, 0])

    def diff(a, col):
        keep = ~np.isnan(y[:, col])
        t, c = keep & (a == 1), keep & (a == 0)
        return y[t, col].mean() - y[c, col].mean() if t.any() and c.any() else np.nan

    values = np.array([diff(a, 0) for a in combos(10, 4)])
    t = diff(z, 0)
    mech = mechanism_from_arrays("complete", z)
    both = randomization_test(y, mech, source=exact_source(mech), alternative="two-sided")
    defined = values[~np.isnan(values)]
    assert both[0].p_value == pytest.approx(np.mean(np.abs(defined) >= abs(t) - 1e-12), rel=1e-12)
    assert both[0].observed == pytest.approx(y[ok & (z == 1), 0].mean() - y[ok & (z == 0), 0].mean())
    alone = one(y[:, 1], mech)
    assert both[1].p_value == alone.p_value and both[1].observed == alone.observed


def test_missing_outcomes_in_rank_sum_and_blocked_designs():
    # rank sums over the units with an outcome, enumerated over all C(10, 4) assignments of the 10 units
    y = np.array([5.0, 1.0, np.nan, 3.0, 8.0, 2.0, 7.0, np.nan, 4.0, 6.0])
    z = np.array([1, 0, 1, 0, 1, 0, 1, 0, 0, 0])
    keep = ~np.isnan(y)
    ranks = np.full(10, 0.0)
    ranks[keep] = stats.rankdata(y[keep])
    values = np.array([ranks[a == 1].sum() for a in combos(10, 4)])
    res = one(y, mechanism_from_arrays("complete", z), statistic="rank_sum", alternative="greater")
    assert res.observed == ranks[z == 1].sum()
    assert res.p_value == pytest.approx(np.mean(values >= res.observed), rel=1e-12)
    # blocked: the Welch-type statistic per block over the units with an outcome, by enumeration
    zb = np.array([1, 0, 1, 1, 0, 1, 1, 0, 0, 0])
    block = np.repeat(["a", "b"], 5)

    def stud(a):
        parts = []
        for b in "ab":
            t = (block == b) & keep & (a == 1)
            c = (block == b) & keep & (a == 0)
            if min(t.sum(), c.sum()) < 2:
                return np.nan
            parts.append((4, y[t].mean() - y[c].mean(), y[t].var(ddof=1) / t.sum() + y[c].var(ddof=1) / c.sum()))
        d = sum(w * diff for w, diff, _ in parts) / 8
        v = sum((w / 8) ** 2 * var for w, _, var in parts)
        return d / math.sqrt(v)

    units = [np.flatnonzero(block == b) for b in "ab"]
    values = []
    for ca, cb in itertools.product(itertools.combinations(units[0], 3), itertools.combinations(units[1], 2)):
        a = np.zeros(10, dtype=int)
        a[list(ca + cb)] = 1
        values.append(stud(a))
    values = np.array(values)
    values = values[~np.isnan(values)]
    res = one(y, mechanism_from_arrays("blocked", zb, block=block), statistic="studentized", alternative="greater")
    assert res.observed == pytest.approx(stud(zb), rel=1e-12)
    assert res.p_value == pytest.approx(np.mean(values >= stud(zb) - 1e-9), rel=1e-12)
    assert res.draws == values.size


def test_undefined_observed_statistic_warns_and_leaves_p_empty():
    y = np.array([np.nan, 1.0, np.nan, 2.0, 3.0])
    z = np.array([1, 0, 1, 0, 0])
    with pytest.warns(ReportKitWarning, match="undefined for the observed assignment"):
        res = one(y, mechanism_from_arrays("complete", z))
    assert res.p_value is None and res.observed is None
    assert res.to_dict()["p_value"] is None


# --------------------------------------------------------------------------- reproducibility


def test_seeded_results_do_not_depend_on_chunk_size():
    rng = np.random.default_rng(30)
    z = np.zeros(50, dtype=int)
    z[:20] = 1
    y = rng.normal(size=(50, 3))
    y[3, 1] = np.nan
    mech = mechanism_from_arrays("complete", z)
    results = []
    for size in (1, 7, 300, None):
        src = mech.assignments(max_exact=100, draws=300, seed=5150, chunk_size=size)
        dist = null_distribution(y, mech, statistic="studentized", source=src)
        results.append((dist.null, [r.p_value for r in randomization_test(y, mech, source=src)]))
    for null, p in results[1:]:
        assert np.array_equal(null, results[0][0], equal_nan=True)
        assert p == results[0][1]


def test_outcomes_share_the_same_draws():
    rng = np.random.default_rng(2)
    z = np.array([1, 0] * 15)
    base = rng.normal(size=30)
    y = np.column_stack([base, rng.normal(size=30), base])
    mech = mechanism_from_arrays("complete", z)
    dist = null_distribution(y, mech, statistic="mean_difference",
                             source=mech.assignments(max_exact=10, draws=200, seed=1))
    assert dist.null.shape == (200, 3)
    assert np.array_equal(dist.null[:, 0], dist.null[:, 2])
    assert not np.array_equal(dist.null[:, 0], dist.null[:, 1])


# --------------------------------------------------------------------------- intervals


def test_interval_ends_are_where_scipy_exact_test_starts_rejecting():
    # two-sided exact permutation test at tau0 (scipy.stats.permutation_test, n_resamples=inf) on
    # (treated - tau0, control); with equal arms the null is symmetric and scipy's two-sided rule
    # (twice the smaller tail) equals ours (distance from the null mean 0)
    rng = np.random.default_rng(40)
    z = np.array([1] * 6 + [0] * 6)
    y = rng.normal(size=12) + 1.0 * z
    mech = mechanism_from_arrays("complete", z)
    iv = invert_test(y, mech, source=exact_source(mech), level=0.9)
    assert iv.hodges_lehmann == pytest.approx(y[z == 1].mean() - y[z == 0].mean(), rel=1e-12)

    def p_scipy(tau):
        return stats.permutation_test((y[z == 1] - tau, y[z == 0]),
                                      lambda a, b, axis: a.mean(axis=axis) - b.mean(axis=axis),
                                      vectorized=True, n_resamples=np.inf).pvalue

    eps = 1e-6
    assert p_scipy(iv.ci_low + eps) > 0.1 >= p_scipy(iv.ci_low - eps)
    assert p_scipy(iv.ci_high - eps) > 0.1 >= p_scipy(iv.ci_high + eps)
    assert iv.to_dict().keys() == INTERVAL_KEYS


def test_rank_sum_hodges_lehmann_is_median_of_pairwise_differences():
    # Hodges & Lehmann (1963): the estimate from the rank-sum test is the median of the n1 * n0
    # treated-minus-control differences
    y = np.array([4.1, 6.3, 5.2, 7.7, 3.9, 2.2, 3.3, 5.9, 1.4, 2.8])
    z = np.array([1, 1, 1, 1, 1, 0, 0, 0, 0, 0])
    mech = mechanism_from_arrays("complete", z)
    iv = invert_test(y, mech, source=exact_source(mech), statistic="rank_sum", level=0.9)
    expected = np.median(np.subtract.outer(y[z == 1], y[z == 0]))
    assert iv.hodges_lehmann == pytest.approx(expected, abs=1e-9)
    assert iv.ci_low < expected < iv.ci_high


def test_one_sided_interval_is_unbounded_on_one_side():
    rng = np.random.default_rng(41)
    z = np.array([1, 0] * 20)
    y = rng.normal(size=40) + z
    mech = mechanism_from_arrays("complete", z)
    src = mech.assignments(max_exact=10, draws=999, seed=3)
    iv = invert_test(y, mech, source=src, alternative="greater", level=0.95)
    assert iv.ci_high is None and iv.ci_low < iv.hodges_lehmann
    lower = randomization_test(y, mech, source=src, alternative="greater", null_effect=iv.ci_low - 1e-6)[0]
    assert lower.p_value <= 0.05


def test_interval_with_too_few_assignments_is_unbounded_and_warns():
    z = np.array([1, 0, 1, 0])
    mech = mechanism_from_arrays("complete", z)
    with pytest.warns(ReportKitWarning, match="unbounded"):
        iv = invert_test(np.array([3.0, 1.0, 4.0, 1.5]), mech, source=exact_source(mech))
    assert iv.ci_low is None and iv.ci_high is None


# --------------------------------------------------------------------------- results and validation


def test_test_result_dict_has_exactly_the_results_json_keys():
    z = np.array([1, 0] * 10)
    y = np.arange(20, dtype=float)
    mech = mechanism_from_arrays("complete", z)
    res = randomization_test(y, mech, source=mech.assignments(max_exact=5, draws=99, seed=1), outcomes=["score"])[0]
    assert isinstance(res, TestResult)
    d = res.to_dict()
    assert d.keys() == TEST_KEYS
    assert d["outcome"] == "score" and d["method"] == "monte_carlo" and d["draws"] == 99
    assert all(type(d[k]) is float for k in ("observed", "p_value", "mc_std_error", "null_effect"))
    json.dumps(d, allow_nan=False)


def test_validation_messages():
    z = np.array([1, 0, 1, 0])
    mech = mechanism_from_arrays("complete", z)
    src = exact_source(mech)
    y = np.arange(4.0)
    with pytest.raises(ValueError) as err:
        randomization_test(y, mech, source=src, alternative="both")
    assert str(err.value) == "`alternative` must be one of {'two-sided', 'greater', 'less'}; got 'both'"
    with pytest.raises(ValueError) as err:
        randomization_test(y, mech, source=src, statistic="t")
    assert str(err.value) == "`statistic` must be one of {'mean_difference', 'rank_sum', 'studentized', 'ks'}; got 't'"
    with pytest.raises(ValueError, match="`null_effect` must be a finite number; got inf"):
        randomization_test(y, mech, source=src, null_effect=float("inf"))
    with pytest.raises(DataError, match="shape \\(n, m\\) with n = 4 units; got \\(5,\\)"):
        randomization_test(np.arange(5.0), mech, source=src)
    other = mechanism_from_arrays("complete", z)
    with pytest.raises(ValueError, match="different mechanism"):
        randomization_test(y, other, source=src)
    with pytest.raises(ValueError, match="`alternative` must be one string or one per outcome \\(1\\); got 2"):
        randomization_test(y, mech, source=src, alternative=["less", "greater"])
    with pytest.raises(ValueError, match="`level` must be a number strictly between 0 and 1; got 95"):
        invert_test(y, mech, source=src, level=95)
    with pytest.raises(ValueError, match="`statistic` must be one of"):
        invert_test(y, mech, source=src, statistic="ks")


# --------------------------------------------------------------------------- study level


def make_study(n=24, draws=300, max_exact=100):
    rng = np.random.default_rng(17)
    z = np.zeros(n, dtype=int)
    z[rng.permutation(n)[: n // 2]] = 1
    a = rng.normal(size=n) + 0.8 * z
    c = rng.normal(size=n)
    c[[0, 5]] = np.nan
    frame = pd.DataFrame({"unit_id": np.arange(n), "assigned": z, "y_a": a, "y_b": a, "y_c": c})
    spec = Spec(
        path=Path("design.yaml"), spec_version=1, title="Invented tutoring pilot", summary="",
        data=DataSpec(units="data/units.csv", id="unit_id"),
        design=DesignSpec(mechanism="complete", treatment="assigned"),
        analysis=AnalysisSpec(randomizations=draws, max_exact=max_exact, seed=5150, alpha=0.1),
        outcomes=(OutcomeSpec(column="y_a", label="A"),
                  OutcomeSpec(column="y_b", label="B", alternative="less"),
                  OutcomeSpec(column="y_c", label="C", statistic="rank_sum", alternative="greater")),
    )
    return Study(spec=spec, frame=frame, inputs=())


def test_study_randomization_sections():
    study = make_study()
    res = study_randomization(study)
    assert res.method == "monte_carlo" and res.draws == 300
    assert res.n_assignments == str(math.comb(24, 12))  # C(n, k)
    assert [t["outcome"] for t in res.tests] == ["y_a", "y_b", "y_c"]
    # Monte Carlo rows say why no exact law applied; the rank sum has one (inference/exact_tests.py)
    assert all(t.keys() == TEST_KEYS | {"detail"} for t in res.tests)
    assert [t["method"] for t in res.tests] == ["monte_carlo", "monte_carlo", "exact"]
    assert [t["statistic"] for t in res.tests] == ["mean_difference", "mean_difference", "rank_sum"]
    assert [i["outcome"] for i in res.intervals] == ["y_a", "y_b", "y_c"]
    # continuous outcomes: the intervals stay Monte Carlo and say why (no grid of effects to invert on)
    assert all(i.keys() == INTERVAL_KEYS | {"detail"} and i["level"] == pytest.approx(0.9) for i in res.intervals)
    assert all(i["method"] == "test_inversion" and "lattice" in i["detail"] for i in res.intervals)
    json.dumps(res.to_dict(), allow_nan=False)
    # the same tests run directly give the same numbers (same seed, same draws)
    mech = mechanism_from_arrays("complete", study.z)
    src = mech.assignments(max_exact=100, draws=300, seed=5150)
    direct = randomization_test(study.outcome("y_c"), mech, source=src, statistic="rank_sum",
                                alternative="greater", outcomes=["y_c"])[0]
    lattice = exact_law_test(study.outcome("y_c"), mech, statistic="rank_sum", alternative="greater")
    assert res.tests[2] == {**direct.to_dict(), "p_value": lattice.p_value, "method": "exact", "draws": 0,
                            "mc_std_error": None, "detail": lattice.detail}
    assert abs(lattice.p_value - direct.p_value) <= 4 * direct.mc_std_error
    assert {k: v for k, v in res.tests[0].items() if k != "detail"} == randomization_test(
        study.outcome("y_a"), mech, source=src, outcomes=["y_a"])[0].to_dict()
    iv = invert_test(study.outcome("y_a"), mech, source=src, level=0.9, outcome="y_a")
    for key, value in iv.to_dict().items():  # same draws; the matrix products differ only in shape
        assert res.intervals[0][key] == (pytest.approx(value, rel=1e-12) if isinstance(value, float) else value)
    assert isinstance(iv, Interval)


def test_joint_null_is_oriented_per_alternative_on_shared_draws():
    res = study_randomization(make_study())
    joint = res.joint_null()
    assert isinstance(joint, JointNull)
    assert joint.outcomes == ("y_a", "y_b", "y_c") and joint.null.shape == (300, 3)
    raw = res.distributions["y_a"].null[:, 0]
    assert np.array_equal(joint.null[:, 0], np.abs(raw))   # two-sided, null mean 0
    assert np.array_equal(joint.null[:, 1], -raw)          # "less": same data, same draws, sign flipped
    assert np.array_equal(joint.null[:, 2], res.distributions["y_c"].null[:, 0])
    assert joint.observed[1] == -res.distributions["y_b"].observed[0]
    sub = res.joint_null(["y_c", "y_a"])
    assert np.array_equal(sub.null, joint.null[:, [2, 0]])
    with pytest.raises(ValueError, match="`outcomes` must be among"):
        res.joint_null(["nope"])


def test_study_exact_when_small():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        res = study_randomization(make_study(n=10, max_exact=1000))
    assert res.method == "exact" and res.draws == math.comb(10, 5) == 252
    assert all(t["mc_std_error"] is None for t in res.tests)
