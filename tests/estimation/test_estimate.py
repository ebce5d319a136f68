"""Tests for report_kit.estimation.neyman.

Every statistic is checked against something outside the module: statsmodels
(OLS with HC2 / cluster-robust covariances), scipy (Welch and paired t-tests),
direct implementations of the published formulas written here in the test
(Bell & McCaffrey 2002 CR2 with scipy's matrix square root, 2SLS by numpy,
Horvitz & Thompson 1952 totals), and exact enumeration of every assignment on
small invented potential-outcome schedules (Neyman 1923).
"""

from __future__ import annotations

import itertools
import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import scipy.linalg
import statsmodels.api as sm
from scipy import stats

from report_kit.errors import DataError, DesignError, ReportKitWarning
from report_kit.estimation.neyman import (
    ESTIMATE_KEYS,
    FUNDER_KEYS,
    Estimate,
    neyman_difference,
    estimate_adjusted,
    estimate_effects,
    estimate_noncompliance,
    estimate_subgroups,
    study_estimates,
    study_subgroup_differences,
)
from report_kit.inputs.model import (
    AnalysisSpec,
    ComplianceSpec,
    DataSpec,
    DesignSpec,
    OutcomeSpec,
    Spec,
    Study,
)


# ---------------------------------------------------------------------------
# Invented data and independent reference implementations
# ---------------------------------------------------------------------------


def complete_data(n=30, n1=13, seed=7):
    rng = np.random.default_rng(seed)
    z = np.zeros(n, dtype=int)
    z[rng.choice(n, n1, replace=False)] = 1
    y = rng.normal(10, 2, n) + z * rng.normal(1.5, 1.0, n)
    return y, z


def cluster_data(sizes, treated, seed=3, covariates=0):
    """Units in clusters of the given sizes; `treated` = 0/1 per cluster."""
    rng = np.random.default_rng(seed)
    cl = np.repeat(np.arange(len(sizes)), sizes)
    z = np.repeat(np.asarray(treated), sizes)
    shock = rng.normal(0, 1, len(sizes))[cl]
    X = rng.normal(0, 1, (cl.size, covariates))
    y = 5 + shock + rng.normal(0, 1, cl.size) + 0.8 * z + X.sum(axis=1)
    return y, z, cl, X


def direct_cr2(X, y, groups):
    """CR2 covariance written out from Bell & McCaffrey (2002), eq. for A_g = (I - H_gg)^(-1/2).

    Independent of the library: matrix inverse + scipy.linalg.sqrtm rather than QR + eigh.
    """
    X = np.asarray(X, float)
    bread = np.linalg.inv(X.T @ X)
    beta = bread @ X.T @ y
    e = y - X @ beta
    meat = np.zeros_like(bread)
    for g in np.unique(groups):
        m = groups == g
        Xg = X[m]
        Hgg = Xg @ bread @ Xg.T
        A = np.real(scipy.linalg.sqrtm(np.linalg.inv(np.eye(m.sum()) - Hgg)))
        u = Xg.T @ A @ e[m]
        meat += np.outer(u, u)
    return beta, bread @ meat @ bread


def direct_bm_df(X, groups, contrast):
    """Bell & McCaffrey (2002) degrees of freedom of a CR2 contrast, written out densely.

    Published formula (Bell & McCaffrey 2002, Section 3; Imbens & Kolesar 2016, eq. 9 with
    Omega = I): G has one column per cluster, g_g = (I - H)_{.,g} A_g a_g with
    a = X (X'X)^{-1} contrast and A_g = (I - H_gg)^{-1/2}; df = tr(G'G)^2 / tr((G'G)^2).
    Independent of the library: full n x n matrices and scipy.linalg.sqrtm.
    """
    X = np.asarray(X, float)
    bread = np.linalg.inv(X.T @ X)
    H = X @ bread @ X.T
    M = np.eye(X.shape[0]) - H
    a = X @ bread @ np.asarray(contrast, float)
    cols = []
    for g in np.unique(groups):
        m = groups == g
        A = np.real(scipy.linalg.sqrtm(np.linalg.pinv(np.eye(m.sum()) - H[np.ix_(m, m)])))
        cols.append(M[:, m] @ (A @ a[m]))
    GtG = np.column_stack(cols).T @ np.column_stack(cols)
    return np.trace(GtG) ** 2 / np.trace(GtG @ GtG)


def two_sls(y, d, z):
    """Just-identified 2SLS of y on (1, d) with instruments (1, z), by numpy.

    Returns the coefficient on d and its sandwich SE with HC2 weights 1/(1 - h_ii),
    h_ii the leverages of the instrument matrix (White-type IV sandwich).
    """
    Z = np.column_stack([np.ones_like(z, dtype=float), z])
    X = np.column_stack([np.ones_like(d, dtype=float), d])
    beta = np.linalg.solve(Z.T @ X, Z.T @ y)
    e = y - X @ beta
    h = np.einsum("ij,jk,ik->i", Z, np.linalg.inv(Z.T @ Z), Z)
    ZX_inv = np.linalg.inv(Z.T @ X)
    meat = (Z * (e ** 2 / (1 - h))[:, None]).T @ Z
    V = ZX_inv @ meat @ ZX_inv.T
    return beta[1], math.sqrt(V[1, 1])


def pashley_miratrix_small(sizes, tau):
    """Small-block variance of Pashley & Miratrix (2021), count form, for sum (n_k/N) tau_k:
    sum_k n_k^2 / ((N - 2 n_k)(N + sum_j n_j^2 / (N - 2 n_j))) (tau_k - tau_bar_w)^2."""
    n = np.asarray(sizes, float)
    N = n.sum()
    tau = np.asarray(tau, float)
    centre = np.dot(n / N, tau)
    denom = (N - 2 * n) * (N + np.sum(n ** 2 / (N - 2 * n)))
    return float(np.sum(n ** 2 / denom * (tau - centre) ** 2))


def assignments(n, n1):
    for treated in itertools.combinations(range(n), n1):
        z = np.zeros(n, dtype=int)
        z[list(treated)] = 1
        yield z


def svar(x):
    return float(np.var(x, ddof=1))


# ---------------------------------------------------------------------------
# Validation messages
# ---------------------------------------------------------------------------


def test_unknown_mechanism_names_the_choices():
    y, z = complete_data()
    with pytest.raises(ValueError, match=r"`mechanism` must be one of .*got 'stratified'"):
        estimate_effects(y, z, mechanism="stratified")


@pytest.mark.parametrize("alpha", [0, 1, 1.5, -0.1, "0.05", True])
def test_alpha_must_be_in_unit_interval(alpha):
    y, z = complete_data()
    with pytest.raises(ValueError, match=r"`alpha` must be a number strictly between 0 and 1"):
        estimate_effects(y, z, mechanism="complete", alpha=alpha)


def test_treatment_must_be_binary():
    y, z = complete_data()
    z = z.copy()
    z[0] = 2
    with pytest.raises(DataError, match=r"`z` must hold only 0 and 1 \(no missing values\); got 2.0"):
        estimate_effects(y, z, mechanism="complete")


def test_length_mismatch():
    y, z = complete_data()
    with pytest.raises(ValueError, match=r"`y` must be a 1-d array of length 30"):
        estimate_effects(y[:-1], z, mechanism="complete")


def test_blocked_needs_block_and_complete_refuses_it():
    y, z = complete_data()
    with pytest.raises(DesignError, match=r"mechanism 'blocked' needs `block`"):
        estimate_effects(y, z, mechanism="blocked")
    with pytest.raises(ValueError, match=r"`block` applies only to mechanisms"):
        estimate_effects(y, z, mechanism="complete", block=np.zeros(30))
    with pytest.raises(DesignError, match=r"mechanism 'cluster' needs `cluster`"):
        estimate_effects(y, z, mechanism="cluster")


