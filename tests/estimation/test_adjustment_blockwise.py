"""The block-wise Lin fit (large designs) against the whole-matrix fit and statsmodels.

The block-wise HC2 fit runs above ``_BLOCKWISE_CELLS`` regressor cells; here the threshold
is forced to 0 and the row blocks to a few units, so that small designs take it and every
step (group means, TSQR, leverages, contributions) crosses block edges. Outside reference:
statsmodels OLS with ``cov_type="HC2"`` on Lin's (2013) design matrix. The agreement is
checked to 1e-10 relative on the standard error, which a wrong leverage would break
(:func:`test_the_tolerance_catches_a_perturbed_leverage`).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import statsmodels.api as sm

import report_kit.estimation.adjustment as adjustment
from report_kit.errors import DesignError, ReportKitWarning
from report_kit.estimation.adjustment import estimate_adjusted
from report_kit.estimation.arms import estimate_contrasts_adjusted
from tests.estimation.test_arms_adjusted import ARMS, blocked_data
from tests.estimation.test_estimate import lin_design


def _data(seed: int, n: int = 240, *, missing: bool = True):
    rng = np.random.default_rng(seed)
    z = np.zeros(n, dtype=int)
    z[rng.permutation(n)[: n // 2 - 7]] = 1
    X = np.column_stack([rng.normal(size=n), rng.integers(18, 80, size=n).astype(float)])
    y = 0.5 * X[:, 0] + 0.02 * X[:, 1] + 0.3 * z + rng.normal(size=n)
    if missing:
        y[rng.choice(n, 9, replace=False)] = np.nan
        X[rng.choice(n, 6, replace=False), 0] = np.nan
    return y, z, X


def _fits(monkeypatch, fn, *args, rows: int = 7, **kw):
    """``fn`` by the whole-matrix fit, then by the block-wise fit (counting its calls)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ReportKitWarning)
        whole = fn(*args, **kw)
        calls = []
        real = adjustment._blockwise_hc2_fits

        def spy(*a, **k):
            calls.append(1)
            return real(*a, **k)

        monkeypatch.setattr(adjustment, "_BLOCKWISE_CELLS", 0)
        monkeypatch.setattr(adjustment, "_BLOCK_ROWS", rows)
        monkeypatch.setattr(adjustment, "_blockwise_hc2_fits", spy)
        blockwise = fn(*args, **kw)
    assert calls, "the block-wise fit did not run"
    return whole, blockwise


def _assert_same(whole, blockwise):
    assert blockwise.estimate == pytest.approx(whole.estimate, rel=1e-10)
    assert blockwise.std_error == pytest.approx(whole.std_error, rel=1e-10)
    assert blockwise.ci_low == pytest.approx(whole.ci_low, rel=1e-10)
    assert blockwise.df == pytest.approx(whole.df, rel=1e-12)
    assert (blockwise.n_treated, blockwise.n_control, blockwise.n_missing) == \
           (whole.n_treated, whole.n_control, whole.n_missing)
    assert (blockwise.method, blockwise.variance_rule) == (whole.method, whole.variance_rule)


@pytest.mark.parametrize("mechanism", ["complete", "bernoulli"])
@pytest.mark.parametrize("rows", [1, 7, 1000])
def test_unblocked_equals_the_whole_matrix_fit(monkeypatch, mechanism, rows):
    y, z, X = _data(11)
    _assert_same(*_fits(monkeypatch, estimate_adjusted, y, z, X, mechanism=mechanism, rows=rows))


def test_blocked_interacted_equals_the_whole_matrix_fit(monkeypatch):
    y, z, X = _data(12)
    block = np.repeat(["north", "south", "east", "west"], 60)
    _assert_same(*_fits(monkeypatch, estimate_adjusted, y, z, X, mechanism="blocked", block=block))


