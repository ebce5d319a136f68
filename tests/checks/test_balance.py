"""Tests of report_kit.checks.balance (and the balance figure in report_kit.report.figures_checks)."""

from __future__ import annotations

import json
import statistics
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from matplotlib.figure import Figure
from scipy import stats

from tests.checks.draws import exact_complete, exact_bernoulli, mc_complete, split
from report_kit.checks import balance
from report_kit.checks import flow as flow_module
from report_kit.errors import DataError, DesignError, ReportKitWarning
from report_kit.report.figures_checks import plot_balance
from report_kit.inputs.model import AnalysisSpec, ComplianceSpec, DataSpec, DesignSpec, OutcomeSpec, Spec, Study

def make_study(frame: pd.DataFrame, *, covariates=(), outcomes=None, received=None) -> Study:
    outcomes = outcomes or (OutcomeSpec(column="y", label="Outcome"),)
    spec = Spec(
        path=Path("/nonexistent/design.yaml"), spec_version=1, title="Invented study", summary="",
        data=DataSpec(units="data/units.csv", id="uid"),
        design=DesignSpec(mechanism="complete", treatment="z"),
        analysis=AnalysisSpec(covariates=tuple(covariates)),
        outcomes=tuple(outcomes),
        compliance=None if received is None else ComplianceSpec(received=received),
    )
    return Study(spec=spec, frame=frame, inputs=())


# ---------------------------------------------------------------------------
# balance table
# ---------------------------------------------------------------------------


def test_std_diff_and_variance_ratio_match_direct_computation():
    # Reference: direct computation with the standard-library `statistics`
    # module (mean, stdev with divisor n-1); formula of Austin (2009).
    rng = np.random.default_rng(11)
    x = rng.normal(size=(30, 2)).round(3)
    z = np.array([1, 0] * 15)
    table = balance.balance_rows(x, z, ["age", "score"])
    for j, row in enumerate(table):
        t = [float(v) for v in x[z == 1, j]]
        c = [float(v) for v in x[z == 0, j]]
        s1, s0 = statistics.stdev(t), statistics.stdev(c)
        d = (statistics.mean(t) - statistics.mean(c)) / ((s1 ** 2 + s0 ** 2) / 2) ** 0.5
        assert row["mean_treated"] == pytest.approx(statistics.mean(t), rel=1e-12)
        assert row["mean_control"] == pytest.approx(statistics.mean(c), rel=1e-12)
        assert row["std_diff"] == pytest.approx(d, rel=1e-12)
        assert row["variance_ratio"] == pytest.approx(statistics.variance(t) / statistics.variance(c), rel=1e-12)


def test_missing_values_are_counted_and_skipped():
    x = np.array([1.0, np.nan, 3.0, 5.0, np.nan, np.nan, 2.0, 4.0])
    z = np.array([1, 1, 1, 1, 0, 0, 0, 0])
    (row,) = balance.balance_rows(x, z, ["baseline"])
    assert (row["missing_treated"], row["missing_control"]) == (1, 2)
    # by hand: treated {1, 3, 5} mean 3, sd 2; control {2, 4} mean 3
    assert row["mean_treated"] == 3.0 and row["mean_control"] == 3.0
    assert row["sd_treated"] == pytest.approx(2.0)
    assert row["std_diff"] == pytest.approx(0.0)


@pytest.mark.parametrize(("shift", "flag"), [(0.05, "small"), (0.09, "small"), (0.11, "moderate"),
                                             (-0.24, "moderate"), (0.26, "large"), (-0.3, "large")])
def test_flags_follow_common_practice_thresholds(shift, flag):
    # Common practice (Stuart 2010): |d| <= 0.1 negligible, > 0.25 large.
    # Both arms have SD 1 exactly, so d equals the shift in means.
    base = np.array([-1.0, 1.0, -1.0, 1.0]) * np.sqrt(3 / 4)
    x = np.concatenate([base + shift, base])
    z = np.array([1] * 4 + [0] * 4)
    (row,) = balance.balance_rows(x, z, ["x"])
    assert row["std_diff"] == pytest.approx(shift, abs=1e-12)
    assert row["flag"] == flag


def test_constant_covariate_warns_and_gives_none():
    z = np.array([1, 1, 0, 0])
    with pytest.warns(ReportKitWarning, match="constant within both arms"):
        (row,) = balance.balance_rows(np.ones(4), z, ["k"])
    assert row["std_diff"] is None and row["variance_ratio"] is None and row["flag"] is None
    json.dumps(row, allow_nan=False)