def test_block_labels_must_be_complete():
    y, z = complete_data()
    block = np.array(["a", "b"] * 15, dtype=object)
    block[4] = None
    with pytest.raises(DesignError, match=r"`block` has 1 missing labels"):
        estimate_effects(y, z, mechanism="blocked", block=block)


def test_cluster_must_not_mix_arms_or_span_blocks():
    y, z, cl, _ = cluster_data([3, 3, 3, 3], [1, 0, 1, 0])
    labels = np.array([f"v{c}" for c in cl], dtype=object)
    z_bad = z.copy()
    z_bad[0] = 0
    with pytest.raises(DesignError, match=r"cluster 'v0' has both treated and control units"):
        estimate_effects(y, z_bad, mechanism="cluster", cluster=labels)
    block = np.array([0, 0, 0, 0, 1, 1, 1, 1, 1, 1, 1, 1])
    with pytest.raises(DesignError, match=r"cluster 'v1' spans several blocks"):
        estimate_effects(y, z, mechanism="blocked_cluster", block=block, cluster=labels)


def test_covariates_with_missing_values_in_kept_rows_are_refused_on_request():
    y, z = complete_data()
    X = np.random.default_rng(0).normal(size=(30, 2))
    X[3, 1] = np.nan
    with pytest.raises(DesignError, match=r"covariate\(s\) \['x2'\] have missing values in 1 of the 30 units"):
        estimate_adjusted(y, z, X, mechanism="complete", missing_covariates="refuse")
    y = y.copy()
    y[3] = np.nan  # the row is dropped for the outcome, so its covariate does not matter
    est = estimate_adjusted(y, z, X, mechanism="complete", missing_covariates="refuse")
    assert est.n_treated + est.n_control == 29
    assert est.n_missing == 1


def test_collinear_covariates_are_dropped_with_warning():
    # A redundant covariate leaves the column space, hence the fit, unchanged: compare with
    # statsmodels OLS + HC2 on the non-redundant design (Lin 2013 regression).
    y, z = complete_data()
    x = np.random.default_rng(1).normal(size=30)
    with pytest.warns(ReportKitWarning, match=r"2 regressor\(s\) .* collinear"):
        est = estimate_adjusted(y, z, np.column_stack([x, 2 * x + 1]), mechanism="complete")
    fit = sm.OLS(y, lin_design(z, x[:, None])).fit(cov_type="HC2")
    assert est.estimate == pytest.approx(fit.params[1], rel=1e-10)
    assert est.std_error == pytest.approx(fit.bse[1], rel=1e-8)
    assert est.df == 30 - 4


def test_block_level_covariate_is_absorbed_by_block_indicators():
    y, z, block = blocked_data()
    x = np.random.default_rng(5).normal(size=block.size)
    level = np.array([3.0, -1.0, 2.5, 0.4])[block]
    with pytest.warns(ReportKitWarning, match="collinear"):
        both = estimate_adjusted(y, z, np.column_stack([x, level]), mechanism="blocked", block=block)
    dummies = (block[:, None] == np.arange(1, 4)[None, :]).astype(float)
    fit = sm.OLS(y, lin_design(z, np.column_stack([x, dummies]))).fit(cov_type="HC2")
    assert both.estimate == pytest.approx(fit.params[1], rel=1e-10)
    assert both.std_error == pytest.approx(fit.bse[1], rel=1e-8)


def test_takeup_must_be_binary():
    y, z = complete_data()
    d = z.astype(float)
    d[2] = 0.5
    with pytest.raises(DataError, match=r"`d` must hold only 0 and 1; got 0.5"):
        estimate_noncompliance(y, z, d, mechanism="complete")


# ---------------------------------------------------------------------------
# Complete and Bernoulli randomization
# ---------------------------------------------------------------------------


def test_neyman_se_equals_statsmodels_hc2():
    # Samii & Aronow (2012): Neyman's variance equals the HC2 variance of OLS on (1, z).
    y, z = complete_data()
    est = estimate_effects(y, z, mechanism="complete")[0]
    ols = sm.OLS(y, sm.add_constant(z.astype(float))).fit(cov_type="HC2")
    assert est.estimate == pytest.approx(ols.params[1], rel=1e-12)
    assert est.std_error == pytest.approx(ols.bse[1], rel=1e-10)
    assert est.method == "neyman" and est.variance_rule == "neyman"


def test_welch_df_and_interval_match_scipy_welch_test():
    # scipy.stats.ttest_ind(equal_var=False): Welch (1947) df and CI of the mean difference.
    y, z = complete_data()
    est = estimate_effects(y, z, mechanism="complete", alpha=0.1)[0]
    ref = stats.ttest_ind(y[z == 1], y[z == 0], equal_var=False)
    ci = ref.confidence_interval(confidence_level=0.9)
    assert est.df == pytest.approx(ref.df, rel=1e-10)
    assert (est.ci_low, est.ci_high) == pytest.approx((ci.low, ci.high), rel=1e-10)


def test_neyman_difference_and_bernoulli_agree_with_complete():
    y, z = complete_data()
    base = estimate_effects(y, z, mechanism="complete")[0]
    assert neyman_difference(y, z) == base
    bern = estimate_effects(y, z, mechanism="bernoulli")[0]
    assert bern.estimate == base.estimate and bern.std_error == base.std_error


def test_missing_outcomes_are_dropped_and_counted():
    y, z = complete_data()
    y = y.copy()
    y[[0, 5, 6]] = np.nan
    est = estimate_effects(y, z, mechanism="complete")[0]
    keep = ~np.isnan(y)
    ref = stats.ttest_ind(y[keep & (z == 1)], y[keep & (z == 0)], equal_var=False)
    assert est.n_missing == 3
    assert est.n_treated == int(np.sum(keep & (z == 1)))
    assert est.n_control == int(np.sum(keep & (z == 0)))
    assert est.estimate == pytest.approx(y[keep & (z == 1)].mean() - y[keep & (z == 0)].mean())
    assert est.estimate / est.std_error == pytest.approx(ref.statistic, rel=1e-10)


def test_single_treated_unit_warns_and_leaves_se_undefined():
    y, z = complete_data()
    z = np.zeros(30, dtype=int)
    z[4] = 1
    with pytest.warns(ReportKitWarning, match="single unit"):
        est = estimate_effects(y, z, mechanism="complete")[0]
    assert est.estimate == pytest.approx(y[4] - np.delete(y, 4).mean())
    assert est.std_error is None and est.ci_low is None and est.df is None
    json.dumps(est.to_dict(), allow_nan=False)


def test_zero_variance_warns():
    z = np.array([1, 1, 1, 0, 0, 0])
    y = np.array([2.0, 2, 2, 1, 1, 1])
    with pytest.warns(ReportKitWarning, match="variance is zero"):
        est = estimate_effects(y, z, mechanism="complete")[0]
    assert est.std_error == 0.0 and est.ci_low == est.ci_high == 1.0


def test_empty_arm_after_missing_outcomes_warns():
    y, z = complete_data()
    y = np.where(z == 1, np.nan, y)
    with pytest.warns(ReportKitWarning, match="effect is undefined"):
        est = estimate_effects(y, z, mechanism="complete")[0]
    assert est.estimate is None and est.n_treated == 0


# ---------------------------------------------------------------------------
# Neyman (1923) by exact enumeration
# ---------------------------------------------------------------------------

