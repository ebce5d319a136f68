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
from report_kit.estimation.neyman import estimate_effects


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
    assert 2.0 < est.df < 3.0          # "about 2.5" in the issue's example
    cov_bm, cov_g2 = hit_bm / draws, hit_g2 / draws
    mc_se = np.sqrt(0.95 * 0.05 / draws)
    assert cov_g2 < 0.95 - 3 * mc_se   # G - 2 under-covers beyond Monte Carlo error
    assert abs(cov_bm - 0.95) < abs(cov_g2 - 0.95)
    assert cov_bm > 0.95 - 4 * mc_se


def _random_blocked_design(rng):
    """Blocks of random sizes 2..30 with random arm sizes (at least one unit per arm)."""
    sizes = rng.integers(2, 31, size=rng.integers(3, 8))
    z = []
    for size in sizes:
        n1 = rng.integers(1, size)
        z.append(rng.permutation(np.r_[np.ones(n1, int), np.zeros(size - n1, int)]))
    return np.repeat(np.arange(sizes.size), sizes), np.concatenate(z)


@pytest.mark.parametrize("seed", range(25))
def test_block_variance_is_shift_invariant_over_random_designs(seed):
    # Property (Pashley & Miratrix 2021; any estimator of the variance under a constant
    # additive effect): adding a constant to every treated outcome moves the estimate by
    # that constant and leaves the standard error unchanged.
    rng = np.random.default_rng(seed)
    block, z = _random_blocked_design(rng)
    y = rng.normal(size=z.size) + block * 0.3
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ReportKitWarning)
        base = estimate_effects(y, z, mechanism="blocked", block=block)[0]
        for shift in (20.0, -7.5):
            moved = estimate_effects(y + shift * z, z, mechanism="blocked", block=block)[0]
            assert moved.estimate == pytest.approx(base.estimate + shift, abs=1e-9)
            if base.std_error is None:
                assert moved.std_error is None
            else:
                assert moved.std_error == pytest.approx(base.std_error, rel=1e-9, abs=1e-12)


def test_issue_example_blocks_of_2_4_8_30_shift_invariant():
    # The issue's example: blocks of 2, 4, 8 and 30 units (two of each here; the small
    # blocks have one treated unit). Before the correction the SE grew with the shift.
    rng = np.random.default_rng(15)
    sizes, treated = [2, 4, 8, 30] * 2, [1, 1, 1, 15] * 2
    block = np.repeat(np.arange(8), sizes)
    z = np.concatenate([rng.permutation([1] * t + [0] * (s - t)) for s, t in zip(sizes, treated)])
    y = rng.normal(size=z.size)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ReportKitWarning)
        se0 = estimate_effects(y, z, mechanism="blocked", block=block)[0].std_error
        se20 = estimate_effects(y + 20 * z, z, mechanism="blocked", block=block)[0].std_error
    assert se0 is not None and se20 == pytest.approx(se0, rel=1e-10)


def test_small_block_variance_is_unbiased_under_constant_effect_by_enumeration():
    # Exact enumeration identity (Neyman 1923 applied per block): with the same effect in
    # every block, the mean of the estimated variance over all assignments equals the true
    # variance of the estimate over those assignments. Blocks of 3, 4, 5, 6 units, one
    # treated unit each (all small), unequal sizes.
    import itertools

    sizes = [3, 4, 5, 6]
    rng = np.random.default_rng(5)
    block = np.repeat(np.arange(4), sizes)
    y0 = rng.normal(size=block.size) * 2 + block
    y1 = y0 + 1.7
    starts = np.r_[0, np.cumsum(sizes)[:-1]]
    estimates, variances = [], []
    for picks in itertools.product(*[range(s) for s in sizes]):
        z = np.zeros(block.size, int)
        z[starts + np.array(picks)] = 1
        est = estimate_effects(np.where(z == 1, y1, y0), z, mechanism="blocked", block=block)[0]
        estimates.append(est.estimate)
        variances.append(est.std_error ** 2)
    true_var = np.var(estimates)          # all assignments equally likely
    assert np.mean(estimates) == pytest.approx(1.7, rel=1e-12)
    assert np.mean(variances) == pytest.approx(true_var, rel=1e-10)