def test_blocked_additive_equals_the_whole_matrix_fit(monkeypatch):
    # a block with a single treated unit: block indicators enter additively
    y, z, X = _data(13, missing=False)
    block = np.repeat(["a", "b", "c"], 80)
    z[160:] = 0
    z[170] = 1
    y[[3, 100]] = np.nan
    X[[5, 90], 1] = np.nan
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", ReportKitWarning)
        estimate_adjusted(y, z, X, mechanism="blocked", block=block)
    assert any("enter additively" in str(w.message) for w in caught)
    _assert_same(*_fits(monkeypatch, estimate_adjusted, y, z, X, mechanism="blocked", block=block))


def test_collinear_covariate_is_dropped_the_same_way(monkeypatch):
    y, z, X = _data(14, missing=False)
    X = np.column_stack([X, 2.0 * X[:, 0] - X[:, 1]])
    whole, blockwise = _fits(monkeypatch, estimate_adjusted, y, z, X, mechanism="complete")
    _assert_same(whole, blockwise)
    assert whole.df == y.size - 2 - 4   # two cell intercepts, two slopes per arm


def test_several_contrasts_equal_the_whole_matrix_fit(monkeypatch):
    # several targets share one fit (the all-arms regression)
    y, arm, X, block = blocked_data()
    whole, blockwise = _fits(monkeypatch, estimate_contrasts_adjusted, y, arm, X, arms=ARMS,
                             contrasts="pairwise", mechanism="blocked", block=block, rows=5)
    assert len(whole) == len(blockwise) == 3
    for w, b in zip(whole, blockwise):
        _assert_same(w.estimate, b.estimate)


def test_leverage_one_is_refused_as_in_the_whole_matrix_fit(monkeypatch):
    # a block of one unit, absorbed by its own intercept: leverage 1
    y, z, X = _data(15, missing=False)
    block = np.array(["solo"] + ["rest"] * (y.size - 1))
    with pytest.raises(DesignError, match="1 unit.* leverage 1"):
        _fits(monkeypatch, estimate_adjusted, y, z, X, mechanism="blocked", block=block)
    monkeypatch.setattr(adjustment, "_BLOCKWISE_CELLS", 0)
    monkeypatch.setattr(adjustment, "_BLOCK_ROWS", 7)
    with pytest.raises(DesignError, match="1 unit.* leverage 1"), warnings.catch_warnings():
        warnings.simplefilter("ignore", ReportKitWarning)
        estimate_adjusted(y, z, X, mechanism="blocked", block=block)


def test_blockwise_equals_statsmodels_hc2(monkeypatch):
    # Reference: statsmodels OLS of y on (1, z, Xc, z Xc) (Lin 2013), cov_type HC2.
    y, z, X = _data(16, missing=False)
    fit = sm.OLS(y, lin_design(z, X)).fit(cov_type="HC2")
    _, est = _fits(monkeypatch, estimate_adjusted, y, z, X, mechanism="complete")
    assert est.estimate == pytest.approx(fit.params[1], rel=1e-10)
    assert est.std_error == pytest.approx(fit.bse[1], rel=1e-10)
    assert est.df == y.size - 6


def test_the_tolerance_catches_a_perturbed_leverage():
    # HC2 from statsmodels' hat matrix diagonal, and the same with the leverages moved by
    # 1e-6 (relative): the 1e-10 check on the SE above would fail on such an error.
    y, z, X = _data(17, missing=False)
    Z = lin_design(z, X)
    fit = sm.OLS(y, Z).fit()
    h = fit.get_influence().hat_matrix_diag
    bread = np.linalg.inv(Z.T @ Z) @ Z.T

    def se(lev):
        return float(np.sqrt(np.sum((bread[1] * fit.resid) ** 2 / (1.0 - lev))))

    assert se(h) == pytest.approx(fit.HC2_se[1], rel=1e-10)
    assert se(h * (1 + 1e-6)) != pytest.approx(fit.HC2_se[1], rel=1e-10)
