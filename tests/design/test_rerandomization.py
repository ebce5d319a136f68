"""Tests of report_kit.design.rerandomization against outside references.

Sources, named beside each check: scipy.spatial.distance.mahalanobis, the
chi-squared approximation of the acceptance probability (Morgan & Rubin 2012,
scipy.stats.chi2), brute-force enumeration with itertools written here, and
the documented drawing algorithm re-implemented here from its description.
"""

from __future__ import annotations

import itertools
import math
import warnings

import numpy as np
import pytest
from scipy import stats
from scipy.spatial.distance import mahalanobis

from report_kit.design.draw import draw_assignment
from report_kit.design.mechanism import mechanism_from_arrays
from report_kit.design.rerandomization import (
    Rerandomization,
    RerandomizedSource,
    draw_rerandomized,
    mahalanobis_imbalance,
    rerandomized_assignments,
)
from report_kit.errors import DesignError, ReportKitWarning
from report_kit.inference.randomization import randomization_test


def covariates(n, p=2, seed=4):
    rng = np.random.default_rng(seed)
    return rng.normal(size=(n, p)) @ np.array([[1.0, 0.4], [0.0, 2.0]])[:p, :p] + 10


def scipy_distance(x, z):
    """Morgan & Rubin (2012) M via scipy.spatial.distance.mahalanobis with cov(xbar1 - xbar0) = S (1/n1 + 1/n0)."""
    z = np.asarray(z, bool)
    n1, n0 = z.sum(), (~z).sum()
    cov = np.atleast_2d(np.cov(x, rowvar=False)) * (1 / n1 + 1 / n0)
    return mahalanobis(x[z].mean(axis=0), x[~z].mean(axis=0), np.linalg.inv(cov)) ** 2


def test_mahalanobis_imbalance_equals_scipy():
    # scipy.spatial.distance.mahalanobis with the randomization covariance of the mean difference
    x = covariates(30)
    rng = np.random.default_rng(1)
    zz = np.zeros((5, 30), dtype=np.uint8)
    for row in zz:
        row[rng.permutation(30)[:12]] = 1
    got = mahalanobis_imbalance(x, zz)
    assert got == pytest.approx([scipy_distance(x, z) for z in zz], rel=1e-10)
    assert float(mahalanobis_imbalance(x[:, 0], zz[0])) == pytest.approx(scipy_distance(x[:, :1], zz[0]), rel=1e-10)


def test_draw_follows_the_documented_algorithm():
    # the algorithm of docs/methods/rerandomization.md re-implemented here: default_rng(seed), units sorted
    # by id, candidate = first k of rng.permutation(n), next candidate from the same rng, first with M <= a
    ids = np.array([f"u{i:02d}" for i in range(24)])[::-1]  # given in reverse id order
    x = covariates(24)
    crit = Rerandomization.from_arrays(x, 0.3)
    z, tried = draw_rerandomized("complete", ids, crit, seed=99)
    order = np.argsort(ids)
    rng = np.random.default_rng(99)
    for attempt in itertools.count(1):
        cand_sorted = np.zeros(24, dtype=int)
        cand_sorted[rng.permutation(24)[:12]] = 1
        cand = np.empty(24, dtype=int)
        cand[order] = cand_sorted
        if scipy_distance(x, cand) <= 0.3:
            break
    assert tried == attempt > 1
    assert np.array_equal(z, cand)
    # a criterion every assignment meets gives the plain draw of the seed
    loose = Rerandomization.from_arrays(x, 1e9)
    assert np.array_equal(draw_rerandomized("complete", ids, loose, seed=99)[0], draw_assignment("complete", ids, seed=99))


def test_exact_source_keeps_exactly_the_acceptable_assignments():
    # brute force over all C(12, 6) assignments (itertools) with scipy's Mahalanobis distance
    x = covariates(12)
    z_obs = np.array([1, 0, 1, 0, 1, 0, 1, 0, 1, 0, 1, 0])
    a = scipy_distance(x, z_obs) + 0.5
    crit = Rerandomization.from_arrays(x, a)
    mech = mechanism_from_arrays("complete", z_obs)
    src = rerandomized_assignments(mech, crit, max_exact=10**6, draws=100, seed=1)
    accepted = set()
    for chosen in itertools.combinations(range(12), 6):
        z = np.zeros(12, dtype=int)
        z[list(chosen)] = 1
        if scipy_distance(x, z) <= a:
            accepted.add(tuple(z))
    rows = {tuple(int(v) for v in r) for chunk in src.chunks() for r in chunk}
    assert isinstance(src, RerandomizedSource) and src.method == "exact"
    assert rows == accepted and src.draws == len(accepted)
    assert src.acceptance_rate == pytest.approx(len(accepted) / math.comb(12, 6))