def test_balance_table_validation_messages():
    z = np.array([1, 0, 1, 0])
    with pytest.raises(ValueError, match=r"`names` must have 2 entries"):
        balance.balance_rows(np.zeros((4, 2)), z, ["a"])
    with pytest.raises(DataError, match=r"`z` must contain only 0 and 1; got 2"):
        balance.balance_rows(np.zeros(4), [1, 0, 2, 0], ["a"])
    with pytest.raises(DesignError, match="at least one treated and one control"):
        balance.balance_rows(np.zeros(4), [1, 1, 1, 1], ["a"])
    with pytest.raises(DataError, match=r"`X` must have shape \(n, p\) with n = 4"):
        balance.balance_rows(np.zeros((3, 1)), z, ["a"])
    with pytest.raises(ValueError, match="`names` must be unique"):
        balance.balance_rows(np.zeros((4, 2)), z, ["a", "a"])


# ---------------------------------------------------------------------------
# omnibus Mahalanobis test
# ---------------------------------------------------------------------------


def morgan_rubin_m(x: np.ndarray, z: np.ndarray) -> float:
    """Direct formula of Morgan & Rubin (2012), eq. for M, with an explicit inverse."""
    d = x[z == 1].mean(axis=0) - x[z == 0].mean(axis=0)
    n1, n0 = (z == 1).sum(), (z == 0).sum()
    cov = np.cov(x, rowvar=False) * (1 / n1 + 1 / n0)
    return float(d @ np.linalg.inv(np.atleast_2d(cov)) @ d)


def test_statistic_matches_direct_formula():
    rng = np.random.default_rng(3)
    x = rng.normal(size=(40, 3))
    z = np.array([1] * 15 + [0] * 25)
    res = balance.mahalanobis_balance_test(x, z, [mc_complete(z, 50, 1)], "monte_carlo")
    assert res.statistic == pytest.approx(morgan_rubin_m(x, z), rel=1e-10)
    assert res.df == 3


def test_exact_p_value_is_share_of_enumeration_and_null_mean_is_p():
    # Exact enumeration identities for complete randomization:
    # (1) the p-value is the share of all C(10,4) assignments with M >= M_obs
    #     (checked against the direct formula evaluated on each assignment);
    # (2) E[M] = p over the randomization distribution, since the covariance of
    #     the treated-sum under sampling without replacement is n1 n0 / n * S
    #     (Cochran 1977, Theorem 2.2), so E[M] = tr(I_p) = p.
    rng = np.random.default_rng(5)
    x = rng.normal(size=(10, 2))
    z = np.array([1, 0, 0, 1, 0, 1, 0, 0, 1, 0])
    Z = exact_complete(10, 4)
    res = balance.mahalanobis_balance_test(x, z, split(Z, 37), "exact")
    direct = np.array([morgan_rubin_m(x, row.astype(int)) for row in Z])
    m_obs = morgan_rubin_m(x, z)
    assert res.draws == 210
    assert res.p_value == pytest.approx(np.mean(direct >= m_obs - 1e-9), abs=1e-15)
    assert res.null_distribution.mean() == pytest.approx(2.0, rel=1e-10)
    assert res.mc_std_error is None


def test_large_design_p_value_near_chi_square_reference():
    # Asymptotic reference: under complete randomization M is approximately
    # chi-square with p degrees of freedom by the finite-population central
    # limit theorem (Morgan & Rubin 2012; section number from memory omitted).
    # Tolerance: 4 Monte Carlo SEs plus 0.01 for the finite n.
    rng = np.random.default_rng(8)
    n, p, draws = 300, 3, 4000
    x = rng.gamma(2.0, size=(n, p)) + rng.normal(size=(n, 1))
    z = np.zeros(n, dtype=int)
    z[rng.choice(n, 150, replace=False)] = 1
    res = balance.mahalanobis_balance_test(x, z, split(mc_complete(z, draws, 9), 512), "monte_carlo")
    reference = stats.chi2.sf(res.statistic, p)
    tol = 4 * np.sqrt(reference * (1 - reference) / draws) + 0.01
    assert abs(res.p_value - reference) < tol
    for q in (0.5, 0.9, 0.95):
        assert np.quantile(res.null_distribution, q) == pytest.approx(stats.chi2.ppf(q, p), rel=0.08)


def test_seeded_result_does_not_depend_on_chunk_size():
    rng = np.random.default_rng(2)
    x = rng.normal(size=(25, 2))
    z = np.array([1] * 12 + [0] * 13)
    Z = mc_complete(z, 999, 4)
    results = [balance.omnibus_balance(x, z, split(Z, size), "monte_carlo") for size in (1, 7, 999)]
    assert results[0] == results[1] == results[2]


