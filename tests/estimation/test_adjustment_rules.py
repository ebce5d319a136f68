"""When the covariate adjustment is refused, and why.

Reference: the leverage identity of least squares (a unit whose leverage is 1 has a zero
residual; Hoaglin & Welsch 1978), which makes HC2 drop that unit's contribution; the rule
k + 2 units per arm (an intercept and k slopes per arm in Lin's 2013 interacted
regression, plus one residual degree of freedom) is common practice, documented in
docs/methods/estimation.md.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from report_kit.errors import DesignError, ReportKitWarning
from report_kit.estimation.neyman import estimate_adjusted, study_estimates
from tests.estimation.test_estimate import lin_design, make_study


def _issue_example(seed=3):
    # issue 15 item 3: 4 treated units and 3 covariates.
    rng = np.random.default_rng(seed)
    z = np.r_[np.ones(4, int), np.zeros(20, int)]
    X = rng.normal(size=(24, 3))
    y = rng.normal(size=24) + X.sum(axis=1) + z
    return y, z, X


def test_hat_matrix_confirms_the_collapse_the_rule_prevents():
    # statsmodels: with 4 treated units and 3 interacted covariates every treated unit has
    # leverage 1, so its HC2 term is 0/0 (statsmodels' own influence measure).
    y, z, X = _issue_example()
    lev = sm.OLS(y, lin_design(z, X)).fit().get_influence().hat_matrix_diag
    assert np.allclose(lev[z == 1], 1.0)
    with pytest.raises(DesignError, match=r"treated arm has 4 units .* fewer than the 5 needed"):
        estimate_adjusted(y, z, X, mechanism="complete")


def test_rule_boundary_k_plus_two_units_per_arm():
    rng = np.random.default_rng(4)
    z = np.r_[np.ones(5, int), np.zeros(20, int)]
    X = rng.normal(size=(25, 3))
    y = rng.normal(size=25) + X.sum(axis=1)
    est = estimate_adjusted(y, z, X, mechanism="complete")      # 5 = 3 + 2: allowed
    fit = sm.OLS(y, lin_design(z, X)).fit(cov_type="HC2")
    assert est.std_error == pytest.approx(fit.bse[1], rel=1e-8)
    with pytest.raises(DesignError, match="fewer than the 5 needed"):
        estimate_adjusted(y[1:], z[1:], X[1:], mechanism="complete")


def test_study_keeps_unadjusted_rows_and_notes_why_no_adjusted_estimate():
    y, z, X = _issue_example()
    frame = pd.DataFrame({"unit_id": np.arange(24), "assigned": z, "score": y,
                          "a": X[:, 0], "b": X[:, 1], "c": X[:, 2]})
    with pytest.warns(ReportKitWarning, match=r"no covariate-adjusted estimate \(the treated arm has 4"):
        rows = study_estimates(make_study(frame, covariates=["a", "b", "c"]))
    assert [r["estimator"] for r in rows] == ["unadjusted"]