# Invented schedules of both potential outcomes (heterogeneous effects).
Y0 = np.array([3.0, 5.0, 1.0, 4.0, 6.0, 2.0, 7.0, 5.5])
Y1 = np.array([4.0, 9.0, 1.5, 4.0, 8.0, 6.0, 7.5, 5.0])


def enumerate_complete(y0, y1, n1):
    ests, variances = [], []
    for z in assignments(y0.size, n1):
        e = estimate_effects(np.where(z == 1, y1, y0), z, mechanism="complete")[0]
        ests.append(e.estimate)
        variances.append(e.std_error ** 2)
    return np.array(ests), np.array(variances)


def test_neyman_enumeration_complete():
    # Neyman (1923): E[tau_hat] = ATE; Var = S1^2/n1 + S0^2/n0 - S_tau^2/N;
    # E[Var_hat] = S1^2/n1 + S0^2/n0 >= Var.
    n, n1 = Y0.size, 4
    ests, variances = enumerate_complete(Y0, Y1, n1)
    ate = float(np.mean(Y1 - Y0))
    true_var = svar(Y1) / n1 + svar(Y0) / (n - n1) - svar(Y1 - Y0) / n
    assert ests.mean() == pytest.approx(ate, abs=1e-12)
    assert ests.var() == pytest.approx(true_var, rel=1e-10)
    assert variances.mean() == pytest.approx(svar(Y1) / n1 + svar(Y0) / (n - n1), rel=1e-10)
    assert variances.mean() > true_var + 1e-6


def test_neyman_enumeration_complete_constant_effect_is_exact():
    # Neyman (1923): with a constant effect S_tau^2 = 0 and the variance estimator is unbiased.
    ests, variances = enumerate_complete(Y0, Y0 + 2.5, 4)
    assert ests.mean() == pytest.approx(2.5, abs=1e-12)
    assert variances.mean() == pytest.approx(ests.var(), rel=1e-10)


def blocked_enumeration(y0, y1, blocks, n1_by_block):
    labels = np.unique(blocks)
    per_block = [list(assignments(int(np.sum(blocks == b)), n1_by_block[b])) for b in labels]
    ests, variances = [], []
    for combo in itertools.product(*per_block):
        z = np.zeros(blocks.size, dtype=int)
        for b, zb in zip(labels, combo):
            z[blocks == b] = zb
        e = estimate_effects(np.where(z == 1, y1, y0), z, mechanism="blocked", block=blocks)[0]
        ests.append(e.estimate)
        variances.append(e.std_error ** 2)
    return np.array(ests), np.array(variances)


@pytest.mark.parametrize("constant", [False, True])
def test_neyman_enumeration_blocked(constant):
    # Neyman (1923) within each block; blocks are independent, weights n_b / N.
    y0 = np.array([3.0, 5.0, 1.0, 4.0, 6.0, 12.0, 14.0, 11.0, 10.0, 15.0, 13.0])
    y1 = y0 + 1.0 if constant else np.array([4.0, 9.0, 1.5, 4.0, 8.0, 12.5, 18.0, 11.0, 13.0, 15.0, 16.0])
    blocks = np.array([0] * 5 + [1] * 6)
    n1 = {0: 2, 1: 3}
    ests, variances = blocked_enumeration(y0, y1, blocks, n1)
    true_var = expected_var = 0.0
    for b in (0, 1):
        m = blocks == b
        nb = m.sum()
        w = nb / blocks.size
        bound = svar(y1[m]) / n1[b] + svar(y0[m]) / (nb - n1[b])
        true_var += w ** 2 * (bound - svar(y1[m] - y0[m]) / nb)
        expected_var += w ** 2 * bound
    assert ests.mean() == pytest.approx(float(np.mean(y1 - y0)), abs=1e-12)
    assert ests.var() == pytest.approx(true_var, rel=1e-10)
    assert variances.mean() == pytest.approx(expected_var, rel=1e-10)
    if constant:
        assert variances.mean() == pytest.approx(true_var, rel=1e-10)
    else:
        assert variances.mean() > true_var + 1e-6


@pytest.mark.parametrize("constant", [False, True])
def test_paired_enumeration(constant):
    # Matched pairs (Imai 2008): each pair has two equally likely assignments, so
    # Var(tau_j) = ((y1_a + y0_a) - (y1_b + y0_b))^2 / 4 (derived directly); the
    # paired variance estimator is unbiased when every pair effect is the same.
    y0 = np.array([3.0, 4.0, 8.0, 7.0, 1.0, 2.5, 6.0, 6.5, 10.0, 9.0])
    y1 = y0 + 2.0 if constant else np.array([5.0, 4.5, 8.0, 10.0, 3.0, 2.5, 7.0, 9.5, 10.5, 12.0])
    pairs = np.repeat(np.arange(5), 2)
    ests, variances = [], []
    for flips in itertools.product([0, 1], repeat=5):
        z = np.array([[f, 1 - f] for f in flips]).ravel()
        e = estimate_effects(np.where(z == 1, y1, y0), z, mechanism="matched_pairs", block=pairs)[0]
        assert e.method == "paired" and e.df == 4
        ests.append(e.estimate)
        variances.append(e.std_error ** 2)
    ests, variances = np.array(ests), np.array(variances)
    s = y1 + y0
    true_var = np.sum((s[0::2] - s[1::2]) ** 2 / 4) / 25
    assert ests.mean() == pytest.approx(float(np.mean(y1 - y0)), abs=1e-12)
    assert ests.var() == pytest.approx(true_var, rel=1e-10)
    if constant:
        assert variances.mean() == pytest.approx(true_var, rel=1e-10)
    else:
        assert variances.mean() > true_var + 1e-6


def ht_truth(y0, y1, cl, blocks_of_cluster, m_by_block):
    """True sampling variance and expected Neyman bound of the HT estimator on cluster totals."""
    n = y0.size
    t0, t1 = np.bincount(cl, y0), np.bincount(cl, y1)
    sizes = np.bincount(cl)
    true_var = bound = 0.0
    for b, m in m_by_block.items():
        k = blocks_of_cluster == b
        big_m, n_b = k.sum(), sizes[k].sum()
        scale2 = (n_b / n) ** 2 * (big_m / n_b) ** 2
        ney = svar(t1[k]) / m + svar(t0[k]) / (big_m - m)
        bound += scale2 * ney
        true_var += scale2 * (ney - svar(t1[k] - t0[k]) / big_m)
    return true_var, bound


def ht_enumeration(y0, y1, cl, blocks_of_cluster, m_by_block, mechanism):
    per_block = []
    for b, m in m_by_block.items():
        members = np.flatnonzero(blocks_of_cluster == b)
        per_block.append([members[list(c)] for c in itertools.combinations(range(members.size), m)])
    ests, variances = [], []
    block = blocks_of_cluster[cl] if mechanism == "blocked_cluster" else None
    for combo in itertools.product(*per_block):
        zc = np.zeros(blocks_of_cluster.size, dtype=int)
        for chosen in combo:
            zc[chosen] = 1
        z = zc[cl]
        res = estimate_effects(np.where(z == 1, y1, y0), z, mechanism=mechanism,
                               block=block, cluster=cl)
        ht = res[1]
        assert ht.method == "horvitz_thompson"
        ests.append(ht.estimate)
        variances.append(ht.std_error ** 2)
    return np.array(ests), np.array(variances)


