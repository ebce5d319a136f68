"""Small-sample corrections of the design-based estimators.

Outside references: a coverage simulation of the Bell & McCaffrey (2002) degrees of
freedom (Imbens & Kolesar 2016 report the same pattern: G - 2 under-covers with few
treated clusters), and shift invariance of the variance of block designs
(Pashley & Miratrix 2021), a property any estimator of the variance under a constant
additive effect must have.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy import stats

from report_kit.errors import ReportKitWarning
from report_kit.estimation.neyman import estimate_adjusted, estimate_effects
from tests.estimation.test_estimate import cluster_data, direct_cr2, lin_design


def test_bell_mccaffrey_df_cover_better_than_clusters_minus_two():
    # 15 clusters, 3 treated (issue 15 item 1). Normal cluster and unit errors, no effect.
    # The reported interval (Bell & McCaffrey df) must be closer to 95% than the same
    # interval with G - 2 = 13 df. 1000 draws: Monte Carlo SE about 0.7 percentage points.
    sizes = [20, 4, 4] + [8] * 12
    cl = np.repeat(np.arange(15), sizes)
    z = (cl < 3).astype(int)
    rng = np.random.default_rng(2024)
    draws = 1000
    hit_bm = hit_g2 = 0
    q13 = stats.t.ppf(0.975, 13)
    for _ in range(draws):
        y = rng.normal(0, 1, 15)[cl] + rng.normal(0, 1, cl.size)
        est = estimate_effects(y, z, mechanism="cluster", cluster=cl)[0]
        hit_bm += est.ci_low <= 0.0 <= est.ci_high
        hit_g2 += abs(est.estimate) <= q13 * est.std_error
    assert 2.0 < est.df < 3.0          # "about 2.5" in the example
    cov_bm, cov_g2 = hit_bm / draws, hit_g2 / draws
    mc_se = np.sqrt(0.95 * 0.05 / draws)
    assert cov_g2 < 0.95 - 3 * mc_se   # G - 2 under-covers beyond Monte Carlo error
    assert abs(cov_bm - 0.95) < abs(cov_g2 - 0.95)
    assert cov_bm > 0.95 - 4 * mc_se


def test_batched_cr2_agrees_with_cluster_by_cluster_formula_to_1e10():
    # Clusters of many sizes (several of each) in four blocks: the batched adjustment must
    # equal the cluster-by-cluster Bell & McCaffrey (2002) CR2, written out densely in
    # tests/estimation/test_estimate.py (matrix inverse + scipy sqrtm).
    sizes = [1, 2, 3, 4, 5, 6, 2, 3, 4, 2, 5, 1, 3, 3, 2, 4, 6, 2, 3, 1, 2, 4, 3, 2]
    treated = [1, 0] * 12
    y, z, cl, X = cluster_data(sizes, treated, seed=31, covariates=2)
    block = np.repeat([0, 1, 2, 3], 6)[cl]
    est = estimate_adjusted(y, z, X, mechanism="blocked_cluster", block=block, cluster=cl)
    dummies = (block[:, None] == np.arange(1, 4)[None, :]).astype(float)
    beta, V = direct_cr2(lin_design(z, np.column_stack([X, dummies])), y, cl)
    assert est.estimate == pytest.approx(beta[1], rel=1e-10)
    assert est.std_error == pytest.approx(np.sqrt(V[1, 1]), rel=1e-10)
