"""Standardized differences with the design's block weights.

Outside references: the inverse-probability-weighted difference in means (Horvitz &
Thompson 1952) computed with numpy's weighted average, which equals the block-weighted
within-block difference; and the property that a covariate perfectly balanced within
every block shows no imbalance whatever the treatment shares of the blocks.
"""

from __future__ import annotations

import numpy as np
import pytest

from report_kit.checks import balance


def _design(seed):
    rng = np.random.default_rng(seed)
    sizes = [10, 20, 8, 12]
    shares = [0.2, 0.5, 0.75, 0.5]
    block = np.repeat(np.arange(4), sizes)
    z = np.concatenate([rng.permutation(np.arange(s) < round(s * p)) for s, p in zip(sizes, shares)]).astype(int)
    return rng, block, z


def test_block_weighted_difference_equals_ipw_difference():
    rng, block, z = _design(1)
    x = rng.normal(size=z.size) + block
    (row,) = balance.balance_rows(x, z, ["x"], block=block)
    p = np.array([z[block == b].mean() for b in range(4)])[block]
    w1, w0 = z / p, (1 - z) / (1 - p)        # Horvitz–Thompson weights
    ipw = np.average(x, weights=w1) - np.average(x, weights=w0)
    pooled_sd = np.sqrt((x[z == 1].var(ddof=1) + x[z == 0].var(ddof=1)) / 2)
    assert row["mean_treated"] - row["mean_control"] == pytest.approx(ipw, rel=1e-12)
    assert row["std_diff"] == pytest.approx(ipw / pooled_sd, rel=1e-12)
    assert row["weighting"] == "blocks"


def test_balance_within_blocks_is_not_reported_as_imbalance():
    # x is the block number: identical in both arms of every block, so the design is
    # perfectly balanced on it; pooling ignores the varying shares and misreports it.
    _, block, z = _design(2)
    x = block.astype(float)
    (weighted,) = balance.balance_rows(x, z, ["x"], block=block)
    (pooled,) = balance.balance_rows(x, z, ["x"])
    assert weighted["std_diff"] == pytest.approx(0.0, abs=1e-12)
    assert abs(pooled["std_diff"]) > 0.3 and pooled["weighting"] == "none"