def test_conditioned_p_value_equals_enumeration_over_acceptable_assignments():
    # exact p-value over the acceptable assignments only, listed here with itertools and scipy's distance
    x = covariates(12, seed=6)
    z_obs = np.array([1, 1, 0, 0, 1, 0, 0, 1, 1, 0, 0, 1])
    y = x[:, 0] + 0.8 * z_obs + np.random.default_rng(3).normal(size=12)
    a = scipy_distance(x, z_obs) * 1.5
    crit = Rerandomization.from_arrays(x, a)
    mech = mechanism_from_arrays("complete", z_obs)
    src = rerandomized_assignments(mech, crit, max_exact=10**6, draws=10, seed=1)
    t_obs = y[z_obs == 1].mean() - y[z_obs == 0].mean()
    stats_acc = []
    for chosen in itertools.combinations(range(12), 6):
        z = np.zeros(12, dtype=int)
        z[list(chosen)] = 1
        if scipy_distance(x, z) <= a:
            stats_acc.append(y[z == 1].mean() - y[z == 0].mean())
    ref = np.mean(np.array(stats_acc) >= t_obs - 1e-12)
    res = randomization_test(y, mech, source=src, alternative="greater")[0]
    assert res.method == "exact" and res.draws == len(stats_acc)
    assert res.p_value == pytest.approx(ref, abs=1e-12)


def test_monte_carlo_source_accepts_by_the_same_rule_and_matches_chi_squared_rate():
    # acceptance probability ~ P(chi2_p <= a) for large n (Morgan & Rubin 2012; scipy.stats.chi2);
    # asymptotic, so a tolerance of 0.03 (common practice) on top of the binomial error
    n = 400
    x = covariates(n, seed=8)
    z_obs = np.zeros(n, dtype=np.uint8)
    z_obs[:200] = 1
    a = float(scipy_distance(x, z_obs)) + 1.0
    crit = Rerandomization.from_arrays(x, a)
    mech = mechanism_from_arrays("complete", z_obs)
    src = rerandomized_assignments(mech, crit, max_exact=0, draws=3000, seed=12)
    rows = np.vstack(list(src.chunks()))
    assert rows.shape[0] == 3000 and np.all(mahalanobis_imbalance(x, rows) <= a * (1 + 1e-9))
    expected = stats.chi2.cdf(a, df=2)
    assert abs(src.acceptance_rate - expected) <= 0.03 + 3 * math.sqrt(expected * (1 - expected) / src.candidates)
    # the accepted draws do not depend on the chunk size
    small = RerandomizedSource(mechanism=mech, method="monte_carlo", draws=3000, seed=12, criterion=crit,
                               candidates=src.candidates, chunk_size=37)
    assert np.array_equal(np.vstack(list(small.chunks())), rows)


def test_refusals_name_the_problem():
    x = covariates(10)
    crit = Rerandomization.from_arrays(x, 1e-6)
    z = np.array([1, 0] * 5)
    with pytest.raises(DesignError, match="recorded assignment has Mahalanobis distance"):
        rerandomized_assignments(mechanism_from_arrays("complete", z), crit, max_exact=10, draws=10, seed=1)
    with pytest.raises(DesignError, match="bernoulli"):
        rerandomized_assignments(mechanism_from_arrays("bernoulli", z), crit, max_exact=10, draws=10, seed=1)
    with pytest.raises(DesignError, match="too strict"):
        draw_rerandomized("complete", np.arange(10), crit, seed=1, max_candidates=50)
    with pytest.raises(DesignError, match="constant or collinear"):
        Rerandomization.from_arrays(np.column_stack([x[:, 0], 2 * x[:, 0]]), 1.0)
    with pytest.raises(ValueError, match="max_distance"):
        Rerandomization.from_arrays(x, -1.0)
    with pytest.raises(ValueError, match="finite"):
        Rerandomization.from_arrays(np.full((10, 1), np.nan), 1.0)


def test_rerandomized_example_project_end_to_end(project_copy):
    # the invented rooftop-shade project: check re-draws the recorded assignment; the analysis enumerates
    # the acceptable assignments, whose count is checked here by itertools with scipy's distance
    from report_kit.design.assignment import check_assignment
    from report_kit.inputs.data import load_study
    from report_kit.inputs.spec import load_spec
    from report_kit.pipeline import analyse_project

    project = project_copy("rooftop-shade")
    study = load_study(load_spec(project))
    assert check_assignment(study).status == "reproduced"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ReportKitWarning)
        results = analyse_project(project)
    x = study.frame[["kwh_last_summer", "floors"]].to_numpy(float)
    y = study.outcome("kwh_this_summer")
    t_obs = y[study.z == 1].mean() - y[study.z == 0].mean()
    count = hits = 0
    for chosen in itertools.combinations(range(20), 10):
        z = np.zeros(20, dtype=int)
        z[list(chosen)] = 1
        if scipy_distance(x, z) <= 0.5:
            count += 1
            hits += y[z == 1].mean() - y[z == 0].mean() <= t_obs + 1e-9  # alternative "less"
    rer = results["design"]["rerandomization"]
    assert results["design"]["n_assignments"] == str(count)
    assert rer["acceptance_rate"] == pytest.approx(count / math.comb(20, 10))
    assert rer["observed_distance"] == pytest.approx(scipy_distance(x, study.z), rel=1e-9)
    assert any("conservative" in note for note in results["notes"])
    assert results["tests"][0]["draws"] == count
    # the p-value runs over the acceptable assignments only (guards any change of the engine's draws)
    assert results["tests"][0]["p_value"] == pytest.approx(hits / count, abs=1e-12)
    (ldr,) = results["rerandomization_intervals"]
    assert ldr["method"] == "li_ding_rubin_2018" and ldr["ci_high"] - ldr["ci_low"] < ldr["neyman_ci_high"] - ldr[
        "neyman_ci_low"]