@pytest.mark.parametrize("constant_totals", [False, True])
def test_horvitz_thompson_enumeration_cluster(constant_totals):
    # Middleton & Aronow (2015): the HT difference in totals is unbiased for the unit ATE
    # under unequal cluster sizes; its variance is Neyman's formula on scaled cluster totals.
    sizes = np.array([1, 2, 3, 4, 2, 5])
    cl = np.repeat(np.arange(6), sizes)
    rng = np.random.default_rng(11)
    y0 = rng.integers(0, 10, cl.size).astype(float)
    if constant_totals:  # the same effect on every cluster total: bound is exact
        y1 = y0 + (6.0 / sizes)[cl]
    else:
        y1 = y0 + rng.integers(-2, 5, cl.size)
    ests, variances = ht_enumeration(y0, y1, cl, np.zeros(6, int), {0: 3}, "cluster")
    true_var, bound = ht_truth(y0, y1, cl, np.zeros(6, int), {0: 3})
    assert ests.mean() == pytest.approx(float(np.mean(y1 - y0)), abs=1e-12)
    assert ests.var() == pytest.approx(true_var, rel=1e-10)
    assert variances.mean() == pytest.approx(bound, rel=1e-10)
    if constant_totals:
        assert bound == pytest.approx(true_var, rel=1e-10)
    else:
        assert bound > true_var + 1e-6


def test_horvitz_thompson_enumeration_blocked_cluster():
    # Middleton & Aronow (2015) within blocks, blocks weighted by their unit counts.
    sizes = np.array([2, 1, 3, 2, 4, 1, 2, 3, 2])
    blocks_of_cluster = np.array([0, 0, 0, 0, 1, 1, 1, 1, 1])
    cl = np.repeat(np.arange(9), sizes)
    rng = np.random.default_rng(5)
    y0 = rng.integers(0, 10, cl.size).astype(float)
    y1 = y0 + rng.integers(-1, 6, cl.size)
    m = {0: 2, 1: 2}
    ests, variances = ht_enumeration(y0, y1, cl, blocks_of_cluster, m, "blocked_cluster")
    true_var, bound = ht_truth(y0, y1, cl, blocks_of_cluster, m)
    assert ests.mean() == pytest.approx(float(np.mean(y1 - y0)), abs=1e-12)
    assert ests.var() == pytest.approx(true_var, rel=1e-10)
    assert variances.mean() == pytest.approx(bound, rel=1e-10)
    assert bound >= true_var


# ---------------------------------------------------------------------------
# Blocked designs and matched pairs
# ---------------------------------------------------------------------------


def blocked_data(seed=2):
    rng = np.random.default_rng(seed)
    sizes, treated = [8, 10, 6, 12], [2, 5, 4, 3]  # assignment probabilities differ by block
    block = np.repeat(np.arange(4), sizes)
    z = np.concatenate([rng.permutation([1] * t + [0] * (s - t)) for s, t in zip(sizes, treated)])
    y = block * 2.0 + rng.normal(0, 1 + block / 2, block.size) + z * (1 + block)
    return y, z, block


def test_blocked_estimate_equals_inverse_probability_weighting():
    # Horvitz & Thompson (1952) with p_b = n1b/n_b, and statsmodels WLS with weights
    # 1/p_b (treated) and 1/(1 - p_b) (control): both equal the block-size-weighted estimate.
    y, z, block = blocked_data()
    est = estimate_effects(y, z, mechanism="blocked", block=block)[0]
    p = pd.Series(z).groupby(block).transform("mean").to_numpy()
    ipw = np.mean(z * y / p - (1 - z) * y / (1 - p))
    wls = sm.WLS(y, sm.add_constant(z.astype(float)), weights=np.where(z == 1, 1 / p, 1 / (1 - p))).fit()
    assert est.estimate == pytest.approx(ipw, rel=1e-12)
    assert est.estimate == pytest.approx(wls.params[1], rel=1e-10)
    assert est.estimate != pytest.approx(y[z == 1].mean() - y[z == 0].mean())


def test_blocked_se_equals_hc2_contrast_of_cell_means():
    # Samii & Aronow (2012) cell by cell: statsmodels HC2 on a saturated block-by-arm
    # regression gives s^2/n per cell, so the contrast sum_b w_b (mu_1b - mu_0b) has the
    # blocked Neyman variance.
    y, z, block = blocked_data()
    est = estimate_effects(y, z, mechanism="blocked", block=block, alpha=0.05)[0]
    cells = block * 2 + z
    D = (cells[:, None] == np.arange(8)[None, :]).astype(float)
    fit = sm.OLS(y, D).fit(cov_type="HC2")
    w = np.bincount(block) / block.size
    contrast = np.ravel(np.column_stack([-w, w]))
    assert est.estimate == pytest.approx(contrast @ fit.params, rel=1e-10)
    assert est.std_error == pytest.approx(math.sqrt(contrast @ fit.cov_params() @ contrast), rel=1e-10)
    assert est.method == "blocked_neyman"


def test_blocked_df_is_satterthwaite_over_block_arm_components():
    # Satterthwaite (1946): df = (sum V_k)^2 / sum V_k^2/df_k, V_k = w_b^2 s_ab^2 / n_ab,
    # df_k = n_ab - 1, one component per block and arm (written out here).
    y, z, block = blocked_data()
    est = estimate_effects(y, z, mechanism="blocked", block=block)[0]
    w = np.bincount(block) / block.size
    parts = []
    for b in range(4):
        for arm in (0, 1):
            yy = y[(block == b) & (z == arm)]
            parts.append((w[b] ** 2 * svar(yy) / yy.size, yy.size - 1))
    total = sum(v for v, _ in parts)
    assert est.df == pytest.approx(total ** 2 / sum(v * v / d for v, d in parts), rel=1e-10)
    assert est.std_error == pytest.approx(math.sqrt(total), rel=1e-10)


def test_matched_pairs_match_scipy_paired_t_test():
    # scipy.stats.ttest_rel on the within-pair differences: same estimate, SE, df = J - 1, CI.
    rng = np.random.default_rng(9)
    J = 12
    pairs = np.repeat(np.arange(J), 2)
    z = np.array([[f, 1 - f] for f in rng.integers(0, 2, J)]).ravel()
    y = rng.normal(0, 1, 2 * J) + pairs * 0.5 + 0.7 * z
    est = estimate_effects(y, z, mechanism="matched_pairs", block=pairs)[0]
    yt = np.array([y[(pairs == j) & (z == 1)][0] for j in range(J)])
    yc = np.array([y[(pairs == j) & (z == 0)][0] for j in range(J)])
    ref = stats.ttest_rel(yt, yc)
    ci = ref.confidence_interval(confidence_level=0.95)
    assert est.estimate == pytest.approx(np.mean(yt - yc), rel=1e-12)
    assert est.estimate / est.std_error == pytest.approx(ref.statistic, rel=1e-10)
    assert est.df == ref.df == J - 1
    assert (est.ci_low, est.ci_high) == pytest.approx((ci.low, ci.high), rel=1e-10)


def test_small_blocks_use_paired_formula_beside_neyman_blocks():
    # Documented hybrid: blocks with >= 2 units per arm get Neyman's variance; blocks with a
    # single treated (or control) unit enter through the small-block estimator of
    # Pashley & Miratrix (2021), written here in their count form.
    rng = np.random.default_rng(4)
    sizes = [6, 8, 3, 4, 2, 3]
    treated = [3, 4, 1, 1, 1, 2]          # blocks 2..5 have a single treated or control unit
    block = np.repeat(np.arange(6), sizes)
    z = np.concatenate([rng.permutation([1] * t + [0] * (s - t)) for s, t in zip(sizes, treated)])
    y = rng.normal(0, 1, block.size) + z * (0.5 + 0.3 * block)
    est = estimate_effects(y, z, mechanism="blocked", block=block)[0]
    w = np.array(sizes) / sum(sizes)
    tau = np.array([y[(block == b) & (z == 1)].mean() - y[(block == b) & (z == 0)].mean() for b in range(6)])
    var = 0.0
    for b in (0, 1):
        yt, yc = y[(block == b) & (z == 1)], y[(block == b) & (z == 0)]
        var += w[b] ** 2 * (svar(yt) / yt.size + svar(yc) / yc.size)
    var += (sum(sizes[2:]) / sum(sizes)) ** 2 * pashley_miratrix_small(sizes[2:], tau[2:])
    assert est.estimate == pytest.approx(np.dot(w, tau), rel=1e-12)
    assert est.std_error == pytest.approx(math.sqrt(var), rel=1e-10)
    assert est.variance_rule == "neyman+paired"