def test_monte_carlo_plus_one_rule():
    # The +1 rule (Phipson & Smyth 2010): if no draw reaches the observed
    # value, p = 1 / (B + 1), never 0.
    x = np.arange(12, dtype=float)
    z = np.array([1] * 6 + [0] * 6)   # the most extreme split of x
    Z = np.array([[1, 0] * 6, [0, 1] * 6, [1, 1, 0, 0] * 3], dtype=np.uint8)
    res = balance.omnibus_balance(x, z, [Z], "monte_carlo")
    assert res["p_value"] == pytest.approx(1 / 4)
    assert res["draws"] == 3
    # the engine's one Monte Carlo SE: sqrt(p (1 - p) / B) with the reported p = 1/4, B = 3 (hand-computed)
    assert res["mc_std_error"] == pytest.approx(np.sqrt(0.25 * 0.75 / 3), rel=1e-15)


def test_bernoulli_enumeration_skips_draws_with_an_empty_arm():
    rng = np.random.default_rng(6)
    x = rng.normal(size=(8, 1))
    z = np.array([1, 0, 0, 1, 1, 0, 1, 0])
    Z = exact_bernoulli(8)
    res = balance.mahalanobis_balance_test(x, z, lambda: split(Z, 50), "exact")
    assert res.draws == 2 ** 8 - 2
    direct = [morgan_rubin_m(x, row.astype(int)) for row in Z if 0 < row.sum() < 8]
    assert res.p_value == pytest.approx(np.mean(np.array(direct) >= morgan_rubin_m(x, z) - 1e-9))


def bernoulli_weights(p: float):
    """Probability of each enumerated Bernoulli(p) assignment: p^c (1 - p)^(n - c)."""
    return lambda chunk: p ** chunk.sum(axis=1) * (1 - p) ** (chunk.shape[1] - chunk.sum(axis=1))


def test_weighted_bernoulli_enumeration_matches_direct_probability_sum():
    # Reference: the exact p-value of a Bernoulli(0.3) design is the total
    # probability of the assignments with M >= M_obs, given both arms non-empty,
    # summed directly here over all 2^8 assignments.
    rng = np.random.default_rng(16)
    x = rng.normal(size=(8, 2))
    z = np.array([1, 0, 0, 0, 1, 0, 0, 1])
    Z = exact_bernoulli(8)
    res = balance.mahalanobis_balance_test(x, z, split(Z, 40), "exact", weights=bernoulli_weights(0.3))
    m_obs = morgan_rubin_m(x, z)
    num = den = 0.0
    for row in Z:
        c = int(row.sum())
        if 0 < c < 8:
            prob = 0.3 ** c * 0.7 ** (8 - c)
            den += prob
            num += prob * (morgan_rubin_m(x, row.astype(int)) >= m_obs - 1e-9)
    assert res.p_value == pytest.approx(num / den, rel=1e-12)
    unweighted = balance.mahalanobis_balance_test(x, z, split(Z, 40), "exact")
    assert res.p_value != pytest.approx(unweighted.p_value)
    assert res.null_weights.shape == (2 ** 8 - 2,)
    with pytest.raises(ValueError, match="`weights` apply to exact enumeration only"):
        balance.omnibus_balance(x, z, [Z[1:20]], "monte_carlo", weights=bernoulli_weights(0.3))


def test_exact_enumeration_without_observed_assignment_is_an_error():
    x = np.arange(6, dtype=float)
    z = np.array([1, 1, 1, 0, 0, 0])
    Z = np.array([[0, 1, 0, 1, 0, 1], [1, 0, 1, 0, 1, 0]], dtype=np.uint8)
    with pytest.raises(DesignError, match="does not contain the observed assignment"):
        balance.omnibus_balance(x, z, [Z], "exact")


def test_missing_covariates_use_mean_and_indicator():
    # Reference: the direct formula on the matrix built by hand
    # (pooled-mean imputation + one missingness indicator per pattern).
    rng = np.random.default_rng(12)
    x = rng.normal(size=(30, 2))
    x[[2, 9, 17], 0] = np.nan
    x[[2, 9, 17], 1] = np.nan      # same pattern: one indicator only
    z = np.array([1, 0] * 15)
    filled = np.where(np.isnan(x), np.nanmean(x, axis=0), x)
    aug = np.column_stack([filled, np.isnan(x[:, 0]).astype(float)])
    res = balance.mahalanobis_balance_test(x, z, [mc_complete(z, 20, 3)], "monte_carlo")
    assert res.df == 3
    assert res.statistic == pytest.approx(morgan_rubin_m(aug, z), rel=1e-9)


def test_collinear_covariates_warn_and_reduce_df():
    rng = np.random.default_rng(4)
    a = rng.normal(size=20)
    x = np.column_stack([a, 2 * a + 1])
    z = np.array([1, 0] * 10)
    with pytest.warns(ReportKitWarning, match="span 1 of 2 dimensions"):
        res = balance.mahalanobis_balance_test(x, z, [mc_complete(z, 20, 3)], "monte_carlo")
    assert res.df == 1
    assert res.statistic == pytest.approx(morgan_rubin_m(a[:, None], z), rel=1e-9)


