"""Anderson–Rubin interval for the CACE.

Outside references: scipy's Welch t statistic of the ITT of y - c d (Welch 1947) at the
interval's end points, which must sit exactly at the critical value (definition of test
inversion, Anderson & Rubin 1949); agreement with the Wald interval when the first stage
is strong (both are first-order equivalent, Imbens & Rosenbaum 2005); unbounded sets when
the first stage is not significant (Dufour 1997: a valid interval must be unbounded with
positive probability under weak instruments).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy import stats

from report_kit.errors import ReportKitWarning
from report_kit.estimation.neyman import estimate_effects, estimate_noncompliance


def _data(n, takeup_gap, seed):
    rng = np.random.default_rng(seed)
    z = rng.permutation(np.arange(n) % 2)
    d = (rng.random(n) < np.where(z == 1, 0.2 + takeup_gap, 0.2)).astype(float)
    y = rng.normal(size=n) + 1.5 * d
    return y, z, d


def test_end_points_sit_at_the_critical_value_of_welch_t():
    y, z, d = _data(200, 0.5, 1)
    res = estimate_noncompliance(y, z, d, mechanism="complete")
    ar = res.anderson_rubin
    assert ar["shape"] == "bounded"
    q = stats.t.ppf(0.975, ar["df"])
    for c in (ar["ci_low"], ar["ci_high"]):
        u = y - c * d
        t = stats.ttest_ind(u[z == 1], u[z == 0], equal_var=False).statistic
        assert abs(t) == pytest.approx(q, rel=1e-9)
    # inside the interval the test does not reject, the CACE itself has t = 0
    u = y - res.cace.estimate * d
    assert stats.ttest_ind(u[z == 1], u[z == 0], equal_var=False).statistic == pytest.approx(0, abs=1e-9)


def test_strong_first_stage_agrees_with_wald():
    y, z, d = _data(20000, 0.6, 2)
    res = estimate_noncompliance(y, z, d, mechanism="complete")
    ar, wald = res.anderson_rubin, res.cace
    width = wald.ci_high - wald.ci_low
    assert ar["ci_low"] == pytest.approx(wald.ci_low, abs=0.02 * width)
    assert ar["ci_high"] == pytest.approx(wald.ci_high, abs=0.02 * width)


def test_insignificant_first_stage_gives_unbounded_set():
    y, z, d = _data(60, 0.0, 3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ReportKitWarning)
        res = estimate_noncompliance(y, z, d, mechanism="complete")
    first = res.itt_takeup
    assert abs(first.estimate / first.std_error) < stats.t.ppf(0.975, first.df or 1e9) + 1
    assert res.anderson_rubin["shape"] in ("two_half_lines", "whole_line")
    assert res.anderson_rubin["ci_low"] is None and res.anderson_rubin["ci_high"] is None


def test_cluster_design_end_points_match_cr2_t_statistic():
    # Cluster design: the end points are where the CR2 t statistic of ITT(y - c d),
    # recomputed by the library's own unadjusted estimator on u, hits the critical value.
    rng = np.random.default_rng(4)
    cl = np.repeat(np.arange(30), rng.integers(3, 9, 30))
    zc = rng.permutation(np.arange(30) % 2)
    z = zc[cl]
    d = (rng.random(cl.size) < np.where(z == 1, 0.8, 0.1)).astype(float)
    y = rng.normal(size=30)[cl] + rng.normal(size=cl.size) + 2 * d
    res = estimate_noncompliance(y, z, d, mechanism="cluster", cluster=cl)
    ar = res.anderson_rubin
    q = stats.t.ppf(0.975, ar["df"])
    for c in (ar["ci_low"], ar["ci_high"]):
        est = estimate_effects(y - c * d, z, mechanism="cluster", cluster=cl)[0]
        assert abs(est.estimate / est.std_error) == pytest.approx(q, rel=1e-9)