def test_a_single_small_block_switches_to_paired_for_all_blocks():
    y, z, block = blocked_data()
    z = z.copy()
    z[block == 2] = [1, 0, 0, 0, 0, 0]
    with pytest.warns(ReportKitWarning, match="used for all blocks"):
        est = estimate_effects(y, z, mechanism="blocked", block=block)[0]
    assert est.variance_rule == "paired" and est.df == 3


def test_block_without_treated_outcomes_is_left_out_with_warning():
    y, z, block = blocked_data()
    y = np.where((block == 0) & (z == 1), np.nan, y)
    with pytest.warns(ReportKitWarning, match="left out"):
        est = estimate_effects(y, z, mechanism="blocked", block=block)[0]
    keep = block != 0
    ref = estimate_effects(y[keep], z[keep], mechanism="blocked", block=block[keep])[0]
    assert est.estimate == pytest.approx(ref.estimate)
    assert est.n_missing == 2


# ---------------------------------------------------------------------------
# Cluster designs: CR2 and Horvitz–Thompson
# ---------------------------------------------------------------------------


def test_cr2_matches_direct_bell_mccaffrey_implementation():
    # Bell & McCaffrey (2002) adjustment matrices, implemented independently above.
    sizes = [3, 7, 2, 5, 4, 9, 1, 6, 3]
    y, z, cl, _ = cluster_data(sizes, [1, 0, 1, 1, 0, 0, 1, 0, 1])
    cr2, ht = estimate_effects(y, z, mechanism="cluster", cluster=cl)
    beta, V = direct_cr2(sm.add_constant(z.astype(float)), y, cl)
    assert cr2.estimate == pytest.approx(beta[1], rel=1e-10)
    assert cr2.std_error == pytest.approx(math.sqrt(V[1, 1]), rel=1e-8)
    assert cr2.method == "cr2"
    # Bell & McCaffrey (2002) df, dense hand-written implementation above.
    ref_df = direct_bm_df(sm.add_constant(z.astype(float)), cl, [0.0, 1.0])
    assert cr2.df == pytest.approx(ref_df, rel=1e-9)
    assert cr2.df < 9 - 2