def test_omnibus_validation_messages():
    x = np.arange(4.0)
    z = np.array([1, 0, 1, 0])
    with pytest.raises(ValueError, match=r"`method` must be one of \{'exact', 'monte_carlo'\}; got 'random'"):
        balance.omnibus_balance(x, z, [np.eye(4, dtype=np.uint8)], "random")
    with pytest.raises(ValueError, match=r"assignment chunk 0 must have shape \(k, 4\)"):
        balance.omnibus_balance(x, z, [np.ones((2, 3), dtype=np.uint8)], "exact")
    with pytest.raises(ValueError, match="assignment chunk 1 must contain only 0 and 1"):
        balance.omnibus_balance(x, z, [np.eye(4, dtype=np.uint8), np.full((1, 4), 2)], "monte_carlo")
    with pytest.raises(ValueError, match="yielded no assignment"):
        balance.omnibus_balance(x, z, [], "monte_carlo")


# ---------------------------------------------------------------------------
# study level: balance section and participant flow
# ---------------------------------------------------------------------------


def flow_frame() -> pd.DataFrame:
    return pd.DataFrame({
        "uid": range(8),
        "z": [1, 1, 1, 1, 0, 0, 0, 0],
        "got": [1.0, 1.0, 0.0, 1.0, 0.0, 1.0, 0.0, np.nan],
        "age": [30.0, 41.0, np.nan, 35.0, 33.0, 38.0, 29.0, 44.0],
        "y": [1.0, np.nan, 2.0, 3.0, 1.0, 1.5, np.nan, np.nan],
        "w": [1.0, 2.0, 2.0, 3.0, 1.0, 1.5, 2.0, 0.0],
    })


def test_study_balance_section_shape_and_json():
    frame = flow_frame()
    study = make_study(frame, covariates=("age",))
    Z = exact_complete(8, 4)
    section = balance.study_balance(study, lambda: split(Z, 16), "exact")
    assert [row["name"] for row in section["covariates"]] == ["age"]
    assert section["covariates"][0]["missing_treated"] == 1
    assert section["omnibus"]["draws"] == 70 and section["omnibus"]["method"] == "exact"
    json.dumps(section, allow_nan=False)
    empty = balance.study_balance(make_study(frame), lambda: split(Z, 16), "exact")
    assert empty["covariates"] == [] and empty["omnibus"]["p_value"] is None


def test_participant_flow_counts_by_hand():
    frame = flow_frame()
    outcomes = (OutcomeSpec(column="y", label="Y"), OutcomeSpec(column="w", label="W", family="secondary"))
    study = make_study(frame, outcomes=outcomes, received="got")
    flow = flow_module.participant_flow(study)
    by = {(r["outcome"], r["arm"]): r for r in flow}
    # counted by hand from flow_frame()
    assert by["y", "treated"] == {"outcome": "y", "arm": "treated", "randomized": 4, "received_treatment": 3,
                                  "outcome_observed": 3, "lost": 1, "analysed": 3}
    assert by["y", "control"]["received_treatment"] == 1
    assert by["y", "control"]["outcome_observed"] == 2 and by["y", "control"]["lost"] == 2
    assert by["w", "control"]["outcome_observed"] == 4
    estimates = [{"outcome": "y", "estimand": "ATE", "estimator": "unadjusted", "subgroup": None,
                  "n_treated": 2, "n_control": 2}]
    by = {(r["outcome"], r["arm"]): r for r in flow_module.participant_flow(study, estimates)}
    assert by["y", "treated"]["analysed"] == 2 and by["w", "treated"]["analysed"] == 4
    no_compliance = flow_module.participant_flow(make_study(frame))
    assert no_compliance[0]["received_treatment"] is None


# ---------------------------------------------------------------------------
# figure
# ---------------------------------------------------------------------------


def test_plot_balance_draws_one_row_per_covariate():
    rows = [
        {"name": "age", "std_diff": 0.05, "flag": "small"},
        {"name": "income", "std_diff": -0.31, "flag": "large"},
        {"name": "flat", "std_diff": None, "flag": None},
    ]
    fig = plot_balance({"covariates": rows, "omnibus": {"p_value": 0.42, "method": "exact", "draws": 70}})
    assert isinstance(fig, Figure)
    ax = fig.axes[0]
    assert [t.get_text() for t in ax.get_yticklabels()] == ["flat", "income", "age"]
    assert any(t.get_text() == "n/a" for t in ax.texts)
    lo, hi = ax.get_xlim()
    assert lo < -0.31 and hi > 0.31
    with pytest.raises(ValueError, match="'covariates'"):
        plot_balance({"omnibus": {}})
