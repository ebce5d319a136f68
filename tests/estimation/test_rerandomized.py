"""Tests of report_kit.estimation.rerandomized (Li, Ding & Rubin 2018) against outside references.

Sources, named beside each check: scipy.stats.chi2 (variance of the truncated
component, Morgan & Rubin 2012), scipy.stats.norm (the Neyman interval as the
limit without rerandomization), and a simulation of rerandomized assignments
of an invented finite population (coverage and the variance-reduction formula
of Morgan & Rubin 2012, recalled from memory: Var = V (1 - (1 - v_a) R^2),
v_a = P(chi2_{K+2} <= a) / P(chi2_K <= a)).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from report_kit.design.mechanism import mechanism_from_arrays
from report_kit.design.rerandomization import Rerandomization, draw_rerandomized, rerandomized_assignments
from report_kit.estimation.rerandomized import rerandomized_interval, truncated_normal_component


@pytest.mark.parametrize("k,a", [(1, 0.2), (2, 0.5), (3, 2.0)])
def test_truncated_component_variance_matches_chi_squared_ratio(k, a):
    # Var L_{K,a} = P(chi2_{K+2} <= a) / P(chi2_K <= a) (Morgan & Rubin 2012; scipy.stats.chi2)
    draws = truncated_normal_component(k, a)
    ref = stats.chi2.cdf(a, k + 2) / stats.chi2.cdf(a, k)
    assert draws.var() == pytest.approx(ref, rel=0.02)
    assert abs(draws.mean()) < 0.01


def test_without_rerandomization_the_interval_is_the_neyman_normal_interval():
    # a huge max_distance accepts everything: L is standard normal, so the interval is
    # estimate -+ z_{0.975} sqrt(V) (scipy.stats.norm.ppf)
    rng = np.random.default_rng(2)
    x = rng.normal(size=(60, 2))
    z = np.zeros(60, dtype=int)
    z[:30] = 1
    y = x[:, 0] + rng.normal(size=60) + 0.5 * z
    res = rerandomized_interval(y, z, x, 1e6)
    v = y[z == 1].var(ddof=1) / 30 + y[z == 0].var(ddof=1) / 30
    half = stats.norm.ppf(0.975) * math.sqrt(v)
    assert res.ci_high - res.estimate == pytest.approx(half, rel=0.01)
    assert (res.neyman_ci_low, res.neyman_ci_high) == pytest.approx((res.estimate - half, res.estimate + half))


def test_simulated_rerandomization_coverage_and_variance_reduction():
    # simulation: 400 acceptable assignments of an invented population with a constant effect of 1
    n, a = 120, stats.chi2.ppf(0.1, 2)
    rng = np.random.default_rng(5)
    x = rng.normal(size=(n, 2))
    y0 = 2 * x[:, 0] + x[:, 1] + rng.normal(size=n)
    crit = Rerandomization.from_arrays(x, a)
    z_obs = draw_rerandomized("complete", np.arange(n), crit, seed=1)[0]
    mech = mechanism_from_arrays("complete", z_obs)
    rows = np.vstack(list(rerandomized_assignments(mech, crit, max_exact=0, draws=400, seed=3).chunks()))
    comp = truncated_normal_component(2, a)
    results = [rerandomized_interval(y0 + z, z, x, a, component=comp) for z in rows]
    estimates = np.array([r.estimate for r in results])
    coverage = np.mean([r.ci_low <= 1 <= r.ci_high for r in results])
    assert coverage >= 0.90  # nominal 0.95; binomial sd over 400 runs about 0.011, plus finite-n slack
    assert np.mean([r.ci_high - r.ci_low for r in results]) < 0.7 * np.mean(
        [r.neyman_ci_high - r.neyman_ci_low for r in results])
    # Morgan & Rubin (2012) variance under rerandomization (from memory), population quantities
    n1 = n0 = n // 2
    s2 = y0.var(ddof=1)
    v = s2 / n1 + s2 / n0
    cxy = np.array([np.cov(x[:, j], y0)[0, 1] for j in range(2)])
    vxx = np.cov(x, rowvar=False) * (1 / n1 + 1 / n0)
    vtx = cxy / n1 + cxy / n0
    r2 = vtx @ np.linalg.solve(vxx, vtx) / v
    va = stats.chi2.cdf(a, 4) / stats.chi2.cdf(a, 2)
    assert estimates.var() == pytest.approx(v * (1 - (1 - va) * r2), rel=0.2)


def test_misuse_raises_value_errors():
    with pytest.raises(ValueError, match="same units"):
        rerandomized_interval([1.0, np.nan, 2.0, 3.0], [1, 0, 1, 0], np.arange(4.0), 1.0)
    with pytest.raises(ValueError, match="two units"):
        rerandomized_interval([1.0, 2.0, 3.0], [1, 0, 0], np.arange(3.0), 1.0)
    with pytest.raises(ValueError, match="`k` must be"):
        truncated_normal_component(0, 1.0)