def test_cr2_equals_statsmodels_cluster_robust_up_to_known_factor():
    # Equal cluster sizes, equal numbers of clusters per arm (G/2 each): the CR2 adjustment
    # is (1 - 1/(G/2))^(-1/2) in every cluster, so CR2 = CR0 * G/(G - 2) exactly, and
    # statsmodels' CR1 = CR0 * G/(G-1) * (N-1)/(N-2) (its documented small-sample factor).
    G, m = 8, 4
    y, z, cl, _ = cluster_data([m] * G, [1, 0] * (G // 2), seed=8)
    N = G * m
    cr2 = estimate_effects(y, z, mechanism="cluster", cluster=cl)[0]
    X = sm.add_constant(z.astype(float))
    cr1 = sm.OLS(y, X).fit(cov_type="cluster", cov_kwds={"groups": cl})
    cr0 = sm.OLS(y, X).fit(cov_type="cluster", cov_kwds={"groups": cl, "use_correction": False})
    assert cr2.std_error ** 2 == pytest.approx(cr0.bse[1] ** 2 * G / (G - 2), rel=1e-10)
    factor = (G - 1) * (N - 2) / ((G - 2) * (N - 1))
    assert cr2.std_error ** 2 == pytest.approx(cr1.bse[1] ** 2 * factor, rel=1e-10)


def test_horvitz_thompson_point_estimate():
    # Horvitz & Thompson (1952) with cluster inclusion probability m/M, written out.
    sizes = np.array([3, 7, 2, 5, 4, 9, 1, 6])
    treated = np.array([1, 0, 1, 1, 0, 0, 1, 0])
    y, z, cl, _ = cluster_data(sizes, treated)
    ht = estimate_effects(y, z, mechanism="cluster", cluster=cl)[1]
    totals = np.bincount(cl, y)
    p = treated.mean()
    ref = (np.sum(totals[treated == 1]) / p - np.sum(totals[treated == 0]) / (1 - p)) / y.size
    assert ht.estimate == pytest.approx(ref, rel=1e-12)
    assert ht.variance_rule == "ht"
    # The estimate is (M/N) x (difference in mean cluster totals), so its t statistic and
    # df are those of scipy's Welch test on the totals (Welch 1947).
    welch = stats.ttest_ind(totals[treated == 1], totals[treated == 0], equal_var=False)
    assert ht.estimate / ht.std_error == pytest.approx(welch.statistic, rel=1e-10)
    assert ht.df == pytest.approx(welch.df, rel=1e-10)


def test_blocked_cluster_cr2_equals_saturated_regression_contrast():
    # Bell & McCaffrey (2002) CR2 on a regression saturated in block x arm, contrast with
    # block weights n_b / N (direct implementation above).
    sizes = [2, 3, 4, 2, 3, 1, 2, 5, 3, 2, 4, 3]
    treated = [1, 1, 0, 0, 1, 0, 1, 0, 1, 0, 0, 1]
    boc = np.repeat([0, 1, 2], 4)
    y, z, cl, _ = cluster_data(sizes, treated, seed=12)
    block = boc[cl]
    cr2, ht = estimate_effects(y, z, mechanism="blocked_cluster", block=block, cluster=cl)
    cells = block * 2 + z
    D = (cells[:, None] == np.arange(6)[None, :]).astype(float)
    beta, V = direct_cr2(D, y, cl)
    w = np.bincount(block) / block.size
    contrast = np.ravel(np.column_stack([-w, w]))
    assert cr2.estimate == pytest.approx(contrast @ beta, rel=1e-10)
    assert cr2.std_error == pytest.approx(math.sqrt(contrast @ V @ contrast), rel=1e-8)
    assert ht.method == "horvitz_thompson"
    # Bell & McCaffrey (2002) df of the block-weighted contrast (dense reference above).
    assert cr2.df == pytest.approx(direct_bm_df(D, cl, contrast), rel=1e-9)


def test_cluster_pairs_use_paired_formula():
    # Cluster matched pairs of unequal sizes: Pashley & Miratrix (2021) small-block variance
    # (count form written out above), shift invariant unlike J/(J-1) sum (w_j tau_j - mean)^2.
    sizes = [2, 4, 3, 3, 5, 2, 1, 4, 3, 2]
    treated = [1, 0, 0, 1, 1, 0, 0, 1, 1, 0]
    y, z, cl, _ = cluster_data(sizes, treated, seed=13)
    block = np.repeat(np.arange(5), 2)[cl]
    cr2 = estimate_effects(y, z, mechanism="blocked_cluster", block=block, cluster=cl)[0]
    w = np.bincount(block) / block.size
    tau = np.array([y[(block == j) & (z == 1)].mean() - y[(block == j) & (z == 0)].mean() for j in range(5)])
    a = w * tau
    assert cr2.estimate == pytest.approx(a.sum(), rel=1e-12)
    assert cr2.std_error == pytest.approx(math.sqrt(pashley_miratrix_small(np.bincount(block), tau)),
                                          rel=1e-10)
    assert cr2.variance_rule == "paired" and cr2.df == 4


def test_single_cluster_in_an_arm_warns():
    y, z, cl, _ = cluster_data([3, 4, 2, 5], [1, 0, 0, 0])
    with pytest.warns(ReportKitWarning, match="single unit \\(or cluster\\)"):
        cr2, ht = estimate_effects(y, z, mechanism="cluster", cluster=cl)
    assert cr2.std_error is None and ht.std_error is None
    assert cr2.estimate is not None


# ---------------------------------------------------------------------------
# Covariate adjustment (Lin 2013)
# ---------------------------------------------------------------------------


def lin_design(z, X, extra=None):
    Xc = X - X.mean(axis=0)
    cols = [np.ones(z.size), z.astype(float), Xc, z[:, None] * Xc]
    if extra is not None:
        cols.append(extra)
    return np.column_stack(cols)


def test_lin_matches_statsmodels_hc2():
    # Lin (2013): OLS on (1, z, Xc, z*Xc) with HC2, here fitted by statsmodels.
    y, z = complete_data(n=40, n1=18)
    X = np.random.default_rng(21).normal(size=(40, 3))
    y = y + X @ [1.0, -0.5, 0.3]
    est = estimate_adjusted(y, z, X, mechanism="complete")
    fit = sm.OLS(y, lin_design(z, X)).fit(cov_type="HC2")
    assert est.estimate == pytest.approx(fit.params[1], rel=1e-10)
    assert est.std_error == pytest.approx(fit.bse[1], rel=1e-8)
    assert est.df == 40 - 8 and est.method == "lin_hc2" and est.estimator == "adjusted"


def test_lin_blocked_with_interacted_block_indicators_matches_statsmodels():
    # Lin (2013) with centred block indicators treated as covariates; statsmodels HC2.
    y, z, block = blocked_data()
    X = np.random.default_rng(22).normal(size=(block.size, 2))
    est = estimate_adjusted(y, z, X, mechanism="blocked", block=block)
    dummies = (block[:, None] == np.arange(1, 4)[None, :]).astype(float)
    fit = sm.OLS(y, lin_design(z, np.column_stack([X, dummies]))).fit(cov_type="HC2")
    assert est.estimate == pytest.approx(fit.params[1], rel=1e-10)
    assert est.std_error == pytest.approx(fit.bse[1], rel=1e-8)


def test_lin_without_covariates_reproduces_blocked_neyman():
    # With no covariates the interacted block indicators make the regression saturated,
    # so Lin's estimate and HC2 SE coincide with the blocked difference in means
    # (Samii & Aronow 2012 applied per cell).
    y, z, block = blocked_data()
    unadj = estimate_effects(y, z, mechanism="blocked", block=block)[0]
    adj = estimate_adjusted(y, z, np.zeros((block.size, 0)), mechanism="blocked", block=block)
    assert adj.estimate == pytest.approx(unadj.estimate, rel=1e-10)
    assert adj.std_error == pytest.approx(unadj.std_error, rel=1e-10)


def test_lin_matched_pairs_uses_pair_fixed_effects():
    # Pairs cannot carry interacted indicators; they enter additively. statsmodels HC2.
    rng = np.random.default_rng(23)
    J = 15
    pairs = np.repeat(np.arange(J), 2)
    z = np.array([[f, 1 - f] for f in rng.integers(0, 2, J)]).ravel()
    X = rng.normal(size=(2 * J, 1))
    y = rng.normal(size=2 * J) + 0.5 * z + X[:, 0] + pairs * 0.2
    est = estimate_adjusted(y, z, X, mechanism="matched_pairs", block=pairs)
    fe = (pairs[:, None] == np.arange(1, J)[None, :]).astype(float)
    fit = sm.OLS(y, lin_design(z, X, fe)).fit(cov_type="HC2")
    assert est.estimate == pytest.approx(fit.params[1], rel=1e-10)
    assert est.std_error == pytest.approx(fit.bse[1], rel=1e-8)


def test_lin_cluster_matches_direct_cr2():
    # Lin (2013) regression with CR2 (Bell & McCaffrey 2002, direct implementation above).
    sizes = [3, 7, 2, 5, 4, 9, 1, 6, 3, 4]
    y, z, cl, X = cluster_data(sizes, [1, 0, 1, 1, 0, 0, 1, 0, 1, 0], covariates=2)
    est = estimate_adjusted(y, z, X, mechanism="cluster", cluster=cl)
    beta, V = direct_cr2(lin_design(z, X), y, cl)
    assert est.estimate == pytest.approx(beta[1], rel=1e-10)
    assert est.std_error == pytest.approx(math.sqrt(V[1, 1]), rel=1e-8)
    assert est.method == "lin_cr2"
    # Bell & McCaffrey (2002) df of the Lin contrast (dense reference above).
    D = lin_design(z, X)
    assert est.df == pytest.approx(direct_bm_df(D, cl, np.eye(D.shape[1])[1]), rel=1e-9)


@pytest.mark.parametrize(("sizes", "treated", "seed"), [
    ([2, 3, 4, 2, 3, 1, 2, 5, 3, 2, 4, 3, 2, 2, 3, 4],
     [1, 1, 0, 0, 1, 0, 1, 0, 1, 0, 0, 1, 0, 1, 1, 0], 14),
    # clusters of many sizes, several of each: the batched CR2 adjustment (one eigh per
    # cluster size) must equal the cluster-by-cluster formula to 1e-10
    ([1, 2, 3, 4, 5, 6, 2, 3, 4, 2, 5, 1, 3, 3, 2, 4, 6, 2, 3, 1, 2, 4, 3, 2], [1, 0] * 12, 31),
])
def test_lin_blocked_cluster_matches_direct_cr2(sizes, treated, seed):
    # Blocked cluster design, >= 2 clusters per arm in every block: Lin regression with
    # centred, interacted block indicators; CR2 by the direct Bell & McCaffrey (2002) code.
    y, z, cl, X = cluster_data(sizes, treated, seed=seed, covariates=2)
    block = np.repeat([0, 1, 2, 3], len(sizes) // 4)[cl]
    est = estimate_adjusted(y, z, X, mechanism="blocked_cluster", block=block, cluster=cl)
    dummies = (block[:, None] == np.arange(1, 4)[None, :]).astype(float)
    beta, V = direct_cr2(lin_design(z, np.column_stack([X, dummies])), y, cl)
    assert est.estimate == pytest.approx(beta[1], rel=1e-10)
    assert est.std_error == pytest.approx(math.sqrt(V[1, 1]), rel=1e-10)
    D = lin_design(z, np.column_stack([X, dummies]))
    assert est.df == pytest.approx(direct_bm_df(D, cl, np.eye(D.shape[1])[1]), rel=1e-9)


def test_lin_cluster_pairs_use_additive_pair_effects_with_cr2():
    # Cluster pairs: pair indicators enter additively; CR2 by the direct code above.
    sizes = [3, 4, 2, 5, 4, 4, 3, 2, 5, 3, 2, 4]
    treated = [1, 0, 0, 1, 1, 0, 0, 1, 1, 0, 0, 1]
    y, z, cl, X = cluster_data(sizes, treated, seed=15, covariates=1)
    block = np.repeat(np.arange(6), 2)[cl]
    with pytest.warns(ReportKitWarning, match="enter additively"):
        est = estimate_adjusted(y, z, X, mechanism="blocked_cluster", block=block, cluster=cl)
    fe = (block[:, None] == np.arange(1, 6)[None, :]).astype(float)
    beta, V = direct_cr2(lin_design(z, X, fe), y, cl)
    assert est.estimate == pytest.approx(beta[1], rel=1e-10)
    assert est.std_error == pytest.approx(math.sqrt(V[1, 1]), rel=1e-8)


def test_lin_constant_covariate_is_dropped_with_warning():
    y, z = complete_data()
    x = np.random.default_rng(2).normal(size=30)
    X = np.column_stack([x, np.ones(30)])
    with pytest.warns(ReportKitWarning, match="constant"):
        est = estimate_adjusted(y, z, X, mechanism="complete")
    fit = sm.OLS(y, lin_design(z, x[:, None])).fit(cov_type="HC2")
    assert est.estimate == pytest.approx(fit.params[1], rel=1e-10)


# ---------------------------------------------------------------------------
# Noncompliance
# ---------------------------------------------------------------------------


def compliance_data(seed=31, n=60):
    rng = np.random.default_rng(seed)
    z = rng.permutation([1] * 30 + [0] * (n - 30))
    complier = rng.random(n) < 0.7
    always = rng.random(n) < 0.1
    d = np.where(complier, z, always).astype(float)
    y = rng.normal(0, 1, n) + 2.0 * d + 0.5 * complier
    return y, z, d


def test_cace_equals_two_stage_least_squares():
    # Angrist, Imbens & Rubin (1996): the Wald ratio equals the just-identified 2SLS
    # coefficient; its delta-method SE equals the IV sandwich with HC2 leverages (numpy above).
    y, z, d = compliance_data()
    res = estimate_noncompliance(y, z, d, mechanism="complete")
    beta, se = two_sls(y, d, z)
    assert res.cace.estimate == pytest.approx(beta, rel=1e-10)
    assert res.cace.std_error == pytest.approx(se, rel=1e-8)
    assert res.cace.method == "wald_delta" and res.cace.estimand == "CACE"
    itt = estimate_effects(y, z, mechanism="complete")[0]
    assert res.itt.estimate == itt.estimate and res.itt.std_error == itt.std_error
    assert res.itt_takeup.estimate == pytest.approx(d[z == 1].mean() - d[z == 0].mean())
    assert res.rate_treated == pytest.approx(d[z == 1].mean())
    assert res.rate_control == pytest.approx(d[z == 0].mean())
    json.dumps(res.to_dict(), allow_nan=False)


def test_cace_blocked_delta_method_written_out():
    # Delta method for a ratio of two blocked ITTs, with the covariance of the two written
    # out from the within-block sample covariances (Neyman-type, per arm).
    y, z, block = blocked_data()
    rng = np.random.default_rng(41)
    d = np.where(z == 1, rng.random(z.size) < 0.8, rng.random(z.size) < 0.1).astype(float)
    res = estimate_noncompliance(y, z, d, mechanism="blocked", block=block)
    w = np.bincount(block) / block.size
    ity = itd = vy = vd = cov = 0.0
    for b in range(4):
        for arm, sign in ((1, 1), (0, -1)):
            m = (block == b) & (z == arm)
            ity += sign * w[b] * y[m].mean()
            itd += sign * w[b] * d[m].mean()
            vy += w[b] ** 2 * svar(y[m]) / m.sum()
            vd += w[b] ** 2 * svar(d[m]) / m.sum()
            cov += w[b] ** 2 * np.cov(y[m], d[m])[0, 1] / m.sum()
    c = ity / itd
    se = math.sqrt(vy - 2 * c * cov + c * c * vd) / abs(itd)
    assert res.cace.estimate == pytest.approx(c, rel=1e-10)
    assert res.cace.std_error == pytest.approx(se, rel=1e-8)


def test_missing_outcome_drops_unit_from_both_itts():
    y, z, d = compliance_data()
    y = y.copy()
    y[[1, 2]] = np.nan
    res = estimate_noncompliance(y, z, d, mechanism="complete")
    keep = ~np.isnan(y)
    beta, _ = two_sls(y[keep], d[keep], z[keep])
    assert res.cace.estimate == pytest.approx(beta, rel=1e-10)
    assert res.itt_takeup.n_treated + res.itt_takeup.n_control == 58
    assert res.cace.n_missing == 2


def test_no_first_stage_warns_and_leaves_cace_undefined():
    y, z, _ = compliance_data()
    d = np.zeros(z.size)
    d[[np.flatnonzero(z == 1)[0], np.flatnonzero(z == 0)[0]]] = 1.0
    with pytest.warns(ReportKitWarning, match="CACE is undefined"):
        res = estimate_noncompliance(y, z, d, mechanism="complete")
    assert res.cace.estimate is None


def test_weak_first_stage_warns():
    y, z, _ = compliance_data()
    rng = np.random.default_rng(3)
    d = (rng.random(z.size) < np.where(z == 1, 0.35, 0.25)).astype(float)
    with pytest.warns(ReportKitWarning, match="weak first stage"):
        estimate_noncompliance(y, z, d, mechanism="complete")


# ---------------------------------------------------------------------------
# Subgroups
# ---------------------------------------------------------------------------


def test_subgroups_levels_and_differences_unclustered():
    y, z = complete_data(n=48, n1=24, seed=17)
    g = np.array(["south", "north", "east"] * 16, dtype=object)
    g[0] = None
    res = estimate_subgroups(y, z, g, mechanism="complete")
    assert res.levels == ("east", "north", "south") and res.n_missing_group == 1
    for level, est in zip(res.levels, res.estimates):
        m = g == level
        ref = stats.ttest_ind(y[m & (z == 1)], y[m & (z == 0)], equal_var=False)
        assert est.estimate / est.std_error == pytest.approx(ref.statistic, rel=1e-10)
        assert est.estimand == "subgroup ATE"
    diff = res.differences[0]
    assert (diff.level, diff.reference) == ("north", "east")
    assert diff.estimate == pytest.approx(res.estimates[1].estimate - res.estimates[0].estimate)
    assert diff.std_error == pytest.approx(math.hypot(res.estimates[1].std_error, res.estimates[0].std_error))
    json.dumps(res.to_dict(), allow_nan=False)


def test_subgroup_difference_with_shared_clusters_matches_joint_cr2():
    # Clusters hold units of both levels: the difference's SE is the CR2 SE of the contrast
    # in a regression saturated in level x arm (Bell & McCaffrey 2002, direct implementation).
    sizes = [4, 6, 5, 3, 7, 4, 5, 6]
    y, z, cl, _ = cluster_data(sizes, [1, 0, 1, 0, 1, 0, 1, 0], seed=19)
    g = np.random.default_rng(2).integers(0, 2, y.size)
    res = estimate_subgroups(y, z, g, mechanism="cluster", cluster=cl)
    cells = g * 2 + z
    D = (cells[:, None] == np.arange(4)[None, :]).astype(float)
    beta, V = direct_cr2(D, y, cl)
    contrast = np.array([1.0, -1.0, -1.0, 1.0])  # (g1: t - c) - (g0: t - c)
    diff = res.differences[0]
    assert diff.estimate == pytest.approx(contrast @ beta, rel=1e-10)
    assert diff.std_error == pytest.approx(math.sqrt(contrast @ V @ contrast), rel=1e-8)
    naive = math.hypot(res.estimates[0].std_error, res.estimates[1].std_error)
    assert diff.std_error != pytest.approx(naive, rel=1e-6)


def test_subgroup_level_without_treated_units_warns():
    y, z = complete_data()
    g = np.where(z == 1, "a", "b").astype(object)
    g[:4] = "a"
    with pytest.warns(ReportKitWarning):
        res = estimate_subgroups(y, z, g, mechanism="complete")
    assert res.estimates[1].estimate is None
    assert res.differences[0].estimate is None


# ---------------------------------------------------------------------------
# study_estimates: the results.json rows
# ---------------------------------------------------------------------------


def make_study(frame, *, mechanism="complete", block=None, cluster=None, covariates=(),
               compliance=None, subgroups=(), outcomes=("score",)):
    spec = Spec(
        path=Path("/nonexistent/design.yaml"), spec_version=1, title="Invented study",
        summary="", data=DataSpec(units="data/units.csv", id="unit_id"),
        design=DesignSpec(mechanism=mechanism, treatment="assigned", block=block, cluster=cluster),
        analysis=AnalysisSpec(covariates=tuple(covariates), adjust=True),
        outcomes=tuple(OutcomeSpec(column=c, label=c) for c in outcomes),
        compliance=None if compliance is None else ComplianceSpec(received=compliance),
        subgroups=tuple(subgroups),
    )
    return Study(spec=spec, frame=frame, inputs=())


def check_rows(rows):
    for row in rows:
        assert tuple(row) == ESTIMATE_KEYS + FUNDER_KEYS
        for key in ("estimate", "std_error", "ci_low", "ci_high", "df"):
            assert row[key] is None or type(row[key]) is float
        assert type(row["n_treated"]) is int and type(row["n_control"]) is int
    json.dumps(rows, allow_nan=False)


def test_study_estimates_complete_with_everything():
    y, z, d = compliance_data()
    rng = np.random.default_rng(50)
    frame = pd.DataFrame({
        "unit_id": np.arange(60), "assigned": z, "attended": d,
        "score": y, "baseline": rng.normal(size=60) + y * 0.3,
        "gender": np.where(rng.random(60) < 0.5, "f", "m"),
    })
    frame.loc[[3, 9], "score"] = np.nan
    study = make_study(frame, covariates=["baseline"], compliance="attended", subgroups=["gender"])
    rows = study_estimates(study)
    check_rows(rows)
    kinds = [(r["outcome"], r["estimand"], r["estimator"], r["method"], r["subgroup"]) for r in rows]
    assert kinds == [
        ("score", "ITT", "unadjusted", "neyman", None),
        ("score", "ITT", "adjusted", "lin_hc2", None),
        ("score", "CACE", "unadjusted", "wald_delta", None),
        ("attended", "ITT", "unadjusted", "neyman", None),
        ("score", "subgroup ATE", "unadjusted", "neyman", "gender=f"),
        ("score", "subgroup ATE", "unadjusted", "neyman", "gender=m"),
    ]
    keep = ~np.isnan(frame["score"].to_numpy())
    beta, _ = two_sls(y[keep], d[keep], z[keep])  # 2SLS reference as above
    assert rows[2]["estimate"] == pytest.approx(beta, rel=1e-10)
    assert rows[0]["n_treated"] + rows[0]["n_control"] == 58
    assert rows[3]["n_treated"] + rows[3]["n_control"] == 60
    diffs = study_subgroup_differences(study)
    assert [(r["subgroup"], r["reference"]) for r in diffs] == [("gender=m", "gender=f")]


def test_study_estimates_cluster_design_reports_cr2_and_ht():
    sizes = [3, 5, 4, 2, 6, 3, 4, 5]
    y, z, cl, _ = cluster_data(sizes, [1, 0, 1, 0, 1, 0, 1, 0])
    frame = pd.DataFrame({"unit_id": np.arange(y.size), "assigned": z, "score": y,
                          "village": [f"v{c}" for c in cl]})
    rows = study_estimates(make_study(frame, mechanism="cluster", cluster="village"))
    check_rows(rows)
    assert [(r["estimand"], r["method"]) for r in rows] == [("ATE", "cr2"), ("ATE", "horvitz_thompson")]
    # Bell & McCaffrey (2002) df (dense reference above), not clusters - 2.
    assert rows[0]["df"] == pytest.approx(direct_bm_df(sm.add_constant(z.astype(float)), cl, [0, 1]),
                                          rel=1e-9)


def test_study_estimates_impute_missing_covariates_with_mean_and_indicator():
    # Missing baseline values: mean imputation plus a missingness indicator (the balance
    # check's rule), then Lin's regression; reference: statsmodels OLS with HC2 on the
    # same design written out here (Lin 2013 interacted form).
    y, z = complete_data()
    base = np.random.default_rng(1).normal(size=30)
    base[np.r_[np.flatnonzero(z == 1)[:2], np.flatnonzero(z == 0)[:3]]] = np.nan
    frame = pd.DataFrame({"unit_id": np.arange(30), "assigned": z, "score": y, "baseline": base})
    rows = study_estimates(make_study(frame, covariates=["baseline"]))
    adjusted = [r for r in rows if r["estimator"] == "adjusted"]
    miss = np.isnan(base)
    filled = np.where(miss, base[~miss].mean(), base)
    X = np.column_stack([filled, miss.astype(float)])
    fit = sm.OLS(y, lin_design(z, X)).fit(cov_type="HC2")
    assert adjusted[0]["estimate"] == pytest.approx(fit.params[1], rel=1e-10)
    assert adjusted[0]["std_error"] == pytest.approx(fit.bse[1], rel=1e-8)


def test_estimate_to_dict_is_json_safe_and_keeps_fields():
    est = Estimate(estimand="ATE", estimator="unadjusted", estimate=np.float64(1.5),
                   std_error=float("nan"), ci_low=None, ci_high=None, df=np.float64(3),
                   n_treated=np.int64(4), n_control=5, method="neyman")
    out = est.to_dict()
    assert out["std_error"] is None and type(out["estimate"]) is float
    assert type(out["n_treated"]) is int
    assert set(ESTIMATE_KEYS) - {"outcome", "subgroup"} <= set(out)


def test_compliance_rates_match_group_means():
    # Reference: pandas groupby means (direct computation of take-up by arm).
    import pandas as pd

    from report_kit.estimation.neyman import compliance_rates

    z = np.array([1, 1, 1, 1, 0, 0, 0, 0, 0])
    d = np.array([1, 0, 1, np.nan, 0, 1, 0, 0, 0], dtype=float)
    frame = pd.DataFrame({"z": z, "d": d}).dropna()
    means = frame.groupby("z")["d"].mean()
    got = compliance_rates(z, d)
    assert got["rate_treated"] == pytest.approx(means[1]) and got["rate_control"] == pytest.approx(means[0])
    assert (got["n_treated"], got["n_control"]) == (3, 5)


def test_study_estimates_keeps_unadjusted_when_lin_cannot_be_fitted():
    # 12 units and 8 covariates: the interacted regression has more coefficients than units.
    rng = np.random.default_rng(8)
    z = np.array([1, 0] * 6)
    frame = pd.DataFrame({"unit_id": np.arange(12), "assigned": z, "score": rng.normal(size=12) + z})
    names = [f"x{k}" for k in range(8)]
    for name in names:
        frame[name] = rng.normal(size=12)
    with pytest.warns(ReportKitWarning) as caught:
        rows = study_estimates(make_study(frame, covariates=names))
    assert any("no covariate-adjusted estimate" in str(w.message) for w in caught)
    assert [r["estimator"] for r in rows] == ["unadjusted"]
    y1, y0 = frame["score"][z == 1], frame["score"][z == 0]
    assert rows[0]["estimate"] == pytest.approx(y1.mean() - y0.mean())  # direct group means
